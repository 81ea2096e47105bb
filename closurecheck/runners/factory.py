"""Choosing a runner from the run's settings; the one module that knows every implementation."""

from __future__ import annotations

from ..errors import InputError
from .forkserver import local_workers
from .pool import PoolRunner
from .serial import SerialRunner


def make_runner(jobs: int = 0, dask: str | None = None):
    """The runner for ``--jobs`` / ``--dask``.

    jobs : worker processes (0 = all cores, 1 = serial in this process); with
        ``dask="local"`` the number of Dask workers.
    dask : None for local processes, ``"local"`` for an embedded Dask
        cluster, ``"tcp://HOST:PORT"`` for an existing Dask scheduler.
    """
    if jobs < 0:
        raise InputError(f"jobs must be >= 0 (0 = all cores), got {jobs}")
    if dask:
        from .dask_cluster import DaskRunner

        return DaskRunner(dask, workers=jobs)
    workers = local_workers(jobs)
    return SerialRunner() if workers == 1 else PoolRunner(workers)
