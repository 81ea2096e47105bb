"""Benchmark: the maximum clique of the PCM conflicts as the closures grow, former search and current one.

Inputs are those of benchmarks/consistency.py (``closures``: the warehouse
route driven round and round, closures between visits within 1 m, 10%
look-alikes), without heading bias or scale error (as after the drift
calibration), pairs tested within a 300 m window.  Each variant runs in a
fresh process on the same conflict graph:

* ``former``: the search as shipped before the Nemhauser-Trotter split
  (``_kernel_search`` off, every expansion costs one unit, tie phase on
  every component), stopped after ``--limit-s`` seconds of wall time (its
  own ``max_seconds``), so it reports whether it finished;
* ``current``: ``max_clique_of_conflicts`` with the verification stage's
  budget (200,000 expansions), no time limit.

    python benchmarks/clique_scale.py [--sizes 2000 4000 8000 16000] [--limit-s 120]

Writes benchmarks/results/clique_scale.md.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))
RESULTS = ROOT / "benchmarks" / "results" / "clique_scale.md"


def child(k: int, variant: str, limit_s: float) -> None:
    import scipy.sparse

    from closurecheck.verification import clique
    from closurecheck.verification.consistency import ConsistencyOptions, pairwise_consistency
    from consistency import closures

    inputs, keyframes, _ = closures(k, 0.0, 0.0)
    pc = pairwise_consistency(*inputs, options=ConsistencyOptions(pair_probability=0.999, pair_window_m=300.0))
    conflicts = scipy.sparse.csr_array(pc.conflicts)
    options = clique.CliqueOptions(max_expansions=200_000)
    if variant == "former":
        clique._kernel_search = lambda *args: None
        clique._expansion_cost = lambda width: 1
        options = clique.CliqueOptions(max_expansions=200_000, max_seconds=limit_s, tie_max_vertices=10**9)
    t0, c0 = time.perf_counter(), time.process_time()
    res = clique.max_clique_of_conflicts(conflicts, options=options)
    print("RESULT " + json.dumps({
        "k": len(inputs[0]), "keyframes": keyframes, "conflicts": int(conflicts.nnz // 2),
        "wall_s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0, "size": res.size,
        "exact": res.exact, "canonical": res.canonical, "upper": res.upper_bound, "expansions": res.expansions,
        "members": res.members.tolist(), "load": "/".join(f"{v:.1f}" for v in os.getloadavg())}), flush=True)


def run_child(k, variant, limit_s) -> dict:
    cmd = [sys.executable, __file__, "--child", str(k), variant, "--limit-s", str(limit_s)]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
    return json.loads(next(line for line in out.splitlines() if line.startswith("RESULT "))[7:])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[2000, 4000, 8000, 16000])
    ap.add_argument("--limit-s", type=float, default=120.0, help="wall-clock limit of the former search")
    ap.add_argument("--no-write", action="store_true")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(int(args.child[0]), args.child[1], args.limit_s)
        return 0
    rows = []
    for k in args.sizes:
        former, current = run_child(k, "former", args.limit_s), run_child(k, "current", args.limit_s)
        same = former["members"] == current["members"]
        rows.append((former, current, same))
        keys = ("k", "cpu_s", "size", "exact", "canonical", "upper")
        print({key: former[key] for key in keys}, {key: current[key] for key in keys}, same, flush=True)
    lines = ["# Maximum clique of the PCM conflicts at scale (benchmarks/clique_scale.py)", "",
             f"`python benchmarks/clique_scale.py --sizes {' '.join(map(str, args.sizes))} "
             f"--limit-s {args.limit_s:g}`; "
             "CPU seconds of the clique call alone (each variant a fresh process; load average shown).  "
             "'former': the search before the Nemhauser-Trotter split, stopped at the time limit; "
             "'current': as committed, 200,000-expansion budget.", "",
             "| closures K | keyframes | conflicts | former: CPU s | former: clique (exact / canonical, bound) "
             "| current: CPU s | current: clique (exact / canonical, bound) | members | load |",
             "| ---: | ---: | ---: | ---: | --- | ---: | --- | --- | --- |"]
    for former, current, same in rows:
        def desc(r):
            return f"{r['size']} ({'exact' if r['exact'] else 'not exact'} / " \
                   f"{'canonical' if r['canonical'] else 'not canonical'}, <= {r['upper']})"
        lines.append(f"| {current['k']:,} | {current['keyframes']:,} | {current['conflicts']:,} | "
                     f"{former['cpu_s']:.2f} | {desc(former)} | {current['cpu_s']:.2f} | {desc(current)} | "
                     f"{'same' if same else 'differ'} | {current['load']} |")
    if len(rows) > 1:
        lines += ["", "Growth exponents between consecutive sizes, log(time ratio) / log(K ratio):", ""]
        for (f0, c0, _), (f1, c1, _) in zip(rows, rows[1:]):
            kk = np.log(c1["k"] / c0["k"])
            lines.append(f"- {c0['k']:,} -> {c1['k']:,}: former {np.log(f1['cpu_s'] / f0['cpu_s']) / kk:.2f}"
                         f"{' (time limit reached)' if not f1['exact'] or not f1['canonical'] else ''}, "
                         f"current {np.log(c1['cpu_s'] / c0['cpu_s']) / kk:.2f}")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_write:
        RESULTS.write_text(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
