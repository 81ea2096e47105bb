"""Coarse stage: likelihood grid, bound pyramid and branch-and-bound search.

Checks against scipy (cKDTree distances, ndimage.maximum_filter) and against
an exhaustive evaluation of the same score over the same lattice of poses.
"""

import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial import cKDTree

from closurecheck import se2
from closurecheck.coarse import auto_angle_step, build_grid, distinct, downsample, search
from closurecheck.raycast import cast

BEARINGS = -2.356 + 0.00654 * np.arange(721)

# Invented floor plan: a bicycle repair room with a bench and a stand (metres).
ROOM = np.array([
    [0, 0, 9, 0], [9, 0, 9, 6], [9, 6, 0, 6], [0, 6, 0, 0],
    [1, 4, 3.5, 4], [3.5, 4, 3.5, 4.8], [6, 1, 7.5, 2.2],
], float)


def scan(pose, rng):
    r = cast(np.asarray(pose, float), BEARINGS, ROOM, None, max_range=20.0)
    ok = np.isfinite(r)
    r = r[ok] + rng.normal(0.0, 0.015, ok.sum())
    return np.column_stack([r * np.cos(BEARINGS[ok]), r * np.sin(BEARINGS[ok])])


@pytest.fixture(scope="module")
def pair():
    rng = np.random.default_rng(2009)
    a, b = np.array([2.5, 2.0, 0.3]), np.array([4.0, 2.8, 1.0])
    return scan(a, rng), scan(b, rng), se2.between(a, b)


@pytest.mark.parametrize("res, sigma", [(0.1, 0.1), (0.05, 0.13), (0.1, 0.3), (0.1, 0.04)])
def test_grid_values_match_scipy_distances(pair, res, sigma):
    target, _, _ = pair
    grid = build_grid(target, res, sigma, 8)
    occ = np.unique(np.floor((target - grid.origin) / res).astype(int), axis=0)
    ii, jj = np.meshgrid(*map(np.arange, grid.fine.shape), indexing="ij")
    cells = np.column_stack([ii.ravel(), jj.ravel()])
    # Reference: distance from each cell to the nearest cell holding a point, by scipy's kd-tree.
    d = cKDTree(occ).query(cells)[0] * res
    expected = np.rint(255 * np.exp(-0.5 * (d / sigma) ** 2)).reshape(grid.fine.shape)
    np.testing.assert_array_equal(grid.fine, expected)


def test_pyramid_levels_are_block_maxima(pair):
    target, _, _ = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    assert len(grid.levels) == 5
    for lvl, level in enumerate(grid.levels):
        size = 2 ** lvl
        # Reference: scipy.ndimage.maximum_filter over [i, i + size) x [j, j + size).
        ref = ndimage.maximum_filter(grid.fine, size=size, mode="constant", cval=0,
                                     origin=-(size // 2))
        np.testing.assert_array_equal(level, ref)
    # The margin keeps every level zero on the grid's border.
    for level in grid.levels:
        assert level[0].max() == 0 and level[-1].max() == 0 and level[:, 0].max() == 0 and level[:, -1].max() == 0


def brute_force(grid, pts, seed, window_m, window_rad, step):
    """Score of every (angle, offset) of the search lattice, by direct evaluation."""
    r = grid.resolution_m
    half = int(np.ceil(window_m / r))
    n_ang = int(np.ceil(window_rad / step))
    rows = []
    for k in range(-n_ang, n_ang + 1):
        th = seed[2] + k * step
        c, s = np.cos(th), np.sin(th)
        w = np.column_stack([c * pts[:, 0] - s * pts[:, 1] + seed[0], s * pts[:, 0] + c * pts[:, 1] + seed[1]])
        cells = np.floor((w - grid.origin) / r).astype(int)
        for dx in range(-half, half + 1):
            for dy in range(-half, half + 1):
                cx, cy = cells[:, 0] + dx, cells[:, 1] + dy
                inside = (cx >= 0) & (cx < grid.fine.shape[0]) & (cy >= 0) & (cy < grid.fine.shape[1])
                score = grid.fine[cx[inside], cy[inside]].astype(int).sum()
                rows.append([score, seed[0] + dx * r, seed[1] + dy * r, th])
    rows = np.array(rows, float)
    return rows[np.argsort(-rows[:, 0], kind="stable")]


@pytest.mark.parametrize("levels", [1, 4, 16])
def test_branch_and_bound_equals_exhaustive_search(pair, levels):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, levels)
    pts = downsample(source, 0.2, 60)
    seed = truth + np.array([0.3, -0.2, 0.05])
    step = 0.02
    kw = dict(window_m=0.6, window_rad=0.06, angle_step_rad=step, n_best=3, separation_m=0.3, separation_rad=0.1)
    poses, scores = search(grid, pts, seed, **kw)
    ref = brute_force(grid, pts, seed, 0.6, 0.06, step)
    keep = distinct(ref, 3, 0.3, 0.1)
    np.testing.assert_allclose(scores, ref[keep, 0] / (255 * len(pts)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(poses[0], ref[keep[0], 1:], atol=1e-9)


def test_search_finds_the_true_pose_from_far_away(pair):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    pts = downsample(source, 0.2, 160)
    step = auto_angle_step(pts, 0.1)
    seed = truth + np.array([-2.0, 1.5, -0.6])
    poses, scores = search(grid, pts, seed, window_m=3.0, window_rad=0.7, angle_step_rad=step, n_best=3,
                           separation_m=0.5, separation_rad=0.15)
    assert np.hypot(*(poses[0, :2] - truth[:2])) < 0.15
    assert abs(se2.wrap(poses[0, 2] - truth[2])) < 2 * step
    # Most source points land near a target point; the runners-up are clearly worse.
    assert scores[0] > 0.6 and scores[1] < scores[0] - 0.2
    assert len(scores) == 3 and np.all(np.diff(scores) <= 0)


def test_downsample_keeps_one_point_per_cell():
    pts = np.random.default_rng(0).uniform(0, 5, (2000, 2))
    out = downsample(pts, 0.5, 10_000)
    cells = np.floor(out / 0.5).astype(int)
    assert len(np.unique(cells, axis=0)) == len(out) == 100
    assert len(downsample(pts, 0.5, 30)) == 30


def test_auto_angle_step_moves_far_points_by_one_cell():
    pts = np.column_stack([np.linspace(1, 10, 100), np.zeros(100)])
    step = auto_angle_step(pts, 0.1)
    assert step == pytest.approx(0.1 / np.percentile(pts[:, 0], 90))


def union_brute_force(grid, pts, seeds, window_m, window_rad, step):
    """Exhaustive scores over the union of the seeds' lattices.

    A rotation of a later seed within half a step of an earlier seed's angle
    range is that seed's already (search's documented rule for shared windows).
    """
    n_ang = int(np.ceil(window_rad / step))
    parts = []
    for k, seed in enumerate(seeds):
        rows = brute_force(grid, pts, seed, window_m, window_rad, step)
        for prev in seeds[:k]:
            rows = rows[np.abs(se2.wrap(rows[:, 3] - prev[2])) > (n_ang + 0.5) * step]
        parts.append(rows)
    rows = np.concatenate(parts)
    return rows[np.argsort(-rows[:, 0], kind="stable")]


@pytest.mark.parametrize("levels", [1, 4, 16])
def test_joint_search_of_several_seeds_equals_exhaustive_search_over_their_windows(pair, levels):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, levels)
    pts = downsample(source, 0.2, 60)
    step = 0.02
    # A seed near the truth, one turned far away (disjoint window) and one whose
    # window half overlaps the first's.
    near = truth + np.array([0.3, -0.2, 0.05])
    seeds = np.array([near + [0, 0, 1.3], near, near + [0, 0, 0.09]])
    kw = dict(window_m=0.6, window_rad=0.06, angle_step_rad=step, n_best=3, separation_m=0.3, separation_rad=0.1)
    poses, scores = search(grid, pts, seeds, **kw)
    ref = union_brute_force(grid, pts, seeds, 0.6, 0.06, step)
    keep = distinct(ref, 3, 0.3, 0.1)
    np.testing.assert_allclose(scores, ref[keep, 0] / (255 * len(pts)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(poses[0], ref[keep[0], 1:], atol=1e-9)


def test_joint_search_finds_what_independent_searches_find(pair):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    pts = downsample(source, 0.2, 160)
    kw = dict(window_m=1.5, window_rad=0.3, angle_step_rad=0.01, n_best=3, separation_m=0.5, separation_rad=0.15)
    right = truth + np.array([0.4, -0.3, 0.1])
    wrong = [right + [0, 0, 1.6], right + [0, 0, -2.4]]
    alone = [search(grid, pts, s, **kw) for s in (*wrong, right)]
    best = max(range(3), key=lambda k: alone[k][1][0])
    # Whichever order the seeds come in, the joint search's best is the best of the
    # independent searches (their windows are disjoint, so the lattices are the same).
    for order in ([0, 1, 2], [2, 0, 1], [1, 2, 0]):
        seeds = np.array([[*wrong, right][k] for k in order])
        poses, scores = search(grid, pts, seeds, **kw)
        assert scores[0] == pytest.approx(alone[best][1][0], abs=1e-12)
        np.testing.assert_allclose(poses[0], alone[best][0][0], atol=1e-9)
        # The runners-up are distinct poses no better than the best, best first.
        assert np.all(np.diff(scores) <= 0)
        assert len(distinct(np.column_stack([scores, poses]), 3, 0.5, 0.15)) == len(scores)
    assert np.hypot(*(alone[best][0][0, :2] - truth[:2])) < 0.15


def test_repeated_seed_adds_no_rotations(pair):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    pts = downsample(source, 0.2, 160)
    kw = dict(window_m=1.0, window_rad=0.2, angle_step_rad=0.01, n_best=3, separation_m=0.5, separation_rad=0.15)
    seed = truth + np.array([0.2, 0.2, 0.05])
    one = search(grid, pts, seed, **kw)
    # The same seed twice, or a copy nudged by less than half a step, searches the same lattice.
    for extra in ([0, 0, 0], [0, 0, 0.004]):
        two = search(grid, pts, np.array([seed, seed + extra]), **kw)
        np.testing.assert_array_equal(two[0], one[0])
        np.testing.assert_array_equal(two[1], one[1])
