"""The heading-first start (closurecheck.graph.initial) against independent references.

References: the truth of a synthetic graph whose measurements agree exactly
(the two linear stages of Carlone, Aragues, Castellanos and Bona, IJRR 2014,
recover it); numpy.linalg.lstsq (LAPACK) on the same weighted linear
equations written out densely; scipy.optimize.least_squares for the optimum
that Levenberg-Marquardt reaches from the start.
"""

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.graph.initial import heading_first_poses
from closurecheck.graph.solver import SolverOptions, optimize_graph

from test_cholesky import least_squares_reference, wandering_graph

pytest.importorskip("cvxopt.cholmod")


def exact_graph(n, seed):
    """Truth of a drive whose headings wind through +-pi several times, loop edges measured without noise."""
    rng = np.random.default_rng(seed)
    heading = np.cumsum(np.r_[0.0, rng.normal(0.4, 0.2, n - 1)])  # about 0.4 rad per step: many turns
    xy = np.cumsum(np.c_[np.cos(heading), np.sin(heading)] * 0.5, axis=0)
    truth = np.c_[xy, se2.wrap(heading)]
    loops = rng.integers(0, n, size=(n, 2))
    loops = loops[loops[:, 0] != loops[:, 1]]
    src = np.r_[np.arange(n - 1), loops[:, 0]]
    dst = np.r_[np.arange(1, n), loops[:, 1]]
    delta = se2.between(truth[src], truth[dst])
    a = rng.normal(size=(len(src), 3, 3))
    info = a @ np.swapaxes(a, 1, 2) + 0.5 * np.eye(3)  # full (correlated) information
    return truth, src, dst, delta, info


def test_exact_measurements_give_the_truth():
    truth, src, dst, delta, info = exact_graph(200, seed=1)
    rng = np.random.default_rng(2)
    start = truth.copy()
    # Headings off by up to 1 rad choose the same multiple of 2 pi on every edge only if each edge's error
    # difference stays below pi: +-0.45 rad per node keeps it there.  Positions are not used.
    start[1:, 2] = se2.wrap(start[1:, 2] + rng.uniform(-0.45, 0.45, len(start) - 1))
    start[1:, :2] += rng.normal(0.0, 5.0, (len(start) - 1, 2))
    poses = heading_first_poses(start, src, dst, delta, info)
    d = poses - truth
    d[:, 2] = se2.wrap(d[:, 2])
    assert np.abs(d).max() < 1e-9


def test_each_stage_is_the_weighted_least_squares_solution():
    # Reference: numpy.linalg.lstsq on the stages' equations written out densely, square-root weighted.
    initial, src, dst, delta, info = wandering_graph(120, seed=5)
    poses = heading_first_poses(initial, src, dst, delta, info)
    n, m = len(initial), len(src)
    cov = np.linalg.inv(info)
    turns = np.round((initial[dst, 2] - initial[src, 2] - delta[:, 2]) / (2 * np.pi))
    a = np.zeros((m, n))
    a[np.arange(m), dst] += 1.0
    a[np.arange(m), src] -= 1.0
    sw = 1.0 / np.sqrt(cov[:, 2, 2])
    rhs = delta[:, 2] + 2 * np.pi * turns - a[:, 0] * initial[0, 2]
    theta = np.linalg.lstsq(sw[:, None] * a[:, 1:], sw * rhs, rcond=None)[0]
    assert np.abs(se2.wrap(poses[1:, 2] - theta)).max() < 1e-9
    # Positions given the returned headings: whitened by the Cholesky factor of each rotated 2x2 information.
    rot = se2.rotation(poses[src, 2])
    w = rot @ np.linalg.inv(cov[:, :2, :2]) @ np.swapaxes(rot, 1, 2)
    upper = np.swapaxes(np.linalg.cholesky(w), 1, 2)  # w = U^T U
    a2 = np.einsum("eab,en->eanb", upper, a)[:, :, :, None, :] * np.eye(2)[None, None, None]  # (m, 2, n, 2, 2)
    a2 = np.einsum("eanbc->eanc", a2).reshape(2 * m, 2 * n)
    b2 = np.einsum("eab,eb->ea", upper, np.einsum("eij,ej->ei", rot, delta[:, :2])).ravel()
    b2 -= a2[:, :2] @ initial[0, :2]
    xy = np.linalg.lstsq(a2[:, 2:], b2, rcond=None)[0].reshape(-1, 2)
    np.testing.assert_allclose(poses[1:, :2], xy, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(poses[0], initial[0])


def test_optimising_from_the_start_reaches_the_least_squares_optimum():
    # Reference: scipy.optimize.least_squares from the odometry chain (tight tolerances on both).
    initial, src, dst, delta, info = wandering_graph(300, seed=7)
    start = heading_first_poses(initial, src, dst, delta, info)
    tight = SolverOptions(relative_cost_tolerance=1e-15, step_tolerance=1e-12, initial_damping=1e-10)
    sol = optimize_graph(start, src, dst, delta, info, options=tight)
    ref_poses, ref_cost = least_squares_reference(initial, src, dst, delta, info)
    assert sol.converged
    np.testing.assert_allclose(sol.cost, ref_cost, rtol=1e-9)
    d = sol.poses - ref_poses
    d[:, 2] = se2.wrap(d[:, 2])
    assert np.abs(d).max() < 1e-6


def test_nodes_cut_off_from_node_0_keep_their_poses():
    truth, src, dst, delta, info = exact_graph(40, seed=3)
    keep = (src < 30) & (dst < 30)  # nodes 30-39 form their own chain, no edge to the rest
    island = (src >= 30) & (dst >= 30)
    src, dst, delta, info = src[keep | island], dst[keep | island], delta[keep | island], info[keep | island]
    start = truth + 0.1
    poses = heading_first_poses(start, src, dst, delta, info)
    np.testing.assert_array_equal(poses[30:], np.c_[start[30:, :2], se2.wrap(start[30:, 2])])
    # The connected part is the truth seen from node 0's held pose: start[0] ∘ (truth[0]^-1 ∘ truth[k]).
    expected = se2.compose(start[0], se2.between(truth[:1], truth[:30]))
    d = poses[:30] - expected
    d[:, 2] = se2.wrap(d[:, 2])
    assert np.abs(d).max() < 1e-9


def test_bad_arrays_are_refused():
    truth, src, dst, delta, info = exact_graph(10, seed=4)
    with pytest.raises(InputError):
        heading_first_poses(truth, src, dst, delta[:-1], info)
