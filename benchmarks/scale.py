"""Benchmark: the whole run at scale, parallel registration, and ICP against open3d.

1. End to end, per log size: a simulated log (the warehouse route driven
   round and round, ``simulate_log(scenario, seed, scans=N)``) written as
   .jsonl.gz, then read, run (``run_log`` with a local pool of ``--jobs``
   workers), scored against its truth and written (graph.json,
   candidates.csv, summary.json, report.html), as ``closurecheck run`` does.
   Each size runs in a fresh process, so peak memory is that of the run
   alone: the main process's ``ru_maxrss``, and the peak of the summed RSS of
   the whole process tree (main, fork server, workers; sampled every second;
   shared library pages count once per process, so it overstates).
   Stage times are ``RunOutcome.timings`` plus reading, scoring and writing,
   and the process's start ("start": from the parent starting it to the
   log's read, interpreter and imports included, as a user's
   ``closurecheck run`` pays them) and its end ("exit": from the outputs
   written to the process's end, ended as ``closurecheck run`` ends it); the
   total runs from that start to that end.
2. Registration speed-up: the same contiguous block of candidate pairs of
   one log registered by the serial runner and by a pool of 2 workers in one
   process, in the order serial, pool, pool, serial (drift in the machine's
   load hits both alike); the results must be identical.
3. ICP per pair against open3d's ``registration_icp`` (point-to-point,
   planar points with z = 0, one OpenMP thread) on the same pairs in the
   same process: verified closures of the run, the truth delta perturbed by
   N(0, 10 cm) per axis and N(0, 3 deg), max correspondence 0.5 m, at most
   30 iterations (benchmarks/registration.py's settings and open3d call);
   ours is ``register_prepared`` without the coarse stage on scans prepared
   once.  Median of interleaved repeats per pair.

The machine is shared (2 cores, other jobs running): the load average is
recorded before and after every measurement, and CPU seconds beside wall
seconds show how much of the machine the run got.

Writes benchmarks/results/scale.md.  Run from the repository root:

    python benchmarks/scale.py [--sizes 1000 5000 20000] [--jobs 2] [--profile 5000]

The 20,000-scan size takes many minutes; ``--sizes 1000`` is a quick check.

The long log (issue 14, target 3) is behind a flag because it takes many
minutes: ``--long`` adds the 100,000-scan size (about three hours at 10 Hz,
the route driven round and round) with the realistic odometry of the
robustness work (heading bias ``--heading-bias-deg`` per 100 m, default 20
with ``--long``; distance scale error ``--scale-error``, default 2%).
``--pair-window M`` runs the verification with ``verify.pair_window_m = M``
(PCM tests only pairs whose cycle runs through at most M metres of odometry
on each side; off by default, see docs/performance.md).  ``--only-runs``
leaves out the registration speed-up and ICP comparisons; ``--results``
names the output file.  For example:

    python benchmarks/scale.py --sizes 5000 --long --only-runs --results benchmarks/results/scale_long.md
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
RESULTS = Path(__file__).resolve().parent / "results" / "scale.md"

# Targets of the scale work (issue "Scale"); checked here, never by timed tests.
TARGET_5K_S = 60.0
TARGET_RATIO = 1.3
TARGET_PEAK_MB = 2048.0
TARGET_SPEEDUP = 1.7
# Issue 14: 5,000 scans in 20 s; 100,000 scans in 10 min, 4 GB, per scan <= 1.3x that at 5,000.
TARGET_5K_S_NEXT = 20.0
TARGET_100K_S = 600.0
TARGET_100K_PEAK_MB = 4096.0
LONG_SIZE = 100_000

ICP_MAX_CORRESPONDENCE_M = 0.5
ICP_MAX_ITERATIONS = 30
GUESS_NOISE = (0.10, 0.10, 0.0523599)  # 10 cm per axis, 3 degrees


def _load() -> str:
    try:
        return "/".join(f"{v:.1f}" for v in os.getloadavg())
    except OSError:
        return "n/a"


def _rusage_mb() -> float:
    import resource

    # ru_maxrss is kB on Linux, bytes on macOS.
    r = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return r / (1024.0 * 1024.0) if sys.platform == "darwin" else r / 1024.0


def _emit(obj) -> None:
    print("RESULT " + json.dumps(obj), flush=True)


# --------------------------------------------------------------------------- children


class _MemoryByStage:
    """A progress sink for run_log that notes the main process's peak RSS when each stage ends."""

    def __init__(self):
        self.current = None
        self.peaks: dict = {}

    def stage(self, name: str) -> None:
        self.close()
        self.current = name

    def close(self) -> None:
        if self.current is not None:
            self.peaks[self.current] = _rusage_mb()
        self.current = None

    def advance(self, stage, n, total) -> None:
        pass

    def info(self, text) -> None:
        pass


def child_run(args) -> None:
    """End to end on one log, as `closurecheck run` (start, read, run, score, write).

    The time of a run starts when the parent starts this process
    (``CLOSURECHECK_BENCH_SPAWNED``, the parent's ``time.time()``), so that it
    holds the interpreter's start and the imports as a user's ``closurecheck
    run`` does ("start" in the table); the pool's fork server is started
    before the pipeline's imports, as ``closurecheck run`` starts it.
    """
    t_wall0 = time.time()
    spawned = float(os.environ.get(SPAWNED_ENV, t_wall0))
    t_start0 = time.perf_counter() - (t_wall0 - spawned)
    try:
        from closurecheck.runners.forkserver import start_early
    except ImportError:     # an older tree, run side by side: its PoolRunner starts the fork server
        start_early = None
    if start_early is not None:
        start_early(args.jobs, None)
    from closurecheck.config import RunConfig
    from closurecheck.io.inputs import load_input
    from closurecheck.pipeline import run_log
    from closurecheck.reporting.outputs import write_outputs
    from closurecheck.reporting.scoring import score_closures
    from closurecheck.runners.factory import make_runner

    profiler = None
    if args.profile_out:
        from pyinstrument import Profiler

        profiler = Profiler()
        profiler.start()
    cpu0, t0 = time.process_time(), time.perf_counter()
    t_start = t0 - t_start0
    config = RunConfig(jobs=args.jobs)
    if args.pair_window is not None:
        import dataclasses

        config = dataclasses.replace(config, verify=dataclasses.replace(config.verify, pair_window_m=args.pair_window))
    # Made before the log is read, as `closurecheck run` does: a pool's fork server starts (imports,
    # loads the compiled kernels) while this process reads.
    runner = make_runner(config.jobs)
    log, _ = load_input(args.log)
    t_read = time.perf_counter() - t0
    memory = _MemoryByStage()
    memory.peaks["read"] = _rusage_mb()
    try:
        # The report's picture worker started before the verification, as `closurecheck run` starts it.
        from closurecheck.pipeline import _PicturesAhead
    except ImportError:     # an older tree, run side by side: the worker starts at the write
        _PicturesAhead = None
    with contextlib.ExitStack() as stack:
        hook, ahead = {}, None
        if _PicturesAhead is not None:
            ahead = stack.enter_context(_PicturesAhead(not args.no_report, config.jobs))
            hook = {"before_verification": ahead.start}
        try:
            outcome = run_log(log, config, runner=runner, progress=memory, **hook)
        finally:
            runner.close()
        memory.close()
        t1 = time.perf_counter()
        v = outcome.verdicts
        score = score_closures(log, outcome.keyframes, v.src, v.dst, v.accepted, v.delta, v.covariance,
                               outcome.poses)
        t_score = time.perf_counter() - t1
        t2 = time.perf_counter()
        write_outputs(outcome, args.out, report=not args.no_report, score=score, log_path=Path(args.log),
                      **({} if ahead is None else {"pictures": ahead.started}))
        t_write = time.perf_counter() - t2
    memory.peaks["write"] = _rusage_mb()
    total = time.perf_counter() - t_start0
    if profiler is not None:
        profiler.stop()
        Path(args.profile_out).write_text(profiler.output_text(unicode=False, color=False, show_all=False))
    timings = {"start": t_start, "read": t_read, **outcome.timings, "score": t_score, "write": t_write}
    _emit({"scans": len(log), "keyframes": len(outcome.keyframes), "candidates": len(v),
           "accepted": int(v.accepted.sum()), "false_closures": score.get("false_closures"),
           "timings": timings, "total": total, "main_cpu": time.process_time() - cpu0,
           "main_maxrss_mb": _rusage_mb(), "main_peak_by_stage": memory.peaks, "ended": time.time()})
    # The process ends as `closurecheck run` ends (cli.finish: Python's exit without its teardown);
    # the parent times it from "ended" ("exit" in the table).
    try:
        from closurecheck.cli import finish
    except ImportError:     # an older tree, run side by side: Python's whole exit
        return
    finish(0)


def _candidate_block(log, pairs: int):
    """A contiguous block of ``pairs`` candidates from the middle of the log's proposals, with seeds."""
    import numpy as np

    from closurecheck.config import RunConfig
    from closurecheck.frontend.candidates import prepare, proposal_noise, propose_for
    from closurecheck.frontend.keyframes import select_keyframes
    from closurecheck.pipeline import effective_noise
    from closurecheck.registration.batch import seeds_for

    config = RunConfig()
    kf = select_keyframes(log.odom, config.keyframes)
    data = prepare(log, kf, proposal_noise(effective_noise(log, config.odometry)), config.descriptors)
    cands = propose_for(data, config.candidates)
    start = max(0, (len(cands) - pairs) // 2)
    sel = np.arange(start, min(len(cands), start + pairs))
    window = config.registration.coarse_window_rad
    seeds = [seeds_for(cands.guess[k], cands.yaw[k], window) for k in sel]
    src, dst = cands.src[sel], cands.dst[sel]
    points = {int(i): log.points(int(i)) for i in np.union1d(src, dst)}
    return config, points, src, dst, seeds, len(cands)


def child_speedup(args) -> None:
    """Registration of one block of pairs: serial, pool of ``--jobs``, pool, serial."""
    import numpy as np

    from closurecheck.io.inputs import load_input
    from closurecheck.runners.pool import PoolRunner
    from closurecheck.runners.serial import SerialRunner

    log, _ = load_input(args.log)
    config, points, src, dst, seeds, total = _candidate_block(log, args.pairs)
    runs = []
    results = {}
    profile = None
    for name in ("serial", "pool", "pool", "serial") * args.rounds:
        runner = SerialRunner() if name == "serial" else PoolRunner(args.jobs)
        load = _load()
        profiler = None
        if args.profile_out and name == "serial" and profile is None:
            from pyinstrument import Profiler

            profiler = Profiler()
            profiler.start()
        cpu0, t0 = time.process_time(), time.perf_counter()
        out = runner.register(points, src, dst, seeds, config.registration, config.batch_pairs)
        wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
        if profiler is not None:
            profiler.stop()
            profile = profiler.output_text(unicode=False, color=False, show_all=False)
        runs.append({"runner": name, "wall": wall, "main_cpu": cpu, "load": load, "builds": runner.last_builds})
        results.setdefault(name, out)
    same = all((a is None and b is None) or (a is not None and b is not None and
                                               all(np.array_equal(x, y) for x, y in zip(a, b)))
               for a, b in zip(results["serial"], results["pool"]))
    if profile is not None:
        Path(args.profile_out).write_text(profile)
    _emit({"pairs": len(src), "of": total, "scans": len(points), "runs": runs, "identical": bool(same),
           "jobs": args.jobs})


def child_icp(args) -> None:
    """ICP per pair, ours vs open3d point-to-point, on verified closures of a run."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import csv
    import statistics

    import numpy as np
    from registration import (  # benchmarks/registration.py (sets OMP threads)
        _cloud,
        errors,
        open3d_icp,
    )

    from closurecheck.core import se2
    from closurecheck.io.inputs import load_input
    from closurecheck.registration.icp import (
        RegistrationOptions,
        prepare_scan,
        register_prepared,
    )

    log, _ = load_input(args.log)
    with open(Path(args.run_dir) / "candidates.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["verdict"] == "accepted"]
    rng = np.random.default_rng(args.seed)
    if len(rows) > args.pairs:
        rows = [rows[k] for k in sorted(rng.choice(len(rows), args.pairs, replace=False))]
    opt = RegistrationOptions(coarse=False, max_correspondence_m=ICP_MAX_CORRESPONDENCE_M,
                              max_iterations=ICP_MAX_ITERATIONS)
    out = []
    for r in rows:
        a, b = int(r["from"]), int(r["to"])
        pa, pb = log.points(a), log.points(b)
        truth = se2.between(log.truth[a], log.truth[b])
        guess = truth + rng.normal(0.0, GUESS_NOISE)
        t0 = time.perf_counter()
        tgt, src = prepare_scan(pa, opt, grid=False), prepare_scan(pb, opt, grid=False)
        prep = (time.perf_counter() - t0) / 2
        ca, cb = _cloud(pa), _cloud(pb)
        ours_t, ref_t = [], []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            res = register_prepared(src, tgt, guess, opt)
            ours_t.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            ref = open3d_icp(cb, ca, guess)
            ref_t.append(time.perf_counter() - t0)
        out.append([*errors(res.delta, truth), *errors(ref, truth), statistics.median(ours_t),
                    statistics.median(ref_t), prep, len(pa), len(pb)])
    _emit({"rows": out})


# --------------------------------------------------------------------------- parent


# The parent's time.time() when it started a child: a run's time starts there (child_run).
SPAWNED_ENV = "CLOSURECHECK_BENCH_SPAWNED"


def _run_child(argv: list, sample_s: float = 1.0) -> dict:
    """Run this script as a child; peak summed RSS and CPU of its process tree; its RESULT."""
    import psutil  # comes with dask[distributed]; only this benchmark uses it

    cmd = [sys.executable, str(Path(__file__).resolve()), *map(str, argv)]
    load_before = _load()
    t0 = time.perf_counter()
    env = {**os.environ, SPAWNED_ENV: repr(time.time())}
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=str(ROOT), env=env)
    root = psutil.Process(proc.pid)
    peak_tree, peak_proc, cpu_seen = 0, 0, {}
    while True:
        total = 0
        try:
            procs = [root, *root.children(recursive=True)]
        except psutil.Error:
            procs = []
        for p in procs:
            try:
                rss = p.memory_info().rss
                ct = p.cpu_times()
            except psutil.Error:
                continue
            total += rss
            peak_proc = max(peak_proc, rss)
            cpu_seen[p.pid] = max(cpu_seen.get(p.pid, 0.0), ct.user + ct.system)
        peak_tree = max(peak_tree, total)
        try:
            # Returns as the child ends (not up to a sample later), so that its exit is timed.
            proc.wait(timeout=sample_s)
            break
        except subprocess.TimeoutExpired:
            pass
    ended = time.time()
    stdout, stderr = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"child {' '.join(cmd)} failed ({proc.returncode}):\n{stderr[-3000:]}")
    result = next(json.loads(line[len("RESULT "):]) for line in stdout.splitlines() if line.startswith("RESULT "))
    if "ended" in result:
        # The interpreter's exit after the outputs are written: the user waits for it too.
        result["timings"]["exit"] = max(0.0, ended - result["ended"])
        result["total"] += result["timings"]["exit"]
    result.update({"tree_peak_mb": peak_tree / 2**20, "proc_peak_mb": peak_proc / 2**20,
                   "tree_cpu_s": sum(cpu_seen.values()), "child_wall_s": wall, "load_before": load_before,
                   "load_after": _load()})
    return result


def _wait_for_quiet(limit_s: float) -> float:
    """Wait until the 1-minute load average is below 1, at most ``limit_s``; returns the seconds waited."""
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < limit_s:
        try:
            if os.getloadavg()[0] < 1.0:
                break
        except OSError:
            break
        time.sleep(5.0)
    return time.perf_counter() - t0


def _make_log(path: Path, scenario: str, seed: int, scans: int, bias_deg: float | None = None,
              scale_error: float | None = None) -> float:
    import dataclasses

    import numpy as np

    from closurecheck.io.scanlog import write_scanlog
    from closurecheck.simulation.simulate import DEFAULT_OPTIONS, simulate_log

    options = DEFAULT_OPTIONS
    if bias_deg is not None:
        options = dataclasses.replace(options, odom_heading_bias_rad_per_m=float(np.deg2rad(bias_deg)) / 100.0)
    if scale_error is not None:
        options = dataclasses.replace(options, odom_distance_scale_error=scale_error)
    t0 = time.perf_counter()
    write_scanlog(path, simulate_log(scenario, seed=seed, scans=scans, options=options))
    return time.perf_counter() - t0


def _peak(r: dict) -> float:
    return max(r["tree_peak_mb"], r["main_maxrss_mb"])


def _fmt(x, nd=1):
    return "n/a" if x is None else f"{x:.{nd}f}"


STAGES = ("start", "read", "keyframes", "calibration", "descriptors", "candidates", "registration", "verification",
          "score", "write", "exit")


def render(args, runs: dict, speed: dict | None, icp: dict | None, profiles: dict, elapsed: float) -> str:
    import numpy as np
    import scipy

    lines = [
        "# Scale benchmark",
        "",
        f"`python benchmarks/scale.py {' '.join(sys.argv[1:])}`".replace("  ", " "),
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores shared with other jobs (load averages "
        "1/5/15 min are given beside each measurement), Python {}, numpy {}, scipy {}.  Scenario "
        f"'{args.scenario}' seed {args.seed}; {args.jobs} worker processes; odometry: "
        f"{_odometry_text(args)}; PCM window: "
        f"{'none (every pair)' if args.pair_window is None else f'{args.pair_window:g} m'}; whole benchmark "
        f"{elapsed / 60:.0f} min.".format(platform.python_version(), np.__version__, scipy.__version__),
        "",
        "## End to end per log size",
        "",
        "Start a Python process (interpreter and imports, the pool's fork server started first, as "
        "`closurecheck run` does: 'start'), read the .jsonl.gz log, run every stage, score against the truth, "
        "write graph.json, "
        "candidates.csv, summary.json" + ("" if args.no_report else " and report.html") +
        ", end the process as `closurecheck run` ends ('exit', timed by the parent); one fresh process per "
        "size.  Times in seconds (wall).  'CPU s' is the CPU time of the "
        "whole process tree (main, fork server, workers); CPU / (wall x cores) below 1 means the run "
        "waited for the machine, not for itself.  Peak memory: the main process's ru_maxrss, and the "
        "peak of the summed RSS of the process tree (sampled every second; shared pages counted once per "
        "process).",
        "",
        "| scans | keyframes | candidates | verified | " + " | ".join(STAGES) +
        " | total | ms / scan | CPU s | main peak MB | tree peak MB | peak MB | load before / after |",
        "|" + "---|" * (4 + len(STAGES) + 7),
    ]
    for n in sorted(runs):
        r = runs[n]
        t = r["timings"]
        lines.append(
            f"| {r['scans']} | {r['keyframes']} | {r['candidates']} | {r['accepted']} | "
            + " | ".join(_fmt(t.get(s), 1 if t.get(s, 0) >= 1 else 2) for s in STAGES)
            + f" | **{r['total']:.1f}** | {1e3 * r['total'] / r['scans']:.2f} | {r['tree_cpu_s']:.0f} | "
              f"{r['main_maxrss_mb']:.0f} | {r['tree_peak_mb']:.0f} | **{_peak(r):.0f}** | "
              f"{r['load_before']} / {r['load_after']} |")
    lines += ["", "'peak MB' is the larger of the two peaks (the sampled tree can miss the main process's "
              "own peak, reached after the workers have gone).  Main process peak RSS (MB) by the end of each "
              "stage:", ""]
    for n in sorted(runs):
        by = runs[n].get("main_peak_by_stage", {})
        lines.append(f"- {n} scans: " + ", ".join(f"{k} {v:.0f}" for k, v in by.items()))
    lines.append("")
    reg_pair = {n: runs[n]["timings"]["registration"] / max(1, runs[n]["candidates"]) for n in runs}
    lines.append("Registration per candidate pair (wall, with the pool): "
                 + ", ".join(f"{n} scans {1e3 * reg_pair[n]:.0f} ms" for n in sorted(runs)) + ".")
    lines += ["", "## Targets", "", "| target | measured | verdict |", "|---|---|---|"]

    def verdict(ok):
        return "met" if ok else "**missed**"

    if 5000 in runs:
        t5 = runs[5000]["total"]
        lines.append(f"| 5,000 scans end to end <= {TARGET_5K_S:.0f} s with {args.jobs} workers | {t5:.1f} s | "
                     f"{verdict(t5 <= TARGET_5K_S)} |")
    if 5000 in runs and 20000 in runs:
        a, b = runs[5000], runs[20000]
        ratio = (b["total"] / b["scans"]) / (a["total"] / a["scans"])
        lines.append(f"| time per scan 20,000 / 5,000 <= {TARGET_RATIO} | {ratio:.2f} | "
                     f"{verdict(ratio <= TARGET_RATIO)} |")
        for s in ("registration", "verification"):
            rs = (b["timings"][s] / b["scans"]) / (a["timings"][s] / a["scans"])
            lines.append(f"| (the same ratio for the {s} stage) | {rs:.2f} | |")
    if 5000 in runs:
        t5 = runs[5000]["total"]
        lines.append(f"| (issue 14) 5,000 scans end to end <= {TARGET_5K_S_NEXT:.0f} s | {t5:.1f} s | "
                     f"{verdict(t5 <= TARGET_5K_S_NEXT)} |")
    if LONG_SIZE in runs:
        r = runs[LONG_SIZE]
        lines.append(f"| (issue 14) 100,000 scans end to end <= {TARGET_100K_S / 60:.0f} min | {r['total']:.0f} s | "
                     f"{verdict(r['total'] <= TARGET_100K_S)} |")
        lines.append(f"| (issue 14) peak memory at 100,000 scans <= {TARGET_100K_PEAK_MB / 1024:.0f} GB | "
                     f"{_peak(r):.0f} MB | {verdict(_peak(r) <= TARGET_100K_PEAK_MB)} |")
        if 5000 in runs:
            a = runs[5000]
            ratio = (r["total"] / r["scans"]) / (a["total"] / a["scans"])
            lines.append(f"| (issue 14) time per scan 100,000 / 5,000 <= {TARGET_RATIO} | {ratio:.2f} | "
                         f"{verdict(ratio <= TARGET_RATIO)} |")
    if 20000 in runs:
        pk = _peak(runs[20000])
        lines.append(f"| peak memory at 20,000 scans <= {TARGET_PEAK_MB / 1024:.0f} GB | {pk:.0f} MB | "
                     f"{verdict(pk <= TARGET_PEAK_MB)} |")
    if speed is not None:
        lines.append(f"| {args.jobs} workers >= {TARGET_SPEEDUP}x faster than 1 on registration | "
                     f"{speed['speedup']:.2f}x | {verdict(speed['speedup'] >= TARGET_SPEEDUP)} |")
    if speed is not None:
        r = speed["result"]
        lines += ["", f"## Registration with 1 and with {args.jobs} workers", "",
                  f"{r['pairs']} contiguous candidate pairs (of {r['of']}) of the {speed['size']}-scan log, "
                  f"{r['scans']} scans; started after waiting {speed['waited']:.0f} s for the load average to "
                  f"fall below 1 (at most {args.quiet_wait:.0f} s); one process, runs in the order below "
                  "('scans prepared': over all workers; each worker prepares the scans its batches need and "
                  "keeps the last 256).  The pool's time includes starting its workers and sending them the "
                  "scans.  Results identical to the serial run: "
                  f"**{'yes' if r['identical'] else 'NO'}**.", "",
                  "| run | runner | wall s | ms / pair | scans prepared | load before |", "|---|---|---|---|---|---|"]
        for k, run in enumerate(r["runs"]):
            lines.append(f"| {k + 1} | {run['runner']} | {run['wall']:.1f} | {1e3 * run['wall'] / r['pairs']:.1f} | "
                         f"{run['builds']} | {run['load']} |")
        lines += ["", f"Speed-up (median serial wall / median pool wall): **{speed['speedup']:.2f}x**; "
                  f"serial CPU time in the main process {speed['serial_cpu']:.1f} s for {speed['serial_wall']:.1f} s "
                  f"wall ({100 * speed['serial_cpu'] / speed['serial_wall']:.0f}% of one core; below 100% the "
                  "rest went to other jobs on the machine)."]
    if icp is not None:
        rows = np.array(icp["rows"], float)
        ours, ref = rows[:, 4], rows[:, 5]
        lines += ["", f"## ICP per pair: ours vs open3d point-to-point ({len(rows)} pairs)", "",
                  f"Verified closures of the {icp['size']}-scan run (real scans of the log, "
                  f"{rows[:, 7].mean():.0f} and {rows[:, 8].mean():.0f} points on average), the truth delta "
                  "perturbed by N(0, 10 cm) per axis and N(0, 3 deg); max correspondence "
                  f"{ICP_MAX_CORRESPONDENCE_M} m, at most {ICP_MAX_ITERATIONS} iterations, one thread each; "
                  f"median of {args.repeats} interleaved repeats per pair.  Ours: `register_prepared` with the "
                  "coarse stage off (ICP and covariance) on scans prepared once.", "",
                  "| | ours (point-to-line) | open3d (point-to-point) |", "|---|---|---|",
                  f"| median time per pair | {1e3 * np.median(ours):.2f} ms | {1e3 * np.median(ref):.2f} ms |",
                  f"| mean time per pair | {1e3 * ours.mean():.2f} ms | {1e3 * ref.mean():.2f} ms |",
                  f"| median translation error | {100 * np.median(rows[:, 0]):.2f} cm | "
                  f"{100 * np.median(rows[:, 2]):.2f} cm |",
                  f"| median rotation error | {np.median(rows[:, 1]):.3f} deg | {np.median(rows[:, 3]):.3f} deg |",
                  "",
                  f"Time ratio ours / open3d: **{ours.sum() / ref.sum():.2f}** (total), "
                  f"{np.median(ours / ref):.2f} (median per pair).  Preparing a scan (no grid) takes "
                  f"{1e3 * np.median(rows[:, 6]):.2f} ms median, once per scan.  The pipeline's full "
                  "registration of a candidate (coarse search from every seed, ICP, covariance) costs "
                  "more per pair: see 'Registration per candidate pair' above."]
    for title, text in profiles.items():
        lines += ["", f"## Profile: {title}", "", "```", text.strip(), "```"]
    return "\n".join(lines) + "\n"


def _odometry_text(args) -> str:
    bias = "simulator default (2.3 deg / 100 m)" if args.heading_bias_deg is None else \
        f"heading bias {args.heading_bias_deg:g} deg / 100 m"
    scale = "scale error 0.2% (default)" if args.scale_error is None else f"scale error {args.scale_error:.1%}"
    return f"{bias}, {scale}"


def _trim_profile(text: str, max_lines: int = 60) -> str:
    body = [ln for ln in text.splitlines() if ln.strip()]
    return "\n".join(body[:max_lines])


def _publish(args, text: str) -> None:
    """Print the results and, unless --no-write, write them to --results (default benchmarks/results/scale.md)."""
    print(text)
    if not args.no_write:
        out_path = Path(args.results) if args.results else RESULTS
        out_path.parent.mkdir(parents=True, exist_ok=True)
        out_path.write_text(text)
        print(f"wrote {out_path}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 5000, 20000], help="log sizes in scans")
    ap.add_argument("--scenario", default="warehouse")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--jobs", type=int, default=2, help="worker processes of the runs")
    ap.add_argument("--speedup-size", type=int, default=None,
                    help="log size of the speed-up test (default: 5000 if measured, else the largest)")
    ap.add_argument("--speedup-pairs", type=int, default=400, help="candidate pairs of the speed-up test")
    ap.add_argument("--rounds", type=int, default=2, help="rounds of serial, pool, pool, serial in the speed-up test")
    ap.add_argument("--quiet-wait", type=float, default=180.0, metavar="SECONDS",
                    help="before the speed-up test, wait up to this long for the 1-minute load average to "
                         "fall below 1 (other jobs on the machine)")
    ap.add_argument("--icp-pairs", type=int, default=100, help="pairs of the ICP comparison")
    ap.add_argument("--repeats", type=int, default=5, help="timings per pair in the ICP comparison")
    ap.add_argument("--profile", type=int, default=None, metavar="SIZE",
                    help="also profile (pyinstrument) an end-to-end run and a serial registration of this size")
    ap.add_argument("--no-report", action="store_true", help="leave report.html out of the end-to-end runs")
    ap.add_argument("--work", default=None, help="folder for the logs and outputs (kept; logs reused)")
    ap.add_argument("--no-write", action="store_true", help="print only")
    # Children (internal).
    ap.add_argument("--long", action="store_true",
                    help=f"add the {LONG_SIZE:,}-scan size with realistic odometry (takes many minutes)")
    ap.add_argument("--heading-bias-deg", type=float, default=None,
                    help="odometry heading bias in degrees per 100 m (default: the simulator's; 20 with --long)")
    ap.add_argument("--scale-error", type=float, default=None,
                    help="odometry distance scale error (default: the simulator's; 0.02 with --long)")
    ap.add_argument("--pair-window", type=float, default=None, metavar="M",
                    help="verify.pair_window_m of the runs (default: every PCM pair)")
    ap.add_argument("--only-runs", action="store_true", help="end-to-end runs only (no speed-up, ICP)")
    ap.add_argument("--results", default=None, help="output file (default benchmarks/results/scale.md)")
    ap.add_argument("--child", choices=("run", "speedup", "icp"), help=argparse.SUPPRESS)
    ap.add_argument("--log", help=argparse.SUPPRESS)
    ap.add_argument("--out", help=argparse.SUPPRESS)
    ap.add_argument("--run-dir", help=argparse.SUPPRESS)
    ap.add_argument("--pairs", type=int, help=argparse.SUPPRESS)
    ap.add_argument("--profile-out", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args.child == "run":
        return child_run(args)
    if args.child == "speedup":
        return child_speedup(args)
    if args.child == "icp":
        return child_icp(args)

    t_start = time.perf_counter()
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="closurecheck-scale-"))
    work.mkdir(parents=True, exist_ok=True)
    if args.long:
        args.sizes = list(args.sizes) + [LONG_SIZE]
        args.heading_bias_deg = 20.0 if args.heading_bias_deg is None else args.heading_bias_deg
        args.scale_error = 0.02 if args.scale_error is None else args.scale_error
    sizes = sorted(set(args.sizes))
    odo_tag = "" if args.heading_bias_deg is None and args.scale_error is None else \
        f"_bias{args.heading_bias_deg}_scale{args.scale_error}"
    logs = {}
    for n in sizes:
        path = work / f"{args.scenario}_seed{args.seed}{odo_tag}_{n}.jsonl.gz"
        if not path.exists():
            dt = _make_log(path, args.scenario, args.seed, n, args.heading_bias_deg, args.scale_error)
            print(f"simulated {n} scans in {dt:.0f} s -> {path}", flush=True)
        logs[n] = path

    runs = {}
    for n in sizes:
        out = work / f"run_{n}"
        argv_c = ["--child", "run", "--log", logs[n], "--jobs", args.jobs, "--out", out]
        if args.no_report:
            argv_c.append("--no-report")
        if args.pair_window is not None:
            argv_c += ["--pair-window", args.pair_window]
        runs[n] = _run_child(argv_c)
        r = runs[n]
        print(f"{n} scans: total {r['total']:.1f} s " + ", ".join(f"{k} {v:.1f}" for k, v in r["timings"].items())
              + f"; tree peak {r['tree_peak_mb']:.0f} MB; load {r['load_before']} -> {r['load_after']}", flush=True)

    if args.only_runs:
        _publish(args, render(args, runs, None, None, {}, time.perf_counter() - t_start))
        return None
    ref_size = args.speedup_size or (5000 if 5000 in logs else sizes[-1])
    if ref_size not in logs:
        raise SystemExit(f"--speedup-size {ref_size} is not among --sizes")
    waited = _wait_for_quiet(args.quiet_wait)
    res = _run_child(["--child", "speedup", "--log", logs[ref_size], "--pairs", args.speedup_pairs,
                      "--jobs", args.jobs, "--rounds", args.rounds])
    serial = [r for r in res["runs"] if r["runner"] == "serial"]
    pool = [r for r in res["runs"] if r["runner"] == "pool"]
    import statistics

    s_wall = statistics.median(r["wall"] for r in serial)
    speed = {"size": ref_size, "result": res, "speedup": s_wall / statistics.median(r["wall"] for r in pool),
             "waited": waited,
             "serial_wall": s_wall, "serial_cpu": statistics.median(r["main_cpu"] for r in serial)}
    print(f"speed-up {speed['speedup']:.2f}x on {res['pairs']} pairs; identical {res['identical']}", flush=True)

    icp = _run_child(["--child", "icp", "--log", logs[ref_size], "--run-dir", work / f"run_{ref_size}",
                      "--pairs", args.icp_pairs, "--repeats", args.repeats, "--seed", args.seed])
    icp["size"] = ref_size

    profiles = {}
    if args.profile:
        if args.profile not in logs:
            raise SystemExit(f"--profile {args.profile} is not among --sizes")
        pfile = work / f"profile_run_{args.profile}.txt"
        _run_child(["--child", "run", "--log", logs[args.profile], "--jobs", args.jobs, "--out",
                    work / f"profiled_{args.profile}", "--profile-out", pfile, "--no-report"])
        profiles[f"end to end, {args.profile} scans, main process (workers' time shows as waiting)"] = \
            _trim_profile(pfile.read_text())
        sfile = work / f"profile_serial_{args.profile}.txt"
        _run_child(["--child", "speedup", "--log", logs[args.profile], "--pairs", min(args.speedup_pairs, 200),
                    "--jobs", args.jobs, "--profile-out", sfile])
        profiles[f"serial registration of {min(args.speedup_pairs, 200)} candidate pairs, {args.profile} scans"] = \
            _trim_profile(sfile.read_text())

    _publish(args, render(args, runs, speed, icp, profiles, time.perf_counter() - t_start))


if __name__ == "__main__":
    main()
