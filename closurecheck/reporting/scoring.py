"""Score a run (or someone else's candidate list) against the log's ground truth.

Definitions (docs/scoring.md):

* a closure is **correct** when its delta is within ``false_distance_m``
  (0.3 m) and ``false_heading_rad`` (3 degrees) of the true delta
  ``truth[from]^-1 ∘ truth[to]``; an accepted closure that is not correct is
  a **false closure**;
* a candidate is a **true pair** when its two scans are a true revisit
  (within 1 m and 30 degrees in truth, :mod:`closurecheck.reporting.ground_truth`);
* **closure precision** = correct accepted / accepted; **closure recall** =
  correct accepted / true pairs among the candidates;
* **revisit-event recall**: fraction of true revisit events (evaluate's
  definition over the run's keyframes) covered by at least one accepted
  closure;
* trajectory error: ATE after rigid alignment and RPE over fixed travelled
  distances (:mod:`closurecheck.reporting.trajectory`), for odometry alone and for the
  optimised graph;
* NEES of accepted closures: ``e^T C^-1 e`` with ``e = between(true delta,
  delta)`` and C the closure's covariance; chi-square with 3 degrees of
  freedom (mean 3) when the covariances are honest.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..core import se2
from ..core.options import options, setting
from ..errors import InputError
from ..frontend.candidates import CandidateOptions
from ..frontend.keyframes import odometry_travel
from .ground_truth import RevisitOptions, candidate_recall
from .trajectory import ate_rmse, rpe


@options
class ScoreOptions:
    false_distance_m: float = setting(0.3, above=0.0)
    false_heading_rad: float = setting(math.radians(3.0), above=0.0)
    rpe_distances_m: tuple = (1.0, 5.0, 10.0, 25.0)


def closure_errors(truth, src, dst, delta):
    """Translation (m) and heading (rad) error of each delta against truth."""
    true_delta = se2.between(truth[src], truth[dst])
    err = se2.between(true_delta, delta)
    return np.hypot(err[:, 0], err[:, 1]), np.abs(err[:, 2]), err


def _true_pair(truth, src, dst, options: RevisitOptions = RevisitOptions()):
    d = se2.between(truth[src], truth[dst])
    return (np.hypot(d[:, 0], d[:, 1]) <= options.max_distance_m) & (np.abs(d[:, 2]) <= options.max_heading_rad)


def score_closures(log, keyframes, src, dst, accepted, delta, covariance, poses=None,
                   options: ScoreOptions = ScoreOptions(), gap: CandidateOptions = CandidateOptions()) -> dict:
    """Scores of a verdict table against ``log.truth`` (see the module docstring).

    ``keyframes`` (K,) scan ids in node order; ``poses`` (K, 3) the optimised
    poses (optional); the candidate arrays are (C,) scan ids with (C, 3)
    deltas and (C, 3, 3) covariances in the ``src`` frame.
    """
    if not log.has_truth:
        raise InputError("the log has no ground truth to score against", log.source or None)
    truth = log.truth
    keyframes = np.asarray(keyframes, dtype=np.int64)
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    accepted = np.asarray(accepted, dtype=bool)
    et, eh, err = closure_errors(truth, src, dst, delta)
    with np.errstate(invalid="ignore"):
        correct = (et <= options.false_distance_m) & (eh <= options.false_heading_rad)
    positive = _true_pair(truth, src, dst)
    n_acc = int(accepted.sum())
    tp = int((accepted & correct).sum())
    travel, _ = odometry_travel(log.odom)
    kf_truth = truth[keyframes]
    rec = candidate_recall(keyframes, kf_truth, log.t[keyframes], travel[keyframes], src[accepted], dst[accepted],
                           gap)
    cand = candidate_recall(keyframes, kf_truth, log.t[keyframes], travel[keyframes], src, dst, gap)
    out = {
        "candidates": int(len(src)),
        "accepted": n_acc,
        "false_closures": n_acc - tp,
        "closure_precision": tp / n_acc if n_acc else math.nan,
        "true_pairs_among_candidates": int(positive.sum()),
        "closure_recall": float((accepted & correct & positive).sum() / positive.sum()) if positive.any()
        else math.nan,
        "revisit_events": rec.events,
        "revisit_events_closed": rec.covered_events,
        "revisit_event_recall": rec.recall,
        "candidate_event_recall": cand.recall,
        "ate_odometry_m": ate_rmse(log.odom[keyframes], kf_truth),
    }
    if poses is not None:
        out["ate_optimised_m"] = ate_rmse(poses, kf_truth)
        out["ate_ratio"] = out["ate_optimised_m"] / out["ate_odometry_m"] if out["ate_odometry_m"] else math.nan
        for r_odo, r_opt in zip(rpe(log.odom[keyframes], kf_truth, options.rpe_distances_m),
                                rpe(poses, kf_truth, options.rpe_distances_m)):
            out[f"rpe_{r_opt.distance_m:g}m_odometry_m"] = r_odo.translation_rmse_m
            out[f"rpe_{r_opt.distance_m:g}m_optimised_m"] = r_opt.translation_rmse_m
    ok = accepted & np.isfinite(covariance).all(axis=(1, 2))
    if ok.any():
        nees = np.einsum("ni,ni->n", err[ok], np.linalg.solve(covariance[ok], err[ok][..., None])[..., 0])
        out["nees_mean"] = float(nees.mean())
        out["nees_median"] = float(np.median(nees))
        out["nees_closures"] = int(ok.sum())
    else:
        out["nees_mean"] = math.nan
    if n_acc - tp:
        bad = np.flatnonzero(accepted & ~correct)
        out["false_closure_pairs"] = [[int(src[k]), int(dst[k])] for k in bad[:20]]
    return out


def score_run_dir(run_dir, log, options: ScoreOptions = ScoreOptions()) -> dict:
    """Score the outputs of ``closurecheck run`` in ``run_dir`` against ``log``."""
    from ..io.graph_file import read_graph
    from ..io.pairs_csv import read_candidates

    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputError("not a run directory", run_dir)
    graph = read_graph(run_dir / "graph.json")
    rows = read_candidates(run_dir / "candidates.csv")
    src, dst, accepted, delta = rows.src, rows.dst, rows.accepted, rows.delta
    if len(graph.ids) and (graph.ids.max() >= len(log)):
        raise InputError("graph.json names scans that the log does not have; is this the run's log?", run_dir)
    cov = np.full((len(src), 3, 3), np.nan)
    loops = graph.loop_mask
    lookup = {(int(a), int(b)): k for k, (a, b) in enumerate(zip(graph.src[loops], graph.dst[loops]))}
    loop_cov = graph.covariance()[loops] if loops.any() else np.zeros((0, 3, 3))
    for k in np.flatnonzero(accepted):
        j = lookup.get((int(src[k]), int(dst[k])))
        if j is not None:
            cov[k] = loop_cov[j]
    return score_closures(log, graph.ids, src, dst, accepted, delta, cov, graph.poses, options)


def score_pairs(log, pairs, keyframes, options: ScoreOptions = ScoreOptions()) -> dict:
    """Score an external candidate list: how many pairs are true revisits, and
    what fraction of revisit events the list reaches (precision and recall of
    a front-end's proposals)."""
    if not log.has_truth:
        raise InputError("the log has no ground truth to score against", log.source or None)
    truth = log.truth
    positive = _true_pair(truth, pairs.src, pairs.dst)
    keyframes = np.union1d(np.asarray(keyframes, dtype=np.int64), pairs.scan_ids)
    travel, _ = odometry_travel(log.odom)
    rec = candidate_recall(keyframes, truth[keyframes], log.t[keyframes], travel[keyframes], pairs.src, pairs.dst)
    return {
        "pairs": int(len(pairs)),
        "true_pairs": int(positive.sum()),
        "pair_precision": float(positive.mean()) if len(pairs) else math.nan,
        "revisit_events": rec.events,
        "revisit_events_reached": rec.covered_events,
        "revisit_event_recall": rec.recall,
        "proposals_per_keyframe": rec.proposals_per_keyframe,
    }


def format_score(score: dict) -> str:
    """A two-column text table of a score dict."""
    rows = []
    for k, v in score.items():
        if isinstance(v, float):
            v = "n/a" if math.isnan(v) else f"{v:.4g}"
        elif isinstance(v, list):
            v = ", ".join(f"{a}-{b}" for a, b in v)
        rows.append((k.replace("_", " "), str(v)))
    width = max(len(a) for a, _ in rows) if rows else 0
    return "\n".join(f"{a.ljust(width)}  {b}" for a, b in rows)


def score_run(run_dir, *, log_path=None, candidates=None, choice=None) -> dict:
    """``closurecheck score``: a run's verdicts, or another front-end's pairs, against the log's truth.

    ``log_path`` defaults to the log recorded in ``run_dir/summary.json``;
    ``candidates`` (a pairs CSV) scores that list instead of the run's verdicts.
    """
    import json

    from ..frontend.keyframes import select_keyframes
    from ..io.inputs import RecordingChoice, load_input
    from ..io.pairs_csv import read_pairs

    run_dir = Path(run_dir)
    if log_path is None:
        try:
            log_path = json.loads((run_dir / "summary.json").read_text())["log_path"]
        except (OSError, ValueError, KeyError, TypeError, RecursionError):
            raise InputError("cannot tell which log this run used; pass --log LOG", run_dir) from None
        if not isinstance(log_path, str) or not log_path:
            raise InputError("cannot tell which log this run used; pass --log LOG", run_dir)
    log, _ = load_input(log_path, choice or RecordingChoice())
    if candidates:
        return score_pairs(log, read_pairs(candidates, len(log)), select_keyframes(log.odom))
    return score_run_dir(run_dir, log)


def write_score(path, score: dict) -> None:
    """Write the scores as strict JSON, atomically: an undefined score (NaN) is ``null``."""
    from ..io.json_file import write_json

    write_json(path, score)
