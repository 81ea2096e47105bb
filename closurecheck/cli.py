"""Command line: argument parsing and exit codes only; the work lives in the stages.

Exit status: 0 success, 2 bad input or usage, 1 internal error.
"""

from __future__ import annotations

import argparse
import sys
import traceback

from . import __version__
from .errors import EXIT_BAD_INPUT, EXIT_INTERNAL, EXIT_OK, InputError


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
    import numpy as np

    from .scanlog import read_scanlog

    log = read_scanlog(args.log)
    s = log.sensor
    steps = np.hypot(*np.diff(log.odom[:, :2], axis=0).T) if len(log) > 1 else np.zeros(0)
    fov = np.degrees(abs(s.angle_step) * (s.beams - 1))
    valid = np.isfinite(log.ranges).mean() if log.ranges.size else 0.0
    lines = [
        f"{args.log}: {len(log)} scans over {log.t[-1] - log.t[0] if len(log) else 0.0:.1f} s",
        f"  sensor: {s.beams} beams over {fov:.1f} deg, ranges {s.min_range:g}-{s.max_range:g} m,"
        f" {100 * valid:.1f}% of beams with a return",
        f"  odometry: {steps.sum():.1f} m travelled",
        f"  ground truth: {'yes' if log.has_truth else 'no'}",
    ]
    if log.header.get("notes"):
        lines.append(f"  notes: {log.header['notes']}")
    print("\n".join(lines))
    return EXIT_OK


def _cmd_simulate(args) -> int:
    from . import simulate
    from .scanlog import write_scanlog

    log = simulate.simulate_log(args.scenario, seed=args.seed, scans=args.scans)
    write_scanlog(args.out, log)
    if not args.quiet:
        print(f"wrote {len(log)} scans of scenario '{args.scenario}' (seed {args.seed}) to {args.out}")
    return EXIT_OK


def _cmd_convert(args) -> int:
    from . import recordings
    from .scanlog import write_scanlog

    log, summary = recordings.read_recording(
        args.recording, scan_topic=args.scan_topic, odom_topic=args.odom_topic, mount=args.mount,
        options=recordings.RecordingOptions(max_odom_gap_s=args.max_odom_gap))
    write_scanlog(args.out, log, decimals=None)
    if not args.quiet:
        print(summary.describe())
        print(f"wrote {len(log)} scans to {args.out}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    from . import simulate

    parser = _Parser(prog="closurecheck", description="Verify loop closures in 2D LiDAR scan logs.")
    parser.add_argument("--version", action="version", version=f"closurecheck {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", help="print only errors")
    common.add_argument("-v", "--verbose", action="store_true", help="more detail; tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

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

    from .recordings import RecordingOptions  # rosbags itself is imported only when converting

    p = sub.add_parser("convert", parents=[common],
                       help="write a scan log from a robot recording (ROS 1 bag, ROS 2 MCAP or SQLite)")
    p.add_argument("recording", help="recording file or ROS 2 bag folder")
    p.add_argument("--out", required=True, help="output scan log (.jsonl or .jsonl.gz)")
    p.add_argument("--scan-topic", default=None, help="laser scan topic (auto-detected when there is one)")
    p.add_argument("--odom-topic", default=None, help="odometry topic (auto-detected when there is one)")
    p.add_argument("--mount", type=_pose_arg, default=None,
                   help="sensor pose on the robot as x,y,theta (metres, radians)")
    p.add_argument("--max-odom-gap", type=float, default=RecordingOptions.max_odom_gap_s, metavar="SECONDS",
                   help="drop scans inside odometry gaps longer than this (default: %(default)s s)")
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
