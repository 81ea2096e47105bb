"""Coarse stage: likelihood grid, bound pyramid and branch-and-bound search.

Checks against scipy (cKDTree distances, ndimage.maximum_filter) and against
an exhaustive evaluation of the same score over the same lattice of poses.
"""

import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial import cKDTree

from closurecheck.core import se2
from closurecheck.registration.correlative import (
    auto_angle_step,
    build_grid,
    distinct,
    downsample,
    search,
)
from closurecheck.simulation.raycast import cast

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


@pytest.mark.parametrize("levels, window_m, window_rad, sep_m, sep_rad", [
    (4, 1.5, 0.3, 0.5, 0.15), (16, 1.5, 0.3, 0.5, 0.15), (8, 1.2, 0.2, 0.5, 0.15)])
def test_every_hypothesis_equals_exhaustive_search(pair, levels, window_m, window_rad, sep_m, sep_rad):
    # Windows wider than the separation, so that the search sets aside blocks its best leaf suppresses
    # (_kernels._park: 43-59 blocks at the end of each of these, counted on a build that reported them): all three
    # hypotheses, not only the best, must be those of the exhaustive lattice.  A block set aside that
    # held a runner-up (a zone one cell too wide, or a bound test the wrong way) changes one of them.
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, levels)
    pts = downsample(source, 0.2, 60)
    seed = truth + np.array([0.3, -0.2, 0.05])
    kw = dict(window_m=window_m, window_rad=window_rad, angle_step_rad=0.02, n_best=3, separation_m=sep_m,
              separation_rad=sep_rad)
    poses, scores = search(grid, pts, seed, **kw)
    ref = brute_force(grid, pts, seed, window_m, window_rad, 0.02)
    keep = distinct(ref, 3, sep_m, sep_rad)
    np.testing.assert_allclose(scores, ref[keep, 0] / (255 * len(pts)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(poses, ref[keep, 1:], atol=1e-9)


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


def seeds_brute_force(grid, pts, seeds, window_m, window_rad, step, k, sep_m, sep_rad):
    """Exhaustive reference for several seeds: each seed's k distinct best, merged.

    Every pose of each seed's lattice is scored directly; each seed's k best
    distinct poses are then merged, best first, and the k best distinct of
    those kept.
    """
    lists = []
    for seed in seeds:
        rows = brute_force(grid, pts, seed, window_m, window_rad, step)
        lists.append(rows[distinct(rows, k, sep_m, sep_rad)])
    union = np.concatenate(lists)
    # Merged as search results are: headings wrapped to (-pi, pi] (same formula as the search).
    union[:, 3] = np.pi - np.mod(np.pi - union[:, 3], 2 * np.pi)
    union = union[np.argsort(-union[:, 0], kind="stable")]
    return union[distinct(union, k, sep_m, sep_rad)]


@pytest.mark.parametrize("levels", [1, 4, 16])
def test_joint_search_of_several_seeds_equals_exhaustive_search_of_each(pair, levels):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, levels)
    pts = downsample(source, 0.2, 60)
    step = 0.02
    # A seed near the truth, one turned far away (disjoint window) and one whose
    # window overlaps the first's.
    near = truth + np.array([0.3, -0.2, 0.05])
    seeds = np.array([near + [0, 0, 1.3], near, near + [0, 0, 0.09]])
    kw = dict(window_m=0.6, window_rad=0.06, angle_step_rad=step, n_best=3, separation_m=0.3, separation_rad=0.1)
    poses, scores = search(grid, pts, seeds, **kw)
    ref = seeds_brute_force(grid, pts, seeds, 0.6, 0.06, step, 3, 0.3, 0.1)
    np.testing.assert_allclose(scores, ref[:, 0] / (255 * len(pts)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(poses[0], ref[0, 1:], atol=1e-9)


def merge(results, k, sep_m, sep_rad):
    """The k best distinct of several searches' results, best first (stable on ties)."""
    rows = np.concatenate([np.column_stack([s, p]) for p, s in results])
    rows = rows[np.argsort(-rows[:, 0], kind="stable")]
    return rows[distinct(rows, k, sep_m, sep_rad)]


def test_joint_search_equals_merged_independent_searches(pair):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    pts = downsample(source, 0.2, 160)
    kw = dict(window_m=1.5, window_rad=0.3, angle_step_rad=0.01, n_best=3, separation_m=0.5, separation_rad=0.15)
    right = truth + np.array([0.4, -0.3, 0.1])
    candidates = [right + [0, 0, 1.6], right + [0, 0, -2.4], right, right + [0, 0, 0.45]]
    # Searching the seeds together (two windows disjoint from the rest, two
    # overlapping) must give exactly what searching each alone and merging
    # the results gives, whatever their order.
    for order in ([0, 1, 2, 3], [2, 0, 3, 1], [3, 1, 2, 0]):
        seeds = np.array([candidates[k] for k in order])
        poses, scores = search(grid, pts, seeds, **kw)
        ref = merge([search(grid, pts, s, **kw) for s in seeds], 3, 0.5, 0.15)
        np.testing.assert_array_equal(scores, ref[:, 0])
        np.testing.assert_allclose(poses, ref[:, 1:], atol=1e-12)
        assert np.hypot(*(poses[0, :2] - truth[:2])) < 0.15


def test_repeated_seed_changes_nothing(pair):
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 16)
    pts = downsample(source, 0.2, 160)
    kw = dict(window_m=1.0, window_rad=0.2, angle_step_rad=0.01, n_best=3, separation_m=0.5, separation_rad=0.15)
    seed = truth + np.array([0.2, 0.2, 0.05])
    one = search(grid, pts, seed, **kw)
    two = search(grid, pts, np.array([seed, seed]), **kw)
    np.testing.assert_array_equal(two[0], one[0])
    np.testing.assert_array_equal(two[1], one[1])


def test_overlapping_seeds_keep_per_seed_semantics(pair):
    """Overlapping windows: the result is the merge of each seed's own best, not the best of the pooled poses.

    The two differ when a pose of one seed suppresses a runner-up that the
    other seed's own list kept; this layout (seeds 0.01 and 0.05 rad apart,
    tight separations) is such a case, checked below against both references.
    """
    target, source, truth = pair
    grid = build_grid(target, 0.1, 0.1, 4)
    pts = downsample(source, 0.2, 60)
    near = truth + np.array([0.3, -0.2, 0.05])
    seeds = np.array([near, near + [0, 0, 0.01], near + [0, 0, 0.05]])
    kw = dict(window_m=0.6, window_rad=0.06, angle_step_rad=0.02, n_best=3, separation_m=0.2, separation_rad=0.05)
    poses, scores = search(grid, pts, seeds, **kw)
    per_seed = seeds_brute_force(grid, pts, seeds, 0.6, 0.06, 0.02, 3, 0.2, 0.05)
    pooled = np.concatenate([brute_force(grid, pts, s, 0.6, 0.06, 0.02) for s in seeds])
    pooled = pooled[np.argsort(-pooled[:, 0], kind="stable")]
    pooled = pooled[distinct(pooled, 3, 0.2, 0.05)]
    assert not np.array_equal(per_seed[:, 0], pooled[:, 0])
    np.testing.assert_allclose(scores, per_seed[:, 0] / (255 * len(pts)), rtol=0, atol=1e-12)
    np.testing.assert_allclose(poses, per_seed[:, 1:], atol=1e-9)


def test_percentile_is_numpys_to_the_bit():
    # Reference: np.percentile's default (linear, Hyndman and Fan's 7th method), which the angle step
    # used before; sizes 1 to 400 and a scan's 721, rounded values (ties), weights below and above 0.5.
    from closurecheck.registration.correlative import _percentile

    rng = np.random.default_rng(90)
    for n in list(range(1, 401)) + [721]:
        for _ in range(4):
            x = rng.uniform(0.0, 20.0, n) ** rng.uniform(0.3, 3.0)
            if rng.random() < 0.3:
                x = np.round(x, 1)
            for q in (0, 10, 33.3, 50, 90, 99, 100):
                assert _percentile(x, q) == float(np.percentile(x, q)), (n, q)
