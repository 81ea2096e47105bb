"""Progress on the terminal: a line per stage and a bar for long ones (tqdm)."""

from __future__ import annotations

import sys
import time

from ..verification.reasons import is_accepted


class Progress:
    """Stage announcements and bars on stderr; silent when ``quiet``."""

    def __init__(self, quiet: bool = False, verbose: bool = False, stream=None):
        self.quiet = quiet
        self.verbose = verbose
        self.stream = stream or sys.stderr
        self._bars: dict = {}
        self._t0 = time.perf_counter()

    def stage(self, name: str) -> None:
        self._close_bars()
        if not self.quiet:
            print(f"[{time.perf_counter() - self._t0:7.1f} s] {name}", file=self.stream, flush=True)

    def advance(self, stage: str, n: int, total: int) -> None:
        if self.quiet:
            return
        bar = self._bars.get(stage)
        if bar is None:
            from tqdm import tqdm

            bar = tqdm(total=total, desc=f"  {stage}", unit="pair", file=self.stream, leave=False,
                       dynamic_ncols=True, mininterval=0.5)
            self._bars[stage] = bar
        bar.update(n)

    def info(self, text: str) -> None:
        if self.verbose and not self.quiet:
            print(text, file=self.stream, flush=True)

    def _close_bars(self) -> None:
        for bar in self._bars.values():
            bar.close()
        self._bars.clear()

    def close(self) -> None:
        self._close_bars()


def format_summary(info: dict, paths: dict) -> str:
    """The one-screen summary printed at the end of a run."""
    lines = [f"{info['source']}: {info['scans']} scans, {info['keyframes']} keyframes",
             f"  candidates {info['candidates']}: {info['accepted']} verified, {info['rejected']} rejected"]
    trust = info.get("trust")
    if trust is not None:
        if trust["verdict"] == "sound":
            lines.append("  map: sound (every check of the run passed)")
        else:
            lines.append("  map: DOUBTFUL, do not use it without review:")
            lines.extend(f"    - {r}" for r in trust["reasons"])
    rej = {k: v for k, v in info["reasons"].items() if not is_accepted(k)}
    if rej:
        lines.append("  rejected by " + ", ".join(f"{k} {v}" for k, v in rej.items()))
    lines.append(f"  map correction: up to {info['correction_max_m']:.2f} m (mean {info['correction_mean_m']:.2f} m)")
    lines.append("  time: " + ", ".join(f"{k} {v:.1f} s" for k, v in info["timings_s"].items()))
    for note in info.get("notes", []):
        lines.append(f"  note: {note}")
    for name in ("graph", "candidates", "report"):
        if name in paths:
            lines.append(f"  {name}: {paths[name]}")
    return "\n".join(lines)


def describe_log(log, name) -> str:
    """The lines ``closurecheck info`` prints about a scan log."""
    import numpy as np

    s = log.sensor
    steps = np.hypot(*np.diff(log.odom[:, :2], axis=0).T) if len(log) > 1 else np.zeros(0)
    fov = np.degrees(abs(s.angle_step) * (s.beams - 1))
    valid = np.isfinite(log.ranges).mean() if log.ranges.size else 0.0
    lines = [
        f"{name}: {len(log)} scans over {log.t[-1] - log.t[0] if len(log) else 0.0:.1f} s",
        f"  sensor: {s.beams} beams over {fov:.1f} deg, ranges {s.min_range:g}-{s.max_range:g} m,"
        f" {100 * valid:.1f}% of beams with a return",
        f"  odometry: {steps.sum():.1f} m travelled",
        f"  ground truth: {'yes' if log.has_truth else 'no'}",
    ]
    if log.header.get("notes"):
        lines.append(f"  notes: {log.header['notes']}")
    return "\n".join(lines)
