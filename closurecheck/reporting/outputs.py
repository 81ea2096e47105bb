"""The run's output folder.

graph.json, candidates.csv, config.toml, summary.json and report.html, and
a batch's index page.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .._version import __version__
from ..calibration.odometry import OdometryCalibration
from ..core import se2
from ..errors import InputError
from ..frontend.candidates import CandidateSet
from ..io.atomic import write_text
from ..io.graph_file import PoseGraph, write_graph
from ..io.inputs import output_name
from ..io.pairs_csv import VARIANCE_COLUMNS, write_candidates
from ..io.scanlog import ScanLog
from ..io.settings_file import to_toml
from ..registration.batch import RegisteredClosures
from ..verification.trust import TrustVerdict
from ..verification.verdicts import VerdictTable
from ..verification.verify import Verification


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
            "noise": cal.noise.to_header(), "slips": [int(k) for k in cal.slips]}


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
        "free_space": _free_space_summary(outcome.verification.free_space),
        "odometry_scale": float(outcome.verification.odometry_scale),
        "odometry_heading_drift": _drift_summary(outcome.verification.heading_drift),
        "correction_max_m": float(shift.max()) if len(shift) else 0.0,
        "correction_mean_m": float(shift.mean()) if len(shift) else 0.0,
        "timings_s": {k: round(s, 3) for k, s in outcome.timings.items()},
        "notes": list(outcome.notes),
    }


def write_outputs(outcome: RunOutcome, out_dir, *, report: bool = True, score: dict | None = None,
                  log_path: Path | None = None) -> dict:
    """Write graph.json, candidates.csv, config.toml, summary.json and the report.

    Each file is written atomically, so an interruption leaves either the
    previous complete file or the new one.  Returns the paths written.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise InputError("output path exists and is not a directory", out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output directory ({exc.strerror})", out_dir) from None
    paths = {}
    v = outcome.verdicts
    extra = {"origin": v.origin, **v.optional_columns()}
    extra.update(v.figures)
    cov = v.covariance
    extra.update(dict(zip(VARIANCE_COLUMNS, (cov[:, 0, 0], cov[:, 1, 1], cov[:, 2, 2]))))
    paths["candidates"] = out_dir / "candidates.csv"
    write_candidates(paths["candidates"], v.src, v.dst, np.where(v.accepted, "accepted", "rejected"), v.reason,
                     v.delta, extra)
    paths["graph"] = out_dir / "graph.json"
    write_graph(paths["graph"], outcome.graph)
    paths["config"] = out_dir / "config.toml"
    write_text(paths["config"], to_toml(outcome.config, header=f"closurecheck {__version__}: effective "
                                        f"configuration of the run on {outcome.log.source}\nrerun with "
                                        f"--config this_file"))
    info = summary(outcome)
    if log_path is not None:
        info["log_path"] = str(Path(log_path).resolve())
    if score is not None:
        info["score"] = score
    paths["summary"] = out_dir / "summary.json"
    write_text(paths["summary"], json.dumps(info, indent=1, default=_json_default) + "\n")
    if report:
        from .report import ReportData, build_report, check_thresholds

        data = ReportData(
            log_name=outcome.log.source or "scan log", ids=outcome.keyframes, odom=outcome.odom,
            poses=outcome.poses, scan_points=[outcome.log.points(int(i)) for i in outcome.keyframes],
            verdicts=v, summary=_summary_rows(info), timings=outcome.timings, score=score,
            truth=outcome.log.truth[outcome.keyframes] if outcome.log.has_truth else None,
            config_text=to_toml(outcome.config), notes=list(outcome.notes),
            thresholds=check_thresholds(outcome.config.verify))
        paths["report"] = build_report(out_dir, data)
    return paths


def _json_default(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    raise TypeError(f"not JSON serialisable: {type(v).__name__}")


def _summary_rows(info: dict) -> list:
    return [("scans in the log", info["scans"]), ("keyframes", info["keyframes"]),
            ("largest map correction", f"{info['correction_max_m']:.2f} m"),
            ("mean map correction", f"{info['correction_mean_m']:.2f} m"),
            ("consistent set proven maximum", "yes" if info["consistent_set_exact"] else "no (budget)"),
            ("closurecheck version", info["closurecheck"])]




def write_index(out: Path, outcomes) -> Path:
    """index.html linking the report of each log of a batch run."""
    import html

    out.mkdir(parents=True, exist_ok=True)
    rows = []
    for path, outcome, error in outcomes:
        name = output_name(Path(path))
        if outcome is None:
            rows.append(f"<tr><td>{html.escape(name)}</td><td colspan='4' class='err'>failed: "
                        f"{html.escape(error)}</td></tr>")
            continue
        info = summary(outcome)
        # Without --no-report the report is the page to open; otherwise the summary.
        target = "report.html" if (out / name / "report.html").exists() else "summary.json"
        rows.append(f"<tr><td><a href='{html.escape(name)}/{target}'>{html.escape(name)}</a></td>"
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
