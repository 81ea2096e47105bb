"""Benchmark: the line fits' neighbour search (_kernels.neighbourhoods) against the one it replaced.

The kernel before candidates were offered along the beams is kept as the
reference of tests/registration/test_neighbourhoods_fast.py; both are timed
here on the office scans of benchmarks/registration.py (60 scans of 721
beams: 30 pairs), with the default options (16 neighbours, 0.3 m), after a
warm-up call, alternately, per round; the median of the rounds is printed.

Run from the repository root:  python benchmarks/neighbourhoods.py [--rounds N]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent / "tests" / "registration"))

import registration as bench  # noqa: E402
from test_neighbourhoods_fast import neighbourhoods_before  # noqa: E402

from closurecheck.registration import _kernels  # noqa: E402
from closurecheck.registration.icp import DEFAULT_OPTIONS  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=15)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    segs, circ = bench.office()
    pairs = bench.make_pairs(30, rng, segs, circ)
    scans = [np.ascontiguousarray(bench.to_points(r, rng)) for pair in pairs for r in pair[:2]]
    k, radius = DEFAULT_OPTIONS.line_neighbours, DEFAULT_OPTIONS.line_radius_m
    kernels = {"before": neighbourhoods_before, "now": _kernels.neighbourhoods}
    times = {name: [] for name in kernels}
    for f in kernels.values():
        f(scans[0], k, radius)
    for _ in range(args.rounds):
        for name, f in kernels.items():
            t0 = time.perf_counter()
            for pts in scans:
                f(pts, k, radius)
            times[name].append((time.perf_counter() - t0) / len(scans) * 1e3)
    before, now = statistics.median(times["before"]), statistics.median(times["now"])
    print(f"{len(scans)} scans, k {k}, radius {radius} m, median of {args.rounds} rounds: "
          f"before {before:.3f} ms, now {now:.3f} ms per scan, {before / now:.2f}x")


if __name__ == "__main__":
    main()
