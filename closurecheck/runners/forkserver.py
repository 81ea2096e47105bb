"""Starting the local pool's fork server: light to import, so that a run can start it first of all.

The fork server imports the registration code and loads its compiled
kernels (:mod:`closurecheck.runners._forkserver_child`) before it forks any
worker, about 1-2.6 s on the 2-core machine of docs/performance.md.  This
module needs only the standard library, so ``closurecheck run`` starts the
fork server (:func:`start_early`) before importing the pipeline, whose own
imports (scipy.optimize, scipy.sparse, numba; scipy.stats and scikit-learn
before the eighth round) then run on the other core at the same time.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
from pathlib import Path

# The modules the fork server preloads: its own start-up (dies with the main process, loads the
# kernels) and the pool's worker functions.
_PRELOAD = [f"{__package__}._forkserver_child", f"{__package__}.pool"]


def package_root() -> str:
    """The folder holding the ``closurecheck`` package this process runs."""
    return str(Path(__file__).resolve().parents[2])


@contextlib.contextmanager
def _child_environment():
    # The fork server starts as ``python -c ...``, which puts the current
    # folder first on its sys.path, and Python 3.11's fork server does not
    # take the parent's sys.path: a folder named "closurecheck" in the
    # current folder (the parent of a clone, say) would then shadow the
    # package in every worker.  PYTHONSAFEPATH (Python >= 3.11) drops the
    # current folder, and PYTHONPATH names the folder of the very package
    # this process runs, so workers import the same code as their parent.
    old = {k: os.environ.get(k) for k in ("PYTHONSAFEPATH", "PYTHONPATH")}
    os.environ["PYTHONSAFEPATH"] = "1"
    os.environ["PYTHONPATH"] = os.pathsep.join([package_root()] + ([old["PYTHONPATH"]] if old["PYTHONPATH"] else []))
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def local_workers(jobs: int) -> int:
    """Worker processes for a ``jobs`` setting of at least 0: the count itself, or all cores for 0.

    Examples
    --------
    >>> local_workers(3)
    3
    >>> local_workers(0) >= 1
    True
    """
    return jobs or os.cpu_count() or 1


def pool_context():
    """The multiprocessing context of the local pool, its fork server started (once per process).

    A fork server (preloaded with the pool's modules) starts workers in
    milliseconds without forking a parent that may hold threads (progress
    bars, a Dask client); spawn where there is no fork server (spawn
    children take the parent's sys.path before importing anything).
    """
    if "forkserver" in multiprocessing.get_all_start_methods():
        from multiprocessing import forkserver

        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(_PRELOAD)
        with _child_environment():
            forkserver.ensure_running()
        return ctx
    return multiprocessing.get_context("spawn")


def start_early(jobs: int | None, dask: str | None) -> bool:
    """Start the pool's fork server now when the run will use a local pool; True if it was started.

    ``jobs`` and ``dask`` as given on the command line (None: not given).
    A run with ``--jobs 1`` (or a refused negative count) or ``--dask``
    never starts it; one whose settings file asks for ``jobs = 1`` has
    started it for nothing, and it exits with this process.

    Examples
    --------
    >>> start_early(1, None), start_early(2, "local")
    (False, False)
    """
    if dask or (jobs is not None and jobs < 0) or local_workers(jobs or 0) == 1:
        return False
    pool_context()
    return True
