"""Runs the registration batches: serially, in a local process pool, or on Dask.

Every runner gets the same inputs (scan points by id, the pairs and their
seeds) and returns per-pair results in the input order.  Each pair's result
depends only on its two scans, its seeds and the options, and every runner
does the arithmetic the same way (same code, BLAS on one thread), so the
verdicts and the graph are identical bit for bit whichever runner and however
many workers are used (tests/test_parallel.py checks it).

Scans are sent to each worker once, packed into one array (:class:`PointsTable`):
the pool's initializer receives it, Dask scatters it to every worker.  Each
worker prepares a scan (kd-tree, line fits, coarse grid) the first time one
of its batches needs it and keeps the most recently used ones for later
batches (:class:`ScanCache`, bounded so memory does not grow with the log).
The runners register the pairs in an order that keeps pairs sharing scans
together (:func:`locality_order`), so the cache rarely prepares a scan twice,
and hand the results back in the input order.

BLAS runs on one thread inside every runner: the matrices of one pair are
small, and with one process per core a threaded BLAS only oversubscribes
the cores (on a shared machine that made linear algebra many times slower).
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import threading
from collections import OrderedDict
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import reverse_cuthill_mckee

from .errors import InputError
from .pairwise_registration import MIN_POINTS, register_batch
from .registration import RegistrationOptions, prepare_scan

# Prepared scans kept per worker.  A prepared scan with its coarse grid takes
# about 0.5 MB, so the cache holds about 130 MB per worker at most; the reuse
# of a scan by pairs that are far apart in the candidate order is the only
# thing lost by a bound, and preparing a scan costs a few ms against tens of
# ms for registering one pair.
CACHE_SCANS = 256

# Batches per worker: enough that a worker finishing early finds more work
# while the slowest batch runs, few enough that per-batch overhead is small.
BATCHES_PER_WORKER = 4

_WORKER: dict = {}


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

    A scan with fewer than MIN_POINTS points, or one that cannot be prepared
    (no straight structure to register against), is None: its pairs get no
    registration result (verdict ``no_points``) instead of failing the log.
    """

    def __init__(self, table: PointsTable, options: RegistrationOptions, max_scans: int = CACHE_SCANS):
        self.table = table
        self.options = options
        self.max_scans = max(1, int(max_scans))
        self.prepared: OrderedDict = OrderedDict()
        self.builds = 0
        # A Dask worker may run several batches at once in threads.
        self._lock = threading.Lock()

    def _build(self, scan_id: int):
        pts = self.table.get(scan_id)
        if pts is None or len(pts) < MIN_POINTS:
            return None
        self.builds += 1
        try:
            return prepare_scan(pts, self.options)
        except InputError:
            return None

    def get(self, ids) -> dict:
        """PreparedScan by id for the given ids (those that could be prepared)."""
        with self._lock:
            return self._get(ids)

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
                    self.prepared.popitem(last=False)
            if p is not None:
                out[i] = p
        return out


def run_batch(cache: ScanCache, src, dst, seeds) -> list:
    """Register one batch of pairs with scans from ``cache`` (see register_batch)."""
    prepared = cache.get(np.unique(np.concatenate([np.asarray(src), np.asarray(dst)])))
    return register_batch(prepared, src, dst, seeds, cache.options)


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


def single_thread_blas():
    """Context manager limiting BLAS/OpenMP pools to one thread (no-op without threadpoolctl)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return contextlib.nullcontext()
    return threadpool_limits(limits=1)


def batch_slices(n: int, workers: int, batch_pairs: int) -> list[slice]:
    """Contiguous batches of at most ``batch_pairs`` pairs, at least BATCHES_PER_WORKER per worker."""
    if n == 0:
        return []
    size = max(1, min(int(batch_pairs), -(-n // (BATCHES_PER_WORKER * max(1, workers)))))
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]


def _advance(progress, sl: slice, total: int) -> None:
    if progress is not None:
        progress.advance("registration", sl.stop - sl.start, total)


class SerialRunner:
    """Runs every batch in this process."""

    workers = 1
    name = "serial"

    def __init__(self, cache_scans: int = CACHE_SCANS):
        self.cache_scans = cache_scans
        self.last_builds = 0

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        cache = ScanCache(as_table(points), options, self.cache_scans)
        work = OrderedPairs(src, dst, seeds)
        out = []
        with single_thread_blas():
            for sl in batch_slices(len(work), 1, batch_pairs):
                out.extend(run_batch(cache, work.src[sl], work.dst[sl], work.seeds[sl]))
                _advance(progress, sl, len(work))
        self.last_builds = cache.builds
        return work.restore(out)

    def close(self):
        pass


def _pool_init(table, options, cache_scans):
    # Set once for the life of the worker: the process runs nothing else.
    _WORKER["blas"] = single_thread_blas()
    _WORKER["cache"] = ScanCache(table, options, cache_scans)


def _pool_batch(src, dst, seeds):
    cache = _WORKER["cache"]
    out = run_batch(cache, src, dst, seeds)
    return os.getpid(), cache.builds, out


def _pool_context():
    # A fork server (preloaded with this module) starts workers in
    # milliseconds without forking a parent that may hold threads (progress
    # bars, a Dask client); spawn where there is no fork server.
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload([__name__])
        return ctx
    return multiprocessing.get_context("spawn")


class PoolRunner:
    """A local process pool with ``workers`` processes (0 = all cores).

    A pool is started for each ``register`` call (one per log) and receives
    that log's points once, in its initializer.  As with any process pool,
    a script that uses it needs the ``if __name__ == "__main__":`` guard
    (workers import the main module).
    """

    name = "local pool"

    def __init__(self, workers: int = 0, cache_scans: int = CACHE_SCANS):
        if workers < 0:
            raise InputError(f"--jobs must be >= 0 (0 = all cores), got {workers}")
        self.workers = workers or os.cpu_count() or 1
        self.cache_scans = cache_scans
        self.last_builds = 0

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        if len(src) == 0:
            return []
        if self.workers == 1:
            serial = SerialRunner(self.cache_scans)
            out = serial.register(points, src, dst, seeds, options, batch_pairs, progress)
            self.last_builds = serial.last_builds
            return out
        table = as_table(points)
        work = OrderedPairs(src, dst, seeds)
        slices = batch_slices(len(work), self.workers, batch_pairs)
        parts: list = [None] * len(slices)
        builds: dict = {}
        with ProcessPoolExecutor(max_workers=min(self.workers, len(slices)), mp_context=_pool_context(),
                                 initializer=_pool_init, initargs=(table, options, self.cache_scans)) as pool:
            futures = {pool.submit(_pool_batch, work.src[sl], work.dst[sl], work.seeds[sl]): k
                       for k, sl in enumerate(slices)}
            try:
                for fut in as_completed(futures):
                    k = futures[fut]
                    pid, built, parts[k] = fut.result()
                    builds[pid] = max(builds.get(pid, 0), built)
                    _advance(progress, slices[k], len(work))
            except BaseException:
                pool.shutdown(wait=False, cancel_futures=True)
                raise
        # Scans prepared over all workers (a scan may be prepared in several).
        self.last_builds = sum(builds.values())
        return work.restore([r for part in parts for r in part])

    def close(self):
        pass


def make_runner(jobs: int = 0, dask: str | None = None):
    """The runner for ``--jobs`` / ``--dask``.

    jobs : worker processes (0 = all cores, 1 = serial in this process); with
        ``dask="local"`` the number of Dask workers.
    dask : None for local processes, ``"local"`` for an embedded Dask
        cluster, ``"tcp://HOST:PORT"`` for an existing Dask scheduler.
    """
    if jobs < 0:
        raise InputError(f"--jobs must be >= 0 (0 = all cores), got {jobs}")
    if dask:
        from .dask_runner import DaskRunner

        return DaskRunner(dask, workers=jobs)
    workers = jobs or os.cpu_count() or 1
    return SerialRunner() if workers == 1 else PoolRunner(workers)
