"""Slips the scans could not see: odometry jumps where consecutive keyframes did not register.

The calibration (:mod:`closurecheck.calibration.odometry`) finds a slip (a
wheel slipping, a bump) as a keyframe step whose registered motion is far
from the odometry's, and widens that step's covariance so that the loop
closures decide.  Where the two scans of a step do not register (a sparse
yard, a person in front of the sensor) the step cannot be checked, and a
slip there stays in the chain with an ordinary covariance.  Its signature
comes later: the closures on the two sides of it cannot all agree with the
odometry, verification keeps the larger side, and the map it builds bends
where the jump was spread along the loop, so scans of different visits
contradict each other (:mod:`closurecheck.verification.free_space`).

On a simulated parking lot (1,200 scans, 16% of the keyframe steps not
registered) a 0.18 m / 1.7 degree slip at such a step split the revisits
into two groups: 6 of 20 revisit events were rejected (odometry gate and
PCM) and 9 keyframe pairs contradicted each other in the final map.

The search here is a hypothesis test with the free-space check as the
judge, which needs no ground truth:

1. the unchecked steps form stretches (runs of consecutive steps);
2. a stretch is a suspect when one slip there would let at least one
   closure that the odometry gate rejected pass (once a slip has been
   kept, also when there is trouble near it); suspects are ranked by how
   many, then by the trouble near them: keyframes of contradicting pairs,
   and ends of closures that registered well but were rejected as
   inconsistent with the odometry or with each other;
3. for the few best-ranked suspects, one at a time, the stretch is given
   the covariance of one slip of up to ``unseen_slip_max_m`` and
   ``unseen_slip_max_rad`` (two standard deviations, shared among its
   steps) and the whole decision is taken again;
4. the stretch whose decision leaves the fewest contradicting pairs is kept
   if that is fewer than before; then the next round, up to
   ``unseen_slip_rounds``.

A run whose final map has no contradiction is never changed.  A widened
step only lowers the odometry's say over closures that span it: a wrong
closure that it lets through has to survive PCM, the graph tests and the
free-space check of the new map, and the new decision is kept only if its
map has fewer contradictions.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..core import se2
from ..core.odometry import OdometryChain
from .consistency import ConsistencyOptions, odometry_gate
from .reasons import Reason

__all__ = ["UnseenSlip", "explained_by_unseen_slip", "slip_covariance", "stretches", "search_unseen_slips"]

# Keyframes within which trouble counts as near a stretch: 20 keyframes
# are about 10 m of route at the default spacing (the free-space check's
# event window, verify._EVENT_WINDOW).
_WINDOW = 20
# Stretches tried per round, best scored first.  Each try is one more
# decision (0.5 s on a 1,200-scan log, about 2 s at 5,000 scans).
_SUSPECTS = 4
# Rejections that say a closure disagreed with the odometry model or with
# other closures, after its registration passed every quality check.
_DISAGREED = frozenset(str(r) for r in (Reason.ODOMETRY_GATE, Reason.PAIR_INCONSISTENT, Reason.UNSUPPORTED_GROUP,
                                        Reason.GRAPH_RESIDUAL, Reason.SCAN_CONTRADICTION, Reason.RIVAL_GROUP))


@dataclass(frozen=True)
class UnseenSlip:
    """A stretch of unchecked odometry steps whose widening was kept.

    first_step, last_step : chain step indices (step k joins keyframes k and
        k + 1), inclusive.
    contradictions_before, contradictions_after : contradicting keyframe
        pairs of the final map without and with the widening.
    accepted_before, accepted_after : accepted closures likewise.
    """

    first_step: int
    last_step: int
    contradictions_before: int
    contradictions_after: int
    accepted_before: int
    accepted_after: int


def stretches(unchecked) -> np.ndarray:
    """Runs of consecutive step indices, as an (R, 2) array of [first, last] (inclusive).

    >>> stretches([3, 4, 5, 9, 12, 13]).tolist()
    [[3, 5], [9, 9], [12, 13]]
    """
    u = np.unique(np.asarray(unchecked, dtype=np.intp))
    if not len(u):
        return np.zeros((0, 2), dtype=np.intp)
    breaks = np.flatnonzero(np.diff(u) != 1)
    first = u[np.r_[0, breaks + 1]]
    last = u[np.r_[breaks, len(u) - 1]]
    return np.column_stack([first, last])


def slip_covariance(max_m: float, max_rad: float) -> np.ndarray:
    """(3, 3) covariance on a step's [x, y, theta] (step's start frame) of a slip of up to the given size.

    The bounds are two standard deviations, each axis independent.

    >>> import numpy as np
    >>> np.sqrt(np.diag(slip_covariance(0.3, np.radians(5.0)))).round(4).tolist()
    [0.15, 0.15, 0.0436]
    """
    return np.diag([(0.5 * max_m) ** 2, (0.5 * max_m) ** 2, (0.5 * max_rad) ** 2])


def _trouble(result, src, dst) -> np.ndarray:
    """Keyframe positions where the decided map disagrees with itself."""
    spots = []
    free = result.free_space
    if free is not None and free.count:
        c = free.contradicts
        spots += [free.a[c], free.b[c]]
    bad = np.isin(result.reason, list(_DISAGREED))
    spots += [src[bad], dst[bad]]
    return np.concatenate(spots).astype(np.intp) if spots else np.zeros(0, np.intp)


def _scores(runs, spots) -> np.ndarray:
    """Trouble spots within :data:`_WINDOW` keyframes of each stretch (keyframes first .. last + 1)."""
    spots = np.sort(spots)
    lo = np.searchsorted(spots, runs[:, 0] - _WINDOW, side="left")
    hi = np.searchsorted(spots, runs[:, 1] + 1 + _WINDOW, side="right")
    return hi - lo


def _count(result) -> int:
    return 0 if result.free_space is None else result.free_space.count


def _better(trial, current, options, shown: bool) -> bool:
    """Whether a widened stretch's decision is kept over the current one.

    Fewer contradicting pairs; or, once a stretch has been kept (the run
    was shown to carry unseen slips), no more contradictions, at least
    ``min_closures_for_scale`` more closures and an odometry variance
    factor no larger: the slip explains evidence the odometry model could
    not, without the map contradicting itself.
    """
    c, c0 = _count(trial), _count(current)
    if c < c0:
        return True
    if not shown:
        return False
    more = int(trial.accepted.sum()) - int(current.accepted.sum())
    return c <= c0 and more >= options.min_closures_for_scale and trial.odometry_scale <= current.odometry_scale


def _explained_counts(result, runs, chain, steps, src, dst, delta, options, cons) -> np.ndarray:
    """(R,) gate rejections of ``result`` that one slip in each stretch would let pass."""
    counts = np.zeros(len(runs), dtype=np.intp)
    gated = np.flatnonzero(result.reason == str(Reason.ODOMETRY_GATE))
    if not len(gated):
        return counts
    odom = chain.poses if result.odometry_poses is None else result.odometry_poses
    for r, rows in _passing_per_stretch(src[gated], dst[gated], delta[gated], result.closure_covariance[gated], odom,
                                        steps * result.odometry_scale, runs, options, cons):
        counts[r] = len(rows)
    return counts


def search_unseen_slips(result, decide, chain: OdometryChain, unchecked, options, cons: ConsistencyOptions,
                        src, dst, delta):
    """Look for slips at unchecked odometry steps where the final map contradicts itself (module docstring).

    Parameters
    ----------
    result : the :class:`~closurecheck.verification.verify.Verification`
        of the chain as calibrated.
    decide : callable taking (N - 1, 3, 3) step covariances and returning
        the Verification of the same candidates on the chain with them.
    chain : the calibrated keyframe chain (N keyframes).
    unchecked : (U,) step indices the calibration could not check.
    options : VerifyOptions (``unseen_slip_*``).
    cons : the odometry gate's ConsistencyOptions.
    src, dst : (K,) chain positions of the candidates' two keyframes.
    delta : (K, 3) their registered deltas ``src^-1 ∘ dst`` (m, m, rad),
        src frame.

    Returns
    -------
    The Verification kept: ``result`` itself when no stretch lowers the
    number of contradicting pairs, else the decision with the kept
    stretches widened (``odometry_steps``, ``unseen_slips`` and a note set).
    """
    runs = stretches(unchecked)
    steps = np.array(chain.steps, dtype=float)
    widen = slip_covariance(options.unseen_slip_max_m, options.unseen_slip_max_rad)
    kept: list[UnseenSlip] = []
    tried = np.zeros(len(runs), dtype=bool)
    best_result = result
    for _ in range(options.unseen_slip_rounds):
        before = _count(best_result)
        if (not before and not kept) or tried.all():
            break
        # Until a slip has been shown, only stretches where one would undo at
        # least one gate rejection (a slip lies inside the chains of the
        # closures it bends): on a 5,000-scan yard whose 5 contradicting
        # pairs no slip explains, trying the four stretches nearest the
        # trouble cost 9.5 s and changed nothing.  Once one is kept, also
        # stretches with trouble near (a slip between two groups of closures
        # shows in PCM, not in the gate: on the lot at 25 deg/100 m, seed 1,
        # that round added 13 closures and 2 of 20 revisit events).  The most
        # explained rejections first, then the most trouble near.
        explained = _explained_counts(best_result, runs, chain, steps, src, dst, delta, options, cons)
        near = _scores(runs, _trouble(best_result, src, dst))
        ranked = np.lexsort((-near, -explained))
        order = [r for r in ranked if not tried[r] and (explained[r] or (kept and near[r]))][:_SUSPECTS]
        best = None
        for r in order:
            tried[r] = True
            first, last = runs[r]
            trial_steps = steps.copy()
            # One slip somewhere in the stretch: its variance shared among the steps.
            trial_steps[first:last + 1] += widen / (last - first + 1)
            trial = decide(trial_steps)
            # Fewest contradictions first; among equals, the decision that
            # keeps more closures explains more of the evidence.
            rank = (_count(trial), -int(trial.accepted.sum()))
            if _better(trial, best_result, options, bool(kept)) and (best is None or rank < best[0]):
                best = (rank, r, trial, trial_steps)
        if best is None:
            break
        _, r, trial, steps = best
        kept.append(UnseenSlip(first_step=int(runs[r, 0]), last_step=int(runs[r, 1]),
                               contradictions_before=before, contradictions_after=_count(trial),
                               accepted_before=int(best_result.accepted.sum()),
                               accepted_after=int(trial.accepted.sum())))
        best_result = trial
    if not kept:
        return result
    ids = chain.ids
    where = "; ".join(f"scans {ids[s.first_step]}-{ids[s.last_step + 1]} (contradicting pairs "
                      f"{s.contradictions_before} -> {s.contradictions_after}, accepted closures "
                      f"{s.accepted_before} -> {s.accepted_after})" for s in kept)
    note = (f"{len(kept)} stretch(es) of odometry that the scans could not check were given the uncertainty of "
            f"a slip of up to {options.unseen_slip_max_m:g} m and {np.degrees(options.unseen_slip_max_rad):.0f} deg: "
            f"the first because the final map contradicted itself and then less so, any further one because it "
            f"let more closures agree without a new contradiction ({where})")
    return replace(best_result, odometry_steps=steps, unseen_slips=tuple(kept),
                   notes=tuple(best_result.notes) + (note,))


def explained_by_unseen_slip(src, dst, delta, covariance, odom_poses, steps, unchecked, options,
                             cons: ConsistencyOptions) -> np.ndarray:
    """Which closures failing the odometry gate one slip at an unchecked stretch would let pass.

    A closure the gate rejects while its odometry chain runs through steps
    that no scan checked is not shown wrong: a slip of up to
    ``unseen_slip_max_m`` / ``unseen_slip_max_rad`` in one of those
    stretches (:func:`slip_covariance`, shared among its steps) is tried,
    one stretch at a time, and a closure that then passes the gate is one
    the checks cannot decide (reason ``unchecked_odometry``).

    Parameters
    ----------
    src, dst : (K,) chain positions of the closures' two keyframes.
    delta : (K, 3) registered ``src^-1 ∘ dst`` [m, m, rad], src frame.
    covariance : (K, 3, 3) their covariances, src frame.
    odom_poses : (N, 3) the odometry keyframe poses the gate used.
    steps : (N - 1, 3, 3) the step covariances the gate used (variance
        factor included).
    unchecked : (U,) step indices the calibration could not check.
    options : VerifyOptions (``unseen_slip_max_m``, ``unseen_slip_max_rad``).
    cons : the gate's ConsistencyOptions.

    Returns
    -------
    (K,) bool.

    Examples
    --------
    A straight drive of 21 keyframes 0.5 m apart, one closure from the
    first to the last whose measured motion is 0.2 m longer than the
    odometry's; with step 7 unchecked a slip explains it, without not:

    >>> import numpy as np
    >>> from closurecheck.verification.consistency import ConsistencyOptions
    >>> from closurecheck.verification.verify import VerifyOptions
    >>> poses = np.column_stack([0.5 * np.arange(21), np.zeros(21), np.zeros(21)])
    >>> steps = np.tile(np.diag([1e-4, 1e-4, 1e-6]), (20, 1, 1))
    >>> delta = np.array([[10.2, 0.0, 0.0]]); cov = np.diag([1e-4, 1e-4, 1e-6])[None]
    >>> args = ([0], [20], delta, cov, poses, steps)
    >>> bool(explained_by_unseen_slip(*args, [7], VerifyOptions(), ConsistencyOptions())[0])
    True
    >>> bool(explained_by_unseen_slip(*args, [], VerifyOptions(), ConsistencyOptions())[0])
    False
    """
    out = np.zeros(len(src), dtype=bool)
    for _, rows in _passing_per_stretch(src, dst, delta, covariance, odom_poses, steps, stretches(unchecked),
                                        options, cons, skip=out):
        out[rows] = True
    return out


def _passing_per_stretch(src, dst, delta, covariance, odom_poses, steps, runs, options, cons, skip=None):
    """For each stretch r of ``runs``: (r, closures that pass the gate with a slip there).

    Only closures whose chain holds the stretch are tried, and none marked
    in ``skip`` (read at each stretch, so a caller may fill it as it goes).
    """
    src = np.asarray(src, dtype=np.intp)
    dst = np.asarray(dst, dtype=np.intp)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    widen = slip_covariance(options.unseen_slip_max_m, options.unseen_slip_max_rad)
    for r, (first, last) in enumerate(runs):
        # The stretch lies inside the chain from lo to hi (steps lo .. hi - 1).
        inside = (lo <= first) & (last < hi)
        if skip is not None:
            inside &= ~skip
        inside = np.flatnonzero(inside)
        if not len(inside):
            yield r, inside
            continue
        trial = np.array(steps, dtype=float)
        trial[first:last + 1] += widen / (last - first + 1)
        gate = odometry_gate(src[inside], dst[inside], delta[inside], covariance[inside], odom_poses,
                             se2.chain_prefix(odom_poses, trial), cons)
        yield r, inside[gate.passed]
