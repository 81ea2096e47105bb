"""Score a run, or another front-end's candidate list, against the log's ground truth or, without truth, against
the run's own verdicts (a reference, not the truth).

Definitions (docs/scoring.md has the same table; the JSON keys are the names):

Closures, judged by their registered delta:

* a candidate is **registered correctly** when its delta is within
  ``false_distance_m`` (0.3 m) and ``false_heading_rad`` (3 degrees) of the
  true delta ``truth[from]^-1 ∘ truth[to]``;
* a **false closure** is a verified closure that is not registered correctly;
* **closure precision** = verified closures registered correctly / verified
  closures; **verifier recall** = verified closures registered correctly /
  candidates registered correctly (the share of what registration got right
  that the checks kept).

Revisits, judged by the true poses alone (:mod:`closurecheck.reporting.ground_truth`):

* a **revisit pair** is two keyframes outside the candidate exclusion gap
  whose true poses are within 1 m and 30 degrees; a **revisit event** is one
  occasion of coming back to a place (revisit pairs linked along both
  passes); **revisit-event recall** is the share of events closed by a
  verified closure, **candidate event recall** the share any candidate
  reaches.  A verified closure can be correct without being at a revisit
  pair (scans 3 m apart, or facing opposite ways down an aisle): the two
  families count different things and are not meant to add up.

Proposals (a front-end's pairs, or the run's own when it had none):

* a proposal is **right** when, with truth, it is registered correctly and,
  without truth, when the run verified it (the reference);
* with a ``score`` column, the precision-recall curve over the score and its
  average precision (scikit-learn's ``precision_recall_curve`` and
  ``average_precision_score``), and the highest recall at precision 1 with
  the lowest score threshold that gives it.

Trajectory error: ATE after rigid alignment and RPE over fixed travelled
distances (:mod:`closurecheck.reporting.trajectory`), for odometry alone
and for the optimised graph.

NEES of verified closures: ``e^T C^-1 e`` with ``e = between(true delta,
delta)`` and C the closure's covariance; chi-square with 3 degrees of freedom
when the covariances are honest (mean 3, median 2.37).  Beside the mean and
median, the shares inside the central 50% and 95% intervals of chi-square(3)
(0.5 and 0.95 when honest) and the shares below and above the 95% interval
(too large and too small covariances).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..core import se2
from ..core.options import options, setting
from ..core.stats import chi2_quantiles
from ..errors import InputError
from ..frontend.candidates import CandidateOptions, excluded
from ..frontend.keyframes import odometry_travel
from .ground_truth import RevisitOptions, candidate_recall, revisit_truth
from .references import REFERENCE_NOTE, REFERENCE_TRUTH, REFERENCE_VERDICTS
from .trajectory import ate_rmse, rpe

# The labels people read, by JSON key, in the order the terminal and the
# report show them (one home for both).
SECTIONS = (
    ("Run", (
        ("candidates", "candidates"),
        ("accepted", "verified closures"))),
    ("Closures (judged by the registered delta against the truth)", (
        ("false_closures", "false closures (verified, delta wrong)"),
        ("closure_precision", "closure precision (right / verified)"),
        ("candidates_registered_correctly", "candidates registered correctly (delta right)"),
        ("verifier_recall", "verifier recall (verified / registered correctly)"))),
    ("Revisits (keyframes within 1 m and 30 deg in the truth)", (
        ("revisit_pairs", "revisit pairs in the truth"),
        ("candidates_at_revisit_pairs", "candidates at a revisit pair"),
        ("accepted_at_revisit_pairs", "verified closures at a revisit pair"),
        ("revisit_events", "revisit events"),
        ("revisit_events_closed", "events closed by a verified closure"),
        ("revisit_event_recall", "revisit-event recall"),
        ("candidate_event_recall", "event recall of the candidates"),
        ("revisit_events_reached", "events reached by the proposals"),
        ("proposals_at_revisit_pairs", "proposals at a revisit pair"),
        ("proposals_per_keyframe", "proposals per keyframe"))),
    ("Covariance honesty (NEES of verified closures; chi-square(3) when honest)", (
        ("nees_closures", "closures scored"),
        ("nees_mean", "mean (3 when honest)"),
        ("nees_median", "median (2.37 when honest)"),
        ("nees_share_in_central_50pct", "share inside the central 50% (0.5 when honest)"),
        ("nees_share_in_central_95pct", "share inside the central 95% (0.95 when honest)"),
        ("nees_share_below_central_95pct", "share below it (covariance too large; 0.025)"),
        ("nees_share_above_central_95pct", "share above it (covariance too small; 0.025)"))),
    ("Proposals", (
        ("proposals", "proposals scored"),
        ("proposals_in_run", "of them registered by the run"),
        ("proposals_right", "right"),
        ("proposal_precision", "precision (right / registered)"),
        ("frontend_scored", "with a front-end score"),
        ("frontend_average_precision", "average precision over the score"),
        ("frontend_recall_at_precision_1", "highest recall at precision 1"),
        ("frontend_threshold_at_precision_1", "score threshold giving it (score >= threshold)"))),
)
TRAJECTORY_TITLE = "Trajectory error (m, RMS)"


@options
class ScoreOptions:
    """Tolerances of the scores (module docstring): a delta is right within
    ``false_distance_m`` and ``false_heading_rad`` of the truth; RPE over
    ``rpe_distances_m`` of travel."""

    false_distance_m: float = setting(0.3, above=0.0)
    false_heading_rad: float = setting(math.radians(3.0), above=0.0)
    rpe_distances_m: tuple = (1.0, 5.0, 10.0, 25.0)


def closure_errors(truth, src, dst, delta):
    """Translation (m) and heading (rad) error of each delta against truth."""
    true_delta = se2.between(truth[src], truth[dst])
    err = se2.between(true_delta, delta)
    return np.hypot(err[:, 0], err[:, 1]), np.abs(err[:, 2]), err


def registered_correctly(truth, src, dst, delta, options: ScoreOptions = ScoreOptions()) -> np.ndarray:
    """(C,) bool: the registered delta is within the tolerance of the true one (False where there is none)."""
    et, eh, _ = closure_errors(truth, np.asarray(src, np.int64), np.asarray(dst, np.int64), delta)
    with np.errstate(invalid="ignore"):
        return (et <= options.false_distance_m) & (eh <= options.false_heading_rad)


def revisit_pair(log, src, dst, gap: CandidateOptions = CandidateOptions(),
                 options: RevisitOptions = RevisitOptions()) -> np.ndarray:
    """(C,) bool: scans src and dst are a revisit pair (outside the exclusion gap, within 1 m and 30 deg in truth)."""
    src = np.asarray(src, np.int64)
    dst = np.asarray(dst, np.int64)
    d = se2.between(log.truth[src], log.truth[dst])
    travel, _ = odometry_travel(log.odom)
    with np.errstate(invalid="ignore"):
        near = (np.hypot(d[:, 0], d[:, 1]) <= options.max_distance_m) & (np.abs(d[:, 2]) <= options.max_heading_rad)
    return near & ~excluded(np.asarray(log.t, float), travel, src, dst, gap)


# --------------------------------------------------------------------------
# the front-end's score: precision-recall with scikit-learn


def recall_at_full_precision(precision, recall, thresholds) -> tuple[float, float]:
    """Highest recall whose precision is 1, and the score threshold that gives it.

    ``precision``, ``recall`` and ``thresholds`` as scikit-learn's
    ``precision_recall_curve`` returns them (the last precision/recall
    point has no threshold).  Returns (0.0, NaN) when no threshold keeps
    precision at 1 (the best-scored pair is wrong), (NaN, NaN) for an empty
    curve.

    Examples
    --------
    Scores 0.9, 0.8 (right), 0.7 (wrong), 0.6 (right): keeping score >= 0.8
    finds 2 of the 3 right pairs with no wrong one.

    >>> from sklearn.metrics import precision_recall_curve
    >>> from closurecheck.reporting.scoring import recall_at_full_precision
    >>> p, r, t = precision_recall_curve([1, 1, 0, 1], [0.9, 0.8, 0.7, 0.6])
    >>> recall_at_full_precision(p, r, t)
    (0.6666666666666666, 0.8)
    """
    precision = np.asarray(precision, float)[:-1]
    recall = np.asarray(recall, float)[:-1]
    thresholds = np.asarray(thresholds, float)
    if not len(thresholds):
        return math.nan, math.nan
    full = np.flatnonzero(precision >= 1.0)
    if not len(full):
        return 0.0, math.nan
    k = full[np.argmax(recall[full])]
    return float(recall[k]), float(thresholds[k])


def frontend_figures(right, score) -> dict:
    """Precision-recall of "score >= threshold" against ``right`` (C,) bool, over the pairs with a finite score.

    Keys: ``frontend_scored`` (pairs with a score), ``frontend_average_precision``,
    ``frontend_recall_at_precision_1``, ``frontend_threshold_at_precision_1``
    and ``frontend_pr_curve`` ({threshold, precision, recall} lists of
    scikit-learn's ``precision_recall_curve``; the last point, recall 0,
    has no threshold).  Figures are NaN when the scored pairs hold no right
    or no wrong pair to tell apart.
    """
    from sklearn.metrics import average_precision_score, precision_recall_curve

    right = np.asarray(right, bool)
    score = np.asarray(score, float)
    ok = np.isfinite(score)
    y, s = right[ok], score[ok]
    out = {"frontend_scored": int(ok.sum())}
    if not y.any():
        # No right pair: precision is 0 at every threshold and recall undefined.
        out.update(frontend_average_precision=math.nan, frontend_recall_at_precision_1=math.nan,
                   frontend_threshold_at_precision_1=math.nan)
        return out
    precision, recall, thresholds = precision_recall_curve(y, s)
    r1, t1 = recall_at_full_precision(precision, recall, thresholds)
    out.update(frontend_average_precision=float(average_precision_score(y, s)),
               frontend_recall_at_precision_1=r1, frontend_threshold_at_precision_1=t1,
               frontend_pr_curve={"threshold": [float(t) for t in thresholds] + [None],
                                  "precision": [float(p) for p in precision],
                                  "recall": [float(r) for r in recall]})
    return out


# --------------------------------------------------------------------------
# the pieces of a score


def _proposal_rows(origin) -> np.ndarray:
    """(C,) bool: the front-end's pairs (origin "external") when there are any, else every proposed pair
    (not the pairs a reviewer's decisions alone brought in)."""
    origin = np.asarray(origin if origin is not None else [], dtype=object).astype(str)
    external = np.char.find(origin, "external") >= 0 if len(origin) else np.zeros(0, bool)
    if external.any():
        return external
    return origin != "reviewer"


def _proposals(right, registered, score=None) -> dict:
    """Proposal figures: ``right`` (P,) bool and ``registered`` (P,) bool (pairs the run registered and judged)."""
    n_in = int(registered.sum())
    out = {"proposals": int(len(right)), "proposals_in_run": n_in, "proposals_right": int((right & registered).sum()),
           "proposal_precision": float((right & registered).sum() / n_in) if n_in else math.nan}
    if score is not None:
        out.update(frontend_figures(right[registered], np.asarray(score, float)[registered]))
    return out


def nees_figures(nees) -> dict:
    """Mean, median and the shares of ``nees`` inside, below and above chi-square(3)'s central intervals.

    Examples
    --------
    Values at chi-square(3)'s quantiles 0.1, 0.3, ..., 0.9 (scipy.stats.chi2,
    the reference): 3 of 5 fall inside the central 50% (quantiles 0.25 to
    0.75), all inside the central 95%.

    >>> from scipy.stats import chi2
    >>> from closurecheck.reporting.scoring import nees_figures
    >>> f = nees_figures(chi2(3).ppf([0.1, 0.3, 0.5, 0.7, 0.9]))
    >>> f["nees_share_in_central_50pct"], f["nees_share_in_central_95pct"]
    (0.6, 1.0)
    """
    x = np.asarray(nees, float)
    x = x[np.isfinite(x)]
    if not len(x):
        return {"nees_mean": math.nan}
    # core.stats gives scipy.stats.chi2's quantiles to the bit (tests/core/test_stats.py) without importing
    # scipy.stats, which a run otherwise does not need (about 0.5 s, docs/performance.md).
    lo50, hi50 = chi2_quantiles([0.25, 0.75], dof=3)
    lo95, hi95 = chi2_quantiles([0.025, 0.975], dof=3)
    return {"nees_closures": int(len(x)), "nees_mean": float(x.mean()), "nees_median": float(np.median(x)),
            "nees_share_in_central_50pct": float(((x >= lo50) & (x <= hi50)).mean()),
            "nees_share_in_central_95pct": float(((x >= lo95) & (x <= hi95)).mean()),
            "nees_share_below_central_95pct": float((x < lo95).mean()),
            "nees_share_above_central_95pct": float((x > hi95).mean()),
            # Sorted, 5 significant digits: enough for the report's plot.
            "nees_values": [float(f"{v:.5g}") for v in np.sort(x)]}


def _truth_figures(log, keyframes, rows, covariance, poses, options: ScoreOptions, gap: CandidateOptions) -> dict:
    truth = log.truth
    src, dst = np.asarray(rows.src, np.int64), np.asarray(rows.dst, np.int64)
    accepted = np.asarray(rows.accepted, bool)
    _, _, err = closure_errors(truth, src, dst, rows.delta)
    correct = registered_correctly(truth, src, dst, rows.delta, options)
    at_revisit = revisit_pair(log, src, dst, gap)
    n_acc = int(accepted.sum())
    tp = int((accepted & correct).sum())
    travel, _ = odometry_travel(log.odom)
    kf_truth = truth[keyframes]
    # The true revisits once for both recalls (half of the 100,000-scan log's score stage).
    revisits = revisit_truth(kf_truth, log.t[keyframes], travel[keyframes], gap)
    rec = candidate_recall(keyframes, kf_truth, log.t[keyframes], travel[keyframes], src[accepted], dst[accepted],
                           gap, revisits=revisits)
    cand = candidate_recall(keyframes, kf_truth, log.t[keyframes], travel[keyframes], src, dst, gap,
                            revisits=revisits)
    n_correct = int(correct.sum())
    out = {
        "candidates": int(len(src)),
        "accepted": n_acc,
        "false_closures": n_acc - tp,
        "closure_precision": tp / n_acc if n_acc else math.nan,
        "candidates_registered_correctly": n_correct,
        "verifier_recall": tp / n_correct if n_correct else math.nan,
        "revisit_pairs": rec.true_pairs,
        "candidates_at_revisit_pairs": int(at_revisit.sum()),
        "accepted_at_revisit_pairs": int((at_revisit & accepted).sum()),
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
    ok = accepted & np.isfinite(covariance).all(axis=(1, 2)) & np.isfinite(err).all(axis=1)
    nees = np.einsum("ni,ni->n", err[ok], np.linalg.solve(covariance[ok], err[ok][..., None])[..., 0]) \
        if ok.any() else np.zeros(0)
    out.update(nees_figures(nees))
    if n_acc - tp:
        bad = np.flatnonzero(accepted & ~correct)
        out["false_closure_pairs"] = [[int(src[k]), int(dst[k])] for k in bad[:20]]
    return out, correct


def score_verdicts(log, keyframes, rows, covariance, poses=None, options: ScoreOptions = ScoreOptions(),
                   gap: CandidateOptions = CandidateOptions()) -> dict:
    """Scores of a run's verdicts: against ``log.truth`` when the log has it, else the proposals against the
    verdicts themselves (``reference`` says which; module docstring).

    Parameters
    ----------
    log : the run's :class:`~closurecheck.io.scanlog.ScanLog`.
    keyframes : (K,) scan ids in node order.
    rows : the verdicts, with (C,) arrays ``src``, ``dst`` (scan ids),
        ``accepted``, ``delta`` (C, 3) in the src frame, ``origin`` and
        ``frontend_score`` (or None): a
        :class:`~closurecheck.verification.verdicts.VerdictTable` or the
        :class:`~closurecheck.io.pairs_csv.VerdictRows` of a candidates.csv.
    covariance : (C, 3, 3) each verified closure's covariance (src frame; NaN elsewhere).
    poses : (K, 3) optimised keyframe poses, or None.
    """
    keyframes = np.asarray(keyframes, dtype=np.int64)
    accepted = np.asarray(rows.accepted, bool)
    proposed = _proposal_rows(rows.origin) if rows.origin is not None else np.ones(len(accepted), bool)
    score = None if rows.frontend_score is None else np.asarray(rows.frontend_score, float)[proposed]
    if log.has_truth:
        out, correct = _truth_figures(log, keyframes, rows, np.asarray(covariance, float), poses, options, gap)
        out = {"reference": REFERENCE_TRUTH, **out}
        right = correct
    else:
        out = {"reference": REFERENCE_VERDICTS, "reference_note": REFERENCE_NOTE, "candidates": int(len(accepted)),
               "accepted": int(accepted.sum())}
        right = accepted
    out.update(_proposals(right[proposed], np.ones(int(proposed.sum()), bool), score))
    return out


def score_closures(log, keyframes, src, dst, accepted, delta, covariance, poses=None,
                   options: ScoreOptions = ScoreOptions(), gap: CandidateOptions = CandidateOptions()) -> dict:
    """:func:`score_verdicts` of plain arrays against ``log.truth`` (for the benchmarks); needs truth."""
    from types import SimpleNamespace

    if not log.has_truth:
        raise InputError("the log has no ground truth to score against", log.source or None)
    rows = SimpleNamespace(src=np.asarray(src), dst=np.asarray(dst), accepted=np.asarray(accepted, bool),
                           delta=np.asarray(delta, float), origin=None, frontend_score=None)
    return score_verdicts(log, keyframes, rows, covariance, poses, options, gap)


def score_outcome(outcome) -> dict | None:
    """The score a run's outputs carry (summary.json, report): against truth when the log has it; without
    truth, when the run verified a front-end's pairs, those pairs against the verdicts; else None."""
    v = outcome.verdicts
    has_external = bool(len(v)) and bool((np.char.find(np.asarray(v.origin).astype(str), "external") >= 0).any())
    if not outcome.log.has_truth and not has_external:
        return None
    return score_verdicts(outcome.log, outcome.keyframes, v, v.covariance, outcome.poses)


def _run_rows(run_dir: Path, log):
    from ..io.graph_file import read_graph
    from ..io.pairs_csv import read_candidates

    if not run_dir.is_dir():
        raise InputError("not a run directory", run_dir)
    graph = read_graph(run_dir / "graph.json")
    rows = read_candidates(run_dir / "candidates.csv")
    if len(graph.ids) and (graph.ids.max() >= len(log)):
        raise InputError("graph.json names scans that the log does not have; is this the run's log?", run_dir)
    cov = np.full((len(rows), 3, 3), np.nan)
    loops = graph.loop_mask
    lookup = {(int(a), int(b)): k for k, (a, b) in enumerate(zip(graph.src[loops], graph.dst[loops]))}
    loop_cov = graph.covariance()[loops] if loops.any() else np.zeros((0, 3, 3))
    for k in np.flatnonzero(rows.accepted):
        j = lookup.get((int(rows.src[k]), int(rows.dst[k])))
        if j is not None:
            cov[k] = loop_cov[j]
    return graph, rows, cov


def score_run_dir(run_dir, log, options: ScoreOptions = ScoreOptions()) -> dict:
    """Score the outputs of ``closurecheck run`` in ``run_dir`` (graph.json, candidates.csv) for ``log``."""
    graph, rows, cov = _run_rows(Path(run_dir), log)
    return score_verdicts(log, graph.ids, rows, cov, graph.poses, options)


def score_pairs(log, pairs, keyframes, run_rows=None, options: ScoreOptions = ScoreOptions(),
                gap: CandidateOptions = CandidateOptions()) -> dict:
    """Score an external candidate list (a front-end's proposals, :class:`~closurecheck.io.pairs_csv.ExternalPairs`).

    Each pair is judged by the run that registered it (``run_rows``, the
    :class:`~closurecheck.io.pairs_csv.VerdictRows` of its candidates.csv):
    right when registered correctly (truth) or verified (no truth); pairs
    the run did not register are counted, not judged.  With truth, the
    revisit events the list reaches over ``keyframes`` (scan ids) too.
    """
    right = np.zeros(len(pairs), bool)
    registered = np.zeros(len(pairs), bool)
    if run_rows is not None and len(run_rows):
        index = {(min(a, b), max(a, b)): k for k, (a, b) in enumerate(zip(run_rows.src.tolist(),
                                                                              run_rows.dst.tolist()))}
        rows = np.array([index.get((min(a, b), max(a, b)), -1) for a, b in zip(pairs.src.tolist(),
                                                                                pairs.dst.tolist())], np.int64)
        registered = rows >= 0
        hit = rows[registered]
        if log.has_truth:
            # The file's orientation may differ from the run's: judge the run's row.
            right[registered] = registered_correctly(log.truth, run_rows.src[hit], run_rows.dst[hit],
                                                     run_rows.delta[hit], options)
        else:
            right[registered] = run_rows.accepted[hit]
    out = {"reference": REFERENCE_TRUTH if log.has_truth else REFERENCE_VERDICTS}
    if not log.has_truth:
        out["reference_note"] = REFERENCE_NOTE
    out.update(_proposals(right, registered, pairs.score))
    if log.has_truth:
        keyframes = np.union1d(np.asarray(keyframes, dtype=np.int64), pairs.scan_ids)
        travel, _ = odometry_travel(log.odom)
        rec = candidate_recall(keyframes, log.truth[keyframes], log.t[keyframes], travel[keyframes], pairs.src,
                               pairs.dst, gap)
        out.update({"proposals_at_revisit_pairs": int(revisit_pair(log, pairs.src, pairs.dst, gap).sum()),
                    "revisit_events": rec.events, "revisit_events_reached": rec.covered_events,
                    "revisit_event_recall": rec.recall, "proposals_per_keyframe": rec.proposals_per_keyframe})
    return out


# --------------------------------------------------------------------------
# text


def _value(v) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return "n/a" if math.isnan(v) else f"{v:.4g}"
    if isinstance(v, list):
        return ", ".join(f"{a}-{b}" for a, b in v)
    return str(v)


def curve_rows(curve: dict, rows: int = 10) -> list:
    """About ``rows`` (threshold, precision, recall) points of a ``frontend_pr_curve``, spread over its recall."""
    t, p, r = curve["threshold"][:-1], curve["precision"][:-1], curve["recall"][:-1]
    if not t:
        return []
    picks = sorted(set(np.linspace(0, len(t) - 1, min(rows, len(t))).round().astype(int).tolist()))
    return [(t[k], p[k], r[k]) for k in picks]


def trajectory_rows(score: dict) -> list:
    """(label, odometry-only value, optimised value) of the ATE and each RPE distance in a score."""
    rows = []
    if "ate_odometry_m" in score:
        rows.append(("ATE after rigid alignment", score.get("ate_odometry_m"), score.get("ate_optimised_m")))
    for key in score:
        if key.startswith("rpe_") and key.endswith("_odometry_m"):
            d = key[len("rpe_"):-len("m_odometry_m")]
            rows.append((f"RPE over {d} m", score[key], score.get(f"rpe_{d}m_optimised_m")))
    return rows


def score_blocks(score: dict, fmt) -> tuple[list, list]:
    """The labelled rows of a score, for the terminal and the report (one home for both).

    Returns (one ``(title, [(label, fmt(value))])`` per section of
    :data:`SECTIONS` the score has, the ``(key with spaces, fmt(value))``
    rows of keys no section names, the trajectory's, the curve's and the
    NEES values' aside).
    """
    shown = {"reference", "reference_note", "nees_values", "frontend_pr_curve", "false_closure_pairs", "ate_ratio"}
    blocks = []
    for title, keys in SECTIONS:
        rows = [(label, fmt(score[k])) for k, label in keys if k in score]
        shown.update(k for k, _ in keys)
        if rows:
            blocks.append((title, rows))
    other = [(k.replace("_", " "), fmt(v)) for k, v in score.items()
             if k not in shown and not k.startswith(("ate_", "rpe_")) and not isinstance(v, (dict, list))]
    return blocks, other


def format_score(score: dict) -> str:
    """The terminal table of a score: what it is scored against, then one block per section (docs/scoring.md)."""
    lines = []
    if score.get("reference") == REFERENCE_VERDICTS:
        lines += ["Scored against: THIS RUN'S VERDICTS, A REFERENCE, NOT THE TRUTH",
                  f"  ({score.get('reference_note', REFERENCE_NOTE)})"]
    elif score.get("reference") == REFERENCE_TRUTH:
        lines.append("Scored against: the ground truth in the log")
    blocks, other = score_blocks(score, _value)
    traj = trajectory_rows(score)
    if traj:
        blocks.append((TRAJECTORY_TITLE + ": odometry only / optimised",
                       [(label, f"{_value(a)} / {_value(b)}") for label, a, b in traj]))
    if other:
        blocks.append(("Other", other))
    if score.get("false_closure_pairs"):
        blocks.append(("False closures (from-to)", [("pairs", _value(score["false_closure_pairs"]))]))
    width = max((len(a) for _, rows in blocks for a, _ in rows), default=0)
    for title, rows in blocks:
        lines.append(title)
        lines += [f"  {a.ljust(width)}  {b}" for a, b in rows]
    curve = score.get("frontend_pr_curve")
    if curve:
        lines.append("Precision-recall over the front-end score (keep pairs with score >= threshold)")
        lines.append(f"  {'threshold':>12}  {'precision':>9}  {'recall':>6}")
        lines += [f"  {t:>12.4g}  {p:>9.3f}  {r:>6.3f}" for t, p, r in curve_rows(curve)]
    return "\n".join(lines)


def score_run(run_dir, *, log_path=None, candidates=None, choice=None) -> dict:
    """``closurecheck score``: a run's verdicts, or another front-end's pairs, against the log's truth or,
    without truth, against the run's verdicts (a reference).

    ``log_path`` defaults to the log recorded in ``run_dir/summary.json``;
    ``candidates`` (a pairs CSV) scores that list, judged by the run's
    registrations and verdicts, instead of the run's own candidates.
    """
    import json

    from ..io.inputs import RecordingChoice, load_input
    from ..io.pairs_csv import read_pairs

    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputError("no such run folder" if not run_dir.exists() else "not a run folder (a folder that "
                         "closurecheck run wrote)", run_dir)
    if log_path is None:
        try:
            log_path = json.loads((run_dir / "summary.json").read_text())["log_path"]
        except (OSError, ValueError, KeyError, TypeError, RecursionError):
            raise InputError("cannot tell which log this run used; pass --log LOG", run_dir) from None
        if not isinstance(log_path, str) or not log_path:
            raise InputError("cannot tell which log this run used; pass --log LOG", run_dir)
    log, _ = load_input(log_path, choice or RecordingChoice())
    if candidates:
        pairs = read_pairs(candidates, len(log))
        graph, rows, _ = _run_rows(run_dir, log)
        return score_pairs(log, pairs, graph.ids, rows)
    return score_run_dir(run_dir, log)


def write_score(path, score: dict) -> None:
    """Write the scores as strict JSON, atomically: an undefined score (NaN) is ``null``."""
    from ..io.json_file import write_json

    write_json(path, score)
