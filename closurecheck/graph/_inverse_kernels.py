"""Compiled loops of the selected inverse (numba, cached on disk).

Why compiled code here: the columns of ``L^-1`` along their root paths
(:mod:`closurecheck.graph.selected_inverse`, step 3) are a recursion over
each node's column pattern and its ancestors' depths.  The numpy
formulation ran it one tree depth at a time, padded to the widest pattern
and the deepest node of the graph: on the 100,000-scan log's map-gate graph
(33,332 nodes, depth up to 1,192, patterns up to 599 blocks) that held
39.8 M path blocks instead of the 26.3 M that exist, and one call took
451.5 s in verify().  The loops below touch only the blocks that exist,
and keep only the columns still needed (a depth-first walk).
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True, inline="always")
def _subtract_abt(out, a, bt):
    """``out -= a @ bt.T`` for b x b blocks, summed in the order of k."""
    b = out.shape[0]
    for r in range(b):
        for col in range(b):
            acc = 0.0
            for k in range(b):
                acc += a[r, k] * bt[col, k]
            out[r, col] -= acc


@njit(cache=True, nogil=True)
def block_ldl(colptr, rows, diag, lower):
    """Block LDL^T of a symmetric matrix on its (filled) ragged pattern, right-looking, in place.

    Parameters
    ----------
    colptr, rows : column patterns (elimination positions, rows ascending,
        each column's rows its ancestors), as from ``selected_inverse._symbolic``.
    diag : (n, b, b) the diagonal blocks of A; overwritten by the Schur updates.
    lower : (nnz, b, b) the blocks ``A[rows[k], col]``; overwritten by L's.

    Returns
    -------
    r_fac : (n, b, b) ``R_j`` with ``D_j^-1 = R_j^T R_j`` (the inverse of D_j's
        lower Cholesky factor).
    failed : -1, or the first column whose pivot block is not positive definite.

    Why compiled: the numpy formulation updated one elimination-tree height
    at a time through bincount scatters padded to the widest column: 126 s on
    the 100,000-scan log's map-gate graph (33,332 nodes, column patterns up to
    599 blocks).
    """
    n = len(colptr) - 1
    b = diag.shape[1]
    r_fac = np.zeros_like(diag)
    mark = np.full(n, -1, dtype=np.int64)
    chol = np.zeros((b, b))
    d_inv = np.zeros((b, b))
    c = np.empty((0, b, b))
    for j in range(n):
        # Cholesky of the symmetrised pivot block, then R = chol^-1 (so R^T R = D^-1).
        for r in range(b):
            for s in range(r + 1):
                v = 0.5 * (diag[j, r, s] + diag[j, s, r])
                for k in range(s):
                    v -= chol[r, k] * chol[s, k]
                if r == s:
                    if not v > 0.0:
                        return r_fac, j
                    chol[r, r] = np.sqrt(v)
                else:
                    chol[r, s] = v / chol[s, s]
        for col in range(b):
            for r in range(b):
                if r < col:
                    r_fac[j, r, col] = 0.0
                    continue
                v = 1.0 if r == col else 0.0
                for k in range(col, r):
                    v -= chol[r, k] * r_fac[j, k, col]
                r_fac[j, r, col] = v / chol[r, r]
        s0 = colptr[j]
        m = colptr[j + 1] - s0
        if m == 0:
            continue
        if len(c) < m:
            c = np.empty((max(m, 2 * len(c)), b, b))
        # c = A[s, j]; L[s, j] = c D^-1 = c R^T R.
        for p in range(m):
            for r in range(b):
                for col in range(b):
                    c[p, r, col] = lower[s0 + p, r, col]
        for k in range(b):
            for col in range(b):
                v = 0.0
                for t in range(b):
                    v += r_fac[j, t, k] * r_fac[j, t, col]
                d_inv[k, col] = v
        for p in range(m):
            for r in range(b):
                for col in range(b):
                    acc = 0.0
                    for k in range(b):
                        acc += c[p, r, k] * d_inv[k, col]
                    lower[s0 + p, r, col] = acc
        # Schur update A[s_p, s_q] -= L[s_p, j] A[s_q, j]^T for p >= q; the rows of column s_q are
        # found through a mark array (each s_p with p > q is in s_q's pattern: the pattern is a clique).
        for q in range(m):
            target = rows[s0 + q]
            _subtract_abt(diag[target], lower[s0 + q], c[q])
            if q + 1 == m:
                continue
            for k in range(colptr[target], colptr[target + 1]):
                mark[rows[k]] = k
            for p in range(q + 1, m):
                _subtract_abt(lower[mark[rows[s0 + p]]], lower[s0 + p], c[q])
            for k in range(colptr[target], colptr[target + 1]):
                mark[rows[k]] = -1
    return r_fac, -1


# Blocks per chunk of the kept columns' pool: a node's copy wastes less than one chunk.
_KEEP_CHUNK = 64


@njit(cache=True, nogil=True)
def _common_depth(parent, depth, i, j):
    """Elimination-tree depth of the lowest common ancestor of positions i and j; -1 in different trees."""
    a = i
    c = j
    while depth[a] > depth[c]:
        a = parent[a]
    while depth[c] > depth[a]:
        c = parent[c]
    while a != c and a >= 0:
        a = parent[a]
        c = parent[c]
    return depth[a] if a >= 0 else -1


@njit(cache=True, nogil=True)
def _buckets(key, n):
    """Items ``0 .. len(key) - 1`` grouped by their key in [0, n) (a negative key: none), ascending in a group.

    Returns (ptr (n + 1,), items): the items of key k are ``items[ptr[k]:ptr[k + 1]]`` (a counting sort).
    """
    ptr = np.zeros(n + 1, dtype=np.int64)
    for q in range(len(key)):
        if key[q] >= 0:
            ptr[key[q] + 1] += 1
    for t in range(n):
        ptr[t + 1] += ptr[t]
    items = np.empty(max(ptr[n], 1), dtype=np.int64)
    fill = ptr[:n].copy()
    for q in range(len(key)):
        k = key[q]
        if k >= 0:
            items[fill[k]] = q
            fill[k] += 1
    return ptr, items


@njit(cache=True, nogil=True)
def selected_path_products(colptr, rows, lblocks, r_fac, parent, depth, pi, pj):
    """Blocks ``S[pi[e], pj[e]]`` (elimination positions) without storing every root path.

    Parameters
    ----------
    colptr, rows : the factor's column patterns (elimination positions; the
        rows of column q are ``rows[colptr[q]:colptr[q + 1]]``, all ancestors of q).
    lblocks : (nnz, b, b) the blocks ``L[rows[k], q]``.
    r_fac : (n, b, b) ``R_q`` with ``D_q^-1 = R_q^T R_q``.
    parent : (n,) parent position in the elimination tree, -1 for roots.
    depth : (n,) elimination-tree depth of each position (roots 0).
    pi, pj : (P,) positions of the block rows and columns asked for.

    Returns
    -------
    out : (P, b, b) ``S[pi[e], pj[e]] = sum_t (R_k L^-1[k, pi[e]])^T (R_k L^-1[k, pj[e]])``
        over the common ancestors k (depths t = 0 .. depth of the lowest common
        ancestor), summed in that order.

    The columns ``V_q = R L^-1[:, q]`` along root paths follow from
    ``L^-1 L = I``: ``V_q[t] = -sum_{m in struct(q)} V_m[t] L[m, q]`` (V_m
    zero below m's own depth) and ``V_q[depth q] = R_q``.  The former
    version computed all of them top down and kept them (26.3 M blocks,
    1.9 GB on the graph below); here the tree is walked depth
    first: ``V_q`` needs only its ancestors' columns (``struct(q)`` are
    ancestors), which are exactly the ones on the walk's stack, so one
    buffer of ``(D + 1)(D + 2) / 2`` blocks for tree depth D holds them (the
    column at depth d in slot ``d(d + 1) / 2``).  A block asked for is
    summed when the walk reaches the later of its two nodes; the earlier
    one's column is copied aside when visited, only as deep as its pairs'
    common ancestors reach, and freed after the visit of its last partner.
    On the 100,000-scan log's map-gate graph (33,332 nodes, depth up to
    1,192, 20,027 pairs) the process of one call peaks at 0.80 GB instead of
    2.38 GB with all 26.3 M path blocks kept (0.93 GB when every copy,
    4.5 M blocks, lived to the end), in 29 s against 32-39 s.
    """
    n = len(depth)
    count = len(pi)
    b = r_fac.shape[1]
    out = np.zeros((count, b, b))
    if n == 0:
        return out
    # Depth-first preorder of the elimination tree (children ascending, roots ascending).
    nchild, child = _buckets(parent, n)
    preorder = np.empty(n, dtype=np.int64)
    todo = np.empty(n, dtype=np.int64)
    top = 0
    for q in range(n - 1, -1, -1):
        if parent[q] < 0:
            todo[top] = q
            top += 1
    t_visit = 0
    while top > 0:
        top -= 1
        q = todo[top]
        preorder[t_visit] = q
        t_visit += 1
        for k in range(nchild[q + 1] - 1, nchild[q] - 1, -1):
            todo[top] = child[k]
            top += 1
    visit = np.empty(n, dtype=np.int64)
    for t in range(n):
        visit[preorder[t]] = t
    # Each pair is summed at its later node's visit; the earlier node keeps a copy as deep as needed,
    # until the visit of its last partner.
    common = np.empty(count, dtype=np.int64)
    late = np.empty(count, dtype=np.int64)
    keep = np.zeros(n, dtype=np.int64)
    last = np.full(n, -1, dtype=np.int64)
    for e in range(count):
        i = pi[e]
        j = pj[e]
        common[e] = _common_depth(parent, depth, i, j)
        if visit[i] >= visit[j]:
            late[e] = i
            early = j
        else:
            late[e] = j
            early = i
        if i != j:
            if common[e] + 1 > keep[early]:
                keep[early] = common[e] + 1
            if visit[late[e]] > last[early]:
                last[early] = visit[late[e]]
    # The copies live in chunks of _KEEP_CHUNK blocks from one pool, each chunk back on a free list
    # once its node's last partner is done; the pool is as large as the most chunks alive at once.
    chunks = np.zeros(n, dtype=np.int64)
    chunk_at = np.zeros(n + 1, dtype=np.int64)
    for q in range(n):
        chunks[q] = (keep[q] + _KEEP_CHUNK - 1) // _KEEP_CHUNK
        chunk_at[q + 1] = chunk_at[q] + chunks[q]
    table = np.zeros(max(chunk_at[n], 1), dtype=np.int64)
    done_at, done = _buckets(last, n)
    alive = 0
    most = 0
    for t in range(n):
        alive += chunks[preorder[t]]
        if alive > most:
            most = alive
        for k in range(done_at[t], done_at[t + 1]):
            alive -= chunks[done[k]]
    pool = np.zeros((max(most, 1) * _KEEP_CHUNK, b, b))
    free = np.arange(max(most, 1))[::-1].copy()
    free_top = most
    by_late, pairs_at = _buckets(late, n)
    deepest = 0
    for q in range(n):
        if depth[q] > deepest:
            deepest = depth[q]
    stack = np.zeros(((deepest + 1) * (deepest + 2) // 2, b, b))
    flat = stack.reshape(stack.shape[0] * b, b)
    for t_visit in range(n):
        q = preorder[t_visit]
        slot_q = depth[q] * (depth[q] + 1) // 2
        row_q = slot_q * b
        # The slot held a node of the same depth in another branch: start from zero as a fresh column.
        for rr in range((depth[q] + 1) * b):
            for c in range(b):
                flat[row_q + rr, c] = 0.0
        for k in range(colptr[q], colptr[q + 1]):
            m = rows[k]
            row_m = depth[m] * (depth[m] + 1) // 2 * b
            span = (depth[m] + 1) * b
            if b == 3:
                # The pose graph's case, with the block in registers (44 -> 15 s on the 100,000-scan log).
                l00, l01, l02 = lblocks[k, 0, 0], lblocks[k, 0, 1], lblocks[k, 0, 2]
                l10, l11, l12 = lblocks[k, 1, 0], lblocks[k, 1, 1], lblocks[k, 1, 2]
                l20, l21, l22 = lblocks[k, 2, 0], lblocks[k, 2, 1], lblocks[k, 2, 2]
                for rr in range(span):
                    x0 = flat[row_m + rr, 0]
                    x1 = flat[row_m + rr, 1]
                    x2 = flat[row_m + rr, 2]
                    flat[row_q + rr, 0] -= x0 * l00 + x1 * l10 + x2 * l20
                    flat[row_q + rr, 1] -= x0 * l01 + x1 * l11 + x2 * l21
                    flat[row_q + rr, 2] -= x0 * l02 + x1 * l12 + x2 * l22
            else:
                for rr in range(span):
                    for c in range(b):
                        acc = 0.0
                        for s in range(b):
                            acc += flat[row_m + rr, s] * lblocks[k, s, c]
                        flat[row_q + rr, c] -= acc
        stack[slot_q + depth[q]] = r_fac[q]
        for c in range(chunks[q]):
            free_top -= 1
            table[chunk_at[q] + c] = free[free_top]
        for t in range(keep[q]):
            pool[table[chunk_at[q] + t // _KEEP_CHUNK] * _KEEP_CHUNK + t % _KEEP_CHUNK] = stack[slot_q + t]
        for idx in range(by_late[q], by_late[q + 1]):
            e = pairs_at[idx]
            d = common[e]
            if d < 0:
                continue
            i = pi[e]
            j = pj[e]
            for t in range(d + 1):
                # Rows of V_i and V_j: the stack for q itself, the copy for the earlier node.
                if i == q:
                    vi = stack[slot_q + t]
                else:
                    vi = pool[table[chunk_at[i] + t // _KEEP_CHUNK] * _KEEP_CHUNK + t % _KEEP_CHUNK]
                if j == q:
                    vj = stack[slot_q + t]
                else:
                    vj = pool[table[chunk_at[j] + t // _KEEP_CHUNK] * _KEEP_CHUNK + t % _KEEP_CHUNK]
                for r in range(b):
                    for cc in range(b):
                        acc = 0.0
                        for s in range(b):
                            acc += vi[s, r] * vj[s, cc]
                        out[e, r, cc] += acc
        for k in range(done_at[t_visit], done_at[t_visit + 1]):
            g = done[k]
            for c in range(chunks[g]):
                free[free_top] = table[chunk_at[g] + c]
                free_top += 1
    return out
