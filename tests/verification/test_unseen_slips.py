"""Slips at odometry steps the scans could not check (closurecheck.verification.slips).

The search's logic is checked with a stand-in decision whose outcome per
widened stretch is set by hand; the whole run on a simulated corridor ring
with a slip injected where the scans are blanked (simulated data, for a
property that holds whatever the data: the slip is found where it was put,
and nothing false is accepted).
"""

import dataclasses
import math

import numpy as np
import pytest

from closurecheck import simulate_log
from closurecheck.config import RunConfig
from closurecheck.core import se2
from closurecheck.pipeline import run_log
from closurecheck.reporting.outputs import summary
from closurecheck.reporting.scoring import registered_correctly
from closurecheck.verification.consistency import ConsistencyOptions
from closurecheck.verification.free_space import FreeSpaceCheck
from closurecheck.verification.slips import explained_by_unseen_slip, search_unseen_slips, slip_covariance, stretches
from closurecheck.core.odometry import OdometryChain
from closurecheck.verification.verify import Verification, VerifyOptions


def test_stretches_are_runs_of_consecutive_steps():
    assert stretches([7, 3, 4, 5, 9]).tolist() == [[3, 5], [7, 7], [9, 9]]
    assert stretches([]).shape == (0, 2)


def test_slip_covariance_puts_the_bounds_at_two_standard_deviations():
    std = np.sqrt(np.diag(slip_covariance(0.3, math.radians(5.0))))
    assert std == pytest.approx([0.15, 0.15, math.radians(2.5)])


# --------------------------------------------------------------------------
# the search's logic, with a stand-in decision


def _verification(contradictions, accepted, scale=1.0, n=10):
    k = max(accepted, 1) + 5
    flags = np.zeros(max(contradictions, 1), dtype=bool)
    flags[:contradictions] = True
    free = FreeSpaceCheck(a=np.zeros(len(flags), np.intp), b=np.full(len(flags), n - 1, np.intp),
                          share=np.zeros(len(flags)), length_m=np.zeros(len(flags)), judged_m=np.ones(len(flags)),
                          contradicts=flags)
    acc = np.zeros(k, dtype=bool)
    acc[:accepted] = True
    reason = np.where(acc, "accepted", "odometry_gate")
    return Verification(reason=reason, accepted=acc, closure_covariance=np.tile(np.diag([1e-4, 1e-4, 1e-6]), (k, 1, 1)),
                        figures={},
                        poses=np.zeros((n, 3)), clique_exact=True, clique_size=accepted, odometry_scale=scale,
                        free_space=free)


def _chain(n=10):
    poses = np.column_stack([0.5 * np.arange(n), np.zeros(n), np.zeros(n)])
    return OdometryChain.from_steps(np.arange(n) * 3, poses, np.tile(np.diag([1e-4, 1e-4, 1e-6]), (n - 1, 1, 1)))


def _search(initial, outcomes, unchecked, chain=None):
    """Run the search where widening the stretch starting at step s gives ``outcomes[s]`` (or the initial)."""
    chain = chain or _chain()
    tried = []

    def decide(steps):
        widened = np.flatnonzero(np.any(steps != chain.steps, axis=(1, 2)))
        tried.append(tuple(widened))
        # the outcome of the last stretch widened (earlier kept ones stay widened)
        fresh = [s for s in widened if s not in kept_steps]
        return outcomes.get(fresh[0] if fresh else -1, initial)

    kept_steps: set = set()
    k = len(initial.reason)
    src, dst = np.zeros(k, np.intp), np.full(k, len(chain) - 1, np.intp)
    # Every rejected closure agrees with the odometry to within a slip (0.1 m), so a slip in any
    # stretch would undo its gate rejection: every stretch is a suspect.
    delta = np.tile(se2.between(chain.poses[0], chain.poses[-1]) + [0.1, 0.0, 0.0], (k, 1))
    out = search_unseen_slips(initial, decide, chain, np.asarray(unchecked), VerifyOptions(), ConsistencyOptions(),
                              src, dst, delta)
    return out, tried


def test_a_run_without_contradictions_is_never_changed():
    initial = _verification(0, 20)
    out, tried = _search(initial, {2: _verification(0, 40)}, [2, 5])
    assert out is initial and tried == []


def test_the_stretch_that_leaves_fewest_contradictions_is_kept():
    initial = _verification(9, 20)
    out, _ = _search(initial, {2: _verification(4, 25), 5: _verification(0, 22), 7: _verification(12, 40)},
                     [2, 5, 7])
    assert [(s.first_step, s.last_step) for s in out.unseen_slips] == [(5, 5)]
    assert out.unseen_slips[0].contradictions_before == 9 and out.unseen_slips[0].contradictions_after == 0
    widened = np.flatnonzero(np.any(out.odometry_steps != _chain().steps, axis=(1, 2)))
    assert widened.tolist() == [5]
    assert "slip" in out.notes[-1]


def test_no_stretch_is_kept_when_none_lowers_the_contradictions():
    initial = _verification(3, 20)
    out, tried = _search(initial, {2: _verification(3, 60), 5: _verification(5, 30)}, [2, 5])
    assert out is initial and len(tried) == 2


def test_a_stretch_that_explains_no_gate_rejection_is_not_tried():
    # The rejected closures are 3 m off the odometry: no slip of up to 0.3 m explains them.
    chain = _chain()
    initial = _verification(4, 20)
    k = len(initial.reason)
    calls = []
    delta = np.tile(se2.between(chain.poses[0], chain.poses[-1]) + [3.0, 0.0, 0.0], (k, 1))
    out = search_unseen_slips(initial, lambda steps: calls.append(1) or _verification(0, 30), chain,
                              np.array([2, 5]), VerifyOptions(), ConsistencyOptions(), np.zeros(k, np.intp),
                              np.full(k, len(chain) - 1, np.intp), delta)
    assert out is initial and not calls


def test_more_closures_alone_never_justify_the_first_stretch():
    # Same contradictions, many more closures: that is the "larger consistent set" the issue warns about.
    initial = _verification(2, 20)
    out, _ = _search(initial, {2: _verification(2, 80)}, [2])
    assert out is initial


# --------------------------------------------------------------------------
# which gate rejections a slip at an unchecked stretch would explain


def _straight(n=21):
    poses = np.column_stack([0.5 * np.arange(n), np.zeros(n), np.zeros(n)])
    return poses, np.tile(np.diag([1e-4, 1e-4, 1e-6]), (n - 1, 1, 1))


def test_a_small_offset_through_an_unchecked_step_is_explained_a_look_alike_shift_is_not():
    poses, steps = _straight()
    cov = np.tile(np.diag([1e-4, 1e-4, 1e-6]), (3, 1, 1))
    # 0.2 m longer (a slip could do it); 4.6 m longer (an aisle pitch: no slip does that);
    # 0.2 m longer but the unchecked step is outside the closure's chain.
    delta = np.array([[10.2, 0.0, 0.0], [14.6, 0.0, 0.0], [2.2, 0.0, 0.0]])
    src, dst = np.array([0, 0, 10]), np.array([20, 20, 14])
    out = explained_by_unseen_slip(src, dst, delta, cov, poses, steps, [7], VerifyOptions(), ConsistencyOptions())
    assert out.tolist() == [True, False, False]


def test_a_heading_slip_is_explained_through_its_lever_arm_up_to_the_bound():
    poses, steps = _straight()
    cov = np.tile(np.diag([1e-4, 1e-4, 1e-6]), (2, 1, 1))
    # The chain after step 2 is turned by the slip: the end of a 10 m chain moves sideways by about
    # 9 m * angle.  4 degrees is within the 5-degree bound (two standard deviations), 12 is not.
    ends = []
    for deg in (4.0, 12.0):
        a = math.radians(deg)
        turned = se2.compose(np.array([1.5, 0.0, a]), np.array([8.5, 0.0, 0.0]))
        ends.append(turned)
    out = explained_by_unseen_slip(np.array([0, 0]), np.array([20, 20]), np.array(ends), cov, poses, steps, [2],
                                   VerifyOptions(), ConsistencyOptions())
    assert out.tolist() == [True, False]


# --------------------------------------------------------------------------
# a whole run: a slip where the scans are blank


@pytest.fixture(scope="module")
def slipped_ring():
    """A 700-scan corridor ring whose odometry jumps (0.2 m, 0.2 m, 5 deg) at scan 350, blind around it."""
    log = simulate_log("ring", seed=3, scans=700)
    inc = se2.between(log.odom[:-1], log.odom[1:])
    inc[350] += np.array([0.2, 0.2, math.radians(5.0)])
    odom = [log.odom[0]]
    for d in inc:
        odom.append(se2.compose(odom[-1], d))
    ranges = log.ranges.copy()
    ranges[342:359] = np.nan      # no return: the steps there cannot be registered
    log = dataclasses.replace(log, odom=np.array(odom), ranges=ranges)
    return log, run_log(log, RunConfig(jobs=1))


def test_a_slip_the_scans_could_not_see_is_found_where_it_happened(slipped_ring):
    log, out = slipped_ring
    ver = out.verification
    assert len(ver.unseen_slips) >= 1
    first = ver.unseen_slips[0]
    # the stretch holds the keyframe step with scan 350 -> 351 in it
    slipped = int(np.searchsorted(out.keyframes, 351) - 1)
    assert first.first_step <= slipped <= first.last_step
    assert first.contradictions_before > first.contradictions_after
    assert first.accepted_after > first.accepted_before
    v = out.verdicts
    right = registered_correctly(log.truth, v.src, v.dst, v.delta)
    assert v.accepted.sum() >= 20 and not (v.accepted & ~right).any()
    assert out.trust.sound
    listed = summary(out)["unseen_slips"][0]
    assert listed["first_scan"] <= 351 <= listed["last_scan"]
    assert listed["pairs_contradicting_before"] == first.contradictions_before
    # graph.json carries the widening: that step's odometry edge is less informative than before
    info = out.graph.information[:len(out.keyframes) - 1]
    before = np.linalg.inv(out.calibration.chain.steps[slipped] * ver.odometry_scale)
    assert np.linalg.det(info[slipped]) < np.linalg.det(before)


def test_without_the_search_the_same_log_contradicts_itself(slipped_ring):
    log, out = slipped_ring
    cfg = RunConfig(jobs=1)
    cfg = dataclasses.replace(cfg, verify=dataclasses.replace(cfg.verify, unseen_slip_rounds=0))
    plain = run_log(log, cfg)
    assert plain.verification.free_space.count == out.verification.unseen_slips[0].contradictions_before > 0
    assert not plain.trust.sound
