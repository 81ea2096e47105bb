"""Benchmark: the PCM pair test alone, one code tree against another, same inputs.

Runs ``pairwise_consistency`` (every pair) on the closures of
benchmarks/consistency.py in a fresh process per code tree and repetition,
alternating the trees, and prints CPU seconds, peak resident memory and an
md5 of the conflict graph (indices, indptr) and support counts, so two
trees that must give the same answer can be seen to.

    python benchmarks/pcm_pair_test.py --trees /tmp/before /work/wt/pcm [--k 9279] [--bias 0.0004] [--scale 0.002]

With ``NUMBA_NUM_THREADS=1`` in the environment (the children inherit it)
the pair test, parallel since 2026-12-03, runs on one thread.

A tree is a checkout of the project (``git archive COMMIT | tar -x -C DIR``);
each child runs with it first on PYTHONPATH.  Writes nothing; the numbers go
into docs/performance.md.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys

CHILD = r"""
import hashlib, json, os, resource, sys, time
sys.path.insert(0, os.path.join(sys.argv[1], "benchmarks"))
from consistency import closures
from closurecheck.verification.consistency import ConsistencyOptions, pairwise_consistency
inputs, keyframes, _ = closures(int(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4]))
opts = ConsistencyOptions(pair_probability=0.999)
# Warm-up on 50 closures: imports and compiled-code loading are not the pair test.
pairwise_consistency(*[x[:50] if n < 4 else x for n, x in enumerate(inputs)], options=opts)
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
c0, t0 = time.process_time(), time.perf_counter()
pc = pairwise_consistency(*inputs, options=opts)
c1, t1 = time.process_time(), time.perf_counter()
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # before the digest's copies
digest = hashlib.md5(pc.conflicts.indices.astype("int64").tobytes() + pc.conflicts.indptr.astype("int64").tobytes()
                     + pc.support.astype("int64").tobytes()).hexdigest()[:12]
print("RESULT " + json.dumps({"k": len(inputs[0]), "keyframes": keyframes, "pairs": pc.pairs_tested,
      "conflicts": int(pc.conflicts.nnz // 2), "cpu": c1 - c0, "wall": t1 - t0, "base_mb": base,
      "peak_mb": peak, "md5": digest,
      "load": os.getloadavg()[0]}))
"""


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trees", nargs="+", required=True)
    ap.add_argument("--k", type=int, default=9279)
    ap.add_argument("--bias", type=float, default=0.0004, help="heading bias, rad per m")
    ap.add_argument("--scale", type=float, default=0.002, help="distance scale error")
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args(argv)
    print("| tree | K | pairs | conflicts | CPU s (wall) | peak MB (base) | md5 | load |")
    print("|---|---|---|---|---|---|---|---|")
    for _ in range(args.repeat):
        for tree in args.trees:
            env = dict(os.environ, PYTHONPATH=tree)
            out = subprocess.run([sys.executable, "-c", CHILD, tree, str(args.k), str(args.bias), str(args.scale)],
                                 env=env, capture_output=True, text=True, check=True).stdout
            r = json.loads(next(line for line in out.splitlines() if line.startswith("RESULT "))[7:])
            print(f"| {tree} | {r['k']:,} | {r['pairs']:,} | {r['conflicts']:,} | {r['cpu']:.2f} ({r['wall']:.2f}) | "
                  f"{r['peak_mb']:.0f} ({r['base_mb']:.0f}) | {r['md5']} | {r['load']:.1f} |", flush=True)


if __name__ == "__main__":
    main()
