"""The neighbour search of the line fits (_kernels.neighbourhoods) against a brute force and cKDTree.

On a scan in beam order the kernel walks along the beams, stopping on a
bound from the bearing separation; on other clouds it searches a hash
grid.  Either way it must give the answer its definition gives, bit for
bit, in any order of the points: the k nearest within the radius sorted by
(distance, index), and the tie flags.  The reference is a brute force over
every pair; where no tie is flagged the neighbours must also be
scipy.spatial.cKDTree's (a general-purpose library).  Inputs: scans in beam
order, the same scans shuffled and reversed, random clouds, quantised lines
and repeated points (exact ties), tiny scans, wide scans (cells widened,
reach 1) and simulated logs; for the walk itself, points sorted by bearing
at random ranges (true neighbours far along the array), both ways round,
with the array's seam anywhere.
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


def _walk(pts, k, radius):
    """The walk along the beams itself, on points that must qualify for it (bearings once round, one way)."""
    pts = np.ascontiguousarray(pts, dtype=np.float64)
    phi = np.arctan2(pts[:, 1], pts[:, 0])
    assert _kernels._unwrap_bearings(phi)
    r = np.hypot(pts[:, 0], pts[:, 1])
    with np.errstate(invalid="ignore", divide="ignore"):
        ux, uy = np.where(r > 0, pts[:, 0] / r, 0.0), np.where(r > 0, pts[:, 1] / r, 0.0)
    return _kernels._bearing_walk(pts, k, radius, phi, ux, uy)


def _by_bearing(pts):
    return pts[np.argsort(np.arctan2(pts[:, 1], pts[:, 0]), kind="stable")]


def _bearing_ordered(rng):
    """Points sorted by bearing whose nearest neighbours are far apart in the array, and beam-ordered scans."""
    for lo in (0.05, 0.31, 1.0):
        # Random points in an annulus: neighbours come from any bearing within the bound.
        r = rng.uniform(lo, 4.0, 600)
        a = rng.uniform(-np.pi, np.pi, 600)
        yield _by_bearing(np.column_stack([r * np.cos(a), r * np.sin(a)]))
    # A quarter turn only, and a fan of radial lines (many points at one bearing, exact ties once quantised).
    a = rng.uniform(0.2, 0.2 + np.pi / 2, 400)
    r = rng.uniform(0.4, 3.0, 400)
    yield _by_bearing(np.column_stack([r * np.cos(a), r * np.sin(a)]))
    ranges = np.linspace(0.4, 3.0, 60)
    fan = np.concatenate([np.column_stack([ranges * np.cos(t), ranges * np.sin(t)])
                          for t in np.linspace(-3.0, 3.0, 12)])
    yield _by_bearing(np.round(fan, 2))
    for pose, _ in PAIRS[:3]:
        pts = scan(pose, rng)
        yield pts
        yield _by_bearing(np.round(pts * 100.0) / 100.0)    # rounding the coordinates swaps a few bearings


@pytest.mark.parametrize("k, radius", [(16, 0.3), (5, 0.3), (21, 0.5), (40, 2.0), (3, 0.3)])
def test_the_walk_along_the_beams_is_the_definition(k, radius):
    # The walk stops each side on a bound of the distance from the bearing separation; points sorted
    # by bearing but at random ranges put true neighbours far along the array, so a bound that is
    # not one (|p| times the separation, or no wrap at a half turn) drops some of them.
    rng = np.random.default_rng(100 + k)
    tied = 0
    for pts in _bearing_ordered(rng):
        n = len(pts)
        # Counter-clockwise, clockwise, and with the seam of the array inside the scan.
        for cloud in (pts, pts[::-1], np.roll(pts, n // 3, axis=0), np.roll(pts[::-1], n // 5, axis=0)):
            idx, t = _walk(cloud, min(k, n), radius)
            ref_idx, ref_tied, _ = _brute_force(np.ascontiguousarray(cloud), min(k, n), radius)
            np.testing.assert_array_equal(idx, ref_idx)
            np.testing.assert_array_equal(t, ref_tied)
            tied += t.sum()
    assert tied > 0


def test_clouds_the_walk_cannot_bound_take_the_grid():
    rng = np.random.default_rng(7)
    ring = _by_bearing(rng.uniform(-3.0, 3.0, (500, 2)))
    phi = np.arctan2(ring[:, 1], ring[:, 0])
    assert _kernels._unwrap_bearings(phi.copy())
    assert not _kernels._unwrap_bearings(phi[rng.permutation(len(phi))].copy())    # not in bearing order
    assert not _kernels._unwrap_bearings(np.concatenate([phi, phi]))                # twice round
    # Sorted by bearing, but a quarter of the points within the radius of the sensor, or one at the
    # sensor itself: the answer is the definition's whichever search gives it.
    near = _by_bearing(np.concatenate([ring, rng.uniform(-0.2, 0.2, (170, 2))]))
    for pts in (near, np.concatenate([ring[:200], np.zeros((1, 2)), ring[200:]])):
        idx, tied = _kernels.neighbourhoods(np.ascontiguousarray(pts), 16, 0.3)
        ref_idx, ref_tied, edge = _brute_force(pts, 16, 0.3)
        np.testing.assert_array_equal(idx[~edge], ref_idx[~edge])
        np.testing.assert_array_equal(tied[~edge], ref_tied[~edge])
