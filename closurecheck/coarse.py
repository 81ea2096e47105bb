"""Coarse (global) initialisation: correlative scan matching on a likelihood grid.

Follows E. Olson, "Real-Time Correlative Scan Matching", ICRA 2009: the
target scan is rasterised into a grid whose cells hold the likelihood
``exp(-d^2 / (2 sigma^2))`` of a point landing there (d: distance to the
nearest target point), stored as uint8 (0..255).  A pyramid of grids holds,
for each cell, the maximum of the fine grid over the 2^l x 2^l block of
cells that starts there; summing level l over the source points bounds the
fine score of every translation inside that block from above.  For each
rotation on a regular grid of angles, the translation window is covered by
top-level blocks, and blocks are split into four children best-bound-first
until no open block can beat the k-th best distinct hypothesis found so far
(branch and bound: exact for the grid score).

Frames: the grid lives in the target scan's frame (metres); a hypothesis is
the pose ``[x, y, theta]`` of the source scan in the target frame.  Scores
are the mean likelihood over the source points, in [0, 1].
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

_LEVELS = 255
# Blocks split per vectorised batch: large enough to amortise numpy call
# overhead, small enough that the bound check stops the search early.
_BATCH_NODES = 64
# Leaves kept for the distinctness test; far more than any n_best needs.
_MAX_RECORDS = 4096


@dataclass(frozen=True, eq=False)
class LikelihoodGrid:
    """Rasterised likelihood of a scan, in the scan's own frame, with its bound pyramid.

    ``levels[0][i, j]`` covers x in [origin_x + i r, origin_x + (i+1) r) and
    the same for y with j; values are likelihood * 255.  ``levels[l][i, j]``
    is the maximum of ``levels[0]`` over ``[i, i + 2^l) x [j, j + 2^l)``.
    The grid has at least ``2^L`` empty cells on each side (L the top
    level), so every level is zero outside it.
    """

    origin: np.ndarray
    resolution_m: float
    levels: tuple

    @property
    def fine(self) -> np.ndarray:
        return self.levels[0]


def build_grid(points, resolution_m: float, sigma_m: float, top_block_cells: int) -> LikelihoodGrid:
    """Likelihood grid of (N, 2) points (metres, scan frame).

    ``top_block_cells`` is rounded up to a power of two; the pyramid has
    block sizes 1, 2, 4, ..., top_block_cells.
    """
    pts = np.asarray(points, dtype=float)
    n_levels = int(np.ceil(np.log2(max(top_block_cells, 1)))) + 1
    top = 2 ** (n_levels - 1)
    reach = int(np.ceil(3.0 * sigma_m / resolution_m))
    margin = reach + top + 1
    lo = pts.min(axis=0) - margin * resolution_m
    shape = tuple((np.floor((pts.max(axis=0) - lo) / resolution_m)).astype(int) + margin + 1)
    cells = np.floor((pts - lo) / resolution_m).astype(np.intp)
    occupied = np.ones(shape, dtype=bool)
    occupied[cells[:, 0], cells[:, 1]] = False
    # Distance (metres) from each cell to the nearest cell holding a point.
    dist = ndimage.distance_transform_edt(occupied) * resolution_m
    levels = [np.rint(np.exp(-0.5 * (dist / sigma_m) ** 2) * _LEVELS).astype(np.uint8)]
    for lvl in range(1, n_levels):
        # max over [i, i + 2^l) = max of two level l-1 blocks, at i and i + 2^(l-1).
        prev = levels[-1]
        half = 2 ** (lvl - 1)
        nxt = prev.copy()
        np.maximum(nxt[:-half], prev[half:], out=nxt[:-half])
        out = nxt.copy()
        np.maximum(out[:, :-half], nxt[:, half:], out=out[:, :-half])
        levels.append(out)
    return LikelihoodGrid(origin=lo, resolution_m=float(resolution_m), levels=tuple(levels))


def downsample(points, cell_m: float, max_points: int) -> np.ndarray:
    """At most ``max_points`` points, one per ``cell_m`` square cell, spread evenly."""
    pts = np.asarray(points, dtype=float)
    keys = np.floor(pts / cell_m).astype(np.int64)
    _, first = np.unique(keys[:, 0] * 1_000_003 + keys[:, 1], return_index=True)
    first.sort()
    if len(first) > max_points:
        first = first[np.linspace(0, len(first) - 1, max_points).round().astype(int)]
    return pts[first]


def auto_angle_step(points, resolution_m: float) -> float:
    """Angle step (radians) that moves the 90th-percentile-range point by one cell."""
    far = float(np.percentile(np.hypot(points[:, 0], points[:, 1]), 90))
    return resolution_m / max(far, resolution_m)


def distinct(records, k: int, sep_m: float, sep_rad: float) -> np.ndarray:
    """Greedy non-maximum suppression over (m, 4) rows [score, x, y, theta].

    Returns the indices of up to k rows, best first, each farther than
    ``sep_m`` (metres) or ``sep_rad`` (radians) from every better kept row.
    """
    alive = np.ones(len(records), dtype=bool)
    score = records[:, 0]
    keep = []
    while len(keep) < k and alive.any():
        i = int(np.flatnonzero(alive)[np.argmax(score[alive])])
        keep.append(i)
        dt = np.abs(np.mod(records[:, 3] - records[i, 3] + np.pi, 2 * np.pi) - np.pi)
        near = (np.hypot(records[:, 1] - records[i, 1], records[:, 2] - records[i, 2]) < sep_m) & (dt < sep_rad)
        alive &= ~near
        alive[i] = False
    return np.asarray(keep, dtype=int)


def search(grid: LikelihoodGrid, points, seed, *, window_m: float, window_rad: float,
           angle_step_rad: float, n_best: int, separation_m: float, separation_rad: float):
    """Best distinct source poses within a window around ``seed``.

    Parameters
    ----------
    grid : likelihood grid of the target scan.
    points : (N, 2) source points in the source frame (metres), usually
        downsampled with :func:`downsample`.
    seed : (3,) initial pose of the source in the target frame.
    window_m, window_rad : half-widths of the search window around the seed
        in x and y (metres) and theta (radians).
    angle_step_rad : rotation step (radians).
    n_best : number of distinct hypotheses to return.
    separation_m, separation_rad : two hypotheses closer than both are the same.

    Returns
    -------
    poses : (k, 3) hypotheses [x, y, theta] in the target frame, best first.
    scores : (k,) mean likelihood of the source points, in [0, 1].

    The translation search is branch and bound over a quadtree of blocks:
    a block's bound is the sum over the points of the pyramid level whose
    cells are the maximum over the block, so it is never below the score of
    any translation inside it; blocks are split best-bound-first, in
    vectorised batches, until no open block can beat the n_best-th best
    distinct leaf.
    """
    pts = np.asarray(points, dtype=float)
    seed = np.asarray(seed, dtype=float)
    r = grid.resolution_m
    top_level = len(grid.levels) - 1
    top = 2 ** top_level
    half = int(np.ceil(window_m / r))
    n_top = int(np.ceil((2 * half + 1) / top))
    starts = -half + top * np.arange(n_top)
    n_ang = int(np.ceil(window_rad / angle_step_rad)) if angle_step_rad > 0 else 0
    angles = seed[2] + angle_step_rad * np.arange(-n_ang, n_ang + 1)

    # Cells of the rotated source points at zero offset.  Clipping keeps
    # points far outside the grid far enough outside that no offset in the
    # window brings them back; the zero padding makes every index valid.
    w, h = grid.levels[0].shape
    reach = half + top + 1
    pad = 2 * half + 2 * top + 1
    c, s = np.cos(angles)[:, None], np.sin(angles)[:, None]
    wx = c * pts[:, 0] - s * pts[:, 1] + (seed[0] - grid.origin[0])
    wy = s * pts[:, 0] + c * pts[:, 1] + (seed[1] - grid.origin[1])
    cx = np.clip(np.floor(wx / r).astype(np.int64), -reach, w - 1 + reach) + pad
    cy = np.clip(np.floor(wy / r).astype(np.int64), -reach, h - 1 + reach) + pad
    hp = h + 2 * pad
    size = (w + 2 * pad) * hp
    base = cx * hp + cy                                                     # (A, N)
    # All pyramid levels, zero padded, in one flat array: level l starts at l * size.
    stack = np.concatenate([np.pad(g, pad).ravel() for g in grid.levels])

    def bounds(lvl, ai, ox, oy):
        flat = base[ai] + (lvl * size + ox * hp + oy)[:, None]
        return stack[flat].sum(axis=1, dtype=np.int64)

    ta, tx, ty = np.meshgrid(np.arange(len(angles)), starts, starts, indexing="ij")
    f_ai, f_ox, f_oy = ta.ravel(), tx.ravel(), ty.ravel()
    f_lvl = np.full(len(f_ai), top_level)
    if top_level == 0:
        inside = (np.abs(f_ox) <= half) & (np.abs(f_oy) <= half)
        f_ai, f_ox, f_oy, f_lvl = f_ai[inside], f_ox[inside], f_oy[inside], f_lvl[inside]
    f_b = bounds(f_lvl, f_ai, f_ox, f_oy)
    leaves = [np.empty((0, 4))]
    if top_level == 0:
        leaves.append(np.column_stack([f_b, f_ai, f_ox, f_oy]).astype(float))
        f_b = f_b[:0]
    records = _poses(np.concatenate(leaves), seed, r, angles)
    kth = _kth(records, n_best, separation_m, separation_rad)
    while len(f_b):
        if f_b.max() <= kth:
            break
        take = min(_BATCH_NODES, len(f_b))
        sel = np.argpartition(-f_b, take - 1)[:take] if take < len(f_b) else np.arange(len(f_b))
        rest = np.ones(len(f_b), dtype=bool)
        rest[sel] = False
        p_ai, p_ox, p_oy, p_lvl = f_ai[sel], f_ox[sel], f_oy[sel], f_lvl[sel]
        f_ai, f_ox, f_oy, f_lvl, f_b = f_ai[rest], f_ox[rest], f_oy[rest], f_lvl[rest], f_b[rest]
        # Split each block into its four children one level down.
        step = 2 ** (p_lvl - 1)
        c_ai = np.repeat(p_ai, 4)
        c_ox = np.repeat(p_ox, 4) + np.tile([0, 0, 1, 1], len(p_ai)) * np.repeat(step, 4)
        c_oy = np.repeat(p_oy, 4) + np.tile([0, 1, 0, 1], len(p_ai)) * np.repeat(step, 4)
        c_lvl = np.repeat(p_lvl - 1, 4)
        leaf = c_lvl == 0
        ok = (c_ox <= half) & (c_oy <= half) & (~leaf | ((c_ox >= -half) & (c_oy >= -half)))
        c_ai, c_ox, c_oy, c_lvl, leaf = c_ai[ok], c_ox[ok], c_oy[ok], c_lvl[ok], leaf[ok]
        c_b = bounds(c_lvl, c_ai, c_ox, c_oy)
        if leaf.any():
            new = _poses(np.column_stack([c_b[leaf], c_ai[leaf], c_ox[leaf], c_oy[leaf]]).astype(float),
                         seed, r, angles)
            records = np.concatenate([records, new[new[:, 0] > kth]])
            kth = _kth(records, n_best, separation_m, separation_rad)
        inner = ~leaf & (c_b > kth)
        f_ai = np.concatenate([f_ai, c_ai[inner]])
        f_ox = np.concatenate([f_ox, c_ox[inner]])
        f_oy = np.concatenate([f_oy, c_oy[inner]])
        f_lvl = np.concatenate([f_lvl, c_lvl[inner]])
        f_b = np.concatenate([f_b, c_b[inner]])
    keep = distinct(records, n_best, separation_m, separation_rad)
    out = records[keep]
    poses = out[:, 1:].copy()
    poses[:, 2] = np.pi - np.mod(np.pi - poses[:, 2], 2 * np.pi)
    return poses, out[:, 0] / (_LEVELS * len(pts))


def _poses(rows, seed, r, angles) -> np.ndarray:
    """[sum score, angle index, x offset, y offset] rows -> [sum score, x, y, theta]."""
    out = np.empty_like(rows)
    out[:, 0] = rows[:, 0]
    out[:, 1] = seed[0] + r * rows[:, 2]
    out[:, 2] = seed[1] + r * rows[:, 3]
    out[:, 3] = angles[rows[:, 1].astype(int)]
    return out


def _kth(records, k, sep_m, sep_rad) -> float:
    """Score of the k-th best distinct record (-1 while fewer than k exist)."""
    if len(records) > _MAX_RECORDS:
        records = records[np.argpartition(-records[:, 0], _MAX_RECORDS - 1)[:_MAX_RECORDS]]
    keep = distinct(records, k, sep_m, sep_rad)
    return float(records[keep[-1], 0]) if len(keep) == k else -1.0
