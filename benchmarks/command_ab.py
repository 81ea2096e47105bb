"""Benchmark: `closurecheck run` as a user runs it, two source trees alternating.

Each run is ``python -m closurecheck run LOG --out DIR --jobs 2 -v`` in a
fresh process, with ``PYTHONPATH`` naming the tree whose ``closurecheck`` it
imports (so a checkout of an older commit runs beside the current one), from
a neutral folder.  The stage lines the command prints with ``-v`` are timed
as they arrive:

* start: from the process's launch to its first stage line (interpreter,
  imports, the pool's fork server started);
* calibration to registration: reading, keyframes, calibration,
  descriptors and candidates;
* registration, verification, write: from one stage line to the next;
* exit: from the last output put in place to the process's end (what
  Python's exit costs after the work is done);
* total: launch to end, what the user waits for.

benchmarks/scale.py times the stages inside one process and cannot see the
command's own exit; this script can.  Trees alternate (A, B, A, B, ...) so
that the machine's drift hits both alike; the medians are printed.

Usage::

    python benchmarks/command_ab.py LOG TREE_A TREE_B [--runs 4] [--results FILE.md]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

MARKS = ("] calibration", "] registration", "] verification", "] writing outputs", "putting the outputs")
COLUMNS = ("start", "calibration to registration", "registration", "verification", "write", "exit", "total")


def one_run(tree: str, log: str, out: str) -> dict:
    """Times (seconds) of one `closurecheck run` of ``log`` with the package of ``tree``."""
    env = dict(os.environ, PYTHONPATH=str(Path(tree).resolve()))
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "closurecheck", "run", log, "--out", out, "--jobs", "2", "-v"],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, bufsize=1,
                            cwd=tempfile.gettempdir(), env=env)
    seen: dict = {}
    first = None
    for line in proc.stdout:
        now = time.perf_counter() - t0
        if first is None and line.startswith("["):
            first = now
        for mark in MARKS:
            if mark in line and mark not in seen:
                seen[mark] = now
    # 3: a doubtful map (docs/cli.md), a finished run like 0.
    if proc.wait() not in (0, 3):
        raise RuntimeError(f"closurecheck run failed with {tree} (exit status {proc.returncode})")
    end = time.perf_counter() - t0
    t = [seen[m] for m in MARKS]
    return dict(zip(COLUMNS, (first, t[1] - t[0], t[2] - t[1], t[3] - t[2], t[4] - t[3], end - t[4], end)))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("log")
    ap.add_argument("tree_a")
    ap.add_argument("tree_b")
    ap.add_argument("--runs", type=int, default=4)
    ap.add_argument("--results", default=None, help="write the table here (markdown)")
    args = ap.parse_args(argv)
    trees = {"A": args.tree_a, "B": args.tree_b}
    rows = {k: [] for k in trees}
    lines = [f"`python benchmarks/command_ab.py {' '.join(sys.argv[1:])}`", "",
             f"A = {args.tree_a}, B = {args.tree_b}; log {Path(args.log).name}; 2 workers, report included.",
             "Seconds, wall; load average (1 min) after each run.", "",
             "| run | tree | " + " | ".join(COLUMNS) + " | load |", "|---" * (len(COLUMNS) + 3) + "|"]
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(args.runs):
            for k, tree in trees.items():
                r = one_run(tree, args.log, str(Path(tmp) / f"out_{k}"))
                rows[k].append(r)
                load = os.getloadavg()[0]
                lines.append(f"| {i + 1} | {k} | " + " | ".join(f"{r[c]:.2f}" for c in COLUMNS) + f" | {load:.1f} |")
                print(lines[-1], flush=True)
    lines += ["", "| medians | " + " | ".join(COLUMNS) + " |", "|---" * (len(COLUMNS) + 1) + "|"]
    for k in trees:
        lines.append(f"| {k} | " + " | ".join(f"{statistics.median(r[c] for r in rows[k]):.2f}"
                                              for c in COLUMNS) + " |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.results:
        Path(args.results).write_text(text)


if __name__ == "__main__":
    main()
