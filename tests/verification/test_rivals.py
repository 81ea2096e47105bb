"""Rival groups: a consistent set must out-vote the consistent groups it contradicts.

The rule (closurecheck.verification.rivals, docs/verification.md "Rival
groups") is our own; what is checked against an outside reference is the
size of each rival, which must be the clique number of the graph the
outsiders induce (networkx's ``max_weight_clique`` with unit weights), and
the inequality that makes the rule meaningful: swapping the disputed part
of a maximum clique for a rival gives another clique, so the disputed part
is never smaller than the rival.
"""

import networkx as nx
import numpy as np
import pytest
import scipy.stats

from closurecheck.core import se2
from closurecheck.core.odometry import OdometryChain, keyframe_step_covariances, noise_from_header
from closurecheck.frontend.keyframes import select_keyframes
from closurecheck.registration.batch import RegisteredClosures, RegistrationQuality
from closurecheck.simulation.simulate import simulate_log
from closurecheck.verification.clique import max_clique
from closurecheck.verification.reasons import Reason
from closurecheck.verification.rivals import rival_groups
from closurecheck.verification.verify import VerifyOptions, verify


def _graph(n, edges):
    """The conflicts of the graph with these edges (its complement, no diagonal)."""
    a = np.zeros((n, n), dtype=bool)
    for i, j in edges:
        a[i, j] = a[j, i] = True
    return _conflicts(a)


def _conflicts(a):
    c = ~a
    np.fill_diagonal(c, False)
    return c


def test_a_set_that_out_votes_its_rival_stands():
    # 0-5 agree; the rival {6, 7} contradicts all six of them: 6 >= 2 * 2.
    edges = [(i, j) for i in range(6) for j in range(i + 1, 6)] + [(6, 7)]
    check = rival_groups(_graph(8, edges), np.arange(6), margin=2.0)
    assert len(check.disputes) == 1
    assert check.disputes[0].disputed.tolist() == list(range(6))
    assert check.disputes[0].rival.tolist() == [6, 7]
    assert not check.disputes[0].rejected and check.rejected.size == 0


def test_a_rival_that_disputes_too_little_takes_the_disputed_part_with_it():
    # The rival {6, 7} agrees with 0-2 and contradicts only 3-5: 3 < 2 * 2,
    # so 3-5 and 6-7 go and 0-2 stay.
    edges = [(i, j) for i in range(6) for j in range(i + 1, 6)] + [(6, 7)]
    edges += [(i, r) for i in range(3) for r in (6, 7)]
    check = rival_groups(_graph(8, edges), np.arange(6), margin=2.0)
    assert check.rejected.tolist() == [3, 4, 5, 6, 7]
    assert [d.rejected for d in check.disputes] == [True]
    # margin 1 turns the rule off; margin 1.5 lets 3 against 2 stand
    assert rival_groups(_graph(8, edges), np.arange(6), margin=1.0).rejected.size == 0
    assert rival_groups(_graph(8, edges), np.arange(6), margin=1.5).rejected.size == 0


def test_a_rival_that_disputes_nothing_still_standing_is_no_contest():
    # {0, 1} loses to {2, 3} (2 < 2 * 2); {4, 5} contradicts only what has
    # already gone, so it is not rejected.
    a = np.ones((6, 6), dtype=bool)
    for i in (0, 1):
        for j in (2, 3, 4, 5):
            a[i, j] = a[j, i] = False
    for i in (2, 3):
        for j in (4, 5):
            a[i, j] = a[j, i] = False
    check = rival_groups(_conflicts(a), np.array([0, 1]), margin=2.0)
    assert [d.rejected for d in check.disputes] == [True, False]
    assert check.disputes[1].disputed.size == 0
    assert check.rejected.tolist() == [0, 1, 2, 3]


def test_a_single_closure_is_not_a_rival_group():
    edges = [(0, 1), (0, 2), (1, 2)]
    check = rival_groups(_graph(4, edges), np.array([0, 1, 2]), margin=2.0)
    assert check.disputes == () and check.rejected.size == 0


@pytest.mark.parametrize("seed", range(12))
def test_rival_sizes_match_networkx_and_never_exceed_what_they_dispute(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(8, 22))
    upper = np.triu(rng.random((n, n)) < rng.uniform(0.3, 0.8), 1)
    a = upper | upper.T
    best = max_clique(a)
    assert best.exact
    check = rival_groups(_conflicts(a), best.members, margin=2.0, max_rounds=1)
    outside = np.setdiff1d(np.arange(n), best.members)
    g = nx.Graph()
    g.add_nodes_from(outside.tolist())
    g.add_edges_from((int(i), int(j)) for i, j in zip(*np.nonzero(np.triu(a, 1)))
                     if i in set(outside) and j in set(outside))
    _, reference = nx.max_weight_clique(g, weight=None)
    if reference < 2:
        assert check.disputes == ()
        return
    d = check.disputes[0]
    assert len(d.rival) == reference
    assert a[np.ix_(d.rival, d.rival)][~np.eye(len(d.rival), dtype=bool)].all()
    assert len(d.disputed) >= len(d.rival)
    # the disputed part is exactly the members that contradict some rival
    conflict = ~a[np.ix_(best.members, d.rival)]
    assert set(d.disputed.tolist()) == set(best.members[conflict.any(axis=1)].tolist())
    assert d.rejected == (len(d.disputed) < 2 * len(d.rival))


@pytest.fixture(scope="module")
def hall_chain():
    """A warehouse route's keyframes with loose odometry (the odometry gate cannot judge long spans)."""
    log = simulate_log("warehouse", seed=4, scans=900)
    kf = select_keyframes(log.odom)
    steps = keyframe_step_covariances(noise_from_header(log.header), log.odom, kf) * 400.0
    chain = OdometryChain.from_steps(np.asarray(kf), log.odom[kf], steps)
    return chain, log.truth[kf]


def _families(truth, true_runs, wrong_runs, rng):
    """Closures from keyframes 200.. to 40..: ``true_runs`` right ones, then ``wrong_runs`` shifted by a 6 m pitch.

    The decision logic alone is under test, so a closure needs no revisit:
    its delta is the true relative pose (plus the noise it claims).
    """
    a0, b0 = 200, 40
    cov = np.diag([0.02, 0.02, np.radians(0.3)]) ** 2
    shift = np.array([6.0, 0.0, 0.0])
    src, dst, delta, right = [], [], [], []
    for r in range(true_runs + wrong_runs):
        a, b = a0 + r, b0 + r
        z = se2.between(truth[a], truth[b])
        if r >= true_runs:
            z = se2.compose(z, shift)
        src.append(a), dst.append(b), delta.append(z + rng.multivariate_normal(np.zeros(3), cov))
        right.append(r < true_runs)
    return np.array(src), np.array(dst), np.array(delta), np.array(right), cov


def _closures(chain, src, dst, delta, cov):
    k = len(src)
    quality = RegistrationQuality(
        valid=np.ones(k, bool), converged=np.ones(k, bool), overlap=np.full(k, 0.8), rmse_m=np.full(k, 0.015),
        ambiguity=np.full(k, np.nan), degenerate=np.zeros(k, bool), degeneracy=np.full(k, 0.5),
        iterations=np.full(k, 5), fit_score=np.full(k, 0.9))
    return RegisteredClosures(src=chain.ids[src], dst=chain.ids[dst], delta=delta,
                              covariance=np.repeat(cov[None], k, 0), quality=quality)


def test_two_equal_families_of_closures_are_both_rejected(hall_chain):
    chain, truth = hall_chain
    src, dst, delta, right, cov = _families(truth, 4, 4, np.random.default_rng(1))
    closures = _closures(chain, src, dst, delta, cov)
    options = VerifyOptions(calibrate_heading_drift=False, extend_with_map=False, rival_margin=2.0)
    out = verify(closures, chain, options)
    assert (out.reason == Reason.RIVAL_GROUP).all(), out.reason
    assert not out.accepted.any()
    assert any("could not separate" in n for n in out.notes)
    # Without the rule (the default) the larger-or-equal side wins, right or wrong: the coin toss the rule removes.
    plain = verify(closures, chain, VerifyOptions(calibrate_heading_drift=False, extend_with_map=False))
    assert plain.accepted.sum() == 4 and (plain.reason == Reason.PAIR_INCONSISTENT).sum() == 4


def test_a_clear_majority_keeps_its_closures(hall_chain):
    chain, truth = hall_chain
    src, dst, delta, right, cov = _families(truth, 6, 2, np.random.default_rng(2))
    out = verify(_closures(chain, src, dst, delta, cov), chain,
                 VerifyOptions(calibrate_heading_drift=False, extend_with_map=False, rival_margin=2.0))
    assert out.accepted[right].all() and not out.accepted[~right].any()
    assert (out.reason[~right] == Reason.PAIR_INCONSISTENT).all()
    assert len(out.rivals.disputes) == 1 and not out.rivals.disputes[0].rejected


# --- odometry support of the consistent set (VerifyOptions.clique_max_odometry_factor) -----------------------------


@pytest.fixture(scope="module")
def aisle_chain():
    """The same route with odometry loose enough for a 6 m family to pass the gate, tight enough to show it.

    With the step covariances x100 the chains between the families' ends
    leave a 6 m shift a squared Mahalanobis distance of about 30 (variance
    factor about 13), the right closures about 0.03: like the warehouse
    family of docs/performance.md (26.6 against 1.8).
    """
    log = simulate_log("warehouse", seed=4, scans=900)
    kf = select_keyframes(log.odom)
    steps = keyframe_step_covariances(noise_from_header(log.header), log.odom, kf) * 100.0
    chain = OdometryChain.from_steps(np.asarray(kf), log.odom[kf], steps)
    return chain, log.truth[kf]


def _factor(chi2_values):
    """Median over the chi-square(3) median, the reference from scipy (scipy.stats.chi2.median)."""
    return float(np.median(chi2_values) / scipy.stats.chi2.median(3))


def test_a_larger_family_the_odometry_does_not_support_loses_to_a_smaller_one_it_does(aisle_chain):
    chain, truth = aisle_chain
    src, dst, delta, right, cov = _families(truth, 12, 20, np.random.default_rng(1))
    closures = _closures(chain, src, dst, delta, cov)
    base = dict(calibrate_heading_drift=False, extend_with_map=False)
    # Without the rule (a bound no factor reaches) the larger, shifted family wins.
    plain = verify(closures, chain, VerifyOptions(clique_max_odometry_factor=1e9, **base))
    assert plain.accepted[~right].all() and not plain.accepted[right].any()
    wrong_factor = _factor(plain.figures["odometry_chi2"][~right])
    right_factor = _factor(plain.figures["odometry_chi2"][right])
    assert wrong_factor > 4.0 and 4.0 * right_factor <= wrong_factor
    out = verify(closures, chain, VerifyOptions(**base))
    assert out.accepted[right].all() and not out.accepted[~right].any()
    assert (out.reason[~right] == Reason.UNSUPPORTED_GROUP).all()
    assert out.clique_size == right.sum()
    note = [n for n in out.notes if "set aside" in n]
    assert len(note) == 1
    assert f"({(~right).sum()} closures)" in note[0] and f"variance factor {wrong_factor:.1f}" in note[0]
    assert f"a set of {right.sum()} closures at factor {right_factor:.2f}" in note[0]
    # the same record reaches summary.json (closurecheck.reporting.outputs)
    assert out.set_aside.size == (~right).sum() and out.set_aside.kept_size == right.sum()
    assert out.set_aside.factor == pytest.approx(wrong_factor) and plain.set_aside is None
    # The map gate retries the set-aside closures against the map the kept clique pins down: a 6 m shift fails it.
    mapped = verify(closures, chain, VerifyOptions(calibrate_heading_drift=False))
    assert mapped.accepted[right].all() and not mapped.accepted[~right].any()
    assert np.isfinite(mapped.figures["map_chi2"][~right]).all()
    # The set-aside family is no rival group of the kept one: it lost on support, not on size.
    contest = verify(closures, chain, VerifyOptions(rival_margin=2.0, **base))
    assert contest.accepted[right].all() and not contest.accepted[~right].any()
    assert (contest.reason[~right] == Reason.UNSUPPORTED_GROUP).all()


def test_a_maximum_clique_the_odometry_supports_is_kept(aisle_chain):
    chain, truth = aisle_chain
    src, dst, delta, right, cov = _families(truth, 20, 12, np.random.default_rng(3))
    out = verify(_closures(chain, src, dst, delta, cov), chain,
                 VerifyOptions(calibrate_heading_drift=False, extend_with_map=False))
    assert _factor(out.figures["odometry_chi2"][right]) <= 4.0
    assert out.accepted[right].all() and not out.accepted[~right].any()
    assert (out.reason[~right] == Reason.PAIR_INCONSISTENT).all()
    assert not any("set aside" in n for n in out.notes)


def test_a_factor_within_the_bound_keeps_the_larger_family(hall_chain):
    # On the loosest odometry the shifted family's factor is about 3.3: the
    # odometry cannot tell it (a chain that loose cannot tell a pitch; the x4
    # row of docs/performance.md), and the rule leaves the maximum clique alone.
    chain, truth = hall_chain
    src, dst, delta, right, cov = _families(truth, 12, 20, np.random.default_rng(1))
    closures = _closures(chain, src, dst, delta, cov)
    base = dict(calibrate_heading_drift=False, extend_with_map=False)
    out = verify(closures, chain, VerifyOptions(**base))
    wrong_factor = _factor(out.figures["odometry_chi2"][~right])
    assert 1.0 < wrong_factor <= 4.0
    assert out.accepted[~right].all() and (out.reason[right] == Reason.PAIR_INCONSISTENT).all()
    # A stricter bound, under that factor, hands the decision to the family the odometry supports.
    strict = verify(closures, chain, VerifyOptions(clique_max_odometry_factor=wrong_factor / 2, **base))
    assert strict.accepted[right].all() and not strict.accepted[~right].any()


def test_a_supported_group_too_small_to_measure_leaves_the_largest(aisle_chain):
    # 8 right closures cannot measure a variance factor (verify.min_closures_for_scale = 10), so
    # the unsupported family of 20 stays; its factor is left for the trust verdict to judge.
    chain, truth = aisle_chain
    src, dst, delta, right, cov = _families(truth, 8, 20, np.random.default_rng(1))
    out = verify(_closures(chain, src, dst, delta, cov), chain,
                 VerifyOptions(calibrate_heading_drift=False, extend_with_map=False))
    assert _factor(out.figures["odometry_chi2"][~right]) > 4.0
    assert out.accepted.sum() >= 12 and not out.accepted[right].any()
    assert (out.reason[right] == Reason.PAIR_INCONSISTENT).all()
    assert not (out.reason == Reason.UNSUPPORTED_GROUP).any()
    assert not any("set aside" in n for n in out.notes)
