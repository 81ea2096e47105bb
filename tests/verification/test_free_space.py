"""The free-space check on hand-built scans: a wall of one scan inside the other's free space.

Scan A looks at a wall 5 m ahead (x = 5 in its frame).  A consistent scan B,
taken 1 m further on, sees the same wall 4 m ahead; an inconsistent B claims
a wall 3 m ahead of A, where A's beams passed freely.  The expected figures
are worked out by hand below.
"""

import math

import numpy as np

from closurecheck.io.scanlog import Sensor
from closurecheck.verification.free_space import (
    FreeSpaceOptions,
    KeyframeScans,
    check_free_space,
    closure_groups,
)

N = 181
SENSOR = Sensor(first_angle=-math.pi / 4, angle_step=(math.pi / 2) / (N - 1), beams=N, min_range=0.05,
                max_range=20.0)
BEARINGS = SENSOR.first_angle + SENSOR.angle_step * np.arange(N)


def wall(distance):
    """Ranges (N,) to a wall ``distance`` metres ahead, perpendicular to the heading."""
    return (distance / np.cos(BEARINGS)).astype(np.float32)


def check(ranges_a, ranges_b, pose_b):
    scans = KeyframeScans(np.stack([ranges_a, ranges_b]), SENSOR)
    poses = np.array([[0.0, 0.0, 0.0], pose_b])
    return check_free_space(poses, np.array([0.0, 100.0]), scans, FreeSpaceOptions(),
                            pairs=(np.array([0]), np.array([1])))


def test_the_same_wall_seen_from_two_places_does_not_contradict():
    res = check(wall(5.0), wall(4.0), [1.0, 0.0, 0.0])
    assert res.length_m[0] == 0.0 and not res.contradicts[0]
    assert res.judged_m[0] > 5.0


def test_a_wall_inside_the_other_scans_free_space_contradicts_by_its_whole_length():
    res = check(wall(5.0), wall(3.0), [0.0, 0.0, 0.0])
    # Every point of B's wall (x = 3) lies 2 m in front of A's returns (x = 5),
    # far beyond the margin (0.25 m + 2% of at most 4.3 m); A's wall lies
    # behind B's, in its shadow, which contradicts nothing.  The contradicting
    # surface is B's wall on the beams that have a neighbour on each side
    # (beams 1..N-2): the sum of range times angle step, i.e. by hand
    # 3 * sum(sec(phi_i)) * dphi, close to 3 * 2 * ln(tan(3 pi / 8)) = 5.29 m.
    inner = BEARINGS[1:-1]
    by_hand = float(np.sum(3.0 / np.cos(inner)) * SENSOR.angle_step)
    assert abs(res.length_m[0] - by_hand) < 1e-3
    assert abs(by_hand - 3 * 2 * math.log(math.tan(3 * math.pi / 8))) < 0.05
    assert res.share[0] == 1.0 and res.contradicts[0]


def test_a_person_in_one_scan_is_not_a_contradiction():
    # B sees the wall, plus a 0.5 m wide person 2 m ahead: 0.5 m of surface in
    # A's free space, well under the 3 m a pair needs.
    b = wall(5.0)
    person = np.abs(np.tan(BEARINGS) * 2.0) < 0.25
    b[person] = (2.0 / np.cos(BEARINGS[person])).astype(np.float32)
    res = check(wall(5.0), b, [0.0, 0.0, 0.0])
    assert 0.3 < res.length_m[0] < 0.8 and not res.contradicts[0]


def test_closures_between_the_same_two_stretches_form_one_group():
    src = np.array([100, 102, 104, 300, 301])
    dst = np.array([10, 12, 15, 10, 11])
    labels = closure_groups(src, dst, window=5)
    assert labels[0] == labels[1] == labels[2]
    assert labels[3] == labels[4] != labels[0]


def _against_numpy(points_b, pose_ab, ranges_a, sensor, options):
    # Reference: the check's numpy expressions per comparison, as they were before the compiled loop.
    from closurecheck.core import se2

    p = se2.transform_points(pose_ab, points_b)
    rho = np.hypot(p[:, 0], p[:, 1])
    phi = np.arctan2(p[:, 1], p[:, 0])
    beam = np.rint(np.mod(phi - sensor.first_angle, 2.0 * np.pi) / sensor.angle_step).astype(np.int64)
    inside = (beam >= 1) & (beam < sensor.beams - 1) & (rho <= sensor.max_range)
    r = np.asarray(ranges_a, dtype=np.float64)
    bb = np.where(inside, beam, 1)
    near = np.stack([r[bb - 1], r[bb], r[bb + 1]])
    seen = inside & np.isfinite(near).all(axis=0)
    closest = np.min(np.where(np.isfinite(near), near, np.inf), axis=0)
    bad = seen & (rho < closest - (options.margin_m + options.margin_per_m * rho))
    edges = np.diff(np.r_[0, bad.astype(np.int8), 0])
    start, stop = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    long = np.zeros(len(bad) + 1, dtype=np.int64)
    runs = (stop - start) >= options.min_run
    np.add.at(long, start[runs], 1)
    np.add.at(long, stop[runs], -1)
    counted = np.cumsum(long)[:-1] > 0
    arc = rho * abs(sensor.angle_step)
    return float(arc[counted].sum()), float(arc[seen].sum()), int(counted.sum()), int(seen.sum())


def _against(points_b, pose_ab, ranges_a, sensor, options):
    """One direction of one pair through the compiled comparison (_free_space_kernels.against), the pose's
    cosine and sine from numpy as the check computes them."""
    from closurecheck.verification import _free_space_kernels as kernels

    x, y, t = (float(v) for v in pose_ab)
    return kernels.against(np.ascontiguousarray(points_b, dtype=np.float64), x, y, float(np.cos(t)),
                           float(np.sin(t)), ranges_a, float(sensor.first_angle), float(sensor.angle_step),
                           int(sensor.beams), float(sensor.max_range), float(options.margin_m),
                           float(options.margin_per_m), int(options.min_run))


def test_the_compiled_comparison_matches_the_numpy_expressions():
    # Rooms with clutter, dropouts and people, compared under poses near and far from the truth: the
    # compiled loop judges and counts the same points as the numpy expressions, and its surface
    # lengths agree to rounding (its sums run point by point, numpy's pairwise).
    rng = np.random.default_rng(8)
    options = FreeSpaceOptions()
    compared = contradicting = 0
    for _ in range(300):
        ranges_a = wall(rng.uniform(2.0, 8.0))
        ranges_b = wall(rng.uniform(2.0, 8.0))
        for r in (ranges_a, ranges_b):
            gap = rng.integers(0, N, 20)
            r[gap] = np.nan                                  # dropouts
            blob = rng.integers(0, N - 12)
            r[blob:blob + rng.integers(1, 12)] *= rng.uniform(0.3, 1.0)      # a person or a cart
        scans = KeyframeScans(np.stack([ranges_a, ranges_b]), SENSOR)
        pose = np.array([rng.normal(0.0, 1.5), rng.normal(0.0, 1.0), rng.normal(0.0, 0.4)])
        got = _against(scans.points(1), pose, scans.ranges[0], SENSOR, options)
        want = _against_numpy(scans.points(1), pose, scans.ranges[0], SENSOR, options)
        np.testing.assert_allclose(got, want[:2], rtol=1e-12, atol=1e-12)
        compared += want[3] > 0
        contradicting += want[2] > 0
    assert compared > 250 and 30 < contradicting < 280      # both outcomes are exercised


def _room_ranges(pose, sensor, rng, width=12.0, height=8.0):
    """Ranges (beams,) float32 from a sensor pose inside a width x height room, with a pillar, dropouts and a person."""
    x, y, t = pose
    phi = t + sensor.bearings()
    dx, dy = np.cos(phi), np.sin(phi)
    with np.errstate(divide="ignore"):
        hits = np.stack([np.where(dx > 0, (width - x) / dx, np.where(dx < 0, -x / dx, np.inf)),
                         np.where(dy > 0, (height - y) / dy, np.where(dy < 0, -y / dy, np.inf))])
    r = hits.min(axis=0)
    # A round pillar of radius 0.4 m at (6, 4): the nearer root of |p + r d - c| = 0.4.
    ox, oy = x - 6.0, y - 4.0
    along = ox * dx + oy * dy
    disc = along * along - (ox * ox + oy * oy - 0.16)
    near = -along - np.sqrt(np.maximum(disc, 0.0))
    r = np.where((disc > 0) & (near > 0), np.minimum(r, near), r)
    r = r + rng.normal(0.0, 0.01, r.shape)
    r[rng.random(r.shape) < 0.05] = np.nan                  # dropouts
    r[r > sensor.max_range] = np.nan
    start = rng.integers(0, sensor.beams - 15)
    r[start:start + 15] = np.minimum(r[start:start + 15], rng.uniform(0.5, 3.0))     # a person close by
    return r.astype(np.float32)


def _per_pair_reference(poses, scans, options, a, b):
    # The check as it was before its pairs were compiled into one loop: per pair se2.between and
    # se2.inverse on single poses, KeyframeScans.points and the compiled comparison of one direction.
    from closurecheck.core import se2
    from closurecheck.verification.free_space import _sensor_poses

    poses = _sensor_poses(np.asarray(poses, dtype=float), scans.sensor)
    share, length, judged = np.zeros(len(a)), np.zeros(len(a)), np.zeros(len(a))
    for n, (i, j) in enumerate(zip(a.tolist(), b.tolist())):
        t_ij = se2.between(poses[i], poses[j])
        bad_b, seen_b = _against(scans.points(j), t_ij, scans.ranges[i], scans.sensor, options)
        bad_a, seen_a = _against(scans.points(i), se2.inverse(t_ij), scans.ranges[j], scans.sensor, options)
        judged[n] = seen_a + seen_b
        length[n] = bad_a + bad_b
        share[n] = max(bad_b / max(seen_b, 1e-9), bad_a / max(seen_a, 1e-9))
    return share, length, judged


def test_all_pairs_at_once_give_the_per_pair_loops_bits():
    # Twelve keyframes in one room (two visits), with a mounted sensor: some keyframes are misplaced in
    # the "optimised" poses so that both outcomes occur.  Every pair is compared, both through the
    # check's own pair choice and through all 66 pairs given explicitly; share, length and judged must
    # equal the per-pair loop's to the last bit (not only to rounding).
    from closurecheck.core import se2

    rng = np.random.default_rng(21)
    sensor = Sensor(first_angle=-2.0, angle_step=4.0 / 359, beams=360, min_range=0.1, max_range=15.0,
                    mount=(0.2, -0.05, 0.1))
    k = 12
    truth = np.column_stack([rng.uniform(2.0, 10.0, k), rng.uniform(1.5, 6.5, k), rng.uniform(-np.pi, np.pi, k)])
    mount = np.asarray(sensor.mount)
    ranges = np.stack([_room_ranges(se2.compose(p, mount), sensor, rng) for p in truth])
    scans = KeyframeScans(ranges, sensor)
    placed = truth.copy()
    placed[[3, 8]] += [[1.5, -0.8, 0.3], [-1.0, 1.2, -0.25]]          # two misplaced visits
    travel = np.r_[np.arange(6) * 1.0, 100.0 + np.arange(6) * 1.0]
    options = FreeSpaceOptions(max_distance_m=12.0, max_heading_rad=3.5, min_gap_m=5.0, pairs_per_keyframe=6)

    a, b = np.triu_indices(k, 1)
    a, b = a.astype(np.int64), b.astype(np.int64)
    got = check_free_space(placed, travel, scans, options, pairs=(a, b))
    want = _per_pair_reference(placed, scans, options, a, b)
    for g, w in zip((got.share, got.length_m, got.judged_m), want):
        assert np.array_equal(g, w)
    assert 5 < got.count < len(a) - 5 and np.all(got.judged_m > 0)      # both outcomes, every pair judged

    chosen = check_free_space(placed, travel, scans, options)
    assert len(chosen.a) > 10
    want = _per_pair_reference(placed, scans, options, chosen.a, chosen.b)
    for g, w in zip((chosen.share, chosen.length_m, chosen.judged_m), want):
        assert np.array_equal(g, w)


def test_no_pairs_give_an_empty_check():
    scans = KeyframeScans(np.stack([wall(5.0), wall(4.0)]), SENSOR)
    res = check_free_space(np.zeros((2, 3)), np.array([0.0, 1.0]), scans, FreeSpaceOptions())
    assert len(res.a) == len(res.share) == 0 and res.count == 0
