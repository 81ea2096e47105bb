"""numba's first call in the main process, made before the verification needs it.

The verification's compiled kernels (the PCM pair test, the clique search,
the free-space check, the selected inverse) run in the main process, and
numba's first call in a process sets up its typing and code-generation
state: about 0.6 s of CPU on the 2-core machine of docs/performance.md,
whichever kernel comes first (each kernel after it loads from the disk
cache in 5-10 ms).  The registration workers do not pay it (they start from
the fork server, which has called their kernels, registration/warm.py), but
the main process did, at the start of the verification, on the run's
critical path.  The pipeline calls :func:`warm_compiler` from a thread
while the workers calibrate the odometry and the main process only waits.
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, nogil=True)
def _first(x):
    return x + 1.0


def warm_compiler() -> None:
    """Make numba's first call of this process (its setup, about 0.6 s of CPU once per process).

    Examples
    --------
    >>> from closurecheck.verification.warm import warm_compiler
    >>> warm_compiler()
    """
    _first(0.0)
