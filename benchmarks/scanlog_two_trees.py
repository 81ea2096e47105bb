"""Scan-log read time of two source trees side by side (e.g. before and after a reader change).

Each run is a fresh process importing closurecheck from one tree and timing
``closurecheck.io.inputs.load_input(LOG)`` alone (imports excluded); the
trees alternate, so both see the same load on the shared machine.  Each run
also prints a digest of the arrays it read, so the table says whether the
two trees read the same bits.

    python benchmarks/scanlog_two_trees.py --before /path/to/main --after . --log LOG [--runs 5]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

CHILD = r"""
import hashlib, json, sys, time
import closurecheck
from closurecheck.io.inputs import load_input
t0 = time.perf_counter()
log, _ = load_input(sys.argv[1])
dt = time.perf_counter() - t0
h = hashlib.sha256()
for a in (log.t, log.odom, log.ranges, log.truth):
    h.update(b"none" if a is None else a.tobytes())
print(json.dumps({"seconds": dt, "digest": h.hexdigest()[:16], "module": closurecheck.__file__,
                  "scans": len(log)}))
"""


def one_run(tree: Path, log: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(tree))
    with tempfile.TemporaryDirectory() as cwd:  # not a tree's folder, so PYTHONPATH decides the import
        out = subprocess.run([sys.executable, "-c", CHILD, str(log)], env=env, cwd=cwd, check=True,
                             capture_output=True, text=True).stdout
    res = json.loads(out.strip().splitlines()[-1])
    assert Path(res["module"]).resolve().is_relative_to(tree.resolve()), res["module"]
    return res


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--before", type=Path, required=True)
    ap.add_argument("--after", type=Path, required=True)
    ap.add_argument("--log", type=Path, required=True)
    ap.add_argument("--runs", type=int, default=5)
    args = ap.parse_args(argv)
    times = {"before": [], "after": []}
    digests = {"before": set(), "after": set()}
    load = [os.getloadavg()]
    for k in range(args.runs):
        for name in ("before", "after"):
            res = one_run(getattr(args, name), args.log)
            times[name].append(res["seconds"])
            digests[name].add(res["digest"])
            print(f"run {k + 1} {name:6s} {res['seconds']:.3f} s  {res['scans']} scans  {res['digest']}",
                  flush=True)
        load.append(os.getloadavg())
    print()
    print(f"log: {args.log.name}, {args.runs} runs each, alternating; load average (1 min) "
          f"{min(x[0] for x in load):.2f}-{max(x[0] for x in load):.2f}")
    print()
    print("| tree | median | min | max | runs (s) |")
    print("| --- | ---: | ---: | ---: | --- |")
    for name in ("before", "after"):
        v = times[name]
        print(f"| {name} ({getattr(args, name)}) | {statistics.median(v):.3f} s | {min(v):.3f} s | {max(v):.3f} s | "
              + ", ".join(f"{x:.3f}" for x in v) + " |")
    ratio = statistics.median(times["after"]) / statistics.median(times["before"])
    same = digests["before"] == digests["after"] and len(digests["before"]) == 1
    print()
    print(f"after / before (medians): {ratio:.2f}; arrays bit-identical between the trees: {same}")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
