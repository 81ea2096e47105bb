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
    """True when every stored (i, j) of a square CSR pattern with sorted, distinct indices has (j, i) stored.

    The same answer as ``(a != a.T).nnz == 0`` for a boolean matrix without
    stored zeros, without forming the transpose (scipy converts the tens of
    millions of conflicts to CSC and back: 1.4-2.7 s at 20,000 scans).  Rows
    are visited in order, and the entries (i, j) with j > i must then turn up
    in row j in increasing i: one cursor per row walks its entries below the
    diagonal, so each entry is read once (one binary search per entry took
    7 s on 69 M conflicts, each search a cache miss).
    """
    n = len(indptr) - 1
    cursor = indptr[:-1].copy()
    for i in range(n):
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            if j <= i:
                continue
            c = cursor[j]
            if c >= indptr[j + 1] or indices[c] != i:
                return False
            cursor[j] = c + 1
    # Every entry of a row below its diagonal must have been met from the other side.
    for j in range(n):
        c = cursor[j]
        if c < indptr[j + 1] and indices[c] < j:
            return False
    return True


@njit(cache=True, nogil=True)
def maximum_matching(indptr, indices, n_right):
    """A maximum matching of a bipartite graph, Hopcroft and Karp (SIAM J. Comput. 2(4), 1973).

    Left vertex v is joined to the right vertices ``indices[indptr[v]:indptr[v + 1]]``.
    Returns (match_left (n_left,), match_right (n_right,)) with -1 for
    unmatched vertices.  Why not scipy's ``maximum_bipartite_matching``: on
    the double cover of the conflicts of a 100,000-scan log (74,607 closures,
    15.9 M conflicts, window 600 m) it took 129 s; here a greedy first
    matching leaves few vertices free, and each phase is one breadth-first
    layering and depth-first searches along it, compiled.  Which maximum
    matching is found does not matter to :func:`konig_reach`'s sets (see
    there), so the split is the same.
    """
    n_left = len(indptr) - 1
    match_l = np.full(n_left, -1, dtype=np.int64)
    match_r = np.full(n_right, -1, dtype=np.int64)
    for v in range(n_left):
        for k in range(indptr[v], indptr[v + 1]):
            u = indices[k]
            if match_r[u] < 0:
                match_l[v] = u
                match_r[u] = v
                break
    unreached = np.iinfo(np.int64).max
    dist = np.empty(n_left, dtype=np.int64)
    queue = np.empty(n_left, dtype=np.int64)
    edge = np.empty(n_left, dtype=np.int64)
    stack = np.empty(n_left, dtype=np.int64)
    while True:
        # Layers of left vertices by alternating distance from the free ones.
        head = 0
        tail = 0
        for v in range(n_left):
            if match_l[v] < 0:
                dist[v] = 0
                queue[tail] = v
                tail += 1
            else:
                dist[v] = unreached
        found = False
        while head < tail:
            v = queue[head]
            head += 1
            for k in range(indptr[v], indptr[v + 1]):
                w = match_r[indices[k]]
                if w < 0:
                    found = True
                elif dist[w] == unreached:
                    dist[w] = dist[v] + 1
                    queue[tail] = w
                    tail += 1
        if not found:
            return match_l, match_r
        # Augmenting paths along the layers, depth first; a dead end is cut from the layering.
        for v in range(n_left):
            edge[v] = indptr[v]
        for s in range(n_left):
            if match_l[s] >= 0:
                continue
            top = 0
            stack[0] = s
            while top >= 0:
                v = stack[top]
                moved = False
                while edge[v] < indptr[v + 1]:
                    u = indices[edge[v]]
                    w = match_r[u]
                    if w < 0:
                        # Flip the path: each left vertex on the stack takes the right vertex of its current edge.
                        for i in range(top, -1, -1):
                            x = stack[i]
                            y = indices[edge[x]]
                            match_l[x] = y
                            match_r[y] = x
                        top = -1
                        moved = True
                        break
                    if dist[w] != unreached and dist[w] == dist[v] + 1:
                        top += 1
                        stack[top] = w
                        moved = True
                        break
                    edge[v] += 1
                if not moved:
                    dist[v] = unreached
                    top -= 1
                    if top >= 0:
                        edge[stack[top]] += 1


@njit(cache=True, nogil=True)
def konig_reach(indptr, indices, match_l, match_r):
    """Vertices reached by alternating paths from the free left vertices of a maximum matching.

    Left to right along any edge, right to left along the matching.  Returns
    (reached_left (n_left,), reached_right (n_right,)) booleans.  These sets
    do not depend on which maximum matching is given: the left ones are the
    vertices some maximum matching leaves free, the right ones their
    neighbours (the Dulmage-Mendelsohn decomposition; Dulmage and
    Mendelsohn, Canad. J. Math. 10, 1958), so neither does Konig's cover
    read off them.
    """
    n_left = len(indptr) - 1
    reached_l = np.zeros(n_left, dtype=np.bool_)
    reached_r = np.zeros(len(match_r), dtype=np.bool_)
    queue = np.empty(n_left, dtype=np.int64)
    tail = 0
    for v in range(n_left):
        if match_l[v] < 0:
            reached_l[v] = True
            queue[tail] = v
            tail += 1
    head = 0
    while head < tail:
        v = queue[head]
        head += 1
        for k in range(indptr[v], indptr[v + 1]):
            u = indices[k]
            if not reached_r[u]:
                reached_r[u] = True
                w = match_r[u]
                if w >= 0 and not reached_l[w]:
                    reached_l[w] = True
                    queue[tail] = w
                    tail += 1
    return reached_l, reached_r


@njit(cache=True, nogil=True)
def lex_improve_conflicts(indptr, indices, order, pos, member, wpos, weight, min_weight):
    """:func:`clique._lex_improve` on the conflict lists instead of the complement's bitsets.

    Parameters
    ----------
    indptr, indices : CSR arrays of the (symmetric, loop-free) conflict graph
        over the n vertices (local numbering).
    order : (n,) vertex at each position; pos : (n,) its inverse.
    member : (n,) bool by position, the clique; changed in place.
    wpos : (n,) float weight at each position.
    weight : the members' summed weight (as the caller summed it).
    min_weight : a swap must keep the weight at least this.

    Returns
    -------
    member : the improved clique, by position.

    The same scan as the bitset version: vertices in increasing index, the
    first non-member that conflicts with exactly one member of larger index
    (and keeps the weight) is swapped in, and the scan starts again.  A
    non-member's count of conflicting members is kept up to date across
    swaps, so each scan is O(n) plus the conflict lists of the swapped
    vertices.  Why: the bitsets of a component of s closures take s^2 / 8
    bytes, 690 MB at the 74,637 closures of the 100,000-scan log, where the
    Nemhauser-Trotter split had already decided the search without them.
    """
    n = len(order)
    count = np.zeros(n, dtype=np.int64)
    for v in range(n):
        for k in range(indptr[v], indptr[v + 1]):
            if member[pos[indices[k]]]:
                count[v] += 1
    improved = True
    while improved:
        improved = False
        for v in range(n):
            u = pos[v]
            if member[u] or count[v] != 1:
                continue
            mv = -1
            for k in range(indptr[v], indptr[v + 1]):
                if member[pos[indices[k]]]:
                    mv = indices[k]
                    break
            m = pos[mv]
            if mv > v and weight - wpos[m] + wpos[u] >= min_weight:
                member[m] = False
                member[u] = True
                weight += wpos[u] - wpos[m]
                for k in range(indptr[mv], indptr[mv + 1]):
                    count[indices[k]] -= 1
                for k in range(indptr[v], indptr[v + 1]):
                    count[indices[k]] += 1
                improved = True
                break
    return member
