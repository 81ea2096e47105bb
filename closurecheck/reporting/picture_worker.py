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

``closurecheck run`` starts its worker ahead instead (:func:`launch` with
``warm``), when the candidates are registered and the pool's workers gone:
it imports matplotlib while the run verifies its closures (one core is
mostly idle then), waits for the report's data, and draws every picture
but the histograms (:data:`WARM_GROUPS`) while the main process writes
the files and the page's text, then draws the histograms.

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
import threading

# Drawn by a worker started at the write (start_pictures: write_outputs'
# callers that started none ahead), in this order.  The NEES and
# precision-recall pictures stay in the main process (when this split was
# measured, the first needed scipy.stats, about 0.8 s to import in a fresh
# process, and the second scoring's constants).  The histograms stay too,
# to balance the two: on the 5,000-scan warehouse
# log the worker's share is 0.35 s to start, 0.5 s to import matplotlib and
# 1.0 s of pictures (maps 0.42, loops 0.28, agreement 0.16, truth 0.12),
# the main process' 0.8 s of files and page text, 0.5 s of import and
# 0.85 s of pictures (histograms 0.6, NEES 0.25).  With the histograms in
# the worker too the write took 2.7 and 4.2 s, without 2.5 and 2.2 s
# (wall time, load average 1.3-1.6 on 2 cores).
WORKER_PICTURES = ("map", "loops", "agreement", "truth")

# Drawn by workers started ahead (launch(..., warm=True)), one per group;
# the main process draws the histograms.  A worker's imports (matplotlib,
# 0.7-0.85 s of CPU with its start) run while the run verifies its
# closures, so it draws as soon as the data comes.  On the 5,000-scan
# warehouse log (`closurecheck run -v`, 2 cores, load average 1.6-2.0,
# alternating with the code before): with every picture in one worker the
# write took 1.75-1.9 s, the worker's 1.85 s of pictures the critical
# path; with two workers (the histograms, NEES and precision-recall in the
# second) 1.6-1.8 s, but the verification beside their imports 1.7-1.8 s
# against 1.2-1.3 s (2.5 s in a slow run) without.
WARM_GROUPS = (("map", "loops", "agreement", "truth", "nees", "precision-recall"),)

# The worker's program: the main process' import path first, so that it
# imports the same closurecheck.
_BOOT = ("import sys, json; sys.path[:0] = json.loads(sys.argv[1]); "
         "from closurecheck.reporting.picture_worker import serve; serve(sys.argv[2] == 'warm')")


class PictureJob:
    """A worker process drawing the pictures ``names`` of one report; :meth:`result` collects them.

    Start one with :func:`start_pictures`, or with :func:`launch` and hand it
    its data with :meth:`send` later.  Use it as a context manager (or
    call :meth:`close`) so that the worker ends with the write, also when
    the write fails or is interrupted.
    """

    def __init__(self, proc: subprocess.Popen, names: tuple):
        self.proc = proc
        self.names = names
        self._sender: threading.Thread | None = None

    def send(self, data) -> None:
        """Hand the worker the report's data (a :class:`closurecheck.reporting.report.ReportData`), once.

        A worker that is gone is not an error here: :meth:`result` says so.
        """
        from .report import AgreementPairs, map_points_only

        fs = data.free_space
        if fs is not None:
            # The worker need not import the free-space module (and scipy) to read four arrays.
            data = dataclasses.replace(data, free_space=AgreementPairs(a=fs.a, b=fs.b, contradicts=fs.contradicts,
                                                                       length_m=fs.length_m))
        # Only the maps draw the scans' points, and only every MAP_STRIDE-th: the points are most of
        # the data (about 370 MB at 100,000 scans), held twice in the worker while it unpickles them.
        data = map_points_only(data) if "map" in self.names else dataclasses.replace(data, scan_points=[])
        payload = pickle.dumps((self.names, data), protocol=pickle.HIGHEST_PROTOCOL)
        # Written by a thread (the pipe's write releases the GIL): a worker still importing takes
        # the data only when its imports are done, and this process writes its files meanwhile.
        self._sender = threading.Thread(target=self._write, args=(payload,), daemon=True)
        self._sender.start()

    def _write(self, payload: bytes) -> None:
        try:
            self.proc.stdin.write(payload)
            self.proc.stdin.close()
        except (OSError, ValueError):  # the worker is gone (or closed); result() says so
            pass

    def result(self) -> dict | None:
        """PNG bytes (or None where a picture does not apply) by picture name; None if the worker failed."""
        try:
            raw = self.proc.stdout.read()
            code = self.proc.wait()
        except (OSError, ValueError):  # ValueError: the job was closed
            return None
        if self._sender is not None:
            self._sender.join()
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
        if self._sender is not None:
            self._sender.join()  # its write fails at once on the dead worker's pipe
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


def launch(names: tuple | None = None, *, warm: bool = False) -> PictureJob | None:
    """Start a worker that will draw the pictures ``names`` (default :data:`WORKER_PICTURES`) of the data
    :meth:`PictureJob.send` hands it; None if it cannot start.

    A ``warm`` worker imports what its pictures need (matplotlib)
    first and then waits for its data, so that it can be started ahead, while
    the run verifies its closures on the other core; without ``warm`` it
    reads its data before importing anything, so that :meth:`PictureJob.send`
    (data of a few to a few hundred MB through a pipe) never waits for its
    imports.

    Examples
    --------
    >>> job = launch(("map",), warm=True)
    >>> job.names
    ('map',)
    >>> job.close()
    """
    names = WORKER_PICTURES if names is None else tuple(names)
    try:
        proc = subprocess.Popen([sys.executable, "-c", _BOOT, json.dumps(sys.path), "warm" if warm else "cold"],
                                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    except OSError:
        return None
    return PictureJob(proc, names)


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
    job = launch(names)
    if job is not None:
        try:
            job.send(data)
        except BaseException:
            job.close()
            raise
    return job


def serve(warm: bool = False) -> None:
    """The worker's main: read (names, data) from stdin, write {name: PNG bytes or None} to stdout.

    ``warm``: import what the pictures need first, then wait for the data (:func:`launch`).
    """
    import signal

    # Ctrl-C reaches the whole process group; the main process handles it
    # and ends this one, which must not print a traceback of its own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    out = sys.stdout.buffer
    sys.stdout = sys.stderr  # nothing but the result may reach the result pipe
    try:
        if warm:
            _import_for_pictures()
        raw = sys.stdin.buffer.read()
        from .report import draw_picture

        names, data = pickle.loads(raw)
        pngs = {name: draw_picture(name, data) for name in names}
        out.write(pickle.dumps(pngs, protocol=pickle.HIGHEST_PROTOCOL))
        out.flush()
    except BaseException:
        # The main process draws the pictures itself and raises the error there.
        os._exit(1)


def _import_for_pictures() -> None:
    # What draw_picture imports on first use (fresh process, 2-core machine of docs/performance.md):
    # matplotlib's figure and Agg canvas about 0.4-0.6 s, Pillow for the PNGs, and the chi-square
    # functions of the NEES picture (closurecheck.core.stats: scipy.special, not scipy.stats).
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    from matplotlib.figure import Figure  # noqa: F401
    from PIL import Image  # noqa: F401

    from ..core import stats  # noqa: F401
    from . import report  # noqa: F401

    matplotlib.use("Agg", force=False)
