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

# The worker's program: the main process' import path first, so that it
# imports the same closurecheck.
_BOOT = ("import sys, json; sys.path[:0] = json.loads(sys.argv[1]); "
         "from closurecheck.reporting.picture_worker import serve; serve()")


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
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # no sched_getaffinity (macOS, Windows)
        cores = os.cpu_count() or 1
    if cores < 2:
        return False
    return busy_elsewhere() <= cores - 2


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
    from .report import AgreementPairs

    names = WORKER_PICTURES if names is None else names
    fs = data.free_space
    if fs is not None:
        # The worker need not import the free-space module (and scipy) to read four arrays.
        data = dataclasses.replace(data, free_space=AgreementPairs(a=fs.a, b=fs.b, contradicts=fs.contradicts,
                                                                   length_m=fs.length_m))
    payload = pickle.dumps((tuple(names), data), protocol=pickle.HIGHEST_PROTOCOL)
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


def serve() -> None:
    """The worker's main: read (names, data) from stdin, write {name: PNG bytes or None} to stdout."""
    import signal

    # Ctrl-C reaches the whole process group; the main process handles it
    # and ends this one, which must not print a traceback of its own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    out = sys.stdout.buffer
    sys.stdout = sys.stderr  # nothing but the result may reach the result pipe
    try:
        raw = sys.stdin.buffer.read()
        from .report import draw_picture

        names, data = pickle.loads(raw)
        pngs = {name: draw_picture(name, data) for name in names}
        out.write(pickle.dumps(pngs, protocol=pickle.HIGHEST_PROTOCOL))
        out.flush()
    except BaseException:
        # The main process draws the pictures itself and raises the error there.
        os._exit(1)
