"""Benchmark: one factorisation and solve of the optimiser's normal matrix, by each candidate sparse solver.

The matrix is the damped, gauge-fixed J^T W J of benchmarks/optimizer.py's
wandering graph (N nodes, 2N edges) at the odometry chain, as the first
Levenberg-Marquardt step sees it.  Each candidate factorises it as it would
inside the optimiser's loop, the work done once per sparsity pattern
(orderings, symbolic analysis) left out of the timing where the package can
keep it:

* ``splu``: SuperLU through scipy, with the optimiser's reused ordering
  (closurecheck.graph.solver._splu_solve);
* ``cholmod``: CHOLMOD through cvxopt, the optimiser's default
  (closurecheck.graph.solver._Cholesky: numeric refactorisation only);
* ``cholespy``: CHOLMOD as bundled by cholespy, which analyses the pattern
  again at every construction (it has no refactorisation);
* ``qdldl``: QDLDL's LDL^T with AMD ordering, refactorised in place by
  ``Solver.update``.

The last two are not dependencies; rows for them appear when they are
installed (``pip install cholespy qdldl``).  Candidates run round-robin, one
BLAS thread; the medians of ``--repeats`` wall and CPU (this process)
times are given with their ratios to SuperLU, and the largest difference
of the solution from SuperLU's (relative).
Writes benchmarks/results/linear_solvers.md.

Run from the repository root:  python benchmarks/linear_solvers.py [--nodes 5000 20000]
"""

from __future__ import annotations

import argparse
import importlib
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from optimizer import wandering_graph  # noqa: E402

from closurecheck.graph.solver import SolverOptions, _Cholesky, _Graph, _splu_solve  # noqa: E402

RESULTS = Path(__file__).resolve().parent / "results" / "linear_solvers.md"


def normal_system(n):
    """Damped normal matrix (layout data) and right-hand side at the odometry chain of an N-node graph."""
    truth, initial, src, dst, delta, info, robust = wandering_graph(n, 2 * n)
    graph = _Graph(initial, src, dst, delta, info, robust)
    layout = graph.layout(np.ones(len(src), dtype=bool))
    e, _ = graph.errors(initial)
    data, grad = graph.linearise(initial, e, np.ones(len(src)), layout)
    data[layout.diag_slots] *= 1.0 + SolverOptions().initial_damping
    return layout, data, -grad


def candidates(layout, data, rhs):
    """(name, prepare once, factorise and solve) for each installed candidate."""
    a = layout.csc(data)
    options = SolverOptions(linear_solver="splu")
    out = [("splu (SuperLU, reused ordering)", lambda: _splu_solve(layout, a, rhs, options),
            lambda: _splu_solve(layout, a, rhs, options)[0])]
    chol = {}
    out.append(("cholmod via cvxopt (default)", lambda: chol.setdefault("f", _Cholesky(layout)),
                lambda: chol["f"].solve(data, rhs)))
    if importlib.util.find_spec("cholespy"):
        import cholespy

        indptr, indices = a.indptr.astype(np.int32), a.indices.astype(np.int32)

        def cholespy_solve():
            solver = cholespy.CholeskySolverD(a.shape[0], indptr, indices, a.data, cholespy.MatrixType.CSC)
            x = np.zeros_like(rhs)
            solver.solve(rhs, x)
            return x

        out.append(("cholespy (CHOLMOD, analysis every time)", lambda: None, cholespy_solve))
    if importlib.util.find_spec("qdldl"):
        import qdldl

        upper = sp.triu(a, format="csc")
        q = {}

        def qdldl_solve():
            q["s"].update(upper, upper=True)
            return q["s"].solve(rhs)

        out.append(("qdldl (LDL^T, update in place)", lambda: q.setdefault("s", qdldl.Solver(upper, upper=True)),
                    qdldl_solve))
    return out


def table(n, repeats):
    layout, data, rhs = normal_system(n)
    cands = candidates(layout, data, rhs)
    for _, prepare, _ in cands:
        prepare()
    walls = [[] for _ in cands]
    cpus = [[] for _ in cands]
    solutions = [None] * len(cands)
    for _ in range(repeats):
        for k, (_, _, run) in enumerate(cands):
            t0, c0 = time.perf_counter(), time.process_time()
            solutions[k] = run()
            cpus[k].append(time.process_time() - c0)
            walls[k].append(time.perf_counter() - t0)
    wall0, cpu0 = statistics.median(walls[0]), statistics.median(cpus[0])
    lines = [f"{n} nodes, {2 * n} edges: {layout.size} unknowns, {layout.nnz} stored entries; "
             f"load average {os.getloadavg()[0]:.1f} after the table.", "",
             "| solver | wall (s) | wall / splu | CPU (s) | CPU / splu | largest relative difference from splu |",
             "| --- | ---: | ---: | ---: | ---: | ---: |"]
    ref = solutions[0]
    for (name, _, _), w, c, x in zip(cands, walls, cpus, solutions):
        wall, cpu = statistics.median(w), statistics.median(c)
        diff = np.abs(x - ref).max() / np.abs(ref).max()
        lines.append(f"| {name} | {wall:.4f} | {wall / wall0:.2f} | {cpu:.4f} | {cpu / cpu0:.2f} | {diff:.1e} |")
    return lines


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, nargs="+", default=[5000, 20000])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--no-write", action="store_true")
    args = parser.parse_args(argv)
    lines = ["### Linear solvers for the optimiser's normal matrix (benchmarks/linear_solvers.py)", "",
             f"Median of {args.repeats} round-robin runs, one BLAS thread, "
             f"load average {os.getloadavg()[0]:.1f} at the start (2 cores, shared).", ""]
    with threadpool_limits(limits=1):
        for n in args.nodes:
            lines += table(n, args.repeats) + [""]
    text = "\n".join(lines)
    print(text)
    if not args.no_write:
        RESULTS.write_text(text, encoding="utf-8")
        print(f"written to {RESULTS}")


if __name__ == "__main__":
    main()
