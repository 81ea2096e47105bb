"""The runner that registers batches in a local process pool (``--jobs N``)."""

from __future__ import annotations

import contextlib
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

from ..errors import InputError
from .forkserver import local_workers, pool_context
from .lifeline import guard_worker
from .serial import SerialRunner
from .work import (
    CACHE_SCANS,
    HeldScans,
    OrderedPairs,
    Regions,
    ScanCache,
    advance,
    begin,
    batch_slices,
    register_once,
    run_batch,
    single_thread_blas,
)

_WORKER: dict = {}


def _pool_init(table, options, cache_scans):
    # Set once for the life of the worker: the process runs nothing else.
    guard_worker()
    _WORKER["blas"] = single_thread_blas()
    _WORKER["cache"] = ScanCache(table, options, cache_scans)


def _pool_batch(src, dst, seeds, options):
    # A worker runs one batch at a time: the difference is this batch's own preparations.
    cache = _WORKER["cache"]
    before = cache.builds
    out = run_batch(cache, src, dst, seeds, options)
    return cache.builds - before, out


def _stop(pool: ProcessPoolExecutor) -> None:
    """Kill the pool's workers at once and release the pool (on Ctrl-C or an error).

    Waiting for them instead (``shutdown(wait=True)``) would let every
    worker finish its batch first: seconds to minutes in which a Ctrl-C
    seemed ignored.
    """
    kill = getattr(pool, "kill_workers", None)  # Python >= 3.14
    if kill is not None:
        kill()
    else:
        for proc in list((getattr(pool, "_processes", None) or {}).values()):
            with contextlib.suppress(Exception):
                proc.kill()
    pool.shutdown(wait=True, cancel_futures=True)


class _Lanes:
    """One single-process executor a worker, so that this process chooses the worker of each batch.

    One executor for all workers hands each batch to whichever worker is
    free, so neighbouring batches, which share scans, alternate between the
    workers and each prepares most scans; with a lane a worker, the batches
    follow :class:`closurecheck.runners.work.Regions`.  The workers start on
    their first batch (a fork server spawns them on demand).
    """

    def __init__(self, count: int, table, options, cache_scans: int, ctx):
        self.executors = [ProcessPoolExecutor(max_workers=1, mp_context=ctx, initializer=_pool_init,
                                              initargs=(table, options, cache_scans)) for _ in range(count)]

    def stop(self) -> None:
        for ex in self.executors:
            _stop(ex)

    def shutdown(self) -> None:
        for ex in self.executors:
            ex.shutdown(wait=True)


# Batches queued in each worker beyond the one it runs: it starts the next without waiting for this
# process to hand it one, and the later batches stay free to go to whichever worker runs out first.
_QUEUED_PER_WORKER = 1


class PoolRunner:
    """A local process pool with ``workers`` processes (0 = all cores).

    A pool is started for each log (each :class:`HeldScans`, or each
    ``register`` call given the points themselves) and receives that log's
    points once, in its initializer; it lives until the scans are released,
    so that its workers keep the scans they prepared (their ScanCache) from
    the calibration to the candidates.  Each worker runs a contiguous run of
    the batches (:class:`closurecheck.runners.work.Regions`), so that a
    scan's pairs mostly meet in one worker's cache.  As with any process
    pool, a script that uses it needs the ``if __name__ == "__main__":``
    guard (workers import the main module).

    The fork server starts when the runner is made, so that its imports and
    its loading of the compiled kernels (registration/warm.py), about 2.6 s
    on the 2-core machine of docs/performance.md, run while this process
    reads the log rather than before the first batch.
    """

    name = "local pool"

    def __init__(self, workers: int = 0, cache_scans: int = CACHE_SCANS):
        if workers < 0:
            raise InputError(f"workers must be >= 0 (0 = all cores), got {workers}")
        self.workers = local_workers(workers)
        self.cache_scans = cache_scans
        self.last_builds = 0
        self._serial = SerialRunner(cache_scans)
        self._context = pool_context() if self.workers > 1 else None

    def hold(self, points, options) -> HeldScans:
        """Keep these scans, and the pool started for them, from one ``register`` call to the next."""
        return HeldScans(self, points, options)

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        if not isinstance(points, HeldScans):
            return register_once(self, points, src, dst, seeds, options, batch_pairs, progress)
        held = points
        held.check(src, dst, options)
        if len(src) == 0:
            self.last_builds = 0
            return []
        if self.workers == 1:
            out = self._serial.register(held, src, dst, seeds, options, batch_pairs, progress)
            self.last_builds = self._serial.last_builds
            return out
        work = OrderedPairs(src, dst, seeds)
        slices = batch_slices(len(work), self.workers, batch_pairs)
        parts: list = [None] * len(slices)
        built = 0
        begin(progress, len(work), min(self.workers, len(slices)))
        try:
            lanes = held.state
            if lanes is None:
                lanes = held.state = _Lanes(self.workers, held.table, held.options, self.cache_scans,
                                                    self._context)
            regions = Regions(len(slices), len(lanes.executors))
            pending: dict = {}

            def feed(lane: int) -> None:
                k = regions.next(lane)
                if k is not None:
                    sl = slices[k]
                    fut = lanes.executors[lane].submit(_pool_batch, work.src[sl], work.dst[sl], work.seeds[sl],
                                                       options)
                    pending[fut] = (lane, k)

            for lane in range(len(lanes.executors)):
                for _ in range(1 + _QUEUED_PER_WORKER):
                    feed(lane)
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    lane, k = pending.pop(fut)
                    got, parts[k] = fut.result()
                    built += got
                    advance(progress, slices[k], len(work))
                    feed(lane)
        except BaseException:
            # A worker died, Ctrl-C, or a batch failed: the pool is not reused (the held scans
            # are released with it), whatever its state.
            self.release(held, abort=True)
            raise
        # Scans prepared over all workers (a scan may be prepared in several).
        self.last_builds = built
        held.builds += built
        return work.restore([r for part in parts for r in part])

    def release(self, held: HeldScans, abort: bool = False) -> None:
        """Stop the pool started for ``held``: at once on an error or Ctrl-C, else once its workers are idle."""
        state, held.state = held.state, None
        if isinstance(state, _Lanes):
            if abort:
                state.stop()
            else:
                state.shutdown()

    def close(self):
        pass
