"""Compiled loops of the selected inverse (numba, cached on disk).

Why compiled code here: the columns of ``L^-1`` along their root paths
(:mod:`closurecheck.graph.selected_inverse`, step 3) are a recursion over
each node's column pattern and its ancestors' depths.  The numpy
formulation ran it one tree depth at a time, padded to the widest pattern
and the deepest node of the graph: on the 100,000-scan log's map-gate graph
(33,332 nodes, depth up to 1,192, patterns up to 599 blocks) that held
39.8 M path blocks instead of the 26.3 M that exist, and one call took
451.5 s in verify().  The loops below touch only the blocks that exist.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def root_path_columns(colptr, rows, lblocks, r_fac, depth, by_depth):
    """Columns of ``R L^-1`` on their root paths, unpadded.

    Parameters
    ----------
    colptr, rows : the factor's column patterns (elimination positions; the
        rows of column q are ``rows[colptr[q]:colptr[q + 1]]``, all ancestors of q).
    lblocks : (nnz, b, b) the blocks ``L[rows[k], q]``.
    r_fac : (n, b, b) ``R_q`` with ``D_q^-1 = R_q^T R_q``.
    depth : (n,) elimination-tree depth of each position (roots 0).
    by_depth : (n,) positions ordered so that every ancestor comes first.

    Returns
    -------
    paths : (offset[n], b, b) with ``paths[offset[q] + t]`` = ``R_k L^-1[k, q]``
        for the ancestor k of q at depth t (``t = depth[q]``: k = q).
    offset : (n + 1,) start of each position's path.
    """
    n = len(depth)
    b = r_fac.shape[1]
    offset = np.empty(n + 1, dtype=np.int64)
    offset[0] = 0
    for q in range(n):
        offset[q + 1] = offset[q] + depth[q] + 1
    paths = np.zeros((offset[n], b, b))
    flat = paths.reshape(offset[n] * b, b)  # a path is a (depth + 1) * b by b matrix
    for idx in range(n):
        q = by_depth[idx]
        row_q = offset[q] * b
        # L^-1 L = I: V_q[t] = -sum_{m in struct(q)} V_m[t] L[m, q] (V_m is zero below m's own depth),
        # so row by row: V_q's rows minus V_m's rows times the b x b block.
        for k in range(colptr[q], colptr[q + 1]):
            m = rows[k]
            row_m = offset[m] * b
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
        paths[offset[q] + depth[q]] = r_fac[q]
    return paths, offset


@njit(cache=True, nogil=True)
def path_products(paths, offset, depth, parent, pi, pj):
    """Blocks ``S[pi[k], pj[k]]`` (elimination positions): sums over the two nodes' common ancestors.

    ``S = L^-T D^-1 L^-1``, so ``S[i, j] = sum_k (R_k L^-1[k, i])^T (R_k
    L^-1[k, j])`` over the ancestors k of both, the depths 0 .. depth of the
    lowest common ancestor (none for nodes in different trees).
    """
    count = len(pi)
    b = paths.shape[1]
    out = np.zeros((count, b, b))
    for e in range(count):
        i = pi[e]
        j = pj[e]
        a = i
        c = j
        while depth[a] > depth[c]:
            a = parent[a]
        while depth[c] > depth[a]:
            c = parent[c]
        while a != c and a >= 0:
            a = parent[a]
            c = parent[c]
        if a < 0:
            continue
        bi = offset[i]
        bj = offset[j]
        for t in range(depth[a] + 1):
            for r in range(b):
                for cc in range(b):
                    acc = 0.0
                    for s in range(b):
                        acc += paths[bi + t, s, r] * paths[bj + t, s, cc]
                    out[e, r, cc] += acc
    return out


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
