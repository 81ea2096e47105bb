"""Verification: injected wrong closures are rejected, true ones kept.

The trajectory, odometry and revisits come from a simulated warehouse log
(truth and drifting odometry); the closures are built from the truth so the
test exercises the decision logic alone, without registration:

* true closures: the true delta plus Gaussian noise drawn from the
  covariance they claim;
* wrong closures: "look-alike" matches, i.e. the true delta of a revisit
  moved sideways by one aisle spacing (and a few degrees), the way a scan
  in one aisle matches the identical neighbouring aisle. They come in runs
  along a pass, so a group of them is mutually consistent: the hard case
  for pairwise consistency alone.
"""

import numpy as np
import pytest
from scipy.stats import chi2

from closurecheck.core import se2
from closurecheck.core.odometry import OdometryChain, keyframe_step_covariances, noise_from_header
from closurecheck.frontend.keyframes import select_keyframes
from closurecheck.registration.batch import RegisteredClosures, RegistrationQuality
from closurecheck.simulation.simulate import simulate_log
from closurecheck.verification.map_gate import relative_posterior
from closurecheck.verification.verify import (
    VerifyOptions,
    odometry_edges,
    odometry_scale,
    verify,
)


@pytest.fixture(scope="module")
def scene():
    log = simulate_log("warehouse", seed=3)
    kf = select_keyframes(log.odom)
    truth = log.truth[kf]
    odom = log.odom[kf]
    step_cov = keyframe_step_covariances(noise_from_header(log.header), log.odom, kf)
    # True revisits: keyframes within 1 m and 30 degrees in truth, far apart in the sequence.
    i, j = np.triu_indices(len(kf), k=60)
    d = se2.between(truth[i], truth[j])
    near = (np.hypot(d[:, 0], d[:, 1]) < 1.0) & (np.abs(d[:, 2]) < np.radians(30))
    pairs = np.stack([j[near], i[near]], 1)  # later -> earlier, like the candidate stage
    pairs = pairs[np.random.default_rng(0).permutation(len(pairs))[:150]]
    return {"truth": truth, "odom": odom, "step_cov": step_cov, "pairs": pairs}


def make_closures(scene, fraction_wrong, seed):
    rng = np.random.default_rng(seed)
    truth = scene["truth"]
    pairs = scene["pairs"]
    n_true = len(pairs)
    n_wrong = int(round(n_true * fraction_wrong / (1 - fraction_wrong)))
    cov = np.diag([0.02, 0.02, np.radians(0.3)]) ** 2
    src, dst, delta, label = [], [], [], []
    for a, b in pairs:
        z = se2.between(truth[a], truth[b]) + rng.multivariate_normal(np.zeros(3), cov)
        src.append(a), dst.append(b), delta.append(z), label.append(True)
    # Wrong closures in runs of consecutive keyframes sharing one look-alike offset.
    while len(src) < n_true + n_wrong:
        a0 = rng.integers(100, len(truth) - 10)
        b0 = rng.integers(0, a0 - 60)
        offset = np.array([0.0, rng.choice([-3.2, 3.2]), np.radians(rng.uniform(-3, 3))])
        for r in range(min(8, n_true + n_wrong - len(src))):
            a, b = a0 + r, b0 + r
            z = se2.compose(se2.between(truth[a], truth[b]), offset) + rng.multivariate_normal(np.zeros(3), cov)
            src.append(a), dst.append(b), delta.append(z), label.append(False)
    k = len(src)
    quality = RegistrationQuality(
        valid=np.ones(k, bool), converged=np.ones(k, bool), overlap=np.full(k, 0.8), rmse_m=np.full(k, 0.015),
        ambiguity=np.full(k, np.nan), degenerate=np.zeros(k, bool), degeneracy=np.full(k, 0.5),
        iterations=np.full(k, 5), fit_score=np.full(k, 0.9))
    closures = RegisteredClosures(src=np.array(src), dst=np.array(dst), delta=np.array(delta),
                                  covariance=np.repeat(cov[None], k, 0), quality=quality)
    return closures, np.array(label)


def chain_of(odom, step_cov):
    """The keyframe chain with node i standing for scan id i."""
    return OdometryChain.from_steps(np.arange(len(odom)), odom, step_cov)


@pytest.mark.parametrize("fraction_wrong", [0.5, 0.9])
def test_injected_look_alike_closures_are_rejected(scene, fraction_wrong):
    closures, label = make_closures(scene, fraction_wrong, seed=7)
    ver = verify(closures, chain_of(scene["odom"], scene["step_cov"]))
    assert not np.any(ver.accepted & ~label), "a wrong closure was accepted"
    assert ver.accepted[label].mean() >= 0.9
    assert set(ver.reason[~label]) <= {"odometry_gate", "pair_inconsistent", "graph_residual"}
    # Every verified closure holds in the optimised graph (chi-square test, 3 DoF),
    # and the optimised keyframes follow the truth better than odometry alone.
    from closurecheck.reporting.trajectory import ate_rmse

    assert np.all(ver.figures["graph_chi2"][ver.accepted] <= chi2.ppf(0.999, 3))
    assert ate_rmse(ver.poses, scene["truth"]) < ate_rmse(scene["odom"], scene["truth"])


def test_quality_checks_record_their_reason(scene):
    closures, label = make_closures(scene, 0.0, seed=1)
    q = closures.quality
    q.converged[0] = False
    q.overlap[1] = 0.05
    q.rmse_m[2] = 1.0
    q.ambiguity[3] = 0.99
    q.degenerate[4] = True
    ver = verify(closures, chain_of(scene["odom"], scene["step_cov"]))
    assert list(ver.reason[:5]) == ["not_converged", "low_overlap", "high_rmse", "ambiguous", "degenerate"]
    assert ver.accepted[5:].mean() >= 0.9


def test_variance_factor_is_one_for_chi_square_data_and_scales_with_inflation():
    # chi-square(3) samples: the median ratio estimates a factor of 1 (clipped from below);
    # samples of 4x too small a covariance are chi-square(3) times 4.
    rng = np.random.default_rng(2)
    x = chi2.rvs(3, size=4000, random_state=rng)
    opts = VerifyOptions()
    assert odometry_scale(x, opts) == pytest.approx(1.0, abs=0.06)
    assert odometry_scale(4 * x, opts) == pytest.approx(4.0, rel=0.06)
    assert odometry_scale(x[:3], opts) == 1.0  # too few closures to estimate


def test_map_posterior_blocks_equal_the_dense_inverse(scene):
    # Reference: numpy.linalg.inv of the same (dense) normal matrix.
    from closurecheck.graph.solver import normal_matrix

    odom = scene["odom"][:80]
    cov = scene["step_cov"][:79]
    o_src, o_dst, o_delta, o_info = odometry_edges(odom, cov)
    src = np.r_[o_src, [70, 60]]
    dst = np.r_[o_dst, [5, 10]]
    delta = np.r_[o_delta, se2.between(odom[[70, 60]], odom[[5, 10]])]
    info = np.r_[o_info, np.repeat(np.eye(3)[None] * 1e3, 2, 0)]
    pi, pj = np.array([3, 70, 0, 41]), np.array([50, 12, 33, 41])
    rel, rel_cov = relative_posterior(odom, src, dst, delta, info, pi, pj)
    h, _ = normal_matrix(odom, src, dst, delta, info)
    s = np.zeros((3 * 80, 3 * 80))
    s[3:, 3:] = np.linalg.inv(h.toarray())
    for k, (i, j) in enumerate(zip(pi, pj)):
        ja, jb = se2.between_jacobians(odom[i], odom[j])
        jj = np.hstack([ja, jb])
        idx = np.r_[3 * i:3 * i + 3, 3 * j:3 * j + 3]
        expected = jj @ s[np.ix_(idx, idx)] @ jj.T
        np.testing.assert_allclose(rel_cov[k], expected, atol=1e-10, rtol=1e-8)
        np.testing.assert_allclose(rel[k], se2.between(odom[i], odom[j]))


def test_heading_drift_is_measured_and_removed(scene):
    # A robot whose odometry turns 0.03 degrees more per metre than the
    # simulated one (unequal wheels): the strict pass alone loses a third of
    # the true closures and the map stays bent.  The drift the closures
    # measure must agree with the drift seen against ground truth (slope of
    # the odometry's heading error over travelled distance, numpy.polyfit).
    from closurecheck.reporting.trajectory import ate_rmse
    from closurecheck.verification.drift import chain_travel, remove_heading_drift

    odom = remove_heading_drift(scene["odom"], -0.0005)
    closures, label = make_closures(scene, 0.5, seed=11)
    on = verify(closures, chain_of(odom, scene["step_cov"]))
    off = verify(closures, chain_of(odom, scene["step_cov"]), VerifyOptions(calibrate_heading_drift=False))
    assert not np.any(on.accepted & ~label) and not np.any(off.accepted & ~label)
    assert on.heading_drift.applied and not off.heading_drift.applied
    travel = chain_travel(odom)
    error = np.unwrap(odom[:, 2]) - np.unwrap(scene["truth"][:, 2])
    slope = np.polyfit(travel, error - error[0], 1)[0]
    assert abs(on.heading_drift.rate_rad_per_m - slope) <= 4 * on.heading_drift.std_rad_per_m
    assert on.accepted[label].mean() >= 0.9 > off.accepted[label].mean()
    assert ate_rmse(on.poses, scene["truth"]) < 0.5 * ate_rmse(off.poses, scene["truth"])
    # The graph is built on the corrected odometry; without calibration on the input.
    assert ate_rmse(on.odometry_poses, scene["truth"]) < ate_rmse(odom, scene["truth"])
    np.testing.assert_array_equal(off.odometry_poses, odom)


def test_a_large_heading_drift_is_found_from_the_candidates(scene):
    # 0.0025 rad/m more (about 14 degrees per 100 m): the strict pass alone
    # verifies nothing; the candidates' headings give the first guess.
    from closurecheck.verification.drift import remove_heading_drift

    odom = remove_heading_drift(scene["odom"], -0.0025)
    closures, label = make_closures(scene, 0.9, seed=12)
    on = verify(closures, chain_of(odom, scene["step_cov"]))
    off = verify(closures, chain_of(odom, scene["step_cov"]), VerifyOptions(calibrate_heading_drift=False))
    assert not np.any(on.accepted & ~label)
    assert on.accepted[label].mean() >= 0.9
    assert off.accepted[label].mean() < 0.5


def test_closure_floor_adds_the_unmodelled_error_in_quadrature():
    from closurecheck.verification.verify import closure_covariances

    rng = np.random.default_rng(4)
    a = rng.normal(size=(5, 3, 3)) * 1e-3
    cov = a @ np.swapaxes(a, 1, 2) + np.eye(3) * 1e-8
    opts = VerifyOptions(closure_floor_m=0.002, closure_floor_rad=0.001)
    out = closure_covariances(cov, opts)
    np.testing.assert_allclose(out - cov, np.broadcast_to(np.diag([4e-6, 4e-6, 1e-6]), cov.shape), atol=1e-18)
    # A floor only ever makes a closure less certain: every direction's variance grows.
    assert np.all(np.linalg.eigvalsh(out - cov) > 0)
    np.testing.assert_array_equal(closure_covariances(cov, VerifyOptions(closure_floor_m=0.0, closure_floor_rad=0.0)),
                                  cov)


def test_reviewer_decisions_overrule_the_checks(scene):
    # The reviewer accepts one look-alike (wrong) closure and rejects one true one.
    from closurecheck.verification.verify import ReviewerVerdicts

    closures, label = make_closures(scene, 0.5, seed=21)
    chain = chain_of(scene["odom"], scene["step_cov"])
    plain = verify(closures, chain)
    wrong = int(np.flatnonzero(~label & ~plain.accepted)[0])
    right = int(np.flatnonzero(label & plain.accepted)[0])
    accept = np.zeros(len(label), bool)
    reject = np.zeros(len(label), bool)
    accept[wrong] = True
    reject[right] = True
    ver = verify(closures, chain, review=ReviewerVerdicts(accept=accept, reject=reject))
    assert ver.reason[wrong] == "reviewer_accepted" and ver.accepted[wrong]
    assert ver.reason[right] == "reviewer_rejected" and not ver.accepted[right]
    # The forced acceptance took part in the final optimisation: the graph the checks alone built contradicts
    # it far beyond the residual test, the graph built with it honours it.
    s_, d_ = closures.src[wrong], closures.dst[wrong]
    cov = ver.closure_covariance[wrong]

    def residual(poses):
        e = se2.between(se2.between(poses[s_], poses[d_]), closures.delta[wrong])
        return float(e @ np.linalg.solve(cov, e))

    threshold = chi2.ppf(0.999, 3)
    assert residual(plain.poses) > threshold
    assert residual(ver.poses) <= threshold
    assert ver.figures["graph_chi2"][wrong] == pytest.approx(residual(ver.poses), rel=1e-6)
    # The forced rejection never reached the consistency checks.
    assert np.isnan(ver.figures["odometry_chi2"][right]) and np.isnan(ver.figures["pair_support"][right])
    # The map gate tests against a map built with the forced closure: the wrong closure's look-alike
    # neighbours, which the checks alone rejected, now join through it (an acceptance is a statement about
    # the map, docs/verification.md, "Reviewer decisions").
    others = ~(accept | reject)
    joined_wrong = others & ~label & ver.accepted
    assert joined_wrong.any() and not (plain.accepted & ~label).any()
    assert np.all(ver.figures["map_chi2"][joined_wrong] <= chi2.ppf(VerifyOptions().map_probability, 3))


def test_a_variance_factor_at_its_bound_accepts_nothing_through_the_map(scene):
    closures, label = make_closures(scene, 0.5, seed=5)
    chain = chain_of(scene["odom"], scene["step_cov"])
    free = verify(closures, chain, VerifyOptions(max_odometry_scale=1e6))
    assert free.odometry_scale > 1.0  # the data do ask for more than the bound below
    assert np.isfinite(free.figures["map_chi2"]).any()
    capped = verify(closures, chain, VerifyOptions(max_odometry_scale=1.0))
    assert capped.odometry_scale == 1.0
    assert not np.isfinite(capped.figures["map_chi2"]).any()
    assert any("sits at its bound" in n for n in capped.notes)
    assert not (capped.accepted & ~label).any()


@pytest.mark.parametrize("use_gnc", [True, False])
def test_a_warm_start_reaches_the_optimum_of_the_cold_one(scene, use_gnc):
    # The verification starts each optimisation after the first from the latest optimum (map gate
    # rounds, the final graph, the free-space trials).  From there it must reach the optimum it
    # reaches from the odometry: the same closures kept, poses to the solver's tolerance.  The
    # start here is the optimum of a smaller graph (two thirds of the closures), as a map round's is.
    from closurecheck.verification.verify import closure_covariances, optimise_closures

    closures, label = make_closures(scene, 0.5, seed=7)
    src, dst = closures.src, closures.dst
    cov = closure_covariances(closures.covariance)
    opts = VerifyOptions(use_gnc=use_gnc)
    members = np.flatnonzero(label)
    _, first, _, _ = optimise_closures(members[: 2 * len(members) // 3], src, dst, closures.delta, cov,
                                       scene["odom"], scene["step_cov"], opts)
    cold = optimise_closures(members, src, dst, closures.delta, cov, scene["odom"], scene["step_cov"], opts)
    warm = optimise_closures(members, src, dst, closures.delta, cov, scene["odom"], scene["step_cov"], opts,
                             start=first)
    assert np.abs(first - cold[1]).max() > 1e-4  # the start is not already the answer
    assert np.array_equal(warm[0], cold[0])
    # The robust kernel's reweighting converges linearly and stops at a relative cost change of 1e-8:
    # from the two starts the poses stop up to 3.3 micrometres apart (measured), inside the demo
    # record's 10 micrometres.
    np.testing.assert_allclose(warm[1], cold[1], rtol=0, atol=1e-5)
    np.testing.assert_allclose(warm[3], cold[3], rtol=1e-3, atol=1e-6)
