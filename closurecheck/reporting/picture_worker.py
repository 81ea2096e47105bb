"""Most of the report's pictures drawn in a second Python process while the main one writes the other outputs.

Drawing the pictures is most of the write stage: on the 5,000-scan
warehouse log about 1.7 s of matplotlib plus 0.5 s to import it, against
about 0.8 s for graph.json, candidates.csv and the page's text (CPU time,
one process).  A second process, started when the write begins, imports
matplotlib and draws the pictures named in :data:`WORKER_PICTURES` while
the main process writes the files and the page's text and then draws the
others; it then collects the worker's PNGs.  The worker is a fresh
interpreter (``python -c``), never a fork: the main process holds threads
(the BLAS pool, perhaps a Dask client) that a fork does not copy safely.
It starts in about 0.35 s (Python, numpy and
:mod:`closurecheck.reporting.report`, which leaves scipy out for it).

Whatever goes wrong in the worker, the main process draws its pictures
itself (:func:`closurecheck.reporting.report.build_report`), so an error
is raised there, as without a worker, and the outputs are the same bytes.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import pickle
import subprocess
import sys

# Drawn by the worker, in this order.  The NEES and precision-recall
# pictures stay in the main process: the first needs scipy.stats (about
# 0.8 s to import in a fresh process), the second scoring's constants.
# The histograms stay too, to balance the two: on the 5,000-scan warehouse
# log the worker's share is 0.35 s to start, 0.5 s to import matplotlib and
# 1.0 s of pictures (maps 0.42, loops 0.28, agreement 0.16, truth 0.12),
# the main process' 0.8 s of files and page text, 0.5 s of import and
# 0.85 s of pictures (histograms 0.6, NEES 0.25).  With the histograms in
# the worker too the write took 2.7 and 4.2 s, without 2.5 and 2.2 s
# (wall time, load average 1.3-1.6 on 2 cores).
WORKER_PICTURES = ("map", "loops", "agreement", "truth")
# Drawn by a worker started in advance (:func:`standby_pictures`): its start and
# import are done by the write, so it also takes the histograms (0.6 s), and the
# two processes' shares become about 1.6 s each.
STANDBY_PICTURES = ("map", "loops", "checks", "agreement", "truth")

# The worker's program: the main process' import path first, so that it
# imports the same closurecheck.
_BOOT = ("import sys, json; sys.path[:0] = json.loads(sys.argv[1]); "
         "from closurecheck.reporting.picture_worker import serve; serve()")
_BOOT_STANDBY = ("import sys, json; sys.path[:0] = json.loads(sys.argv[1]); "
                 "from closurecheck.reporting.picture_worker import serve; serve(standby=True)")
# What a worker started in advance writes once it has imported matplotlib and is reading its input.
_READY = b"R"


class PictureJob:
    """A worker process drawing the pictures ``names`` of one report; :meth:`result` collects them.

    Start one with :func:`start_pictures`.  Use it as a context manager (or
    call :meth:`close`) so that the worker ends with the write, also when
    the write fails or is interrupted.
    """

    def __init__(self, proc: subprocess.Popen, names: tuple):
        self.proc = proc
        self.names = names

    def result(self) -> dict | None:
        """PNG bytes (or None where a picture does not apply) by picture name; None if the worker failed."""
        try:
            raw = self.proc.stdout.read()
            code = self.proc.wait()
        except OSError:
            return None
        if code != 0:
            return None
        try:
            pngs = pickle.loads(raw)
        except Exception:
            return None
        if not isinstance(pngs, dict) or set(pngs) != set(self.names):
            return None
        return pngs

    def close(self) -> None:
        """End the worker if it still runs (idempotent)."""
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        for pipe in (self.proc.stdin, self.proc.stdout):
            if pipe is not None and not pipe.closed:
                pipe.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def worth_a_worker(jobs: int) -> bool:
    """Whether a second process should draw the pictures: ``jobs`` (the run's worker setting,
    0 = all cores) allows more than one process, and a core is idle for it beside this process
    (:func:`busy_elsewhere`).

    The worker costs about 0.85 s of CPU time more than drawing everything
    here (its own start and matplotlib import), so it pays only where it
    runs beside the main process, not instead of it.  On the 5,000-scan
    warehouse log on 2 cores shared with another job, medians of three runs
    alternating with the code before the worker: 3.1 s with it against 3.5
    and 3.9 s without (two sets, one-minute load average 1.1-2.0), but 4.0
    against 3.2 s in a third set (load average 1.8-2.0), and 3.8-5.4 s
    against 3.0-4.2 s with another job using both cores (load average 3.5-4).
    """
    if jobs == 1:
        return False
    cores = _cores()
    if cores < 2:
        return False
    return busy_elsewhere() <= cores - 2


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # no sched_getaffinity (macOS, Windows)
        return os.cpu_count() or 1


def busy_elsewhere() -> float:
    """How many other tasks want a core now: the kernel's count of runnable tasks less this one
    (/proc/loadavg, the median of five readings 2 ms apart), or the one-minute load average
    less one where there is no /proc.

    Not the load average on Linux: it trails by a minute, and right after
    registration it still counts the run's own pool workers.
    """
    import time

    counts = []
    try:
        for k in range(5):
            if k:
                time.sleep(0.002)
            with open("/proc/loadavg") as f:
                counts.append(int(f.read().split()[3].split("/")[0]))
    except (OSError, ValueError, IndexError):
        try:
            return max(os.getloadavg()[0] - 1.0, 0.0)
        except (AttributeError, OSError):  # no load average (Windows)
            return 0.0
    return float(max(sorted(counts)[2] - 1, 0))


def _payload(data, names) -> bytes:
    """The worker's input: (names, data) pickled, the free-space result reduced to what the pictures read."""
    from .report import AgreementPairs

    fs = data.free_space
    if fs is not None:
        # The worker need not import the free-space module (and scipy) to read four arrays.
        data = dataclasses.replace(data, free_space=AgreementPairs(a=fs.a, b=fs.b, contradicts=fs.contradicts,
                                                                   length_m=fs.length_m))
    return pickle.dumps((tuple(names), data), protocol=pickle.HIGHEST_PROTOCOL)


def start_pictures(data, names: tuple | None = None) -> PictureJob | None:
    """Start a worker drawing the pictures ``names`` of ``data`` (a
    :class:`closurecheck.reporting.report.ReportData`; default :data:`WORKER_PICTURES`); None if it cannot start.

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.reporting.picture_worker import start_pictures
    >>> from closurecheck.reporting.report import ReportData
    >>> from closurecheck.verification.verdicts import VerdictTable
    >>> none = np.zeros(0, int)
    >>> table = VerdictTable(src=none, dst=none, origin=np.zeros(0, object), accepted=np.zeros(0, bool),
    ...                      reason=np.zeros(0, object), delta=np.zeros((0, 3)), covariance=np.zeros((0, 3, 3)))
    >>> data = ReportData(log_name="two scans", ids=np.arange(2), odom=np.zeros((2, 3)), poses=np.zeros((2, 3)),
    ...                   scan_points=[np.ones((3, 2)), np.ones((3, 2))], verdicts=table)
    >>> with start_pictures(data, ("map", "checks")) as job:
    ...     pngs = job.result()
    >>> pngs["map"][:8], pngs["checks"]
    (b'\\x89PNG\\r\\n\\x1a\\n', None)
    """
    names = WORKER_PICTURES if names is None else names
    payload = _payload(data, names)
    try:
        proc = subprocess.Popen([sys.executable, "-c", _BOOT, json.dumps(sys.path)], stdin=subprocess.PIPE,
                                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    except OSError:
        return None
    job = PictureJob(proc, tuple(names))
    try:
        # The worker reads everything before it imports anything, so this
        # waits only for the interpreter to start (tens of milliseconds).
        proc.stdin.write(payload)
        proc.stdin.close()
    except OSError:  # the worker is gone; result() says so
        pass
    except BaseException:
        job.close()
        raise
    return job


class Standby:
    """A picture worker started before the run's data exists (:func:`standby_pictures`).

    It imports matplotlib at the lowest priority while the run goes on, so
    it takes only time no other process wants (the idle core during the
    descriptors, candidates and verification stages), and at the write
    :meth:`take` hands it the report's data if it is ready by then.  Use it
    as a context manager so that an unused or failed worker ends with the run.
    """

    def __init__(self, proc: subprocess.Popen):
        self.proc = proc
        self._taken = False

    def ready(self) -> bool:
        """Whether the worker has imported matplotlib and waits for its data (never blocks)."""
        import select

        try:
            readable, _, _ = select.select([self.proc.stdout], [], [], 0.0)
            return bool(readable) and self.proc.stdout.read(len(_READY)) == _READY
        except (OSError, ValueError):
            return False

    def take(self, data, names: tuple = STANDBY_PICTURES) -> PictureJob | None:
        """Hand the worker ``data`` (a ReportData) to draw ``names``; None (and the worker ended) if it
        is not ready, so that the caller draws them another way."""
        if self._taken or not self.ready():
            self.close()
            return None
        self._taken = True
        job = PictureJob(self.proc, tuple(names))
        try:
            job.proc.stdin.write(_payload(data, names))
            job.proc.stdin.close()
        except OSError:  # the worker is gone; result() says so
            pass
        except BaseException:
            job.close()
            raise
        return job

    def close(self) -> None:
        """End the worker unless :meth:`take` handed it on (idempotent)."""
        if not self._taken:
            self._taken = True
            PictureJob(self.proc, ()).close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def standby_pictures(jobs: int) -> Standby | None:
    """Start a picture worker now, for a report written later (see :class:`Standby`); None where
    ``jobs`` (the run's worker setting, 0 = all cores) asks for one process, there is one core, or it
    cannot start.

    Measured on the 5,000-scan warehouse log: the write stage's worker
    started at the write spent about 0.85 s starting and importing
    matplotlib before its first picture, on the write's critical path.

    Examples
    --------
    >>> from closurecheck.reporting.picture_worker import standby_pictures
    >>> standby_pictures(1) is None
    True
    """
    if jobs == 1 or _cores() < 2:
        return None
    try:
        proc = subprocess.Popen([sys.executable, "-c", _BOOT_STANDBY, json.dumps(sys.path)], stdin=subprocess.PIPE,
                                stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    except OSError:
        return None
    return Standby(proc)


def serve(standby: bool = False) -> None:
    """The worker's main: read (names, data) from stdin, write {name: PNG bytes or None} to stdout.

    With ``standby`` (:func:`standby_pictures`) it first lowers its priority
    to the least, imports matplotlib and the report's module, and writes
    :data:`_READY` before it reads.
    """
    import signal

    # Ctrl-C reaches the whole process group; the main process handles it
    # and ends this one, which must not print a traceback of its own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    out = sys.stdout.buffer
    sys.stdout = sys.stderr  # nothing but the result may reach the result pipe
    try:
        if standby:
            with contextlib.suppress(OSError, AttributeError):     # no nice() on Windows
                os.nice(19)
            from .report import draw_picture

            out.write(_READY)
            out.flush()
        raw = sys.stdin.buffer.read()
        from .report import draw_picture

        names, data = pickle.loads(raw)
        pngs = {name: draw_picture(name, data) for name in names}
        out.write(pickle.dumps(pngs, protocol=pickle.HIGHEST_PROTOCOL))
        out.flush()
    except BaseException:
        # The main process draws the pictures itself and raises the error there.
        os._exit(1)
