"""Progress on the terminal: a line per stage and step, a bar (or plain lines) for long stages."""

from __future__ import annotations

import sys
import time

from ..errors import one_line
from ..verification.reasons import is_accepted

# Plain progress lines (stderr not a terminal: a file, a pipe, CI) come at
# most this often; a bar redraws in place instead.
PLAIN_INTERVAL_S = 10.0


def format_duration(seconds: float) -> str:
    """A rough human duration: ``45 s``, ``3 min``, ``2 h 10 min``.

    Examples
    --------
    >>> format_duration(44.6), format_duration(200), format_duration(48000)
    ('45 s', '3 min', '13 h 20 min')
    """
    s = max(0.0, float(seconds))
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.0f} min"
    h, m = divmod(int(round(s / 60)), 60)
    return f"{h} h {m} min" if m else f"{h} h"


def _is_terminal(stream) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


class _Work:
    """Counts of one long stage (registration): pairs done, when it began, how parallel it is."""

    def __init__(self, total: int, parallel: int):
        self.total = total
        self.parallel = max(1, parallel)
        self.done = 0
        self.t0 = time.perf_counter()
        self.last_line = self.t0
        self.bar = None

    def remaining_s(self, first: bool = False) -> float:
        """Expected seconds to go at the pace so far.

        After the first batch the other workers' batches have been running
        for as long, so the pace is that batch's times the parallelism.
        """
        elapsed = max(time.perf_counter() - self.t0, 1e-9)
        rate = self.done / elapsed * (self.parallel if first else 1)
        return (self.total - self.done) / max(rate, 1e-12)


class Progress:
    """Stage announcements, steps and progress on stderr; silent when ``quiet``.

    On a terminal a long stage gets a bar that redraws in place (tqdm);
    otherwise (stderr piped to a file) it gets a plain line at most every
    :data:`PLAIN_INTERVAL_S` seconds, so a log file stays readable.  Either
    way, the first finished batch of a long stage prints the expected time.
    """

    def __init__(self, quiet: bool = False, verbose: bool = False, stream=None):
        self.quiet = quiet
        self.verbose = verbose
        self.stream = stream or sys.stderr
        self.terminal = _is_terminal(self.stream)
        self._work: dict[str, _Work] = {}
        self._t0 = time.perf_counter()
        self._stage = ""

    def _line(self, text: str) -> None:
        bars = [w.bar for w in self._work.values() if w.bar is not None]
        if bars:
            from tqdm import tqdm

            tqdm.write(text, file=self.stream)
        else:
            print(text, file=self.stream, flush=True)

    def _stamp(self) -> str:
        return f"[{time.perf_counter() - self._t0:7.1f} s]"

    def stage(self, name: str) -> None:
        """A new stage begins (closes the bars of the previous one)."""
        self._close_bars()
        self._stage = name
        if not self.quiet:
            self._line(f"{self._stamp()} {name}")

    def step(self, text: str) -> None:
        """A step inside the current stage (e.g. each file or picture written)."""
        if not self.quiet:
            self._line(f"{self._stamp()}   {text}")

    def note(self, text: str) -> None:
        """Something the user should know now (not only in the summary)."""
        if not self.quiet:
            self._line(f"note: {text}")

    def begin(self, stage: str, total: int, parallel: int = 1) -> None:
        """A long stage of ``total`` units starts, ``parallel`` of them at a time."""
        self._work[stage] = _Work(total, parallel)

    def advance(self, stage: str, n: int, total: int) -> None:
        """``n`` more units of ``stage`` are done (of ``total``)."""
        work = self._work.get(stage)
        if work is None or work.total != total:
            work = self._work[stage] = _Work(total, 1)
        first = work.done == 0
        work.done += n
        if self.quiet:
            return
        # Registration runs for the odometry calibration too: name the stage the user sees.
        stage = self._stage if self._stage and " " not in self._stage else stage
        now = time.perf_counter()
        if first and work.done < work.total:
            work.last_line = now
            self._line(f"  {stage}: {work.total} pairs; at the first batch's pace about "
                       f"{format_duration(work.remaining_s(first=True))} to go")
        if self.terminal:
            if work.bar is None:
                from tqdm import tqdm

                # No monitor thread: a thread left running at exit made
                # interrupts at shutdown unreliable.
                tqdm.monitor_interval = 0
                work.bar = tqdm(total=total, desc=f"  {stage}", unit="pair", file=self.stream, leave=False,
                                dynamic_ncols=True, mininterval=0.5)
                work.bar.update(work.done - n)
            work.bar.update(n)
            return
        if work.done >= work.total or now - work.last_line >= PLAIN_INTERVAL_S:
            work.last_line = now
            left = "" if work.done >= work.total else f", about {format_duration(work.remaining_s())} left"
            self._line(f"  {stage}: {work.done}/{work.total} pairs ({100.0 * work.done / max(work.total, 1):.0f}%)"
                       f", {format_duration(now - work.t0)} so far{left}")

    def info(self, text: str) -> None:
        if self.verbose and not self.quiet:
            self._line(text)

    def _close_bars(self) -> None:
        for work in self._work.values():
            if work.bar is not None:
                work.bar.close()
                work.bar = None
        self._work.clear()

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
        lines.append(f"  notes: {one_line(log.header['notes'], 300)}")
    return "\n".join(lines)
