"""Benchmark: the pairwise consistency test (PCM) and its maximum clique as the closures grow.

Side by side, each variant in a fresh process (peak memory is that
process's ``ru_maxrss``; the inputs alone are measured first and given as
'base'):

* ``dense``: the former formulation, kept as the reference
  (``_pairwise_consistency_dense``: every pair, a K x K float32 distance
  matrix and a boolean mask, the consistency graph as CSR) and
  ``max_clique`` on that graph;
* ``sparse``: ``pairwise_consistency`` testing every pair, the failing pairs
  kept as a sparse conflict graph, and ``max_clique_of_conflicts``
  (the default of the verification stage);
* ``window``: the same with ``pair_window_m`` (only pairs whose cycle runs
  through at most that much odometry on each side are tested).

Inputs (no registration): the invented warehouse route driven round and
round (``drive`` and ``odometry`` of the simulator, heading bias and
distance scale error as given), keyframes every 0.5 m, closures between
keyframes of different visits whose true positions are within 1 m (truth
plus registration noise of 2 cm / 0.3 deg), 10% of them look-alikes
offset by 1 to 3 m.  The number of rounds is chosen to give about K
closures.

    python benchmarks/consistency.py [--sizes 1000 5000 20000] [--window 300] [--no-dense-above 20000]

Writes benchmarks/results/consistency.md.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
RESULTS = ROOT / "benchmarks" / "results" / "consistency.md"
SIGMA = np.array([0.02, 0.02, np.deg2rad(0.3)])


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def closures(k: int, bias: float, scale: float, seed: int = 0):
    """About k closures on the warehouse route driven round and round; see the module docstring."""
    from scipy.spatial import cKDTree

    from closurecheck.core import se2
    from closurecheck.core.odometry import OdometryChain, noise_from_header
    from closurecheck.frontend.keyframes import select_keyframes
    from closurecheck.simulation.simulate import DEFAULT_OPTIONS, SCENARIOS, drive, odometry

    options = dataclasses.replace(DEFAULT_OPTIONS, odom_heading_bias_rad_per_m=bias, odom_distance_scale_error=scale)
    plan = SCENARIOS["warehouse"]()
    lap = len(drive(plan, None, options).t)
    per_keyframe = 2
    # Keyframes every ~0.5 m; a lap of scans gives about lap / 2.5 keyframes
    # (measured: 2,952 scans, 1,170 keyframes), each after the first lap
    # with per_keyframe closures.
    laps = 1.0 + k / (per_keyframe * lap / 2.5)
    motion = drive(plan, int(laps * lap), options)
    rng = np.random.default_rng(seed)
    odom = odometry(motion.truth, motion.step_m, rng, options)
    kf = select_keyframes(odom)
    chain = OdometryChain.build(odom, kf, noise_from_header({"odometry_noise": options.odometry_noise_header()}))
    truth = motion.truth[kf]
    tree = cKDTree(truth[:, :2])
    src, dst = [], []
    for j, near in enumerate(tree.query_ball_point(truth[:, :2], 1.0)):
        near = np.array([i for i in near if i < j - 200], dtype=int)
        if len(near):
            pick = rng.choice(near, min(per_keyframe, len(near)), replace=False)
            src += [j] * len(pick)
            dst += pick.tolist()
    src, dst = np.array(src), np.array(dst)
    if len(src) > k:
        keep = np.sort(rng.choice(len(src), k, replace=False))
        src, dst = src[keep], dst[keep]
    n = len(src)
    cov = np.tile(np.diag(SIGMA**2), (n, 1, 1))
    deltas = se2.between(truth[src], truth[dst]) + rng.normal(0.0, SIGMA, (n, 3))
    bad = rng.random(n) < 0.1
    off = rng.uniform(1.0, 3.0, bad.sum()) * np.exp(1j * rng.uniform(-np.pi, np.pi, bad.sum()))
    deltas[bad] += np.column_stack([off.real, off.imag, np.deg2rad(rng.uniform(-8, 8, bad.sum()))])
    deltas[:, 2] = se2.wrap(deltas[:, 2])
    return (src, dst, deltas, cov, chain.poses, chain.prefix), len(kf), laps


def child(args) -> None:
    from closurecheck.verification.clique import CliqueOptions, max_clique, max_clique_of_conflicts
    from closurecheck.verification.consistency import (
        ConsistencyOptions,
        _pairwise_consistency_dense,
        pairwise_consistency,
    )

    inputs, keyframes, laps = closures(args.k, args.bias, args.scale)
    k = len(inputs[0])
    base = _rss_mb()
    budget = CliqueOptions(max_expansions=200_000)
    options = ConsistencyOptions(pair_probability=0.999,
                                 pair_window_m=args.window if args.variant == "window" else None)
    t0, c0 = time.perf_counter(), time.process_time()
    if args.variant == "dense":
        pc = _pairwise_consistency_dense(*inputs, options=options)
        t1, c1 = time.perf_counter(), time.process_time()
        clique = max_clique(pc.adjacency, options=budget)
        tested, conflicts = k * (k - 1) // 2, k * (k - 1) // 2 - pc.adjacency.nnz // 2
    else:
        pc = pairwise_consistency(*inputs, options=options)
        t1, c1 = time.perf_counter(), time.process_time()
        clique = max_clique_of_conflicts(pc.conflicts, options=budget)
        tested, conflicts = pc.pairs_tested, pc.conflicts.nnz // 2
    t2, c2 = time.perf_counter(), time.process_time()
    print("RESULT " + json.dumps({
        "pairs_cpu": c1 - c0, "clique_cpu": c2 - c1,
        "k": k, "keyframes": keyframes, "laps": laps, "variant": args.variant, "pairs_s": t1 - t0,
        "clique_s": t2 - t1, "tested": tested, "conflicts": conflicts, "size": clique.size,
        "exact": clique.exact, "members": clique.members.tolist(), "base_mb": base, "peak_mb": _rss_mb(),
        "load": _load()}), flush=True)


def run_child(k, variant, args) -> dict:
    cmd = [sys.executable, __file__, "--child", "--k", str(k), "--variant", variant, "--window", str(args.window),
           "--bias", str(args.bias), "--scale", str(args.scale)]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    return json.loads(next(line for line in out.splitlines() if line.startswith("RESULT "))[7:])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 5000, 20000])
    ap.add_argument("--window", type=float, default=300.0, help="pair_window_m of the 'window' variant")
    ap.add_argument("--bias", type=float, default=0.0004, help="heading bias, rad per m (simulator default)")
    ap.add_argument("--scale", type=float, default=0.002, help="distance scale error (simulator default)")
    ap.add_argument("--no-dense-above", type=int, default=20000, help="skip the dense reference above this K")
    ap.add_argument("--exhaustive-up-to", type=int, default=None,
                    help="run the sparse every-pair variant only up to this K (default: always)")
    ap.add_argument("--no-write", action="store_true")
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--k", type=int, help=argparse.SUPPRESS)
    ap.add_argument("--variant", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args)
        return
    t_start = time.perf_counter()
    rows = []
    for k in args.sizes:
        every = args.exhaustive_up_to is None or k <= args.exhaustive_up_to
        variants = (["dense"] if k <= args.no_dense_above else []) + (["sparse"] if every else []) + ["window"]
        got = {}
        for v in variants:
            got[v] = run_child(k, v, args)
            r = got[v]
            print(f"K={r['k']} {v}: pairs {r['pairs_cpu']:.2f} s CPU, clique {r['clique_cpu']:.2f} s CPU, "
                  f"peak {r['peak_mb']:.0f} MB (base {r['base_mb']:.0f}), size {r['size']}, load {r['load']}",
                  flush=True)
        rows.append(got)
    lines = [
        "# Pairwise consistency (PCM) and maximum clique: dense reference against the sparse formulation",
        "",
        f"`python benchmarks/consistency.py --sizes {' '.join(map(str, args.sizes))} --window {args.window:g}`",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores shared with other jobs (load averages beside each "
        f"run), Python {platform.python_version()}, numpy {np.__version__}.  Closures on the warehouse route driven "
        f"round and round, heading bias {np.rad2deg(args.bias) * 100:.0f} deg / 100 m, distance scale error "
        f"{args.scale:.1%}, 10% look-alikes; pair probability 0.999; clique budget 200,000 expansions.  Each "
        f"variant in a fresh process; 'peak' is its ru_maxrss, 'base' the process after building the inputs.  "
        f"Whole benchmark {(time.perf_counter() - t_start) / 60:.1f} min.",
        "",
        "Times are CPU seconds of the one-threaded child (wall seconds in brackets: the machine was shared).",
        "",
        "| K | keyframes | variant | pairs tested | conflicts | pair test s | clique s | total s | time / dense "
        "| peak MB (base) | memory above base / dense | clique size | same members as dense | load |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for got in rows:
        d = got.get("dense")
        for v, r in got.items():
            total = r["pairs_cpu"] + r["clique_cpu"]
            ratio_t = f"{total / (d['pairs_cpu'] + d['clique_cpu']):.2f}" if d else "-"
            ratio_m = (f"{(r['peak_mb'] - r['base_mb']) / max(d['peak_mb'] - d['base_mb'], 1e-9):.3f}" if d else "-")
            ref = d or got.get("sparse")
            same = "-" if ref is None or ref is r and not d else "yes" if r["members"] == ref["members"] else \
                f"no ({len(set(r['members']) ^ set(ref['members']))} differ{'' if d else ' from sparse'})"
            lines.append(
                f"| {r['k']} | {r['keyframes']} | {v} | {r['tested']:,} | {r['conflicts']:,} | {r['pairs_cpu']:.2f} "
                f"({r['pairs_s']:.1f}) | {r['clique_cpu']:.2f} ({r['clique_s']:.1f}) | **{total:.2f}** | {ratio_t} "
                f"| {r['peak_mb']:.0f} ({r['base_mb']:.0f}) | {ratio_m} | {r['size']} | {same} | {r['load']} |")
    if len(rows) > 1:
        lines += ["", "Growth from the smallest to the largest K (time ratio against K ratio; 2x the K ratio's "
                  "exponent means quadratic):", ""]
        a, b = rows[0], rows[-1]
        for v in ("dense", "sparse", "window"):
            if v not in a or v not in b:
                continue
            kr = b[v]["k"] / a[v]["k"]
            tr = (b[v]["pairs_cpu"] + b[v]["clique_cpu"]) / max(a[v]["pairs_cpu"] + a[v]["clique_cpu"], 1e-9)
            pr = b[v]["tested"] / max(a[v]["tested"], 1)
            lines.append(f"- {v}: K x{kr:.1f}, pairs tested x{pr:.1f} (exponent {np.log(pr) / np.log(kr):.2f}), "
                         f"time x{tr:.1f} (exponent {np.log(tr) / np.log(kr):.2f})")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        RESULTS.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
