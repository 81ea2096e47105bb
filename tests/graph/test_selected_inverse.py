"""Blocks of a sparse inverse and the map gate's posterior covariances, against dense references.

References: numpy.linalg.inv of the dense matrix, and scipy.sparse.linalg.splu
solves against block columns of the identity (general-purpose libraries).
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from closurecheck.core import se2
from closurecheck.graph.selected_inverse import (
    _node_graph,
    _symbolic,
    inverse_blocks,
    nested_dissection_order,
)
from closurecheck.graph.solver import normal_matrix
from closurecheck.verification.map_gate import relative_posterior


def random_block_spd(n, b, extra_pairs, rng, components=1):
    """A block matrix assembled like a normal matrix: random PSD edge terms on a chain plus random pairs."""
    h = np.zeros((n * b, n * b))
    cuts = set(np.linspace(0, n, components + 1).astype(int)[1:-1])
    pairs = [(k, k + 1) for k in range(n - 1) if k + 1 not in cuts]
    labels = np.searchsorted(sorted(cuts), np.arange(n), side="right")
    for _ in range(extra_pairs):
        i, j = rng.choice(n, 2, replace=False)
        if labels[i] == labels[j]:
            pairs.append((i, j))
    for i, j in pairs:
        jac = rng.normal(size=(b, 2 * b))
        idx = np.r_[b * i:b * i + b, b * j:b * j + b]
        h[np.ix_(idx, idx)] += jac.T @ jac
    h += 0.05 * np.eye(n * b)  # every node anchored a little, so H is positive definite
    return h


def all_blocks(s, n, b):
    return s.reshape(n, b, n, b).transpose(0, 2, 1, 3)


@pytest.mark.parametrize("n, b, extra, components, seed", [
    (1, 3, 0, 1, 0), (2, 3, 0, 1, 1), (7, 3, 3, 1, 2), (40, 3, 15, 1, 3), (150, 3, 60, 1, 4),
    (90, 3, 30, 3, 5), (120, 1, 50, 1, 6), (80, 2, 40, 2, 7),
])
def test_every_block_equals_the_dense_inverse(n, b, extra, components, seed):
    rng = np.random.default_rng(seed)
    h = random_block_spd(n, b, extra, rng, components)
    expected = all_blocks(np.linalg.inv(h), n, b)  # reference: numpy.linalg.inv
    rows, cols = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    got = inverse_blocks(sp.csc_matrix(h), b, rows.ravel(), cols.ravel()).reshape(n, n, b, b)
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-10 * np.abs(expected).max())
    diag = inverse_blocks(sp.csc_matrix(h), b, np.arange(n), np.arange(n))
    np.testing.assert_allclose(diag, expected[np.arange(n), np.arange(n)], rtol=0, atol=1e-10 * np.abs(expected).max())


def test_blocks_do_not_depend_on_which_others_are_asked_for():
    # Each block is summed from the same columns in the same order whatever else is asked for (the
    # walk keeps a node's column only as deep as its own pairs need), so a subset, a repeat or a
    # reversed order of the pairs gives the same bits; the values against numpy.linalg.inv.
    rng = np.random.default_rng(12)
    n, b = 300, 3
    h = sp.csc_matrix(random_block_spd(n, b, 120, rng, components=2))
    rows, cols = rng.integers(0, n, 400), rng.integers(0, n, 400)
    full = inverse_blocks(h, b, rows, cols)
    pick = rng.choice(400, 37, replace=False)
    np.testing.assert_array_equal(inverse_blocks(h, b, rows[pick], cols[pick]), full[pick])
    np.testing.assert_array_equal(inverse_blocks(h, b, rows[::-1], cols[::-1]), full[::-1])
    np.testing.assert_array_equal(inverse_blocks(h, b, np.r_[rows, rows], np.r_[cols, cols])[400:], full)
    expected = all_blocks(np.linalg.inv(h.toarray()), n, b)[rows, cols]
    np.testing.assert_allclose(full, expected, rtol=0, atol=1e-10 * np.abs(expected).max())
    assert inverse_blocks(h, b, [], []).shape == (0, b, b)


def test_nested_dissection_keeps_a_long_chain_shallow():
    # A path of 3000 nodes: eliminating it end to end gives an elimination tree 3000 deep, nested
    # dissection about log2(3000) separators of one node each (plus what METIS leaves to its small parts).
    n = 3000
    adj = sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")
    order = nested_dissection_order(adj)
    assert np.array_equal(np.sort(order), np.arange(n))
    colptr, _, parent = _symbolic(adj, order)
    counts = np.diff(colptr)
    assert counts.max() <= 2  # a path never fills beyond two neighbours
    depth = np.zeros(n, dtype=int)
    for j in range(n - 1, -1, -1):
        if parent[j] >= 0:
            depth[j] = depth[parent[j]] + 1
    assert depth.max() < 40


def test_order_is_a_permutation_on_disconnected_graphs():
    rng = np.random.default_rng(11)
    h = random_block_spd(200, 3, 40, rng, components=4)
    order = nested_dissection_order(_node_graph(sp.csc_matrix(h), 3))
    assert np.array_equal(np.sort(order), np.arange(200))


def test_not_positive_definite_raises():
    h = np.diag([1.0, 2.0, 3.0, 1.0, -1.0, 1.0])
    with pytest.raises(np.linalg.LinAlgError):
        inverse_blocks(sp.csc_matrix(h), 3, [0], [0])


def test_out_of_range_node_raises():
    with pytest.raises(ValueError):
        inverse_blocks(sp.identity(6, format="csc"), 3, [0], [2])
    with pytest.raises(ValueError):
        inverse_blocks(sp.identity(6, format="csc"), 3, [0, 1], [1])


# ---------------------------------------------------------------------------
# Map-gate posterior on a pose graph


def laps_graph(n_per_lap=60, laps=4, seed=0):
    """Odometry chain round a rectangle (invented floor plan) with closures between laps."""
    rng = np.random.default_rng(seed)
    n = n_per_lap * laps
    s = np.arange(n) % n_per_lap / n_per_lap * 2 * np.pi
    truth = np.stack([8 * np.cos(s), 5 * np.sin(s), se2.wrap(s + np.pi / 2)], axis=1)
    src = np.arange(n - 1)
    dst = src + 1
    lap_src = np.arange(n_per_lap, n, 3)
    loop_src, loop_dst = lap_src, lap_src - n_per_lap * rng.integers(1, 1 + lap_src // n_per_lap)
    src, dst = np.r_[src, loop_src], np.r_[dst, loop_dst]
    delta = se2.between(truth[src], truth[dst]) + rng.normal(0, 0.01, (len(src), 3))
    info = np.repeat(np.diag([1e4, 1e4, 3e4])[None], len(src), 0)
    info[len(src) - len(loop_src):] *= 0.2
    return truth, src, dst, delta, info


def test_relative_posterior_equals_sparse_lu_block_columns():
    poses, src, dst, delta, info = laps_graph()
    n = len(poses)
    rng = np.random.default_rng(3)
    pi = np.r_[rng.integers(0, n, 200), 0, 5, 17, 0]
    pj = np.r_[rng.integers(0, n, 200), 9, 5, 200, 0]
    rel, cov = relative_posterior(poses, src, dst, delta, info, pi, pj)
    # Reference: columns of H^-1 by scipy's SuperLU, then J [[S_ii, S_ij], [S_ji, S_jj]] J^T.
    h, _ = normal_matrix(poses, src, dst, delta, info)
    s = np.zeros((3 * n, 3 * n))
    s[3:, 3:] = spla.splu(h.tocsc()).solve(np.eye(h.shape[0]))
    scale = np.abs(cov).max()
    for k, (i, j) in enumerate(zip(pi, pj)):
        ja, jb = se2.between_jacobians(poses[i], poses[j])
        jj = np.hstack([ja, jb])
        idx = np.r_[3 * i:3 * i + 3, 3 * j:3 * j + 3]
        expected = jj @ s[np.ix_(idx, idx)] @ jj.T
        np.testing.assert_allclose(cov[k], expected, rtol=1e-9, atol=1e-12 * scale)
        np.testing.assert_allclose(rel[k], se2.between(poses[i], poses[j]))
    # Pairs with node 0 (the fixed gauge) carry only the other node's uncertainty; (0, 0) and (5, 5) none.
    assert np.all(cov[-1] == 0.0)
    assert np.abs(cov[-3]).max() < 1e-12 * scale
    distinct = pi != pj
    assert np.all(np.linalg.eigvalsh(cov[distinct])[:, 0] > 0)
