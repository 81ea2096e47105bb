"""The solver's cached sparsity pattern, checked against scipy.sparse assembling the same entries afresh.

The layout (closurecheck.graph.solver._Layout) finds the CSC pattern of the
gauge-fixed normal matrix once per set of free nodes and scatters every
iteration's 3x3 edge blocks into it.  Reference: scipy.sparse.coo_matrix
built from the scalar (row, column, value) triplets of the same blocks and
converted with ``tocsc`` (which sums duplicates), independently of the
layout's index arithmetic.
"""

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import least_squares

from closurecheck.core import se2
from closurecheck.graph.solver import SolverOptions, _Layout, normal_matrix, optimize_graph


def random_edges(rng, n_nodes, n_edges):
    """Random edges without self loops; duplicates (parallel edges) on purpose."""
    src = rng.integers(0, n_nodes, n_edges)
    dst = (src + rng.integers(1, n_nodes, n_edges)) % n_nodes
    return src, dst


def fresh_assembly(n_nodes, src, dst, free, blocks, gblocks):
    """The same normal matrix and gradient by scipy.sparse from scalar triplets (reference assembly)."""
    var = np.full(n_nodes, -1)
    var[free] = np.arange(np.count_nonzero(free))
    size = 3 * np.count_nonzero(free)
    rows, cols, vals = [], [], []
    grad = np.zeros(size)
    for e, (i, j) in enumerate(zip(var[src], var[dst])):
        for b, (r, c) in enumerate([(i, i), (i, j), (j, i), (j, j)]):
            if r < 0 or c < 0:
                continue
            for a in range(3):
                for d in range(3):
                    rows.append(3 * r + a)
                    cols.append(3 * c + d)
                    vals.append(blocks[e, b, a, d])
        for b, r in enumerate([i, j]):
            if r >= 0:
                grad[3 * r:3 * r + 3] += gblocks[e, b]
    h = sp.coo_matrix((vals, (rows, cols)), shape=(size, size)).tocsc()
    h.sort_indices()
    return h, grad


@pytest.mark.parametrize("seed, n_nodes, n_edges, drop", [(0, 12, 30, 0.0), (1, 40, 70, 0.2), (2, 5, 3, 0.0)])
def test_cached_pattern_gives_the_same_matrix_as_fresh_scipy_assembly(seed, n_nodes, n_edges, drop):
    rng = np.random.default_rng(seed)
    src, dst = random_edges(rng, n_nodes, n_edges)
    free = rng.random(n_nodes) >= drop
    free[0] = False  # the gauge node is never a variable
    layout = _Layout(n_nodes, src, dst, free)
    for _ in range(2):  # the pattern is reused: new values, same layout
        blocks = rng.normal(size=(n_edges, 4, 3, 3))
        gblocks = rng.normal(size=(n_edges, 2, 3))
        h = layout.csc(layout.assemble(blocks))
        ref, ref_grad = fresh_assembly(n_nodes, src, dst, free, blocks, gblocks)
        assert h.shape == ref.shape
        # Same pattern entry for entry (each 3x3 block dense), rows sorted in every column as in the reference.
        np.testing.assert_array_equal(h.indptr, ref.indptr)
        np.testing.assert_array_equal(h.indices, ref.indices)
        np.testing.assert_allclose(h.data, ref.data, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(layout.gradient(gblocks), ref_grad, rtol=1e-12, atol=1e-12)
        # The diagonal slots are exactly the diagonal entries, once each (every free node with an edge).
        col_of = np.repeat(np.arange(layout.size), np.diff(layout.indptr))
        np.testing.assert_array_equal(col_of[layout.diag_slots], layout.indices[layout.diag_slots])
        dense = h.toarray()
        np.testing.assert_array_equal(np.sort(layout.indices[layout.diag_slots]),
                                      np.flatnonzero(np.any(dense != 0, axis=0)))


def test_layout_without_free_nodes_is_empty():
    layout = _Layout(3, np.array([1]), np.array([2]), np.zeros(3, dtype=bool))
    assert layout.size == 0 and layout.nnz == 0
    assert layout.csc(layout.assemble(np.ones((1, 4, 3, 3)))).shape == (0, 0)


def test_normal_matrix_nonzeros_are_nine_per_node_and_eighteen_per_distinct_edge():
    # Each edge couples two poses: its node pair adds two off-diagonal 3x3 blocks, each node one diagonal
    # block, so the stored entries grow linearly with poses and edges (9 per block, blocks dense).
    rng = np.random.default_rng(4)
    for n in (50, 500, 5000):
        truth = np.cumsum(rng.normal(size=(n, 3)) * [0.5, 0.5, 0.1], axis=0)
        loops = rng.integers(0, n, size=(n, 2))
        loops = loops[loops[:, 0] != loops[:, 1]]
        src = np.concatenate([np.arange(n - 1), loops[:, 0]])
        dst = np.concatenate([np.arange(1, n), loops[:, 1]])
        delta = se2.between(truth[src], truth[dst])
        info = np.broadcast_to(np.eye(3), (len(src), 3, 3))
        h, _ = normal_matrix(truth, src, dst, delta, info)
        pairs = {(min(i, j), max(i, j)) for i, j in zip(src, dst) if i != 0 and j != 0}
        assert h.nnz == 9 * (n - 1) + 18 * len(pairs)


def test_same_optimum_as_scipy_least_squares_on_a_graph_with_many_loops():
    # Reference: scipy.optimize.least_squares (method "lm", MINPACK's Levenberg-Marquardt) on the whitened
    # residuals L^T e (Omega = L L^T) with node 0 held, as in the module docstring.  A wandering route with
    # a loop every other step fills the factor, so the reused ordering is exercised beyond a thin chain.
    initial, src, dst, delta, info = _loop_graph()

    sol = optimize_graph(initial, src, dst, delta, info)

    chol = np.linalg.cholesky(info)

    def residuals(p):
        x = np.vstack([initial[:1], p.reshape(-1, 3)])
        e = se2.between(x[src], x[dst]) - delta
        e[:, 2] = se2.wrap(e[:, 2])
        return np.einsum("eji,ej->ei", chol, e).ravel()

    ref = least_squares(residuals, initial[1:].ravel(), method="lm", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    ref_poses = np.vstack([initial[:1], ref.x.reshape(-1, 3)])
    assert sol.converged and len(src) - (len(initial) - 1) >= 20  # loop edges
    np.testing.assert_allclose(sol.cost, ref.cost, rtol=1e-9)
    d = sol.poses - ref_poses
    d[:, 2] = se2.wrap(d[:, 2])
    assert np.abs(d).max() < 1e-6


def _loop_graph(seed=8, n=60):
    rng = np.random.default_rng(seed)
    heading = np.cumsum(rng.normal(0.0, 0.4, n))
    xy = np.cumsum(0.5 * np.c_[np.cos(heading), np.sin(heading)], axis=0)
    truth = np.c_[xy, se2.wrap(heading)]
    near = np.argwhere(np.linalg.norm(xy[:, None] - xy[None], axis=2) < 3.0)
    near = near[near[:, 1] - near[:, 0] >= 4][::4]
    src = np.concatenate([np.arange(n - 1), near[:, 0]])
    dst = np.concatenate([np.arange(1, n), near[:, 1]])
    sigma = np.array([0.05, 0.05, 0.02])
    delta = se2.between(truth[src], truth[dst]) + rng.normal(size=(len(src), 3)) * sigma
    delta[:, 2] = se2.wrap(delta[:, 2])
    info = np.broadcast_to(np.diag(1.0 / sigma**2), (len(src), 3, 3)).copy()
    steps, _ = se2.chain(delta[: n - 1])
    return se2.compose(truth[0], steps), src, dst, delta, info


def test_preconditioned_cg_reuses_the_old_factor_and_solves_the_new_matrix():
    # Reference: scipy.sparse.linalg.spsolve on each matrix.  After two factorisations the third solve runs
    # conjugate gradients preconditioned by the second factor (no new factorisation); when CG may not take
    # enough iterations it factorises afresh.  Either way the answer is the new matrix's.
    import scipy.sparse.linalg as spla

    from closurecheck.graph.solver import _Graph, _LinearSolver, _validate

    initial, src, dst, delta, info = _loop_graph()
    graph = _Graph(*_validate(initial, src, dst, delta, info, None))
    layout = graph.layout(np.ones(len(src), dtype=bool))
    e, _ = graph.errors(initial)
    rng = np.random.default_rng(2)
    for max_its, factorisations in ((50, 2), (1, 3)):
        solve = _LinearSolver(layout, SolverOptions(linear_solver="splu_pcg", pcg_max_iterations=max_its))
        for k in range(3):
            weights = 1.0 + (0.05 if k < 2 else 0.5) * rng.uniform(-1.0, 1.0, len(src))
            data, grad = graph.linearise(initial, e, weights, layout)
            x = solve(data, -grad)
            expected = spla.spsolve(layout.csc(data), -grad)
            np.testing.assert_allclose(x, expected, rtol=1e-8, atol=1e-10 * np.abs(expected).max())
        assert solve.factorisations == factorisations


def test_splu_pcg_reaches_the_same_optimum_as_the_direct_solver():
    initial, src, dst, delta, info = _loop_graph(seed=9)
    a = optimize_graph(initial, src, dst, delta, info)
    b = optimize_graph(initial, src, dst, delta, info, options=SolverOptions(linear_solver="splu_pcg"))
    assert a.converged and b.converged
    np.testing.assert_allclose(b.cost, a.cost, rtol=1e-10)
    d = a.poses - b.poses
    d[:, 2] = se2.wrap(d[:, 2])
    assert np.abs(d).max() < 1e-8


@pytest.mark.parametrize("seed, n_nodes, n_edges, drop", [(3, 30, 90, 0.0), (4, 25, 60, 0.3)])
def test_assembly_adds_in_the_order_bincount_does(seed, n_nodes, n_edges, drop):
    # The scatter is a sparse product; results must stay bit-identical to the former
    # np.bincount(slot, weights=...) assembly (numpy's documented sequential sum over the input order),
    # which the demo record was made with.  Repeated node pairs give slots with several addends.
    rng = np.random.default_rng(seed)
    src, dst = random_edges(rng, n_nodes, n_edges)
    src, dst = np.r_[src, dst[:10]], np.r_[dst, src[:10]]  # the same pairs again, reversed
    free = rng.random(n_nodes) >= drop
    free[0] = False
    layout = _Layout(n_nodes, src, dst, free)
    blocks = rng.normal(size=(len(src), 4, 3, 3)) * 10.0 ** rng.integers(-8, 8, size=(len(src), 4, 3, 3))
    slot_of_entry = np.asarray(layout.scatter.T.tocsr().argmax(axis=1)).ravel()
    valid = np.asarray(layout.scatter.sum(axis=0)).ravel() > 0
    reference = np.bincount(slot_of_entry[valid], weights=blocks.reshape(-1)[valid], minlength=layout.nnz)
    np.testing.assert_array_equal(layout.assemble(blocks), reference)
