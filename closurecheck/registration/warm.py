"""Load registration's compiled kernels once, before a process forks its workers.

numba keeps each compiled kernel in a file cache, but a new process still
loads every kernel it calls from that cache on the first call: about 0.45 s
of CPU for the registration kernels on the 2-core machine of
docs/performance.md, paid by every pool worker on its first batch.  The
pool's fork server calls :func:`warm_kernels` while it starts (in parallel
with the main process reading the log), so the workers it forks inherit the
loaded code.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from .batch import register_batch
from .icp import RegistrationOptions, prepare_scan

# An invented room (metres): walls at x = -3 and 4, y = -2 and 2.5, and a thin round post
# (radius 5 cm) at (1.0, -0.5), so that both the line and the small-object paths run.
_ROOM = (-3.0, 4.0, -2.0, 2.5)
_POST = (1.0, -0.5, 0.05)


def room_scan(pose, beams: int = 721) -> np.ndarray:
    """Readings of the invented room seen from ``pose``, without noise.

    Parameters
    ----------
    pose : (3,) sensor pose (x, y, theta) in the room's frame (m, m, rad).
    beams : beams over 270 degrees, evenly spaced from -135 to +135 degrees.

    Returns
    -------
    (beams, 2) points in the sensor frame (m); every beam hits a wall or the post.

    Examples
    --------
    >>> from closurecheck.registration.warm import room_scan
    >>> pts = room_scan((0.0, 0.0, 0.0))
    >>> pts.shape, bool(np.hypot(*pts.T).max() < 5.0)
    ((721, 2), True)
    """
    x, y, th = (float(v) for v in pose)
    bearing = np.linspace(-0.75 * np.pi, 0.75 * np.pi, beams)
    c, s = np.cos(th + bearing), np.sin(th + bearing)
    x0, x1, y0, y1 = _ROOM
    with np.errstate(divide="ignore", invalid="ignore"):
        tx = np.where(c > 0, (x1 - x) / c, (x0 - x) / c)
        ty = np.where(s > 0, (y1 - y) / s, (y0 - y) / s)
    r = np.fmin(np.where(np.isfinite(tx) & (tx > 0), tx, np.inf), np.where(np.isfinite(ty) & (ty > 0), ty, np.inf))
    # Ray-circle intersection: the nearer root of |p + t d - centre|^2 = radius^2.
    px, py, radius = _POST
    bx, by = x - px, y - py
    b = bx * c + by * s
    disc = b * b - (bx * bx + by * by - radius * radius)
    hit = np.sqrt(np.where(disc > 0, disc, 0.0))
    t_post = np.where((disc > 0) & (-b - hit > 0), -b - hit, np.inf)
    r = np.fmin(r, t_post)
    return np.column_stack([r * np.cos(bearing), r * np.sin(bearing)])


def warm_kernels(options: RegistrationOptions | None = None) -> None:
    """Register one pair with and without the coarse stage and with a second robust kernel, loading every kernel.

    The second kernel runs ICP's Python loop, which also resolves ties
    between nearest points under the default kernel.

    Parameters
    ----------
    options : registration settings (default: the defaults), which choose
        the code paths that run and so the kernels loaded.

    Examples
    --------
    >>> from closurecheck.registration.warm import warm_kernels
    >>> warm_kernels()
    """
    opt = options or RegistrationOptions()
    scans = {0: prepare_scan(room_scan((0.0, 0.0, 0.0)), opt, grid=False),
             1: prepare_scan(room_scan((0.3, 0.1, 0.05)), opt, grid=False)}
    seed = [np.array([[0.25, 0.05, 0.0]])]
    for changes in ({"coarse": False}, {"coarse": True}, {"coarse": False, "kernel": "cauchy"}):
        register_batch(scans, [0], [1], seed, dataclasses.replace(opt, **changes))


def loaded_kernels() -> tuple[str, ...]:
    """Names of registration's compiled kernels whose code this process has loaded (or compiled).

    Examples
    --------
    >>> from closurecheck.registration.warm import loaded_kernels, warm_kernels
    >>> warm_kernels()
    >>> {"icp_line", "coarse_search", "line_models"} <= set(loaded_kernels())
    True
    """
    from . import _kernels

    return tuple(sorted(name for name, f in vars(_kernels).items() if getattr(f, "signatures", None)))
