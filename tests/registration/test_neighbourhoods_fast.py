"""The neighbour search of the line fits (_kernels.neighbourhoods) against a brute force and cKDTree.

The kernel offers a point's candidates along the beams first (fast on scans
in beam order) and must give the answer its definition gives, bit for bit,
in any order of the points: the k nearest within the radius sorted by
(distance, index), and the tie flags.  The reference is a brute force over
every pair; where no tie is flagged the neighbours must also be
scipy.spatial.cKDTree's (a general-purpose library).  Inputs: scans in beam
order, the same scans shuffled and reversed, random clouds, quantised lines
and repeated points (exact ties), tiny scans, wide scans (cells widened,
reach 1) and simulated logs.
"""

import numpy as np
import pytest
from scipy.spatial import cKDTree
from test_icp import PAIRS, scan

from closurecheck.registration import _kernels
from closurecheck.simulation.simulate import simulate_log


def _brute_force(pts, k, radius):
    """The kernel's answer by definition: every pair's squared distance, sorted by (distance, index).

    The distances are the kernel's bits (``ex * ex + ey * ey`` of the coordinate differences).  A
    point is tied where two of its kept neighbours lie at the same distance, or where the nearest
    one left out within the radius lies at the k-th one's distance.  ``edge`` marks the points with
    another point at the radius to within rounding: the kernel decides which cells to visit from
    the cells' own distances, computed another way, so such a point may be in for one and out for
    the other (on lattices; the kernel's answer there is its own, as a kd-tree's is).
    """
    n = len(pts)
    ex = pts[None, :, 0] - pts[:, None, 0]
    ey = pts[None, :, 1] - pts[:, None, 1]
    d = ex * ex + ey * ey
    idx = np.full((n, k), n, dtype=np.int64)
    tied = np.zeros(n, dtype=bool)
    r2 = radius * radius
    edge = (np.abs(d - r2) <= 1e-9 * r2).any(axis=1)
    for p in range(n):
        near = np.flatnonzero(d[p] < radius * radius)
        near = near[np.lexsort((near, d[p, near]))]
        dn = d[p, near]
        kept = near[:k]
        idx[p, :len(kept)] = kept
        tied[p] = bool(np.any(dn[1:len(kept)] == dn[:len(kept) - 1])) or (len(near) > k and dn[k] == dn[k - 1])
    return idx, tied, edge


def _check(pts, k, radius):
    """Compare with the brute-force answer and with the tree; (tied flags, points the tree vouched for)."""
    pts = np.ascontiguousarray(pts, dtype=np.float64)
    idx, tied = _kernels.neighbourhoods(pts, k, radius)
    ref_idx, ref_tied, edge = _brute_force(pts, k, radius)
    np.testing.assert_array_equal(idx[~edge], ref_idx[~edge])
    np.testing.assert_array_equal(tied[~edge], ref_tied[~edge])
    if len(pts):
        # The tree measures the radius its own way: a point at the radius to within rounding (a
        # lattice's step times an integer) may be in for one and out for the other, tie or not.
        # Such points are left out of this comparison too.
        tree = cKDTree(pts)
        _, inner = tree.query(pts, k=k, distance_upper_bound=radius * (1.0 - 1e-9))
        _, outer = tree.query(pts, k=k, distance_upper_bound=radius * (1.0 + 1e-9))
        inner, outer = inner.reshape(len(pts), k), outer.reshape(len(pts), k)
        clear = ~tied & (inner == outer).all(axis=1)
        np.testing.assert_array_equal(idx[clear], outer[clear])
        return tied, int(clear.sum())
    return tied, 0


def _scans(rng):
    """Scans in beam order: the ray-cast workshop of test_icp.py, plain and with ranges quantised."""
    for pose, _ in PAIRS:
        pts = scan(pose, rng)
        yield pts
        yield np.round(pts * 100.0) / 100.0        # 1 cm: exact ties along straight walls


def _clouds(rng):
    yield rng.uniform(-3.0, 3.0, (400, 2))
    yield rng.uniform(-150.0, 150.0, (300, 2))                      # cells widened, reach 1
    yield np.concatenate([rng.normal(0.0, 0.05, (200, 2)), rng.uniform(-1.0, 1.0, (100, 2))])
    line = np.column_stack([np.arange(300) * 0.02, np.zeros(300)])  # equal steps: ties everywhere
    yield line
    yield np.round(np.column_stack([np.linspace(-4.0, 4.0, 500), np.linspace(1.0, 3.0, 500)]), 2)
    grid = np.stack(np.meshgrid(np.arange(20) * 0.05, np.arange(20) * 0.05), -1).reshape(-1, 2)
    yield grid                                                       # ties at every ring of the lattice
    pts = rng.uniform(-2.0, 2.0, (150, 2))
    yield np.concatenate([pts, pts[::3], pts[::7]])                  # repeated points: ties at distance 0
    yield np.repeat(rng.uniform(-1.0, 1.0, (10, 2)), 20, axis=0)     # 20 copies of each point


@pytest.mark.parametrize("k, radius", [(16, 0.3), (5, 0.3), (21, 0.5), (40, 2.0), (16, 0.05), (3, 0.3)])
def test_same_as_the_definition_on_scans_and_clouds(k, radius):
    rng = np.random.default_rng(k)
    tied, clear, total = 0, 0, 0
    for pts in list(_scans(rng)) + list(_clouds(rng)):
        for cloud in (pts, pts[rng.permutation(len(pts))], pts[::-1]):    # in beam order or not
            t, c = _check(cloud, k, radius)
            tied, clear, total = tied + t.sum(), clear + c, total + len(cloud)
    assert tied > 0                  # the quantised scans and lattices did make ties
    assert clear > 0.4 * total       # and the tree vouched for many points


@pytest.mark.parametrize("n", [0, 1, 2, 5, 15, 16, 17])
def test_same_as_the_definition_on_tiny_scans(n):
    rng = np.random.default_rng(n)
    for spread in (0.01, 0.2, 5.0):
        pts = rng.uniform(-spread, spread, (n, 2))
        for k in (1, 4, 16):
            _check(pts, k, 0.3)
    if n:
        _check(np.zeros((n, 2)), 16, 0.3)                            # all on one spot


@pytest.mark.parametrize("scenario", ["warehouse", "ring", "yard", "hall", "lot"])
def test_same_as_the_definition_on_simulated_logs(scenario):
    # Float32 ranges as a log stores them, converted as the pipeline does (ScanLog.points).
    log = simulate_log(scenario, seed=0, scans=50)
    for t in range(len(log)):
        pts = log.points(t)
        assert _check(pts, min(16, len(pts)), 0.3)[1] > 0.5 * len(pts)
        if t % 10 == 0:
            _check(pts, min(8, len(pts)), 0.6)


def test_the_kept_neighbours_are_the_nearest_within_the_radius():
    # Independent of both kernels: a brute-force sort by (distance, index) of every pair.
    rng = np.random.default_rng(4)
    pts = np.round(scan(PAIRS[0][0], rng) * 50.0) / 50.0
    k, radius = 16, 0.3
    idx, tied = _kernels.neighbourhoods(pts, k, radius)
    d = ((pts[:, None, :] - pts[None, :, :]) ** 2).sum(-1)
    for p in range(len(pts)):
        near = np.flatnonzero(d[p] < radius * radius)
        near = near[np.lexsort((near, d[p, near]))][:k]
        expect = np.full(k, len(pts))
        expect[:len(near)] = near
        np.testing.assert_array_equal(idx[p], expect)
    assert tied.any()
