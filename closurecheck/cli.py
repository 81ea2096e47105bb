"""Command line: argument parsing and exit codes only; the work lives in the stages.

Exit status: 0 success, 2 bad input or usage, 1 internal error.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from pathlib import Path

from ._version import __version__
from .errors import EXIT_BAD_INPUT, EXIT_DOUBTFUL, EXIT_INTERNAL, EXIT_OK, InputError


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as InputError (exit 2, one line)."""

    def error(self, message):
        raise InputError(f"{self.prog}: {message}")


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
    from .io.scanlog import read_scanlog
    from .reporting.terminal import describe_log

    print(describe_log(read_scanlog(args.log), args.log))
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
    for flag, _, _, table, key, _ in THRESHOLD_OPTIONS:
        value = getattr(args, flag[2:].replace("-", "_"))
        if value is not None:
            updates.setdefault(table, {})[key] = value
    return build_config(args.config, updates)


def _cmd_run(args) -> int:
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
    doubtful = [str(path) for path, outcome, _ in result.outcomes if outcome is not None and not outcome.trust.sound]
    if doubtful:
        print(f"closurecheck: doubtful map: {', '.join(doubtful)} (see the report; exit status 3)", file=sys.stderr)
        return EXIT_DOUBTFUL
    return EXIT_OK


def _cmd_demo(args) -> int:
    from .io.inputs import DEMO_LOG

    args.logs = [str(DEMO_LOG)]
    code = _cmd_run(args)
    if code == EXIT_OK:
        print(f"report: {Path(args.out).resolve() / 'report.html'}")
    return code


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
    runopts.add_argument("--out", required=True, help="output directory (created if missing)")
    runopts.add_argument("--candidates", default=None, metavar="PAIRS.csv",
                         help="verify these pairs (columns from,to[,dx,dy,dtheta][,score]) instead of proposing")
    runopts.add_argument("--config", default=None, metavar="FILE.toml",
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
    p.add_argument("--log", default=None, help="the run's log (default: the one recorded in RUN_DIR)")
    p.add_argument("--candidates", default=None, metavar="PAIRS.csv",
                   help="score this candidate list (another front-end's proposals) instead of the run")
    p.add_argument("--json", default=None, metavar="FILE", help="also write the scores as JSON")
    p.set_defaults(func=_cmd_score)

    p = sub.add_parser("info", parents=[common], help="check a scan log and summarise it")
    p.add_argument("log", help="scan log (.jsonl or .jsonl.gz)")
    p.set_defaults(func=_cmd_info)

    p = sub.add_parser("simulate", parents=[common], help="write a simulated scan log with ground truth")
    p.add_argument("--out", required=True, help="output scan log (.jsonl or .jsonl.gz)")
    p.add_argument("--scenario", default=simulate.DEFAULT_SCENARIO, choices=sorted(simulate.SCENARIOS),
                   help="invented floor plan to drive through (default: %(default)s)")
    p.add_argument("--seed", type=int, default=0, help="random seed; same seed, same log (default: 0)")
    p.add_argument("--scans", type=int, default=None,
                   help="number of scans (default: the scenario's own route length)")
    p.set_defaults(func=_cmd_simulate)

    p = sub.add_parser("convert", parents=[common, rec],
                       help="write a scan log from a robot recording (ROS 1 bag, ROS 2 MCAP or SQLite)")
    p.add_argument("recording", help="recording file or ROS 2 bag folder")
    p.add_argument("--out", required=True, help="output scan log (.jsonl or .jsonl.gz)")
    p.set_defaults(func=_cmd_convert)
    return parser


def main(argv=None) -> int:
    """Entry point of the ``closurecheck`` command; returns the exit status."""
    argv = sys.argv[1:] if argv is None else list(argv)
    verbose = "-v" in argv or "--verbose" in argv
    try:
        args = build_parser().parse_args(argv)
        return int(args.func(args) or EXIT_OK)
    except InputError as exc:
        if verbose:
            traceback.print_exc()
        print(f"closurecheck: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:
        # Disk full, permission denied, a path that is a file: the user's
        # environment, not a bug; atomic writes left earlier outputs intact.
        if verbose:
            traceback.print_exc()
        where = f" {exc.filename}" if getattr(exc, "filename", None) else ""
        print(f"closurecheck: error: cannot access{where}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("closurecheck: interrupted; finished outputs were kept, nothing was half-written",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    except SystemExit as exc:  # --help and --version
        return int(exc.code or 0) if isinstance(exc.code, int) else EXIT_OK
    except Exception as exc:  # noqa: BLE001 - the last line of defence maps to exit 1
        if verbose:
            traceback.print_exc()
        print(f"closurecheck: internal error: {type(exc).__name__}: {exc} (rerun with --verbose for details)",
              file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
