"""Verification: decide which registered candidates are loop closures.

The checks run from cheap and local to global, and every rejection records
the check that decided it (reason codes in :mod:`closurecheck.verdicts`):

1. registration quality, per candidate: a result exists and converged,
   enough overlap, small residual, no near-tie between distinct
   alignments (look-alike places), observable geometry;
2. the odometry gate, per candidate, where the odometry chain between the
   two nodes is informative: chi-square test of the registered delta
   against the odometry prediction;
3. pairwise consistency (PCM): the largest set of candidates whose every
   pair closes a cycle through the odometry within a chi-square bound
   (maximum clique);
4. the graph: optimise odometry + surviving closures with graduated
   non-convexity on the closures, drop what GNC down-weights, then the
   chi-square test of each closure's residual after optimisation, removing
   the worst failing closure and re-optimising until all pass.

Inputs are arrays: closures join nodes of the keyframe chain (indices into
``odom_poses``); deltas ``src^-1 ∘ dst`` in the src frame (m, m, rad) with
covariances on [x, y, theta] in the src frame.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import se2
from .clique import CliqueOptions, max_clique
from .consistency import ConsistencyOptions, odometry_gate, pairwise_consistency
from .kernels import kernel_from_name
from .optimize import GncOptions, SolverOptions, optimize_gnc, prune_inconsistent_edges


@dataclass(frozen=True)
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
    clique_max_expansions : search budget of the exact maximum clique; past
        it the best clique found is used and the report says so.
    min_clique_size : closures are accepted only if the consistent set has
        at least this many members (1 accepts a lone closure that passed
        every other check).
    use_gnc : run graduated non-convexity before the final residual test.
    gnc_min_weight : closures whose GNC weight ends below this are rejected.
    kernel, kernel_scale : robust kernel on closure residuals (Mahalanobis
        distance) during the final optimisation.
    residual_probability : chi-square probability of the final per-edge test.
    """

    min_overlap: float = 0.6
    max_rmse_m: float = 0.08
    max_ambiguity: float = 0.95
    reject_degenerate: bool = True
    gate_probability: float = 0.999
    gate_max_chain_std_m: float = 1.0
    gate_max_chain_std_rad: float = 0.25
    pair_probability: float = 0.999
    clique_max_expansions: int = 200_000
    min_clique_size: int = 1
    use_gnc: bool = True
    gnc_min_weight: float = 0.5
    kernel: str = "cauchy"
    kernel_scale: float = 3.0
    residual_probability: float = 0.999


@dataclass(frozen=True, eq=False)
class Verification:
    """Outcome of :func:`verify` for K candidates on an N-node chain.

    reason : (K,) str reason codes ("accepted" for verified closures).
    accepted : (K,) bool.
    figures : name -> (K,) arrays of the numbers behind the verdicts.
    poses : (N, 3) optimised keyframe poses (odometry frame, node 0 fixed).
    clique_exact : whether the maximum clique was proven optimal.
    clique_size : size of the consistent set.
    notes : human-readable remarks for the report.
    """

    reason: np.ndarray
    accepted: np.ndarray
    figures: dict
    poses: np.ndarray
    clique_exact: bool
    clique_size: int
    notes: tuple = field(default_factory=tuple)


def odometry_edges(odom_poses: np.ndarray, step_covariances: np.ndarray):
    """Odometry edges between consecutive keyframes: (src, dst, delta, information)."""
    n = len(odom_poses)
    src = np.arange(n - 1)
    dst = src + 1
    delta = se2.between(odom_poses[:-1], odom_poses[1:])
    info = np.linalg.inv(step_covariances)
    return src, dst, delta, 0.5 * (info + np.swapaxes(info, -1, -2))


def verify(src, dst, delta, covariance, quality: dict, odom_poses, step_covariances,
           options: VerifyOptions = VerifyOptions()) -> Verification:
    """Run the checks of the module docstring and optimise the graph.

    ``quality`` holds (K,) arrays from registration: ``valid`` (a result
    exists), ``converged``, ``overlap``, ``rmse_m``, ``ambiguity`` (NaN when
    no coarse search ran), ``degenerate``.
    """
    src = np.asarray(src, dtype=np.intp)
    dst = np.asarray(dst, dtype=np.intp)
    k = len(src)
    n = len(odom_poses)
    reason = np.full(k, "accepted", dtype=object)
    figures: dict[str, np.ndarray] = {}
    notes: list[str] = []

    def reject(mask, code):
        mask = mask & (reason == "accepted")
        reason[mask] = code

    valid = np.asarray(quality["valid"], dtype=bool)
    reject(~valid, "no_points")
    reject(~np.asarray(quality["converged"], dtype=bool), "not_converged")
    reject(np.asarray(quality["overlap"], float) < options.min_overlap, "low_overlap")
    reject(np.asarray(quality["rmse_m"], float) > options.max_rmse_m, "high_rmse")
    amb = np.asarray(quality["ambiguity"], float)
    reject(np.isfinite(amb) & (amb > options.max_ambiguity), "ambiguous")
    if options.reject_degenerate:
        reject(np.asarray(quality["degenerate"], dtype=bool), "degenerate")

    # Self-pairs and exact duplicates (same unordered pair) keep the first.
    same = src == dst
    reject(same, "duplicate")
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    _, first = np.unique(lo * (n + 1) + hi, return_index=True)
    dup = np.ones(k, dtype=bool)
    dup[first] = False
    reject(dup, "duplicate")

    prefix = se2.chain_prefix(odom_poses, step_covariances)
    cons = ConsistencyOptions(gate_probability=options.gate_probability,
                              pair_probability=options.pair_probability,
                              informative_max_std_m=options.gate_max_chain_std_m,
                              informative_max_std_rad=options.gate_max_chain_std_rad)
    figures["odometry_chi2"] = np.full(k, np.nan)
    figures["odometry_informative"] = np.zeros(k, dtype=bool)
    alive = np.flatnonzero(reason == "accepted")
    if len(alive):
        gate = odometry_gate(src[alive], dst[alive], delta[alive], covariance[alive], odom_poses, prefix, cons)
        figures["odometry_chi2"][alive] = gate.distance_sq
        figures["odometry_informative"][alive] = gate.informative
        bad = np.zeros(k, dtype=bool)
        bad[alive] = gate.informative & ~gate.passed
        reject(bad, "odometry_gate")

    figures["pair_support"] = np.full(k, np.nan)
    alive = np.flatnonzero(reason == "accepted")
    clique_exact, clique_size = True, 0
    if len(alive):
        pc = pairwise_consistency(src[alive], dst[alive], delta[alive], covariance[alive], odom_poses, prefix, cons)
        degree = np.asarray(pc.adjacency.sum(axis=1)).ravel()
        figures["pair_support"][alive] = degree
        # Among equally large consistent sets prefer the one with the better fits.
        weights = np.asarray(quality["overlap"], float)[alive]
        res = max_clique(pc.adjacency, weights=np.nan_to_num(weights, nan=0.0),
                         options=CliqueOptions(max_expansions=options.clique_max_expansions))
        clique_exact, clique_size = res.exact, res.size
        if not res.exact:
            notes.append(f"the maximum-clique search hit its budget of {options.clique_max_expansions} "
                         f"expansions; the consistent set of {res.size} closures is the best found, "
                         f"at most {res.upper_bound} is possible")
        out = np.ones(len(alive), dtype=bool)
        out[res.members] = False
        if res.size < options.min_clique_size:
            out[:] = True
        bad = np.zeros(k, dtype=bool)
        bad[alive] = out
        reject(bad, "pair_inconsistent")

    o_src, o_dst, o_delta, o_info = odometry_edges(odom_poses, step_covariances)
    figures["gnc_weight"] = np.full(k, np.nan)
    figures["graph_chi2"] = np.full(k, np.nan)
    alive = np.flatnonzero(reason == "accepted")
    poses = np.array(odom_poses, dtype=float)
    if len(alive):
        l_info = np.linalg.inv(covariance[alive])
        l_info = 0.5 * (l_info + np.swapaxes(l_info, -1, -2))
        e_src = np.concatenate([o_src, src[alive]])
        e_dst = np.concatenate([o_dst, dst[alive]])
        e_delta = np.concatenate([o_delta, delta[alive]])
        e_info = np.concatenate([o_info, l_info])
        robust = np.r_[np.zeros(len(o_src), bool), np.ones(len(alive), bool)]
        start = poses
        if options.use_gnc:
            gnc = optimize_gnc(poses, e_src, e_dst, e_delta, e_info, robust,
                               GncOptions(inlier_probability=options.residual_probability))
            w = gnc.weights[len(o_src):]
            figures["gnc_weight"][alive] = w
            bad = np.zeros(k, dtype=bool)
            bad[alive] = w < options.gnc_min_weight
            reject(bad, "graph_residual")
            start = gnc.poses
            keep = w >= options.gnc_min_weight
            alive = alive[keep]
            e_src = np.concatenate([o_src, src[alive]])
            e_dst = np.concatenate([o_dst, dst[alive]])
            e_delta = np.concatenate([o_delta, delta[alive]])
            e_info = np.concatenate([o_info, l_info[keep]])
            robust = np.r_[np.zeros(len(o_src), bool), np.ones(len(alive), bool)]
        kernel = kernel_from_name(options.kernel, options.kernel_scale)
        pr = prune_inconsistent_edges(start, e_src, e_dst, e_delta, e_info, robust, kernel,
                                      probability=options.residual_probability, options=SolverOptions())
        loop_res = pr.solution.residuals_sq[len(o_src):]
        figures["graph_chi2"][alive] = loop_res
        bad = np.zeros(k, dtype=bool)
        bad[alive] = ~pr.kept[len(o_src):]
        reject(bad, "graph_residual")
        poses = np.array(pr.solution.poses)
        if len(pr.removed):
            notes.append(f"{len(pr.removed)} closure(s) failed the residual test after optimisation")
    accepted = reason == "accepted"
    return Verification(reason=reason.astype(str), accepted=accepted, figures=figures, poses=poses,
                        clique_exact=clique_exact, clique_size=clique_size, notes=tuple(notes))
