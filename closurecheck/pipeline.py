"""The whole job, in order: the only module that knows the order of the stages.

scan log -> keyframes -> candidates -> registration -> verification
-> optimised graph -> outputs (graph.json, candidates.csv, config.toml,
summary.json, report.html)
"""

from __future__ import annotations

import dataclasses
import functools
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .calibration.odometry import OdometryCalibration, calibrate, step_pairs
from .config import OdometryOverrides, RunConfig
from .core import se2
from .core.odometry import OdometryChain, OdometryNoise, noise_from_header, odometry_travel
from .core.options import updated
from .errors import InputError
from .frontend.candidates import (
    SOURCE_REVIEW,
    CandidateSet,
    external_candidates,
    merge_candidates,
    prepare,
    proposal_noise,
    propose_for,
)
from .frontend.descriptors import describe
from .frontend.keyframes import merge_keyframes, select_keyframes
from .io.decisions_csv import ReviewDecisions, decision_rows, read_decisions
from .io.graph_file import PoseGraph
from .io.inputs import RecordingChoice, expand_inputs, load_input, output_names
from .io.pairs_csv import ExternalPairs
from .io.scanlog import ScanLog
from .registration.batch import RegisteredClosures, collect, seeds_for
from .runners.work import single_thread_blas
from .reporting.outputs import LogRun, RunOutcome, check_run_folder, summary, write_index, write_outputs
from .reporting.picture_worker import WARM_GROUPS, launch, worth_a_worker
from .reporting.terminal import format_summary
from .verification.free_space import KeyframeScans
from .verification.reasons import Reason
from .verification.trust import judge
from .verification.verdicts import VerdictTable
from .verification.warm import warm_compiler
from .verification.verify import (
    ReviewerVerdicts,
    Verification,
    odometry_edges,
    verify,
)


def effective_noise(log: ScanLog, overrides: OdometryOverrides) -> OdometryNoise:
    """The log header's odometry model with the run's overrides applied."""
    base = noise_from_header(log.header, log.source or None)
    changes = {k: v for k, v in dataclasses.asdict(overrides).items() if v is not None}
    return updated(base, changes) if changes else base


def _one_blas_thread(fn):
    """Run ``fn`` with this process's BLAS on one thread (threadpoolctl; the setting is process-wide).

    The main process's BLAS calls are small or mid-sized (the heading-drift
    fit's dense Cholesky of up to 1,500 closures, the descriptors' SVD) and
    always share the machine with another process of the run (the
    registration workers, the picture worker).  A second BLAS thread then
    waits for a busy core: on 2 cores with the other one busy, the drift
    fit's 1,010 x 1,010 Cholesky took 0.50 s on two threads against 0.026 s
    on one, and verify() on the 5,000-scan warehouse log 1.71-1.86 s
    against 1.23-1.29 s, the same verdicts and covariances (md5).  The
    registration workers already run on one thread each (runners/work.py).
    On one thread the sums no longer depend on the machine's core count; the
    last bits of large ones move (the 100,000-scan log's calibrated chain by
    up to 7e-13 m, docs/performance.md, eighth round).
    """
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with single_thread_blas(blas_only=True):
            return fn(*args, **kwargs)

    return wrapper


class _Stages:
    """Times each stage and drives an optional progress callback."""

    def __init__(self, progress):
        self.timings: dict[str, float] = {}
        self.progress = progress

    def run(self, name, fn, *args, **kwargs):
        if self.progress is not None:
            self.progress.stage(name)
        return self.timed(name, fn, *args, **kwargs)

    def timed(self, name, fn, *args, **kwargs):
        """Run ``fn``, its time counted to stage ``name``, without announcing the stage."""
        t0 = time.perf_counter()
        out = fn(*args, **kwargs)
        self.timings[name] = self.timings.get(name, 0.0) + time.perf_counter() - t0
        return out


def _hold_keyframes(log: ScanLog, keyframes, config: RunConfig, runner):
    """The keyframes' scans, held by the runner for both registration stages (runners.work.HeldScans).

    The calibration and the candidates register the same keyframes with the
    same preparation settings (only the coarse stage differs, which a
    prepared scan does not depend on): held once, the runner's caches (a
    pool's workers with theirs) last from one stage to the other.  The
    candidates' scans are keyframes (pairs files' and reviewer decisions'
    scans join the keyframes).
    """
    if runner is None:
        from .runners.serial import SerialRunner

        runner = SerialRunner()
    return runner.hold({int(i): log.points(int(i)) for i in keyframes}, config.registration)


def _register(scans, src, dst, seeds, options, config: RunConfig, progress) -> RegisteredClosures:
    """Register the pairs (src, dst) of held scan ids from their seeds with the run's runner."""
    fits = scans.register(src, dst, seeds, options, config.batch_pairs, progress)
    return collect(src, dst, fits)


def _register_candidates(scans, cands: CandidateSet, config: RunConfig, progress):
    window = config.registration.coarse_window_rad if config.registration.coarse else 0.0
    seeds = [seeds_for(cands.guess[k], cands.yaw[k], window) for k in range(len(cands))]
    return _register(scans, cands.src, cands.dst, seeds, config.registration, config, progress)


class _AlongCalibration:
    """The main process's own work while the registration workers calibrate the odometry, in a thread.

    During the calibration the main process only waits for the workers, and
    two things it needs later do not depend on the calibration: the
    keyframes' descriptors (about 0.6 s on a 5,000-scan log, numpy's einsum
    releasing the interpreter lock) and numba's first call of the process
    (verification/warm.py, about 0.6 s, until then paid at the start of the
    verification).  Made here, they share the cores with the two workers for
    a second instead of running alone later with one core idle.  So does
    the import of scipy.optimize (the calibration's noise fit, 0.1-0.35 s),
    which the pipeline's own import no longer pays.  The descriptors are the
    same arrays (``describe`` of the same scans).
    """

    def __init__(self, log: ScanLog, keyframes, config: RunConfig):
        self._out: dict = {}
        self._thread = threading.Thread(target=self._work, args=(log, keyframes, config), daemon=True,
                                        name="closurecheck-along-calibration")
        self._thread.start()

    def _work(self, log: ScanLog, keyframes, config: RunConfig) -> None:
        try:
            self._out["descriptors"] = describe(log.ranges[keyframes], log.sensor, config.descriptors)
        except BaseException as exc:  # noqa: BLE001 - raised again in the main thread by descriptors()
            self._out["error"] = exc
            return
        try:
            warm_compiler()
            # The calibration's noise fit (scipy.optimize.nnls) imports it once the steps are
            # registered; imported here, the main process does not wait for it then.
            import scipy.optimize  # noqa: F401
        except Exception:  # noqa: BLE001 - only a head start: the verification meets the same error itself
            pass

    def descriptors(self):
        """The keyframes' descriptors (closurecheck.frontend.descriptors.ScanDescriptors), once made."""
        self._thread.join()
        if "error" in self._out:
            raise self._out["error"]
        return self._out["descriptors"]


def _calibrate(log: ScanLog, keyframes, config: RunConfig, scans, progress) -> OdometryCalibration:
    """Register each keyframe to the next and measure the odometry against those steps."""
    prior = effective_noise(log, config.odometry)
    src, dst = step_pairs(keyframes)
    if config.calibration.enabled:
        # Consecutive keyframes are half a metre apart: the odometry step is a
        # guess good to centimetres, so ICP alone suffices.
        seeds = [se2.between(log.odom[a], log.odom[b])[None] for a, b in zip(src, dst)]
        steps = _register(scans, src, dst, seeds, dataclasses.replace(config.registration, coarse=False), config,
                          progress)
    else:
        steps = collect(src, dst, [None] * len(src))
    cal = calibrate(log.odom, keyframes, steps, prior, config.calibration)
    overrides = {k: v for k, v in dataclasses.asdict(config.odometry).items() if v is not None}
    if overrides and cal.measured:
        # Settings the user gave explicitly win over the fitted noise.
        noise = updated(cal.noise, overrides)
        travel, rotation = odometry_travel(log.odom)
        # Raise each step's variances to the user's model where they are
        # smaller; adding to the diagonal keeps every step positive definite.
        wanted = noise.step_covariance(np.diff(travel[keyframes]), np.diff(rotation[keyframes]))
        steps = cal.chain.steps.copy()
        d = np.arange(3)
        steps[:, d, d] = np.maximum(steps[:, d, d], wanted[:, d, d])
        chain = OdometryChain.from_steps(keyframes, cal.chain.poses, steps)
        cal = dataclasses.replace(cal, noise=noise, chain=chain)
    return cal


def with_decisions(config: RunConfig, path) -> tuple[RunConfig, ReviewDecisions]:
    """Read a reviewer-decisions CSV and record its rows in the configuration (``[review]``).

    The rows are checked now, before any scan is read (scan ids against the
    log later); the effective config.toml then carries them, so
    ``--config DIR/config.toml`` repeats the run with the same decisions.
    """
    decisions = read_decisions(path)
    review = {"decisions": decisions.rows(), "decisions_file": str(Path(path).resolve())}
    return updated(config, {"review": review}), decisions


def review_decisions(config: RunConfig, decisions: ReviewDecisions | None,
                     scan_count: int) -> tuple[RunConfig, ReviewDecisions | None]:
    """The decisions a run applies, and the configuration that records them.

    ``decisions`` (read from a file, with its lines for messages) win over
    the configuration's ``[review] decisions``, and replace them in the
    returned configuration, so that config.toml records what the run
    applied.  Checked against the log's ``scan_count`` scans.
    """
    if decisions is None:
        if not config.review.decisions:
            return config, None
        decisions = decision_rows(config.review.decisions, source="review.decisions")
    elif config.review.decisions != decisions.rows():
        config = updated(config, {"review": {"decisions": decisions.rows(), "decisions_file": decisions.source}})
    if not len(decisions):
        return config, None
    decisions.check_scans(scan_count)
    return config, decisions


def _pair_index(src, dst) -> dict:
    """Unordered pair (lo, hi) -> row."""
    return {(min(a, b), max(a, b)): k for k, (a, b) in enumerate(zip(src.tolist(), dst.tolist()))}


def _frontend_scores(cands: CandidateSet, external: ExternalPairs | None):
    """The pairs file's ``score`` of each candidate (NaN where none), or None without a score column."""
    if external is None or external.score is None:
        return None
    out = np.full(len(cands), np.nan)
    rows = _pair_index(cands.src, cands.dst)
    for a, b, value in zip(external.src.tolist(), external.dst.tolist(), external.score.tolist()):
        out[rows[(min(a, b), max(a, b))]] = value
    return out


def _reviewed_candidates(cands: CandidateSet, decisions: ReviewDecisions, data, config: RunConfig) -> CandidateSet:
    """The candidates plus the decisions' pairs the run did not consider (registered like any candidate)."""
    known = _pair_index(cands.src, cands.dst)
    new = [k for k, (a, b) in enumerate(zip(decisions.src.tolist(), decisions.dst.tolist()))
           if (min(a, b), max(a, b)) not in known]
    if not new:
        return cands
    pairs = ExternalPairs(src=decisions.src[new], dst=decisions.dst[new], guess=np.full((len(new), 3), np.nan),
                          lines=decisions.lines[new], source=decisions.source)
    return merge_candidates(cands, external_candidates(pairs, data.descriptors, data.chain, config.candidates,
                                                       source=SOURCE_REVIEW))


def _review_verdicts(cands: CandidateSet, regs: RegisteredClosures, decisions: ReviewDecisions):
    """Map the decisions onto the candidate rows: (ReviewerVerdicts, (C,) notes).

    An acceptance needs an alignment: a pair that registration could not
    align is refused with the decision's file and line (exit status 2).
    """
    rows = _pair_index(cands.src, cands.dst)
    accept = np.zeros(len(cands), bool)
    reject = np.zeros(len(cands), bool)
    notes = np.full(len(cands), "", dtype=object)
    q = regs.quality
    aligned = (q.valid & q.converged & np.isfinite(regs.delta).all(axis=1)
               & np.isfinite(regs.covariance).all(axis=(1, 2)))
    for a, b, acc, note, line in zip(decisions.src.tolist(), decisions.dst.tolist(), decisions.accept.tolist(),
                                     decisions.note.tolist(), decisions.lines.tolist()):
        k = rows[(min(a, b), max(a, b))]
        if acc and not aligned[k]:
            why = Reason.NO_POINTS if not q.valid[k] else Reason.NOT_CONVERGED
            raise InputError(f"cannot accept pair ({a}, {b}): registration found no alignment for it ({why}: "
                             f"{why.text}); reject the pair or drop the row", decisions.source or None, line)
        accept[k] = acc
        reject[k] = not acc
        notes[k] = note
    return ReviewerVerdicts(accept=accept, reject=reject), notes


def _refuse_too_many(log: ScanLog, cands: CandidateSet, config: RunConfig) -> None:
    """Refuse, before registering them, more candidates than the run's caps allow (InputError)."""
    if len(cands) > config.max_pairs:
        raise InputError(f"{len(cands)} candidate pairs to register, more than max_pairs = {config.max_pairs} "
                         f"(--max-pairs, docs/cli.md): that would take hours; raise the cap or split the work",
                         log.source or None)
    exact_limit = config.verify.max_exact_closures
    if config.verify.pair_window_m is None and len(cands) > exact_limit:
        # Refused now rather than killed for memory after the registration
        # (a 100,000-scan log: 7 minutes of registration, then out of memory
        # in the pairwise test, docs/performance.md).
        pairs = len(cands) * (len(cands) - 1) // 2
        raise InputError(f"{len(cands)} candidate pairs, more than verify.max_exact_closures = {exact_limit}: the "
                         f"exact pairwise consistency test would compare {pairs / 1e9:.1f} billion pairs of closures "
                         f"and keep the failing ones in memory; split the log, or set verify.pair_window_m to test "
                         f"only cycles within that many metres of odometry (the accepted set can then differ from "
                         f"the exact one, docs/verification.md)", log.source or None)


@_one_blas_thread
def run_log(log: ScanLog, config: RunConfig = RunConfig(), external: ExternalPairs | None = None,
            runner=None, progress=None, also_propose: bool = False,
            decisions: ReviewDecisions | None = None, before_verification=None) -> RunOutcome:
    """Run the pipeline on a scan log held in memory.

    ``external`` replaces the proposed candidates with the pairs of a CSV
    (docs/formats.md, "Candidate pairs"), or joins them when
    ``also_propose`` is set.  ``runner`` executes the registration batches
    (serial, local pool or Dask; :mod:`closurecheck.runners`).
    ``decisions`` (default: the configuration's ``[review] decisions``)
    overrule the verifier for the pairs they name (docs/verification.md,
    "Reviewer decisions"); their pairs join the candidates when the run did
    not propose them.  ``before_verification`` (optional, no arguments) is
    called once the candidates are registered and the runner's workers
    released, before the verification: :func:`run_one` starts the report's
    picture worker there (:class:`_PicturesAhead`).
    """
    if len(log) < 2:
        raise InputError("the log needs at least two scans", log.source or None)
    config, decisions = review_decisions(config, decisions, len(log))
    st = _Stages(progress)

    keyframes = st.run("keyframes", select_keyframes, log.odom, config.keyframes)
    if external is not None:
        keyframes = merge_keyframes(keyframes, external.scan_ids)
    if decisions is not None:
        keyframes = merge_keyframes(keyframes, decisions.scan_ids)
    # Held from the calibration to the candidates' registration, released (a pool's workers stopped)
    # before the verification: the candidates reuse the scans the calibration prepared.
    # Reading the keyframes' points is the calibration's (as when it read them itself).
    with st.timed("calibration", _hold_keyframes, log, keyframes, config, runner) as scans:
        along = _AlongCalibration(log, keyframes, config)
        cal = st.run("calibration", _calibrate, log, keyframes, config, scans, progress)
        chain = cal.chain
        # Proposals must reach revisits even where the fitted model is tight: the
        # proximity gate uses at least the default noise.
        travel, rotation = odometry_travel(log.odom)
        lengths, turns = np.diff(travel[keyframes]), np.diff(rotation[keyframes])
        wide = np.maximum(chain.steps, proposal_noise(cal.noise).step_covariance(lengths, turns))
        data = st.run("descriptors", lambda: prepare(log, keyframes, descriptor_options=config.descriptors,
                                                     chain=OdometryChain.from_steps(keyframes, chain.poses, wide),
                                                     descriptors=along.descriptors()))
        if external is not None:
            cands = st.run("candidates", external_candidates, external, data.descriptors, data.chain,
                           config.candidates)
            if also_propose:
                cands = merge_candidates(cands, st.run("candidates", propose_for, data, config.candidates))
        else:
            cands = st.run("candidates", propose_for, data, config.candidates)
        if decisions is not None:
            cands = _reviewed_candidates(cands, decisions, data, config)

        _refuse_too_many(log, cands, config)
        regs = st.run("registration", _register_candidates, scans, cands, config, progress)

    if before_verification is not None:
        before_verification()
    review = notes_review = verifier_reason = None
    if decisions is not None:
        review, notes_review = _review_verdicts(cands, regs, decisions)
        # What the checks alone say, for the verifier_reason column: the
        # same decision without the reviewer (verification is a second or
        # so of a 5,000-scan run, docs/performance.md).
        verifier_reason = st.run("verification", verify, regs, chain, config.verify, None,
                                 KeyframeScans(log.ranges[keyframes], log.sensor), cal.unchecked).reason
    ver = st.run("verification", verify, regs, chain, config.verify, review,
                 KeyframeScans(log.ranges[keyframes], log.sensor), cal.unchecked)
    trust = judge(calibrated=cal.measured, odometry_scale=ver.odometry_scale,
                  drift_rate=ver.heading_drift.rate_rad_per_m, drift_std=ver.heading_drift.std_rad_per_m,
                  drift_closures=ver.heading_drift.closures, clique_exact=ver.clique_exact,
                  contradictions=0 if ver.free_space is None else ver.free_space.count,
                  accepted=int(ver.accepted.sum()), options=config.trust)

    figures = dict(regs.quality.figures())
    figures.update(ver.figures)
    figures["descriptor_distance"] = cands.descriptor_distance
    figures["odometry_gap_m"] = np.hypot(cands.odometry_delta[:, 0], cands.odometry_delta[:, 1])
    verdicts = VerdictTable(src=cands.src, dst=cands.dst, origin=np.asarray(cands.source_names(), dtype=object),
                            accepted=ver.accepted, reason=ver.reason, delta=regs.delta,
                            covariance=ver.closure_covariance, figures=figures,
                            frontend_score=_frontend_scores(cands, external), verifier_reason=verifier_reason,
                            review_note=notes_review)
    graph = _graph(log, chain, ver, verdicts)
    notes = list(cal.notes) + list(ver.notes)
    if external is not None:
        notes.append(f"candidates taken from an external pairs file ({len(external)} pairs)")
    if decisions is not None:
        n_acc = int(review.accept.sum())
        notes.append(f"{len(decisions)} reviewer decision(s) applied ({n_acc} accepted, {len(decisions) - n_acc} "
                     f"rejected, from {config.review.decisions_file or decisions.source}); the verdicts the checks "
                     f"alone give are in candidates.csv's verifier_reason column")
    if len(cands) == 0:
        notes.append(_no_candidates_note(log, external, also_propose))
    return RunOutcome(log=log, config=config, keyframes=keyframes, odom=log.odom[keyframes],
                      step_covariances=ver.odometry_steps,
                      candidates=cands, registrations=regs, verification=ver, verdicts=verdicts, graph=graph,
                      calibration=cal, trust=trust,
                      timings=st.timings, notes=tuple(notes))


def _no_candidates_note(log: ScanLog, external, also_propose: bool) -> str:
    if external is not None and len(external) == 0 and not also_propose:
        return "the pairs file holds no pairs: nothing was verified and the graph has odometry edges only"
    travel = float(np.hypot(*np.diff(log.odom[:, :2], axis=0).T).sum()) if len(log) > 1 else 0.0
    return (f"no loop-closure candidates: over {travel:.1f} m of odometry the log never came back near a place "
            "it had passed (no revisits), so the graph has odometry edges only")


def _graph(log, chain: OdometryChain, ver: Verification, v: VerdictTable) -> PoseGraph:
    # The odometry edges are the ones the poses were optimised with: heading
    # drift removed and the covariance calibrated, so that a downstream
    # solver reaches the same optimum.  Nodes keep the input odometry.
    used = chain.poses if ver.odometry_poses is None else ver.odometry_poses
    o_src, o_dst, o_delta, o_info = odometry_edges(used, ver.odometry_steps * ver.odometry_scale)
    odom = log.odom[chain.ids]
    acc = np.flatnonzero(v.accepted)
    l_info = np.linalg.inv(v.covariance[acc]) if len(acc) else np.zeros((0, 3, 3))
    checks = tuple({} for _ in o_src) + tuple(v.checks(int(k)) for k in acc)
    keyframes = chain.ids
    return PoseGraph(
        ids=keyframes, t=log.t[keyframes], poses=ver.poses, odom=odom,
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


class _PicturesAhead:
    """The report's picture worker, started before the verification and handed the data at the write.

    :meth:`start` is :func:`run_log`'s ``before_verification``: the worker
    (:func:`closurecheck.reporting.picture_worker.launch`, warm) starts and
    imports matplotlib while this process verifies, with one core mostly
    idle, instead of after the files are written.  Not
    started without a report, with ``--jobs 1`` or with both cores busy
    (:func:`~closurecheck.reporting.picture_worker.worth_a_worker`); ended
    on leaving the ``with`` block whatever happened.
    """

    def __init__(self, report: bool, jobs: int):
        self.report, self.jobs = report, jobs
        self.workers: list = []

    @property
    def started(self):
        """The started workers (a list, write_outputs' ``pictures``), or None."""
        return self.workers or None

    def start(self) -> None:
        if self.report and not self.workers and worth_a_worker(self.jobs):
            for names in WARM_GROUPS:
                job = launch(names, warm=True)
                if job is not None:
                    self.workers.append(job)

    def __enter__(self) -> _PicturesAhead:
        return self

    def __exit__(self, *exc) -> None:
        for job in self.workers:
            job.close()


def _write(outcome, log: ScanLog, out_dir, *, report: bool, progress, log_path: Path | None, pictures=None):
    """Score (against the log's truth, or a front-end's pairs against the verdicts), then write the outputs."""
    from .reporting.scoring import score_outcome

    score = score_outcome(outcome)
    if progress is not None:
        progress.stage("writing outputs")
        if len(outcome.candidates) == 0:
            progress.note(outcome.notes[-1])
    return write_outputs(outcome, out_dir, report=report, score=score, log_path=log_path, progress=progress,
                         pictures=pictures)


@_one_blas_thread
def run_one(path, out_dir, config: RunConfig, *, candidates=None, choice=None, runner=None, report=True,
            progress=None, also_propose=False, decisions: ReviewDecisions | None = None):
    """Load one input, run the pipeline and write its outputs. Returns (outcome, paths, info).

    ``decisions``: read by :func:`with_decisions` (which also records them in ``config``).
    """
    from .io.pairs_csv import read_pairs

    if progress is not None:
        progress.stage(f"reading {path}")
    log, load_notes = open_log(path, choice)
    for note in load_notes:
        if progress is not None:
            progress.info(note)
    external = read_pairs(candidates, len(log), max_pairs=config.max_pairs) if candidates else None
    with _PicturesAhead(report, config.jobs) as ahead:
        outcome = run_log(log, config, external=external, runner=runner, progress=progress,
                          also_propose=also_propose, decisions=decisions, before_verification=ahead.start)
        if load_notes:
            outcome = dataclasses.replace(outcome, notes=tuple(load_notes) + outcome.notes)
        paths = _write(outcome, log, out_dir, report=report, progress=progress, log_path=Path(path),
                       pictures=ahead.started)
    return outcome, paths, summary(outcome)


def run(log, out=None, *, config: RunConfig | None = None, candidates=None, jobs: int | None = None,
        report: bool = True, decisions=None) -> RunOutcome:
    """The whole job from Python: what ``closurecheck run LOG --out DIR`` does.

    Parameters
    ----------
    log : a :class:`~closurecheck.io.scanlog.ScanLog`, or the path of a scan
        log or robot recording.
    out : folder for graph.json, candidates.csv, config.toml, summary.json
        and report.html (docs/formats.md); None writes nothing.
    config : the settings (:class:`~closurecheck.config.RunConfig`, e.g.
        from :func:`~closurecheck.config.build_config`); None for defaults.
    candidates : path of a pairs CSV to verify instead of proposing.
    jobs : worker processes for registration (overrides ``config.jobs``;
        0 = all cores, 1 = this process).
    report : also write report.html (when ``out`` is given).
    decisions : path of a reviewer-decisions CSV (columns
        ``from,to,decision[,note]``, docs/formats.md) that overrules the
        verifier for the pairs it names; recorded in ``outcome.config``
        (``[review]``) and so in config.toml.

    Returns
    -------
    RunOutcome : the keyframes, candidates, registrations, verdicts
    (``outcome.verdicts``), optimised keyframe poses (``outcome.poses``, odometry
    frame) and the pose graph written to graph.json (``outcome.graph``).

    Examples
    --------
    >>> import closurecheck
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=60)
    >>> outcome = closurecheck.run(log, jobs=1)
    >>> len(outcome.verdicts) == len(outcome.candidates), outcome.poses.shape[1]
    (True, 3)

    A reviewer's decision on a pair the run did not consider (it is
    registered, then rejected whatever the checks say):

    >>> import pathlib, tempfile
    >>> decisions = pathlib.Path(tempfile.mkdtemp()) / "decisions.csv"
    >>> _ = decisions.write_text("from,to,decision,note\\n50,10,reject,not the same room\\n")
    >>> outcome = closurecheck.run(log, jobs=1, decisions=decisions)
    >>> k = [(int(a), int(b)) for a, b in zip(outcome.verdicts.src, outcome.verdicts.dst)].index((50, 10))
    >>> str(outcome.verdicts.reason[k]), outcome.verdicts.review_note[k]
    ('reviewer_rejected', 'not the same room')
    >>> outcome.config.review.decisions
    ((50, 10, 'reject', 'not the same room'),)
    """
    from .io.pairs_csv import read_pairs
    from .runners.factory import make_runner

    config = config or RunConfig()
    if jobs is not None:
        config = updated(config, {"jobs": jobs})
    review = None
    if decisions is not None:
        config, review = with_decisions(config, decisions)
    log_path = None
    if not isinstance(log, ScanLog):
        log_path = Path(log)
        log, _ = open_log(log_path)
    external = read_pairs(candidates, len(log), max_pairs=config.max_pairs) if candidates else None
    runner = make_runner(config.jobs)
    with _PicturesAhead(report and out is not None, config.jobs) as ahead:
        try:
            outcome = run_log(log, config, external=external, runner=runner, decisions=review,
                              before_verification=ahead.start)
        finally:
            runner.close()
        if out is not None:
            _write(outcome, log, out, report=report, progress=None, log_path=log_path, pictures=ahead.started)
    return outcome


def run_paths(paths, out, config: RunConfig = RunConfig(), *, candidates=None, choice=None, dask=None,
              report=True, progress=None, also_propose=False, decisions=None) -> BatchResult:
    """``closurecheck run``: one input into ``out``, or several into ``out/<name>/``.

    A failing input is reported and does not stop the others; with several
    inputs an ``index.html`` links the reports.  ``decisions`` is the path
    of a reviewer-decisions CSV (one log only).
    """
    from .runners.factory import make_runner

    files = expand_inputs(paths)
    if str(out) == "":
        raise InputError("--out is empty: name the output folder")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError("output path exists and is not a directory", out)
    if candidates and len(files) > 1:
        raise InputError("a candidates file applies to a single log; got several inputs")
    review = None
    if (decisions is not None or config.review.decisions) and len(files) > 1:
        raise InputError("reviewer decisions (--decisions, or [review] decisions in --config) apply to a single "
                         "log; got several inputs")
    if decisions is not None:
        config, review = with_decisions(config, decisions)
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
                                                 also_propose=also_propose, decisions=review)
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


