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
