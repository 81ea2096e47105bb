"""Child processes die with their parent: the pool's fork server and its workers never outlive a killed run.

A process pool's workers wait on a queue whose write end they hold
themselves, so when the main process is killed (SIGKILL, or SIGTERM
without cleanup) nothing wakes them: they would sleep on, holding hundreds
of MB.  Each child therefore asks the Linux kernel to kill it when its
parent dies (``prctl(PR_SET_PDEATHSIG, SIGKILL)``), and workers also run a
watchdog thread that exits when the parent process changes (the portable
fallback, for systems without ``prctl``).

Imported only in child processes: the fork server preloads
:mod:`closurecheck.runners._forkserver_child`, and workers call
:func:`guard_worker` from the pool's initializer.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
import time

_PR_SET_PDEATHSIG = 1  # linux/prctl.h
WATCH_INTERVAL_S = 0.5


def die_with_parent() -> bool:
    """Ask the kernel to SIGKILL this process when its parent exits (Linux); False elsewhere.

    Exits at once when the parent is already gone (it may die between
    this process starting and the request).
    """
    parent = os.getppid()
    done = False
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            done = libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
        except (OSError, AttributeError):
            done = False
    if parent == 1 or os.getppid() != parent:
        os._exit(1)
    return done


def watch_parent(parent: int, interval_s: float = WATCH_INTERVAL_S) -> threading.Thread:
    """Daemon thread that ends this process as soon as its parent is no longer ``parent``."""

    def watch():
        while True:
            if os.getppid() != parent:
                os._exit(1)
            time.sleep(interval_s)

    thread = threading.Thread(target=watch, name="closurecheck-parent-watch", daemon=True)
    thread.start()
    return thread


def guard_worker() -> None:
    """Everything a pool worker does first: die with the parent, leave Ctrl-C to the main process.

    Ctrl-C reaches every process of the terminal's group; the main process
    handles it (and stops the workers), so a worker ignores it instead of
    printing its own traceback.
    """
    parent = os.getppid()
    die_with_parent()
    watch_parent(parent)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
