"""Preloaded by the pool's fork server: it dies with the main process, its workers ignore Ctrl-C and start warm.

Importing it has that effect only inside a fork server (the import from
``multiprocessing.forkserver.main``'s preload); imported anywhere else (a
test collecting every module, say) it does nothing.  See
:mod:`closurecheck.runners.lifeline`.  The fork server is single-threaded
(it forks the workers), so it relies on ``prctl`` and on its own check of
the main process's pipe, not on a thread.

The fork server also loads registration's compiled kernels once
(:func:`closurecheck.registration.warm.warm_kernels`), so that the workers
it forks do not each load them on their first batch.
"""

import signal
import sys

from .lifeline import die_with_parent


def _in_fork_server() -> bool:
    frame = sys._getframe()
    while frame is not None:
        code = frame.f_code
        if code.co_name == "main" and code.co_filename.replace("\\", "/").endswith("multiprocessing/forkserver.py"):
            return True
        frame = frame.f_back
    return False


if _in_fork_server():
    die_with_parent()
    # Workers forked from here start with this process's Ctrl-C handler:
    # ignoring it from the start leaves no moment in which a worker would
    # print its own KeyboardInterrupt traceback (the main process handles Ctrl-C).
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    from ..registration.warm import warm_kernels

    # Only a head start: a kernel that failed to load here fails again, with its own error, in the
    # worker that calls it.
    try:
        warm_kernels()
    except Exception:  # noqa: BLE001
        pass
