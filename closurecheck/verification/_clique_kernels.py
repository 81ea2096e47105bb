"""Compiled greedy start of the maximum-clique search on a conflict graph (numba, cached on disk).

Why compiled code here: before the exact search, :func:`clique._heuristic_conflicts`
grows up to 64 greedy cliques, each a forward scan over the candidates that
clears the conflicts of every vertex it takes.  In Python that is one
interpreted step per candidate and one fancy-index per member: 14.0 of the
20.3 s of the maximum clique, and of 33 s of verify(), on the 20,000-scan
warehouse log with 20 deg / 100 m of heading bias (15,505 candidates,
pyinstrument, docs/performance.md).  The loop below is the same algorithm
over the same CSR arrays, so it takes the same vertices in the same order;
the clique's weight is summed in the same order as Python's ``sum`` (which
starts from the integer 0, exact when the first float is added), so it is the
same float.  tests/verification/test_clique_kernels.py holds it against the
Python formulation.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def greedy_starts(indptr, indices, pos, pos_order, core_pos, wpos, starts, weighted):
    """Greedy cliques of the complement of a conflict graph from its first ``starts`` positions.

    Parameters
    ----------
    indptr, indices : CSR arrays of the (symmetric, loop-free) conflict graph
        over the n vertices (original numbering).
    pos : (n,) position of each vertex in decreasing core order.
    pos_order : (n,) vertex at each position (inverse of ``pos``).
    core_pos : (n,) core number at each position (non-increasing).
    wpos : (n,) float weight at each position.
    starts : at most this many positions start a clique.
    weighted : compare equal-size cliques by weight.

    Returns
    -------
    best : (s,) int64 positions of the best clique found (start first, then
        ascending positions).
    size : s.
    weight : its weight, summed in the order of ``best``.
    """
    n = len(pos)
    best = np.zeros(0, dtype=np.int64)
    best_size = 0
    best_w = 0.0
    cand = np.zeros(n, dtype=np.bool_)
    clique = np.empty(n, dtype=np.int64)
    for p in range(min(n, starts)):
        limit = core_pos[p] + 1
        if limit < best_size or (limit == best_size and not weighted):
            break
        floor = max(best_size - 1, 0)
        count = 0
        for q in range(n):
            if core_pos[q] >= floor:
                count += 1
        cand[:] = False
        cand[:count] = True
        cand[p] = False
        v = pos_order[p]
        for k in range(indptr[v], indptr[v + 1]):
            cand[pos[indices[k]]] = False
        clique[0] = p
        size = 1
        # The lowest candidate position is taken each time and candidates
        # only ever drop out, so one forward scan finds them all.
        for u in range(count):
            if not cand[u]:
                continue
            clique[size] = u
            size += 1
            vu = pos_order[u]
            for k in range(indptr[vu], indptr[vu + 1]):
                cand[pos[indices[k]]] = False
        weight = 0.0
        for k in range(size):
            weight += wpos[clique[k]]
        if size != best_size:
            better = size > best_size
        else:
            better = weighted and weight > best_w
        if better:
            best = clique[:size].copy()
            best_size = size
            best_w = weight
    return best, best_size, best_w


@njit(cache=True, nogil=True)
def is_symmetric(indptr, indices):
    """True when every stored (i, j) of a square CSR pattern with sorted indices has (j, i) stored.

    The same answer as ``(a != a.T).nnz == 0`` for a boolean matrix without
    stored zeros, without forming the transpose: at 20,000 scans that
    comparison took 1.4-2.7 s of the maximum clique (scipy converts the tens
    of millions of conflicts to CSC and back); here each entry is one binary
    search in the other row.
    """
    n = len(indptr) - 1
    for i in range(n):
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            lo = indptr[j]
            hi = indptr[j + 1]
            while lo < hi:
                mid = (lo + hi) // 2
                if indices[mid] < i:
                    lo = mid + 1
                else:
                    hi = mid
            if lo == indptr[j + 1] or indices[lo] != i:
                return False
    return True
