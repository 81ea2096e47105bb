"""The whole job, in order: the only module that knows the order of the stages.

scan log -> keyframes -> candidates -> registration -> verification
-> optimised graph -> outputs (graph.json, candidates.csv, config.toml,
summary.json, report.html)
"""

from __future__ import annotations

import dataclasses
import json
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__, se2
from .atomic import write_text
from .candidates import (CandidateOptions, CandidateSet, external_candidates, merge_candidates, prepare,
                         propose_for, proposal_noise)
from .config import merge, to_toml
from .descriptors import DescriptorOptions
from .errors import InputError
from .graphio import PoseGraph, write_graph
from .keyframes import KeyframeOptions, merge_keyframes, select_keyframes
from .odometry import OdometryNoise, keyframe_step_covariances, noise_from_header
from .pairs import ExternalPairs, write_candidates
from .pairwise_registration import PairResults, collect, seeds_for
from .registration import RegistrationOptions
from .scanlog import ScanLog
from .verdicts import VerdictTable
from .verify import Verification, VerifyOptions, closure_covariances, odometry_edges, verify


@dataclass(frozen=True)
class OdometryOverrides:
    """Odometry noise model settings that override the log header's.

    None keeps the value from the log's ``odometry_noise`` header key, or the
    built-in default when the log has none (docs/formats.md).
    """

    translation_m_per_sqrt_m: float | None = None
    heading_rad_per_sqrt_m: float | None = None
    heading_rad_per_sqrt_rad: float | None = None


@dataclass(frozen=True)
class RunConfig:
    """Every setting of a run; one TOML table per stage (docs/configuration.md).

    jobs : worker processes for registration (0 = all cores, 1 = serial).
    batch_pairs : candidate pairs per unit of parallel work.
    """

    jobs: int = 0
    batch_pairs: int = 64
    keyframes: KeyframeOptions = KeyframeOptions()
    odometry: OdometryOverrides = OdometryOverrides()
    descriptors: DescriptorOptions = DescriptorOptions()
    candidates: CandidateOptions = CandidateOptions()
    # Candidates arrive with guesses good to a metre or so (odometry shrunk
    # towards "same place", descriptor yaw), so the coarse search needs a
    # smaller window than registration's own default for arbitrary pairs;
    # a third of the area costs a third of the time.  A fixed 0.01 rad
    # angle step keeps long-range scans (30 m) from multiplying the angles
    # searched; ICP refines the angle anyway.
    registration: RegistrationOptions = RegistrationOptions(coarse_window_m=2.0, coarse_window_rad=0.6,
                                                            coarse_angle_step_rad=0.01)
    verify: VerifyOptions = VerifyOptions()

    def __post_init__(self):
        if self.jobs < 0:
            raise InputError(f"jobs must be >= 0 (0 = all cores), got {self.jobs}")
        if self.batch_pairs < 1:
            raise InputError(f"batch_pairs must be >= 1, got {self.batch_pairs}")


def effective_noise(log: ScanLog, overrides: OdometryOverrides) -> OdometryNoise:
    """The log header's odometry model with the run's overrides applied."""
    base = noise_from_header(log.header, log.source or None)
    changes = {k: v for k, v in dataclasses.asdict(overrides).items() if v is not None}
    return merge(base, changes) if changes else base


@dataclass(frozen=True, eq=False)
class RunOutcome:
    """Everything a run produced, for the writers, the report and tests."""

    log: ScanLog
    config: RunConfig
    keyframes: np.ndarray  # (K,) scan ids, chain order
    odom: np.ndarray  # (K, 3) odometry poses of the keyframes
    step_covariances: np.ndarray  # (K-1, 3, 3)
    candidates: CandidateSet
    registrations: PairResults
    verification: Verification
    verdicts: VerdictTable
    graph: PoseGraph
    timings: dict = field(default_factory=dict)
    notes: tuple = ()

    @property
    def poses(self) -> np.ndarray:
        return self.verification.poses


class _Stages:
    """Times each stage and drives an optional progress callback."""

    def __init__(self, progress):
        self.timings: dict[str, float] = {}
        self.progress = progress

    def run(self, name, fn, *args, **kwargs):
        if self.progress is not None:
            self.progress.stage(name)
        t0 = time.perf_counter()
        out = fn(*args, **kwargs)
        self.timings[name] = self.timings.get(name, 0.0) + time.perf_counter() - t0
        return out


def _register_all(log: ScanLog, cands: CandidateSet, config: RunConfig, runner, progress) -> PairResults:
    ids = np.unique(np.concatenate([cands.src, cands.dst])) if len(cands) else np.zeros(0, np.int64)
    points = {int(i): log.points(int(i)) for i in ids}
    window = config.registration.coarse_window_rad if config.registration.coarse else 0.0
    seeds = [seeds_for(cands.guess[k], cands.yaw[k], window) for k in range(len(cands))]
    if runner is None:
        from .parallel import SerialRunner

        runner = SerialRunner()
    results = runner.register(points, cands.src, cands.dst, seeds, config.registration, config.batch_pairs,
                              progress)
    return collect(results)


def run_log(log: ScanLog, config: RunConfig = RunConfig(), external: ExternalPairs | None = None,
            runner=None, progress=None, also_propose: bool = False) -> RunOutcome:
    """Run the pipeline on a scan log held in memory.

    ``external`` replaces the proposed candidates with the pairs of a CSV
    (contract section 4), or joins them when ``also_propose`` is set.  ``runner`` executes the registration batches
    (serial, local pool or Dask; :mod:`closurecheck.parallel`).
    """
    if len(log) < 2:
        raise InputError("the log needs at least two scans", log.source or None)
    st = _Stages(progress)
    noise = effective_noise(log, config.odometry)

    keyframes = st.run("keyframes", select_keyframes, log.odom, config.keyframes)
    if external is not None:
        keyframes = merge_keyframes(keyframes, external.scan_ids)
    data = st.run("descriptors", prepare, log, keyframes, proposal_noise(noise), config.descriptors)
    if external is not None:
        cands = st.run("candidates", external_candidates, external, data.descriptors, data.chain,
                       config.candidates)
        if also_propose:
            cands = merge_candidates(cands, st.run("candidates", propose_for, data, config.candidates))
    else:
        cands = st.run("candidates", propose_for, data, config.candidates)

    regs = st.run("registration", _register_all, log, cands, config, runner, progress)

    odom = log.odom[keyframes]
    step_cov = keyframe_step_covariances(noise, log.odom, keyframes)
    index = {int(s): k for k, s in enumerate(keyframes)}
    src_idx = np.array([index[int(s)] for s in cands.src], dtype=np.intp)
    dst_idx = np.array([index[int(d)] for d in cands.dst], dtype=np.intp)
    closure_cov = closure_covariances(regs.covariance, config.verify)
    ver = st.run("verification", verify, src_idx, dst_idx, regs.delta, closure_cov, regs.quality(),
                 odom, step_cov, config.verify)

    figures = dict(regs.figures())
    figures.update({k: v for k, v in ver.figures.items()})
    figures["descriptor_distance"] = cands.descriptor_distance
    figures["odometry_gap_m"] = np.hypot(cands.odometry_delta[:, 0], cands.odometry_delta[:, 1])
    verdicts = VerdictTable(src=cands.src, dst=cands.dst, origin=np.asarray(cands.source_names(), dtype=object),
                            accepted=ver.accepted, reason=ver.reason, delta=regs.delta,
                            covariance=closure_cov, figures=figures)
    graph = _graph(log, keyframes, odom, step_cov, ver, verdicts)
    notes = list(ver.notes)
    if external is not None:
        notes.append(f"candidates taken from an external pairs file ({len(external)} pairs)")
    return RunOutcome(log=log, config=config, keyframes=keyframes, odom=odom, step_covariances=step_cov,
                      candidates=cands, registrations=regs, verification=ver, verdicts=verdicts, graph=graph,
                      timings=st.timings, notes=tuple(notes))


def _graph(log, keyframes, odom, step_cov, ver: Verification, v: VerdictTable) -> PoseGraph:
    # The odometry edges are the ones the poses were optimised with: heading
    # drift removed and the covariance calibrated, so that a downstream
    # solver reaches the same optimum.  Nodes keep the input odometry.
    used = odom if ver.odometry_poses is None else ver.odometry_poses
    o_src, o_dst, o_delta, o_info = odometry_edges(used, step_cov * ver.odometry_scale)
    acc = np.flatnonzero(v.accepted)
    l_info = np.linalg.inv(v.covariance[acc]) if len(acc) else np.zeros((0, 3, 3))
    checks = tuple({} for _ in o_src) + tuple(v.checks(int(k)) for k in acc)
    return PoseGraph(
        ids=np.asarray(keyframes, dtype=np.int64), t=log.t[keyframes], poses=ver.poses, odom=odom,
        src=np.concatenate([keyframes[o_src], v.src[acc]]).astype(np.int64),
        dst=np.concatenate([keyframes[o_dst], v.dst[acc]]).astype(np.int64),
        kind=np.array(["odometry"] * len(o_src) + ["loop"] * len(acc), dtype=object),
        delta=np.concatenate([o_delta, v.delta[acc]]),
        information=np.concatenate([o_info, l_info]),
        checks=checks, source=log.source)


def _drift_summary(drift) -> dict:
    deg_per_100m = float(np.degrees(drift.rate_rad_per_m) * 100.0)
    std = float(np.degrees(drift.std_rad_per_m) * 100.0) if np.isfinite(drift.std_rad_per_m) else None
    return {"deg_per_100m": deg_per_100m, "std_deg_per_100m": std, "closures": drift.closures,
            "significant": drift.applied,
            "removed_deg_per_100m": float(np.degrees(drift.removed_rad_per_m) * 100.0)}


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
        "consistent_set_exact": bool(outcome.verification.clique_exact),
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
    extra = {"origin": v.origin}
    extra.update(v.figures)
    cov = v.covariance
    extra.update({"sxx": cov[:, 0, 0], "syy": cov[:, 1, 1], "stt": cov[:, 2, 2]})
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


DEMO_LOG = Path(__file__).resolve().parents[1] / "scans_demo" / "warehouse_demo.jsonl.gz"
_LOG_SUFFIXES = (".jsonl", ".jsonl.gz", ".json.gz", ".bag", ".mcap", ".db3")


def expand_inputs(paths) -> list[Path]:
    """Files to process: each path as given, folders of logs expanded (sorted)."""
    from .recordings import is_recording

    out: list[Path] = []
    for p in map(Path, paths):
        if p.is_dir() and not is_recording(p):
            found = sorted(q for q in p.iterdir()
                           if (q.is_file() and q.name.endswith(_LOG_SUFFIXES)) or (q.is_dir() and is_recording(q)))
            if not found:
                raise InputError("folder holds no scan logs or recordings", p)
            out.extend(found)
        else:
            out.append(p)
    return out


def _stem(path: Path) -> str:
    name = path.name
    for suffix in _LOG_SUFFIXES:
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return path.stem or name


@dataclass(frozen=True)
class BatchResult:
    """What ``closurecheck run`` prints and whether every input succeeded."""

    text: str
    errors: tuple
    outcomes: tuple  # (path, RunOutcome or None, error or None)


def format_summary(info: dict, paths: dict) -> str:
    """The one-screen summary printed at the end of a run."""
    lines = [f"{info['source']}: {info['scans']} scans, {info['keyframes']} keyframes",
             f"  candidates {info['candidates']}: {info['accepted']} verified, {info['rejected']} rejected"]
    rej = {k: v for k, v in info["reasons"].items() if k != "accepted"}
    if rej:
        lines.append("  rejected by " + ", ".join(f"{k} {v}" for k, v in rej.items()))
    lines.append(f"  map correction: up to {info['correction_max_m']:.2f} m (mean {info['correction_mean_m']:.2f} m)")
    lines.append("  time: " + ", ".join(f"{k} {v:.1f} s" for k, v in info["timings_s"].items()))
    for note in info.get("notes", []):
        lines.append(f"  note: {note}")
    for name in ("graph", "candidates", "report"):
        if name in paths:
            lines.append(f"  {name}: {paths[name]}")
    return "\n".join(lines)


def run_one(path, out_dir, config: RunConfig, *, candidates=None, choice=None, runner=None, report=True,
            progress=None, also_propose=False):
    """Load one input, run the pipeline and write its outputs. Returns (outcome, paths, info)."""
    from .inputs import RecordingChoice, load_input
    from .pairs import read_pairs

    if progress is not None:
        progress.stage(f"reading {path}")
    log, load_notes = load_input(path, choice or RecordingChoice())
    for note in load_notes:
        if progress is not None:
            progress.info(note)
    external = read_pairs(candidates, len(log)) if candidates else None
    outcome = run_log(log, config, external=external, runner=runner, progress=progress, also_propose=also_propose)
    if load_notes:
        outcome = dataclasses.replace(outcome, notes=tuple(load_notes) + outcome.notes)
    score = None
    if log.has_truth:
        from .scoring import score_closures

        score = score_closures(log, outcome.keyframes, outcome.verdicts.src, outcome.verdicts.dst,
                               outcome.verdicts.accepted, outcome.verdicts.delta, outcome.verdicts.covariance,
                               outcome.poses)
    if progress is not None:
        progress.stage("writing outputs")
    paths = write_outputs(outcome, out_dir, report=report, score=score, log_path=Path(path))
    return outcome, paths, summary(outcome)


def run_paths(paths, out, config: RunConfig = RunConfig(), *, candidates=None, choice=None, dask=None,
              report=True, progress=None, also_propose=False) -> BatchResult:
    """``closurecheck run``: one input into ``out``, or several into ``out/<name>/``.

    A failing input is reported and does not stop the others; with several
    inputs an ``index.html`` links the reports.
    """
    from .parallel import make_runner

    files = expand_inputs(paths)
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError("output path exists and is not a directory", out)
    if candidates and len(files) > 1:
        raise InputError("--candidates applies to a single log; got several inputs")
    runner = make_runner(config.jobs, dask)
    texts, errors, outcomes = [], [], []
    try:
        for path in files:
            target = out if len(files) == 1 else out / _stem(path)
            try:
                outcome, written, info = run_one(path, target, config, candidates=candidates, choice=choice,
                                                 runner=runner, report=report, progress=progress,
                                                 also_propose=also_propose)
            except InputError as exc:
                if len(files) == 1:
                    raise
                errors.append(str(exc))
                outcomes.append((path, None, str(exc)))
                continue
            texts.append(format_summary(info, written))
            outcomes.append((path, outcome, None))
    finally:
        runner.close()
    if len(files) > 1:
        index = write_index(out, outcomes)
        texts.append(f"{len(files) - len(errors)} of {len(files)} logs done; index: {index}")
    return BatchResult("\n".join(texts), tuple(errors), tuple(outcomes))


def write_index(out: Path, outcomes) -> Path:
    """index.html linking the report of each log of a batch run."""
    import html

    out.mkdir(parents=True, exist_ok=True)
    rows = []
    for path, outcome, error in outcomes:
        name = _stem(Path(path))
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
