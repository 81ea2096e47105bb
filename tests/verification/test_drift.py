"""Heading drift of the odometry: estimate from closures, and its removal.

The trajectory comes from a simulated warehouse log (truth only); odometry
and closures are built from it here with a known drift rate, so the
estimator can be checked against the rate that was put in.  The removal is
checked against an independent sequential integration with
``se2.compose``.
"""

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.frontend.keyframes import select_keyframes
from closurecheck.simulation.simulate import simulate_log
from closurecheck.verification.drift import (
    DriftOptions,
    chain_travel,
    estimate_heading_drift,
    heading_drift_consensus,
    remove_heading_drift,
)

RATE = 0.0004  # rad per metre, about 2.3 degrees per 100 m


def integrate(steps):
    """Sequential composition of (N-1, 3) steps from the origin."""
    poses = np.zeros((len(steps) + 1, 3))
    for k, step in enumerate(steps):
        poses[k + 1] = se2.compose(poses[k], step)
    return poses


@pytest.fixture(scope="module")
def route():
    log = simulate_log("warehouse", seed=3, scans=2500)
    kf = select_keyframes(log.truth)
    truth = se2.compose(se2.inverse(log.truth[kf][0]), log.truth[kf])
    steps = se2.between(truth[:-1], truth[1:])
    length = np.hypot(steps[:, 0], steps[:, 1])
    i, j = np.triu_indices(len(kf), k=40)
    d = se2.between(truth[i], truth[j])
    near = np.hypot(d[:, 0], d[:, 1]) < 1.0
    pairs = np.stack([j[near], i[near]], 1)  # later -> earlier, like the candidate stage
    return {"truth": truth, "steps": steps, "length": length, "pairs": pairs}


def drifted_odometry(route, rate, heading_sd, rng):
    steps = route["steps"].copy()
    steps[:, 2] += rate * route["length"] + heading_sd * np.sqrt(route["length"]) * rng.standard_normal(len(steps))
    step_cov = np.zeros((len(steps), 3, 3))
    step_cov[:, 0, 0] = step_cov[:, 1, 1] = 1e-4
    step_cov[:, 2, 2] = np.maximum(heading_sd ** 2 * route["length"], 1e-12)
    return integrate(steps), step_cov


def closures(route, heading_sd, rng):
    src, dst = route["pairs"].T
    delta = se2.between(route["truth"][src], route["truth"][dst])
    delta[:, 2] += heading_sd * rng.standard_normal(len(src))
    cov = np.repeat((np.diag([0.01, 0.01, max(heading_sd, 1e-6)]) ** 2)[None], len(src), 0)
    return src, dst, delta, cov


def test_removal_inverts_a_drift_added_step_by_step(route):
    clean = integrate(route["steps"])
    drifted_steps = route["steps"].copy()
    drifted_steps[:, 2] += RATE * route["length"]
    drifted = integrate(drifted_steps)
    assert np.abs(drifted[:, :2] - clean[:, :2]).max() > 1.0  # the drift matters
    fixed = remove_heading_drift(drifted, RATE)
    np.testing.assert_allclose(fixed[:, :2], clean[:, :2], atol=1e-8)
    np.testing.assert_allclose(se2.wrap(fixed[:, 2] - clean[:, 2]), 0.0, atol=1e-10)
    np.testing.assert_allclose(chain_travel(fixed), chain_travel(clean), atol=1e-8)


def test_noise_free_closures_give_the_rate_exactly(route):
    odom, step_cov = drifted_odometry(route, RATE, 0.0, np.random.default_rng(0))
    src, dst, delta, cov = closures(route, 0.0, np.random.default_rng(1))
    est = estimate_heading_drift(odom, step_cov, src, dst, delta, cov)
    assert est.rate_rad_per_m == pytest.approx(RATE, rel=1e-6)
    assert est.applied and est.closures == len(src)


@pytest.mark.parametrize("seed", [2, 3, 4])
def test_noisy_rate_within_its_standard_error(route, seed):
    rng = np.random.default_rng(seed)
    odom, step_cov = drifted_odometry(route, RATE, 0.0005, rng)
    src, dst, delta, cov = closures(route, np.radians(0.05), rng)
    est = estimate_heading_drift(odom, step_cov, src, dst, delta, cov)
    # Closures share odometry stretches, so the independent-residual standard
    # error is optimistic; 5 of them is a loose but failing-capable bound.
    assert abs(est.rate_rad_per_m - RATE) <= 5 * est.std_rad_per_m
    assert abs(est.rate_rad_per_m - RATE) < 0.2 * RATE
    assert est.applied


def test_no_drift_is_not_applied(route):
    hits = 0
    for seed in range(5):
        rng = np.random.default_rng(10 + seed)
        odom, step_cov = drifted_odometry(route, 0.0, 0.0005, rng)
        src, dst, delta, cov = closures(route, np.radians(0.05), rng)
        hits += estimate_heading_drift(odom, step_cov, src, dst, delta, cov).applied
    assert hits <= 1  # a 3-sigma test; 5 clean runs rarely trigger it


def test_a_gross_outlier_is_left_out(route):
    rng = np.random.default_rng(5)
    odom, step_cov = drifted_odometry(route, RATE, 0.0005, rng)
    src, dst, delta, cov = closures(route, np.radians(0.05), rng)
    far = np.argmax(np.abs(chain_travel(odom)[src] - chain_travel(odom)[dst]))
    delta[far, 2] += 0.5
    est = estimate_heading_drift(odom, step_cov, src, dst, delta, cov)
    assert est.closures == len(src) - 1
    assert abs(est.rate_rad_per_m - RATE) < 0.2 * RATE


def test_too_few_closures(route):
    odom, step_cov = drifted_odometry(route, RATE, 0.0, np.random.default_rng(0))
    src, dst, delta, cov = closures(route, 0.0, np.random.default_rng(1))
    est = estimate_heading_drift(odom, step_cov, src[:5], dst[:5], delta[:5], cov[:5], DriftOptions(min_closures=10))
    assert not est.applied and est.rate_rad_per_m == 0.0


def with_wrong_headings(route, src, dst, delta, cov, share, rng):
    """Add candidates between random keyframes with random relative poses (wrong registrations)."""
    n = len(route["truth"])
    extra = int(len(src) * share / (1 - share))
    a = rng.integers(50, n, extra)
    b = (a * rng.uniform(0.0, 0.9, extra)).astype(int)
    d = np.column_stack([rng.uniform(-3, 3, extra), rng.uniform(-3, 3, extra), rng.uniform(-np.pi, np.pi, extra)])
    return (np.r_[src, a], np.r_[dst, b], np.r_[delta, d], np.r_[cov, np.repeat(cov[:1], extra, 0)])


@pytest.mark.parametrize("rate", [0.0, 0.001, 0.005])
def test_consensus_finds_a_large_drift_among_wrong_candidates(route, rate):
    # 5e-3 rad/m is about 29 degrees per 100 m: every long closure is far
    # outside the odometry gate, yet the candidates' headings agree on it.
    rng = np.random.default_rng(6)
    odom, step_cov = drifted_odometry(route, rate, 0.0005, rng)
    src, dst, delta, cov = with_wrong_headings(route, *closures(route, np.radians(0.05), rng), 0.8, rng)
    guess = heading_drift_consensus(odom, step_cov, src, dst, delta, cov)
    if rate == 0.0:
        assert guess == 0.0 or abs(guess) < 1e-4
    else:
        assert guess == pytest.approx(rate, rel=0.1)
