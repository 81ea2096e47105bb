"""Odometry noise model, header key and chain uncertainty between keyframes."""

import math

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.core.odometry import (
    OdometryChain,
    OdometryNoise,
    keyframe_step_covariances,
    noise_from_header,
)
from closurecheck.errors import InputError


def test_step_covariance_follows_the_random_walk_model():
    noise = OdometryNoise(translation_m_per_sqrt_m=0.1, heading_rad_per_sqrt_m=0.02,
                          heading_rad_per_sqrt_rad=0.05)
    cov = noise.step_covariance(4.0, 2.0)
    # std = a sqrt(d) -> variance a^2 d; heading variance b^2 d + c^2 |rot|.
    np.testing.assert_allclose(np.diag(cov), [0.01 * 4, 0.01 * 4, 0.0004 * 4 + 0.0025 * 2])
    assert np.count_nonzero(cov - np.diag(np.diag(cov))) == 0
    np.testing.assert_allclose(noise.step_covariance(4.0, -2.0), cov)


def test_zero_motion_step_keeps_an_invertible_covariance():
    cov = OdometryNoise().step_covariance(0.0, 0.0)
    assert np.all(np.linalg.eigvalsh(cov) > 0)


def test_header_key_absent_gives_defaults_and_partial_keys_merge():
    assert noise_from_header({}) == OdometryNoise()
    assert noise_from_header(None) == OdometryNoise()
    n = noise_from_header({"odometry_noise": {"translation_m_per_sqrt_m": 0.2}})
    assert n.translation_m_per_sqrt_m == 0.2
    assert n.heading_rad_per_sqrt_m == OdometryNoise().heading_rad_per_sqrt_m
    full = {"translation_m_per_sqrt_m": 0.05, "heading_rad_per_sqrt_m": 0.02, "heading_rad_per_sqrt_rad": 0.1}
    assert noise_from_header({"odometry_noise": full}).to_header() == full


@pytest.mark.parametrize("value, needle", [
    ([0.1, 0.2], "must be an object"),
    ({"translation_m_per_sqrt_m": "big"}, "translation_m_per_sqrt_m"),
    ({"heading_rad_per_sqrt_m": -0.1}, ">= 0"),
    ({"heading_rad_per_sqrt_rad": True}, "heading_rad_per_sqrt_rad"),
    ({"translation_m_per_sqrt_m": float("inf")}, "finite"),
    ({"translation_per_m": 0.1}, 'unknown key "translation_per_m"'),
])
def test_bad_header_key_names_file_line_and_problem(value, needle):
    with pytest.raises(InputError) as err:
        noise_from_header({"odometry_noise": value}, "robot.jsonl")
    msg = str(err.value)
    assert msg.startswith("robot.jsonl:1: ")
    assert needle in msg
    assert "\n" not in msg


def test_step_covariances_use_path_length_and_accumulated_turn():
    # A zig-zag between two keyframes: net 1 m, path 1.4 m, turns 0.4 rad.
    odom = np.array([[0, 0, 0], [0.7, 0, 0.2], [1.0, 0.0, 0.0]])
    odom[1, :2] = [0.5, math.sqrt(0.7 ** 2 - 0.5 ** 2)]
    odom[2, :2] = [1.0, 0.0]
    path = 0.7 + math.hypot(0.5, odom[1, 1])
    noise = OdometryNoise(0.1, 0.02, 0.05)
    cov = keyframe_step_covariances(noise, odom, np.array([0, 2]))
    assert cov.shape == (1, 3, 3)
    np.testing.assert_allclose(cov[0], noise.step_covariance(path, 0.4))


def test_chain_relative_matches_sequential_propagation_forward():
    rng = np.random.default_rng(0)
    steps = np.column_stack([rng.uniform(0.3, 0.7, 30), rng.normal(0, 0.05, 30), rng.normal(0, 0.2, 30)])
    odom, _ = se2.chain(steps)
    noise = OdometryNoise()
    chain = OdometryChain.build(odom, np.arange(len(odom)), noise)
    q = keyframe_step_covariances(noise, odom, np.arange(len(odom)))
    delta, cov = chain.relative(np.array([3]), np.array([25]))
    ref_delta, ref_cov = se2.chain_covariance_between(se2.between(odom[:-1], odom[1:]), q, 3, 25)
    np.testing.assert_allclose(delta[0], ref_delta, atol=1e-12)
    np.testing.assert_allclose(cov[0], ref_cov, rtol=1e-9, atol=1e-15)


def test_backward_relative_pose_agrees_with_monte_carlo():
    """First-order covariance of the delta from a later to an earlier keyframe,
    checked against sampling the random walk (numpy RNG, 20000 samples)."""
    steps = np.array([[1.0, 0.0, 0.3]] * 6)
    odom, _ = se2.chain(steps)
    noise = OdometryNoise(0.03, 0.01, 0.02)
    chain = OdometryChain.build(odom, np.arange(7), noise)
    delta, cov = chain.relative(np.array([6]), np.array([1]))
    np.testing.assert_allclose(delta[0], se2.between(odom[6], odom[1]), atol=1e-12)

    rng = np.random.default_rng(1)
    q = keyframe_step_covariances(noise, odom, np.arange(7))
    n = 20000
    noisy = steps[None] + rng.normal(size=(n, 6, 3)) * np.sqrt(np.diagonal(q, axis1=1, axis2=2))[None]
    pose = np.zeros((n, 3))
    poses = [pose]
    for k in range(6):
        pose = se2.compose(pose, noisy[:, k])
        poses.append(pose)
    sample = se2.between(poses[6], poses[1])
    err = sample - delta[0]
    err[:, 2] = se2.wrap(err[:, 2])
    mc = np.cov(err.T)
    np.testing.assert_allclose(cov[0], mc, rtol=0.08, atol=2e-4)
    # Going backwards is not the same covariance as going forwards.
    _, fwd = chain.relative(np.array([1]), np.array([6]))
    assert np.abs(fwd[0] - cov[0]).max() > 0.005


def test_chain_rejects_non_keyframes():
    chain = OdometryChain.build(np.zeros((5, 3)) + [[0, 0, 0]], np.array([0, 2, 4]))
    with pytest.raises(ValueError, match="scan 3 is not a keyframe"):
        chain.relative(np.array([0]), np.array([3]))


def test_bad_noise_values_raise_input_error():
    with pytest.raises(InputError):
        OdometryNoise(translation_m_per_sqrt_m=-1.0)


def test_forward_equals_the_se2_chain_relative_formula():
    # The element-by-element fast path against se2.chain_relative (stacked
    # 3x3 products), on a chain that wraps its heading many times.
    rng = np.random.default_rng(7)
    steps = np.column_stack([rng.uniform(0.2, 0.8, 200), rng.normal(0, 0.1, 200), rng.normal(0.3, 0.4, 200)])
    odom, _ = se2.chain(steps)
    chain = OdometryChain.build(odom, np.arange(len(odom)), OdometryNoise())
    i = rng.integers(0, 201, 500)
    j = rng.integers(0, 201, 500)
    lo, hi = np.minimum(i, j), np.maximum(i, j)
    delta, cov = chain.forward(lo, hi)
    ref_delta, ref_cov = se2.chain_relative(chain.poses, chain.prefix, lo, hi)
    np.testing.assert_allclose(delta, ref_delta, atol=1e-12)
    np.testing.assert_allclose(cov, ref_cov, rtol=1e-9, atol=1e-12 * np.abs(ref_cov).max())
