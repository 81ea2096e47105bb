"""Compiled kernels of registration: scan preparation, ICP, covariance, coarse search (numba, cached on disk).

Why compiled code here (docs/architecture.md, "Compiled kernels"): the
per-scan line fits, ICP's iterations and the coarse search's bounds work on
arrays of a few hundred to a few thousand elements, where numpy's per-call
overhead and the temporaries of (k, N) neighbour arrays, not arithmetic,
set the time.  Each kernel computes the same quantities as the numpy code
it replaced, in the same order of operations and additions, so results stay
the same to the bit (tests/registration/test_compiled_kernels.py compares
each with the numpy code or library it replaced); products that numpy sends
through BLAS or LAPACK, and numpy's sin / cos / arctan2, stay in numpy.
``math.hypot`` here is the C library's ``hypot``, which np.hypot calls too
(the same bits: 2e7 random pairs of magnitudes 1e-12 to 1e12, subnormals,
zeros, infinities and NaN compared on an AVX-512 machine, 2026-12).
Kernels returning arrays keep a single return statement: numba's on-disk
cache once failed to load such a function with a second return path
("descr is NULL").

``cache=True`` keeps the machine code in ``__pycache__`` (or numba's user
cache when the package folder is read-only), so only the very first call on
a machine pays for compiling (several seconds for all kernels together).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def _pairwise8(v, k):
    """Sum of v[:k] in the order np.sum uses along a contiguous axis of length k (8 <= k <= 128)."""
    r0, r1, r2, r3, r4, r5, r6, r7 = v[0], v[1], v[2], v[3], v[4], v[5], v[6], v[7]
    stop = k - k % 8
    for i in range(8, stop, 8):
        r0 += v[i]
        r1 += v[i + 1]
        r2 += v[i + 2]
        r3 += v[i + 3]
        r4 += v[i + 4]
        r5 += v[i + 5]
        r6 += v[i + 6]
        r7 += v[i + 7]
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    for i in range(stop, k):
        res = res + v[i]
    return res


@njit(cache=True, nogil=True)
def _sum_slots(v, k):
    """numpy's order of summing k values (icp._sum_rows for one column)."""
    if k < 8:
        res = 0.0
        for i in range(k):
            res = res + v[i]
        return res
    if k > 128:
        half = k // 2
        half -= half % 8
        return _sum_slots(v[:half], half) + _sum_slots(v[half:], k - half)
    return _pairwise8(v, k)


@njit(cache=True, nogil=True)
def _offer(points, order, lo, hi, px, py, r2, k, best_d, best_i, m, out):
    """Offer the points ``order[lo:hi]`` to the k nearest so far (:func:`neighbourhoods`): (count, nearest left out).

    The k kept are the k smallest (distance, index) pairs offered and ``out``
    the smallest distance of the others, whatever the order of offering:
    :func:`neighbourhoods` relies on that to offer beams in the order that
    suits it.
    """
    for s in range(lo, hi):
        q = order[s]
        ex = points[q, 0] - px
        ey = points[q, 1] - py
        d = ex * ex + ey * ey
        if d >= r2:
            continue
        if m == k and (d > best_d[k - 1] or (d == best_d[k - 1] and q > best_i[k - 1])):
            out = min(out, d)
            continue
        if m == k:
            out = min(out, best_d[k - 1])          # the farthest kept one drops out
        # Insert (d, q) in order, dropping the farthest when full.
        pos = m if m < k else k - 1
        while pos > 0 and (best_d[pos - 1] > d or (best_d[pos - 1] == d and best_i[pos - 1] > q)):
            if pos < k:
                best_d[pos] = best_d[pos - 1]
                best_i[pos] = best_i[pos - 1]
            pos -= 1
        best_d[pos] = d
        best_i[pos] = q
        if m < k:
            m += 1
    return m, out


@njit(cache=True, nogil=True, inline="always")
def _keep_neighbours(idx, tied, p, best_d, best_i, m, k, out):
    """Point p's row of :func:`neighbourhoods`: its m kept neighbours, and whether equal distances make it tied.

    ``out`` is the nearest candidate left out (:func:`_offer`).
    """
    for s in range(m):
        idx[p, s] = best_i[s]
        if s > 0 and best_d[s] == best_d[s - 1]:
            tied[p] = True
    if m == k and out == best_d[k - 1]:
        tied[p] = True      # a candidate left out at exactly the k-th distance


@njit(cache=True, nogil=True)
def _block_rest(start, order, nj, ni, c0, c1, a, b, walk):
    """The points of the 3 x 3 cells around (c0, c1) of beams q <= a or q >= b, in cell order.

    Fills ``walk``; returns their count.
    """
    lo1, hi1 = max(c1 - 1, 0), min(c1 + 1, nj - 1)
    block = 0
    for i in range(max(c0 - 1, 0), min(c0 + 1, ni - 1) + 1):
        block += start[i * nj + hi1 + 1] - start[i * nj + lo1]
    c = 0
    if b - a - 1 < block:
        for i in range(max(c0 - 1, 0), min(c0 + 1, ni - 1) + 1):
            for s in range(start[i * nj + lo1], start[i * nj + hi1 + 1]):
                q = order[s]
                if q <= a or q >= b:
                    walk[c] = q
                    c += 1
    return c


@njit(cache=True, nogil=True)
def neighbourhoods(points, k, radius):
    """The k nearest points of each point within ``radius`` (itself first), nearest first.

    Same neighbours as ``cKDTree(points).query(points, k, distance_upper_bound=radius)``
    where no two candidates lie at exactly the same distance.  Where they do
    (quantised ranges), the tree's order of equal distances is its own, so
    such points are flagged for the caller to ask the tree.

    A scan whose points run round the sensor in one direction (beam order,
    either way, less than a full turn) is searched along the beams
    (:func:`_bearing_walk`); any other cloud, or a scan with many points
    within ``radius`` of the sensor, in a hash grid (:func:`_grid_neighbourhoods`).
    Both give the answer of the definition, to the bit.

    Parameters
    ----------
    points : (N, 2) float64 array (metres, sensor frame); in beam order for speed (any order gives
        the same answer).
    k : number of neighbours kept per point.
    radius : neighbours at this distance or farther are left out (metres).

    Returns
    -------
    idx : (N, k) int64 array, nearest first, equal distances in index order, N where a slot is empty.
    tied : (N,) bool array, True where equal distances make the order ambiguous.
    """
    n = len(points)
    phi = np.empty(n)
    ux = np.empty(n)
    uy = np.empty(n)
    close = 0
    r2 = radius * radius
    for i in range(n):
        x, y = points[i, 0], points[i, 1]
        phi[i] = math.atan2(y, x)
        rr = x * x + y * y
        rn = math.sqrt(rr)
        ux[i] = x / rn if rn > 0.0 else 0.0
        uy[i] = y / rn if rn > 0.0 else 0.0
        if rr * _BOUND_MARGIN <= r2:
            close += 1
    # Points this close to the sensor cannot be bounded by bearing and walk the whole scan.
    if n >= 2 and close * 32 <= n and _unwrap_bearings(phi):
        return _bearing_walk(points, k, radius, phi, ux, uy)
    return _grid_neighbourhoods(points, k, radius)


# Below this share of the bound (squared) a point is still offered: the bound and the distances are
# computed with different roundings (about 1e-16 relative), so a point at the bound to within
# rounding is offered rather than decided by the bound.
_BOUND_MARGIN = 0.98


@njit(cache=True, nogil=True)
def _unwrap_bearings(phi):
    """Whether bearings ``phi`` (N,) (atan2's, in (-pi, pi]) run round once in one direction; unwrapped in place.

    On success ``phi`` becomes non-decreasing along the array (negated for
    a clockwise scan, then shifted by 2 pi after the wrap) and spans at most
    2 pi: the walk's separations rely on exactly that.
    """
    n = len(phi)
    for sign in (1.0, -1.0):
        drops = 0
        at = 0
        for i in range(n - 1):
            if sign * phi[i + 1] < sign * phi[i]:
                drops += 1
                at = i + 1
        if drops == 0 or (drops == 1 and sign * phi[n - 1] <= sign * phi[0]):
            for i in range(n):
                phi[i] = sign * phi[i] + (2.0 * math.pi if drops == 1 and i >= at else 0.0)
            return True
    return False


@njit(cache=True, nogil=True)
def _bearing_walk(points, k, radius, phi, ux, uy):
    """:func:`neighbourhoods` of a scan in beam order: each point's candidates walked along the beams.

    ``phi`` (N,) are the unwrapped bearings (:func:`_unwrap_bearings`),
    ``ux, uy`` (N,) the unit vectors towards the points (0 at the sensor).

    Why it may stop: a point q seen at bearing separation s from point p lies
    on the line through the sensor in direction u_q, so
    ``|p - q| >= |p x u_q| = |p| sin s`` for s <= pi / 2, and ``|p - q| >= |p|``
    for pi / 2 <= s <= 3 pi / 2 (the sensor is then the nearest point of
    q's ray).  Walking away from p in one direction, s only grows, so once
    that bound exceeds the k-th distance kept (or the radius), no point
    further on in that direction is nearer, up to s = 3 pi / 2; the points
    beyond lie within pi / 2 of p the other way round, where the other
    walk vouches for them.  Both walks go round the scan circularly and
    meet at the latest after N points.  The neighbours and tie flags do
    not depend on the order of offering (:func:`_offer`), and no point left
    unoffered can be at the k-th distance, so the answer is the grid's.

    On the office scans of benchmarks/registration.py a point's walk offers
    20-25 points, 16-20 of them within the radius, and needs no cells:
    0.28 -> 0.17-0.18 ms per 721-point scan against the grid, which also
    offers the block along the beams first (1.6x, benchmarks/neighbourhoods.py).
    Its time now goes to the insertions (about 16 a point), not the walk
    (0.08 ms of the 0.17 without them).
    """
    n = len(points)
    r2 = radius * radius
    half_pi = 0.5 * math.pi
    two_pi = 2.0 * math.pi
    idx = np.full((n, k), n, np.int64)
    tied = np.zeros(n, np.bool_)
    best_d = np.empty(k)
    best_i = np.empty(k, np.int64)
    for p in range(n):
        px, py = points[p, 0], points[p, 1]
        rp2 = px * px + py * py
        m = 0
        out = np.inf      # nearest candidate left out
        # Offered alternately on either side, from the point outwards: the distances then come
        # nearly in increasing order, so insertions seldom shift the list.
        taken_down = 0
        taken_up = 0
        down = True
        up = True
        turn = True
        while (down or up) and taken_down + taken_up < n:
            go_down = (turn and down) or not up
            turn = not turn
            if go_down:
                q = p - taken_down
                sep = phi[p] - (phi[q] if q >= 0 else phi[q + n] - two_pi)
                if q < 0:
                    q += n
            else:
                q = p + 1 + taken_up
                sep = (phi[q] if q < n else phi[q - n] + two_pi) - phi[p]
                if q >= n:
                    q -= n
            if sep >= half_pi:
                b2 = rp2
            else:
                cr = px * uy[q] - py * ux[q]
                b2 = cr * cr
            thr = best_d[k - 1] if m == k else r2
            if b2 * _BOUND_MARGIN > thr:
                if go_down:
                    down = False
                else:
                    up = False
                continue
            if go_down:
                taken_down += 1
            else:
                taken_up += 1
            # As _offer, for point q, repeated inline: through a helper returning (m, out), inlined or
            # not, the walk took 0.24-0.26 ms a scan instead of 0.17.
            ex = points[q, 0] - px
            ey = points[q, 1] - py
            d = ex * ex + ey * ey
            if d >= r2:
                continue
            if m == k and (d > best_d[k - 1] or (d == best_d[k - 1] and q > best_i[k - 1])):
                out = min(out, d)
                continue
            if m == k:
                out = min(out, best_d[k - 1])
            pos = m if m < k else k - 1
            while pos > 0 and (best_d[pos - 1] > d or (best_d[pos - 1] == d and best_i[pos - 1] > q)):
                if pos < k:
                    best_d[pos] = best_d[pos - 1]
                    best_i[pos] = best_i[pos - 1]
                pos -= 1
            best_d[pos] = d
            best_i[pos] = q
            if m < k:
                m += 1
        _keep_neighbours(idx, tied, p, best_d, best_i, m, k, out)
    return idx, tied


@njit(cache=True, nogil=True)
def _grid_neighbourhoods(points, k, radius):
    """:func:`neighbourhoods` in a hash grid of half-radius cells: any cloud, in any order."""
    n = len(points)
    # Cells of half the radius: a 5 x 5 block less its far corners covers the radius' disc
    # more tightly than 3 x 3 cells of the radius (about 40% fewer candidates to sort).
    origin, cell, nj, start, order = cell_index(points, 0.5 * radius)
    reach = int(math.ceil(radius / cell))
    ni = (len(start) - 1) // nj
    ci = np.empty(n, np.int64)
    cj = np.empty(n, np.int64)
    for i in range(n):
        ci[i] = min(int((points[i, 0] - origin[0]) / cell), ni - 1)
        cj[i] = min(int((points[i, 1] - origin[1]) / cell), nj - 1)
    r2 = radius * radius
    idx = np.full((n, k), n, np.int64)
    tied = np.zeros(n, np.bool_)
    best_d = np.empty(k)
    best_i = np.empty(k, np.int64)
    walk = np.empty(n, np.int32)
    for p in range(n):
        px, py = points[p, 0], points[p, 1]
        i0, i1 = max(ci[p] - reach, 0), min(ci[p] + reach, ni - 1)
        j0, j1 = max(cj[p] - reach, 0), min(cj[p] + reach, nj - 1)
        fi = (px - origin[0]) / cell
        fj = (py - origin[1]) / cell
        m = 0
        out = np.inf      # nearest candidate left out
        # First the 3 x 3 cells around the point: near the sensor they already hold k neighbours
        # closer than anything outside them, and the outer ring (16 more cells) is skipped
        # (0.44 -> 0.3 ms per 721-point scan).  The same neighbours either way.
        # Offered from the point outwards along the beams, alternately on either side, while they
        # stay in the block: on a scan in beam order the distances then come nearly in increasing
        # order, so insertions seldom shift the list and, once it is full, most candidates are
        # turned away by one comparison (on the office scans of benchmarks/registration.py, 160
        # shifts and 25 insertions a point in cell order, 10 and 15 so).  The block's points the
        # walk does not reach follow in cell order.  The neighbours do not depend on the order
        # (_offer).  _offer's body is repeated inline in the walk: called for each point, it cost
        # more than the shifts saved.  0.35 -> 0.28-0.29 ms per 721-point scan
        # (benchmarks/neighbourhoods.py; 0.31 with the walk's points offered through _offer).
        c0, c1 = ci[p], cj[p]
        a = p
        b = p + 1
        down = True
        up = True
        turn = True
        while down or up:
            go_down = (turn and down) or not up
            turn = not turn
            q = a if go_down else b
            if q < 0 or q >= n or abs(ci[q] - c0) > 1 or abs(cj[q] - c1) > 1:
                if go_down:
                    down = False
                else:
                    up = False
                continue
            if go_down:
                a -= 1
            else:
                b += 1
            # As _offer, for beam q.
            ex = points[q, 0] - px
            ey = points[q, 1] - py
            d = ex * ex + ey * ey
            if d >= r2:
                continue
            if m == k and (d > best_d[k - 1] or (d == best_d[k - 1] and q > best_i[k - 1])):
                out = min(out, d)
                continue
            if m == k:
                out = min(out, best_d[k - 1])
            pos = m if m < k else k - 1
            while pos > 0 and (best_d[pos - 1] > d or (best_d[pos - 1] == d and best_i[pos - 1] > q)):
                if pos < k:
                    best_d[pos] = best_d[pos - 1]
                    best_i[pos] = best_i[pos - 1]
                pos -= 1
            best_d[pos] = d
            best_i[pos] = q
            if m < k:
                m += 1
        c = _block_rest(start, order, nj, ni, c0, c1, a, b, walk)
        m, out = _offer(points, walk, 0, c, px, py, r2, k, best_d, best_i, m, out)
        # Distance from the point to the edge of those cells, with a margin for rounding.
        gap = min(fi - (c0 - 1), (c0 + 2) - fi, fj - (c1 - 1), (c1 + 2) - fj) * cell
        if m < k or not best_d[k - 1] < 0.99 * gap * gap:
            for i in range(i0, i1 + 1):
                gx = max(i - fi, 0.0, fi - (i + 1)) * cell
                # The run of cells of row i that reach into the disc.
                lo = j1 + 1
                hi = j0 - 1
                for j in range(j0, j1 + 1):
                    gy = max(j - fj, 0.0, fj - (j + 1)) * cell
                    if gx * gx + gy * gy < r2:
                        lo = min(lo, j)
                        hi = max(hi, j)
                if lo > hi:
                    continue
                if abs(i - c0) <= 1:
                    # The run less the cells already seen (they lie inside the disc, so within it).
                    if lo <= c1 - 2:
                        m, out = _offer(points, order, start[i * nj + lo], start[i * nj + min(hi, c1 - 2) + 1],
                                        px, py, r2, k, best_d, best_i, m, out)
                    if hi >= c1 + 2:
                        m, out = _offer(points, order, start[i * nj + max(lo, c1 + 2)], start[i * nj + hi + 1],
                                        px, py, r2, k, best_d, best_i, m, out)
                else:
                    m, out = _offer(points, order, start[i * nj + lo], start[i * nj + hi + 1],
                                    px, py, r2, k, best_d, best_i, m, out)
        _keep_neighbours(idx, tied, p, best_d, best_i, m, k, out)
    return idx, tied


@njit(cache=True, nogil=True)
def scatter(points, idx):
    """Neighbour count, centroid and scatter sums (xx, yy, xy) of each point's neighbourhood.

    ``idx`` (N, k) from :func:`neighbourhoods` (N marks an empty slot).  The
    sums follow the numpy version they replaced (icp._line_features before
    2026-12): the centroid adds the neighbours one after another, the
    scatter sums add in numpy's pairwise order, so the bits do not move.
    Also the first steps of the angle of each neighbourhood's principal axis
    and its radius (icp._line_features), as numpy evaluates them:
    ``diff = sxx - syy``, ``2.0 * sxy`` and ``rad = np.hypot(0.5 * diff, sxy)``
    (four numpy calls on (N,) arrays before).
    Returns count (N,) int64 and cx, cy, sxx, syy, sxy, diff, two_sxy, rad (N,) float64.
    """
    n, k = idx.shape
    count = np.zeros(n, np.int64)
    cxs = np.empty(n)
    cys = np.empty(n)
    sxxs = np.empty(n)
    syys = np.empty(n)
    sxys = np.empty(n)
    vxx = np.empty(k)
    vyy = np.empty(k)
    vxy = np.empty(k)
    diff = np.empty(n)
    two_sxy = np.empty(n)
    rad = np.empty(n)
    # _sum_slots' own case for 8 to 128 slots called directly: through the recursive function the
    # calls cost a third of the kernel (13.4 -> 8.8 µs a 178-point hall scan, k = 16).
    direct = 8 <= k <= 128
    for p in range(n):
        c = 0
        sx = 0.0
        sy = 0.0
        for j in range(k):
            q = idx[p, j]
            if q < n:
                c += 1
                if j == 0:
                    sx = points[q, 0]
                    sy = points[q, 1]
                else:
                    sx += points[q, 0]
                    sy += points[q, 1]
        count[p] = c
        cnt = max(float(c), 1.0)
        cx = sx / cnt
        cy = sy / cnt
        for j in range(k):
            q = idx[p, j]
            if q < n:
                dx = points[q, 0] - cx
                dy = points[q, 1] - cy
            else:
                dx = 0.0
                dy = 0.0
            vxx[j] = dx * dx
            vyy[j] = dy * dy
            vxy[j] = dx * dy
        cxs[p] = cx
        cys[p] = cy
        if direct:
            sxxs[p] = _pairwise8(vxx, k)
            syys[p] = _pairwise8(vyy, k)
            sxys[p] = _pairwise8(vxy, k)
        else:
            sxxs[p] = _sum_slots(vxx, k)
            syys[p] = _sum_slots(vyy, k)
            sxys[p] = _sum_slots(vxy, k)
        diff[p] = sxxs[p] - syys[p]
        two_sxy[p] = 2.0 * sxys[p]
        rad[p] = math.hypot(0.5 * diff[p], sxys[p])
    return count, cxs, cys, sxxs, syys, sxys, diff, two_sxy, rad


@njit(cache=True, nogil=True)
def neighbourhood_sums(points, k, radius):
    """:func:`neighbourhoods` and :func:`scatter` of them in one call (icp._line_features).

    Where equal distances make a neighbourhood's order the kd-tree's to
    decide (``any_tied``), the sums are left to the caller, after it has
    taken that order: they come back empty.  Two kernel calls and a numpy
    ``tied.any()`` before.
    Returns idx, tied, any_tied and :func:`scatter`'s nine arrays.
    """
    idx, tied = neighbourhoods(points, k, radius)
    any_tied = False
    for p in range(len(tied)):
        if tied[p]:
            any_tied = True
            break
    rows = idx if not any_tied else idx[:0]
    count, cx, cy, sxx, syy, sxy, diff, two_sxy, rad = scatter(points, rows)
    return idx, tied, any_tied, count, cx, cy, sxx, syy, sxy, diff, two_sxy, rad


@njit(cache=True, nogil=True)
def line_frames(idx, count, cx, cy, sxx, syy, rad, sin_phi, cos_phi, min_points, max_thickness):
    """Each neighbourhood's line from its scatter (icp._line_features): the numpy steps after the angle, fused.

    ``rad`` = hypot((sxx - syy) / 2, sxy) and ``sin_phi, cos_phi`` of the
    principal axis' angle phi come from numpy (its hypot, sin and cos are
    kept to the bit); the rest is the numpy code it replaced, operation for
    operation: eigenvalues ``half_tr -+ rad`` (the smaller clipped at 0 as
    np.maximum does, -0.0 and NaN passed through), the normal ``(-sin, cos)``
    turned to face the sensor, the tangent ``rot(-90 deg) n``, thickness
    ``sqrt(lam_min / lam_max)`` (NaN without enough points or spread), and
    whether the point has a line.  Also marks the used neighbour slots and
    sets the empty ones (``idx == N``) to 0, in place.  About 25 numpy calls
    on (N,) arrays before: 0.07 -> 0.03 ms per 721-point scan.
    Returns used (N, k) bool, normal, centroid, tangent (N, 2), thickness (N,), has_line (N,) bool.
    """
    n, k = idx.shape
    used = np.empty((n, k), np.bool_)
    for p in range(n):
        for j in range(k):
            used[p, j] = idx[p, j] < n
            if not used[p, j]:
                idx[p, j] = 0
    normal = np.empty((n, 2))
    centroid = np.empty((n, 2))
    tangent = np.empty((n, 2))
    thickness = np.empty(n)
    has_line = np.empty(n, np.bool_)
    for p in range(n):
        half_tr = 0.5 * (sxx[p] + syy[p])
        v = half_tr - rad[p]
        lam_min = v if (v >= 0.0 or v != v) else 0.0
        lam_max = half_tr + rad[p]
        nx = -sin_phi[p]
        ny = cos_phi[p]
        if nx * cx[p] + ny * cy[p] > 0:
            nx *= -1.0
            ny *= -1.0
        normal[p, 0] = nx
        normal[p, 1] = ny
        centroid[p, 0] = cx[p]
        centroid[p, 1] = cy[p]
        tangent[p, 0] = ny
        tangent[p, 1] = -nx
        ok = count[p] >= min_points and lam_max > 0
        thickness[p] = math.sqrt(lam_min / lam_max) if ok else np.nan
        has_line[p] = ok and thickness[p] <= max_thickness
    return used, normal, centroid, tangent, thickness, has_line


@njit(cache=True, nogil=True)
def cell_index(points, cell):
    """Points bucketed in square cells, for :func:`nearest`.

    Cells are ``cell`` metres wide, or wider where the points' bounding box
    would otherwise need more than 8 cells per point (memory stays O(N)
    whatever the scan's extent).  Returns (origin (2,), cell, columns,
    start (cells + 1,) int32, order (N,) int32): the points of cell (i, j)
    are ``order[start[c]:start[c + 1]]`` with ``c = i * columns + j``.
    """
    n = len(points)
    # A scan registered on small objects alone has no line points: one empty cell at the origin,
    # so that every query finds nothing, as a kd-tree of no points answers.  (One return path:
    # numba's on-disk cache failed to load a second one that built its arrays differently.)
    x0 = points[0, 0] if n else 0.0
    y0 = points[0, 1] if n else 0.0
    x1 = x0
    y1 = y0
    for i in range(n):
        x0 = min(x0, points[i, 0])
        y0 = min(y0, points[i, 1])
        x1 = max(x1, points[i, 0])
        y1 = max(y1, points[i, 1])
    cell = max(cell, math.sqrt((x1 - x0 + cell) * (y1 - y0 + cell) / (8.0 * max(n, 1))))
    ni = int((x1 - x0) / cell) + 1
    nj = int((y1 - y0) / cell) + 1
    key = np.empty(n, np.int64)
    for i in range(n):
        key[i] = min(int((points[i, 0] - x0) / cell), ni - 1) * nj + min(int((points[i, 1] - y0) / cell), nj - 1)
    start = np.zeros(ni * nj + 1, np.int32)
    for i in range(n):
        start[key[i] + 1] += 1
    for c in range(ni * nj):
        start[c + 1] += start[c]
    # Each point to the next free place of its cell, in index order: the order of a stable sort by
    # cell, as np.argsort(key, kind="mergesort") gave it, without the sort (17 -> 6 µs for the 590
    # line points of a 721-point scan of benchmarks/registration.py).
    order = np.empty(n, np.int32)
    fill = start[:-1].copy()
    for i in range(n):
        order[fill[key[i]]] = i
        fill[key[i]] += 1
    origin = np.empty(2)
    origin[0] = x0
    origin[1] = y0
    return origin, cell, nj, start, order


@njit(cache=True, nogil=True)
def _scan_cell(points, order, lo, hi, qx, qy, n, best, bi, tie):
    """The nearest point so far after the points ``order[lo:hi]`` of one cell: (best squared distance, index, tied)."""
    for s in range(lo, hi):
        q = order[s]
        ex = qx - points[q, 0]
        ey = qy - points[q, 1]
        d = ex * ex + ey * ey
        if d < best:
            best = d
            bi = q
            tie = False
        elif d == best and bi < n:
            tie = True
    return best, bi, tie


@njit(cache=True, nogil=True, inline="always")
def _grid_extent(start, columns, upper, cell):
    """(rows, columns, reach) of a cell index: its grid's shape and the rings of cells within ``upper`` metres."""
    return (len(start) - 1) // columns, columns, int(math.ceil(upper / cell))


@njit(cache=True, nogil=True)
def _cell_window(qx, qy, origin, cell, ni, nj, reach):
    """The cells of a cell index that may hold a point within ``reach`` cells of the query (qx, qy).

    Returns (far: no cell can, fi, fj: the query in cell units, i0, i1, j0,
    j1: the inclusive ranges of cell rows and columns, clipped to the grid).
    """
    fi = (qx - origin[0]) / cell
    fj = (qy - origin[1]) / cell
    far = fi < -reach - 1.0 or fj < -reach - 1.0 or fi > ni + reach + 1.0 or fj > nj + reach + 1.0
    i0, i1, j0, j1 = 0, -1, 0, -1
    if not far:     # a far query's cell number may not fit an integer
        i0 = max(int(math.floor(fi)) - reach, 0)
        i1 = min(int(math.floor(fi)) + reach, ni - 1)
        j0 = max(int(math.floor(fj)) - reach, 0)
        j1 = min(int(math.floor(fj)) + reach, nj - 1)
    return far, fi, fj, i0, i1, j0, j1


@njit(cache=True, nogil=True)
def nearest(points, origin, cell, columns, start, order, queries, upper):
    """Nearest of ``points`` to each query closer than ``upper`` metres (an index of :func:`cell_index`).

    Same answer as ``cKDTree(points).query(queries, distance_upper_bound=upper)``
    where the nearest point is unique: distances (Q,) with inf and indices
    (Q,) with len(points) where none is closer, and tied (Q,) bool where two
    points lie at exactly the nearest distance (duplicate points), whose
    index the caller takes from the tree.
    """
    nq = len(queries)
    n = len(points)
    dist = np.full(nq, np.inf)
    idx = np.full(nq, n, np.int64)
    tied = np.zeros(nq, np.bool_)
    u2 = upper * upper
    ni, nj, reach = _grid_extent(start, columns, upper, cell)
    for p in range(nq):
        qx, qy = queries[p, 0], queries[p, 1]
        far, fi, fj, i0, i1, j0, j1 = _cell_window(qx, qy, origin, cell, ni, nj, reach)
        if far:
            continue
        best = u2
        bi = n
        tie = False
        # The query's own cell first, then the others, skipping a cell that lies farther than the
        # best point so far (most of them once a wall point next to the query has been found).
        ci = int(math.floor(fi))
        cj = int(math.floor(fj))
        if 0 <= ci < ni and 0 <= cj < nj:
            c = ci * nj + cj
            best, bi, tie = _scan_cell(points, order, start[c], start[c + 1], qx, qy, n, best, bi, tie)
        # Then ring by ring around it, while a ring can hold a point as near as the best so far: an
        # ICP query usually lies a few centimetres from a wall point, so the own cell and at most
        # its first ring settle it instead of all (2 reach + 1)^2 cells' gap tests (150 -> 118 ns a
        # query on simulated warehouse pairs, 105 -> 87 in the yard, best of 60 runs).  A ring is
        # skipped only when it lies strictly farther than the best, so ties are seen as before.
        edge = min(fi - ci, ci + 1 - fi, fj - cj, cj + 1 - fj) * cell
        for ring in range(1, reach + 1):
            gap = edge + (ring - 1) * cell
            if gap * gap > best:
                break
            for i in range(max(ci - ring, i0), min(ci + ring, i1) + 1):
                gx = max(i - fi, 0.0, fi - (i + 1)) * cell
                if gx * gx > best:      # every cell of the row lies farther (queries below: 40 -> 38 µs)
                    continue
                step = 1 if i == ci - ring or i == ci + ring else 2 * ring
                for j in range(cj - ring, cj + ring + 1, step):
                    if j < j0 or j > j1:
                        continue
                    # An empty cell is passed over before its gap is worked out: most cells of the
                    # rings are empty (a scan's points lie along its walls), and the test comes first
                    # (ICP's queries 54 -> 40 µs at the converged pose, 90 -> 63 at the guess, for
                    # the 560 candidates of a benchmarks/registration.py pair).
                    c = i * nj + j
                    lo = start[c]
                    hi = start[c + 1]
                    if lo == hi:
                        continue
                    gy = max(j - fj, 0.0, fj - (j + 1)) * cell
                    if gx * gx + gy * gy > best:
                        continue
                    best, bi, tie = _scan_cell(points, order, lo, hi, qx, qy, n, best, bi, tie)
        if bi < n:
            dist[p] = math.sqrt(best)
            idx[p] = bi
            tied[p] = tie
    return dist, idx, tied


@njit(cache=True, nogil=True)
def split_and_bound(parents, split, half, leaf, stack, base, size, hp, bar, row_seed):
    """Children of coarse-search blocks that can beat the bar, and their bounds (correlative.search).

    ``parents`` (P, 4) rows [angle row, ox, oy, level]; each gets the four
    children ``parents[p] + split[q]``, in that order, kept where
    ox, oy <= half (and >= -half for leaves, ``leaf``) and where the bound
    exceeds ``bar[row_seed[angle row]]``.  A child's bound is the sum over
    the source points of its level's cell at its offset:
    ``stack[base[angle row, i] + level * size + ox * hp + oy]``.
    Returns (children (K, 4) int64, bounds (K,) int64).
    """
    n_par = len(parents)
    n_pts = base.shape[1]
    kids = np.empty((4 * n_par, 4), np.int64)
    score = np.empty(4 * n_par, np.int64)
    m = 0
    for p in range(n_par):
        for q in range(4):
            a = parents[p, 0] + split[q, 0]
            ox = parents[p, 1] + split[q, 1]
            oy = parents[p, 2] + split[q, 2]
            lvl = parents[p, 3] + split[q, 3]
            if ox > half or oy > half:
                continue
            if leaf and (ox < -half or oy < -half):
                continue
            off = lvl * size + ox * hp + oy
            row = base[a]
            s = 0
            for i in range(n_pts):
                s += stack[row[i] + off]
            if not s > bar[row_seed[a]]:
                continue
            kids[m, 0] = a
            kids[m, 1] = ox
            kids[m, 2] = oy
            kids[m, 3] = lvl
            score[m] = s
            m += 1
    return kids[:m], score[:m]


@njit(cache=True, nogil=True)
def _sure_tests(sep_m, sep_rad):
    """The margins within which :func:`distinct`'s separation test is decided without hypot and np.mod.

    A squared distance below ``in2`` is inside ``sep_m`` and one at or above
    ``out2`` outside, as hypot (error of an ulp or so) would decide; an
    unwrapped angle difference below ``in_rad`` is inside ``sep_rad`` and
    one in ``[out_rad, wrap]`` outside, as the wrapped difference (exact to
    5e-16 there, no wrap) would.  ``box`` and ``ang`` say whether the
    distance and angle margins apply at all: the ranges keep the squares
    and the angles clear of overflow, underflow and wrapping.  One home for
    distinct and for the blocks the coarse search sets aside (:func:`_park`),
    whose every leaf distinct must drop.
    Returns (box, in2, out2, ang, in_rad, out_rad, wrap).
    """
    return (1e-100 < sep_m < 1e100, sep_m * sep_m * (1.0 - 1e-12), sep_m * sep_m * (1.0 + 1e-12),
            1e-6 < sep_rad < 1.0, sep_rad - 1e-9, sep_rad + 1e-9, np.pi - 1e-9)


@njit(cache=True, nogil=True)
def distinct(records, k, sep_m, sep_rad):
    """Greedy non-maximum suppression (correlative.distinct): indices of up to k rows, best first.

    Each pick is the first alive row of the highest score; it then suppresses
    the alive rows with ``hypot(dx, dy) < sep_m`` and wrapped angle
    difference ``< sep_rad``.  Rows sorted best first (scores not
    increasing, no NaN: the coarse search's lists always come so) make the
    same picks with less work: the first alive row is the pick, and only
    rows after it can still be alive.
    """
    n = len(records)
    alive = np.ones(n, np.bool_)
    keep = np.empty(k, np.int64)
    ordered = True
    for r in range(1, n):
        if not records[r, 0] <= records[r - 1, 0]:
            ordered = False
            break
    # Most rows are decided without hypot and np.mod (libm calls, most of the cost: on the sparse hall
    # scene a pick's neighbourhood is nearly every kept leaf): a squared distance off sep_m^2 by more
    # than 1e-12 relative, or an unwrapped angle difference off sep_rad by more than 1e-9 (and below
    # pi), is decided by the margins of _sure_tests; the rest take the exact test.  With the sorted
    # shortcuts: 0.16 -> 0.05 ms a search on hall pairs (benchmarks/registration_scenes.py scenes,
    # the same picks on 2,400 searches).
    box, in2, out2, ang, in_rad, out_rad, wrap = _sure_tests(sep_m, sep_rad)
    two_pi = 2.0 * np.pi
    m = 0
    left = n
    first = 0
    while m < k and left > 0:
        if ordered:
            while not alive[first]:
                first += 1
            i = first
        else:
            i = -1
            for r in range(n):
                if alive[r] and (i < 0 or records[r, 0] > records[i, 0]):
                    i = r
        keep[m] = i
        m += 1
        if m == k:
            break
        alive[i] = False
        left -= 1
        xi = records[i, 1]
        yi = records[i, 2]
        ti = records[i, 3]
        for r in range(i + 1 if ordered else 0, n):
            if not alive[r]:
                continue
            dx = records[r, 1] - xi
            dy = records[r, 2] - yi
            s = dx * dx + dy * dy
            if box and s < in2:
                near = True
            elif box and s >= out2:
                near = False
            else:
                near = math.hypot(dx, dy) < sep_m
            if not near:
                continue
            d = records[r, 3] - ti
            ad = abs(d)
            if ang and ad < in_rad:
                near = True
            elif ang and out_rad <= ad <= wrap:
                near = False
            else:
                near = abs(np.mod(d + np.pi, two_pi) - np.pi) < sep_rad
            if near:
                alive[r] = False
                left -= 1
    return keep[:m]


@njit(cache=True, nogil=True)
def top_sums(base, stack, starts, level, size, hp):
    """Bounds of the coarse search's top blocks, in :func:`top_blocks`' order (as in :func:`split_and_bound`).

    ``base`` (A, N) the rotated points' flat indices (:func:`cell_bases`),
    ``starts`` (S,) the blocks' first cells along x and along y, ``level``
    the top level.  Row ``a * S * S + i * S + j`` is the block at angle row
    a, ox = starts[i], oy = starts[j]: the sum over the points of
    ``stack[base[a, p] + level * size + ox * hp + oy]``.  The S x S blocks of
    one angle row are summed together, a point at a time, so each point's
    gathers fall in a few nearby cache lines (one block after another, 0.69 ->
    0.51 ms a search on the hall scene's pairs, 1.40 -> 1.08 on the yard's;
    integer sums, so the same values).
    """
    na, n_pts = base.shape
    ns = len(starts)
    nb = ns * ns
    offs = np.empty(nb, np.int64)
    for i in range(ns):
        for j in range(ns):
            offs[i * ns + j] = level * size + starts[i] * hp + starts[j]
    out = np.empty(na * nb, np.int64)
    acc = np.empty(nb, np.int64)
    for a in range(na):
        acc[:] = 0
        row = base[a]
        for p in range(n_pts):
            b = row[p]
            for t in range(nb):
                acc[t] += stack[b + offs[t]]
        out[a * nb:(a + 1) * nb] = acc
    return out


@njit(cache=True, nogil=True)
def components(points, idx, used):
    """Connected groups of neighbours (icp._point_like) and the bounding box of each.

    The graph joins each point p to every ``idx[p, j]`` with ``used[p, j]``,
    undirected.  Labels are numbered in the order of each group's smallest
    point index, as ``scipy.sparse.csgraph.connected_components`` numbers
    them (it starts a new group at the first point not yet reached), so the
    labels are the same, not only the groups.  Union-find with path halving
    replaces building a sparse matrix (0.4 ms of a 721-point scan's 1 ms of
    preparation went into scipy.sparse's conversions); each point's root is
    found once for all its neighbours, not once per neighbour (0.051 ->
    0.033 ms a scan; any union-find gives the same groups, and the labels
    and boxes depend only on those).
    Returns label (N,) int64, lo (C, 2) and hi (C, 2): each group's smallest
    and largest x and y.
    """
    n, k = idx.shape
    parent = np.arange(n)
    for p in range(n):
        a = p
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        for j in range(k):
            if not used[p, j]:
                continue
            b = idx[p, j]
            if b == p:
                continue
            while parent[b] != b:
                parent[b] = parent[parent[b]]
                b = parent[b]
            # The larger root goes under the smaller, so a stays p's root.
            if a < b:
                parent[b] = a
            elif b < a:
                parent[a] = b
                a = b
    # Every link points to a smaller index (parent[x] < x off the roots, path halving keeps it), so
    # in index order a point's parent is labelled before it.
    label = np.empty(n, np.int64)
    m = 0
    for p in range(n):
        if parent[p] == p:
            label[p] = m
            m += 1
        else:
            label[p] = label[parent[p]]
    lo = np.empty((m, 2))
    hi = np.empty((m, 2))
    seen = np.zeros(m, np.bool_)
    for p in range(n):
        c = label[p]
        if not seen[c]:
            seen[c] = True
            lo[c, 0] = points[p, 0]
            lo[c, 1] = points[p, 1]
            hi[c, 0] = points[p, 0]
            hi[c, 1] = points[p, 1]
        else:
            lo[c, 0] = min(lo[c, 0], points[p, 0])
            lo[c, 1] = min(lo[c, 1], points[p, 1])
            hi[c, 0] = max(hi[c, 0], points[p, 0])
            hi[c, 1] = max(hi[c, 1], points[p, 1])
    return label, lo, hi


@njit(cache=True, nogil=True)
def associate(points, origin, cell, columns, start, order, pw, nr, line, upper, max_extra, cos_max, check_normals):
    """Point-to-line correspondences of ICP (icp._associate) from the transformed candidates.

    ``pw`` (C, 2) the candidate source points under the pose and ``nr`` (C, 2)
    their rotated normals (both numpy products: they go through BLAS, whose
    fused multiply-adds a compiled loop would not reproduce); ``points`` and
    the cell index (:func:`cell_index`) the target's line points, ``line``
    (M, 14) their line models.  A candidate is kept when its nearest line
    point lies within ``upper``, it falls within that line's support plus
    ``max_extra`` along the line and, with ``check_normals``, the normals
    agree to ``cos_max``: the tests of the numpy version, in its order of
    operations, so the same pairs come out.
    Returns (keep (K,) candidate positions, ascending; j (K,) line indices;
    lt (14, K) the kept lines' rows, transposed; tied: some nearest point was
    a tie, for which the caller asks the kd-tree instead).
    """
    d, j, tied = nearest(points, origin, cell, columns, start, order, pw, upper)
    n = len(pw)
    m_lines = len(points)
    keep = np.empty(n, np.int64)
    k = 0
    for p in range(n):
        q = j[p]
        if q >= m_lines:
            continue
        along = abs(line[q, 3] * (pw[p, 0] - line[q, 0]) - line[q, 2] * (pw[p, 1] - line[q, 1]))
        if not along <= line[q, 13] + max_extra:
            continue
        if check_normals and not nr[p, 0] * line[q, 2] + nr[p, 1] * line[q, 3] >= cos_max:
            continue
        keep[k] = p
        k += 1
    jj = np.empty(k, np.int64)
    lt = np.empty((line.shape[1], k))
    for t in range(k):
        q = j[keep[t]]
        jj[t] = q
        for c in range(line.shape[1]):
            lt[c, t] = line[q, c]
    return keep[:k], jj, lt, tied.any()


@njit(cache=True, nogil=True)
def linearise(rp, ub, lt, x0, x1, min_incidence_cos, range_noise):
    """Residuals of point-to-line ICP and their derivatives (icp._linearise, whose docstring has the model).

    ``rp`` (n, 2) the rotated source points and ``ub`` (n, 2) their rotated
    beams (numpy products, see :func:`associate`), ``lt`` (14, n) the target
    line rows, ``x0, x1`` the translation.  Every quantity is the numpy
    version's expression, element by element, in the same order of
    operations, so the bits agree (no sums over rows here).
    Returns r, v, jac (n, 3), s (along-line offsets), phi2, sc, z = r / sqrt(v).
    """
    n = len(rp)
    r = np.empty(n)
    v = np.empty(n)
    jac = np.empty((n, 3))
    s_al = np.empty(n)
    phi2 = np.empty(n)
    sc = np.empty(n)
    z = np.empty(n)
    for i in range(n):
        nx = lt[2, i]
        ny = lt[3, i]
        dx = rp[i, 0] + (x0 - lt[0, i])
        dy = rp[i, 1] + (x1 - lt[1, i])
        s = ny * dx - nx * dy
        e = lt[13, i]
        m = s if s >= -e else -e
        m = m if m <= e else e
        p2 = (2.0 * s - m) * m
        ri = nx * dx + ny * dy - (lt[4, i] + s * lt[5, i] + p2 * lt[6, i])
        fp = lt[5, i] + 2.0 * lt[6, i] * m
        gx = nx - fp * ny
        gy = ny + fp * nx
        if range_noise:
            c = abs(gx * ub[i, 0] + gy * ub[i, 1])
            c = c if c >= min_incidence_cos else min_incidence_cos
        else:
            c = math.hypot(gx, gy)
        vi = c * c + (lt[7, i] + s * (2.0 * lt[8, i] + s * lt[10, i])
                      + p2 * (2.0 * lt[9, i] + 2.0 * s * lt[11, i] + p2 * lt[12, i]))
        r[i] = ri
        v[i] = vi
        jac[i, 0] = gx
        jac[i, 1] = gy
        jac[i, 2] = gy * rp[i, 0] - gx * rp[i, 1]
        s_al[i] = s
        phi2[i] = p2
        sc[i] = c
        z[i] = ri / math.sqrt(vi)
    return r, v, jac, s_al, phi2, sc, z


@njit(cache=True, nogil=True)
def target_sums(jac, omega, src_coef, rows, nbr_index, nbr_coef, basis, n_target):
    """The source rows ``wj * src_coef[:, None]`` and, per target reading, the sum over residuals of
    ``wj_i * d r_i / d eps`` (covariance.censi_middle_lines), ``wj = jac * omega[:, None]``.

    Residual i lies on line ``rows[i]``, fitted by the readings
    ``nbr_index[rows[i]]`` whose influence on the line's coefficients is
    ``nbr_coef[rows[i]]`` (k, 3, float32); its sensitivity to reading l is
    ``-(c0 + s c1 + phi2 c2)`` with ``basis[i] = (s, phi2)``.  Sums are
    built in the order numpy's bincount adds them (residuals, then
    readings, one after another), so the bits agree with the numpy version;
    the products element by element as numpy's (two numpy products and two
    copies to contiguous arrays before the call, 2.5 µs).
    Returns ms (n, 3) and mt (n_target, 3).
    """
    n, k = len(rows), nbr_index.shape[1]
    wj = np.empty((n, 3))
    ms = np.empty((n, 3))
    for i in range(n):
        for d in range(3):
            wj[i, d] = jac[i, d] * omega[i]
            ms[i, d] = wj[i, d] * src_coef[i]
    mt = np.zeros((n_target, 3))
    for i in range(n):
        line = rows[i]
        b0 = basis[i, 0]
        b1 = basis[i, 1]
        for q in range(k):
            c = -(np.float64(nbr_coef[line, q, 0]) + b0 * np.float64(nbr_coef[line, q, 1])
                  + b1 * np.float64(nbr_coef[line, q, 2]))
            t = nbr_index[line, q]
            mt[t, 0] += c * wj[i, 0]
            mt[t, 1] += c * wj[i, 1]
            mt[t, 2] += c * wj[i, 2]
    return ms, mt


@njit(cache=True, nogil=True)
def point_target_sums(jac, om, src_coef, ends, tgt_coef, n_target):
    """The rows and per-reading sums of the small objects' Censi middle term (icp._point_middle).

    With ``wj = jac * om[:, None]``: ``wj * src_coef[:, None]`` twice, as two
    arrays (the product of two distinct arrays goes through BLAS's general
    product as the numpy expression's did; an array times its own transpose
    would take the symmetric path, whose additions may differ), and
    ``m[:, d] = np.bincount(ends.ravel(), weights=(tgt_coef * wj[:, d:d + 1]).ravel(),
    minlength=n_target)``, added in bincount's order (rows, then the
    segment's two ends, one after another), so the bits agree.
    Returns a, b (P, 3) and m (n_target, 3).
    """
    n = len(om)
    a = np.empty((n, 3))
    b = np.empty((n, 3))
    m = np.zeros((n_target, 3))
    for i in range(n):
        for d in range(3):
            wj = jac[i, d] * om[i]
            a[i, d] = wj * src_coef[i]
            b[i, d] = wj * src_coef[i]
            for e in range(2):
                m[ends[i, e], d] += tgt_coef[i, e] * wj
    return a, b, m


@njit(cache=True, nogil=True)
def stack_rows(r, v, w, jac, p_r, p_v, p_w, p_jac):
    """The line rows and the small objects' rows of a solution stacked, with their weights (icp._finish).

    ``np.concatenate([r, p_r])``, ``np.concatenate([v, p_v])``,
    ``np.concatenate([w / v, p_w / p_v])`` and ``np.concatenate([jac, p_jac])``
    in one call (six numpy calls before; element by element, the same bits).
    Returns r_all, v_all, om_all (n + P,) and jac_all (n + P, 3).
    """
    n, m = len(r), len(p_r)
    r_all = np.empty(n + m)
    v_all = np.empty(n + m)
    om_all = np.empty(n + m)
    jac_all = np.empty((n + m, 3))
    for i in range(n):
        r_all[i] = r[i]
        v_all[i] = v[i]
        om_all[i] = w[i] / v[i]
        for d in range(3):
            jac_all[i, d] = jac[i, d]
    for i in range(m):
        r_all[n + i] = p_r[i]
        v_all[n + i] = p_v[i]
        om_all[n + i] = p_w[i] / p_v[i]
        for d in range(3):
            jac_all[n + i, d] = p_jac[i, d]
    return r_all, v_all, om_all, jac_all


@njit(cache=True, nogil=True)
def inlier_rmse(r, v, bound):
    """Root-mean-square residual of the inliers ``|r / sqrt(v)| <= bound`` and their count (icp._finish).

    The numpy version's order of operations, its sum of the inliers' squares
    in np.add.reduce's pairwise order (:func:`_sum_slots`), so the bits
    agree; NaN when there is no inlier.  Five numpy calls before.
    Returns (rmse, count).
    """
    n = len(r)
    sq = np.empty(n)
    k = 0
    for i in range(n):
        if abs(r[i] / math.sqrt(v[i])) <= bound:
            sq[k] = r[i] * r[i]
            k += 1
    rmse = math.sqrt(_sum_slots(sq, k) / k) if k else np.nan
    return rmse, k


@njit(cache=True, nogil=True)
def fit_exponents(d, sigma):
    """``-0.5 * (d / sigma) ** 2`` of the finite distances ``d`` (icp._fit_score), in their order.

    numpy's ``** 2`` squares by one multiplication, as here, so the bits
    agree; the exponential stays numpy's.  Five numpy calls before.
    """
    out = np.empty(len(d))
    m = 0
    for i in range(len(d)):
        if math.isfinite(d[i]):
            t = d[i] / sigma
            out[m] = -0.5 * (t * t)
            m += 1
    return out[:m]


@njit(cache=True, nogil=True)
def scale_both(h, middle, inv_length, per):
    """``h * s[:, None] * s[None, :] * per`` and ``middle * s[:, None] * s[None, :]``, s = (1, 1, inv_length).

    covariance.analyse's scaled coordinates, element by element in numpy's
    order of operations (the same bits; no sums).
    """
    s = np.empty(3)
    s[0] = 1.0
    s[1] = 1.0
    s[2] = inv_length
    a = np.empty((3, 3))
    m = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            a[i, j] = h[i, j] * s[i] * s[j] * per
            m[i, j] = middle[i, j] * s[i] * s[j]
    return a, m


@njit(cache=True, nogil=True)
def eigen_floor(evals, evecs, threshold):
    """The eigenvalue tests of covariance.analyse, element by element as numpy evaluates them.

    ``evals = np.maximum(evals, 0.0)``; ``top`` the largest, or 1 when it is
    not positive; ``degeneracy = evals[0] / top``; ``weak = evals <
    threshold * top``; ``d = evecs / np.maximum(evals, 1e-12 * top)``
    (np.maximum keeps its first argument when it is NaN or not smaller).
    Returns (evals, top, degeneracy, weak, d).
    """
    ev = np.empty(3)
    for i in range(3):
        e = evals[i]
        ev[i] = e if (e >= 0.0 or e != e) else 0.0
    top = ev[2] if ev[2] > 0 else 1.0
    degeneracy = ev[0] / top
    bar = threshold * top
    weak = np.empty(3, np.bool_)
    for i in range(3):
        weak[i] = ev[i] < bar
    low = 1e-12 * top
    d = np.empty((3, 3))
    for j in range(3):
        e = ev[j]
        den = e if (e >= low or e != e) else low
        for i in range(3):
            d[i, j] = evecs[i, j] / den
    return ev, top, degeneracy, weak, d


@njit(cache=True, nogil=True)
def times_two(p, per, factor):
    """``inv = p * per`` and ``factor * inv`` (3, 3): covariance.analyse's inverse and its multiple, as numpy's."""
    inv = np.empty((3, 3))
    first = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            inv[i, j] = p[i, j] * per
            first[i, j] = factor * inv[i, j]
    return inv, first


@njit(cache=True, nogil=True)
def unscale_symmetric(c, inv_length):
    """``0.5 * (cov + cov.T)``, ``cov = c * s[:, None] * s[None, :]``, s = (1, 1, inv_length): covariance.analyse."""
    s = np.empty(3)
    s[0] = 1.0
    s[1] = 1.0
    s[2] = inv_length
    cov = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            cov[i, j] = c[i, j] * s[i] * s[j]
    out = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            out[i, j] = 0.5 * (cov[i, j] + cov[j, i])
    return out


@njit(cache=True, nogil=True)
def live_blocks(nodes, score, bar, row_seed):
    """The blocks (rows [angle row, ox, oy, level]) whose bound beats their seed's bar, in their order.

    ``nodes[live], score[live]`` with ``live = score > bar[row_seed[nodes[:, 0]]]``
    (correlative.search), in one call instead of four numpy calls per batch.
    """
    n = len(score)
    keep = np.empty(n, np.int64)
    m = 0
    for i in range(n):
        if score[i] > bar[row_seed[nodes[i, 0]]]:
            keep[m] = i
            m += 1
    out = np.empty((m, nodes.shape[1]), nodes.dtype)
    out_score = np.empty(m, score.dtype)
    for t in range(m):
        out[t] = nodes[keep[t]]
        out_score[t] = score[keep[t]]
    return out, out_score


@njit(cache=True, nogil=True)
def take_rest(nodes, score, sel):
    """``nodes[sel]`` and the other rows in their order with their scores (correlative.search's batch split)."""
    n = len(score)
    taken = np.zeros(n, np.bool_)
    for t in range(len(sel)):
        taken[sel[t]] = True
    parents = np.empty((len(sel), nodes.shape[1]), nodes.dtype)
    for t in range(len(sel)):
        parents[t] = nodes[sel[t]]
    m = n - taken.sum()
    rest = np.empty((m, nodes.shape[1]), nodes.dtype)
    rest_score = np.empty(m, score.dtype)
    k = 0
    for i in range(n):
        if not taken[i]:
            rest[k] = nodes[i]
            rest_score[k] = score[i]
            k += 1
    return parents, rest, rest_score


@njit(cache=True, nogil=True)
def append_blocks(nodes, score, more, more_score):
    """``np.concatenate`` of two block lists and of their scores, in one call."""
    n, m = len(score), len(more_score)
    out = np.empty((n + m, nodes.shape[1]), nodes.dtype)
    out_score = np.empty(n + m, score.dtype)
    out[:n] = nodes
    out[n:] = more
    out_score[:n] = score
    out_score[n:] = more_score
    return out, out_score


@njit(cache=True, nogil=True)
def huber_rows(z, v, jac, c, mad_to_sigma, min_noise):
    """Huber weights of ICP's rows under the robust scale, and the weighted Jacobian rows.

    As icp._robust with the Huber kernel (closurecheck.core.kernels) followed
    by ``jac * (w / v)[:, None]``: ``scale = max(mad_to_sigma * median|z|,
    min_noise)``, ``w = min(1, c / max(|z / scale|, c))``, element by element
    as numpy computes them (the median is a value of the data, or the mean
    of two, whatever the selection algorithm).  Returns w, scale, jw (n, 3).
    """
    n = len(z)
    a = np.abs(z)
    k = n // 2
    part = np.partition(a, k)
    if n % 2:
        med = part[k]
    else:
        lower = part[0]
        for i in range(1, k):
            lower = max(lower, part[i])
        med = (lower + part[k]) / 2
    scale = max(mad_to_sigma * med, min_noise)
    w = np.empty(n)
    jw = np.empty((n, 3))
    for i in range(n):
        x = abs(z[i] / scale)
        x = x if x >= c else c
        wi = c / x
        wi = wi if wi <= 1.0 else 1.0
        w[i] = wi
        om = wi / v[i]
        jw[i, 0] = jac[i, 0] * om
        jw[i, 1] = jac[i, 1] * om
        jw[i, 2] = jac[i, 2] * om
    return w, scale, jw


@njit(cache=True, nogil=True, inline="always")
def _lu3(lu, perm):
    """Factor the (3, 3) matrix in ``lu`` in place by Gaussian elimination with partial pivoting (LAPACK's method).

    Rows are swapped whole, so afterwards P a = L U with L's multipliers
    below the diagonal of ``lu`` and U on and above it; ``perm`` (3,) int,
    given as [0, 1, 2], ends as the original row now at each position.
    """
    for col in range(3):
        piv = col
        for row in range(col + 1, 3):
            if abs(lu[row, col]) > abs(lu[piv, col]):
                piv = row
        if piv != col:
            for c in range(3):
                t = lu[col, c]
                lu[col, c] = lu[piv, c]
                lu[piv, c] = t
            k = perm[col]
            perm[col] = perm[piv]
            perm[piv] = k
        for row in range(col + 1, 3):
            f = lu[row, col] / lu[col, col]
            lu[row, col] = f
            for c in range(col + 1, 3):
                lu[row, c] -= f * lu[col, c]


@njit(cache=True, nogil=True, inline="always")
def _lu_solve3(lu, perm, b, out):
    """out = a^-1 b from _lu3's factors: forward then back substitution, in elimination's order of operations."""
    y0 = b[perm[0]]
    y1 = b[perm[1]] - lu[1, 0] * y0
    y2 = b[perm[2]] - lu[2, 0] * y0 - lu[2, 1] * y1
    out[2] = y2 / lu[2, 2]
    out[1] = (y1 - lu[1, 2] * out[2]) / lu[1, 1]
    out[0] = (y0 - lu[0, 1] * out[1] - lu[0, 2] * out[2]) / lu[0, 0]


@njit(cache=True, nogil=True)
def _inverse3(a, lu, perm, unit, inv):
    """inv = a^-1 for a (3, 3) matrix: one factorisation (_lu3) for the three columns, in place.

    ``lu``, ``perm`` (3,) int and ``unit`` (3,) are scratch space, so that
    line_models, which calls it once per line, allocates nothing; a is left
    as it was.
    """
    for i in range(3):
        perm[i] = i
        for j in range(3):
            lu[i, j] = a[i, j]
    _lu3(lu, perm)
    for j in range(3):
        for i in range(3):
            unit[i] = 1.0 if i == j else 0.0
        _lu_solve3(lu, perm, unit, inv[:, j])


@njit(cache=True, nogil=True)
def line_models(points, beams, idx, used, normal, tangent, centroid, rows, quadratic, range_noise, min_incidence_cos):
    """The local line models of a scan's line points (icp._target_side), one line at a time.

    For the line of point ``rows[m]``, fitted to its neighbour slots l
    (``used``, readings ``idx``; unused slots hold reading 0): the offset a
    along the line and h across it from the centroid, the design row
    x = [1, a, a^2] (or [1, a, 0]), the extent e = max |a| and the noise
    factor nu (|cos| of the beam against the normal, floored; 1 for
    isotropic noise), each multiplied by 0 or 1 for unused slots.  Then, with
    A = X^T X plus a relative ridge (1e-12 trace(A) on the diagonal;
    A[2, 2] = 1 for straight lines): wts = X A^-1 (k, 3), the coefficients
    beta = h^T wts and Q = sum_l nu_l^2 wts_l wts_l^T, the model's variance
    in units of sigma^2.  A^-1 comes from Gaussian elimination with partial
    pivoting (_inverse3: LAPACK's dgesv method, as numpy's inv).

    Each sum runs over the slots in order from 0.0, so the values are those
    of the numpy expressions where they have no sums, and otherwise fixed
    (tests/registration/test_compiled_kernels.py compares them with
    numpy's products and inverses to rounding).  The six sums of A, the
    three of beta and the six of Q each advance together in one pass over
    the slots (the same additions in the same order per sum) rather than
    one sum after another, each chain of 16 dependent additions waiting on
    the one before, and the slots' values live in per-line scratch rather
    than (M, k, 3) arrays between two kernels: 253 -> 126 µs a 721-point
    scan of benchmarks/registration.py, the gathers of the line points'
    rows and their int32 copy included.

    Returns the line points (M, 2), the (M, 14) line rows [centroid (2),
    normal (2), beta (3), Q00, Q01, Q02, Q11, Q12, Q22, extent], the
    readings of each line (M, k) int32 and their sensitivities nu * wts
    (M, k, 3) float32.
    """
    nl = len(rows)
    k = idx.shape[1]
    lp = np.empty((nl, 2))
    line = np.empty((nl, 14))
    nbr = np.empty((nl, k), np.int32)
    sens = np.empty((nl, k, 3), np.float32)
    xs = np.empty((k, 3))
    hs = np.empty(k)
    nus = np.empty(k)
    a = np.empty((3, 3))
    lu = np.empty((3, 3))
    perm = np.empty(3, np.int64)
    unit = np.empty(3)
    inv = np.empty((3, 3))
    for m in range(nl):
        row = rows[m]
        cx = centroid[row, 0]
        cy = centroid[row, 1]
        nx = normal[row, 0]
        ny = normal[row, 1]
        tx = tangent[row, 0]
        ty = tangent[row, 1]
        lp[m, 0] = points[row, 0]
        lp[m, 1] = points[row, 1]
        e = 0.0
        a00 = 0.0
        a01 = 0.0
        a02 = 0.0
        a11 = 0.0
        a12 = 0.0
        a22 = 0.0
        for q in range(k):
            u = 1.0 if used[row, q] else 0.0
            p = idx[row, q]
            nbr[m, q] = p
            dx = points[p, 0] - cx
            dy = points[p, 1] - cy
            al = (dx * tx + dy * ty) * u
            hs[q] = (dx * nx + dy * ny) * u
            x2 = al * al if quadratic else 0.0
            xs[q, 0] = u
            xs[q, 1] = al
            xs[q, 2] = x2
            e = max(e, abs(al)) if q else abs(al)
            if range_noise:
                c = abs(beams[p, 0] * nx + beams[p, 1] * ny)
                c = c if c >= min_incidence_cos else min_incidence_cos
            else:
                c = 1.0
            nus[q] = c * u
            a00 += u * u
            a01 += u * al
            a02 += u * x2
            a11 += al * al
            a12 += al * x2
            a22 += x2 * x2
        if not quadratic:
            a22 = 1.0
        ridge = 1e-12 * (a00 + a11 + a22)
        a[0, 0] = a00 + ridge
        a[0, 1] = a01
        a[0, 2] = a02
        a[1, 0] = a01
        a[1, 1] = a11 + ridge
        a[1, 2] = a12
        a[2, 0] = a02
        a[2, 1] = a12
        a[2, 2] = a22 + ridge
        _inverse3(a, lu, perm, unit, inv)
        b0 = 0.0
        b1 = 0.0
        b2 = 0.0
        q00 = 0.0
        q01 = 0.0
        q02 = 0.0
        q11 = 0.0
        q12 = 0.0
        q22 = 0.0
        for q in range(k):
            x0 = xs[q, 0]
            x1 = xs[q, 1]
            x2 = xs[q, 2]
            w0 = x0 * inv[0, 0] + x1 * inv[1, 0] + x2 * inv[2, 0]
            w1 = x0 * inv[0, 1] + x1 * inv[1, 1] + x2 * inv[2, 1]
            w2 = x0 * inv[0, 2] + x1 * inv[1, 2] + x2 * inv[2, 2]
            nu = nus[q]
            sens[m, q, 0] = nu * w0
            sens[m, q, 1] = nu * w1
            sens[m, q, 2] = nu * w2
            hq = hs[q]
            b0 += hq * w0
            b1 += hq * w1
            b2 += hq * w2
            q00 += nu * nu * w0 * w0
            q01 += nu * nu * w0 * w1
            q02 += nu * nu * w0 * w2
            q11 += nu * nu * w1 * w1
            q12 += nu * nu * w1 * w2
            q22 += nu * nu * w2 * w2
        line[m, 0] = cx
        line[m, 1] = cy
        line[m, 2] = nx
        line[m, 3] = ny
        line[m, 4] = b0
        line[m, 5] = b1
        line[m, 6] = b2
        line[m, 7] = q00
        line[m, 8] = q01
        line[m, 9] = q02
        line[m, 10] = q11
        line[m, 11] = q12
        line[m, 12] = q22
        line[m, 13] = e
    return lp, line, nbr, sens


@njit(cache=True, nogil=True)
def first_in_cells(points, cell):
    """Indices, ascending, of the points that come first in their square cell of ``cell`` metres (downsample).

    A point's cell is ``floor(p / cell)`` per axis, told apart by the key
    ``i * 1_000_003 + j`` (int64, as numpy computes it): the first point of
    each distinct key, as ``np.unique(key, return_index=True)`` (a stable
    sort) and ``sort`` gave them.  An open-addressing table of the keys
    seen replaces the sort: 21.5 -> 5.5 µs for a 721-point scan of
    benchmarks/registration.py.
    """
    n = len(points)
    bits = 4
    while (1 << bits) < 2 * n:
        bits += 1
    mask = (1 << bits) - 1
    keys = np.empty(1 << bits, np.int64)
    taken = np.zeros(1 << bits, np.bool_)
    out = np.empty(n, np.int64)
    m = 0
    for p in range(n):
        key = np.int64(math.floor(points[p, 0] / cell)) * 1_000_003 + np.int64(math.floor(points[p, 1] / cell))
        # Fibonacci hashing of the key's bits; linear probing.
        slot = np.int64((np.uint64(key) * np.uint64(11400714819323198485)) >> np.uint64(64 - bits))
        while taken[slot] and keys[slot] != key:
            slot = (slot + 1) & mask
        if not taken[slot]:
            taken[slot] = True
            keys[slot] = key
            out[m] = p
            m += 1
    return out[:m]


@njit(cache=True, nogil=True)
def point_candidates(idx, used, has_line, min_neighbours):
    """Points with no line, at least ``min_neighbours`` neighbours and no neighbour on a line (icp._point_like).

    ``~has_line & (used.sum(1) >= min_neighbours) & ~(has_line[idx] & used).any(1)``
    as indices, ascending, without the (N, k) temporaries (0.2 ms of a 721-point scan in numpy).
    """
    n, k = idx.shape
    pick = np.empty(n, np.int64)
    m = 0
    for p in range(n):
        if has_line[p]:
            continue
        count = 0
        lined = False
        for j in range(k):
            if used[p, j]:
                count += 1
                if has_line[idx[p, j]]:
                    lined = True
        if count >= min_neighbours and not lined:
            pick[m] = p
            m += 1
    return pick[:m]


@njit(cache=True, nogil=True)
def all_finite(a):
    """``np.isfinite(a).all()`` of a 2-D array without the mask (icp._as_points)."""
    for i in range(a.shape[0]):
        for j in range(a.shape[1]):
            if not math.isfinite(a[i, j]):
                return False
    return True


@njit(cache=True, nogil=True)
def small_objects(points, idx, used, has_line, min_neighbours, limit):
    """Points of small isolated objects and their object labels (icp._point_like), in one call.

    :func:`point_candidates`, then, if there are any, :func:`components` and
    the candidates whose object's box spans at most ``limit``
    (``np.hypot(*(hi - lo).T)[label[pick]] <= limit``), in their order:
    three kernel calls and seven numpy calls before.
    Returns (indices, labels), int64.
    """
    pick = point_candidates(idx, used, has_line, min_neighbours)
    keep = np.empty(len(pick), np.int64)
    lab = np.empty(len(pick), np.int64)
    m = 0
    if len(pick):
        label, lo, hi = components(points, idx, used)
        for t in range(len(pick)):
            c = label[pick[t]]
            if math.hypot(hi[c, 0] - lo[c, 0], hi[c, 1] - lo[c, 1]) <= limit:
                keep[m] = pick[t]
                lab[m] = c
                m += 1
    return keep[:m], lab[:m]


@njit(cache=True, nogil=True)
def scan_arrays(points, normal, has_line, count, point_index, point_object, min_line_points):
    """The arrays of a prepared scan after its line fits and small objects (icp._prepare), in one pass.

    As the numpy steps they replaced, element by element: the ranges
    ``rng = np.hypot(points[:, 0], points[:, 1])``, the beams
    ``points / np.maximum(rng, 1e-12)[:, None]``;
    small objects seen by ``min_line_points`` readings or more
    (``count[point_index] >= min_line_points``) join the points with a line,
    the rest stay point features; ``line_index = np.flatnonzero(has_line)``;
    normals zeroed off the lines (``np.where``); the root-mean-square range
    with its sum in np.add.reduce's pairwise order (:func:`_sum_slots`) and
    the largest range.  About sixteen numpy calls before.
    Returns beams (N, 2), normals (N, 2), has_line (N,) (a new array),
    line_index, point_index, point_object, length, radius.
    """
    n = len(points)
    beams = np.empty((n, 2))
    sq = np.empty(n)
    radius = math.hypot(points[0, 0], points[0, 1])
    for p in range(n):
        e = math.hypot(points[p, 0], points[p, 1])
        den = e if (e >= 1e-12 or e != e) else 1e-12
        beams[p, 0] = points[p, 0] / den
        beams[p, 1] = points[p, 1] / den
        sq[p] = e * e
        if e > radius or e != e:
            radius = e
    line = has_line.copy()
    keep = np.empty(len(point_index), np.int64)
    m = 0
    for t in range(len(point_index)):
        q = point_index[t]
        if count[q] >= min_line_points:
            line[q] = True
        else:
            keep[m] = t
            m += 1
    p_index = np.empty(m, point_index.dtype)
    p_object = np.empty(m, point_object.dtype)
    for t in range(m):
        p_index[t] = point_index[keep[t]]
        p_object[t] = point_object[keep[t]]
    normals = np.empty((n, 2))
    line_index = np.empty(n, np.int64)
    k = 0
    for p in range(n):
        if line[p]:
            normals[p, 0] = normal[p, 0]
            normals[p, 1] = normal[p, 1]
            line_index[k] = p
            k += 1
        else:
            normals[p, 0] = 0.0
            normals[p, 1] = 0.0
    length = math.sqrt(_sum_slots(sq, n) / n)
    return beams, normals, line, line_index[:k], p_index, p_object, length, radius


@njit(cache=True, nogil=True)
def _lex_order(rows):
    """``np.lexsort((y, x, theta, -score))`` of leaf rows [score, x, y, theta, seed] (no NaN).

    One stable merge sort on :func:`_leaf_before`'s keys: successive stable
    sorts on the keys, least significant first, put rows in the order of one
    stable sort on all of them, most significant first.
    """
    # In place of four stable argsorts of the round's new leaves: 0.062 -> 0.026 ms a search on hall
    # pairs (benchmarks/registration_scenes.py scenes).  Insertion sort in runs of 8, then merges;
    # both stable.
    n = len(rows)
    order = np.arange(n)
    run = 8
    for lo in range(0, n, run):
        for t in range(lo + 1, min(lo + run, n)):
            v = order[t]
            u = t
            while u > lo and _leaf_before(rows, v, rows, order[u - 1]):
                order[u] = order[u - 1]
                u -= 1
            order[u] = v
    tmp = np.empty(n, np.int64)
    width = run
    while width < n:
        for lo in range(0, n, 2 * width):
            mid = min(lo + width, n)
            hi = min(lo + 2 * width, n)
            a = lo
            b = mid
            for t in range(lo, hi):
                if b < hi and (a == mid or _leaf_before(rows, order[b], rows, order[a])):
                    tmp[t] = order[b]
                    b += 1
                else:
                    tmp[t] = order[a]
                    a += 1
        order, tmp = tmp, order
        width *= 2
    return order


@njit(cache=True, nogil=True)
def _leaf_before(a, i, b, j):
    """Whether leaf row ``a[i]`` comes strictly before ``b[j]`` in :func:`_lex_order`'s order.

    Higher score first, then smaller theta, x, y; equal keys are not "before".
    """
    if a[i, 0] != b[j, 0]:
        return -a[i, 0] < -b[j, 0]
    if a[i, 3] != b[j, 3]:
        return a[i, 3] < b[j, 3]
    if a[i, 1] != b[j, 1]:
        return a[i, 1] < b[j, 1]
    return a[i, 2] < b[j, 2]


@njit(cache=True, nogil=True)
def seed_leaves(own, records, j, k, sep_m, sep_rad, max_records):
    """One seed's update of the coarse search's best leaves (its part of :func:`_add_leaves`).

    ``own`` (m, 5) the seed's leaves that may still matter and ``records``
    the new leaves of all seeds (rows [sum score, x, y, theta, seed], no
    NaN); those of seed ``j`` are appended, sorted best first with equal
    scores by (theta, x, y) as ``np.lexsort`` orders them (the stable sorts
    of :func:`_lex_order`), reduced to the ``k`` best distinct
    (:func:`distinct`) and to the leaves at or above the k-th best score.
    Returns (kept leaves, the seed's list, k-th best score or -1, and
    whether more than ``max_records`` leaves came together, in which case
    nothing was sorted and the first array holds them all, ``own`` then
    the new, for the caller to thin to the ``max_records`` best first).
    """
    n_old = len(own)
    cnt = 0
    for r in range(len(records)):
        if records[r, 4] == j:
            cnt += 1
    n = n_old + cnt
    new = np.empty((cnt, 5))
    t = 0
    for r in range(len(records)):
        if records[r, 4] == j:
            for c in range(5):
                new[t, c] = records[r, c]
            t += 1
    over = n > max_records
    kept = new
    best = new[:0]
    kth = -1.0
    if over:
        kept = np.empty((n, 5))
        kept[:n_old] = own
        kept[n_old:] = new
    else:
        ordered = True
        for t in range(1, n_old):
            if _leaf_before(own, t, own, t - 1):
                ordered = False
                break
        # The kept leaves of the previous round come in order already: only the new ones are
        # sorted, then the two merged, the old first where every key ties (where the stable sorts
        # of the whole put them; the same rows as before on 4,444 chained calls with ties and signed
        # zeros).  On the sparse hall scene the leaves' bookkeeping was about a third of a search
        # (hundreds of kept leaves of equal integer scores sorted again every round): a default
        # register call there 4.99 -> 3.81 ms, the yard and warehouse unchanged (one process,
        # kernels swapped, 30 pairs each).  The leaves at or above the k-th best score, a leading
        # block of the result, are returned as a view of it, not copied again: with the sort of
        # _lex_order and distinct's shortcuts, seed_leaves 0.31 -> 0.09 ms a search on hall pairs.
        # (Galloping to each new leaf's place and copying the old leaves in blocks gained nothing.)
        srt = np.empty((n, 5))
        if ordered:
            order = _lex_order(new)
            a = 0
            t = 0
            for b in range(cnt):
                while a < n_old and not _leaf_before(new, order[b], own, a):
                    for c in range(5):
                        srt[t, c] = own[a, c]
                    a += 1
                    t += 1
                for c in range(5):
                    srt[t, c] = new[order[b], c]
                t += 1
            srt[t:] = own[a:]
        else:
            cat = np.empty((n, 5))
            cat[:n_old] = own
            cat[n_old:] = new
            order = _lex_order(cat)
            for t in range(n):
                for c in range(5):
                    srt[t, c] = cat[order[t], c]
        keep = distinct(srt, k, sep_m, sep_rad)
        best = np.empty((len(keep), 5))
        for t in range(len(keep)):
            for c in range(5):
                best[t, c] = srt[keep[t], c]
        if len(keep) == k:
            kth = srt[keep[-1], 0]
        m = 0
        while m < n and srt[m, 0] >= kth:
            m += 1
        kept = srt[:m]
    return kept, best, kth, over


@njit(cache=True, nogil=True)
def cell_bases(cells, offset, reach, x_max, y_max, pad, hp, out):
    """Flat pyramid index of each rotated source point at zero offset (correlative.search), into ``out``.

    ``cells`` (N, 2, A) the points rotated by each angle row, in cells (a
    numpy product), ``offset`` (2, A) each row's seed position in cells:
    ``floor(cells + offset)`` clipped to ``[-reach, x_max]`` and
    ``[-reach, y_max]``, shifted by ``pad``, then ``x * hp + y``; the numpy
    version's steps one element at a time (0.4 ms of numpy temporaries per
    search of the default window).  ``out`` (A, N), int32 or int64, is
    filled and returned: written a row at a time, in the gathers' type,
    rather than into an int64 array a column at a time and converted after
    (0.17-0.22 -> 0.05-0.09 ms for 331 angle rows of 106 points).
    """
    n, _, na = cells.shape
    lo = -float(reach)
    for a in range(na):
        ox = offset[0, a]
        oy = offset[1, a]
        for i in range(n):
            cx = math.floor(cells[i, 0, a] + ox)
            cy = math.floor(cells[i, 1, a] + oy)
            cx = min(max(cx, lo), x_max) + pad
            cy = min(max(cy, lo), y_max) + pad
            out[a, i] = int(cx * hp + cy)
    return out


@njit(cache=True, nogil=True)
def top_blocks(n_rows, starts, level):
    """Rows [angle row, ox, oy, level] of every top-level block: angle rows slowest, then ox, then oy."""
    ns = len(starts)
    out = np.empty((n_rows * ns * ns, 4), np.int64)
    t = 0
    for a in range(n_rows):
        for i in range(ns):
            for j in range(ns):
                out[t, 0] = a
                out[t, 1] = starts[i]
                out[t, 2] = starts[j]
                out[t, 3] = level
                t += 1
    return out


@njit(cache=True, nogil=True)
def stamp_grid(occupied, rows, cols, di, dj, value):
    """The fine likelihood grid (correlative.build_grid): the maximum of the stamp around each occupied cell.

    ``occupied`` flat indices ``i * cols + j`` of the cells holding points,
    in any order and repeated (a cell is stamped once: np.unique before
    the call was 0.05 of a grid's 0.12 ms); the stamp adds ``value[s]`` at
    offsets ``(di[s], dj[s])``, kept inside the grid.  A maximum does not
    depend on the order it is taken in, so this is numpy's
    ``np.maximum.at`` to the bit, without its (cells, stamp) index arrays.
    Returns (rows, cols) uint8.
    """
    fine = np.zeros((rows, cols), np.uint8)
    done = np.zeros(rows * cols, np.bool_)
    for o in range(len(occupied)):
        if done[occupied[o]]:
            continue
        done[occupied[o]] = True
        oi = occupied[o] // cols
        oj = occupied[o] % cols
        for s in range(len(value)):
            ti = oi + di[s]
            tj = oj + dj[s]
            if 0 <= ti < rows and 0 <= tj < cols and value[s] > fine[ti, tj]:
                fine[ti, tj] = value[s]
    return fine


@njit(cache=True, nogil=True)
def _solve3(a, b):
    """x with ``a x = b`` for a (3, 3) matrix: Gaussian elimination with partial pivoting (_lu3; LAPACK's dgesv)."""
    lu = a.copy()
    perm = np.arange(3)
    _lu3(lu, perm)
    out = np.empty(3)
    _lu_solve3(lu, perm, b, out)
    return out


@njit(cache=True, nogil=True)
def _rotate(p, c, s, tx, ty):
    """``p @ [[c, s], [-s, c]] + (tx, ty)`` for (n, 2) points p."""
    n = len(p)
    out = np.empty((n, 2))
    for k in range(n):
        out[k, 0] = p[k, 0] * c - p[k, 1] * s + tx
        out[k, 1] = p[k, 0] * s + p[k, 1] * c + ty
    return out


@njit(cache=True, nogil=True)
def nearest_k(points, origin, cell, columns, start, order, queries, upper, k):
    """The k nearest of ``points`` to each query closer than ``upper`` metres, nearest first (a :func:`cell_index`).

    As ``cKDTree(points).query(queries, k=k, distance_upper_bound=upper)[1]``:
    (Q, k) indices, ``len(points)`` where fewer than k lie closer; ``tied``
    is True when two points lie at exactly the same distance among those
    ranked (their order is then the kd-tree's to give).
    """
    nq = len(queries)
    n = len(points)
    idx = np.full((nq, k), n, np.int64)
    best = np.empty(k)
    bi = np.empty(k, np.int64)
    tied = False
    u2 = upper * upper
    ni, nj, reach = _grid_extent(start, columns, upper, cell)
    for p in range(nq):
        qx, qy = queries[p, 0], queries[p, 1]
        far, fi, fj, i0, i1, j0, j1 = _cell_window(qx, qy, origin, cell, ni, nj, reach)
        if far:
            continue
        for t in range(k):
            best[t] = u2
            bi[t] = n
        for i in range(i0, i1 + 1):
            gx = max(i - fi, 0.0, fi - (i + 1)) * cell
            for j in range(j0, j1 + 1):
                c = i * nj + j
                if start[c] == start[c + 1]:    # empty: passed over before the gap test, as in nearest
                    continue
                gy = max(j - fj, 0.0, fj - (j + 1)) * cell
                if gx * gx + gy * gy > best[k - 1]:
                    continue
                for s in range(start[c], start[c + 1]):
                    q = order[s]
                    ex = qx - points[q, 0]
                    ey = qy - points[q, 1]
                    d = ex * ex + ey * ey
                    if d > best[k - 1]:
                        continue
                    if d == best[k - 1]:
                        if bi[k - 1] < n:
                            tied = True
                        continue
                    # Insert in order; an equal distance already held is a tie.
                    t = k - 1
                    while t > 0 and best[t - 1] > d:
                        best[t] = best[t - 1]
                        bi[t] = bi[t - 1]
                        t -= 1
                    if t > 0 and best[t - 1] == d:
                        tied = True
                    best[t] = d
                    bi[t] = q
        for t in range(k):
            idx[p, t] = bi[t]
    return idx, tied


@njit(cache=True, nogil=True)
def _point_matches(pp, p_origin, p_cell, p_columns, p_start, p_order, p_obj, src_pidx, src_points, tgt_pidx,
                   tgt_points, c, s, tx, ty, upper):
    """Small-object matches of icp._associate_points under the pose (cos, sin, tx, ty).

    Returns (src (P,) source indices, ends (P, 2) target reading indices,
    tied); P = 0 where icp's version returns None.
    """
    m = len(pp)
    k = min(3, m)
    pw = np.empty((len(src_pidx), 2))
    for t in range(len(src_pidx)):
        q = src_pidx[t]
        pw[t, 0] = src_points[q, 0] * c - src_points[q, 1] * s + tx
        pw[t, 1] = src_points[q, 0] * s + src_points[q, 1] * c + ty
    j, tied = nearest_k(pp, p_origin, p_cell, p_columns, p_start, p_order, pw, upper, k)
    out_src = np.empty(len(pw), np.int64)
    ends = np.empty((len(pw), 2), np.int64)
    n_out = 0
    for t in range(len(pw)):
        first = j[t, 0]
        if first >= m:
            continue
        # The nearest of the next neighbours on the same object.
        second = m
        for col in range(1, k):
            if j[t, col] < m and p_obj[j[t, col]] == p_obj[first]:
                second = j[t, col]
                break
        if second >= m:
            continue
        a = tgt_pidx[first]
        b = tgt_pidx[second]
        sx = tgt_points[b, 0] - tgt_points[a, 0]
        sy = tgt_points[b, 1] - tgt_points[a, 1]
        lam = ((pw[t, 0] - tgt_points[a, 0]) * sx + (pw[t, 1] - tgt_points[a, 1]) * sy) / max(sx * sx + sy * sy,
                                                                                                1e-18)
        if lam >= 0.0 and lam <= 1.0:
            out_src[n_out] = src_pidx[t]
            ends[n_out, 0] = a
            ends[n_out, 1] = b
            n_out += 1
    return out_src[:n_out], ends[:n_out], tied


@njit(cache=True, nogil=True)
def _point_rows(src_i, ends, src_points, src_beams, tgt_points, tgt_beams, c, s, tx, ty, range_noise):
    """Point-to-segment rows of icp._point_rows at the pose: r, v, jac (P, 3), src_coef, tgt_coef (P, 2)."""
    n = len(src_i)
    r = np.empty(n)
    v = np.empty(n)
    jac = np.empty((n, 3))
    src_coef = np.empty(n)
    tgt_coef = np.empty((n, 2))
    for t in range(n):
        q = src_i[t]
        a = ends[t, 0]
        b = ends[t, 1]
        rpx = src_points[q, 0] * c - src_points[q, 1] * s
        rpy = src_points[q, 0] * s + src_points[q, 1] * c
        sx = tgt_points[b, 0] - tgt_points[a, 0]
        sy = tgt_points[b, 1] - tgt_points[a, 1]
        length2 = max(sx * sx + sy * sy, 1e-18)
        norm = math.sqrt(length2)
        nx = -sy / norm
        ny = sx / norm
        dx = rpx + tx - tgt_points[a, 0]
        dy = rpy + ty - tgt_points[a, 1]
        lam = min(max((dx * sx + dy * sy) / length2, 0.0), 1.0)
        r[t] = nx * dx + ny * dy
        jac[t, 0] = nx
        jac[t, 1] = ny
        jac[t, 2] = ny * rpx - nx * rpy
        if range_noise:
            ubx = src_beams[q, 0] * c - src_beams[q, 1] * s
            uby = src_beams[q, 0] * s + src_beams[q, 1] * c
            sc = nx * ubx + ny * uby
            t0 = -((1.0 - lam) * (nx * tgt_beams[a, 0] + ny * tgt_beams[a, 1]))
            t1 = -(lam * (nx * tgt_beams[b, 0] + ny * tgt_beams[b, 1]))
        else:
            sc = 1.0
            t0 = -(1.0 - lam)
            t1 = -lam
        src_coef[t] = sc
        tgt_coef[t, 0] = t0
        tgt_coef[t, 1] = t1
        v[t] = sc * sc + (t0 * t0 + t1 * t1)
    return r, v, jac, src_coef, tgt_coef


@njit(cache=True, nogil=True)
def reached(x, found, radius_m, within_m):
    """Index of the first row of ``found`` (m, 3) that pose x (3,) is within ``within_m`` of, or -1.

    The distance is the most any source point of a scan of range
    ``radius_m`` moves between the two poses: ``hypot(dx, dy) + radius_m *
    |dtheta|`` (metres, theta wrapped to (-pi, pi]), the measure of
    ``reassociate_m``.  Used by every ICP loop to stop a hypothesis that
    reaches a pose another hypothesis already converged to
    (icp._register_prepared).
    """
    for k in range(len(found)):
        dt = abs(np.pi - np.mod(np.pi - (x[2] - found[k, 2]), 2.0 * np.pi))
        if math.hypot(x[0] - found[k, 0], x[1] - found[k, 1]) + radius_m * dt < within_m:
            return k
    return -1


@njit(cache=True, nogil=True)
def icp_line(points, origin, cell, columns, start, order, line, cand, src_normals, src_points,
             src_beams, x0, lscale, max_iterations, reassociate_m, upper, max_extra, cos_max, check_normals,
             min_incidence_cos, range_noise, huber_c, mad_to_sigma, min_noise, damping, tol_m, tol_rad,
             radius_m, has_points, pp, p_origin, p_cell, p_columns, p_start, p_order, p_obj, src_pidx, tgt_pidx,
             tgt_points, tgt_beams, found, merge_m):
    """The iterations of point-to-line ICP with the Huber kernel (icp._icp_line_loop), in one call.

    Each iteration is icp's: re-associate (:func:`associate`, and the
    small objects' :func:`_point_matches` when ``has_points``) once the pose
    has moved by ``reassociate_m`` since the last association, linearise
    (:func:`linearise`, :func:`_point_rows`), weigh all rows under one
    robust scale (:func:`huber_rows`), and take a damped Gauss-Newton step
    on ``(H + mu diag(lscale)) dx = -g``.  As a Python loop of numpy and
    kernel calls one iteration cost 230-480 µs on a 5,000-scan warehouse
    log, most of it call overhead on a few hundred rows.  The sums run in
    row order here, so results no longer depend on the BLAS kernel a
    machine picks (they differed between two x86 machines before).

    ``cand`` the source points that may be matched (icp._candidates),
    ``src_normals`` the source's normals (unused without ``check_normals``);
    the candidates' points and normals are gathered here rather than by
    numpy before the call (icp._candidates' two gathers cost 15 µs a pair
    of benchmarks/registration.py in a single register call).  ``pp`` (m, 2) the target's small-object
    readings with their cell index, ``p_obj`` their object labels;
    ``src_pidx`` / ``tgt_pidx`` the small-object reading indices of each scan.

    Returns (x (3,), converged, iterations, status, i (K,) source indices,
    j (K,) target line indices, r, v, w (K,), jac (K, 3), s_along (K, 2):
    each row's along-line offset s and basis phi2 (icp._Solution), sc (K,),
    scale, and the small-object rows: src (P,), ends (P, 2), r, v, w (P,),
    jac (P, 3), src_coef (P,), tgt_coef (P, 2)).  status 0: done; 1: fewer
    than 3 correspondences (icp._failed); 2: a tie between nearest points,
    which the caller resolves with the kd-tree instead; 3: at the start of
    an iteration the pose was within ``merge_m`` of row ``found[merged]``
    (:func:`reached`; the row's index is returned in place of ``scale``,
    nothing else is filled).  P = 0 where icp has no small-object rows.
    """
    x = x0.copy()
    converged = False
    status = 0
    it = 0
    moved = np.inf
    n_cand = len(cand)
    cand_pts = np.empty((n_cand, 2))
    cand_normals = np.empty((n_cand, 2) if check_normals else (0, 2))
    for t in range(n_cand):
        q = cand[t]
        cand_pts[t, 0] = src_points[q, 0]
        cand_pts[t, 1] = src_points[q, 1]
        if check_normals:
            cand_normals[t, 0] = src_normals[q, 0]
            cand_normals[t, 1] = src_normals[q, 1]
    keep = np.zeros(0, np.int64)
    jj = np.zeros(0, np.int64)
    lt = np.zeros((line.shape[1], 0))
    kept_pts = np.zeros((0, 2))
    kept_beams = np.zeros((0, 2))
    r = np.zeros(0)
    v = np.zeros(0)
    w = np.zeros(0)
    jac = np.zeros((0, 3))
    s_al = np.zeros(0)
    phi2 = np.zeros(0)
    sc = np.zeros(0)
    scale = 0.0
    m_src = np.zeros(0, np.int64)
    m_ends = np.zeros((0, 2), np.int64)
    pr = np.zeros(0)
    pv = np.zeros(0)
    pwt = np.zeros(0)
    pjac = np.zeros((0, 3))
    psc = np.zeros(0)
    ptc = np.zeros((0, 2))
    h = np.empty((3, 3))
    g = np.empty(3)
    for it in range(1, max_iterations + 1):
        hit = reached(x, found, radius_m, merge_m)
        if hit >= 0:
            status = 3
            scale = float(hit)
            break
        c = math.cos(x[2])
        s = math.sin(x[2])
        if moved >= reassociate_m:
            pw = _rotate(cand_pts, c, s, x[0], x[1])
            nr = _rotate(cand_normals, c, s, 0.0, 0.0) if check_normals else pw
            keep, jj, lt, tied = associate(points, origin, cell, columns, start, order, pw, nr, line, upper,
                                           max_extra, cos_max, check_normals)
            if has_points:
                m_src, m_ends, tied_p = _point_matches(pp, p_origin, p_cell, p_columns, p_start, p_order, p_obj,
                                                       src_pidx, src_points, tgt_pidx, tgt_points, c, s, x[0],
                                                       x[1], upper)
                tied = tied or tied_p
            if tied:
                status = 2
                break
            kept_pts = np.empty((len(keep), 2))
            kept_beams = np.empty((len(keep), 2))
            for t in range(len(keep)):
                q = cand[keep[t]]
                kept_pts[t, 0] = src_points[q, 0]
                kept_pts[t, 1] = src_points[q, 1]
                kept_beams[t, 0] = src_beams[q, 0]
                kept_beams[t, 1] = src_beams[q, 1]
            moved = 0.0
        n_pts = len(m_src)
        if len(keep) + n_pts < 3:
            status = 1
            break
        r, v, w, jac, s_al, phi2, sc, scale, pr, pv, pwt, pjac, psc, ptc, jw = _icp_rows(
            kept_pts, kept_beams, lt, x, c, s, min_incidence_cos, range_noise, huber_c, mad_to_sigma, min_noise,
            m_src, m_ends, src_points, src_beams, tgt_points, tgt_beams)
        # One pass over the rows, each sum accumulated in row order (lines, then small objects), in
        # twelve scalars rather than in h and g, whose sums through memory waited on each other
        # (_icp_rows_sums; icp_line 320 -> 314 µs a pair of benchmarks/registration.py, medians of
        # three alternating runs).
        _icp_rows_sums(r, jac, pr, pjac, jw, h, g)
        mu = damping * (h[0, 0] / lscale[0] + h[1, 1] / lscale[1] + h[2, 2] / lscale[2]) / 3.0
        for a in range(3):
            h[a, a] += mu * lscale[a]
        step = _solve3(h, g)
        for a in range(3):
            x[a] -= step[a]
        moved += math.hypot(step[0], step[1]) + radius_m * abs(step[2])
        if math.hypot(step[0], step[1]) < tol_m and abs(step[2]) < tol_rad:
            converged = True
            break
    if status == 0 and len(m_src):
        # icp keeps the rows of the final pose when small objects take part (the loop's are from
        # before its last step).
        r, v, w, jac, s_al, phi2, sc, scale, pr, pv, pwt, pjac, psc, ptc, jw = _icp_rows(
            kept_pts, kept_beams, lt, x, math.cos(x[2]), math.sin(x[2]), min_incidence_cos, range_noise, huber_c,
            mad_to_sigma, min_noise, m_src, m_ends, src_points, src_beams, tgt_points, tgt_beams)
    idx = np.empty(len(keep), np.int64)
    for t in range(len(keep)):
        idx[t] = cand[keep[t]]
    s_along = np.empty((len(s_al), 2))
    for t in range(len(s_al)):
        s_along[t, 0] = s_al[t]
        s_along[t, 1] = phi2[t]
    return (x, converged, it, status, idx, jj, r, v, w, jac, s_along, sc, scale,
            m_src, m_ends, pr, pv, pwt, pjac, psc, ptc)


@njit(cache=True, nogil=True)
def _icp_rows_sums(r, jac, pr, pjac, jw, h, g):
    """h = jw^T [jac; pjac] and g = jw^T [r; pr] (3, 3) and (3,), each sum over the rows in order, into h and g."""
    n_l = len(r)
    g0 = g1 = g2 = 0.0
    h00 = h01 = h02 = h10 = h11 = h12 = h20 = h21 = h22 = 0.0
    for k in range(n_l + len(pr)):
        if k < n_l:
            rk, c0, c1, c2 = r[k], jac[k, 0], jac[k, 1], jac[k, 2]
        else:
            rk, c0, c1, c2 = pr[k - n_l], pjac[k - n_l, 0], pjac[k - n_l, 1], pjac[k - n_l, 2]
        j0 = jw[k, 0]
        j1 = jw[k, 1]
        j2 = jw[k, 2]
        g0 += j0 * rk
        h00 += j0 * c0
        h01 += j0 * c1
        h02 += j0 * c2
        g1 += j1 * rk
        h10 += j1 * c0
        h11 += j1 * c1
        h12 += j1 * c2
        g2 += j2 * rk
        h20 += j2 * c0
        h21 += j2 * c1
        h22 += j2 * c2
    g[0] = g0
    g[1] = g1
    g[2] = g2
    h[0, 0] = h00
    h[0, 1] = h01
    h[0, 2] = h02
    h[1, 0] = h10
    h[1, 1] = h11
    h[1, 2] = h12
    h[2, 0] = h20
    h[2, 1] = h21
    h[2, 2] = h22


@njit(cache=True, nogil=True)
def _icp_rows(kept_pts, kept_beams, lt, x, c, s, min_incidence_cos, range_noise, huber_c, mad_to_sigma, min_noise,
              m_src, m_ends, src_points, src_beams, tgt_points, tgt_beams):
    """All of ICP's rows at pose x and their Huber weights under one scale; jw (K + P, 3) the weighted Jacobian."""
    rp = _rotate(kept_pts, c, s, 0.0, 0.0)
    ub = _rotate(kept_beams, c, s, 0.0, 0.0) if range_noise else rp
    r, v, jac, s_al, phi2, sc, z = linearise(rp, ub, lt, x[0], x[1], min_incidence_cos, range_noise)
    pr, pv, pjac, psc, ptc = _point_rows(m_src, m_ends, src_points, src_beams, tgt_points, tgt_beams, c, s, x[0],
                                         x[1], range_noise)
    n_l = len(r)
    n_p = len(pr)
    # The line rows and small-object rows joined for one scale; without small objects (59 of the 60
    # pairs of benchmarks/registration.py) the line rows as they are, not copies (icp_line 314 ->
    # 310 µs a pair).
    z_all, v_all, jac_all = z, v, jac
    if n_p:
        z_all = np.empty(n_l + n_p)
        v_all = np.empty(n_l + n_p)
        jac_all = np.empty((n_l + n_p, 3))
        z_all[:n_l] = z
        v_all[:n_l] = v
        jac_all[:n_l] = jac
        for t in range(n_p):
            z_all[n_l + t] = pr[t] / math.sqrt(pv[t])
            v_all[n_l + t] = pv[t]
            jac_all[n_l + t] = pjac[t]
    w_all, scale, jw = huber_rows(z_all, v_all, jac_all, huber_c, mad_to_sigma, min_noise)
    w_l = w_all[:n_l].copy() if n_p else w_all
    return (r, v, w_l, jac, s_al, phi2, sc, scale, pr, pv, w_all[n_l:].copy(), pjac, psc, ptc, jw)


@njit(cache=True, nogil=True)
def _best_rows(score, batch):
    """Positions of the ``batch`` highest scores, ascending; among equal scores at the cut, the first ones."""
    n = len(score)
    cut = np.partition(-score, batch - 1)[batch - 1]       # minus the batch-th highest score
    sel = np.empty(batch, np.int64)
    m = 0
    for i in range(n):
        if -score[i] < cut:
            sel[m] = i
            m += 1
    for i in range(n):
        if m == batch:
            break
        if -score[i] == cut:
            sel[m] = i
            m += 1
    return np.sort(sel)


@njit(cache=True, nogil=True)
def _add_leaves(records, own, lists, kth, k, sep_m, sep_rad, max_records):
    """New leaves of :func:`coarse_search` into the seeds' lists, updated in place; returns (merged, bar).

    ``records`` rows [sum score, x, y, theta, seed index]; ``own``, ``lists``
    and ``kth`` per seed as :func:`seed_leaves` returns them; ``merged`` the
    k best distinct of the seeds' lists, as if each seed had been searched
    on its own, and ``bar`` each seed's pruning bar (coarse_search).
    """
    n_seeds = len(own)
    for j in range(n_seeds):
        present = False
        for r in range(len(records)):
            if records[r, 4] == j:
                present = True
                break
        if not present:
            continue
        kept, best, kj, over = seed_leaves(own[j], records, j, k, sep_m, sep_rad, max_records)
        if over:
            top = np.argsort(-kept[:, 0], kind="mergesort")[:max_records]
            thin = np.empty((max_records, 5))
            for t in range(max_records):
                thin[t] = kept[top[t]]
            kept, best, kj, over = seed_leaves(thin, thin[:0], j, k, sep_m, sep_rad, max_records)
        own[j] = kept
        lists[j] = best
        kth[j] = kj
    total = 0
    for j in range(n_seeds):
        total += len(lists[j])
    union = np.empty((total, 5))
    t = 0
    for j in range(n_seeds):
        for r in range(len(lists[j])):
            union[t] = lists[j][r]
            t += 1
    for t in range(total):
        union[t, 3] = np.pi - np.mod(np.pi - union[t, 3], 2 * np.pi)
    order = np.argsort(-union[:, 0], kind="mergesort")
    srt = np.empty_like(union)
    for t in range(total):
        srt[t] = union[order[t]]
    keep = distinct(srt, k, sep_m, sep_rad)
    merged = np.empty((len(keep), 5))
    for t in range(len(keep)):
        merged[t] = srt[keep[t]]
    merged_kth = merged[len(merged) - 1, 0] if len(merged) == k else -1.0
    bar = np.empty(n_seeds)
    for j in range(n_seeds):
        bar[j] = max(kth[j], merged_kth)
    return merged, bar


@njit(cache=True, nogil=True)
def _leaf_records(score, nodes, rows, r):
    """Leaf scores and nodes [angle row, ox, oy, level] -> records [sum score, x, y, theta, seed index]."""
    rec = np.empty((len(nodes), 5))
    for t in range(len(nodes)):
        a = nodes[t, 0]
        rec[t, 0] = score[t]
        rec[t, 1] = rows[a, 0] + r * nodes[t, 1]
        rec[t, 2] = rows[a, 1] + r * nodes[t, 2]
        rec[t, 3] = rows[a, 2]
        rec[t, 4] = rows[a, 3]
    return rec


@njit(cache=True, nogil=True)
def _rank_tops(top_score, row_seed_of_top, n_seeds):
    """Top blocks ordered by seed, then bound (highest first), then list position; and each seed's range.

    A counting sort on the integer bounds, stable so that equal bounds keep
    list order: the order in which :func:`_best_rows` takes a seed's
    blocks.  Returns (order, first, end): seed j's blocks are
    ``order[first[j]:end[j]]``.
    """
    n = len(top_score)
    per = np.zeros(n_seeds + 1, np.int64)
    lo = np.full(n_seeds, np.iinfo(np.int64).max)
    hi = np.full(n_seeds, -1)
    for t in range(n):
        j = row_seed_of_top[t]
        per[j + 1] += 1
        lo[j] = min(lo[j], top_score[t])
        hi[j] = max(hi[j], top_score[t])
    for j in range(n_seeds):
        per[j + 1] += per[j]
    first = per[:n_seeds].copy()
    end = per[1:].copy()
    order = np.empty(n, np.int64)
    for j in range(n_seeds):
        if end[j] == first[j]:
            continue
        # Keys hi - score in [0, hi - lo]: the bounds' actual span, not the 255 N they could reach.
        count = np.zeros(hi[j] - lo[j] + 2, np.int64)
        for t in range(n):
            if row_seed_of_top[t] == j:
                count[hi[j] - top_score[t] + 1] += 1
        for v in range(1, len(count)):
            count[v] += count[v - 1]
        for t in range(n):
            if row_seed_of_top[t] == j:
                v = hi[j] - top_score[t]
                order[first[j] + count[v]] = t
                count[v] += 1
    return order, first, end


@njit(cache=True, nogil=True)
def _take_tops(tops, top_score, order, head, tail, bar, batch):
    """The next batch of top blocks to split, in list order; ``head`` and ``tail`` updated in place.

    Each seed's open top blocks are ``order[head[j]:tail[j]]``, best first
    (:func:`_rank_tops`).  A visit first drops, for good, those that no
    longer beat the seed's bar (a suffix, as :func:`live_blocks` drops them),
    then takes the ``batch`` best across seeds (higher bound, then earlier
    in the list: :func:`_best_rows`' choice), or all if there are no more.
    Returns the taken blocks (none when nothing beats its bar).
    """
    n_seeds = len(head)
    live = 0
    for j in range(n_seeds):
        while tail[j] > head[j] and not top_score[order[tail[j] - 1]] > bar[j]:
            tail[j] -= 1
        live += tail[j] - head[j]
    m = min(live, batch)
    pos = np.empty(m, np.int64)
    for t in range(m):
        jb = -1
        for j in range(n_seeds):
            if head[j] < tail[j]:
                if jb < 0:
                    jb = j
                else:
                    a, b = order[head[j]], order[head[jb]]
                    if top_score[a] > top_score[b] or (top_score[a] == top_score[b] and a < b):
                        jb = j
        pos[t] = order[head[jb]]
        head[jb] += 1
    pos.sort()
    parents = np.empty((m, tops.shape[1]), tops.dtype)
    for t in range(m):
        parents[t] = tops[pos[t]]
    return parents


@njit(cache=True, nogil=True)
def _park(kids, kid_score, zone, rows, r, sep_m, sep_rad, row_seed, parked, parked_score):
    """Set aside the blocks whose every leaf their seed's best leaf suppresses (coarse_search).

    ``zone`` (S, 4) rows [score, x, y, theta] of each seed's best leaf so
    far (NaN while it has none).  A block (rows [angle row, ox, oy, level])
    is set aside when its bound is below that score and each of its leaves
    lies within the separation of that leaf as :func:`distinct`'s sure
    tests (:func:`_sure_tests`) decide it (squared distance below ``in2``
    at the block's farthest corner, unwrapped angle difference below
    ``in_rad``): whatever else is found, the seed's list sorts that leaf before
    all of them and drops them.  Called on the blocks about to be split
    and on the children just bounded.  Returns (kept blocks, their bounds,
    parked blocks, their bounds), the new ones appended to ``parked``.
    """
    n = len(kid_score)
    box, in2, _, ang, in_rad, _, _ = _sure_tests(sep_m, sep_rad)
    if n == 0 or not (box and ang):
        return kids, kid_score, parked, parked_score
    aside = np.zeros(n, np.bool_)
    m = 0
    for t in range(n):
        a = kids[t, 0]
        j = row_seed[a]
        zs = zone[j, 0]
        if not kid_score[t] < zs:       # also false while the seed has no leaf (NaN)
            continue
        if not abs(rows[a, 2] - zone[j, 3]) < in_rad:
            continue
        last = (1 << kids[t, 3]) - 1
        x0 = rows[a, 0] + r * kids[t, 1] - zone[j, 1]
        x1 = rows[a, 0] + r * (kids[t, 1] + last) - zone[j, 1]
        y0 = rows[a, 1] + r * kids[t, 2] - zone[j, 2]
        y1 = rows[a, 1] + r * (kids[t, 2] + last) - zone[j, 2]
        if max(x0 * x0, x1 * x1) + max(y0 * y0, y1 * y1) < in2:
            aside[t] = True
            m += 1
    if m == 0:
        return kids, kid_score, parked, parked_score
    out, out_score, keep, keep_score = _split_rows(kids, kid_score, aside, m)
    out, out_score = append_blocks(parked, parked_score, out, out_score)
    return keep, keep_score, out, out_score


@njit(cache=True, nogil=True)
def _split_rows(nodes, score, mask, m):
    """(rows where ``mask``, their scores, the other rows, theirs), each in their order; ``m`` = mask.sum()."""
    n = len(score)
    out = np.empty((m, nodes.shape[1]), nodes.dtype)
    out_score = np.empty(m, score.dtype)
    rest = np.empty((n - m, nodes.shape[1]), nodes.dtype)
    rest_score = np.empty(n - m, score.dtype)
    u = 0
    v = 0
    for t in range(n):
        if mask[t]:
            out[u] = nodes[t]
            out_score[u] = score[t]
            u += 1
        else:
            rest[v] = nodes[t]
            rest_score[v] = score[t]
            v += 1
    return out, out_score, rest, rest_score


@njit(cache=True, nogil=True)
def _move_zones(lists, zone):
    """Each seed's zone (:func:`_park`) to the first row of its list, in place; returns which zones moved."""
    moved = np.zeros(len(zone), np.bool_)
    for j in range(len(zone)):
        if len(lists[j]) == 0:
            continue
        b = lists[j][0]
        if b[0] == zone[j, 0] and b[1] == zone[j, 1] and b[2] == zone[j, 2] and b[3] == zone[j, 3]:
            continue
        moved[j] = zone[j, 0] == zone[j, 0]
        for c in range(4):
            zone[j, c] = b[c]
    return moved


@njit(cache=True, nogil=True)
def _unpark(parked, parked_score, moved, row_seed):
    """The parked blocks of the seeds whose zone moved, and the others (still parked), in their order."""
    back = np.zeros(len(parked_score), np.bool_)
    m = 0
    for t in range(len(parked_score)):
        if moved[row_seed[parked[t, 0]]]:
            back[t] = True
            m += 1
    return _split_rows(parked, parked_score, back, m)


@njit(cache=True, nogil=True)
def _settle(merged, bar, own, lists, kth, zone, parked, parked_score, open_nodes, open_score, rows, r, row_seed, k,
            sep_m, sep_rad, max_records):
    """After new leaves: the zones moved to each seed's best leaf, the blocks parked in a moved zone put back.

    A parked block goes back to its level's open list, a parked leaf into
    the lists (:func:`_add_leaves`; below the zone's old score, so never a
    seed's best).  Returns (merged, bar, parked, parked_score).
    """
    moved = _move_zones(lists, zone)
    while moved.any():
        back, back_score, parked, parked_score = _unpark(parked, parked_score, moved, row_seed)
        for level in range(1, len(open_nodes)):
            at = back[:, 3] == level
            cnt = at.sum()
            if cnt:
                more, more_score, _, _ = _split_rows(back, back_score, at, cnt)
                open_nodes[level], open_score[level] = append_blocks(open_nodes[level], open_score[level], more,
                                                                     more_score)
        at = back[:, 3] == 0
        n_leaves = at.sum()
        if n_leaves == 0:
            break
        leaves, leaf_score, _, _ = _split_rows(back, back_score, at, n_leaves)
        merged, bar = _add_leaves(_leaf_records(leaf_score, leaves, rows, r), own, lists, kth, k, sep_m, sep_rad,
                                  max_records)
        moved = _move_zones(lists, zone)
    return merged, bar, parked, parked_score


@njit(cache=True, nogil=True)
def coarse_search(tops, top_score, top_level, split, half, stack, base, size, hp, rows, r, n_seeds, k, sep_m,
                  sep_rad, batch, max_records):
    """The branch and bound of correlative.search over its top blocks (rows [angle row, ox, oy, level]).

    Each round splits the best ``batch`` open blocks of the finest level
    that has blocks beating their seed's bar (:func:`live_blocks`, or
    :func:`_take_tops` on the top level; :func:`split_and_bound`): the search dives to full resolution in a few
    rounds, and the leaves it finds there set a bar that most coarse blocks
    never clear.  Leaves go to the seeds' lists (:func:`_add_leaves`).
    ``bar[j]`` is the score a leaf of seed j must beat to matter: the
    higher of the seed's own k-th best distinct leaf and that of the merged
    lists (-1 while a list is short).  As in any branch and bound on the
    k-th best distinct leaf, a later leaf that suppresses two of the best so
    far lowers the k-th best again, and a block pruned before may then have
    held one of the final best; this is rare (one pair in 715 in the
    comparison against independent searches, a runner-up of a false pair).

    As a Python loop of kernel calls a search cost 4.0 ms on simulated
    warehouse pairs (a loaded machine), of which the bounds took 1.8 ms.
    The batch is the ``batch`` best bounds with ties at the cut taken in
    list order (numpy's argpartition took any of them), which changes only
    the order blocks are opened in.  With ``top_level`` 0 the top blocks
    are the leaves.  ``split`` (top_level + 1, 4, 4): the rows added to a
    block of level l for its four children.  Returns the merged best
    leaves (rows [sum score, x, y, theta, seed index]), best first.

    A block whose every leaf its seed's best leaf so far would suppress is
    set aside (:func:`_park`) and put back if another leaf becomes the
    seed's best (:func:`_settle`).  The lists order equal scores by (theta,
    x, y), not by arrival, so neither the order this changes nor the
    leaves it leaves out change a pick.
    """
    row_seed = rows[:, 3].astype(np.int64)
    own = [np.empty((0, 5)) for _ in range(n_seeds)]
    lists = [np.empty((0, 5)) for _ in range(n_seeds)]
    kth = np.full(n_seeds, -1.0)
    merged = np.empty((0, 5))
    bar = np.full(n_seeds, -1.0)
    if top_level == 0:
        merged, bar = _add_leaves(_leaf_records(top_score, tops, rows, r), own, lists, kth, k, sep_m, sep_rad,
                                  max_records)
    zone = np.full((n_seeds, 4), np.nan)
    parked = tops[:0].copy()
    parked_score = top_score[:0].copy()
    # The top level, thousands of blocks that only ever shrink, is kept ranked once (_rank_tops) and
    # consumed from both ends (_take_tops); the finer levels, a few hundred blocks that grow with each
    # split, stay lists filtered and cut each round.  The same blocks in the same order as filtering,
    # cutting and copying the top level's list at each of its visits: on the sparse hall scene's pairs
    # 12 visits of about 1,800 blocks a search, most of the 0.5 ms of a 1.9 ms branch and bound that
    # the lists' bookkeeping took.  With _kernels.top_sums, a search 2.56 -> 2.14 ms there, 1.72 ->
    # 1.39 on the warehouse's and 2.33 -> 1.86 on the yard's (one process, both versions, same results).
    order, head, tail = _rank_tops(top_score, row_seed[tops[:, 0]], n_seeds)
    open_nodes = [tops[:0] for _ in range(top_level)]
    open_score = [top_score[:0] for _ in range(top_level)]
    while top_level > 0:
        lvl = 0
        nodes = tops[:0]
        score = top_score[:0]
        for level in range(1, top_level):
            if len(open_score[level]) == 0:
                continue
            nodes, score = live_blocks(open_nodes[level], open_score[level], bar, row_seed)
            if len(score):
                lvl = level
                break
            open_nodes[level] = nodes
            open_score[level] = score
        if lvl == 0:
            parents = _take_tops(tops, top_score, order, head, tail, bar, batch)
            if len(parents) == 0:
                break
            parent_score = top_score[:0]
            lvl = top_level
        elif len(nodes) > batch:
            sel = _best_rows(score, batch)
            parents, rest, rest_score = take_rest(nodes, score, sel)
            parent_score = score[sel]
            open_nodes[lvl] = rest
            open_score[lvl] = rest_score
        else:
            parents = nodes
            parent_score = score
            open_nodes[lvl] = nodes[:0]
            open_score[lvl] = score[:0]
        # Blocks the seed's best leaf suppresses set aside, before splitting and once bounded: the
        # runner-ups' search no longer opens the best peak's neighbourhood (searches of the default
        # window: hall 0.90-0.92 of the time, warehouse and ring 0.96, lot and yard 1.00; the
        # pipeline's window 0.95-1.00; one process, 30 pairs a scene).
        if lvl < top_level:
            parents, parent_score, parked, parked_score = _park(parents, parent_score, zone, rows, r, sep_m, sep_rad,
                                                                row_seed, parked, parked_score)
        kids, kid_score = split_and_bound(parents, split[lvl], half, lvl == 1, stack, base, size, hp, bar, row_seed)
        kids, kid_score, parked, parked_score = _park(kids, kid_score, zone, rows, r, sep_m, sep_rad, row_seed,
                                                      parked, parked_score)
        if lvl == 1:
            if len(kids):
                merged, bar = _add_leaves(_leaf_records(kid_score, kids, rows, r), own, lists, kth, k, sep_m,
                                          sep_rad, max_records)
                merged, bar, parked, parked_score = _settle(merged, bar, own, lists, kth, zone, parked,
                                                            parked_score, open_nodes, open_score, rows, r,
                                                            row_seed, k, sep_m, sep_rad, max_records)
        else:
            open_nodes[lvl - 1], open_score[lvl - 1] = append_blocks(open_nodes[lvl - 1], open_score[lvl - 1], kids,
                                                                     kid_score)
    return merged
