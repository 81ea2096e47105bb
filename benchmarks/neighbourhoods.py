"""Benchmark: the line fits' neighbour search (_kernels.neighbourhoods) against the ones it replaced.

The kernels of two earlier commits are loaded (``git show``, as
benchmarks/optimizer.py loads an earlier solver) beside the current one:
27692d5, a hash grid offering each 3 x 3 block in cell order, and 11b2158,
the same grid offering the block along the beams first.  The current one
walks along the beams with a bound from the bearing separation, no grid.
All three must give the same answer on every scan; they are timed on the
office scans of benchmarks/registration.py (60 scans of 721 beams: 30
pairs), with the default options (16 neighbours, 0.3 m), after a warm-up
call, alternately, per round; the median of the rounds is printed.

Run from the repository root:  python benchmarks/neighbourhoods.py [--rounds N]
"""

from __future__ import annotations

import argparse
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import registration as bench  # noqa: E402

from closurecheck.registration import _kernels  # noqa: E402
from closurecheck.registration.icp import DEFAULT_OPTIONS  # noqa: E402


BEFORE = ("27692d5", "11b2158")


def kernels_at(commit):
    """closurecheck/registration/_kernels.py as it was at ``commit`` (git), compiled beside the current one."""
    text = subprocess.run(["git", "show", f"{commit}:closurecheck/registration/_kernels.py"], cwd=HERE.parent,
                          check=True, capture_output=True, text=True).stdout
    # No disk cache for the copy: numba would key it by a temporary path.
    path = Path(tempfile.mkdtemp()) / f"kernels_{commit}.py"
    path.write_text(text.replace("cache=True", "cache=False"), encoding="utf-8")
    spec = importlib.util.spec_from_file_location(f"kernels_{commit}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=15)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    segs, circ = bench.office()
    pairs = bench.make_pairs(30, rng, segs, circ)
    scans = [np.ascontiguousarray(bench.to_points(r, rng)) for pair in pairs for r in pair[:2]]
    k, radius = DEFAULT_OPTIONS.line_neighbours, DEFAULT_OPTIONS.line_radius_m
    kernels = {commit: kernels_at(commit).neighbourhoods for commit in BEFORE}
    kernels["now"] = _kernels.neighbourhoods
    for pts in scans:       # the same answer, or the comparison means nothing
        ref = kernels["now"](pts, k, radius)
        for commit in BEFORE:
            got = kernels[commit](pts, k, radius)
            assert np.array_equal(got[0], ref[0]) and np.array_equal(got[1], ref[1]), commit
    times = {name: [] for name in kernels}
    for f in kernels.values():
        f(scans[0], k, radius)
    for _ in range(args.rounds):
        for name, f in kernels.items():
            t0 = time.perf_counter()
            for pts in scans:
                f(pts, k, radius)
            times[name].append((time.perf_counter() - t0) / len(scans) * 1e3)
    now = statistics.median(times["now"])
    print(f"{len(scans)} scans, k {k}, radius {radius} m, median of {args.rounds} rounds, ms per scan:")
    for commit in BEFORE:
        before = statistics.median(times[commit])
        print(f"  {commit}: {before:.3f} ms, now {now:.3f} ms, {before / now:.2f}x")


if __name__ == "__main__":
    main()
