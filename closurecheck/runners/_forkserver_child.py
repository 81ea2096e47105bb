"""Preloaded by the pool's fork server only (never imported elsewhere): the fork server dies with the main process.

Importing it has that effect on purpose; see :mod:`closurecheck.runners.lifeline`.
The fork server is single-threaded (it forks the workers), so it relies on
``prctl`` and on its own check of the main process's pipe, not on a thread.
"""

import signal

from .lifeline import die_with_parent

die_with_parent()

# Workers forked from here start with this process's Ctrl-C handler: ignoring
# it from the start leaves no moment in which a worker would print its own
# KeyboardInterrupt traceback (the main process handles Ctrl-C).
signal.signal(signal.SIGINT, signal.SIG_IGN)
