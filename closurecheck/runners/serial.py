"""The runner that registers every batch in this process (``--jobs 1``)."""

from __future__ import annotations

from .work import (
    CACHE_SCANS,
    OrderedPairs,
    ScanCache,
    advance,
    as_table,
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

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        cache = ScanCache(as_table(points), options, self.cache_scans)
        work = OrderedPairs(src, dst, seeds)
        out = []
        begin(progress, len(work), 1)
        with single_thread_blas():
            for sl in batch_slices(len(work), 1, batch_pairs):
                out.extend(run_batch(cache, work.src[sl], work.dst[sl], work.seeds[sl]))
                advance(progress, sl, len(work))
        self.last_builds = cache.builds
        return work.restore(out)

    def close(self):
        pass
