"""Exact 2D ray casting against line segments and circles.

Used by the scenario generator to turn a floor plan into range scans.  Every
beam is a ray ``p + t * d`` (``t >= 0`` metres) from the sensor position
``p`` along the unit direction ``d`` of bearing ``theta + bearing`` in the
world frame; the range is the smallest ``t`` at which the ray meets a
segment or a circle's boundary.

Rather than testing every beam against every shape, each (pose, shape)
pair first works out the angular interval the shape covers as seen from the
sensor and tests only the beams inside it, so the work grows with the number
of shapes a beam passes rather than with the size of the whole plan.  With a
finite ``max_range``, a chunk of poses first drops the shapes whose bounding
boxes lie farther than ``max_range`` from all of the chunk's positions, and
each pose then drops the shapes whose nearest point is out of range.  The
intersection itself is exact (closed form in float64); the results do not
depend on the chunk sizes.

A sensor lying exactly on a segment's line (a pose inside a wall) is a
degenerate case that is not handled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError


@dataclass(frozen=True)
class CastOptions:
    """Tuning of the chunked evaluation (affects speed and memory only, never results).

    ``poses_per_chunk`` poses share one culling test and one batch of work;
    ``chunk_elements`` bounds the number of (pose, beam, shape) intersection
    tests held in memory at once (about 100 bytes each with temporaries).
    """

    poses_per_chunk: int = 64
    chunk_elements: int = 1_000_000


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


TWO_PI = 2.0 * np.pi
# Angular intervals are widened by this much (radians) so that a beam aimed
# exactly at a segment's end or a circle's tangent is still tested; the exact
# intersection test then decides.
_ANGLE_PAD_RAD = 1e-9


def _beam_order(bearings: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bearings wrapped to [0, 2 pi) and sorted, and the order that sorts them."""
    wrapped = np.mod(bearings, TWO_PI)
    order = np.argsort(wrapped, kind="stable")
    return wrapped[order], order


def _spans(lo, width, sorted_bearings):
    """Beam index ranges covered by angular intervals [lo, lo + width] (sensor frame, radians).

    ``lo`` in [0, 2 pi); returns (start, end, end_wrapped): the interval
    covers sorted beams start..end-1 and, when it passes 2 pi, also 0..end_wrapped-1.
    """
    full = width >= TWO_PI
    lo = np.where(full, 0.0, lo)
    hi = lo + np.minimum(width, TWO_PI)
    start = np.searchsorted(sorted_bearings, lo, side="left")
    end = np.searchsorted(sorted_bearings, np.minimum(hi, TWO_PI), side="right")
    end_wrapped = np.where(hi > TWO_PI, np.searchsorted(sorted_bearings, hi - TWO_PI, side="right"), 0)
    return start, end, end_wrapped


def _expand(start, end, end_wrapped, budget: int):
    """Yield (pair index, sorted beam index) arrays for every beam inside each pair's span, in batches."""
    pair = np.arange(len(start))
    starts = np.concatenate([start, np.zeros_like(end_wrapped)])
    counts = np.concatenate([np.maximum(end - start, 0), end_wrapped])
    pairs = np.concatenate([pair, pair])
    keep = counts > 0
    starts, counts, pairs = starts[keep], counts[keep], pairs[keep]
    if len(counts) == 0:
        return
    cum = np.cumsum(counts)
    g0 = 0
    while g0 < len(counts):
        base = cum[g0] - counts[g0]
        g1 = max(g0 + 1, int(np.searchsorted(cum, base + budget, side="right")))
        c = counts[g0:g1]
        total = int(c.sum())
        offsets = np.repeat(cum[g0:g1] - c - base - starts[g0:g1], c)
        yield np.repeat(pairs[g0:g1], c), np.arange(total) - offsets
        g0 = g1


def _segment_ranges(px, py, th, pose_of, segs, sorted_bearings, dirs, out, max_range, budget):
    """Fill out (m, B sorted beams) with the nearest hit on segments.

    px, py, th (m,) sensor poses; pose_of (K,) the pose of each (pose, segment)
    pair; segs (K, 4) each pair's segment in the world frame.
    """
    ax, ay = segs[:, 0] - px[pose_of], segs[:, 1] - py[pose_of]
    bx, by = segs[:, 2] - px[pose_of], segs[:, 3] - py[pose_of]
    ex, ey = bx - ax, by - ay
    if np.isfinite(max_range):
        # exact culling: the nearest point of the segment is out of range
        u = np.clip(-(ax * ex + ay * ey) / np.maximum(ex * ex + ey * ey, np.finfo(float).tiny), 0.0, 1.0)
        near = np.hypot(ax + u * ex, ay + u * ey) <= max_range
        ax, ay, bx, by, ex, ey, pose_of = (v[near] for v in (ax, ay, bx, by, ex, ey, pose_of))
    heading = th[pose_of]
    beta_a = np.mod(np.arctan2(ay, ax) - heading, TWO_PI)
    beta_b = np.mod(np.arctan2(by, bx) - heading, TWO_PI)
    span = np.mod(beta_b - beta_a + np.pi, TWO_PI) - np.pi
    lo = np.mod(np.where(span >= 0, beta_a, beta_b) - _ANGLE_PAD_RAD, TWO_PI)
    t_num = ax * ey - ay * ex
    nb = dirs.shape[1]
    dflat = dirs.reshape(-1, 2)
    oflat = out.reshape(-1)
    for pair, beam in _expand(*_spans(lo, np.abs(span) + 2 * _ANGLE_PAD_RAD, sorted_bearings), budget):
        flat = pose_of[pair] * nb + beam
        dx, dy = dflat[flat, 0], dflat[flat, 1]
        pex, pey = ex[pair], ey[pair]
        # p + t d = a + u e  =>  t = (w x e) / (d x e),  u = (w x d) / (d x e), w = a - p
        denom = dx * pey - dy * pex
        with np.errstate(divide="ignore", invalid="ignore"):
            t = t_num[pair] / denom
            u = (ax[pair] * dy - ay[pair] * dx) / denom
        # denom == 0 (ray parallel to the segment) gives inf/nan and fails these tests
        ok = (t >= 0.0) & (u >= 0.0) & (u <= 1.0)
        np.minimum.at(oflat, flat[ok], t[ok])


def _circle_ranges(px, py, th, pose_of, circ, sorted_bearings, dirs, out, max_range, budget):
    """Fill out (m, B sorted beams) with the nearest hit on circles (first boundary crossing, t >= 0)."""
    wx, wy = px[pose_of] - circ[:, 0], py[pose_of] - circ[:, 1]
    r = circ[:, 2]
    dist = np.hypot(wx, wy)
    keep = dist - r <= max_range
    wx, wy, r, dist, pose_of = wx[keep], wy[keep], r[keep], dist[keep], pose_of[keep]
    inside = dist <= r
    half = np.arcsin(np.clip(r / np.where(inside, 1.0, dist), 0.0, 1.0))
    centre = np.mod(np.arctan2(-wy, -wx) - th[pose_of], TWO_PI)
    width = np.where(inside, TWO_PI, 2 * half + 2 * _ANGLE_PAD_RAD)
    lo = np.mod(centre - half - _ANGLE_PAD_RAD, TWO_PI)
    cc = wx * wx + wy * wy - r * r
    nb = dirs.shape[1]
    dflat = dirs.reshape(-1, 2)
    oflat = out.reshape(-1)
    for pair, beam in _expand(*_spans(lo, width, sorted_bearings), budget):
        flat = pose_of[pair] * nb + beam
        b = dflat[flat, 0] * wx[pair] + dflat[flat, 1] * wy[pair]
        disc = b * b - cc[pair]
        with np.errstate(invalid="ignore"):
            root = np.sqrt(disc)
        near = -b - root
        # a sensor inside a circle sees the circle's wall from inside: the far root
        t = np.where(near >= 0.0, near, -b + root)
        ok = (disc >= 0.0) & (t >= 0.0)
        np.minimum.at(oflat, flat[ok], t[ok])


def _directions(poses, sorted_bearings) -> np.ndarray:
    ang = poses[:, 2:3] + sorted_bearings[None, :]
    return np.stack([np.cos(ang), np.sin(ang)], axis=-1)


def _near(lo_xy, hi_xy, box_lo, box_hi, reach) -> np.ndarray:
    """Mask of shapes whose bounding boxes come within ``reach`` of the box [lo_xy, hi_xy]."""
    return ((box_lo[:, 0] <= hi_xy[0] + reach) & (box_hi[:, 0] >= lo_xy[0] - reach)
            & (box_lo[:, 1] <= hi_xy[1] + reach) & (box_hi[:, 1] >= lo_xy[1] - reach))


def _cast_chunk(chunk, sorted_bearings, seg_pairs, circ_pairs, max_range, budget):
    """Ranges (m, B sorted) for one chunk; *_pairs are (pose index (K,), shapes (K, 4|3))."""
    out = np.full((len(chunk), len(sorted_bearings)), np.inf)
    dirs = _directions(chunk, sorted_bearings)
    px, py, th = chunk[:, 0], chunk[:, 1], chunk[:, 2]
    if len(seg_pairs[0]):
        _segment_ranges(px, py, th, *seg_pairs, sorted_bearings, dirs, out, max_range, budget)
    if len(circ_pairs[0]):
        _circle_ranges(px, py, th, *circ_pairs, sorted_bearings, dirs, out, max_range, budget)
    return out


def _all_pairs(m: int, shapes: np.ndarray):
    """Every (pose, shape) pair of a chunk of m poses sharing the same shapes (K, w)."""
    return np.repeat(np.arange(m), len(shapes)), np.tile(shapes, (m, 1))


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

    sorted_b, order = _beam_order(b)
    seg_lo = np.minimum(seg[:, 0:2], seg[:, 2:4])
    seg_hi = np.maximum(seg[:, 0:2], seg[:, 2:4])
    circ_lo = circ[:, 0:2] - circ[:, 2:3]
    circ_hi = circ[:, 0:2] + circ[:, 2:3]
    cull = np.isfinite(max_range)
    step = max(1, int(options.poses_per_chunk))
    for start in range(0, len(p), step):
        chunk = p[start:start + step]
        s, c = seg, circ
        if cull:
            lo, hi = chunk[:, :2].min(axis=0), chunk[:, :2].max(axis=0)
            s = seg[_near(lo, hi, seg_lo, seg_hi, max_range)]
            c = circ[_near(lo, hi, circ_lo, circ_hi, max_range)]
        hit = _cast_chunk(chunk, sorted_b, _all_pairs(len(chunk), s), _all_pairs(len(chunk), c),
                          max_range, int(options.chunk_elements))
        out[start:start + step, order] = hit
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
    sorted_b, order = _beam_order(b)
    step = max(1, int(options.poses_per_chunk))
    for start in range(0, len(p), step):
        chunk = p[start:start + step]
        m = len(chunk)
        seg_pairs = (np.repeat(np.arange(m), seg.shape[1]), seg[start:start + m].reshape(-1, 4))
        circ_pairs = (np.repeat(np.arange(m), circ.shape[1]), circ[start:start + m].reshape(-1, 3))
        out[start:start + m, order] = _cast_chunk(chunk, sorted_b, seg_pairs, circ_pairs, max_range,
                                                  int(options.chunk_elements))
    out[out > max_range] = np.inf
    return out
