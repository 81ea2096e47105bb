"""Benchmark: sparse LM pose-graph optimiser against scipy.optimize.least_squares.

Builds a synthetic graph (default 5,000 nodes, 10,000 edges: an odometry
chain plus loop edges between revisits of a wandering trajectory), times our
optimiser with its default linear solver (sparse Cholesky, CHOLMOD through
cvxopt) and with SuperLU (the former default), median of several runs, and,
in the same run, scipy's ``least_squares`` (trust-region reflective with
lsmr steps, sparse ``jac_sparsity``, finite differences) on the identical
whitened residuals.  Wall time and this process's CPU time are both given:
on a shared machine the wall time grows with the load, the CPU time much
less.  A second table times the robust back-stops with 20% wrong loop
edges.  With ``--large`` a third table times the 100,000-node case (200,000
edges, same density of revisits), the default against SuperLU and,
unless skipped, scipy's ``least_squares`` on the same graph; it takes
minutes.  Every table also times the two fast choices a caller can make
(``initial_damping=1e-10``, and that from
``closurecheck.graph.initial.heading_first_poses``); ``--before COMMIT``
adds solver.py as it was at that commit, in the same process, and
``--large-tight`` compares the large case's optima with a run to 1e-15.
Prints markdown tables and writes them to benchmarks/results/optimizer.md.

Run from the repository root:  python benchmarks/optimizer.py [--nodes N] [--edges E] [--large] [--before COMMIT]
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import cvxopt
import numpy as np
import scipy
import scipy.sparse as sp
from scipy.optimize import least_squares
from scipy.spatial import cKDTree
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from closurecheck.core import se2  # noqa: E402
from closurecheck.core.kernels import Kernel  # noqa: E402
from closurecheck.graph.initial import heading_first_poses  # noqa: E402
from closurecheck.graph.solver import (  # noqa: E402
    GncOptions,
    SolverOptions,
    optimize_gnc,
    optimize_graph,
)

RESULTS = Path(__file__).resolve().parent / "results" / "optimizer.md"
REPO = Path(__file__).resolve().parents[1]

# The damping with which the fast variants start.  Marquardt's damping lambda * diag(J^T W J) holds back
# the long, flat deformations of a large graph (the smallest eigenvalues of J^T W J are far below its
# diagonal), so with the default 1e-5 the steps after the first few crawl (2-20 mm each at 100,000 nodes)
# until the cost tolerance stops them; LM still raises lambda after any rejected step.
FAST_DAMPING = 1e-10


def solver_at(commit):
    """closurecheck/graph/solver.py as it was at ``commit`` (git), loaded beside the current one.

    Its relative imports (closurecheck.core) resolve to the current package, so this times an earlier
    optimiser on the same helpers: the "before" of a change to solver.py, in the same process.
    """
    text = subprocess.run(["git", "show", f"{commit}:closurecheck/graph/solver.py"], cwd=REPO, check=True,
                          capture_output=True, text=True).stdout
    path = Path(tempfile.mkdtemp()) / "solver.py"
    path.write_text(text, encoding="utf-8")
    name = f"closurecheck.graph._solver_at_{commit}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


def fast_variants(initial, src, dst, delta, info, robust):
    """The two fast variants: small initial damping from the odometry chain, and from the heading-first start.

    The second's time includes building its start (closurecheck.graph.initial.heading_first_poses).
    """
    fast = SolverOptions(initial_damping=FAST_DAMPING)
    return [
        (f"ours: LM from the odometry chain, initial_damping {FAST_DAMPING:g}",
         lambda: optimize_graph(initial, src, dst, delta, info, robust, options=fast)),
        (f"ours: heading-first start (graph.initial, timed) + LM, initial_damping {FAST_DAMPING:g}",
         lambda: optimize_graph(heading_first_poses(initial, src, dst, delta, info), src, dst, delta, info, robust,
                                options=fast)),
    ]


def wandering_graph(n_nodes, n_edges, seed=7, step_m=0.5, area_m=None, loop_radius_m=1.5, min_gap=30,
                    odo_sigma=(0.02, 0.02, 0.004), loop_sigma=(0.05, 0.05, 0.01)):
    """Synthetic pose graph: a smooth random walk in a square area and loops between revisits.

    Returns (truth, initial, src, dst, delta, information, robust); initial is
    the noisy odometry chain, loop edges come from pairs of nodes closer than
    ``loop_radius_m`` and at least ``min_gap`` steps apart.
    """
    rng = np.random.default_rng(seed)
    if area_m is None:
        # Keep the density of revisits fixed: a 40 m square for 5,000 steps of 0.5 m.
        area_m = 40.0 * np.sqrt(n_nodes / 5000.0)
    truth = np.zeros((n_nodes, 3))
    heading = 0.0
    pos = np.array([area_m / 2, area_m / 2])
    for k in range(1, n_nodes):
        heading += rng.normal(0.0, 0.15)
        # Turn back towards the centre near the walls so the walk keeps revisiting.
        to_centre = np.array([area_m / 2, area_m / 2]) - pos
        if np.linalg.norm(to_centre) > 0.4 * area_m:
            want = np.arctan2(to_centre[1], to_centre[0])
            heading += 0.3 * se2.wrap(want - heading)
        pos = pos + step_m * np.array([np.cos(heading), np.sin(heading)])
        truth[k] = [pos[0], pos[1], se2.wrap(heading)]
    pairs = cKDTree(truth[:, :2]).query_pairs(loop_radius_m, output_type="ndarray")
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]  # the order sorted() gives a set of tuples
    pairs = pairs[np.abs(pairs[:, 1] - pairs[:, 0]) >= min_gap]
    n_loops = n_edges - (n_nodes - 1)
    if len(pairs) < n_loops:
        raise SystemExit(f"only {len(pairs)} loop pairs available, need {n_loops}")
    pairs = pairs[rng.choice(len(pairs), n_loops, replace=False)]
    src = np.concatenate([np.arange(n_nodes - 1), pairs[:, 1]])
    dst = np.concatenate([np.arange(1, n_nodes), pairs[:, 0]])
    sigma = np.concatenate([np.tile(odo_sigma, (n_nodes - 1, 1)), np.tile(loop_sigma, (n_loops, 1))])
    delta = se2.between(truth[src], truth[dst]) + rng.normal(size=sigma.shape) * sigma
    delta[:, 2] = se2.wrap(delta[:, 2])
    information = np.zeros((len(src), 3, 3))
    information[:, [0, 1, 2], [0, 1, 2]] = 1.0 / sigma**2
    robust = np.arange(len(src)) >= n_nodes - 1
    steps, _ = se2.chain(delta[: n_nodes - 1])
    initial = se2.compose(truth[0], steps)
    return truth, initial, src, dst, delta, information, robust


def scipy_reference(initial, src, dst, delta, information):
    """scipy.optimize.least_squares on whitened residuals L^T e (Omega = L L^T), node 0 fixed."""
    chol = np.linalg.cholesky(information)
    n = len(initial)
    anchor = initial[:1]

    def residuals(p):
        x = np.vstack([anchor, p.reshape(-1, 3)])
        e = se2.between(x[src], x[dst]) - delta
        e[:, 2] = se2.wrap(e[:, 2])
        return np.einsum("eji,ej->ei", chol, e).ravel()

    # Each edge's 3 residuals depend on the 3 + 3 parameters of its two nodes.
    rows = np.repeat(np.arange(3 * len(src)), 6)
    node_cols = np.stack([src, dst], 1) - 1
    cols = (3 * node_cols[:, None, :, None] + np.arange(3)[None, None, None, :])
    cols = np.broadcast_to(cols, (len(src), 3, 2, 3)).reshape(-1)
    keep = cols >= 0
    sparsity = sp.coo_matrix((np.ones(keep.sum()), (rows[keep], cols[keep])), shape=(3 * len(src), 3 * (n - 1)))
    # lsmr's default tolerances (1e-6) give inexact trust-region steps and
    # hundreds of iterations on pose graphs (measured: 400+ at 2,000 nodes);
    # tight tolerances converge in a handful, which is the fairer comparison.
    res = least_squares(residuals, initial[1:].ravel(), jac_sparsity=sparsity.tocsr(), method="trf",
                        tr_solver="lsmr", x_scale="jac", tr_options={"atol": 1e-12, "btol": 1e-12},
                        ftol=1e-10, xtol=1e-10, gtol=1e-10)
    return np.vstack([anchor, res.x.reshape(-1, 3)]), res.cost, res.nfev, res.njev


def timed_interleaved(fns, repeats):
    """Median wall and CPU time of each callable, running them round-robin so load spikes on a
    shared machine hit every variant alike.  Returns [(median_wall_s, median_cpu_s, last_result), ...]."""
    walls = [[] for _ in fns]
    cpus = [[] for _ in fns]
    results = [None] * len(fns)
    for _ in range(repeats):
        for k, fn in enumerate(fns):
            t0, c0 = time.perf_counter(), time.process_time()
            results[k] = fn()
            cpus[k].append(time.process_time() - c0)
            walls[k].append(time.perf_counter() - t0)
    return [(statistics.median(w), statistics.median(c), r) for w, c, r in zip(walls, cpus, results)]


def rms_m(poses, truth):
    """Position RMS error (m) against the synthetic truth (same frame: node 0 starts at the truth)."""
    return float(np.sqrt(np.mean(np.sum((poses[:, :2] - truth[:, :2]) ** 2, axis=1))))


def solver_table(args, truth, initial, src, dst, delta, info, robust):
    """Our LM variants and scipy's least_squares on the clean graph."""
    variants = [
        (DEFAULT_LABEL, SolverOptions(), None),
        (SPLU_LABEL, SolverOptions(linear_solver="splu"), None),
        ("ours: LM, splu + CG preconditioned by the previous factor (splu_pcg)",
         SolverOptions(linear_solver="splu_pcg"), None),
        ("ours: LM + Cauchy IRLS on loops (scale 1), default solver", SolverOptions(), Kernel("cauchy", 1.0)),
    ]

    def ours(options, kernel):
        return lambda: optimize_graph(initial, src, dst, delta, info, robust, kernel=kernel, options=options)

    fns = [ours(options, kernel) for _, options, kernel in variants]
    labels = [label for label, _, _ in variants]
    for label, fn in fast_variants(initial, src, dst, delta, info, robust):
        labels.append(label)
        fns.append(fn)
    if args.before:
        before = solver_at(args.before)
        labels.append(f"ours at commit {args.before} (before), default options")
        fns.append(lambda: before.optimize_graph(initial, src, dst, delta, info, robust))
    if not args.skip_reference:
        fns.append(lambda: scipy_reference(initial, src, dst, delta, info))
        labels.append("scipy least_squares (trf, lsmr, jac_sparsity)")
    timings = timed_interleaved(fns, args.repeats)
    lines = [TABLE_HEAD, TABLE_RULE]
    lines += solver_rows(labels, timings, truth, time_fmt=".3f", cost_fmt=".6g")
    lines += [""] + agreements(labels, timings)
    return lines


def agreements(labels, timings):
    """One line per other row solving the same (non-robust) problem: its optimum against the default's,
    and, when scipy's least_squares ran (last row), each of ours against scipy's."""
    same = [k for k, label in enumerate(labels) if k > 0 and "Cauchy" not in label]
    lines = [agreement(timings[0][2], timings[k][2], labels[k]) for k in same]
    if labels[-1].startswith("scipy"):
        lines += [agreement(timings[k][2], timings[-1][2], "scipy least_squares", ours_name=labels[k])
                  for k in same[:-1] if "SuperLU" not in labels[k] and "splu" not in labels[k]]
    return lines


DEFAULT_LABEL = "ours: LM, Cholesky (CHOLMOD via cvxopt; default)"
SPLU_LABEL = "ours: LM, SuperLU, MMD_AT_PLUS_A ordering reused (splu; the former default)"
TABLE_HEAD = ("| solver | wall (s) | wall / default | CPU (s) | CPU / default | iterations | final cost | converged "
              "| position RMS (m) |")
TABLE_RULE = "| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- | ---: |"


def _poses_cost(result):
    return (result[0], result[1]) if isinstance(result, tuple) else (result.poses, result.cost)


def agreement(ours, other, name, ours_name="Default"):
    """One line: how far another solver's optimum is from one of ours (cost and poses)."""
    (poses, cost), (base, base_cost) = _poses_cost(other), _poses_cost(ours)
    diff = np.abs(poses - base)
    diff[:, 2] = np.abs(se2.wrap(poses[:, 2] - base[:, 2]))
    return (f"{ours_name} vs {name}: relative cost difference {abs(cost - base_cost) / base_cost:.1e}, largest pose "
            f"difference {diff[:, :2].max():.1e} m / {diff[:, 2].max():.1e} rad.")


def outlier_table(args, truth, initial, src, dst, delta, info, robust, fraction=0.2, seed=3):
    """Robust back-stops when a fraction of the loop edges is replaced by wrong relative poses."""
    rng = np.random.default_rng(seed)
    loops = np.flatnonzero(robust)
    wrong = rng.choice(loops, int(round(fraction * len(loops))), replace=False)
    bad = delta.copy()
    bad[wrong] = np.c_[rng.uniform(-5, 5, (len(wrong), 2)), rng.uniform(-np.pi, np.pi, len(wrong))]
    is_wrong = np.zeros(len(src), dtype=bool)
    is_wrong[wrong] = True
    runs = [
        ("least squares, no kernel", lambda: optimize_graph(initial, src, dst, bad, info, robust)),
        ("Cauchy IRLS (scale 1)", lambda: optimize_graph(initial, src, dst, bad, info, robust,
                                                          kernel=Kernel("cauchy", 1.0))),
        ("GNC Geman-McClure", lambda: optimize_gnc(initial, src, dst, bad, info, robust)),
        ("GNC truncated least squares", lambda: optimize_gnc(
            initial, src, dst, bad, info, robust, GncOptions(surrogate="truncated_least_squares"))),
        (f"Cauchy IRLS (scale 1), initial_damping {FAST_DAMPING:g}", lambda: optimize_graph(
            initial, src, dst, bad, info, robust, kernel=Kernel("cauchy", 1.0),
            options=SolverOptions(initial_damping=FAST_DAMPING))),
        (f"GNC Geman-McClure, initial_damping {FAST_DAMPING:g}", lambda: optimize_gnc(
            initial, src, dst, bad, info, robust,
            GncOptions(solver=replace(SolverOptions(), initial_damping=FAST_DAMPING)))),
    ]
    lines = [f"{len(wrong)} of {len(loops)} loop edges ({fraction:.0%}) replaced by random relative poses "
             f"(uniform in 10 m x 10 m x 2 pi).",
             "",
             "| method | time (s) | iterations | position RMS (m) | wrong loops with weight < 0.1 | "
             "right loops with weight >= 0.1 |",
             "| --- | ---: | ---: | ---: | ---: | ---: |"]
    for (label, _), (t, _, sol) in zip(runs, timed_interleaved([fn for _, fn in runs], args.repeats)):
        low = sol.weights < 0.1
        lines.append(f"| {label} | {t:.3f} | {sol.iterations} | {rms_m(sol.poses, truth):.3f} | "
                     f"{np.count_nonzero(low & is_wrong)} / {len(wrong)} | "
                     f"{np.count_nonzero(~low & robust & ~is_wrong)} / {len(loops) - len(wrong)} |")
    return lines


def large_table(args):
    """The 100,000-node case: our default solver against SuperLU and scipy's least_squares, side by side."""
    n, e = args.large_nodes, 2 * args.large_nodes
    t0 = time.perf_counter()
    truth, initial, src, dst, delta, info, robust = wandering_graph(n, e)
    built_s = time.perf_counter() - t0
    fns = [lambda: optimize_graph(initial, src, dst, delta, info, robust)]
    labels = [DEFAULT_LABEL]
    if args.before:
        before = solver_at(args.before)
        labels.append(f"ours at commit {args.before} (before), default options")
        fns.append(lambda: before.optimize_graph(initial, src, dst, delta, info, robust))
    for label, fn in fast_variants(initial, src, dst, delta, info, robust):
        labels.append(label)
        fns.append(fn)
    if not args.large_skip_splu:
        fns.append(lambda: optimize_graph(initial, src, dst, delta, info, robust,
                                          options=SolverOptions(linear_solver="splu")))
        labels.append(SPLU_LABEL)
    reference = not (args.skip_reference or args.large_skip_reference)
    if reference:
        fns.append(lambda: scipy_reference(initial, src, dst, delta, info))
        labels.append("scipy least_squares (trf, lsmr, jac_sparsity)")
    load = os.getloadavg()[0]
    timings = timed_interleaved(fns, args.large_repeats)
    lines = [(f"{n} nodes, {e} edges ({n - 1} odometry, {e - n + 1} loops; graph built in {built_s:.1f} s, "
              f"not timed), started from the odometry chain (position RMS {rms_m(initial, truth):.3f} m); "
              f"median of {args.large_repeats} run(s); load average {load:.1f} at the start of this table, "
              f"{os.getloadavg()[0]:.1f} at its end."),
             "",
             TABLE_HEAD, TABLE_RULE]
    lines += solver_rows(labels, timings, truth, time_fmt=".2f", cost_fmt=".8g")
    lines += [""] + agreements(labels, timings)
    if not reference:
        lines += ["scipy's least_squares was not run on this size (--large-skip-reference)."]
    if args.large_tight:
        lines += [""] + tight_agreement(labels, timings, initial, src, dst, delta, info, robust)
    return lines


def tight_agreement(labels, timings, initial, src, dst, delta, info, robust):
    """Each row's optimum against our LM run to far tighter tolerances (where least_squares would take minutes)."""
    tight = SolverOptions(initial_damping=FAST_DAMPING, relative_cost_tolerance=1e-15, step_tolerance=1e-11)
    c0 = time.process_time()
    ref = optimize_graph(heading_first_poses(initial, src, dst, delta, info), src, dst, delta, info, robust,
                         options=tight)
    lines = [f"Tight reference: heading-first start, LM with initial_damping {FAST_DAMPING:g}, relative cost "
             f"tolerance 1e-15, step tolerance 1e-11: {ref.iterations} iterations, {time.process_time() - c0:.1f} s "
             f"CPU, cost {ref.cost!r}, converged {ref.converged}."]
    lines += [agreement(ref, t[2], label, ours_name="Tight reference") for label, t in zip(labels, timings)]
    return lines


def solver_rows(labels, timings, truth, time_fmt: str, cost_fmt: str) -> list:
    """Markdown rows of the solver table (ratios to the first row): ours (a solution record) or scipy's (a tuple)."""
    base_wall, base_cpu, _ = timings[0]
    rows = []
    for label, (wall, cpu, sol) in zip(labels, timings):
        if isinstance(sol, tuple):
            poses, cost, _, iterations = sol
            converged = True
        else:
            poses, cost, iterations, converged = sol.poses, sol.cost, sol.iterations, sol.converged
        rows.append(f"| {label} | {wall:{time_fmt}} | {wall / base_wall:.2f} | {cpu:{time_fmt}} | "
                    f"{cpu / base_cpu:.2f} | {iterations} | {cost:{cost_fmt}} | {converged} | "
                    f"{rms_m(poses, truth):.3f} |")
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=5000)
    parser.add_argument("--edges", type=int, default=10000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--skip-reference", action="store_true", help="do not run scipy's least_squares")
    parser.add_argument("--large", action="store_true",
                        help="also time the 100,000-node case against scipy's least_squares (minutes)")
    parser.add_argument("--large-nodes", type=int, default=100_000, help="nodes of the --large case")
    parser.add_argument("--large-skip-reference", action="store_true",
                        help="in the --large case, do not run scipy's least_squares")
    parser.add_argument("--large-repeats", type=int, default=1, help="runs of each solver in the --large case")
    parser.add_argument("--large-tight", action="store_true",
                        help="in the --large case, also compare every optimum with an LM run to tolerances 1e-15")
    parser.add_argument("--large-skip-splu", action="store_true",
                        help="in the --large case, do not run the SuperLU solver (minutes at 100,000 nodes)")
    parser.add_argument("--before", metavar="COMMIT",
                        help="also time closurecheck/graph/solver.py as it was at this git commit, same process")
    parser.add_argument("--no-write", action="store_true", help="print only, do not write results/optimizer.md")
    parser.add_argument("--blas-threads", type=int, default=1,
                        help="BLAS threads during the timings (0: library default). On this shared 2-core "
                             "machine OpenBLAS threads contending with other processes made scipy's "
                             "least_squares 15-50x slower (measured), so the default pins one thread.")
    args = parser.parse_args(argv)
    if args.blas_threads > 0:
        with threadpool_limits(limits=args.blas_threads):
            return run(args)
    return run(args)


def run(args):
    """Build the graph, run both tables, print and (unless --no-write) save them."""
    graph = wandering_graph(args.nodes, args.edges)
    truth, initial = graph[0], graph[1]
    lines = [
        "### Pose-graph optimiser (benchmarks/optimizer.py)",
        "",
        f"Synthetic graph: {args.nodes} nodes, {args.edges} edges ({args.nodes - 1} odometry, "
        f"{args.edges - args.nodes + 1} loops), node 0 fixed, started from the odometry chain "
        f"(position RMS {rms_m(initial, truth):.3f} m). "
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"numpy {np.__version__}, scipy {scipy.__version__}, cvxopt {cvxopt.__version__}. "
        f"BLAS threads: {args.blas_threads or 'library default'}. "
        f"Load average at the start: {os.getloadavg()[0]:.1f} (other processes share the cores). "
        f"Times are the median of {args.repeats} runs, variants run round-robin; wall time and this "
        f"process's CPU time, ratios to the default's; iterations = Jacobian evaluations.",
        "",
    ]
    lines += solver_table(args, *graph)
    lines += ["", "Final cost is 0.5 sum e^T Omega e, except for the Cauchy row, whose loop edges count "
              "rho(sqrt(e^T Omega e)) instead."]
    lines += ["", "Robust back-stops on the same graph:", ""]
    lines += outlier_table(args, *graph)
    lines += ["", f"Load average at the end of the {args.nodes}-node tables: {os.getloadavg()[0]:.1f}."]
    if args.large:
        lines += ["", f"Large graph ({args.large_nodes} nodes):", ""]
        lines += large_table(args)
    table = "\n".join(lines) + "\n"
    print(table)
    if not args.no_write:
        RESULTS.parent.mkdir(parents=True, exist_ok=True)
        RESULTS.write_text(table, encoding="utf-8")
        print(f"written to {RESULTS}")


if __name__ == "__main__":
    main()
