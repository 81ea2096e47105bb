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


def test_the_compiled_comparison_matches_the_numpy_expressions():
    # Rooms with clutter, dropouts and people, compared under poses near and far from the truth: the
    # compiled loop judges and counts the same points as the numpy expressions, and its surface
    # lengths agree to rounding (its sums run point by point, numpy's pairwise).
    from closurecheck.verification.free_space import _against

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
