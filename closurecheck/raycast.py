"""Exact 2D ray casting against line segments and circles.

Used by the scenario generator to turn a floor plan into range scans.  Every
beam is a ray ``p + t * d`` (``t >= 0`` metres) from the sensor position
``p`` along the unit direction ``d`` of bearing ``theta + bearing`` in the
world frame; the range is the smallest ``t`` at which the ray meets a
segment or a circle's boundary.

The work is done as dense numpy arrays of shape (poses, beams, segments), a
chunk of poses at a time so that memory stays bounded.  With a finite
``max_range`` each chunk first drops the segments and circles whose bounding
boxes lie farther than ``max_range`` from the chunk's positions, so long
routes through large floor plans cost in proportion to what is near.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError


@dataclass(frozen=True)
class CastOptions:
    """Tuning of the chunked evaluation (affects speed and memory only, never results).

    ``chunk_elements`` bounds the size of one (poses, beams, shapes) work
    array; at 8 bytes per element and a handful of temporaries the default
    keeps the peak near 100 MB.
    """

    chunk_elements: int = 2_000_000


DEFAULT_CAST_OPTIONS = CastOptions()


def _as_poses(poses) -> tuple[np.ndarray, bool]:
    p = np.asarray(poses, dtype=np.float64)
    single = p.ndim == 1
    p = p.reshape(1, -1) if single else p
    if p.ndim != 2 or p.shape[1] != 3:
        raise InputError(f"poses must have shape (M, 3) or (3,), got {np.shape(poses)}")
    if not np.isfinite(p).all():
        raise InputError("poses must be finite")
    return p, single


def _as_rows(values, width: int, name: str, lead: tuple = ()) -> np.ndarray:
    if values is None:
        return np.zeros(lead + (0, width))
    a = np.asarray(values, dtype=np.float64)
    if a.size == 0:
        return np.zeros(lead + (0, width))
    if a.ndim != len(lead) + 2 or a.shape[-1] != width or a.shape[:len(lead)] != lead:
        want = ", ".join(str(n) for n in lead + ("K", width))
        raise InputError(f"{name} must have shape ({want}), got {a.shape}")
    if not np.isfinite(a).all():
        raise InputError(f"{name} must be finite")
    return a


def _check_common(bearings, max_range) -> tuple[np.ndarray, float]:
    b = np.asarray(bearings, dtype=np.float64).reshape(-1)
    if not np.isfinite(b).all():
        raise InputError("bearings must be finite")
    max_range = float(max_range)
    if not max_range > 0:
        raise InputError("max_range must be positive (metres)")
    return b, max_range


def _segment_hits(origin, dirs, seg) -> np.ndarray:
    """Smallest hit distance per ray against per-pose segments.

    origin (m, 2); dirs (m, B, 2) unit world-frame directions;
    seg (m, S, 4) or (1, S, 4).  Returns (m, B) with inf for no hit.
    """
    m, nb = dirs.shape[:2]
    if seg.shape[1] == 0:
        return np.full((m, nb), np.inf)
    ex = (seg[..., 2] - seg[..., 0])[:, None, :]                     # (m|1, 1, S)
    ey = (seg[..., 3] - seg[..., 1])[:, None, :]
    wx = (seg[..., 0] - origin[:, 0:1])[:, None, :]                  # (m, 1, S)
    wy = (seg[..., 1] - origin[:, 1:2])[:, None, :]
    dx = dirs[..., 0][..., None]                                     # (m, B, 1)
    dy = dirs[..., 1][..., None]
    # p + t d = a + u e  =>  t = (w x e) / (d x e),  u = (w x d) / (d x e)
    denom = dx * ey - dy * ex                                        # (m, B, S)
    t_num = wx * ey - wy * ex                                        # (m, 1, S)
    u_num = wx * dy - wy * dx                                        # (m, B, S)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = 1.0 / denom
        t = t_num * inv
        u = u_num * inv
    # denom == 0 (ray parallel to the segment) gives inf/nan and fails the tests below.
    ok = (t >= 0.0) & (u >= 0.0) & (u <= 1.0)
    np.copyto(t, np.inf, where=~ok)
    return t.min(axis=-1)


def _circle_hits(origin, dirs, circ) -> np.ndarray:
    """Smallest hit distance per ray against per-pose circles (first boundary crossing, t >= 0)."""
    m, nb = dirs.shape[:2]
    if circ.shape[1] == 0:
        return np.full((m, nb), np.inf)
    wx = (origin[:, 0:1] - circ[..., 0])[:, None, :]                 # (m, 1, C)
    wy = (origin[:, 1:2] - circ[..., 1])[:, None, :]
    c = wx * wx + wy * wy - (circ[..., 2] ** 2)[:, None, :]          # (m, 1, C)
    b = dirs[..., 0][..., None] * wx + dirs[..., 1][..., None] * wy  # (m, B, C)
    disc = b * b - c
    with np.errstate(invalid="ignore"):
        root = np.sqrt(disc)
    near = -b - root
    far = -b + root
    # A sensor inside a circle sees the circle's wall from inside: the far root.
    t = np.where(near >= 0.0, near, far)
    np.copyto(t, np.inf, where=~((disc >= 0.0) & (t >= 0.0)))
    return t.min(axis=-1)


def _directions(poses, bearings) -> np.ndarray:
    ang = poses[:, 2:3] + bearings[None, :]
    return np.stack([np.cos(ang), np.sin(ang)], axis=-1)


def _near(lo_xy, hi_xy, box_lo, box_hi, reach) -> np.ndarray:
    """Mask of shapes whose bounding boxes come within ``reach`` of the box [lo_xy, hi_xy]."""
    return ((box_lo[:, 0] <= hi_xy[0] + reach) & (box_hi[:, 0] >= lo_xy[0] - reach)
            & (box_lo[:, 1] <= hi_xy[1] + reach) & (box_hi[:, 1] >= lo_xy[1] - reach))


def cast(poses, bearings, segments, circles=None, max_range=np.inf,
         options: CastOptions = DEFAULT_CAST_OPTIONS) -> np.ndarray:
    """Range along each beam to the first segment or circle it hits.

    Parameters
    ----------
    poses : (M, 3) or (3,) sensor poses ``[x, y, theta]`` in the world frame
        (metres, radians).
    bearings : (B,) beam bearings in the sensor frame (radians, CCW positive,
        0 = straight ahead).
    segments : (S, 4) rows ``[x0, y0, x1, y1]`` in the world frame (metres).
    circles : (C, 3) rows ``[cx, cy, r]`` in the world frame (metres), or None.
    max_range : hits farther than this (metres) count as no hit.

    Returns
    -------
    (M, B) float64 distances in metres (``(B,)`` for a single pose), ``np.inf``
    where the beam hits nothing within ``max_range``.  A ray parallel to a
    segment never hits it; a sensor inside a circle hits its boundary from
    inside.
    """
    p, single = _as_poses(poses)
    b, max_range = _check_common(bearings, max_range)
    seg = _as_rows(segments, 4, "segments")
    circ = _as_rows(circles, 3, "circles")
    out = np.full((len(p), len(b)), np.inf)
    if len(p) == 0 or len(b) == 0:
        return out[0] if single else out

    seg_lo = np.minimum(seg[:, 0:2], seg[:, 2:4])
    seg_hi = np.maximum(seg[:, 0:2], seg[:, 2:4])
    circ_lo = circ[:, 0:2] - circ[:, 2:3]
    circ_hi = circ[:, 0:2] + circ[:, 2:3]
    cull = np.isfinite(max_range)
    shapes = max(1, len(seg) + len(circ))
    step = max(1, int(options.chunk_elements) // (len(b) * shapes))

    for start in range(0, len(p), step):
        chunk = p[start:start + step]
        s, c = seg, circ
        if cull:
            lo, hi = chunk[:, :2].min(axis=0), chunk[:, :2].max(axis=0)
            s = seg[_near(lo, hi, seg_lo, seg_hi, max_range)]
            c = circ[_near(lo, hi, circ_lo, circ_hi, max_range)]
        dirs = _directions(chunk, b)
        origin = chunk[:, :2]
        hit = np.minimum(_segment_hits(origin, dirs, s[None]), _circle_hits(origin, dirs, c[None]))
        out[start:start + step] = hit
    out[out > max_range] = np.inf
    return out[0] if single else out


def cast_per_pose(poses, bearings, segments, circles=None, max_range=np.inf,
                  options: CastOptions = DEFAULT_CAST_OPTIONS) -> np.ndarray:
    """Like :func:`cast`, but each pose has its own shapes (for moving objects).

    ``segments`` is (M, S, 4) and ``circles`` (M, C, 3): row i holds the
    shapes present when pose i was taken (world frame, metres).  Returns
    (M, B) float64 distances, ``np.inf`` for no hit within ``max_range``.
    """
    p, single = _as_poses(poses)
    if single:
        raise InputError("cast_per_pose needs poses of shape (M, 3)")
    b, max_range = _check_common(bearings, max_range)
    seg = _as_rows(segments, 4, "segments", lead=(len(p),))
    circ = _as_rows(circles, 3, "circles", lead=(len(p),))
    out = np.full((len(p), len(b)), np.inf)
    if len(p) == 0 or len(b) == 0:
        return out
    shapes = max(1, seg.shape[1] + circ.shape[1])
    step = max(1, int(options.chunk_elements) // (len(b) * shapes))
    for start in range(0, len(p), step):
        chunk = p[start:start + step]
        dirs = _directions(chunk, b)
        origin = chunk[:, :2]
        hit = np.minimum(_segment_hits(origin, dirs, seg[start:start + step]),
                         _circle_hits(origin, dirs, circ[start:start + step]))
        out[start:start + step] = hit
    out[out > max_range] = np.inf
    return out
