"""Command line: argument parsing and exit codes only; the work lives in the stages.

Exit status: 0 success, 2 bad input or usage, 1 internal error.
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import os
import signal
import sys
import threading
import traceback

from ._version import __version__
from .errors import EXIT_BAD_INPUT, EXIT_DOUBTFUL, EXIT_INTERNAL, EXIT_OK, InputError, one_line

# Exit status when stdout is closed early (``closurecheck info LOG | head -1``):
# 128 + SIGPIPE, what a shell reports for a program stopped by a closed pipe.
EXIT_BROKEN_PIPE = 128 + 13
COMMANDS = ("run", "demo", "score", "info", "simulate", "convert")


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as InputError (exit 2, one line)."""

    def error(self, message):
        # "closurecheck run: ..." would repeat the "closurecheck:" of the error line.
        sub = self.prog.split(" ", 1)[1] if " " in self.prog else ""
        raise InputError(f"{sub}: {message}" if sub else message)


class _Stopped(KeyboardInterrupt):
    """Ctrl-C or SIGTERM: unwinds like KeyboardInterrupt (cleanup runs), remembers which signal."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


@contextlib.contextmanager
def _interrupts():
    """Ctrl-C and SIGTERM stop the run cleanly; a second one stops it at once.

    The first signal raises :class:`_Stopped` where the main thread is:
    the pool's workers are killed, the staging folder is removed, and main
    prints one line.  If that cleanup is itself interrupted, the process
    exits immediately with a message (output folders stay intact; a hidden
    staging folder may remain, and the next run removes it).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def again(signum, frame):
        os.write(2, b"closurecheck: interrupted again; stopped at once (output folders are intact)\n")
        os._exit(EXIT_BAD_INPUT)

    received = []

    def first(signum, frame):
        received.append(signum)
        signal.signal(signal.SIGINT, again)
        signal.signal(signal.SIGTERM, again)
        raise _Stopped(signum)

    old = {sig: signal.signal(sig, first) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        # After a signal the process is on its way out: a further one must
        # still take the quick exit, not Python's default traceback.
        if not received:
            for sig, handler in old.items():
                signal.signal(sig, handler)


def _path_arg(text: str) -> str:
    if not text.strip():
        raise argparse.ArgumentTypeError("must name a path, got an empty string")
    return text


def _pose_arg(text: str):
    parts = text.split(",")
    try:
        vals = [float(p) for p in parts]
    except ValueError:
        vals = []
    if len(vals) != 3:
        raise argparse.ArgumentTypeError(f"expected x,y,theta (metres, metres, radians), got {text!r}")
    return tuple(vals)


def _cmd_info(args) -> int:
    from .pipeline import open_log
    from .reporting.terminal import describe_log

    # What `run` reads, and refused where `run` refuses it.
    log, notes = open_log(args.log, _recording_choice(args))
    lines = [describe_log(log, args.log)] + [f"  {line}" for note in notes for line in note.splitlines()]
    print("\n".join(lines))
    return EXIT_OK


def _cmd_simulate(args) -> int:
    from .io.scanlog import write_scanlog
    from .simulation import simulate

    log = simulate.simulate_log(args.scenario, seed=args.seed, scans=args.scans)
    write_scanlog(args.out, log)
    if not args.quiet:
        print(f"wrote {len(log)} scans of scenario '{args.scenario}' (seed {args.seed}) to {args.out}")
    return EXIT_OK


def _recording_choice(args):
    from .io.inputs import RecordingChoice

    return RecordingChoice(scan_topic=args.scan_topic, odom_topic=args.odom_topic, mount=args.mount,
                           max_odom_gap_s=args.max_odom_gap)


# The main thresholds on the command line: flag, type, metavar, then the
# configuration table and setting it sets (None = top level), and the help.
THRESHOLD_OPTIONS = (
    ("--keyframe-spacing", float, "M", "keyframes", "spacing_m",
     "odometry path length between keyframes (default 0.5 m)"),
    ("--keyframe-turn", float, "RAD", "keyframes", "turn_rad",
     "turn that makes a new keyframe (default 0.349 rad = 20 deg)"),
    ("--odom-translation-noise", float, "M_PER_SQRT_M", "odometry", "translation_m_per_sqrt_m",
     "odometry position noise per sqrt(metre) (default: log header, else 0.03)"),
    ("--odom-heading-noise", float, "RAD_PER_SQRT_M", "odometry", "heading_rad_per_sqrt_m",
     "odometry heading noise per sqrt(metre) (default: log header, else 0.01)"),
    ("--odom-turn-noise", float, "RAD_PER_SQRT_RAD", "odometry", "heading_rad_per_sqrt_rad",
     "odometry heading noise per sqrt(radian turned) (default: log header, else 0.03)"),
    ("--max-candidates", int, "N", "candidates", "max_per_keyframe", "candidates proposed per keyframe at most"),
    ("--min-overlap", float, "FRACTION", "verify", "min_overlap",
     "fraction of points that must match after registration"),
    ("--max-rmse", float, "M", "verify", "max_rmse_m", "largest point-to-line RMS residual after registration"),
    ("--gate-probability", float, "P", "verify", "gate_probability", "chi-square probability of the odometry gate"),
    ("--pair-probability", float, "P", "verify", "pair_probability",
     "chi-square probability of the pairwise cycle test"),
    ("--residual-probability", float, "P", "verify", "residual_probability",
     "chi-square probability of the residual test after optimisation"),
)


def _run_config(args):
    """Defaults, then --config FILE, then the command-line options."""
    from .config import build_config

    updates: dict = {}
    if args.jobs is not None:
        updates["jobs"] = args.jobs
    if args.max_pairs is not None:
        updates["max_pairs"] = args.max_pairs
    for flag, _, _, table, key, _ in THRESHOLD_OPTIONS:
        value = getattr(args, flag[2:].replace("-", "_"))
        if value is not None:
            updates.setdefault(table, {})[key] = value
    return build_config(args.config, updates)


def _cmd_run(args) -> int:
    from .runners.forkserver import start_early

    # Before the pipeline's imports (about 1.1 s: scipy.optimize, scipy.sparse, numba), so that the
    # pool's fork server imports and loads the registration kernels on the other core meanwhile.
    start_early(args.jobs, args.dask)
    from .pipeline import run_paths
    from .reporting.terminal import Progress

    config = _run_config(args)
    progress = Progress(quiet=args.quiet, verbose=args.verbose)
    try:
        if args.also_propose and not args.candidates:
            raise InputError("--also-propose goes with --candidates PAIRS.csv")
        result = run_paths(args.logs, args.out, config, candidates=args.candidates, choice=_recording_choice(args),
                           also_propose=args.also_propose, decisions=args.decisions,
                           dask=args.dask, report=not args.no_report, progress=progress)
    finally:
        progress.close()
    if not args.quiet:
        print(result.text)
    for message in result.errors:
        print(f"closurecheck: error: {message}", file=sys.stderr)
    if result.errors:
        return EXIT_BAD_INPUT
    doubtful = [str(r.path) for r in result.outcomes if r.outcome is not None and not r.outcome.trust.sound]
    if doubtful:
        print(f"closurecheck: doubtful map: {', '.join(doubtful)} (see the report; exit status 3)", file=sys.stderr)
        return EXIT_DOUBTFUL
    return EXIT_OK


def _cmd_demo(args) -> int:
    from .io.inputs import DEMO_LOG

    args.logs = [str(DEMO_LOG)]
    # The run's summary already ends with the report's path.
    return _cmd_run(args)


def _cmd_score(args) -> int:
    from .reporting.scoring import format_score, score_run, write_score

    score = score_run(args.run_dir, log_path=args.log, candidates=args.candidates, choice=_recording_choice(args))
    if args.json:
        write_score(args.json, score)
    if not args.quiet:
        print(format_score(score))
    return EXIT_OK


def _cmd_convert(args) -> int:
    from .io import recordings
    from .io.scanlog import write_scanlog

    opts = recordings.RecordingOptions() if args.max_odom_gap is None else \
        recordings.RecordingOptions(max_odom_gap_s=args.max_odom_gap)
    log, summary = recordings.read_recording(
        args.recording, scan_topic=args.scan_topic, odom_topic=args.odom_topic, mount=args.mount, options=opts)
    write_scanlog(args.out, log, decimals=None)
    if not args.quiet:
        print(summary.describe())
        print(f"wrote {len(log)} scans to {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from .simulation import simulate

    parser = _Parser(prog="closurecheck", description="Verify loop closures in 2D LiDAR scan logs.")
    parser.add_argument("--version", action="version", version=f"closurecheck {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", help="print only errors")
    common.add_argument("-v", "--verbose", action="store_true", help="more detail; tracebacks on errors")
    rec = argparse.ArgumentParser(add_help=False)
    g = rec.add_argument_group("robot recordings (ROS 1 bag, ROS 2 MCAP or SQLite)")
    g.add_argument("--scan-topic", default=None, help="laser scan topic (auto-detected when there is one)")
    g.add_argument("--odom-topic", default=None, help="odometry topic (auto-detected when there is one)")
    g.add_argument("--mount", type=_pose_arg, default=None,
                   help="sensor pose on the robot as x,y,theta (metres, radians); write --mount=-0.1,0,0 "
                        "when it starts with a minus")
    g.add_argument("--max-odom-gap", type=float, default=None, metavar="SECONDS",
                   help="drop scans inside odometry gaps longer than this (default: 0.5 s)")
    runopts = argparse.ArgumentParser(add_help=False)
    runopts.add_argument("--out", required=True, type=_path_arg,
                         help="output directory (created if missing; replaced as a whole when the run is done)")
    runopts.add_argument("--candidates", default=None, metavar="PAIRS.csv", type=_path_arg,
                         help="verify these pairs (columns from,to[,dx,dy,dtheta][,score]) instead of proposing")
    runopts.add_argument("--config", default=None, metavar="FILE.toml", type=_path_arg,
                         help="settings file; a run's own config.toml reproduces it")
    runopts.add_argument("--also-propose", action="store_true",
                         help="with --candidates: verify the file's pairs and the tool's own proposals together")
    runopts.add_argument("--decisions", default=None, metavar="FILE.csv",
                         help="a reviewer's decisions (columns from,to,decision[,note]; decision accept or reject) "
                              "that overrule the checks for those pairs; recorded in config.toml")
    runopts.add_argument("--jobs", type=int, default=None, help="worker processes (default: all cores)")
    runopts.add_argument("--dask", default=None, metavar="ADDRESS",
                         help="run registration on Dask: 'local' or tcp://HOST:PORT (needs the dask extra)")
    runopts.add_argument("--no-report", action="store_true", help="skip report.html (faster)")
    runopts.add_argument("--max-pairs", type=int, default=None, metavar="N",
                         help="refuse to register more than N candidate pairs (default 200000, about half an "
                              "hour with two workers)")
    t = runopts.add_argument_group("main thresholds (all settings: --config)")
    for flag, kind, metavar, _, _, text in THRESHOLD_OPTIONS:
        t.add_argument(flag, type=kind, default=None, metavar=metavar, help=text)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("run", parents=[common, runopts, rec],
                       help="verify loop closures of scan logs and write graph, verdicts and report")
    p.add_argument("logs", nargs="+", metavar="LOG",
                   help="scan log(s), robot recording(s) or folder(s) of them; several give one output "
                        "folder each under --out plus an index page")
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("demo", parents=[common, runopts],
                       help="run the whole job on the shipped demo log")
    p.set_defaults(func=_cmd_demo, scan_topic=None, odom_topic=None, mount=None, max_odom_gap=None)

    p = sub.add_parser("score", parents=[common, rec],
                       help="score a run (or a candidate list) against the log's ground truth, or without truth "
                            "against the run's verdicts (a reference, not the truth)")
    p.add_argument("run_dir", metavar="RUN_DIR", help="output directory of closurecheck run")
    p.add_argument("--log", default=None, type=_path_arg, help="the run's log (default: the one recorded in RUN_DIR)")
    p.add_argument("--candidates", default=None, metavar="PAIRS.csv", type=_path_arg,
                   help="score this candidate list (another front-end's proposals) instead of the run")
    p.add_argument("--json", default=None, metavar="FILE", type=_path_arg,
                   help="also write the scores as JSON (strict JSON: null where a score is undefined)")
    p.set_defaults(func=_cmd_score)

    p = sub.add_parser("info", parents=[common, rec],
                       help="check a scan log or recording as run reads it, and summarise it")
    p.add_argument("log", help="scan log (.jsonl or .jsonl.gz) or robot recording")
    p.set_defaults(func=_cmd_info)

    p = sub.add_parser("simulate", parents=[common], help="write a simulated scan log with ground truth")
    p.add_argument("--out", required=True, type=_path_arg, help="output scan log (.jsonl or .jsonl.gz)")
    p.add_argument("--scenario", default=simulate.DEFAULT_SCENARIO, choices=sorted(simulate.SCENARIOS),
                   help="invented floor plan to drive through (default: %(default)s)")
    p.add_argument("--seed", type=int, default=0, help="random seed; same seed, same log (default: 0)")
    p.add_argument("--scans", type=int, default=None,
                   help="number of scans (default: the scenario's own route length)")
    p.set_defaults(func=_cmd_simulate)

    p = sub.add_parser("convert", parents=[common, rec],
                       help="write a scan log from a robot recording (ROS 1 bag, ROS 2 MCAP or SQLite)")
    p.add_argument("recording", help="recording file or ROS 2 bag folder")
    p.add_argument("--out", required=True, type=_path_arg, help="output scan log (.jsonl or .jsonl.gz)")
    p.set_defaults(func=_cmd_convert)
    return parser


def _stdout_is_broken() -> bool:
    """True when stdout is a pipe whose reader has gone (not some other pipe, e.g. a worker's)."""
    try:
        import select

        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        # The write end of a pipe without a reader reports an error condition.
        return any(ev & select.POLLERR for _, ev in poller.poll(0))
    except (AttributeError, ValueError, OSError):  # no poll (Windows), or stdout is not a real file
        try:
            sys.stdout.flush()
        except BrokenPipeError:
            return True
        except (OSError, ValueError):
            return False
        return False


def _silence_stdout() -> None:
    # Later flushes (at exit) would fail again and print a warning.
    with contextlib.suppress(OSError, ValueError, AttributeError):
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)


def _print_error(text: str) -> None:
    with contextlib.suppress(OSError, ValueError):
        print(text, file=sys.stderr, flush=True)


def main(argv=None) -> int:
    """Entry point of the ``closurecheck`` command; returns the exit status."""
    argv = sys.argv[1:] if argv is None else list(argv)
    verbose = "-v" in argv or "--verbose" in argv
    parser = build_parser()
    if not argv:
        # A bare command: how to use it, not only that something is missing.
        with contextlib.suppress(OSError, ValueError):
            sys.stderr.write(parser.format_usage())
        _print_error(f"closurecheck: error: choose a command: {', '.join(COMMANDS)} "
                     f"(closurecheck --help describes them)")
        return EXIT_BAD_INPUT
    try:
        with _interrupts():
            args = parser.parse_args(argv)
            return int(args.func(args) or EXIT_OK)
    except InputError as exc:
        if verbose:
            traceback.print_exc()
        _print_error(f"closurecheck: error: {exc}")
        return EXIT_BAD_INPUT
    except BrokenPipeError as exc:
        if _stdout_is_broken():
            # The reader of our output stopped early (`| head -1`): not an error to report.
            _silence_stdout()
            return EXIT_BROKEN_PIPE
        return _internal_error(exc, verbose)
    except OSError as exc:
        # Disk full, permission denied, a path that is a file: the user's
        # environment, not a bug; output folders keep their previous content.
        if verbose:
            traceback.print_exc()
        where = f" {one_line(exc.filename, 300)}" if getattr(exc, "filename", None) else ""
        _print_error(f"closurecheck: error: cannot access{where}: {one_line(exc.strerror or exc, 200)}")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt as exc:
        what = "stopped by SIGTERM" if getattr(exc, "signum", None) == signal.SIGTERM else "interrupted"
        _print_error(f"closurecheck: {what}; unfinished outputs were discarded, output folders hold their "
                     f"previous complete run or none (docs/cli.md)")
        if isinstance(exc, _Stopped):
            # Cleaned up and said so: only the interpreter's exit is left, and
            # there Python would put back the default handlers, so a further
            # Ctrl-C would kill the process without a word.  Ignore it instead.
            for sig in (signal.SIGINT, signal.SIGTERM):
                signal.signal(sig, signal.SIG_IGN)
        return EXIT_BAD_INPUT
    except SystemExit as exc:  # --help and --version
        return int(exc.code or 0) if isinstance(exc.code, int) else EXIT_OK
    except Exception as exc:  # noqa: BLE001 - the last line of defence maps to exit 1
        return _internal_error(exc, verbose)


def finish(status: int):
    """End the process with exit status ``status`` after Python's own shutdown steps, without its teardown.

    The ``closurecheck`` command (and ``python -m closurecheck``) ends here.
    Python's exit first waits for other threads and runs the ``atexit``
    handlers (multiprocessing's, logging's, a Dask client's); then it tears
    every module down and frees every object, which after a run's imports
    (scipy, scikit-learn, numba's compiled kernels) took 0.55-1.06 s of the
    5,000-scan runs on the 2-core machine of docs/performance.md (0.05-0.10
    s without), time in which the outputs are long written and the user
    only waits.
    The handler of :func:`_exit_without_teardown`, registered when this
    module is imported and so before any other (it runs last), flushes
    stdout and stderr and leaves there.  Every output file is closed and
    renamed into place before the command returns (closurecheck.io.atomic),
    so the teardown has nothing of ours left to write.

    Examples
    --------
    >>> import subprocess, sys
    >>> code = "from closurecheck.cli import finish; print('written'); finish(3)"
    >>> done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    >>> done.returncode, done.stdout
    (3, 'written\\n')
    """
    _FINISH[:] = [int(status)]
    sys.exit(status)


# The status handed to finish(); empty unless the process ends through it (a test calling main()
# in-process keeps Python's whole exit).
_FINISH: list = []


def _exit_without_teardown() -> None:
    if not _FINISH:
        return
    status = _FINISH[0]
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):
            # Python's own exit reports a failed flush of stdout with status 120.
            if stream is sys.stdout and status == 0:
                status = 120
    os._exit(status)


# Registered at import, before any other handler (no module imported above registers one), so that it
# runs after all of them: atexit calls its handlers last registered first.
atexit.register(_exit_without_teardown)


def console_main() -> None:
    """The ``closurecheck`` command: :func:`main` on ``sys.argv``, then :func:`finish` with its status."""
    finish(main())


def _internal_error(exc: BaseException, verbose: bool) -> int:
    if verbose:
        traceback.print_exc()
    _print_error(f"closurecheck: internal error: {type(exc).__name__}: {one_line(exc, 300)} "
                 f"(rerun with --verbose for details)")
    return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
