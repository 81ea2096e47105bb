"""The compiled ICP loop (registration/_kernels.py icp_line) against the Python loop it replaced.

The Python loop (icp._icp_line_loop) stays for the other robust kernels and
for ties between nearest points; for the Huber kernel both run the same
iterations, so on ordinary pairs they must pick the same correspondences,
take the same number of iterations and stop at the same pose up to
rounding (the compiled sums run in row order, numpy's through BLAS).
Scenes: the simulator's warehouse (walls and racks) and lot (lamp posts,
the small-object rows), invented floor plans.
"""

import numpy as np
import pytest

import closurecheck
from closurecheck.core import se2
from closurecheck.core.kernels import kernel_from_name
from closurecheck.registration import icp

OPT = icp.RegistrationOptions(coarse=False)


def _pairs(scenario, n_pairs, seed):
    log = closurecheck.simulate_log(scenario, seed=seed, scans=n_pairs * 6 + 10)
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n_pairs):
        a = 5 + 6 * k
        b = a + int(rng.integers(1, 5))
        try:
            tgt = icp.prepare_scan(log.points(a), OPT)
            src = icp.prepare_scan(log.points(b), OPT)
        except closurecheck.InputError:
            continue
        guess = se2.between(log.truth[a], log.truth[b]) + rng.normal(0.0, [0.1, 0.1, 0.03])
        out.append((src, tgt, guess))
    return out


@pytest.mark.parametrize("scenario", ["warehouse", "lot"])
def test_compiled_loop_matches_the_python_loop(scenario):
    kernel = kernel_from_name(OPT.kernel, OPT.kernel_scale)
    assert kernel.name == "huber"
    cos_max = np.cos(OPT.max_normal_angle_rad)
    with_points = 0
    pairs = _pairs(scenario, 12, seed=3)
    assert len(pairs) >= 10
    for src, tgt, guess in pairs:
        fast = icp._icp_line(src, tgt, guess, OPT, kernel)
        slow = icp._icp_line_loop(src, tgt, guess, OPT, kernel, cos_max, np.array([1.0, 1.0, src.length_m ** 2]))
        assert fast.iterations == slow.iterations and fast.converged == slow.converged
        np.testing.assert_array_equal(fast.src, slow.src)
        np.testing.assert_array_equal(fast.tgt, slow.tgt)
        # 1e-6 m: rounding in the sums, amplified along a corridor's weak direction.
        np.testing.assert_allclose(fast.x, slow.x, rtol=0, atol=1e-6)
        np.testing.assert_allclose(fast.r, slow.r, rtol=0, atol=1e-6)
        np.testing.assert_allclose(fast.w, slow.w, rtol=0, atol=1e-6)
        assert abs(fast.scale - slow.scale) <= 1e-9 + 1e-6 * slow.scale
        assert (fast.points is None) == (slow.points is None)
        if fast.points is not None:
            with_points += 1
            np.testing.assert_array_equal(fast.points.src, slow.points.src)
            np.testing.assert_array_equal(fast.points.tgt, slow.points.tgt)
            np.testing.assert_allclose(fast.points.r, slow.points.r, rtol=0, atol=1e-6)
            np.testing.assert_allclose(fast.points.tgt_coef, slow.points.tgt_coef, rtol=0, atol=1e-6)
    if scenario == "lot":
        assert with_points > 0     # the small-object rows were exercised


def test_nearest_k_matches_the_kd_tree():
    # Reference: scipy.spatial.cKDTree.query with k and distance_upper_bound.
    from scipy.spatial import cKDTree

    from closurecheck.registration import _kernels

    rng = np.random.default_rng(7)
    pts = rng.uniform(-5.0, 5.0, (400, 2))
    queries = rng.uniform(-6.0, 6.0, (2000, 2))
    for k in (1, 2, 3):
        j, tied = _kernels.nearest_k(pts, *_kernels.cell_index(pts, 0.25), queries, 0.5, k)
        _, ref = cKDTree(pts).query(queries, k=k, distance_upper_bound=0.5)
        assert not tied
        np.testing.assert_array_equal(j, ref.reshape(len(queries), k))
