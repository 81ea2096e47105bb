"""Runs the registration batches: serially, in a local process pool, or on Dask.

Every runner gets the same inputs (scan points by id, the pairs and their
seeds) and returns per-pair results in the input order.  Each pair's result
depends only on its two scans, its seeds and the options, and every runner
does the arithmetic the same way (same code, BLAS on one thread), so the
verdicts and the graph are identical bit for bit whichever runner and however
many workers are used (tests/runners/test_runners.py checks it).

Scans are sent to each worker once, packed into one array (:class:`PointsTable`):
the pool's initializer receives it, Dask scatters it to every worker.  Each
worker prepares a scan (kd-tree, line fits, coarse grid) the first time one
of its batches needs it and keeps the most recently used ones for later
batches (:class:`ScanCache`, bounded so memory does not grow with the log:
many scans, the fewer most recent of them with their coarse grids).
The runners register the pairs in an order that keeps pairs sharing scans
together (:func:`locality_order`), so the cache rarely prepares a scan twice,
and hand the results back in the input order.

One log registers twice, on the same keyframe scans: the odometry
calibration (each keyframe to the next) and then the loop-closure
candidates.  ``runner.hold(points, options)`` (:class:`HeldScans`) keeps the
scans (and a pool's workers with their caches) from one ``register`` call to
the next, so the candidates find in the caches the scans the calibration
prepared last instead of preparing them again; a prepared scan depends only on
its points and ``options.preparation_key()``, not on the coarse stage being
on, so the results are the same.

BLAS runs on one thread inside every runner: the matrices of one pair are
small, and with one process per core a threaded BLAS only oversubscribes
the cores (on a shared machine that made linear algebra many times slower).
"""

from __future__ import annotations

import contextlib
import threading
from collections import OrderedDict, deque
from dataclasses import dataclass
from typing import Protocol

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import reverse_cuthill_mckee

from ..errors import InputError
from ..registration.batch import MIN_POINTS, register_batch
from ..registration.icp import RegistrationOptions, prepare_scan

# Prepared scans kept per worker (CACHE_SCANS), and how many of the most recently used of them
# keep their coarse grid (GRID_SCANS); the others' grids are dropped and rebuilt, with the same
# bits, if a coarse search needs them again.  Resident memory per scan, 1,024 scans of each
# 5,000-scan log prepared in one process: warehouse 145 kB bare, 283 kB with its target side (line
# models, kd-tree), 553 kB with its grid too; yard 91, 174 and 1,158 kB (an open yard's grids are
# large; the largest, 1.55 MB).  Worst case per worker, every scan with its target side and the
# grid tier full (sizes averaged over the 1,024 scans):
#   warehouse 1,024 x 283 kB + 128 x 270 kB = 325 MB (was 256 x 553 kB = 142 MB: +183 MB),
#   yard      1,024 x 174 kB + 128 x 984 kB = 304 MB (was 256 x 1,158 kB = 296 MB: +8 MB);
# a GRID_SCANS of 256 would add 217 and 134 MB; a CACHE_SCANS of 1,280, 255 MB on the warehouse
# log, more than the 250 MB a worker may add to a 100,000-scan log's 2,967 MB peak (2 workers,
# 4 GB; these bounds add 2 x 183 MB: 3.3 GB).  A worker's peak resident memory over a whole run
# (2 workers): warehouse 244-298 MB before, 418-479 now (443-517 with 256 grids); yard 356-406
# before, 406-433 now (505-518 with 256 grids).  Scans prepared by the candidate stage, after the
# calibration's 1,668-1,669 (2 workers; grids built in brackets; counts vary by a few percent
# from run to run with the order in which the workers finish batches), as CACHE_SCANS/GRID_SCANS:
#   warehouse  256/256 (before): 1,692-1,740 (1,146-1,169)   768/256: 1,302 (1,146)
#              1,024/256: 1,001-1,085 (1,146-1,169)   1,024/128: 1,025-1,044 (1,209-1,253)
#              1,024/64: 1,027 (1,362)   unbounded/256: 877 (1,151)   unbounded: 857 (1,128)
#   yard       256/256 (before): 1,672-1,677 (1,019-1,031)   1,024/256: 952-976 (1,016-1,019)
#              1,024/128: 903-1,030 (1,033-1,043)
# A scan takes 2.2-2.5 ms of CPU to prepare, a grid 0.4 ms (warehouse) to 1.5 ms (yard): 1,024
# scans save 650-770 preparations (1.5-1.8 s of CPU) on these logs, and 128 grids instead of 256
# cost 15-105 more grids (under 0.05 s) for 35-125 MB less.  Few grids are rebuilt because a scan's
# pairs, the searches of its grid, lie close together in locality order.
CACHE_SCANS = 1024
GRID_SCANS = 128

# Batches per worker: enough that a worker finishing early finds more work
# while the slowest batch runs, few enough that per-batch overhead is small.
BATCHES_PER_WORKER = 4

@dataclass(frozen=True, eq=False)
class PointsTable:
    """Scan points of many scans in one array, cheap to pickle and to scatter.

    ids : (S,) sorted int64 scan ids; offsets : (S + 1,) row offsets;
    xy : (N, 2) float64 points (metres, each scan in its own sensor frame).
    """

    ids: np.ndarray
    offsets: np.ndarray
    xy: np.ndarray

    @classmethod
    def from_dict(cls, points: dict) -> PointsTable:
        ids = np.array(sorted(int(i) for i in points), dtype=np.int64)
        arrays = [np.asarray(points[int(i)], dtype=np.float64).reshape(-1, 2) for i in ids]
        counts = np.array([len(a) for a in arrays], dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        xy = np.concatenate(arrays) if arrays else np.zeros((0, 2))
        return cls(ids=ids, offsets=offsets, xy=xy)

    def get(self, scan_id: int) -> np.ndarray | None:
        k = int(np.searchsorted(self.ids, scan_id))
        if k >= len(self.ids) or self.ids[k] != scan_id:
            return None
        return self.xy[self.offsets[k]:self.offsets[k + 1]]

    @property
    def nbytes(self) -> int:
        return self.ids.nbytes + self.offsets.nbytes + self.xy.nbytes


def as_table(points) -> PointsTable:
    return points if isinstance(points, PointsTable) else PointsTable.from_dict(points)


class ScanCache:
    """Prepared scans of one process, built on first use, least recently used dropped.

    Two bounds, both by recency of use: the cache keeps the ``max_scans``
    most recently used scans, and only the ``grid_scans`` most recently used
    of them keep their coarse grid (``PreparedScan.grid``, the largest part
    of a prepared scan once built).  A scan that falls out of the grid tier
    keeps everything else; its grid is dropped and, should a coarse search
    need it again, rebuilt from the same points with the same bits (0.4 to
    1.5 ms, against 2.2-2.5 ms to prepare the whole scan again).  Neither
    bound drops a scan or a grid of the batch being fetched: a batch needs
    all its scans at once.

    A scan with fewer than MIN_POINTS points, or one that cannot be prepared
    (no straight structure to register against), is None: its pairs get no
    registration result (verdict ``no_points``) instead of failing the log.

    Parameters
    ----------
    table : the scans' points.
    options : the preparation settings.
    max_scans : scans kept (at least 1).
    grid_scans : of those, the most recently used ones that keep their grid
        (at least 1, at most ``max_scans``).

    Examples
    --------
    >>> import closurecheck
    >>> from closurecheck.registration.icp import RegistrationOptions
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=40)
    >>> cache = ScanCache(PointsTable.from_dict({i: log.points(i) for i in range(4)}), RegistrationOptions(),
    ...                   max_scans=3, grid_scans=1)
    >>> with cache.lease([0]) as got:
    ...     first = got[0].grid.fine.copy()
    >>> with cache.lease([1]) as got:
    ...     _ = got[1].grid
    >>> list(cache.prepared), "grid" in cache.prepared[0]._lazy, cache.grids_dropped
    ([0, 1], False, 1)
    >>> with cache.lease([0]) as got:
    ...     bool((got[0].grid.fine == first).all()), cache.builds
    (True, 2)
    """

    def __init__(self, table: PointsTable, options: RegistrationOptions, max_scans: int = CACHE_SCANS,
                 grid_scans: int = GRID_SCANS):
        self.table = table
        self.options = options
        self.max_scans = max(1, int(max_scans))
        self.grid_scans = min(self.max_scans, max(1, int(grid_scans)))
        self.prepared: OrderedDict = OrderedDict()
        # The ids of the grid tier (prepared scans only), least recently used first.
        self.gridded: OrderedDict = OrderedDict()
        self.builds = 0
        self.grids_dropped = 0
        # Batches running now, by scan id: a grid is not dropped under a batch that may search it
        # (it would be rebuilt and kept outside the tier); it is dropped when the last one ends.
        self._leased: dict = {}
        # A Dask worker may run several batches at once in threads.
        self._lock = threading.Lock()

    def _build(self, scan_id: int):
        pts = self.table.get(scan_id)
        if pts is None or len(pts) < MIN_POINTS:
            return None
        self.builds += 1
        try:
            # The target side (line models) and the coarse grid are built the first time a pair
            # needs them, with the same values (prepare_scan): the calibration never searches a
            # grid, and a scan that is only ever a source needs neither (on the 5,000-scan warehouse
            # log a scan takes 2.0-2.3 ms of CPU to prepare at once: 0.8 without its target side,
            # the line models about 0.9 more, the grid 0.3).
            return prepare_scan(pts, self.options, grid=False)
        except InputError:
            return None

    def _drop_grid(self, scan) -> None:
        if scan is not None and scan.drop_grid():
            self.grids_dropped += 1

    def get(self, ids) -> dict:
        """PreparedScan by id for the given ids (those that could be prepared).

        Their grids may be dropped by any later fetch (and rebuilt on use);
        :meth:`lease` keeps them while a batch runs in another thread.
        """
        with self._lock:
            return self._get(ids)

    @contextlib.contextmanager
    def lease(self, ids):
        """``with cache.lease(ids) as prepared``: :meth:`get`, the grids kept until the block ends."""
        with self._lock:
            got = self._get(ids)
            for i in got:
                self._leased[i] = self._leased.get(i, 0) + 1
        try:
            yield got
        finally:
            with self._lock:
                for i, scan in got.items():
                    left = self._leased.pop(i) - 1
                    if left:
                        self._leased[i] = left
                    elif i not in self.gridded:
                        self._drop_grid(scan)

    def _get(self, ids) -> dict:
        out = {}
        for i in map(int, ids):
            if i in self.prepared:
                self.prepared.move_to_end(i)
                p = self.prepared[i]
            else:
                p = self._build(i)
                self.prepared[i] = p
                # A batch needs all its scans at once, so the bound never drops one of them.
                while len(self.prepared) > max(self.max_scans, len(out) + 1):
                    gone, _ = self.prepared.popitem(last=False)
                    self.gridded.pop(gone, None)
            if p is not None:
                out[i] = p
                self.gridded[i] = None
                self.gridded.move_to_end(i)
                # Nor does the grid bound drop the grid of one of them.
                while len(self.gridded) > max(self.grid_scans, len(out)):
                    gone, _ = self.gridded.popitem(last=False)
                    if gone not in self._leased:
                        self._drop_grid(self.prepared.get(gone))
        return out


def run_batch(cache: ScanCache, src, dst, seeds, options: RegistrationOptions | None = None) -> list:
    """Register one batch of pairs with scans from ``cache`` (see register_batch).

    ``options`` (default: the cache's) may differ from the cache's in
    anything but the preparation settings (HeldScans.check refuses others
    before the batches are made): the calibration and the candidates share
    one cache, without and with the coarse stage.
    """
    options = cache.options if options is None else options
    with cache.lease(np.unique(np.concatenate([np.asarray(src), np.asarray(dst)]))) as prepared:
        return register_batch(prepared, src, dst, seeds, options)


def locality_order(src, dst) -> np.ndarray:
    """Permutation of the pairs that keeps pairs sharing a scan close together.

    A place visited on several passes is paired with scans from all of
    them, so in the candidates' own order (by the newer scan) a scan's pairs
    lie far apart and a bounded cache prepares it again and again.  The
    reverse Cuthill-McKee ordering of the graph (scans as vertices, pairs as
    edges) numbers the scans so that every pair joins two nearby numbers
    (a small bandwidth); sorting the pairs by their lower number, then the
    higher, makes each scan's pairs a short run.
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    n = len(src)
    if n < 3:
        return np.arange(n)
    ids, inv = np.unique(np.concatenate([src, dst]), return_inverse=True)
    s, d = inv[:n], inv[n:]
    m = len(ids)
    adjacency = sparse.csr_matrix((np.ones(2 * n, dtype=np.int8), (np.concatenate([s, d]), np.concatenate([d, s]))),
                                  shape=(m, m))
    rank = np.empty(m, dtype=np.int64)
    rank[reverse_cuthill_mckee(adjacency, symmetric_mode=True)] = np.arange(m)
    a, b = rank[s], rank[d]
    return np.lexsort((np.maximum(a, b), np.minimum(a, b)))


class OrderedPairs:
    """The pairs in locality order, and the way back to the input order."""

    def __init__(self, src, dst, seeds):
        self.order = locality_order(src, dst)
        self.src = np.asarray(src)[self.order]
        self.dst = np.asarray(dst)[self.order]
        self.seeds = [seeds[k] for k in self.order]

    def __len__(self) -> int:
        return len(self.order)

    def restore(self, results: list) -> list:
        out: list = [None] * len(results)
        for k, r in zip(self.order, results):
            out[k] = r
        return out


class HeldScans:
    """One log's scans, kept by a runner from one ``register`` call to the next.

    Made by ``runner.hold(points, options)`` and given to
    ``runner.register`` in place of the points, as often as needed, with
    options of the same ``preparation_key()``; the runner prepares each scan
    at most once per worker while its bounded cache keeps it, across the
    calls.  Release it (``with`` block, or :meth:`close`) to stop the
    runner's workers or drop its caches; a pair whose scan is not held is
    refused (ValueError) rather than registered as having no points.

    Attributes
    ----------
    runner : the runner holding the scans.
    table : :class:`PointsTable` of the held scans.
    options : the preparation settings (any options with the same
        ``preparation_key()``).
    state : the runner's own (its cache, pool or run token); None until the
        first ``register`` and after release.
    builds : scans prepared over all calls so far (summed over workers).

    Examples
    --------
    >>> import numpy as np, closurecheck
    >>> from closurecheck.registration.icp import RegistrationOptions
    >>> from closurecheck.runners.serial import SerialRunner
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=40)
    >>> runner = SerialRunner()
    >>> seeds = [np.zeros((1, 3))] * 2
    >>> with runner.hold({i: log.points(i) for i in (0, 2, 4)}, RegistrationOptions()) as scans:
    ...     _ = scans.register(np.array([0, 2]), np.array([2, 4]), seeds, RegistrationOptions(coarse=False), 16)
    ...     first = runner.last_builds
    ...     _ = scans.register(np.array([0]), np.array([4]), seeds[:1], RegistrationOptions(), 16)
    >>> first, runner.last_builds
    (3, 0)
    """

    def __init__(self, runner, points, options: RegistrationOptions):
        self.runner = runner
        self.table = as_table(points)
        self.options = options
        self.key = options.preparation_key()
        self.state = None
        self.builds = 0

    def check(self, src, dst, options: RegistrationOptions) -> None:
        """Refuse options that prepare scans differently, and pairs of scans not held (ValueError)."""
        if options.preparation_key() != self.key:
            raise ValueError("these options prepare scans differently from the held ones; hold the scans again")
        ids = np.unique(np.concatenate([np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64)]))
        missing = ids[~np.isin(ids, self.table.ids)]
        if len(missing):
            raise ValueError(f"scans {missing[:5].tolist()} are not among the held scans")

    def register(self, src, dst, seeds, options: RegistrationOptions, batch_pairs: int, progress=None) -> list:
        """``runner.register(self, ...)``: per-pair results in input order."""
        return self.runner.register(self, src, dst, seeds, options, batch_pairs, progress)

    def close(self, abort: bool = False) -> None:
        """Release the runner's workers or caches for these scans (``abort``: at once, on an error)."""
        self.runner.release(self, abort=abort)

    def __enter__(self) -> HeldScans:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close(abort=exc_type is not None)


def register_once(runner, points, src, dst, seeds, options, batch_pairs, progress) -> list:
    """``runner.register`` given the points themselves: through a hold released when the call returns."""
    if len(src) == 0:
        return []
    with runner.hold(points, options) as held:
        return runner.register(held, src, dst, seeds, options, batch_pairs, progress)


class Regions:
    """Which batch each worker runs next: one contiguous run of batches a worker, then the others' ends.

    The batches, cut from the pairs in locality order, are split into one
    contiguous region per worker; a worker takes its own region's batches in
    order and, once they are done, the last batch of the region with the most
    left (the end farthest from where that region's worker is).  A scan's
    pairs lie in neighbouring batches, so they mostly land on one worker and
    its cache prepares the scan once, where batches handed to whichever
    worker is free alternate between the workers and both prepare most scans
    (the 5,000-scan warehouse log's candidates: 2,251 to 2,353 scans prepared
    by two workers for 1,667 keyframes; about 1,700 in a simulation of these
    regions).  Which worker runs a batch changes no result.

    Examples
    --------
    >>> r = Regions(7, 2)
    >>> [r.next(0), r.next(0), r.next(1), r.next(0), r.next(0), r.next(0), r.next(0), r.next(1)]
    [0, 1, 3, 2, 6, 5, 4, None]
    """

    def __init__(self, batches: int, workers: int):
        bounds = [batches * w // max(1, workers) for w in range(max(1, workers) + 1)]
        self.regions = [deque(range(bounds[w], bounds[w + 1])) for w in range(max(1, workers))]

    def next(self, worker: int) -> int | None:
        """The batch ``worker`` runs next, or None when every batch has been handed out."""
        own = self.regions[worker]
        if own:
            return own.popleft()
        largest = max(self.regions, key=len)
        return largest.pop() if largest else None


def single_thread_blas(blas_only: bool = False):
    """Context manager limiting BLAS/OpenMP pools to one thread.

    ``blas_only`` leaves OpenMP alone (the main process: the PCM pair test's threads, numba's own).
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas" if blas_only else None)


def batch_slices(n: int, workers: int, batch_pairs: int) -> list[slice]:
    """Contiguous batches of at most ``batch_pairs`` pairs, at least BATCHES_PER_WORKER per worker."""
    if n == 0:
        return []
    size = max(1, min(int(batch_pairs), -(-n // (BATCHES_PER_WORKER * max(1, workers)))))
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]


def begin(progress, total: int, parallel: int) -> None:
    """Tell the progress display that ``total`` pairs start, ``parallel`` batches at a time."""
    if progress is not None and hasattr(progress, "begin"):
        progress.begin("registration", total, parallel)


def advance(progress, sl: slice, total: int) -> None:
    if progress is not None:
        progress.advance("registration", sl.stop - sl.start, total)


class Runner(Protocol):
    """What the pipeline needs of a runner: register pairs, report its size, release its resources."""

    workers: int
    name: str
    last_builds: int

    def hold(self, points, options: RegistrationOptions) -> HeldScans:
        """Keep these scans for several ``register`` calls (:class:`HeldScans`)."""

    def register(self, points, src, dst, seeds, options: RegistrationOptions, batch_pairs: int,
                 progress=None) -> list:
        """Per-pair results in input order (see :func:`closurecheck.registration.batch.register_batch`).

        ``points``: a dict of (N, 2) arrays by scan id, a :class:`PointsTable`
        (both prepared for this call alone) or the runner's :class:`HeldScans`.
        Sets ``last_builds``, the scans this call prepared.
        """

    def release(self, held: HeldScans, abort: bool = False) -> None:
        """Stop what ``held`` kept (workers, caches); idempotent."""

    def close(self) -> None:
        """Release workers or connections."""
