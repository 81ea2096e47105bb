"""Load verification's compiled kernels ahead of the verification, while the workers register.

numba keeps each kernel in a file cache, but a process still loads a kernel
from it on the first call: the pair test's parallel kernel
(``_pcm_kernels.failing_pairs``) took 0.36-0.43 s on its first call in a
fresh process on the 2-core machine of docs/performance.md, and 0.02 s on
the next.  The pipeline calls :func:`warm_kernels` in a thread while the
registration runs in worker processes and this process only waits for them,
so the verification that follows starts with the kernel loaded.
"""

from __future__ import annotations

import numpy as np

from ..core import se2
from .consistency import pairwise_consistency


def warm_kernels() -> None:
    """Run the pairwise consistency test once on an invented problem of three closures.

    The closures join poses 1 m apart along a straight line, one of them a
    metre off, so that the test both passes and fails pairs and every branch
    of the compiled pair test runs (with the argument types of a real run).

    Examples
    --------
    >>> from closurecheck.verification.warm import warm_kernels
    >>> warm_kernels()
    """
    poses = np.column_stack([np.arange(6.0), np.zeros(6), np.zeros(6)])
    step = np.tile(np.diag([1e-4, 1e-4, 1e-5]), (5, 1, 1))
    prefix = se2.chain_prefix(poses, step)
    src, dst = np.array([0, 1, 2]), np.array([4, 5, 5])
    deltas = se2.between(poses[src], poses[dst])
    deltas[2, 1] += 1.0
    pairwise_consistency(src, dst, deltas, np.tile(np.diag([1e-4, 1e-4, 1e-5]), (3, 1, 1)), poses, prefix)
