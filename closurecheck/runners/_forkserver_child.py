"""Preloaded by the pool's fork server only (never imported elsewhere): the fork server dies with the main process.

Importing it has that effect on purpose; see :mod:`closurecheck.runners.lifeline`.
The fork server is single-threaded (it forks the workers), so it relies on
``prctl`` and on its own check of the main process's pipe, not on a thread.
"""

from .lifeline import die_with_parent

die_with_parent()
