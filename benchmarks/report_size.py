"""Report size: report.html of a long simulated warehouse log, and what takes the room.

Target: the report of a 5,000-scan log stays under 15 MB (it carries every
keyframe scan, to the centimetre, for its zoomable maps and overlays).

    python benchmarks/report_size.py [--scans 5000] [--seed 0] [--jobs 2] [--work DIR]

Simulates the log (``closurecheck simulate --scenario warehouse``), runs
it as ``closurecheck run`` does (truth included, so the scoring section and
its pictures are in), and splits the page into its parts: the embedded
data (scans, poses, candidates), the candidate table, the PNG pictures and
the rest.  Writes benchmarks/results/report_size.md.
"""

from __future__ import annotations

import argparse
import platform
import re
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

TARGET_MB = 15.0


def parts(text: str) -> dict:
    """Bytes of each part of report.html (UTF-8)."""
    size = {}
    data = re.search(r"<script type='application/json' id='report-data'>(.*?)</script>", text, re.S)
    table = re.search(r'<table class="sortable" id="candidates">.*?</table>', text, re.S)
    pngs = re.findall(r'src="data:image/png;base64,[^"]*"', text)
    size["embedded data (scans, poses, candidates)"] = len(data.group(1).encode()) if data else 0
    if data:
        scans = re.search(r'"points":"([^"]*)"', data.group(1))
        size["  of which keyframe scans"] = len(scans.group(1)) if scans else 0
    size["candidate table"] = len(table.group(0).encode()) if table else 0
    size["PNG pictures"] = sum(len(p) for p in pngs)
    total = len(text.encode())
    size["everything else (text, styles, script)"] = total - sum(v for k, v in size.items() if not k.startswith(" "))
    size["total"] = total
    return size


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scans", type=int, default=5000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--work", type=Path, default=None)
    ap.add_argument("--results", type=Path, default=ROOT / "benchmarks" / "results" / "report_size.md")
    args = ap.parse_args(argv)

    from closurecheck import cli

    work = args.work or Path(tempfile.mkdtemp(prefix="report_size_"))
    work.mkdir(parents=True, exist_ok=True)
    log = work / f"warehouse_{args.scans}.jsonl.gz"
    if not log.exists():
        assert cli.main(["simulate", "--scenario", "warehouse", "--seed", str(args.seed), "--scans",
                         str(args.scans), "--out", str(log), "-q"]) == 0
    out = work / "run"
    t0 = time.perf_counter()
    assert cli.main(["run", str(log), "--out", str(out), "--jobs", str(args.jobs), "-q"]) == 0
    wall = time.perf_counter() - t0
    import json

    summary = json.loads((out / "summary.json").read_text())
    text = (out / "report.html").read_text(encoding="utf-8")
    size = parts(text)
    mb = size["total"] / 1e6
    lines = [
        "# Report size",
        "",
        f"`python benchmarks/report_size.py --scans {args.scans} --seed {args.seed} --jobs {args.jobs}`",
        "",
        f"Machine: {platform.machine()}, Python {platform.python_version()}. Scenario 'warehouse' seed "
        f"{args.seed}, {summary['scans']} scans, {summary['keyframes']} keyframes, {summary['candidates']} "
        f"candidates, {summary['accepted']} verified; whole run {wall:.0f} s (report included, timings "
        "noisy on a shared machine).",
        "",
        "| part of report.html | MB |",
        "| --- | ---: |",
    ]
    lines += [f"| {k.strip()} | {v / 1e6:.2f} |" for k, v in size.items()]
    verdict = "met" if mb < TARGET_MB else "NOT met"
    lines += ["", "| target | measured | verdict |", "| --- | --- | --- |",
              f"| report.html of a {args.scans}-scan log < {TARGET_MB:g} MB | {mb:.2f} MB | {verdict} |"]
    text = "\n".join(lines)
    print(text)
    args.results.parent.mkdir(parents=True, exist_ok=True)
    args.results.write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
