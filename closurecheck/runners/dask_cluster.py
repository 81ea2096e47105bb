"""Runs the registration batches on Dask: an embedded local cluster or an existing scheduler.

``--dask local`` starts a :class:`distributed.LocalCluster` of single-threaded
worker processes on the loopback interface (no dashboard); ``--dask
tcp://HOST:PORT`` connects to a running Dask scheduler, whose workers must
have the same closurecheck version installed (checked on connecting).

Per log, the scan points are scattered to every worker once (one packed
array, :class:`closurecheck.runners.PointsTable`); each batch of pairs is a
task that takes the scattered table, and every worker keeps its prepared
scans in a bounded cache keyed by the run's token (one token per
:class:`closurecheck.runners.work.HeldScans`, shared by the calibration and
the candidates), dropped when the log is done.  Results come back in input order and are the same, bit for bit, as a
serial run (same code, BLAS on one thread in the worker).

Dask is an optional extra (``pip install 'closurecheck[dask]'``), imported
only here.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import uuid
from collections import OrderedDict

from .._version import __version__
from ..errors import InputError, one_line
from .forkserver import local_workers
from .work import (
    CACHE_SCANS,
    HeldScans,
    OrderedPairs,
    ScanCache,
    batch_slices,
    begin,
    register_once,
    run_batch,
    single_thread_blas,
)

MISSING_EXTRA = "running on Dask needs the optional extra: pip install 'closurecheck[dask]'"

# Seconds to wait for a remote scheduler to answer, and for it to have a worker.
CONNECT_TIMEOUT_S = 5.0

# Runs whose prepared scans a worker keeps at once (several clients may
# share one cluster); each cache is bounded by CACHE_SCANS scans, GRID_SCANS of them with
# their coarse grids (work.py gives the memory this takes).
MAX_RUNS_PER_WORKER = 4

# Worker-side state (lives in the Dask worker processes).
_CACHES: OrderedDict = OrderedDict()
_LOCK = threading.Lock()
_BLAS: list = []


def _worker_cache(token: str, table, options, cache_scans: int) -> ScanCache:
    with _LOCK:
        if not _BLAS:
            # Once per worker process: BLAS on one thread (see closurecheck.runners).
            _BLAS.append(single_thread_blas())
        cache = _CACHES.get(token)
        if cache is None:
            cache = _CACHES[token] = ScanCache(table, options, cache_scans)
            while len(_CACHES) > MAX_RUNS_PER_WORKER:
                _CACHES.popitem(last=False)
        _CACHES.move_to_end(token)
        return cache


def _dask_batch(token: str, table, prepare, cache_scans: int, src, dst, seeds, options) -> list:
    """Task: register one batch on a worker (see closurecheck.runners.run_batch).

    ``prepare``: the held scans' options (the cache's preparation), ``options``: this call's.
    """
    return run_batch(_worker_cache(token, table, prepare, cache_scans), src, dst, seeds, options)


def _built(token: str) -> int:
    """Scans this worker has prepared for the run so far."""
    with _LOCK:
        cache = _CACHES.get(token)
    return 0 if cache is None else cache.builds


def _forget(token: str) -> int:
    """Drop a finished run's prepared scans from this worker; returns how many scans it built."""
    with _LOCK:
        cache = _CACHES.pop(token, None)
    return 0 if cache is None else cache.builds


def _worker_version() -> str:
    return __version__


def _one_line(exc: BaseException) -> str:
    return one_line(str(exc) or type(exc).__name__, 200)


class DaskRunner:
    """Registration batches as Dask tasks.

    address : ``"local"`` (embedded cluster of ``workers`` single-threaded
        processes, 0 = all cores) or ``"tcp://HOST:PORT"`` of a running
        scheduler (``workers`` is then ignored: the cluster has its own;
        workers started with ``--nthreads 1`` and one per core suit this
        work best, as the registration of a pair holds the GIL most of the time).
    Raises InputError when Dask is not installed, the address is malformed,
    the scheduler cannot be reached, or its workers cannot run closurecheck.
    """

    name = "dask"

    def __init__(self, address: str, workers: int = 0, cache_scans: int = CACHE_SCANS):
        try:
            import distributed
        except ImportError:
            raise InputError(MISSING_EXTRA) from None
        if workers < 0:
            raise InputError(f"workers must be >= 0 (0 = all cores), got {workers}")
        address = str(address).strip()
        self.address = address
        self.cache_scans = cache_scans
        self.cluster = None
        self.last_builds = 0
        if address == "local":
            n = local_workers(workers)
            self.cluster = distributed.LocalCluster(
                n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                silence_logs=logging.ERROR)
            self.client = distributed.Client(self.cluster, set_as_default=False)
            self.workers = n
            self.name = f"dask local cluster ({n} workers)"
            return
        if not address.startswith("tcp://") or ":" not in address[len("tcp://"):]:
            raise InputError(f"the Dask address must be 'local' or tcp://HOST:PORT, got {address!r}")
        try:
            self.client = distributed.Client(address, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False)
        except Exception as exc:  # noqa: BLE001 - OSError, TimeoutError and Dask's own wrap the same failure
            raise InputError(f"cannot connect to the Dask scheduler at {address}: {_one_line(exc)}") from None
        try:
            self._check_workers()
        except BaseException:
            self.close()
            raise
        self.name = f"dask scheduler {address} ({self.workers} workers)"

    def _check_workers(self) -> None:
        try:
            self.client.wait_for_workers(1, timeout=CONNECT_TIMEOUT_S)
        except Exception:  # noqa: BLE001 - timeout
            raise InputError(f"the Dask scheduler at {self.address} has no workers") from None
        try:
            versions = self.client.run(_worker_version)
        except Exception as exc:  # noqa: BLE001 - the workers cannot import closurecheck
            raise InputError(f"the Dask workers at {self.address} cannot run closurecheck "
                             f"(install closurecheck {__version__} on them): {_one_line(exc)}") from None
        wrong = sorted({v for v in versions.values() if v != __version__})
        if wrong:
            raise InputError(f"the Dask workers at {self.address} run closurecheck {', '.join(wrong)}, "
                             f"this is {__version__}; install the same version on them")
        # Batches are cut for the tasks that can run at once: threads over all workers.
        self.workers = max(1, sum(self.client.nthreads().values()))

    def hold(self, points, options) -> HeldScans:
        """Keep these scans scattered, and the workers' caches of them, from one ``register`` call to the next."""
        return HeldScans(self, points, options)

    def register(self, points, src, dst, seeds, options, batch_pairs, progress=None):
        """Per-pair result tuples (or None) in input order; see pairwise_registration.register_batch."""
        if not isinstance(points, HeldScans):
            return register_once(self, points, src, dst, seeds, options, batch_pairs, progress)
        held = points
        held.check(src, dst, options)
        self.last_builds = 0
        if len(src) == 0:
            return []
        from distributed import as_completed

        client = self.client
        if held.state is None:
            held.state = (uuid.uuid4().hex, client.scatter(held.table, broadcast=True, hash=False))
        token, table = held.state
        work = OrderedPairs(src, dst, seeds)
        slices = batch_slices(len(work), self.workers, batch_pairs)
        begin(progress, len(work), min(self.workers, len(slices)))
        futures = [client.submit(_dask_batch, token, table, held.options, self.cache_scans, work.src[sl],
                                 work.dst[sl], work.seeds[sl], options, key=f"closurecheck-batch-{token}-{k}")
                   for k, sl in enumerate(slices)]
        order = {f.key: k for k, f in enumerate(futures)}
        parts: list = [None] * len(slices)
        try:
            for fut in as_completed(futures, loop=client.loop):
                k = order[fut.key]
                parts[k] = fut.result()
                if progress is not None:
                    progress.advance("registration", slices[k].stop - slices[k].start, len(work))
        finally:
            client.cancel(futures)
            # A worker lost meanwhile keeps nothing of ours worth reporting.
            with contextlib.suppress(Exception):
                total = sum(client.run(_built, token).values())
                self.last_builds = max(0, total - held.builds)
                held.builds = total
        return work.restore([r for part in parts for r in part])

    def release(self, held: HeldScans, abort: bool = False) -> None:
        """Release the scattered scans and drop the workers' caches of them."""
        state, held.state = held.state, None
        if state is None:
            return
        token, table = state
        with contextlib.suppress(Exception):  # the cluster may be gone already
            self.client.cancel([table])
            self.client.run(_forget, token)

    def close(self):
        """Close the client and, for ``local``, shut the embedded cluster down."""
        for obj in (getattr(self, "client", None), self.cluster):
            if obj is not None:
                with contextlib.suppress(Exception):  # closing is best effort
                    obj.close()
        self.cluster = None
