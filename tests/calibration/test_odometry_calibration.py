"""Odometry calibration against registered keyframe steps.

Synthetic steps with known systematic errors and noise (the
differential-drive error model of Borenstein and Feng 1996: heading gained
per metre from unequal wheels, per radian turned from the wheelbase, and a
distance scale) must come back within their standard errors; the random
walk within the sampling error of a few hundred steps; slips must be found
and widened, not trusted.
"""

import math

import numpy as np
import pytest

from closurecheck.calibration.odometry import CalibrationOptions, calibrate, correct_steps, step_pairs
from closurecheck.core import se2
from closurecheck.core.odometry import OdometryNoise
from closurecheck.registration.batch import RegisteredClosures, RegistrationQuality

MEAS_COV = np.diag([1e-6, 1e-6, 1e-8])  # the registration's own error: 1 mm, 0.006 deg


def drive(rng, k=600, heading_per_m=math.radians(35) / 100, turn_scale=0.02, distance_scale=0.03,
          noise=OdometryNoise(0.01, 0.0005, 0.005), slips=()):
    """True keyframe steps (0.5 m, turning), and the odometry of a robot with those errors."""
    length = np.full(k - 1, 0.5)
    turn_true = np.where((np.arange(k - 1) // 40) % 2 == 0, 0.0, rng.choice([-0.3, 0.3], k - 1))
    true = np.column_stack([length * np.cos(turn_true / 2), length * np.sin(turn_true / 2), turn_true])
    cov = noise.step_covariance(length, np.abs(turn_true))
    odo = true.copy()
    odo[:, :2] *= 1.0 + distance_scale
    odo[:, 2] = turn_true * (1.0 + turn_scale) + heading_per_m * length
    odo += np.stack([rng.multivariate_normal(np.zeros(3), c) for c in cov])
    for s, jump in slips:
        odo[s] += jump
    poses = [np.zeros(3)]
    truth = [np.zeros(3)]
    for u, t in zip(odo, true):
        poses.append(se2.compose(poses[-1], u))
        truth.append(se2.compose(truth[-1], t))
    meas = true + np.stack([rng.multivariate_normal(np.zeros(3), MEAS_COV) for _ in true])
    ok = np.ones(k - 1, dtype=bool)
    q = RegistrationQuality(valid=ok, converged=ok, overlap=ok * 0.9, rmse_m=ok * 0.01, ambiguity=ok * np.nan,
                            degenerate=~ok, degeneracy=ok * 0.5, iterations=ok * 3, fit_score=ok * 0.9)
    src, dst = step_pairs(np.arange(k))
    steps = RegisteredClosures(src, dst, meas, np.tile(MEAS_COV, (k - 1, 1, 1)), q)
    return np.array(poses), np.array(truth), steps


def test_systematic_errors_come_back_within_their_standard_errors():
    rng = np.random.default_rng(3)
    odom, truth, steps = drive(rng)
    cal = calibrate(odom, np.arange(len(odom)), steps, OdometryNoise())
    s = cal.systematic
    assert cal.measured
    assert abs(s.heading_per_m - math.radians(35) / 100) <= 3 * s.heading_per_m_std
    assert abs(s.turn_scale - 0.02) <= 3 * s.turn_scale_std
    assert abs(s.distance_scale - 0.03) <= 3 * s.distance_scale_std
    # Standard errors small enough to matter: a tenth of a degree per 100 m.
    assert math.degrees(s.heading_per_m_std) * 100 < 0.3
    # The corrected chain follows the truth far better than the odometry does.
    end_odo = np.hypot(*(odom[-1, :2] - truth[-1, :2]))
    end_cal = np.hypot(*(cal.chain.poses[-1, :2] - truth[-1, :2]))
    assert end_odo > 20.0 and end_cal < 0.1 * end_odo


def test_random_walk_is_fitted_from_the_residuals():
    rng = np.random.default_rng(4)
    true_noise = OdometryNoise(0.02, 0.002, 0.01)
    odom, _, steps = drive(rng, k=1500, noise=true_noise)
    # A prior that understates the noise threefold must not survive.
    prior = OdometryNoise(0.02 / 3, 0.002 / 3, 0.01 / 3)
    cal = calibrate(odom, np.arange(len(odom)), steps, prior)
    assert cal.noise.translation_m_per_sqrt_m == pytest.approx(0.02, rel=0.15)
    assert cal.noise.heading_rad_per_sqrt_m == pytest.approx(0.002, rel=0.25)
    assert cal.noise.heading_rad_per_sqrt_rad == pytest.approx(0.01, rel=0.35)


def test_a_slip_is_found_and_its_step_widened_not_replaced():
    rng = np.random.default_rng(5)
    slip = (200, np.array([0.25, 0.0, math.radians(4)]))
    odom, _, steps = drive(rng, slips=[slip])
    cal = calibrate(odom, np.arange(len(odom)), steps, OdometryNoise())
    assert list(cal.slips) == [200]
    odo_steps = se2.between(odom[:-1], odom[1:])
    corrected = correct_steps(odo_steps, np.hypot(odo_steps[:, 0], odo_steps[:, 1]), cal.systematic)
    step = se2.between(cal.chain.poses[200], cal.chain.poses[201])
    np.testing.assert_allclose(step, corrected[200], atol=1e-9)
    # The jump is now about one standard deviation of the step, not dozens.
    jump = se2.between(steps.delta[200], step)
    assert jump @ np.linalg.solve(cal.chain.steps[200], jump) < 2.0


def test_too_few_sound_steps_leave_the_odometry_as_it_is():
    rng = np.random.default_rng(6)
    odom, _, steps = drive(rng, k=20)
    prior = OdometryNoise(0.05, 0.02, 0.05)
    cal = calibrate(odom, np.arange(len(odom)), steps, prior, CalibrationOptions(min_steps=30))
    assert not cal.measured and cal.noise == prior
    np.testing.assert_array_equal(cal.chain.poses, odom)
    assert "not calibrated" in cal.notes[0]


def test_a_rate_the_scans_cannot_tell_from_zero_is_not_removed():
    # Odometry with a heading drift and no turn or distance scale error: the
    # drift is removed, the two scales are left at zero.
    rng = np.random.default_rng(11)
    odom, truth, steps = drive(rng, heading_per_m=math.radians(20) / 100, turn_scale=0.0, distance_scale=0.0)
    cal = calibrate(odom, np.arange(len(odom)), steps, OdometryNoise())
    s = cal.systematic
    assert s.heading_per_m != 0.0 and "heading_per_m" not in s.not_significant
    for name in s.not_significant:
        assert getattr(s, name) == 0.0
        assert np.isfinite(getattr(s, f"{name}_std"))
    assert set(s.not_significant) == {"turn_scale", "distance_scale"}
    assert any("could not tell it from zero" in n for n in cal.notes) == bool(s.not_significant)
    # With the test off (min_significance 0), every rate is fitted, as before.
    free = calibrate(odom, np.arange(len(odom)), steps, OdometryNoise(), CalibrationOptions(min_significance=0.0))
    assert free.systematic.not_significant == ()
    assert free.systematic.turn_scale != 0.0 and free.systematic.distance_scale != 0.0


def test_a_drive_without_systematic_errors_keeps_its_odometry():
    # Chance alone makes a fitted rate non-zero; under the test every rate
    # of an error-free robot stays at zero in nearly every drive (3 standard
    # errors: 0.27% per rate by chance).
    dropped = 0
    for seed in range(6):
        rng = np.random.default_rng(100 + seed)
        odom, truth, steps = drive(rng, heading_per_m=0.0, turn_scale=0.0, distance_scale=0.0)
        s = calibrate(odom, np.arange(len(odom)), steps, OdometryNoise()).systematic
        dropped += len(s.not_significant)
    assert dropped >= 17
