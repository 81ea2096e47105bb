"""The runner that registers batches in a local process pool (``--jobs N``)."""

from __future__ import annotations

import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor, as_completed

from ..errors import InputError
from .serial import SerialRunner
from .work import (
    CACHE_SCANS,
    OrderedPairs,
    ScanCache,
    advance,
    as_table,
    batch_slices,
    run_batch,
    single_thread_blas,
)

_WORKER: dict = {}


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
            raise InputError(f"workers must be >= 0 (0 = all cores), got {workers}")
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
                    advance(progress, slices[k], len(work))
            except BaseException:
                pool.shutdown(wait=False, cancel_futures=True)
                raise
        # Scans prepared over all workers (a scan may be prepared in several).
        self.last_builds = sum(builds.values())
        return work.restore([r for part in parts for r in part])

    def close(self):
        pass
