"""Keyframe selection by odometry travel and rotation."""

import math

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.frontend.keyframes import (
    KeyframeOptions,
    merge_keyframes,
    odometry_travel,
    select_keyframes,
)


def _straight(n, step):
    return np.column_stack([np.arange(n) * step, np.zeros(n), np.zeros(n)])


def test_straight_line_keeps_a_scan_every_threshold():
    # 0.125 m steps are exact in binary, so 4 steps make exactly 0.5 m.
    odom = _straight(41, 0.125)
    ids = select_keyframes(odom, KeyframeOptions(spacing_m=0.5, turn_rad=1.0))
    np.testing.assert_array_equal(ids, np.arange(0, 41, 4))


def test_turning_on_the_spot_keeps_a_scan_every_rotation_threshold():
    theta = se2.wrap(np.arange(100) * 0.1)  # passes through the +-pi wrap
    odom = np.column_stack([np.zeros(100), np.zeros(100), theta])
    ids = select_keyframes(odom, KeyframeOptions(spacing_m=0.5, turn_rad=0.35))
    # 0.3 rad < 0.35 <= 0.4 rad: every 4th scan, across the wrap as well.
    np.testing.assert_array_equal(ids, np.arange(0, 100, 4))


def test_path_length_counts_driving_back_and_forth():
    # 0.25 m forward, 0.25 m back, repeatedly: net motion never exceeds 0.25 m.
    x = np.tile([0.0, 0.25], 10)
    odom = np.column_stack([x, np.zeros(20), np.zeros(20)])
    ids = select_keyframes(odom, KeyframeOptions(spacing_m=0.5, turn_rad=1.0))
    np.testing.assert_array_equal(ids, np.arange(0, 20, 2))


def test_stationary_robot_has_one_keyframe():
    odom = np.zeros((50, 3))
    np.testing.assert_array_equal(select_keyframes(odom), [0])
    assert select_keyframes(np.zeros((0, 3))).shape == (0,)


def test_keyframes_are_minimal_and_far_enough_on_a_random_walk():
    rng = np.random.default_rng(3)
    steps = np.column_stack([rng.uniform(0, 0.08, 2000), rng.normal(0, 0.01, 2000), rng.normal(0, 0.05, 2000)])
    odom, _ = se2.chain(steps)
    opt = KeyframeOptions(spacing_m=0.5, turn_rad=math.radians(20))
    ids = select_keyframes(odom, opt)
    travel, rotation = odometry_travel(odom)
    assert ids[0] == 0 and np.all(np.diff(ids) > 0)
    dt, dr = np.diff(travel[ids]), np.diff(rotation[ids])
    # Every keyframe reached a threshold ...
    assert np.all((dt >= opt.spacing_m) | (dr >= opt.turn_rad))
    # ... and the scan before it had not (the first scan to reach it is kept).
    before = ids[1:] - 1
    bt, br = travel[before] - travel[ids[:-1]], rotation[before] - rotation[ids[:-1]]
    assert np.all((bt < opt.spacing_m) & (br < opt.turn_rad))
    # After the last keyframe no scan reaches a threshold.
    assert travel[-1] - travel[ids[-1]] < opt.spacing_m
    assert rotation[-1] - rotation[ids[-1]] < opt.turn_rad


def test_odometry_travel_sums_step_lengths_and_absolute_turns():
    odom = np.array([[0, 0, 0], [3, 4, 0.5], [3, 4, -0.5], [0, 0, 2.0], [0, 0, -3.0]])
    travel, rotation = odometry_travel(odom)
    np.testing.assert_allclose(travel, [0, 5, 5, 10, 10])
    # The last step crosses the +-pi wrap: |wrap(-5)| = 2 pi - 5, not 5.
    np.testing.assert_allclose(rotation, [0, 0.5, 1.5, 4.0, 4.0 + 2 * math.pi - 5.0])


def test_merge_keyframes_adds_external_scans():
    merged = merge_keyframes(np.array([0, 4, 8]), np.array([8, 5, 2, 5]))
    np.testing.assert_array_equal(merged, [0, 2, 4, 5, 8])
    assert merged.dtype == np.int64


@pytest.mark.parametrize("kwargs", [{"spacing_m": 0.0}, {"turn_rad": -1.0},
                                    {"spacing_m": float("nan")}])
def test_bad_options_raise_input_error(kwargs):
    with pytest.raises(InputError):
        KeyframeOptions(**kwargs)
