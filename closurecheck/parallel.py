"""Runs the registration batches: serially, in a local process pool, or on Dask.

Every runner gets the same inputs (scan points by id, the pairs and their
seeds) and returns per-pair results in the input order.  Each pair's result
depends only on its two scans, its seeds and the options, so the verdicts
and the graph are identical whichever runner and however many workers are
used (tests/test_parallel.py checks it).

Scans are sent to each worker once: the pool's initializer receives the
whole points table, and each worker prepares (kd-tree, normals, grid) a scan
the first time one of its batches needs it and keeps it for later batches.
"""

from __future__ import annotations

import os
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from .errors import InputError
from .pairwise_registration import MIN_POINTS, register_batch
from .registration import RegistrationOptions, prepare_scan

_WORKER: dict = {}


def _batches(n: int, size: int) -> list[slice]:
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]


class _ScanCache:
    """Prepared scans of one process, built on first use."""

    def __init__(self, points: dict, options: RegistrationOptions):
        self.points = points
        self.options = options
        self.prepared: dict = {}

    def get(self, ids) -> dict:
        for i in ids:
            i = int(i)
            if i not in self.prepared:
                pts = self.points.get(i)
                self.prepared[i] = (prepare_scan(pts, self.options)
                                    if pts is not None and len(pts) >= MIN_POINTS else None)
        return {int(i): self.prepared[int(i)] for i in ids if self.prepared[int(i)] is not None}


def _run_batch(cache: _ScanCache, src, dst, seeds):
    prepared = cache.get(np.unique(np.concatenate([src, dst])))
    return register_batch(prepared, src, dst, seeds, cache.options)


class SerialRunner:
    """Runs every batch in this process."""

    workers = 1
    name = "serial"

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        cache = _ScanCache(points, options)
        out = []
        for sl in _batches(len(src), batch_pairs):
            out.extend(_run_batch(cache, src[sl], dst[sl], seeds[sl]))
            if progress is not None:
                progress.advance("registration", sl.stop - sl.start, len(src))
        return out

    def close(self):
        pass


def _pool_init(points, options):
    _WORKER["cache"] = _ScanCache(points, options)


def _pool_batch(src, dst, seeds):
    return _run_batch(_WORKER["cache"], src, dst, seeds)


class PoolRunner:
    """A local process pool with ``workers`` processes (0 = all cores)."""

    name = "local pool"

    def __init__(self, workers: int = 0):
        self.workers = workers or os.cpu_count() or 1

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        if len(src) == 0:
            return []
        if self.workers == 1:
            return SerialRunner().register(points, src, dst, seeds, options, batch_pairs, progress)
        # Enough batches to keep every worker busy while the slowest finishes.
        size = max(1, min(batch_pairs, -(-len(src) // (4 * self.workers))))
        slices = _batches(len(src), size)
        out: list = [None] * len(slices)
        with ProcessPoolExecutor(max_workers=self.workers, initializer=_pool_init,
                                 initargs=(points, options)) as pool:
            futures = {pool.submit(_pool_batch, src[sl], dst[sl], seeds[sl]): k for k, sl in enumerate(slices)}
            from concurrent.futures import as_completed

            for fut in as_completed(futures):
                k = futures[fut]
                out[k] = fut.result()
                if progress is not None:
                    sl = slices[k]
                    progress.advance("registration", sl.stop - sl.start, len(src))
        return [r for part in out for r in part]

    def close(self):
        pass


def make_runner(jobs: int = 0, dask: str | None = None):
    """The runner for ``--jobs`` / ``--dask`` (see the module docstring)."""
    if dask:
        from .dask_runner import DaskRunner

        return DaskRunner(dask, workers=jobs)
    if jobs < 0:
        raise InputError(f"--jobs must be >= 0 (0 = all cores), got {jobs}")
    workers = jobs or os.cpu_count() or 1
    return SerialRunner() if workers == 1 else PoolRunner(workers)
