"""The runner that registers every batch in this process (``--jobs 1``)."""

from __future__ import annotations

from .work import (
    CACHE_SCANS,
    HeldScans,
    OrderedPairs,
    ScanCache,
    advance,
    begin,
    batch_slices,
    run_batch,
    single_thread_blas,
)


class SerialRunner:
    """Runs every batch in this process."""

    workers = 1
    name = "serial"

    def __init__(self, cache_scans: int = CACHE_SCANS):
        self.cache_scans = cache_scans
        self.last_builds = 0

    def hold(self, points, options) -> HeldScans:
        """Keep these scans' cache from one ``register`` call to the next (see HeldScans)."""
        return HeldScans(self, points, options)

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        if not isinstance(points, HeldScans):
            with self.hold(points, options) as held:
                return self.register(held, src, dst, seeds, options, batch_pairs, progress)
        held = points
        held.check(src, dst, options)
        if held.state is None:
            held.state = ScanCache(held.table, held.options, self.cache_scans)
        cache = held.state
        before = cache.builds
        work = OrderedPairs(src, dst, seeds)
        out = []
        begin(progress, len(work), 1)
        with single_thread_blas():
            for sl in batch_slices(len(work), 1, batch_pairs):
                out.extend(run_batch(cache, work.src[sl], work.dst[sl], work.seeds[sl], options))
                advance(progress, sl, len(work))
        self.last_builds = cache.builds - before
        held.builds = cache.builds
        return work.restore(out)

    def release(self, held: HeldScans, abort: bool = False) -> None:
        """Drop the held scans' prepared cache."""
        held.state = None

    def close(self):
        pass
