"""Trajectory metrics against reference implementations."""

import numpy as np
import pytest
from scipy.linalg import orthogonal_procrustes
from scipy.spatial.transform import Rotation

from closurecheck.core import se2
from closurecheck.reporting.trajectory import align_rigid, ate_rmse, rpe

RNG = np.random.default_rng(11)


def test_alignment_matches_scipy_procrustes_and_rotation_align():
    p = RNG.normal(size=(50, 2)) * 10
    q = p @ se2.rotation(0.7).T + [3.0, -2.0] + RNG.normal(size=(50, 2)) * 0.05
    al = align_rigid(p, q)
    pc, qc = p - p.mean(0), q - q.mean(0)
    # Reference library: scipy.linalg.orthogonal_procrustes solves min ||A R - B|| over orthogonal R.
    r_ref, _ = orthogonal_procrustes(pc, qc)
    np.testing.assert_allclose(al.rotation, r_ref.T, atol=1e-10)
    # Reference library: scipy Rotation.align_vectors on the same centred points lifted to z = 0.
    rot, _ = Rotation.align_vectors(np.c_[qc, np.zeros(50)], np.c_[pc, np.zeros(50)])
    assert al.angle == pytest.approx(rot.as_euler("xyz")[2], abs=1e-9)


def test_ate_is_zero_for_a_rigidly_moved_copy_and_ignores_the_frame():
    truth = np.c_[RNG.normal(size=(30, 2)) * 5, RNG.uniform(-3, 3, 30)]
    moved = se2.compose(np.array([10.0, 4.0, 2.0]), truth)
    assert ate_rmse(moved, truth) == pytest.approx(0.0, abs=1e-9)
    noisy = moved.copy()
    noisy[:, :2] += RNG.normal(size=(30, 2)) * 0.1
    # Alignment can only reduce the error below the noise's own RMS.
    assert 0.05 < ate_rmse(noisy, truth) < 0.1 * np.sqrt(2) * 1.2


def test_rpe_measures_relative_motion_errors():
    # A straight 20 m path; the estimate runs 5% long, so over d metres the
    # relative translation error is 0.05 d and the rotation error is zero.
    x = np.linspace(0, 20, 201)
    truth = np.c_[x, np.zeros_like(x), np.zeros_like(x)]
    est = np.c_[1.05 * x, np.zeros_like(x), np.zeros_like(x)]
    res = {r.distance_m: r for r in rpe(est, truth, distances_m=(1.0, 10.0, 50.0))}
    assert res[1.0].translation_rmse_m == pytest.approx(0.05, rel=1e-6)
    assert res[10.0].translation_rmse_m == pytest.approx(0.5, rel=1e-6)
    assert res[10.0].rotation_rmse_rad == pytest.approx(0.0, abs=1e-12)
    assert res[50.0].pairs == 0 and np.isnan(res[50.0].translation_rmse_m)
