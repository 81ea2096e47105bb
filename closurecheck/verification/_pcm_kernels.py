"""Compiled pair test of PCM (numba, cached on disk).

Why compiled code here: a 20,000-scan log tests about 53 million closure
pairs, about 150 floating-point operations each.  The vectorised numpy
formulation (``consistency._pair_block``) spends most of its 0.33 us per
pair on gathers and on the temporaries of a few dozen (P,) arrays per
block, not on arithmetic; one loop over the pairs keeps every value in
registers and writes only the pairs that fail (56 ns per pair measured,
docs/performance.md).  Compiling takes about 4 s, once per machine.

Bit for bit: every expression below is ``consistency._pair_block``'s,
written per scalar in the same order of operations (numba does not contract
multiplications and additions into fused multiply-adds unless asked to,
and ``_wrap`` follows numpy's floating remainder), so the squared distances
are the same bits and the conflicts the same pairs;
tests/verification/test_pcm_kernels.py holds the two against each other.

Threads: :func:`failing_pairs` runs on every core (``parallel=True``,
numba's default thread count), the other kernels on the calling thread.
numba picks its threading layer on the first parallel call (OpenMP here;
TBB where installed, else its own work queue).  GNU OpenMP is not safe
across a ``fork`` without ``exec`` after a parallel region; the project's
worker pools start from a fork server or by spawning, never by forking
this process.

Inputs are the per-closure columns of ``consistency._ClosureColumns`` as one
(K, 20) float array ``q`` (one row per closure, so a pair reads two short
rows), the oriented nodes ``src``, ``dst`` (K,) and the prefix sums' six
upper-triangle entries ``pc`` (N, 6).
"""

from __future__ import annotations


import numpy as np
from numba import njit, prange

# Columns of q.
XAX, XAY, CA, SA, MX, MY, MT, MC, MS, NX, NY, NT, NC, NS = range(14)
W0 = 14  # then the six upper-triangle entries of the closure's world-frame covariance
N_COLUMNS = 20

_TWO_PI = 2.0 * np.pi


@njit(cache=True, nogil=True, inline="always")
def _wrap(theta):
    """se2.wrap on one angle: ``pi - remainder(pi - theta, 2 pi)`` with numpy's remainder."""
    a = np.pi - theta
    mod = np.fmod(a, _TWO_PI)
    if mod != 0.0:
        if mod < 0.0:
            mod += _TWO_PI
    else:
        mod = 0.0
    return np.pi - mod


@njit(cache=True, nogil=True, inline="always")
def _distance_sq(q, src, dst, pc, i, j, shared):
    """Squared Mahalanobis distance of the cycle of closures i, j (consistency._pair_block for one pair)."""
    a = src[i]
    b = dst[i]
    c = src[j]
    d = dst[j]
    xax = q[i, XAX]
    xay = q[i, XAY]
    ca = q[i, CA]
    sa = q[i, SA]
    mci = q[i, MC]
    msi = q[i, MS]
    nx = q[j, NX]
    ny = q[j, NY]
    nc = q[j, NC]
    ns = q[j, NS]
    gx = q[i, MX] + mci * nx - msi * ny
    gy = q[i, MY] + msi * nx + mci * ny
    cg = mci * nc - msi * ns
    sg = msi * nc + mci * ns
    gt = _wrap(q[i, MT] + q[j, NT])
    dx = gx + cg * xax - sg * xay - xax
    dy = gy + sg * xax + cg * xay - xay
    ex = ca * dx + sa * dy
    ey = -sa * dx + ca * dy
    u0 = cg * ex + sg * ey
    u1 = -sg * ex + cg * ey
    v0 = ca * u0 - sa * u1 + xay * gt
    v1 = sa * u0 + ca * u1 - xax * gt
    h0 = nc * v0 - ns * v1 + ny * gt
    h1 = ns * v0 + nc * v1 - nx * gt
    lo1 = min(b, d)
    hi1 = max(b, d)
    lo2 = min(c, a)
    hi2 = max(c, a)
    # Y D_ca Y^T with Y = [[nc, -ns, ny], [ns, nc, -nx], [0, 0, 1]] (consistency._congruence).
    px = ny
    py = -nx
    d00 = pc[hi2, 0] - pc[lo2, 0]
    d01 = pc[hi2, 1] - pc[lo2, 1]
    d02 = pc[hi2, 2] - pc[lo2, 2]
    d11 = pc[hi2, 3] - pc[lo2, 3]
    d12 = pc[hi2, 4] - pc[lo2, 4]
    d22 = pc[hi2, 5] - pc[lo2, 5]
    a0 = nc * d00 - ns * d01 + px * d02
    a1 = nc * d01 - ns * d11 + px * d12
    a2 = nc * d02 - ns * d12 + px * d22
    b0 = ns * d00 + nc * d01 + py * d02
    b1 = ns * d01 + nc * d11 + py * d12
    b2 = ns * d02 + nc * d12 + py * d22
    c0 = q[i, W0] + q[j, W0] + (pc[hi1, 0] - pc[lo1, 0]) + (nc * a0 - ns * a1 + px * a2)
    c1 = q[i, W0 + 1] + q[j, W0 + 1] + (pc[hi1, 1] - pc[lo1, 1]) + (ns * a0 + nc * a1 + py * a2)
    c2 = q[i, W0 + 2] + q[j, W0 + 2] + (pc[hi1, 2] - pc[lo1, 2]) + a2
    c3 = q[i, W0 + 3] + q[j, W0 + 3] + (pc[hi1, 3] - pc[lo1, 3]) + (ns * b0 + nc * b1 + py * b2)
    c4 = q[i, W0 + 4] + q[j, W0 + 4] + (pc[hi1, 4] - pc[lo1, 4]) + b2
    c5 = q[i, W0 + 5] + q[j, W0 + 5] + (pc[hi1, 5] - pc[lo1, 5]) + d22
    if shared:
        ov_lo = max(lo1, lo2)
        ov_hi = min(hi1, hi2)
        if ov_hi > ov_lo:
            sign = float(np.sign(d - b) * np.sign(a - c))
            x00 = sign * (pc[ov_hi, 0] - pc[ov_lo, 0])
            x01 = sign * (pc[ov_hi, 1] - pc[ov_lo, 1])
            x02 = sign * (pc[ov_hi, 2] - pc[ov_lo, 2])
            x11 = sign * (pc[ov_hi, 3] - pc[ov_lo, 3])
            x12 = sign * (pc[ov_hi, 4] - pc[ov_lo, 4])
            x22 = sign * (pc[ov_hi, 5] - pc[ov_lo, 5])
            # Z = Y X (consistency._times_symmetric); the term is Z + Z^T.
            z00 = nc * x00 - ns * x01 + px * x02
            z01 = nc * x01 - ns * x11 + px * x12
            z02 = nc * x02 - ns * x12 + px * x22
            z10 = ns * x00 + nc * x01 + py * x02
            z11 = ns * x01 + nc * x11 + py * x12
            z12 = ns * x02 + nc * x12 + py * x22
            c0 += z00 + z00
            c1 += z01 + z10
            c2 += z02 + x02
            c3 += z11 + z11
            c4 += z12 + x12
            c5 += x22 + x22
    # h^T C^-1 h by the adjugate (consistency._quad_inv_entries).
    aa = c3 * c5 - c4 * c4
    bb = c2 * c4 - c1 * c5
    cc = c1 * c4 - c2 * c3
    dd = c0 * c5 - c2 * c2
    ee = c1 * c2 - c0 * c4
    ff = c0 * c3 - c1 * c1
    det = c0 * aa + c1 * bb + c2 * cc
    num = aa * h0 * h0 + dd * h1 * h1 + ff * gt * gt + 2.0 * (bb * h0 * h1 + cc * h0 * gt + ee * h1 * gt)
    return num / det


@njit(cache=True, nogil=True)
def pair_distances(q, src, dst, pc, first, second, shared):
    """Squared distances of the pairs (first[p], second[p]), (P,) float64.

    Serial on purpose: the windowed test calls it once per block of about
    100,000 pairs (5 ms), between numpy steps that build the next block; a
    parallel version (prange over p) doubled that path's CPU time and
    wall time on the shared 2-core machine (K = 7,613, 300 m window,
    3.6 M pairs: 0.50 -> 1.0-1.2 s, load 2.8), the idle thread spinning
    at every block's barrier.
    """
    out = np.empty(len(first))
    for p in range(len(first)):
        out[p] = _distance_sq(q, src, dst, pc, first[p], second[p], shared)
    return out


@njit(cache=True, nogil=True, inline="always")
def _test_row(q, src, dst, pc, shared, threshold, i, bits, at):
    """Test (i, j) for every j > i; set bit j - i - 1 of the words from bits[at] where it fails; return how many."""
    n = 0
    word = np.uint64(0)
    bit = np.uint64(0)
    one = np.uint64(1)
    for j in range(i + 1, len(src)):
        if _distance_sq(q, src, dst, pc, i, j, shared) > threshold:
            word |= one << bit
            n += 1
        bit += one
        if bit == np.uint64(64):
            bits[at] = word
            at += 1
            word = np.uint64(0)
            bit = np.uint64(0)
    if bit != np.uint64(0):
        bits[at] = word
    return n


# Words of failure bits per wave (see failing_pairs): 8 MB, 64 M pair tests,
# 3.5-4.5 s on one core, so a K = 20,000 test has four waves and waits at
# eight barriers.  A barrier costs thread wake-ups, milliseconds when the
# cores are shared (waves of 4,099 pairs, two barriers each: about 10 ms a
# wave at load 3.6 on 2 cores), which is why the waves are large and hold bits.
WAVE_WORDS = 1 << 20


@njit(cache=True, parallel=True)
def failing_pairs(q, src, dst, pc, shared, threshold, rows, wave_words=WAVE_WORDS):
    """Pairs (i, j), i in ``rows``, j > i, whose squared distance exceeds ``threshold``.

    Returns two int32 arrays (i, j) of the failing pairs, in the order
    tested (``rows`` in the given order, then j ascending).  Their storage
    grows by doubling, so the memory is the failing pairs plus one wave's
    bits (below, at most 8 MB), never the K^2 / 2 tested.

    Why parallel: the K^2 / 2 tests are a large single-threaded step of
    verify() (4-5 s of it at 20,000 scans, docs/performance.md, "The pair
    test compiled") and every row is independent.
    numba's default thread count (one per core) is used; verification runs
    after registration, so no registration worker pool holds the cores then.

    How the order is kept: rows go in waves of consecutive rows holding
    about ``wave_words`` 64-bit words of one bit per tested pair; each row
    sets its failure bits in its own words (whole words, so no two threads
    write the same word) and stores its count.  After the wave a prefix sum
    of the counts places every row's run in the output, in row order, and
    the rows' bits are turned into j, ascending.  Which thread tests a row
    changes no value and no position, so the arrays are those of the serial
    loop (tests/verification/test_pcm_kernels.py).  Row i tests K - 1 - i
    pairs, so each parallel iteration takes the two rows at either end of
    what is left of the wave (lo + t and hi - 1 - t): every iteration then
    costs about the same, and numba's static split of the iterations
    between threads is balanced.
    """
    k = len(src)
    m = len(rows)
    words = np.empty(m, np.int64)
    widest = 0
    every = 0
    for r in range(m):
        words[r] = (max(k - 1 - rows[r], 0) + 63) // 64
        widest = max(widest, words[r])
        every += words[r]
    bits = np.empty(max(min(wave_words, every), widest, 1), np.uint64)
    start = np.empty(m, np.int64)
    counts = np.zeros(m, np.int64)
    fi = np.empty(1024, np.int32)
    fj = np.empty(1024, np.int32)
    n = 0
    lo = 0
    while lo < m:
        hi = lo
        used = 0
        while hi < m and (hi == lo or used + words[hi] <= len(bits)):
            start[hi] = used
            used += words[hi]
            hi += 1
        rows_in_wave = hi - lo
        half = (rows_in_wave + 1) // 2
        for t in prange(half):
            r = lo + t
            counts[r] = _test_row(q, src, dst, pc, shared, threshold, rows[r], bits, start[r])
            u = hi - 1 - t
            if u != r:
                counts[u] = _test_row(q, src, dst, pc, shared, threshold, rows[u], bits, start[u])
        # Where each row's run goes: the prefix sum of the counts (one add a row).
        placed = np.empty(rows_in_wave, np.int64)
        total = n
        for r in range(lo, hi):
            placed[r - lo] = total
            total += counts[r]
        if total > len(fi):
            size = max(2 * len(fi), total)
            gi = np.empty(size, np.int32)
            gj = np.empty(size, np.int32)
            # Element by element: numba's parallel rewrite of the slice copy
            # asserts equal sizes of the whole destination and the slice.
            for c in range(n):
                gi[c] = fi[c]
                gj[c] = fj[c]
            fi = gi
            fj = gj
        for t in prange(half):
            _bits_to_pairs(rows, words, start, placed, bits, lo + t, lo, fi, fj)
            u = hi - 1 - t
            if u != lo + t:
                _bits_to_pairs(rows, words, start, placed, bits, u, lo, fi, fj)
        n = total
        lo = hi
    return fi[:n].copy(), fj[:n].copy()


@njit(cache=True, nogil=True, inline="always")
def _bits_to_pairs(rows, words, start, placed, bits, r, lo, fi, fj):
    """Write row r's failing pairs (rows[r], j), j ascending, from placed[r - lo] on."""
    i = rows[r]
    to = placed[r - lo]
    zero = np.uint64(0)
    one = np.uint64(1)
    for w in range(words[r]):
        word = bits[start[r] + w]
        j = i + 1 + 64 * w
        while word != zero:
            if word & one:
                fi[to] = i
                fj[to] = j
                to += 1
            word >>= one
            j += 1


@njit(cache=True, nogil=True)
def symmetric_csr(k, fi, fj, indptr, indices):
    """Fill the CSR of the symmetric graph whose upper-triangle edges are (fi[p], fj[p]).

    ``fi``, ``fj`` as :func:`failing_pairs` gives them (i < j, sorted by i
    then j); ``indptr`` (k + 1,) and ``indices`` (2 P,) are filled in place.
    Row r lists its lower neighbours (the i of pairs (i, r), which arrive
    in ascending i) and then its upper ones (ascending j), so every row's
    indices come out sorted, as scipy's canonical CSR has them, without the
    coordinate arrays and sort that building through COO needs (2 s and
    0.5 GB for 23 million pairs).
    """
    lower = np.zeros(k, np.int64)
    upper = np.zeros(k, np.int64)
    for p in range(len(fi)):
        upper[fi[p]] += 1
        lower[fj[p]] += 1
    indptr[0] = 0
    for r in range(k):
        indptr[r + 1] = indptr[r] + lower[r] + upper[r]
    low_at = np.empty(k, np.int64)
    up_at = np.empty(k, np.int64)
    for r in range(k):
        low_at[r] = indptr[r]
        up_at[r] = indptr[r] + lower[r]
    for p in range(len(fi)):
        i = fi[p]
        j = fj[p]
        indices[up_at[i]] = j
        up_at[i] += 1
        indices[low_at[j]] = i
        low_at[j] += 1
    return indptr[k]
