"""Coarse (global) initialisation: correlative scan matching on a likelihood grid.

Follows E. Olson, "Real-Time Correlative Scan Matching", ICRA 2009: the
target scan is rasterised into a grid whose cells hold the likelihood
``exp(-d^2 / (2 sigma^2))`` of a point landing there (d: distance to the
nearest target point), stored as uint8 (0..255).  A pyramid of grids holds,
for each cell, the maximum of the fine grid over the 2^l x 2^l block of
cells that starts there; summing level l over the source points bounds the
fine score of every translation inside that block from above.  For each
rotation on a regular grid of angles, the translation window is covered by
top-level blocks, and blocks are split into four children (the best bounds
of the finest open level first) until no open block can beat the k-th best
distinct hypothesis found so far (branch and bound on the grid score).
Several seeds (yaw hypotheses) are searched in one branch and bound whose
result is each seed's k best, merged.

Frames: the grid lives in the target scan's frame (metres); a hypothesis is
the pose ``[x, y, theta]`` of the source scan in the target frame.  Scores
are the mean likelihood over the source points, in [0, 1].
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from . import _kernels

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
    # A cell's value depends only on its distance to the nearest cell holding a
    # point and is zero beyond about 3.5 sigma, so the grid is the maximum over
    # the occupied cells of a small kernel stamped around each: the same
    # values as a distance transform of the whole grid, at a fraction of the cost.
    di, dj, value = _stamp(float(resolution_m), float(sigma_m))
    # Compiled (_kernels.stamp_grid, which skips repeated cells): np.maximum.at over (cells, stamp)
    # index arrays cost about half of building a grid; a maximum is the same whatever order it is taken in.
    fine = _kernels.stamp_grid(cells[:, 0] * shape[1] + cells[:, 1], int(shape[0]), int(shape[1]), di, dj, value)
    levels = [fine]
    for lvl in range(1, n_levels):
        # max over [i, i + 2^l) = max of two level l-1 blocks, at i and i + 2^(l-1).
        prev = levels[-1]
        half = 2 ** (lvl - 1)
        rows = prev.copy()
        np.maximum(prev[:-half], prev[half:], out=rows[:-half])
        out = rows.copy()
        np.maximum(rows[:, :-half], rows[:, half:], out=out[:, :-half])
        levels.append(out)
    return LikelihoodGrid(origin=lo, resolution_m=float(resolution_m), levels=tuple(levels))


@lru_cache(maxsize=16)
def _stamp(resolution_m: float, sigma_m: float):
    """Offsets (cells) and uint8 values of the likelihood stamped around an occupied cell (build_grid)."""
    k = int(np.ceil(np.sqrt(2.0 * np.log(2.0 * _LEVELS)) * sigma_m / resolution_m)) + 1
    di, dj = np.meshgrid(np.arange(-k, k + 1), np.arange(-k, k + 1), indexing="ij")
    dist = np.sqrt((di * di + dj * dj).astype(float)) * resolution_m
    value = np.rint(np.exp(-0.5 * (dist / sigma_m) ** 2) * _LEVELS).astype(np.uint8)
    used = value > 0
    out = (di[used].astype(np.int64), dj[used].astype(np.int64), value[used])
    for a in out:
        a.flags.writeable = False
    return out


def downsample(points, cell_m: float, max_points: int) -> np.ndarray:
    """At most ``max_points`` points, one per ``cell_m`` square cell, spread evenly."""
    pts = np.ascontiguousarray(points, dtype=float)
    # The first point of each cell in scan order, compiled (_kernels.first_in_cells: the indices
    # np.unique's stable sort of the cells' keys gave, without the sort).  The fit score takes these
    # points from every pair's source in a single register call: the fit score 0.072 -> 0.052 ms
    # a pair (benchmarks/registration.py pairs, median of 5 runs).
    first = _kernels.first_in_cells(pts, float(cell_m))
    if len(first) > max_points:
        first = first[np.linspace(0, len(first) - 1, max_points).round().astype(int)]
    return pts[first]


def auto_angle_step(points, resolution_m: float) -> float:
    """Angle step (radians) that moves the 90th-percentile-range point by one cell.

    ``points`` (N, 2), N >= 1, finite (metres, scan frame).

    >>> import numpy as np
    >>> round(auto_angle_step(np.array([[float(r), 0.0] for r in range(1, 12)]), 0.1), 4)
    0.01
    """
    far = _percentile(np.hypot(points[:, 0], points[:, 1]), 90)
    return resolution_m / max(far, resolution_m)


def _percentile(values, q: float) -> float:
    """``np.percentile(values, q)`` of a non-empty finite 1-D array, the same bits, without its overhead.

    numpy's default method (Hyndman and Fan's 7th) for 0 <= q <= 100: the
    virtual index ``(n - 1) q'`` with q' = q / 100, as numpy computes it, and
    numpy's interpolation between the two order statistics around it (from
    the upper one when the weight is at least 0.5).  np.percentile took 29
    of the angle step's 32 µs on a 100-point scan, this takes 3
    (tests/registration/test_correlative.py compares the two).
    """
    n = len(values)
    qq = q / 100
    virtual = (n - 1) * qq
    if virtual >= n - 1:
        return float(values.max())
    lo = int(np.floor(virtual))
    part = np.partition(values, [lo, lo + 1])
    a, b = part[lo], part[lo + 1]
    t = virtual - lo
    diff = b - a
    return float(b - diff * (1 - t)) if t >= 0.5 else float(a + diff * t)


def distinct(records, k: int, sep_m: float, sep_rad: float) -> np.ndarray:
    """Greedy non-maximum suppression over (m, 4) rows [score, x, y, theta].

    Returns the indices of up to k rows, best first, each farther than
    ``sep_m`` (metres) or ``sep_rad`` (radians) from every better kept row.
    """
    return _kernels.distinct(np.ascontiguousarray(records, dtype=float), k, float(sep_m), float(sep_rad))


def search(grid: LikelihoodGrid, points, seed, *, window_m: float, window_rad: float,
           angle_step_rad: float, n_best: int, separation_m: float, separation_rad: float):
    """Best distinct source poses within a window around ``seed`` (or around each of several seeds).

    Parameters
    ----------
    grid : likelihood grid of the target scan.
    points : (N, 2) source points in the source frame (metres), usually
        downsampled with :func:`downsample`.
    seed : (3,) initial pose of the source in the target frame, or (K, 3)
        several (e.g. one per yaw hypothesis).  The result is that of
        searching each seed's window on its own (its n_best distinct poses)
        and keeping the n_best distinct poses of all those, best first (ties
        in seed order).  The seeds are searched together, sharing the bound:
        a block around one seed is pruned as soon as it can enter neither
        that seed's own best nor the merged best, so a seed far from the
        answer costs little.
    window_m, window_rad : half-widths of the search window around each seed
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
    any translation inside it.  Blocks are split in vectorised batches, the
    best bounds of the finest level that has open blocks first (so the
    search reaches full-resolution leaves within a few batches), until no
    open block can beat the n_best-th best distinct leaf of its seed, or of
    the merged list if that is higher.
    """
    pts = np.asarray(points, dtype=float)
    seeds = np.atleast_2d(np.asarray(seed, dtype=float))
    r = grid.resolution_m
    top_level = len(grid.levels) - 1
    top = 2 ** top_level
    half = int(np.ceil(window_m / r))
    n_top = int(np.ceil((2 * half + 1) / top))
    starts = -half + top * np.arange(n_top)
    rows = _rotations(seeds, window_rad, angle_step_rad)          # (A, 4) seed x, seed y, theta, seed index

    # Cells of the rotated source points at zero offset.  Clipping keeps
    # points far outside the grid far enough outside that no offset in the
    # window brings them back; the zero padding makes every index valid.
    w, h = grid.levels[0].shape
    reach = half + top + 1
    pad = 2 * half + 2 * top + 1
    c, s = np.cos(rows[:, 2]), np.sin(rows[:, 2])
    rot = np.empty((2, 2, len(rows)))                 # rot[:, 0, a] maps a point to its x, rot[:, 1, a] to y
    rot[0, 0], rot[1, 0], rot[0, 1], rot[1, 1] = c, -s, s, c
    cells = ((pts / r) @ rot.reshape(2, -1)).reshape(len(pts), 2, len(rows))        # (N, 2, A) in cells
    hp = h + 2 * pad
    size = (w + 2 * pad) * hp
    # 32-bit indices halve the memory traffic of the gathers, the search's main cost.
    index = np.int32 if size * len(grid.levels) < 2 ** 31 else np.int64
    # Floor, clip, pad and flatten in one compiled pass (_kernels.cell_bases); the rotation stays a
    # numpy product.
    base = _kernels.cell_bases(cells, np.ascontiguousarray(((rows[:, :2] - grid.origin) / r).T), reach,
                               float(w - 1 + reach), float(h - 1 + reach), float(pad), float(hp),
                               np.empty((len(rows), len(pts)), index))
    # All pyramid levels, zero padded, in one flat array: level l starts at l * size.
    stack = np.zeros((len(grid.levels), w + 2 * pad, hp), dtype=np.uint8)
    stack[:, pad:pad + w, pad:pad + h] = grid.levels
    stack = stack.ravel()

    starts = starts.astype(np.int64)
    tops = _kernels.top_blocks(len(rows), starts, top_level)
    # The top blocks' bounds: the sum over the points of each block's level at its offset (compiled,
    # _kernels.top_sums: a wide window has thousands of top blocks of N gathers each, for which
    # numpy's take built two (blocks, N) temporaries; 0.73 -> 0.21 ms per search of the default window).
    top_score = _kernels.top_sums(base, stack, starts, top_level, size, hp)
    if top_level == 0:
        inside = (np.abs(tops[:, 1]) <= half) & (np.abs(tops[:, 2]) <= half)
        tops, top_score = tops[inside], top_score[inside]
    split = _splits(top_level)
    # The rounds of splitting and the leaves' lists in one compiled call (_kernels.coarse_search;
    # as a Python loop of kernel calls, the loop's overhead was more than half of a search's time).
    out = _kernels.coarse_search(tops, top_score, top_level, split, half, stack, base, size, hp,
                                 np.ascontiguousarray(rows), float(r), len(seeds), int(n_best), float(separation_m),
                                 float(separation_rad), _BATCH_NODES, _MAX_RECORDS)
    poses = out[:, 1:4].copy()
    return poses, out[:, 0] / (_LEVELS * len(pts))


@lru_cache(maxsize=8)
def _splits(top_level: int) -> np.ndarray:
    """(top_level + 1, 4, 4) int64: row l holds :func:`_quad_split` (l) for l >= 1 (row 0 unused).

    Made once per pyramid height (every search of a run has the same): it was 0.05 ms of each search.
    The array is shared between searches, and coarse_search only reads it.
    """
    split = np.zeros((top_level + 1, 4, 4), np.int64)
    for lvl in range(1, top_level + 1):
        split[lvl] = _quad_split(lvl)
    return split


def _quad_split(level: int) -> np.ndarray:
    """Rows to add to a block [angle, ox, oy, level] of ``level`` for its four children (quadrants)."""
    quad = np.array([[0, 0, 0, 0], [0, 0, 1, 0], [0, 1, 0, 0], [0, 1, 1, 0]])
    return quad * (1 << (level - 1)) - np.array([0, 0, 0, 1])


def _rotations(seeds, window_rad, step) -> np.ndarray:
    """Rows [seed x, seed y, theta, seed index]: the regular angle grid ``theta_seed + step * k``,
    |k| <= ceil(window / step), of each seed."""
    n_ang = int(np.ceil(window_rad / step)) if step > 0 else 0
    ks = step * np.arange(-n_ang, n_ang + 1)
    # Filled column by column (a list of per-seed column_stacks was 0.1 ms of each search); the
    # angles are the same sums seed + k * step.
    seeds = np.asarray(seeds, dtype=float)
    m = len(ks)
    rows = np.empty((len(seeds), m, 4))
    rows[:, :, 0] = seeds[:, 0:1]
    rows[:, :, 1] = seeds[:, 1:2]
    rows[:, :, 2] = seeds[:, 2:3] + ks
    rows[:, :, 3] = np.arange(len(seeds))[:, None]
    return rows.reshape(-1, 4)
