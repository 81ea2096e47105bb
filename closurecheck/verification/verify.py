"""Verification: decide which registered candidates are loop closures.

The checks run from cheap and local to global, and every rejection records
the check that decided it (reason codes in :mod:`closurecheck.verification.verdicts`):

1. registration quality, per candidate: a result exists and converged,
   enough overlap, small residual, no near-tie between distinct
   alignments (look-alike places), observable geometry;
2. the odometry gate, per candidate, where the odometry chain between the
   two nodes is informative: chi-square test of the registered delta
   against the odometry prediction;
3. pairwise consistency (PCM): the largest set of candidates whose every
   pair closes a cycle through the odometry within a chi-square bound
   (maximum clique), unless the odometry does not support it as a whole
   and a smaller consistent set it supports exists (``unsupported_group``);
4. the graph: optimise odometry + surviving closures with graduated
   non-convexity on the closures, drop what GNC down-weights, then the
   chi-square test of each closure's residual after optimisation, removing
   the worst failing closure and re-optimising until all pass;
5. the scans of the final map must not contradict each other (free-space
   check, ``scan_contradiction``); where they still do, a slip is looked
   for at odometry steps the calibration could not check, and a gate
   rejection that such a slip would undo becomes ``unchecked_odometry``
   (:mod:`closurecheck.verification.slips`).

A reviewer's decisions (:class:`ReviewerVerdicts`) overrule the checks for
the pairs they name: a rejected pair is taken out before the odometry gate
and never reaches a later check; an accepted pair skips the checks (it is
neither tested by PCM nor a witness in it) and enters every optimisation
from the strict pass on as a plain, non-robust edge that GNC cannot
down-weight and the residual test cannot remove, so the map gate and the
final graph are built with it.

Inputs are arrays: closures join nodes of the keyframe chain (indices into
``odom_poses``); deltas ``src^-1 ∘ dst`` in the src frame (m, m, rad) with
covariances on [x, y, theta] in the src frame.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse

from ..core import se2
from ..core.kernels import KERNEL_CHOICES, kernel_from_name
from ..core.odometry import OdometryChain, odometry_travel
from ..core.options import options, setting
from ..core.stats import chi2_median, chi2_threshold
from ..graph.solver import (
    GncOptions,
    SolverOptions,
    optimize_gnc,
    prune_inconsistent_edges,
)
from ..registration.batch import RegisteredClosures
from .clique import CliqueOptions, max_clique_of_conflicts
from .consistency import ConsistencyOptions, odometry_gate, pairwise_consistency
from .rivals import NO_RIVALS, RivalCheck, rival_groups
from .drift import (
    NO_DRIFT,
    DriftOptions,
    HeadingDrift,
    estimate_heading_drift,
    heading_drift_consensus,
    remove_heading_drift,
)
from .free_space import FreeSpaceCheck, FreeSpaceOptions, KeyframeScans, blame, check_free_space, closure_groups
from .map_gate import map_gate_distance, relative_posterior
from .reasons import Reason, is_accepted
from .slips import explained_by_unseen_slip, search_unseen_slips
from .trust import PLAUSIBLE_ODOMETRY_FACTOR


@options
class VerifyOptions:
    """Thresholds of the verification stage (units in the names).

    min_overlap : fraction of the source scan's points that must find a
        partner in the target after registration.
    max_rmse_m : RMS point-to-line residual allowed after registration.
    max_ambiguity : largest allowed ratio of the second-best distinct
        alignment's fit score to the best one's; above it a look-alike
        alignment fits about as well and the pair is rejected.
    reject_degenerate : reject pairs whose geometry leaves a direction
        unobservable (their covariance is honest but the match along the
        weak direction is a guess).
    gate_probability : chi-square probability of the odometry gate.
    gate_max_chain_std_m, gate_max_chain_std_rad : the odometry gate is
        applied only where the chain's standard deviation is below these.
    pair_probability : chi-square probability of the PCM pair test.
    pair_window_m : None tests every pair of closures (exact PCM, time
        quadratic in their number).  A length in metres tests only the pairs
        whose cycle runs through at most that much odometry path on each
        side (earlier end to earlier end, later end to later end); longer
        cycles count as consistent (``ConsistencyOptions.pair_window_m``).
        The tested pairs then grow about linearly with the closures, but
        the consistent set can differ from the exact one where long cycles
        fail (odometry drift beyond its model): docs/performance.md has the
        measured differences (on a simulated 20,000-scan log, 150 m accepted
        192 wrong closures, 300 m changed 97 verdicts, 600 m 14).
    max_exact_closures : with ``pair_window_m`` None, a run with more
        candidates than this is refused before registration (exit status
        2): the exact test is quadratic in time and in the memory of the
        failing pairs, a fixed share of all pairs on drifted logs.  At
        20,000 scans (13,334 candidates) it took 4.9 s and the whole
        verification 645 MB; a 100,000-scan route driven round and round
        (74,653 closures, 2.8 billion pairs) ran out of memory storing the
        conflicts (docs/performance.md, "End to end at 5,000 scans, and the
        100,000-scan size").  25,000 closures are 312 million pairs, about
        20 s compiled and up to 1.5 GB of conflicts at the 61% share
        measured on uncalibrated drift.
    clique_max_expansions : search budget of the exact maximum clique; past
        it the best clique found is used and the report says so.  An
        expansion on a conflict component wider than 512 closures counts
        (width / 512)^2 (its work grows with the square of the width).
    rival_margin : the consistent set stands against a rival group (a
        consistent set of closures outside it) only when the closures the
        rival disputes are at least this many times as many as the rival;
        otherwise both sides are rejected (:mod:`closurecheck.verification.rivals`).
        1 (the default) turns the rule off: on a warehouse route it rejected
        400 right closures against a rival family of 290 wrong ones.
    clique_max_odometry_factor : the maximum clique is kept only if the
        odometry supports it as a whole: its members' own variance factor
        (median odometry chi-square over the chi-square(3) median) is at
        most this.  Above it, the next largest disjoint cliques are tried,
        and the first of at least ``min_closures_for_scale`` closures whose
        factor is at most this and at most a quarter of the first's takes
        its place; its members are ``unsupported_group``
        (docs/verification.md, "Odometry support of the consistent set").
        The default is the trust verdict's bound
        (:data:`~closurecheck.verification.trust.PLAUSIBLE_ODOMETRY_FACTOR`).
    min_clique_size : closures are accepted only if the consistent set has
        at least this many members (1 accepts a lone closure that passed
        every other check).
    use_gnc : run graduated non-convexity before the final residual test.
    gnc_min_weight : closures whose GNC weight ends below this are rejected.
    kernel, kernel_scale : robust kernel on closure residuals (Mahalanobis
        distance) during the final optimisation.
    residual_probability : chi-square probability of the final per-edge test.
    min_closures_for_scale, max_odometry_scale : the odometry variance
        factor is estimated from at least this many verified closures and
        capped at this value.
    extend_with_map, map_probability, map_max_std_m, map_rounds : the map
        gate (candidates the odometry could not vouch for, tested against
        the optimised map where its relative-position standard deviation is
        below ``map_max_std_m``), repeated up to ``map_rounds`` times.
    closure_floor_m, closure_floor_rad : standard deviations of an error
        that registration's covariance does not model, added to every
        closure's covariance (see :func:`closure_covariances`).
    check_free_space, contradiction_share, contradiction_min_m,
        contradiction_rounds : after optimisation, compare overlapping
        keyframes of different visits for scans that contradict each other
        (:mod:`closurecheck.verification.free_space`: a pair contradicts
        when more than ``contradiction_share`` of its judged surface, and at
        least ``contradiction_min_m`` metres of it, lies in the other scan's
        free space), and reject the revisit whose closures cause it, up to
        ``contradiction_rounds`` times.
    calibrate_heading_drift, drift_min_significance : estimate the
        odometry's heading drift per metre from the first verified closures
        and, when it is at least this many standard errors from zero, remove
        it from the odometry and run the strict pass again
        (:mod:`closurecheck.verification.drift`).
    unseen_slip_rounds, unseen_slip_max_m, unseen_slip_max_rad : when the
        final map still has contradicting scans, look for a slip at odometry
        steps the calibration could not check (its scans did not register):
        such a stretch, one at a time, gets the uncertainty of a slip of up
        to these sizes (two standard deviations) and the whole decision is
        taken again; the stretch that leaves the fewest contradictions, if
        fewer than before, is kept, up to ``unseen_slip_rounds`` times
        (:mod:`closurecheck.verification.slips`).
    """

    min_overlap: float = setting(0.3, at_least=0.0, at_most=1.0)
    max_rmse_m: float = setting(0.08, above=0.0)
    max_ambiguity: float = setting(0.95, above=0.0, at_most=1.0)
    reject_degenerate: bool = setting(True)
    gate_probability: float = setting(0.999, above=0.0, below=1.0)
    gate_max_chain_std_m: float = setting(1.0, above=0.0)
    gate_max_chain_std_rad: float = setting(0.25, above=0.0)
    pair_probability: float = setting(0.999, above=0.0, below=1.0)
    pair_window_m: float | None = setting(None, above=0.0)
    max_exact_closures: int = setting(25_000, at_least=1)
    clique_max_expansions: int = setting(200_000, at_least=1)
    min_clique_size: int = setting(1, at_least=1)
    rival_margin: float = setting(1.0, at_least=1.0)
    clique_max_odometry_factor: float = setting(PLAUSIBLE_ODOMETRY_FACTOR, at_least=1.0)
    use_gnc: bool = setting(True)
    gnc_min_weight: float = setting(0.5, at_least=0.0, at_most=1.0)
    kernel: str = setting("cauchy", choices=KERNEL_CHOICES)
    kernel_scale: float = setting(3.0, above=0.0)
    residual_probability: float = setting(0.999, above=0.0, below=1.0)
    min_closures_for_scale: int = setting(10, at_least=1)
    max_odometry_scale: float = setting(100.0, at_least=1.0)
    extend_with_map: bool = setting(True)
    map_probability: float = setting(0.999, above=0.0, below=1.0)
    map_max_std_m: float = setting(0.25, above=0.0)
    map_rounds: int = setting(3, at_least=0)
    calibrate_heading_drift: bool = setting(True)
    closure_floor_m: float = setting(0.001, at_least=0.0)
    closure_floor_rad: float = setting(0.000175, at_least=0.0)
    drift_min_significance: float = setting(3.0, at_least=0.0)
    check_free_space: bool = setting(True)
    contradiction_share: float = setting(0.2, above=0.0, below=1.0)
    contradiction_min_m: float = setting(3.0, above=0.0)
    contradiction_rounds: int = setting(5, at_least=0)
    unseen_slip_rounds: int = setting(3, at_least=0)
    unseen_slip_max_m: float = setting(0.3, above=0.0)
    unseen_slip_max_rad: float = setting(0.0873, above=0.0)


@dataclass(frozen=True, eq=False)
class Verification:
    """Outcome of :func:`verify` for K candidates on an N-node chain.

    reason : (K,) str reason codes (:class:`~closurecheck.verification.reasons.Reason`
        values; "accepted" for verified closures).
    accepted : (K,) bool.
    closure_covariance : (K, 3, 3) the covariance each closure was judged
        with: registration's plus the floor of :func:`closure_covariances`.
    figures : name -> (K,) arrays of the numbers behind the verdicts.
    poses : (N, 3) optimised keyframe poses (odometry frame, node 0 fixed).
    odometry_scale : variance factor applied to the odometry step covariances.
    odometry_poses : (N, 3) the odometry keyframe poses the graph was built
        on: the input ones, or with the heading drift removed.
    heading_drift : the estimated heading drift of the odometry.
    clique_exact : whether the maximum clique was proven optimal.
    free_space : the contradiction check of the final map (None when off).
    clique_size : size of the consistent set.
    rivals : the rival groups found against the consistent set, with
        indices into the K candidates.
    notes : human-readable remarks for the report.
    odometry_steps : (N - 1, 3, 3) the step covariances the graph was
        optimised with, before ``odometry_scale``: the chain's, or with the
        unseen slips' stretches widened (:func:`verify` always sets it).
    unseen_slips : the :class:`~closurecheck.verification.slips.UnseenSlip`
        stretches whose widening was kept.
    set_aside : the largest consistent set when it was set aside for lack
        of odometry support (:class:`SetAside`), else None.
    """

    reason: np.ndarray
    accepted: np.ndarray
    closure_covariance: np.ndarray
    figures: dict
    poses: np.ndarray
    clique_exact: bool
    clique_size: int
    odometry_scale: float = 1.0
    odometry_poses: np.ndarray | None = None
    heading_drift: HeadingDrift = NO_DRIFT
    free_space: FreeSpaceCheck | None = None
    rivals: RivalCheck = NO_RIVALS
    notes: tuple = field(default_factory=tuple)
    odometry_steps: np.ndarray | None = None
    unseen_slips: tuple = ()
    set_aside: "SetAside | None" = None


@dataclass(frozen=True, eq=False)
class ReviewerVerdicts:
    """A reviewer's decisions on K candidates (docs/verification.md, "Reviewer decisions").

    accept : (K,) bool, pairs that become closures whatever the checks say
        (each needs a registered delta and covariance).
    reject : (K,) bool, pairs that never enter the graph.  Never both.
    """

    accept: np.ndarray
    reject: np.ndarray


def odometry_edges(odom_poses: np.ndarray, step_covariances: np.ndarray):
    """Odometry edges between consecutive keyframes: (src, dst, delta, information)."""
    n = len(odom_poses)
    src = np.arange(n - 1)
    dst = src + 1
    delta = se2.between(odom_poses[:-1], odom_poses[1:])
    info = np.linalg.inv(step_covariances)
    return src, dst, delta, 0.5 * (info + np.swapaxes(info, -1, -2))


def _loop_information(cov):
    info = np.linalg.inv(cov)
    return 0.5 * (info + np.swapaxes(info, -1, -2))


def _graph_edges(odom_poses, step_covariances, src, dst, delta, covariance, members, fixed=None):
    o_src, o_dst, o_delta, o_info = odometry_edges(odom_poses, step_covariances)
    e_src = np.concatenate([o_src, src[members]])
    e_dst = np.concatenate([o_dst, dst[members]])
    e_delta = np.concatenate([o_delta, delta[members]])
    e_info = np.concatenate([o_info, _loop_information(covariance[members])])
    # A reviewer's accepted closures are plain edges, like odometry: no
    # robust weight, never removed by the residual test.
    closure_robust = np.ones(len(members), bool) if fixed is None else ~np.asarray(fixed, bool)[members]
    robust = np.r_[np.zeros(len(o_src), bool), closure_robust]
    return e_src, e_dst, e_delta, e_info, robust, len(o_src)


def optimise_closures(members, src, dst, delta, covariance, odom_poses, step_covariances,
                       options: VerifyOptions, fixed=None, start=None):
    """GNC then the residual test on odometry + the closures ``members``.

    ``members`` indexes the closure arrays (``src``/``dst`` node indices,
    ``delta`` (K, 3) and ``covariance`` (K, 3, 3) in the src frame);
    ``odom_poses`` (N, 3) and ``step_covariances`` (N-1, 3, 3) give the
    odometry edges.  ``fixed`` (K,) bool, optional: closures a reviewer
    accepted, kept whatever GNC and the residual test say (weight 1).
    ``start`` (N, 3), optional: the poses to start from (default the
    odometry), e.g. an optimum of nearly the same graph, which saves most of
    the iterations; node 0 must be at its odometry pose.
    Returns (kept (len(members),) bool, poses (N, 3) in the odometry frame
    with node 0 fixed, gnc weights, residuals (len(members),) squared
    Mahalanobis at the final poses, NaN if dropped by GNC).
    """
    n_m = len(members)
    gnc_w = np.full(n_m, np.nan)
    res = np.full(n_m, np.nan)
    if n_m == 0:
        return np.zeros(0, bool), np.array(odom_poses, dtype=float), gnc_w, res
    e_src, e_dst, e_delta, e_info, robust, n_o = _graph_edges(odom_poses, step_covariances, src, dst, delta,
                                                              covariance, members, fixed)
    start = np.array(odom_poses if start is None else start, dtype=float)
    keep = np.ones(n_m, dtype=bool)
    if options.use_gnc and robust[n_o:].any():
        gnc = optimize_gnc(start, e_src, e_dst, e_delta, e_info, robust,
                           GncOptions(inlier_probability=options.residual_probability), check=False)
        gnc_w = np.where(robust[n_o:], np.array(gnc.weights[n_o:]), 1.0)
        keep = gnc_w >= options.gnc_min_weight
        start = np.array(gnc.poses)
    sel = np.r_[np.ones(n_o, bool), keep]
    kernel = kernel_from_name(options.kernel, options.kernel_scale)
    pr = prune_inconsistent_edges(start, e_src[sel], e_dst[sel], e_delta[sel], e_info[sel], robust[sel], kernel,
                                  probability=options.residual_probability, options=SolverOptions(), check=False)
    kept = keep.copy()
    kept[np.flatnonzero(keep)] = pr.kept[n_o:]
    res[np.flatnonzero(keep)] = pr.solution.residuals_sq[n_o:]
    return kept, np.array(pr.solution.poses), gnc_w, res


def closure_covariances(covariance, options: VerifyOptions = VerifyOptions()) -> np.ndarray:
    """Registration covariances (K, 3, 3) with the unmodelled-error floor added.

    Censi's covariance accounts for range noise.  Two scans of a revisit
    also sample the same walls at different points and see different
    clutter, which moves the alignment by a millimetre or so in a way the
    formula does not see; on the simulated scenarios the accepted closures'
    NEES was 5-7 without a floor (ideal 3) and 2-5 with 1 mm and 0.01 deg.
    Adding a small diagonal floor (common practice; the values are tuned on
    our simulated scenarios, not on a published table) keeps the loop
    edges from claiming more than registration can deliver.  Frame and
    units as the input: [x, y, theta] in the src frame, m^2 and rad^2.
    """
    floor = np.diag([options.closure_floor_m ** 2, options.closure_floor_m ** 2, options.closure_floor_rad ** 2])
    return np.asarray(covariance, dtype=float) + floor


def variance_factor(chi2_values, min_count: int) -> float:
    """Median of the finite ``chi2_values`` over the chi-square(3) median; NaN from fewer than ``min_count``.

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.verification.verify import variance_factor
    >>> round(variance_factor(np.full(10, 2.366), 10), 3), variance_factor(np.ones(3), 10)
    (1.0, nan)
    """
    x = np.asarray(chi2_values, dtype=float)
    x = x[np.isfinite(x)]
    if len(x) < min_count:
        return float("nan")
    return float(np.median(x) / chi2_median())


def odometry_scale(chi2_values, options: VerifyOptions) -> float:
    """A posteriori variance factor of the odometry model, from verified closures.

    The squared Mahalanobis distances of verified closures from the
    odometry prediction follow chi-square(3) when the odometry model is
    honest; their median over the chi-square(3) median estimates by how much
    the model's covariance is too small (robust form of the variance-factor
    estimate of least-squares adjustment).  Never below 1 (the model is
    trusted when it is not contradicted), at most ``max_odometry_scale``.
    """
    factor = variance_factor(chi2_values, options.min_closures_for_scale)
    if not np.isfinite(factor):
        return 1.0
    return float(np.clip(factor, 1.0, options.max_odometry_scale))


# The clique that replaces an unsupported maximum clique must be clearly
# better supported, not merely under the bound: on the warehouse route with
# the step covariances multiplied by 0.1 the (right) maximum clique sat at
# factor 5.7 and a smaller one under 4 would have replaced it.  A quarter
# is a rule of our own (docs/performance.md, the warehouse family).
_SUPPORT_RATIO = 4.0
# Disjoint cliques tried after the maximum one (each a maximum-clique
# search on what is left).
_SUPPORT_TRIES = 5


@dataclass(frozen=True)
class SetAside:
    """A maximum clique set aside for lack of odometry support, and the clique kept instead.

    size, factor: the set-aside clique's closures and variance factor.
    kept_size, kept_factor: the same for the clique that replaced it.
    """

    size: int
    factor: float
    kept_size: int
    kept_factor: float


def _supported_clique(conflicts, first, chi2, options: VerifyOptions):
    """The maximum clique ``first`` of ``conflicts``, or a smaller disjoint clique the odometry supports better.

    ``chi2`` (K,) are the odometry chi-square values of the K closures of
    ``conflicts`` (sparse (K, K) bool).  Returns (clique result with members
    as indices into the K, the set-aside members or None, SetAside or None).
    """
    bound = options.clique_max_odometry_factor
    f0 = variance_factor(chi2[first.members], options.min_closures_for_scale)
    if not np.isfinite(f0) or f0 <= bound:
        return first, None, None
    c = scipy.sparse.csr_array(conflicts, dtype=bool)
    left = np.setdiff1d(np.arange(c.shape[0]), first.members)
    clique_options = CliqueOptions(max_expansions=options.clique_max_expansions)
    for _ in range(_SUPPORT_TRIES):
        if len(left) < options.min_closures_for_scale:
            break
        cl = max_clique_of_conflicts(c[left][:, left], options=clique_options)
        members = left[cl.members]
        if len(members) < options.min_closures_for_scale:
            break
        f = variance_factor(chi2[members], options.min_closures_for_scale)
        if f <= bound and f0 >= _SUPPORT_RATIO * f:
            return (dataclasses.replace(cl, members=members), first.members,
                    SetAside(size=first.size, factor=f0, kept_size=len(members), kept_factor=f))
        left = np.setdiff1d(left, members)
    return first, None, None


def _consistency_pass(alive0, src, dst, delta, covariance, odom_poses, step_covariances, options, cons, figures,
                      fixed):
    """Odometry gate and PCM over the candidates ``alive0``; returns (reason updates, clique result, rivals).

    ``fixed`` candidates (a reviewer's acceptances) get the gate's figures
    but are neither rejected by it nor part of PCM.  Rival groups are
    reported with indices into all K candidates.
    """
    k = len(src)
    reason = np.full(k, "", dtype=object)
    prefix = se2.chain_prefix(odom_poses, step_covariances)
    alive = np.flatnonzero(alive0)
    if len(alive):
        gate = odometry_gate(src[alive], dst[alive], delta[alive], covariance[alive], odom_poses, prefix, cons)
        figures["odometry_chi2"][alive] = gate.distance_sq
        figures["odometry_informative"][alive] = gate.informative
        reason[alive[gate.informative & ~gate.passed & ~fixed[alive]]] = Reason.ODOMETRY_GATE
    alive = np.flatnonzero(alive0 & (reason == "") & ~fixed)
    clique = None
    rivals = NO_RIVALS
    set_aside = None
    if len(alive):
        pc = pairwise_consistency(src[alive], dst[alive], delta[alive], covariance[alive], odom_poses, prefix, cons)
        figures["pair_support"][alive] = pc.support
        clique = max_clique_of_conflicts(pc.conflicts,
                                         options=CliqueOptions(max_expansions=options.clique_max_expansions))
        clique, aside, set_aside = _supported_clique(pc.conflicts, clique, figures["odometry_chi2"][alive], options)
        out = np.ones(len(alive), dtype=bool)
        out[clique.members] = False
        if clique.size < options.min_clique_size:
            out[:] = True
        reason[alive[out]] = Reason.PAIR_INCONSISTENT
        # Candidates outside the clique stay open to the map gate, the
        # set-aside ones too: a map pinned by the kept clique is tight where
        # a look-alike shift would show.
        pool = np.arange(len(alive))
        if aside is not None:
            reason[alive[aside]] = Reason.UNSUPPORTED_GROUP
            pool = np.setdiff1d(pool, aside)
        if options.rival_margin > 1.0 and not out.all():
            # The set-aside group is no rival: it lost on odometry support.
            conflicts = scipy.sparse.csr_array(pc.conflicts, dtype=bool)[pool][:, pool]
            rivals = rival_groups(conflicts, np.searchsorted(pool, clique.members), options.rival_margin,
                                  clique_options=CliqueOptions(max_expansions=options.clique_max_expansions))
            rivals = rivals.relabelled(alive[pool])
            reason[rivals.rejected] = Reason.RIVAL_GROUP
    return reason, clique, rivals, set_aside


def _strict_pass(plausible, src, dst, delta, covariance, odom_poses, step_covariances, options, cons, figures,
                 fixed):
    """Odometry gate, PCM and the graph test with the odometry model as given.

    Returns (per-candidate verdict of this pass, clique result, indices of the
    verified core, which includes every ``fixed`` candidate, rival groups,
    the set-aside clique or None, the optimised poses of the pass).
    """
    upd, clique, rivals, set_aside = _consistency_pass(plausible, src, dst, delta, covariance, odom_poses,
                                                       step_covariances, options, cons, figures, fixed)
    first_pass = np.where(upd == "", Reason.ACCEPTED, upd)
    alive = np.flatnonzero(plausible & (first_pass == Reason.ACCEPTED))
    kept, poses, _, _ = optimise_closures(alive, src, dst, delta, covariance, odom_poses, step_covariances, options,
                                          fixed)
    first_pass[alive[~kept]] = Reason.GRAPH_RESIDUAL
    return first_pass, clique, alive[kept], rivals, set_aside, poses


@dataclass(frozen=True, eq=False)
class _Stage:
    first_pass: np.ndarray
    clique: object
    rivals: RivalCheck
    scale: float
    members: np.ndarray
    figures: dict
    notes: tuple
    poses: np.ndarray
    set_aside: SetAside | None = None


def _consistency_options(options: VerifyOptions) -> ConsistencyOptions:
    return ConsistencyOptions(gate_probability=options.gate_probability,
                              pair_probability=options.pair_probability,
                              pair_window_m=options.pair_window_m,
                              informative_max_std_m=options.gate_max_chain_std_m,
                              informative_max_std_rad=options.gate_max_chain_std_rad)


def _core_and_map(plausible, src, dst, delta, covariance, step_covariances, options, fixed, odom_poses) -> _Stage:
    """Strict pass, odometry variance factor and map gate on one odometry."""
    k = len(src)
    notes = []
    figures = {name: np.full(k, np.nan) for name in
               ("odometry_chi2", "pair_support", "map_chi2", "map_std_m", "gnc_weight", "graph_chi2")}
    figures["odometry_informative"] = np.zeros(k, dtype=bool)
    cons = _consistency_options(options)

    # Pass 1, strict: the odometry model as given decides the core set.
    first_pass, clique, core, rivals, set_aside, poses = _strict_pass(plausible, src, dst, delta, covariance,
                                                                      odom_poses, step_covariances, options, cons,
                                                                      figures, fixed)
    if set_aside is not None:
        notes.append(f"the largest consistent set ({set_aside.size} closures) was set aside: the odometry does not "
                     f"support it (variance factor {set_aside.factor:.1f}, at most "
                     f"{options.clique_max_odometry_factor:g} is plausible); a set of {set_aside.kept_size} "
                     f"closures at factor {set_aside.kept_factor:.2f} was kept instead; the set-aside ones are "
                     f"unsupported_group unless the map gate takes them back")

    # The verified core measures how honest the odometry model is.
    scale = odometry_scale(figures["odometry_chi2"][core], options)
    scaled = step_covariances * scale
    if scale > 1.0:
        notes.append(f"odometry covariance scaled by {scale:.2f} (a posteriori variance factor from "
                     f"{len(core)} verified closures)")

    members = core
    # A set-aside clique can hold right closures that agree with both
    # families (with the warehouse route's step covariances x2, 161 of the
    # 419 right ones sat in the set-aside clique of 560); the map pinned by
    # the kept clique sorts them out.
    retry = np.flatnonzero(plausible & ((first_pass == Reason.ODOMETRY_GATE)
                                        | (first_pass == Reason.PAIR_INCONSISTENT)
                                        | (first_pass == Reason.UNSUPPORTED_GROUP)))
    rounds = options.map_rounds if options.extend_with_map else 0
    if rounds and scale >= options.max_odometry_scale and len(retry):
        # A factor at its bound says the odometry model is wrong by more than
        # the bound allows, not by how much: a map built on it cannot vouch
        # for a candidate the strict pass rejected.
        rounds = 0
        notes.append(f"the odometry variance factor sits at its bound ({options.max_odometry_scale:g}); no "
                     f"candidate was accepted against a map built with it (map gate skipped)")
    for _ in range(rounds):
        # Candidates the odometry could not vouch for, gated against the map
        # that the closures verified so far pin down.  Only where the map is
        # tight: where it is loose, a look-alike offset would pass unseen.
        if not len(members) or not len(retry):
            break
        # Started from the latest optimum (the strict pass's, then the previous round's): the graph
        # differs by the odometry's scale and the closures joined since, and from the odometry this
        # call took 12-13 iterations on the 20,000-scan log.
        kept2, poses, _, _ = optimise_closures(members, src, dst, delta, covariance, odom_poses, scaled,
                                               dataclasses.replace(options, use_gnc=False), fixed, start=poses)
        members = members[kept2]
        e_src, e_dst, e_delta, e_info, _, _ = _graph_edges(odom_poses, scaled, src, dst, delta, covariance,
                                                           members, fixed)
        rel, rel_cov = relative_posterior(poses, e_src, e_dst, e_delta, e_info, src[retry], dst[retry])
        d2 = map_gate_distance(rel, rel_cov, delta[retry], covariance[retry])
        std = np.sqrt(np.linalg.eigvalsh(rel_cov[:, :2, :2])[:, -1])
        figures["map_chi2"][retry] = d2
        figures["map_std_m"][retry] = std
        ok = (d2 <= chi2_threshold(options.map_probability)) & (std <= options.map_max_std_m)
        if not ok.any():
            break
        members = np.union1d(members, retry[ok])
        retry = retry[~ok]
    joined = len(np.setdiff1d(members, core))
    if joined:
        notes.append(f"{joined} closure(s) verified against the map of the first {len(core)} (map gate)")
    return _Stage(first_pass=first_pass, clique=clique, rivals=rivals, scale=scale, members=members,
                  set_aside=set_aside, poses=poses,
                  figures=figures, notes=tuple(notes))


def _free_space_options(options: VerifyOptions) -> FreeSpaceOptions:
    return FreeSpaceOptions(max_share=options.contradiction_share, min_length_m=options.contradiction_min_m)


# Chain positions within which a closure's end counts as near a
# contradicting keyframe, and in which closures form one revisit event:
# 20 keyframes are about 10 m of route at the default spacing.
_EVENT_WINDOW = 20
# Revisit events tried for removal per round, most implicated first.
_SUSPECTS = 6


def _resolve_contradictions(reason, poses, src, dst, delta, covariance, odom_poses, scaled, scans, options, fixed):
    """Free-space check of the final map; reject the revisit events whose removal resolves contradictions.

    Each round tries removing each of the few revisit events (groups of
    accepted closures) most implicated in the contradicting pairs,
    re-optimises without it and checks again; the one that removes the
    most contradictions, if any, is rejected.  Returns (reason, poses,
    final check, closures rejected).  A reviewer's acceptances (``fixed``)
    are never tried for removal and stay in every re-optimisation.
    """
    fs_opts = _free_space_options(options)
    travel = odometry_travel(odom_poses)[0]
    check = check_free_space(poses, travel, scans, fs_opts)
    reason = reason.copy()
    dropped = 0
    quick = dataclasses.replace(options, use_gnc=False)
    for _ in range(options.contradiction_rounds):
        if not check.count:
            break
        acc = np.flatnonzero(reason == Reason.ACCEPTED)
        if not len(acc):
            break
        groups = closure_groups(src[acc], dst[acc], _EVENT_WINDOW)
        score = blame(check, src[acc], dst[acc], groups, _EVENT_WINDOW)
        suspects = [g for g in np.argsort(-score, kind="stable")[:_SUSPECTS] if score[g] > 0]
        best = None
        for g in suspects:
            keep = np.union1d(acc[groups != g], np.flatnonzero(fixed))
            # From the odometry, not from the final map: the trial asks what the map is without the
            # group, and a start the group has bent could keep it bent.
            kept, trial, _, _ = optimise_closures(keep, src, dst, delta, covariance, odom_poses, scaled, quick, fixed)
            after = check_free_space(trial, travel, scans, fs_opts)
            if after.count < check.count and (best is None or after.count < best[2].count):
                best = (g, trial, after, keep[~kept])
        if best is None:
            break
        g, poses, check, pruned = best
        out = acc[groups == g]
        reason[out] = Reason.SCAN_CONTRADICTION
        reason[pruned] = Reason.GRAPH_RESIDUAL
        dropped += len(out)
    return reason, poses, check, dropped


def verify(closures: RegisteredClosures, chain: OdometryChain, options: VerifyOptions = VerifyOptions(),
           review: ReviewerVerdicts | None = None, scans: KeyframeScans | None = None,
           unchecked_steps=None) -> Verification:
    """Decide which registered candidates are loop closures, and optimise the graph.

    Parameters
    ----------
    closures : the registration stage's hand-over (scan ids that are
        keyframes of ``chain``; deltas and covariances in the src frame).
    chain : the keyframes' odometry with the log's noise model.
    options : thresholds of the checks.
    review : a reviewer's decisions on these candidates (module docstring);
        their reasons become ``reviewer_accepted`` / ``reviewer_rejected``.
        Every accepted one needs a finite delta and covariance.
    scans : the keyframes' scans (in chain order) for the free-space check
        of the final map; None skips it.
    unchecked_steps : (U,) indices of the chain's steps (keyframe k to
        k + 1) that the scans could not check
        (:attr:`~closurecheck.calibration.odometry.OdometryCalibration.unchecked`);
        where the final map's scans contradict each other, a slip is looked
        for there (:mod:`closurecheck.verification.slips`).  None or empty:
        no search.

    Returns
    -------
    Verification : a verdict and a :class:`~closurecheck.verification.reasons.Reason`
    per candidate, the optimised keyframe poses (odometry frame, node 0 fixed)
    and the figures behind each decision.
    """
    result = _decide(closures, chain, options, review, scans)
    unchecked = np.zeros(0, np.intp) if unchecked_steps is None else np.asarray(unchecked_steps, dtype=np.intp)
    if not len(unchecked):
        return result
    src, dst = chain.index_of(closures.src), chain.index_of(closures.dst)
    if scans is not None and options.unseen_slip_rounds:
        def decide(steps):
            return _decide(closures, OdometryChain.from_steps(chain.ids, chain.poses, steps), options, review,
                           scans)

        result = search_unseen_slips(result, decide, chain, unchecked, options, _consistency_options(options), src,
                                     dst, closures.delta)
    # A gate rejection that one slip at an unchecked stretch would undo is
    # a decision the checks cannot take (issue 12: a short candidates list
    # must never be rejected as inconsistent with odometry nobody checked).
    gated = np.flatnonzero(result.reason == str(Reason.ODOMETRY_GATE))
    if not len(gated):
        return result
    explained = explained_by_unseen_slip(src[gated], dst[gated], closures.delta[gated],
                                         result.closure_covariance[gated], result.odometry_poses,
                                         result.odometry_steps * result.odometry_scale, unchecked, options,
                                         _consistency_options(options))
    if not explained.any():
        return result
    mask = np.zeros(len(result.reason), dtype=bool)
    mask[gated[explained]] = True
    return dataclasses.replace(result, reason=np.where(mask, str(Reason.UNCHECKED_ODOMETRY), result.reason))


def _decide(closures: RegisteredClosures, chain: OdometryChain, options: VerifyOptions,
            review: ReviewerVerdicts | None, scans: KeyframeScans | None) -> Verification:
    """:func:`verify` on one odometry model: every check once, no slip search."""
    src = chain.index_of(closures.src).astype(np.intp)
    dst = chain.index_of(closures.dst).astype(np.intp)
    delta = closures.delta
    covariance = closure_covariances(closures.covariance, options)
    odom_poses, step_covariances = chain.poses, chain.steps
    quality = closures.quality
    k = len(src)
    n = len(odom_poses)
    reason = np.full(k, Reason.ACCEPTED, dtype=object)
    notes: list[str] = []

    def reject(mask, code: Reason):
        mask = mask & (reason == Reason.ACCEPTED)
        reason[mask] = code

    reject(~quality.valid, Reason.NO_POINTS)
    reject(~quality.converged, Reason.NOT_CONVERGED)
    reject(quality.overlap < options.min_overlap, Reason.LOW_OVERLAP)
    reject(quality.rmse_m > options.max_rmse_m, Reason.HIGH_RMSE)
    reject(np.isfinite(quality.ambiguity) & (quality.ambiguity > options.max_ambiguity), Reason.AMBIGUOUS)
    if options.reject_degenerate:
        reject(quality.degenerate, Reason.DEGENERATE)
    reject(src == dst, Reason.DUPLICATE)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    _, first = np.unique(lo * (n + 1) + hi, return_index=True)
    dup = np.ones(k, dtype=bool)
    dup[first] = False
    reject(dup, Reason.DUPLICATE)
    fixed = np.zeros(k, dtype=bool)
    if review is not None:
        fixed = np.asarray(review.accept, dtype=bool)
        reason[fixed] = Reason.ACCEPTED
        reason[np.asarray(review.reject, dtype=bool)] = Reason.REVIEWER_REJECTED
    plausible = reason == Reason.ACCEPTED

    args = (plausible, src, dst, delta, covariance, step_covariances, options, fixed)
    drift_options = DriftOptions(min_significance=options.drift_min_significance)
    odom_in = np.asarray(odom_poses, dtype=float)
    guess = 0.0
    if options.calibrate_heading_drift:
        # A drift of several degrees per 100 m would leave the strict pass
        # nothing to measure it from; the candidates' headings give a first
        # guess to start from.
        p = np.flatnonzero(plausible)
        guess = heading_drift_consensus(odom_in, step_covariances, src[p], dst[p], delta[p], covariance[p],
                                        drift_options)
    odom_poses = remove_heading_drift(odom_in, guess) if guess else odom_in
    stage = _core_and_map(*args, odom_poses)
    drift = NO_DRIFT
    if options.calibrate_heading_drift:
        # The verified closures measure the drift of the input odometry; a
        # systematic drift bends long stretches beyond what the noise model
        # allows, so the whole decision is taken again on the odometry as it
        # should have been (or as it was, when the first guess is not borne
        # out).
        m = stage.members
        drift = estimate_heading_drift(odom_in, step_covariances, src[m], dst[m], delta[m], covariance[m],
                                       drift_options)
        rate = drift.rate_rad_per_m if drift.applied else 0.0
        tolerance = 2.0 * drift.std_rad_per_m if np.isfinite(drift.std_rad_per_m) else 0.0
        if abs(rate - guess) > tolerance:
            odom_poses = remove_heading_drift(odom_in, rate) if rate else odom_in
            stage = _core_and_map(*args, odom_poses)
            removed = rate
        else:
            # The guess is within two standard errors of the measurement: the
            # decision already taken on it stands (a second pass costs as
            # much as the first, and a residual drift this small is what the
            # odometry variance factor absorbs).
            removed = guess
        drift = dataclasses.replace(drift, removed_rad_per_m=float(removed))
    if drift.removed_rad_per_m:
        measured = (f"measured {np.degrees(drift.rate_rad_per_m) * 100:.3f} "
                    f"+/- {np.degrees(drift.std_rad_per_m) * 100:.3f} by {drift.closures} verified closures")
        notes.append(f"odometry heading drift of {np.degrees(drift.removed_rad_per_m) * 100:.3f} deg per 100 m "
                     f"removed ({measured})")
    notes.extend(stage.notes)
    figures, members, scale, first_pass, clique = (stage.figures, stage.members, stage.scale, stage.first_pass,
                                                   stage.clique)
    scaled = step_covariances * scale

    # From the stage's last optimum: the same odometry, nearly the same closures.
    kept, poses, gnc_w, res = optimise_closures(members, src, dst, delta, covariance, odom_poses, scaled,
                                                 options, fixed, start=stage.poses)
    figures["gnc_weight"][members] = gnc_w
    figures["graph_chi2"][members] = res
    final = np.full(k, "", dtype=object)
    final[members[kept]] = Reason.ACCEPTED
    final[members[~kept]] = Reason.GRAPH_RESIDUAL
    reason = np.where(reason != Reason.ACCEPTED, reason,
                      np.where(final != "", final,
                               np.where(first_pass == Reason.ACCEPTED, Reason.GRAPH_RESIDUAL, first_pass)))
    reason[fixed] = Reason.REVIEWER_ACCEPTED
    removed = int((reason == Reason.GRAPH_RESIDUAL).sum())
    if removed:
        notes.append(f"{removed} closure(s) failed the residual test after optimisation")
    free = None
    if scans is not None and options.check_free_space:
        reason, poses, free, dropped = _resolve_contradictions(reason, poses, src, dst, delta, covariance, odom_poses,
                                                               scaled, scans, options, fixed)
        if dropped:
            notes.append(f"{dropped} closure(s) rejected because the scans of the map they made contradict each "
                         f"other (free-space check)")
        if free.count:
            notes.append(f"the scans of {free.count} of {len(free.a)} overlapping keyframe pairs from different "
                         f"visits still contradict each other")
    lost = stage.rivals.lost
    if lost:
        sizes = ", ".join(f"{len(d.disputed)} against {len(d.rival)}" for d in lost[:5])
        notes.append(f"{int((reason == Reason.RIVAL_GROUP).sum())} closure(s) rejected on both sides of {len(lost)} "
                     f"contest(s) between consistent groups that the evidence could not separate ({sizes}"
                     f"{', ...' if len(lost) > 5 else ''}; the larger side must be {options.rival_margin:g} times "
                     f"the other)")
    if stage.rivals.exhausted:
        notes.append("the search for rival groups stopped after its round limit; smaller rivals were not examined")
    clique_exact = True if clique is None else clique.exact
    if clique is not None and not clique.exact:
        notes.append(f"the maximum-clique search hit its budget of {options.clique_max_expansions} expansions; "
                     f"the consistent set of {clique.size} closures is the best found, at most "
                     f"{clique.upper_bound} is possible")
    elif clique is not None and not clique.canonical:
        notes.append(f"the consistent set of {clique.size} closures is a proven maximum, but other sets of that size "
                     "may exist and the tie rule (smallest indices) was not applied to completion")
    reason = np.array([str(r) for r in reason], dtype=str)
    accepted = np.array([is_accepted(r) for r in reason], dtype=bool)
    return Verification(reason=reason, accepted=accepted,
                        closure_covariance=covariance, figures=figures, poses=poses,
                        clique_exact=clique_exact, clique_size=0 if clique is None else clique.size,
                        set_aside=stage.set_aside,
                        odometry_scale=scale, odometry_poses=np.array(odom_poses, dtype=float),
                        heading_drift=drift, free_space=free, rivals=stage.rivals, notes=tuple(notes),
                        odometry_steps=step_covariances)
