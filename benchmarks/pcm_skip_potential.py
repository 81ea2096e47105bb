"""Benchmark: how many PCM pair tests could a bound that proves whole groups consistent skip, at best?

Issue 14, target 3 asks for a pairwise test that skips the pairs that
cannot matter while keeping the exact test's conflict graph.  A rigorous
skip rule proves a group pair consistent wholesale: for two groups of
closures S, S' it bounds the PCM distance of every (i, j) in S x S' from
above (for example the cycle residual of a pair is a conjugate of
T_i T_j^-1 with T_k = P_a z_k P_b^-1, and the cycle covariance is a sum of
positive semi-definite terms, so a common lower bound holds for the group
pair).  Whatever the bound, it can only prove a group pair whose largest
exact distance is at most the threshold divided by the bound's slack
(bound / exact distance), and the failing pairs must be tested and stored
in any case.  This script measures that ceiling on the exact distances:

* closures as in benchmarks/consistency.py (warehouse route driven round
  and round, 10% look-alikes), heading bias and scale error as given;
* groups: closures whose earlier and later ends fall in the same cells of
  ``--cell`` keyframes, split into sets mutually consistent with a seed at
  a quarter of the threshold (look-alikes fall out as singletons): as
  favourable to a group bound as the data allow;
* for each group pair the largest exact distance over its member pairs
  (``_pairwise_consistency_dense``), and the share of all pairs in group
  pairs a bound of slack 1, 2, 4, 8 could prove.

    python benchmarks/pcm_skip_potential.py [--k 3000] [--cell 10 40]

Writes benchmarks/results/pcm_skip_potential.md.
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
RESULTS = ROOT / "benchmarks" / "results" / "pcm_skip_potential.md"
SLACKS = (1, 2, 4, 8)


def groups(lo, hi, d2, thr, cell):
    """Group label of each closure: same cells of earlier and later end, mutually consistent with a seed."""
    key = lo // cell * (int(hi.max()) + 1) + hi // cell
    label = np.full(len(lo), -1)
    n = 0
    for c in np.unique(key):
        m = np.flatnonzero(key == c)
        while len(m):
            close = d2[np.ix_(m, m)] <= thr / 4
            seed = int(np.argmax(close.sum(1)))
            take = close[seed]
            take[seed] = True
            label[m[take]] = n
            n += 1
            m = m[~take]
    return label, n


def study(k, bias_deg, scale, cells):
    from consistency import closures

    from closurecheck.verification.consistency import ConsistencyOptions, _pairwise_consistency_dense

    inputs, keyframes, _ = closures(k, np.deg2rad(bias_deg) / 100.0, scale)
    src, dst = inputs[0], inputs[1]
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    ref = _pairwise_consistency_dense(*inputs, options=ConsistencyOptions(pair_probability=0.999))
    d2, thr = ref.distance_sq.astype(float), ref.threshold
    n = len(src)
    total = n * (n - 1)
    rows = []
    for cell in cells:
        label, ng = groups(lo, hi, d2, thr, cell)
        size = np.bincount(label, minlength=ng)
        order = np.argsort(label, kind="stable")
        starts = np.r_[0, np.cumsum(size)[:-1]]
        ds = d2[np.ix_(order, order)]
        np.fill_diagonal(ds, -np.inf)
        worst = np.maximum.reduceat(np.maximum.reduceat(ds, starts, axis=0), starts, axis=1)
        pairs = np.outer(size, size).astype(float)
        np.fill_diagonal(pairs, size * (size - 1))
        rows.append({"bias": bias_deg, "scale": scale, "k": n, "keyframes": keyframes, "cell": cell, "groups": ng,
                     "singletons": int(np.sum(size == 1)), "consistent": ((d2 <= thr).sum() - n) / total,
                     "provable": [pairs[worst <= thr / s].sum() / total for s in SLACKS]})
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--k", type=int, default=3000)
    ap.add_argument("--cell", type=int, nargs="+", default=[10, 40], help="cell width in keyframes")
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    rows = []
    for bias, scale in ((0.0, 0.0), (2.3, 0.002), (17.0, 0.02)):
        rows += study(args.k, bias, scale, args.cell)
        print(rows[-1], flush=True)
    lines = [
        "# PCM: share of pair tests a group-wise bound could skip, at best",
        "",
        f"`python benchmarks/pcm_skip_potential.py --k {args.k} --cell {' '.join(map(str, args.cell))}` "
        f"({(time.perf_counter() - t0) / 60:.1f} min, load {'/'.join(f'{v:.1f}' for v in os.getloadavg())}).",
        "",
        "Closures of benchmarks/consistency.py (10% look-alikes), pair probability 0.999.  'provable at slack s': "
        "share of all pairs lying in group pairs whose largest exact distance is at most threshold / s, i.e. what a "
        "rigorous bound that overestimates the distance by a factor s could skip; the consistent share is the "
        "ceiling of any skip rule that keeps the exact conflict graph.",
        "",
        "| heading bias (deg / 100 m) | scale error | K | keyframes | cell (keyframes) | groups (singletons) "
        "| consistent pairs | " + " | ".join(f"provable at slack {s}" for s in SLACKS) + " |",
        "|---|---|---|---|---|---|---|" + "---|" * len(SLACKS),
    ]
    for r in rows:
        lines.append(f"| {r['bias']:g} | {r['scale']:.1%} | {r['k']:,} | {r['keyframes']:,} | {r['cell']} | "
                     f"{r['groups']:,} ({r['singletons']:,}) | {r['consistent']:.1%} | "
                     + " | ".join(f"{p:.1%}" for p in r["provable"]) + " |")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        RESULTS.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
