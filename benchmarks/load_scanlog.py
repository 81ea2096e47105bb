"""Scan-log loading: time and peak memory of read_scanlog on a long log.

Side by side in one run with a naive reference reader (json.loads per line,
ranges kept as Python lists, converted at the end: what one writes first),
each in a fresh subprocess so peak RSS is its own.

    python benchmarks/load_scanlog.py [--scans 20000] [--beams 1081] [--log PATH]

Without --log, a simulated log of the requested size is written to a
temporary folder first (benchmarks/make_logs.py does the same on its own).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

READERS = {
    "closurecheck.read_scanlog": """
from closurecheck.io.scanlog import read_scanlog
log = read_scanlog(PATH)
shape = log.ranges.shape
""",
    "naive json + lists (reference)": """
import gzip, json, numpy as np
opener = gzip.open if open(PATH, 'rb').read(2) == b'\\x1f\\x8b' else open
rows, odom, t = [], [], []
with opener(PATH, 'rt') as fh:
    header = json.loads(fh.readline())
    for line in fh:
        rec = json.loads(line)
        rows.append(rec['ranges']); odom.append(rec['odom']); t.append(rec['t'])
ranges = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float32)
shape = ranges.shape
""",
}

# Peak memory from /proc (VmHWM): unlike getrusage's ru_maxrss it is not
# inherited from the parent across fork and exec.
CHILD = """
import sys, time
sys.path.insert(0, {root!r})
PATH = {path!r}
def hwm():
    for line in open('/proc/self/status'):
        if line.startswith('VmHWM:'):
            return int(line.split()[1]) / 1024.0
base = hwm()
t0 = time.perf_counter()
{body}
dt = time.perf_counter() - t0
peak = hwm()
print(dt, peak, peak - base, shape[0], shape[1])
"""


def measure(name: str, path: Path) -> dict:
    code = CHILD.format(root=str(ROOT), path=str(path), body=READERS[name])
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout
    dt, peak, added, n, b = out.split()
    return {"reader": name, "seconds": float(dt), "peak_mb": float(peak), "added_mb": float(added),
            "scans": int(n), "beams": int(b)}


def make_log(path: Path, scans: int, beams: int) -> None:
    from closurecheck.io.scanlog import write_scanlog
    from closurecheck.simulation import simulate

    opts = simulate.SimOptions(beams=beams)
    write_scanlog(path, simulate.simulate_log("warehouse", seed=1, scans=scans, options=opts))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scans", type=int, default=20000)
    ap.add_argument("--beams", type=int, default=1081)
    ap.add_argument("--log", type=Path, default=None, help="existing log to load instead of simulating one")
    ap.add_argument("--skip-reference", action="store_true", help="time only closurecheck's reader")
    ap.add_argument("--results", type=Path, default=ROOT / "benchmarks" / "results" / "load_scanlog.md")
    args = ap.parse_args(argv)

    tmp = None
    path = args.log
    if path is None:
        tmp = tempfile.TemporaryDirectory()
        path = Path(tmp.name) / f"bench_{args.scans}x{args.beams}.jsonl.gz"
        t0 = time.perf_counter()
        make_log(path, args.scans, args.beams)
        print(f"simulated {args.scans} x {args.beams} log in {time.perf_counter() - t0:.1f} s", file=sys.stderr)

    names = list(READERS)[:1] if args.skip_reference else list(READERS)
    rows = [measure(n, path) for n in names]
    size_mb = os.path.getsize(path) / 2**20
    with open(path, "rb") as fh:
        kind = "gzip" if fh.read(2) == b"\x1f\x8b" else "plain"
    lines = [
        f"Log: {rows[0]['scans']} scans x {rows[0]['beams']} beams, {size_mb:.0f} MB on disk ({kind}).",
        "",
        "| reader | load time (s) | peak RSS (MB) | peak RSS added by loading (MB) |",
        "| --- | ---: | ---: | ---: |",
    ]
    for r in rows:
        lines.append(f"| {r['reader']} | {r['seconds']:.1f} | {r['peak_mb']:.0f} | {r['added_mb']:.0f} |")
    if len(rows) == 2:
        lines += ["", f"Time ratio closurecheck / reference: {rows[0]['seconds'] / rows[1]['seconds']:.2f};"
                  f" memory ratio: {rows[0]['added_mb'] / max(rows[1]['added_mb'], 1e-9):.2f}."]
    text = "\n".join(lines)
    print(text)
    args.results.parent.mkdir(parents=True, exist_ok=True)
    args.results.write_text(text + "\n")
    print(json.dumps(rows), file=sys.stderr)
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
