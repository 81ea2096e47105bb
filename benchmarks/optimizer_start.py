"""Experiment: does a linear heading-first start save the optimiser's iterations on the benchmark graphs?

The start is now in the package (closurecheck.graph.initial.heading_first_poses);
this script compares it with the odometry chain under the default damping.
The optimiser starts from the poses it is given (the odometry chain in
benchmarks/optimizer.py), which at 100,000 nodes are
56 m (RMS) from the truth and cost 21 iterations.  Here the start is built
in two linear stages, as in Carlone, Aragues, Castellanos and Bona, "A fast
and accurate approximation for planar pose graph optimization", IJRR 2014:

1. headings: weighted least squares on the measured heading differences,
   each unwrapped by the multiple of 2 pi that brings it closest to the
   odometry chain's difference (weights: inverse heading variance of each
   edge); node 0 held;
2. positions: with those headings fixed, each edge's translation rotated
   into the world frame gives a linear equation in the two positions
   (weights: the translation block of the edge's covariance, rotated);
   node 0 held.

Both stages are sparse SPD solves (CHOLMOD through cvxopt).  Then the
default optimiser runs from that start and from the odometry chain; the
table gives iterations, CPU time and the distance between the two optima.
Writes benchmarks/results/optimizer_start.md.

Run from the repository root:  python benchmarks/optimizer_start.py [--nodes 5000 20000 100000]
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from optimizer import rms_m, wandering_graph  # noqa: E402

from closurecheck.core import se2  # noqa: E402
from closurecheck.graph.initial import heading_first_poses  # noqa: E402
from closurecheck.graph.solver import optimize_graph  # noqa: E402

RESULTS = Path(__file__).resolve().parent / "results" / "optimizer_start.md"


def row(n):
    truth, initial, src, dst, delta, info, robust = wandering_graph(n, 2 * n)
    c0 = time.process_time()
    start = heading_first_poses(initial, src, dst, delta, info)
    start_cpu = time.process_time() - c0
    runs = {}
    for name, x0 in (("odometry", initial), ("heading-first", start)):
        c0 = time.process_time()
        sol = optimize_graph(x0, src, dst, delta, info, robust)
        runs[name] = (time.process_time() - c0, sol)
    (cpu_o, odo), (cpu_h, head) = runs["odometry"], runs["heading-first"]
    d = odo.poses - head.poses
    d[:, 2] = se2.wrap(d[:, 2])
    return (f"| {n} | {rms_m(initial, truth):.2f} / {rms_m(start, truth):.3f} | {start_cpu:.2f} | "
            f"{odo.iterations} / {head.iterations} | {cpu_o:.2f} / {cpu_h:.2f} | "
            f"{(head.cost - odo.cost) / odo.cost:.1e} | {np.abs(d[:, :2]).max():.1e} |")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, nargs="+", default=[5000, 20000])
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args(argv)
    lines = ["### Heading-first start against the odometry chain (benchmarks/optimizer_start.py)", "",
             f"One BLAS thread, CPU time of this process; load average {os.getloadavg()[0]:.1f} at the start.", "",
             "| nodes | start RMS (m): odometry / heading-first | heading-first start CPU (s) | iterations: "
             "odometry / heading-first | optimiser CPU (s): odometry / heading-first | relative cost difference "
             "(heading-first - odometry) | largest position difference of the optima (m) |",
             "| ---: | ---: | ---: | ---: | ---: | ---: | ---: |"]
    with threadpool_limits(limits=1):
        for n in args.nodes:
            lines.append(row(n))
            print(lines[-1], flush=True)
    lines += ["", f"Load average at the end: {os.getloadavg()[0]:.1f}."]
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        RESULTS.write_text(text, encoding="utf-8")
        print(f"written to {RESULTS}")


if __name__ == "__main__":
    main()
