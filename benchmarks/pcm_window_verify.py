"""Benchmark: does the PCM window (``verify.pair_window_m``) change what verify() accepts?

The window tests only the closure pairs whose PCM cycle runs through at most
that much odometry on each side; the others count as consistent.  Issue 14,
target 3 would accept a locality formulation switched on automatically above
some size if the final accepted set stayed the exact test's.  This runs
verify() end to end on the inputs of benchmarks/verification_scaling.py
(simulated warehouse log, about two candidates per keyframe, 30% true, the
rest look-alike runs) with the exact test and with each window, and counts
the candidates whose verdict differs.

    python benchmarks/pcm_window_verify.py [--scans 5000 20000] [--windows 150 300 600]

Writes benchmarks/results/pcm_window_verify.md.  One process, BLAS on one
thread; times are wall seconds on a shared machine (indicative only).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))
RESULTS = ROOT / "benchmarks" / "results" / "pcm_window_verify.md"


def main(argv=None):
    from threadpoolctl import threadpool_limits
    from verification_scaling import closures, scene

    from closurecheck.core.odometry import OdometryChain
    from closurecheck.verification.verify import VerifyOptions, verify

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scans", type=int, nargs="+", default=[5000, 20000])
    ap.add_argument("--windows", type=float, nargs="+", default=[150.0, 300.0, 600.0])
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args(argv)
    rows = []
    for scans in args.scans:
        truth, odom, step_cov = scene(scans)
        cands, label = closures(truth)
        chain = OdometryChain.from_steps(np.arange(len(odom)), odom, step_cov)
        with threadpool_limits(1):
            ref = None
            for w in [None, *args.windows]:
                t0 = time.perf_counter()
                v = verify(cands, chain, VerifyOptions(pair_window_m=w))
                dt = time.perf_counter() - t0
                ref = ref or v
                rows.append({"scans": scans, "keyframes": len(odom), "candidates": len(cands), "window": w,
                             "accepted": int(v.accepted.sum()), "false": int((v.accepted & ~label).sum()),
                             "differ": int((v.accepted != ref.accepted).sum()),
                             "reasons": int((v.reason != ref.reason).sum()), "s": dt,
                             "load": "/".join(f"{x:.1f}" for x in os.getloadavg())})
                print(rows[-1], flush=True)
    lines = [
        "# verify() with the PCM window against the exact pair test",
        "",
        f"`python benchmarks/pcm_window_verify.py --scans {' '.join(map(str, args.scans))} --windows "
        f"{' '.join(f'{w:g}' for w in args.windows)}`",
        "",
        "Inputs of benchmarks/verification_scaling.py (warehouse, seed 3; candidates seed 7).  'accepted differ': "
        "candidates accepted by one run and not the other; 'reasons differ': candidates whose reason code differs.",
        "",
        "| scans | keyframes | candidates | pair test | accepted | false accepted | accepted differ | reasons differ "
        "| verify s (wall) | load |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        name = "exact" if r["window"] is None else f"window {r['window']:g} m"
        lines.append(f"| {r['scans']:,} | {r['keyframes']:,} | {r['candidates']:,} | {name} | {r['accepted']:,} | "
                     f"{r['false']} | {r['differ']} | {r['reasons']} | {r['s']:.1f} | {r['load']} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        RESULTS.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
