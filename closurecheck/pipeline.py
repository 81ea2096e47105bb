"""The whole job, in order: the only module that knows the order of the stages.

scan log -> keyframes -> candidates -> registration -> verification
-> optimised graph -> outputs (graph.json, candidates.csv, config.toml,
summary.json, report.html)
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import OdometryOverrides, RunConfig, merge
from .core.odometry import OdometryNoise, keyframe_step_covariances, noise_from_header
from .errors import InputError
from .frontend.candidates import (
    CandidateSet,
    external_candidates,
    merge_candidates,
    prepare,
    proposal_noise,
    propose_for,
)
from .frontend.keyframes import merge_keyframes, select_keyframes
from .io.graph_file import PoseGraph
from .io.inputs import RecordingChoice, expand_inputs, load_input, output_names
from .io.pairs_csv import ExternalPairs
from .io.scanlog import ScanLog
from .registration.batch import PairResults, collect, seeds_for
from .reporting.outputs import LogRun, RunOutcome, check_run_folder, summary, write_index, write_outputs
from .reporting.terminal import format_summary
from .verification.verdicts import VerdictTable
from .verification.verify import (
    Verification,
    closure_covariances,
    odometry_edges,
    verify,
)


def effective_noise(log: ScanLog, overrides: OdometryOverrides) -> OdometryNoise:
    """The log header's odometry model with the run's overrides applied."""
    base = noise_from_header(log.header, log.source or None)
    changes = {k: v for k, v in dataclasses.asdict(overrides).items() if v is not None}
    return merge(base, changes) if changes else base


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
        from .runners.serial import SerialRunner

        runner = SerialRunner()
    results = runner.register(points, cands.src, cands.dst, seeds, config.registration, config.batch_pairs,
                              progress)
    return collect(results)


def run_log(log: ScanLog, config: RunConfig = RunConfig(), external: ExternalPairs | None = None,
            runner=None, progress=None, also_propose: bool = False) -> RunOutcome:
    """Run the pipeline on a scan log held in memory.

    ``external`` replaces the proposed candidates with the pairs of a CSV
    (docs/formats.md, "Candidate pairs"), or joins them when ``also_propose`` is set.  ``runner`` executes the registration batches
    (serial, local pool or Dask; :mod:`closurecheck.runners`).
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

    if len(cands) > config.max_pairs:
        raise InputError(f"{len(cands)} candidate pairs to register, more than max_pairs = {config.max_pairs} "
                         f"(--max-pairs, docs/cli.md): that would take hours; raise the cap or split the work",
                         log.source or None)
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
    if len(cands) == 0:
        notes.append(_no_candidates_note(log, external, also_propose))
    return RunOutcome(log=log, config=config, keyframes=keyframes, odom=odom, step_covariances=step_cov,
                      candidates=cands, registrations=regs, verification=ver, verdicts=verdicts, graph=graph,
                      timings=st.timings, notes=tuple(notes))


def _no_candidates_note(log: ScanLog, external, also_propose: bool) -> str:
    if external is not None and len(external) == 0 and not also_propose:
        return "the pairs file holds no pairs: nothing was verified and the graph has odometry edges only"
    travel = float(np.hypot(*np.diff(log.odom[:, :2], axis=0).T).sum()) if len(log) > 1 else 0.0
    return (f"no loop-closure candidates: over {travel:.1f} m of odometry the log never came back near a place "
            "it had passed (no revisits), so the graph has odometry edges only")


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


@dataclass(frozen=True)
class BatchResult:
    """What ``closurecheck run`` prints and whether every input succeeded."""

    text: str
    errors: tuple
    outcomes: tuple  # one LogRun per input, in input order


def open_log(path, choice: RecordingChoice | None = None) -> tuple[ScanLog, list[str]]:
    """Read what ``closurecheck run`` and ``info`` read, refusing what they refuse.

    A scan log or a recording (:func:`closurecheck.io.inputs.load_input`),
    with its header's odometry noise model checked as a run uses it.
    Returns (log, notes for the user).
    """
    log, notes = load_input(path, choice or RecordingChoice())
    noise_from_header(log.header, path)
    return log, notes


def run_one(path, out_dir, config: RunConfig, *, candidates=None, choice=None, runner=None, report=True,
            progress=None, also_propose=False):
    """Load one input, run the pipeline and write its outputs. Returns (outcome, paths, info)."""
    from .io.pairs_csv import read_pairs

    if progress is not None:
        progress.stage(f"reading {path}")
    log, load_notes = open_log(path, choice)
    for note in load_notes:
        if progress is not None:
            progress.info(note)
    external = read_pairs(candidates, len(log), max_pairs=config.max_pairs) if candidates else None
    outcome = run_log(log, config, external=external, runner=runner, progress=progress, also_propose=also_propose)
    if load_notes:
        outcome = dataclasses.replace(outcome, notes=tuple(load_notes) + outcome.notes)
    score = None
    if log.has_truth:
        from .reporting.scoring import score_closures

        score = score_closures(log, outcome.keyframes, outcome.verdicts.src, outcome.verdicts.dst,
                               outcome.verdicts.accepted, outcome.verdicts.delta, outcome.verdicts.covariance,
                               outcome.poses)
    if progress is not None:
        progress.stage("writing outputs")
    if progress is not None and len(outcome.candidates) == 0:
        progress.note(outcome.notes[-1])
    paths = write_outputs(outcome, out_dir, report=report, score=score, log_path=Path(path), progress=progress)
    return outcome, paths, summary(outcome)


def run_paths(paths, out, config: RunConfig = RunConfig(), *, candidates=None, choice=None, dask=None,
              report=True, progress=None, also_propose=False) -> BatchResult:
    """``closurecheck run``: one input into ``out``, or several into ``out/<name>/``.

    A failing input is reported and does not stop the others; with several
    inputs an ``index.html`` links the reports.
    """
    from .runners.factory import make_runner

    files = expand_inputs(paths)
    if str(out) == "":
        raise InputError("--out is empty: name the output folder")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError("output path exists and is not a directory", out)
    if candidates and len(files) > 1:
        raise InputError("--candidates applies to a single log; got several inputs")
    names = output_names(files)
    targets = [out] if len(files) == 1 else [out / name for name in names]
    # Before any work: a folder the run could not replace fails now, not after an hour.
    for target in targets:
        check_run_folder(target)
    runner = make_runner(config.jobs, dask)
    texts, errors, outcomes = [], [], []
    try:
        for path, name, target in zip(files, names, targets):
            try:
                outcome, written, info = run_one(path, target, config, candidates=candidates, choice=choice,
                                                 runner=runner, report=report, progress=progress,
                                                 also_propose=also_propose)
            except InputError as exc:
                if len(files) == 1:
                    raise
                errors.append(str(exc))
                outcomes.append(LogRun(Path(path), name, None, str(exc)))
                continue
            texts.append(format_summary(info, written))
            outcomes.append(LogRun(Path(path), name, outcome, None))
    finally:
        runner.close()
    if len(files) > 1:
        index = write_index(out, outcomes)
        texts.append(f"{len(files) - len(errors)} of {len(files)} logs done; index: {index}")
    return BatchResult("\n".join(texts), tuple(errors), tuple(outcomes))


