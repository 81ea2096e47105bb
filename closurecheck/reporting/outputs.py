"""The run's output folder.

graph.json, candidates.csv, config.toml, summary.json and report.html, and
a batch's index page.
"""

from __future__ import annotations

import contextlib
import gc
import os
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np

from .._version import __version__
from ..calibration.odometry import OdometryCalibration
from ..core import se2
from ..errors import InputError, shorten
from ..frontend.candidates import CandidateSet
from ..io.atomic import staged_folder, write_text
from ..io.graph_file import PoseGraph, write_graph
from ..io.json_file import write_json
from ..io.pairs_csv import VARIANCE_COLUMNS, write_candidates
from ..io.scanlog import ScanLog
from ..io.settings_file import to_toml
from ..registration.batch import RegisteredClosures
from ..verification.trust import TrustVerdict
from ..verification.verdicts import VerdictTable
from ..verification.verify import Verification


@dataclass(frozen=True, eq=False)
class LogRun:
    """One log of a ``closurecheck run``: where it came from, its output folder's name, and how it ended.

    path : the log as given; name : its folder under ``--out`` (unique in
    the batch, :func:`closurecheck.io.inputs.output_names`); outcome : the
    :class:`RunOutcome`, or None when the log failed with ``error`` (one line).
    """

    path: Path
    name: str
    outcome: "RunOutcome | None" = None
    error: str | None = None


@dataclass(frozen=True, eq=False)
class RunOutcome:
    """Everything a run produced, for the writers, the report and tests."""

    log: ScanLog
    config: object  # closurecheck.config.RunConfig: every option record of the run
    keyframes: np.ndarray  # (K,) scan ids, chain order
    odom: np.ndarray  # (K, 3) odometry poses of the keyframes
    step_covariances: np.ndarray  # (K-1, 3, 3)
    candidates: CandidateSet
    registrations: RegisteredClosures
    verification: Verification
    verdicts: VerdictTable
    graph: PoseGraph
    calibration: OdometryCalibration
    trust: TrustVerdict
    timings: dict = field(default_factory=dict)
    notes: tuple = ()

    @property
    def poses(self) -> np.ndarray:
        return self.verification.poses




def _drift_summary(drift) -> dict:
    deg_per_100m = float(np.degrees(drift.rate_rad_per_m) * 100.0)
    std = float(np.degrees(drift.std_rad_per_m) * 100.0) if np.isfinite(drift.std_rad_per_m) else None
    return {"deg_per_100m": deg_per_100m, "std_deg_per_100m": std, "closures": drift.closures,
            "significant": drift.applied,
            "removed_deg_per_100m": float(np.degrees(drift.removed_rad_per_m) * 100.0)}


def _calibration_summary(cal: OdometryCalibration) -> dict:
    sys = cal.systematic
    deg100 = float(np.degrees(1.0) * 100.0)

    def finite(v):
        return float(v) if np.isfinite(v) else None

    return {"measured": bool(cal.measured), "steps": int(cal.steps), "steps_registered": int(cal.steps_sound),
            "heading_drift_deg_per_100m": sys.heading_per_m * deg100,
            "heading_drift_std_deg_per_100m": finite(sys.heading_per_m_std * deg100),
            "turn_scale": sys.turn_scale, "turn_scale_std": finite(sys.turn_scale_std),
            "distance_scale": sys.distance_scale, "distance_scale_std": finite(sys.distance_scale_std),
            "noise": cal.noise.to_header(), "slips": [int(k) for k in cal.slips],
            "steps_unchecked": int(len(cal.unchecked))}


def _unseen_slips_summary(outcome: RunOutcome) -> list:
    ids = outcome.keyframes
    return [{"first_scan": int(ids[s.first_step]), "last_scan": int(ids[s.last_step + 1]),
             "pairs_contradicting_before": s.contradictions_before, "pairs_contradicting_after": s.contradictions_after,
             "accepted_before": s.accepted_before, "accepted_after": s.accepted_after}
            for s in outcome.verification.unseen_slips]


def _set_aside_summary(aside) -> dict | None:
    if aside is None:
        return None
    return {"size": int(aside.size), "variance_factor": float(aside.factor), "kept_size": int(aside.kept_size),
            "kept_variance_factor": float(aside.kept_factor)}


def _free_space_summary(check) -> dict | None:
    if check is None:
        return None
    return {"pairs_compared": int(len(check.a)), "pairs_contradicting": int(check.count)}


def summary(outcome: RunOutcome) -> dict:
    """Numbers of the run for summary.json, the terminal and the report."""
    v = outcome.verdicts
    start = se2.inverse(outcome.odom[0])
    shift = np.hypot(*(se2.compose(start, outcome.poses)[:, :2] - se2.compose(start, outcome.odom)[:, :2]).T)
    return {
        "closurecheck": __version__,
        "source": outcome.log.source,
        "scans": len(outcome.log),
        "keyframes": int(len(outcome.keyframes)),
        "candidates": int(len(v)),
        "accepted": int(v.accepted.sum()),
        "rejected": int((~v.accepted).sum()),
        "reasons": v.counts(),
        "trust": {"verdict": outcome.trust.label, "reasons": list(outcome.trust.reasons)},
        "consistent_set_exact": bool(outcome.verification.clique_exact),
        "odometry_calibration": _calibration_summary(outcome.calibration),
        "consistent_set_set_aside": _set_aside_summary(outcome.verification.set_aside),
        "unseen_slips": _unseen_slips_summary(outcome),
        "free_space": _free_space_summary(outcome.verification.free_space),
        "odometry_scale": float(outcome.verification.odometry_scale),
        "odometry_heading_drift": _drift_summary(outcome.verification.heading_drift),
        "correction_max_m": float(shift.max()) if len(shift) else 0.0,
        "correction_mean_m": float(shift.mean()) if len(shift) else 0.0,
        "timings_s": {k: round(s, 3) for k, s in outcome.timings.items()},
        "notes": list(outcome.notes),
    }


# What a run folder holds (docs/cli.md, "run"); a folder holding anything
# else is not replaced, so a user's own files are never lost.
RUN_ENTRIES = ("graph.json", "candidates.csv", "config.toml", "summary.json", "report.html", "figures")


def foreign_entries(folder: Path) -> list[str]:
    """Names in ``folder`` that a run did not write (a run's temporary ``.NAME.*.part`` files count as its own)."""
    try:
        names = sorted(p.name for p in Path(folder).iterdir())
    except (FileNotFoundError, NotADirectoryError):
        return []
    own = set(RUN_ENTRIES)
    return [n for n in names if n not in own and not _own_part_file(n, own)]


def _own_part_file(name: str, own: set) -> bool:
    # atomic_open's temporary files are ".TARGET.RANDOM.part".
    return name.startswith(".") and name.endswith(".part") and name[1:].rsplit(".", 2)[0] in own


def check_run_folder(out_dir) -> None:
    """Refuse an output folder that a run cannot replace as a whole (exit status 2).

    The run's outputs replace the folder in one step (docs/cli.md, "What
    an interrupted or failed run leaves"), so it must be new, empty or a
    previous run's folder, and must not be the current folder or hold it.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError("output path exists and is not a directory", out_dir)
    real, cwd = Path(os.path.realpath(out_dir)), Path(os.getcwd()).resolve()
    if real == cwd or real in cwd.parents:
        raise InputError("the output folder is the current folder or holds it; the run replaces its output "
                         "folder as a whole, so name a folder below the current one", out_dir)
    foreign = foreign_entries(out_dir)
    if foreign:
        more = f" and {len(foreign) - 1} more" if len(foreign) > 1 else ""
        raise InputError(f"the output folder holds files that are not a run's outputs ({shorten(foreign[0])}{more}); "
                         "the run replaces the folder as a whole, so give a new or empty folder", out_dir)


@contextlib.contextmanager
def _collector_paused():
    """Python's cycle collector off for the block (back on after it, if it was on).

    Writing the outputs makes many short-lived container objects (the JSON
    trees, matplotlib's artists), which trigger collections, and each full
    collection walks the whole heap, the run's scan log included: 0.22 to
    0.27 s of the write stage on the 5,000-scan warehouse log (245 young,
    23 middle and 2 full collections, measured with gc.callbacks).  The
    figures, reference cycles, are collected as they are drawn
    (:func:`closurecheck.reporting.report.build_report`).
    """
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()


def write_outputs(outcome: RunOutcome, out_dir, *, report: bool = True, score: dict | None = None,
                  log_path: Path | None = None, progress=None, pictures=None) -> dict:
    """Write graph.json, candidates.csv, config.toml, summary.json and the report into ``out_dir``.

    Everything is written into a hidden staging folder beside ``out_dir``
    that then replaces ``out_dir`` as a whole
    (:func:`closurecheck.io.atomic.staged_folder`): ``out_dir`` holds either
    its previous complete content or the new one, never a mix, and a rerun
    with ``report=False`` leaves no old report behind.  ``out_dir`` must
    pass :func:`check_run_folder`.  ``progress`` (optional) is told each
    step.  Returns the final paths written.  ``pictures`` (optional) is a
    list of picture workers started ahead for this report
    (:func:`closurecheck.reporting.picture_worker.launch`); they are handed
    the report's data here, and ended with the write.
    """
    out_dir = Path(out_dir)
    check_run_folder(out_dir)
    try:
        Path(os.path.realpath(out_dir)).parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output directory ({exc.strerror})", out_dir) from None

    def step(text):
        if progress is not None:
            progress.step(text)

    names = {"candidates": "candidates.csv", "graph": "graph.json", "config": "config.toml",
             "summary": "summary.json"}
    with _collector_paused(), staged_folder(out_dir, check=check_run_folder) as stage, \
            contextlib.ExitStack() as workers:
        for job in pictures or ():
            workers.enter_context(job)
        d = stage.path
        v = outcome.verdicts
        info = summary(outcome)
        if log_path is not None:
            info["log_path"] = str(Path(log_path).resolve())
        if score is not None:
            info["score"] = score
        job = None
        if report:
            from .picture_worker import start_pictures, worth_a_worker
            from .report import ReportData, build_report, check_thresholds

            data = ReportData(
                log_name=outcome.log.source or "scan log", ids=outcome.keyframes, odom=outcome.odom,
                poses=outcome.poses, scan_points=[outcome.log.points(int(i)) for i in outcome.keyframes],
                verdicts=v, summary=_summary_rows(info), timings=outcome.timings, score=score,
                truth=outcome.log.truth[outcome.keyframes] if outcome.log.has_truth else None,
                config_text=to_toml(outcome.config), notes=list(outcome.notes),
                thresholds=check_thresholds(outcome.config.verify), trust=outcome.trust.label,
                trust_reasons=outcome.trust.reasons, free_space=outcome.verification.free_space)
            # Most pictures are drawn by a second process while this one
            # writes the files below (closurecheck.reporting.picture_worker);
            # --jobs 1 keeps the run in one process.
            if pictures:
                job = list(pictures)
                for one in job:
                    one.send(data)
            elif worth_a_worker(outcome.config.jobs):
                job = start_pictures(data)
                if job is not None:
                    workers.enter_context(job)
        extra = {"origin": v.origin, **v.optional_columns()}
        extra.update(v.figures)
        cov = v.covariance
        extra.update(dict(zip(VARIANCE_COLUMNS, (cov[:, 0, 0], cov[:, 1, 1], cov[:, 2, 2]))))
        step("candidates.csv")
        write_candidates(d / names["candidates"], v.src, v.dst, np.where(v.accepted, "accepted", "rejected"),
                         v.reason, v.delta, extra)
        step("graph.json, config.toml, summary.json")
        write_graph(d / names["graph"], outcome.graph)
        write_text(d / names["config"], to_toml(outcome.config, header=f"closurecheck {__version__}: effective "
                                                f"configuration of the run on {outcome.log.source}\nrerun with "
                                                f"--config this_file"))
        write_json(d / names["summary"], info)
        if report:
            build_report(d, data, progress=progress, pictures=job)
            names["report"] = "report.html"
        step(f"putting the outputs in place: {out_dir}")
    return {key: out_dir / name for key, name in names.items()}


def _summary_rows(info: dict) -> list:
    return [("scans in the log", info["scans"]), ("keyframes", info["keyframes"]),
            ("largest map correction", f"{info['correction_max_m']:.2f} m"),
            ("mean map correction", f"{info['correction_mean_m']:.2f} m"),
            ("consistent set proven maximum", "yes" if info["consistent_set_exact"] else "no (budget)"),
            ("closurecheck version", info["closurecheck"])]




def write_index(out: Path, outcomes) -> Path:
    """index.html linking the report of each log of a batch run.

    ``outcomes`` holds one :class:`LogRun` per log; each log's outputs are
    in ``out/<name>/``.
    """
    import html

    out.mkdir(parents=True, exist_ok=True)
    rows = []
    for item in outcomes:
        name, outcome, error = item.name, item.outcome, item.error
        if outcome is None:
            rows.append(f"<tr><td>{html.escape(name)}</td><td colspan='4' class='err'>failed: "
                        f"{html.escape(error)}</td></tr>")
            continue
        info = summary(outcome)
        # Without --no-report the report is the page to open; otherwise the summary.
        target = "report.html" if (out / name / "report.html").exists() else "summary.json"
        rows.append(f"<tr><td><a href='{html.escape(quote(name))}/{target}'>{html.escape(name)}</a></td>"
                    f"<td>{info['keyframes']}</td><td>{info['candidates']}</td><td>{info['accepted']}</td>"
                    f"<td>{info['correction_max_m']:.2f} m</td></tr>")
    from .report import SAFETY_TEXT

    page = ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>closurecheck runs</title>"
            "<style>body{font-family:system-ui,sans-serif;margin:24px}td,th{padding:4px 10px;border-bottom:"
            "1px solid #ddd;text-align:left}.err{color:#b0302a}.caution{border-left:5px solid #d9822b;"
            "padding:6px 12px;background:#fff8ef}</style></head><body><h1>closurecheck runs</h1>"
            f"<p class='caution'>{html.escape(SAFETY_TEXT)}</p><table><tr><th>log</th><th>keyframes</th>"
            "<th>candidates</th><th>verified closures</th><th>largest correction</th></tr>"
            + "".join(rows) + "</table></body></html>")
    path = out / "index.html"
    write_text(path, page)
    return path
