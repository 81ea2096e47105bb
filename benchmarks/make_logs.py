"""Write simulated scan logs of chosen sizes for the other benchmarks.

    python benchmarks/make_logs.py --scans 20000 --beams 1081 --out /tmp/big.jsonl.gz
    python benchmarks/make_logs.py --scans 1000 5000 20000 --beams 721 1081 --out /tmp/logs/

With one size and an --out ending in .jsonl or .jsonl.gz the log goes to that
file; otherwise --out is a folder and each log is named
``<scenario>_<scans>x<beams>_seed<seed>.jsonl.gz``.  Prints, per log, the
time spent simulating (motion, ray casting, noise) and writing, and the file
size, so the generator's own speed is on record too.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closurecheck.io.scanlog import write_scanlog  # noqa: E402
from closurecheck.simulation import simulate  # noqa: E402


def targets(out: str, scenario: str, seed: int, sizes: list[tuple[int, int]]) -> list[tuple[int, int, Path]]:
    """Output path for each (scans, beams) size."""
    path = Path(out)
    if len(sizes) == 1 and path.name.endswith((".jsonl", ".jsonl.gz")):
        return [(sizes[0][0], sizes[0][1], path)]
    path.mkdir(parents=True, exist_ok=True)
    return [(n, b, path / f"{scenario}_{n}x{b}_seed{seed}.jsonl.gz") for n, b in sizes]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--scans", type=int, nargs="+", default=[20000], help="scans per log (default: 20000)")
    parser.add_argument("--beams", type=int, nargs="+", default=[1081], help="beams per scan (default: 1081)")
    parser.add_argument("--scenario", default="warehouse", choices=sorted(simulate.SCENARIOS))
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--out", required=True, help="a .jsonl(.gz) file for one size, or a folder")
    args = parser.parse_args(argv)
    if min(args.scans) < 1 or min(args.beams) < 2:
        parser.error("--scans must be >= 1 and --beams >= 2")

    sizes = [(n, b) for n in args.scans for b in args.beams]
    for scans, beams, path in targets(args.out, args.scenario, args.seed, sizes):
        t0 = time.perf_counter()
        log = simulate.simulate_log(args.scenario, seed=args.seed, scans=scans,
                                    options=simulate.SimOptions(beams=beams))
        t1 = time.perf_counter()
        write_scanlog(path, log)
        t2 = time.perf_counter()
        size_mb = path.stat().st_size / 1e6
        print(f"{path}: {scans} scans x {beams} beams ({args.scenario}, seed {args.seed}); "
              f"simulate {t1 - t0:.1f} s ({scans / (t1 - t0):.0f} scans/s), write {t2 - t1:.1f} s, "
              f"{size_mb:.1f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
