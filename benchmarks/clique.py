"""Benchmark: pairwise consistency (PCM) matrix and maximum clique.

Scenario (invented): a robot wanders through a 30 m x 30 m hall, one keyframe
every 0.5 m, with drifting wheel odometry.  Loop-closure candidates are

* correct closures (inliers): revisits closer than 1.5 m and at least 30
  keyframes apart, measured from the truth with registration noise;
* aliasing outliers: keyframes more than 5 m apart given a plausible-looking
  delta (within 1.5 m, any heading), as a scan matcher fooled by a repetitive
  room would report;
* systematic outliers: small groups of closures that all carry the same
  wrong offset (a room mistaken for its twin), consistent with each other.

For K = 100, 500, 1000, 2000 candidates it times the full pairwise
consistency matrix and our maximum clique, and in the same run networkx's
``max_weight_clique(G, weight=None)`` on the identical graph (in a child
process with a time limit, reported as "> limit" when it does not finish).
A second table does the same on uniform random graphs G(n, p), the usual
test bed of clique algorithms, where networkx finishes.  Prints markdown
tables and writes them to benchmarks/results/clique.md.

Run from the repository root:  python benchmarks/clique.py [--sizes 100 500] [--nx-limit-s 120]
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy
import scipy.sparse
from scipy.spatial import cKDTree

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from closurecheck.core import se2  # noqa: E402
from closurecheck.verification.clique import CliqueOptions, max_clique  # noqa: E402
from closurecheck.verification.consistency import (  # noqa: E402
    ConsistencyOptions,
    pairwise_consistency,
)

RESULTS = Path(__file__).resolve().parent / "results" / "clique.md"


def scenario(k, seed=5, n_nodes=3000, outlier_fraction=0.3, group_fraction=0.05, group_size=6,
             step_m=0.5, area_m=30.0, odo_sigma=(0.01, 0.01, 0.002), loop_sigma=(0.05, 0.05, 0.01)):
    """K loop-closure candidates over one odometry chain.

    Returns (src, dst, delta, covariance, odometry poses, prefix, is_inlier),
    shuffled so that inliers and outliers are interleaved.
    """
    rng = np.random.default_rng(seed)
    truth = np.zeros((n_nodes, 3))
    heading = 0.0
    centre = np.array([area_m / 2, area_m / 2])
    pos = centre.copy()
    for i in range(1, n_nodes):
        heading += rng.normal(0.0, 0.15)
        to_centre = centre - pos
        if np.linalg.norm(to_centre) > 0.4 * area_m:  # turn back near the walls
            heading += 0.3 * se2.wrap(np.arctan2(to_centre[1], to_centre[0]) - heading)
        pos = pos + step_m * np.array([np.cos(heading), np.sin(heading)])
        truth[i] = [pos[0], pos[1], se2.wrap(heading)]
    true_steps = se2.between(truth[:-1], truth[1:])
    q = np.zeros((n_nodes - 1, 3, 3))
    q[:, [0, 1, 2], [0, 1, 2]] = np.square(odo_sigma)
    meas = true_steps + rng.normal(size=true_steps.shape) * odo_sigma
    rel, _ = se2.chain(meas)
    poses = se2.compose(truth[0], rel)
    prefix = se2.chain_prefix(poses, q)

    n_groups = int(round(group_fraction * k / group_size))
    n_alias = int(round(outlier_fraction * k)) - n_groups * group_size
    n_in = k - n_alias - n_groups * group_size
    pairs = np.array(sorted(cKDTree(truth[:, :2]).query_pairs(1.5)))
    pairs = pairs[np.abs(pairs[:, 1] - pairs[:, 0]) >= 30]
    inl = pairs[rng.choice(len(pairs), n_in, replace=False)]
    src = [inl[:, 1]]
    dst = [inl[:, 0]]
    delta = [se2.between(truth[inl[:, 1]], truth[inl[:, 0]])]
    a = rng.integers(0, n_nodes, 8 * n_alias + 8)
    b = rng.integers(0, n_nodes, 8 * n_alias + 8)
    far = np.linalg.norm(truth[a, :2] - truth[b, :2], axis=1) > 5.0
    src.append(a[far][:n_alias])
    dst.append(b[far][:n_alias])
    delta.append(np.column_stack([rng.uniform(-1.5, 1.5, n_alias), rng.uniform(-1.5, 1.5, n_alias),
                                  rng.uniform(-np.pi, np.pi, n_alias)]))
    for _ in range(n_groups):
        # A stretch of keyframes i0.. registered against j0.. as if j's room
        # were shifted by a fixed wrong offset: consistent within the group.
        i0 = int(rng.integers(0, n_nodes - 3 * group_size))
        j0 = int(rng.integers(0, n_nodes - 3 * group_size))
        wrong = np.array([rng.uniform(1.0, 3.0), rng.uniform(-1.0, 1.0), rng.uniform(-0.3, 0.3)])
        ii = i0 + 3 * np.arange(group_size)
        jj = j0 + 3 * np.arange(group_size)
        src.append(ii)
        dst.append(jj)
        delta.append(se2.between(truth[ii], se2.compose(wrong, truth[jj])))
    src = np.concatenate(src)
    dst = np.concatenate(dst)
    noise = rng.normal(size=(k, 3)) * loop_sigma
    delta = np.concatenate(delta) + noise
    delta[:, 2] = se2.wrap(delta[:, 2])
    cov = np.zeros((k, 3, 3))
    cov[:, [0, 1, 2], [0, 1, 2]] = np.square(loop_sigma)
    inlier = np.arange(k) < n_in
    perm = rng.permutation(k)
    return src[perm], dst[perm], delta[perm], cov[perm], poses, prefix, inlier[perm]


def networkx_worker(path):
    """Child process: time networkx on the stored graph, print 'seconds size'."""
    import networkx as nx

    adjacency = scipy.sparse.load_npz(path)
    graph = nx.from_scipy_sparse_array(adjacency)
    t0 = time.perf_counter()
    clique, size = nx.max_weight_clique(graph, weight=None)
    print(f"{time.perf_counter() - t0:.6f} {size}")


def time_networkx(adjacency, limit_s):
    """(seconds or None if over the limit, clique size or None)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "graph.npz"
        scipy.sparse.save_npz(path, scipy.sparse.csr_array(adjacency, dtype=np.int8))
        try:
            out = subprocess.run([sys.executable, __file__, "--networkx-worker", str(path)], capture_output=True,
                                 text=True, timeout=limit_s, check=True)
        except subprocess.TimeoutExpired:
            return None, None
        seconds, size = out.stdout.split()
        return float(seconds), int(size)


def timed(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[100, 500, 1000, 2000])
    parser.add_argument("--repeats", type=int, default=3, help="runs of ours per size (median)")
    parser.add_argument("--nx-limit-s", type=float, default=120.0, help="time limit for networkx per size")
    parser.add_argument("--max-expansions", type=int, default=CliqueOptions().max_expansions)
    parser.add_argument("--random-graphs", type=lambda t: (int(t.split(",")[0]), float(t.split(",")[1])),
                        nargs="*", default=[(100, 0.5), (200, 0.5), (150, 0.7), (300, 0.3), (60, 0.9)],
                        metavar="N,P", help="random graphs G(n, p) for the second table")
    parser.add_argument("--no-write", action="store_true", help="print only, do not write results/clique.md")
    parser.add_argument("--networkx-worker", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.networkx_worker:
        networkx_worker(args.networkx_worker)
        return

    options = CliqueOptions(max_expansions=args.max_expansions)
    rows = []
    for k in args.sizes:
        src, dst, delta, cov, poses, prefix, inlier = scenario(k)
        t_pair, pc = timed(lambda: pairwise_consistency(src, dst, delta, cov, poses, prefix, ConsistencyOptions()),
                           args.repeats)
        graph = pc.adjacency()  # the consistency graph itself (the complement of pc.conflicts)
        t_clique, res = timed(lambda: max_clique(graph, options=options), args.repeats)
        t_nx, nx_size = time_networkx(graph, args.nx_limit_s)
        chosen = np.zeros(k, dtype=bool)
        chosen[res.members] = True
        rows.append(dict(
            k=k, inliers=int(inlier.sum()), edges=graph.nnz // 2, t_pair=t_pair, size=res.size,
            exact=res.exact, canonical=res.canonical, expansions=res.expansions, upper=res.upper_bound,
            t_clique=t_clique, t_nx=t_nx, nx_size=nx_size,
            recall=float(np.mean(chosen[inlier])), precision=float(np.mean(inlier[chosen])) if res.size else 1.0,
        ))
        r = rows[-1]
        print(f"K={k}: pairs {t_pair:.3f} s, clique {r['size']} exact={r['exact']} in {t_clique:.3f} s, "
              f"networkx {'> limit' if t_nx is None else f'{t_nx:.3f} s'}", flush=True)

    lines = [
        "Pairwise consistency (PCM, 0.99) and maximum clique on the invented hall scenario "
        "(30% outliers: aliasing plus small mutually consistent groups).",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"numpy {np.__version__}, scipy {scipy.__version__}. Median of {args.repeats} runs for ours; networkx "
        f"max_weight_clique(weight=None) once, in a child process limited to {args.nx_limit_s:.0f} s. "
        f"Clique budget {args.max_expansions} expansions.",
        "",
        "| K | inliers | consistent pairs | pair matrix (s) | max clique (s) | networkx (s) | networkx / ours "
        "| clique size | exact | canonical | expansions | upper bound | inlier recall | precision |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- | --- | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        nx_t = f"> {args.nx_limit_s:.0f}" if r["t_nx"] is None else f"{r['t_nx']:.3f}"
        ratio = (f"> {args.nx_limit_s / r['t_clique']:.1f}" if r["t_nx"] is None
                 else f"{r['t_nx'] / r['t_clique']:.1f}")
        if r["nx_size"] is not None and r["exact"] and r["nx_size"] != r["size"]:
            ratio += " (size differs!)"
        lines.append(
            f"| {r['k']} | {r['inliers']} | {r['edges']} | {r['t_pair']:.3f} | {r['t_clique']:.3f} | {nx_t} | {ratio} "
            f"| {r['size']} | {r['exact']} | {r['canonical']} | {r['expansions']} | {r['upper']} "
            f"| {r['recall']:.3f} | {r['precision']:.3f} |"
        )
    lines += [
        "",
        "Uniform random graphs G(n, p) (fixed seed), same comparison.",
        "",
        "| n | p | edges | max clique (s) | networkx (s) | networkx / ours | clique size | networkx size | expansions |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    rng = np.random.default_rng(3)
    for n, p in args.random_graphs:
        upper = np.triu(rng.random((n, n)) < p, 1)
        adjacency = scipy.sparse.csr_array(upper | upper.T)
        t_ours, res = timed(lambda: max_clique(adjacency, options=options), args.repeats)
        t_nx, nx_size = time_networkx(adjacency, args.nx_limit_s)
        nx_t = f"> {args.nx_limit_s:.0f}" if t_nx is None else f"{t_nx:.3f}"
        ratio = f"> {args.nx_limit_s / t_ours:.1f}" if t_nx is None else f"{t_nx / t_ours:.1f}"
        lines.append(f"| {n} | {p} | {adjacency.nnz // 2} | {t_ours:.3f} | {nx_t} | {ratio} | {res.size} "
                     f"| {'-' if nx_size is None else nx_size} | {res.expansions} |")
        print(f"G({n}, {p}): ours {t_ours:.3f} s, networkx {nx_t} s", flush=True)
    table = "\n".join(lines) + "\n"
    print()
    print(table)
    if not args.no_write:
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text(table, encoding="utf-8")
        print(f"written to {RESULTS}")


if __name__ == "__main__":
    main()
