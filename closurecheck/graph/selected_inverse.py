"""Selected blocks of the inverse of a sparse symmetric positive definite block matrix.

The map gate needs 3x3 blocks of ``S = H^-1`` (H the gauge-fixed normal
matrix of a pose graph, one block per node): diagonal blocks and the cross
blocks of arbitrary node pairs.  Solving for whole block columns costs O(N)
per needed node, so O(N^2) when most nodes are needed.  Here instead:

1. the nodes are ordered by nested dissection (George, "Nested dissection of
   a regular finite element mesh", SIAM J. Numer. Anal. 10(2), 1973; the
   separators are middle levels of a breadth-first level structure from a
   pseudo-peripheral node, as in George and Liu, "Computer Solution of Large
   Sparse Positive Definite Systems", 1981).  Pose graphs are an odometry
   chain plus closures between nearby places, so separators stay small and
   the elimination tree stays shallow;
2. a block LDL^T factorisation ``H = L D L^T`` (L unit lower block
   triangular, D block diagonal) runs on the symbolic pattern of L, one
   elimination-tree level at a time (the columns of one level are
   independent);
3. column q of ``L^-1`` is non-zero only on the path from q to the root of
   the elimination tree, and follows from its parents' columns
   (``L^-1 L = I`` gives ``L^-1[:, q] = e_q - sum_{m in struct(q)}
   L^-1[:, m] L[m, q]``), so all of them are computed top down, one depth at
   a time;
4. ``S = L^-T D^-1 L^-1`` then gives any block as a sum over the common
   ancestors of the two nodes: ``S[i, j] = sum_k L^-1[k, i]^T D_k^-1
   L^-1[k, j]``.

Time is O(N * depth * front) and memory O(N * depth) blocks for N nodes,
elimination-tree depth ``depth`` and largest column pattern ``front``, instead
of N times the number of needed nodes.  Both grow slowly for the locally
connected graphs of a mapping run (measured on the graphs of
benchmarks/verification_scaling.py: depth 29 at 1,667 nodes, 64 at 6,667).
A graph whose edges join random far-apart nodes (an expander) has large
separators and a deep tree; the map gate never builds one, since H holds
only odometry and verified closures.

Blocks are ``b x b`` with ``b`` the number of variables per node (3 for
SE(2) poses); node ``k`` holds variables ``b*k .. b*k + b - 1``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

# Subgraphs of at most this many nodes are not dissected further (their
# elimination-tree paths are at most this long).
_LEAF_NODES = 16
# Pairs per batch when summing over common ancestors (bounds the temporary
# arrays to a few tens of MB).
_PAIR_BATCH = 2048


@dataclass(frozen=True, eq=False)
class SparseInverse:
    """Factored form of ``S = H^-1`` from which any ``b x b`` block is a short sum.

    ``scaled[q, t]`` holds ``R_k L^-1[k, q]`` for the ancestor ``k =
    ancestor[q, t]`` of node q at elimination-tree depth t (root: t = 0;
    ``D_k^-1 = R_k^T R_k``); for t deeper than q itself ``ancestor[q, t]`` is
    -1 and ``scaled[q, t]`` is zero.  Use :meth:`blocks` and :meth:`diagonal`.
    """

    block_size: int
    ancestor: np.ndarray  # (n, T) int64
    scaled: np.ndarray  # (n, T, b, b)

    def blocks(self, rows, cols) -> np.ndarray:
        """``S[rows[k], cols[k]]`` (block row and column are node indices of H) as a (P, b, b) array."""
        rows = np.asarray(rows, dtype=np.int64).ravel()
        cols = np.asarray(cols, dtype=np.int64).ravel()
        n = len(self.ancestor)
        if rows.shape != cols.shape:
            raise ValueError("rows and cols must have the same length")
        if len(rows) and (min(rows.min(), cols.min()) < 0 or max(rows.max(), cols.max()) >= n):
            raise ValueError("node index out of range")
        b = self.block_size
        out = np.empty((len(rows), b, b))
        # The common ancestors of two nodes are a prefix of both root paths (root first): count them, and
        # batch pairs with similar counts so each batch sums over few depths.
        anc_r = self.ancestor[rows]
        common = np.count_nonzero((anc_r == self.ancestor[cols]) & (anc_r >= 0), axis=1)
        by_common = np.argsort(common, kind="stable")
        for start in range(0, len(rows), _PAIR_BATCH):
            sel = by_common[start:start + _PAIR_BATCH]
            t_len = int(common[sel].max())
            r, c = rows[sel], cols[sel]
            if t_len == 0:
                out[sel] = 0.0
                continue
            inside = np.arange(t_len)[None, :] < common[sel][:, None]
            vr = (self.scaled[r, :t_len] * inside[:, :, None, None]).reshape(len(r), t_len * b, b)
            out[sel] = np.swapaxes(vr, 1, 2) @ self.scaled[c, :t_len].reshape(len(c), t_len * b, b)
        return out

    def diagonal(self, nodes=None) -> np.ndarray:
        """Diagonal blocks ``S[q, q]`` for ``nodes`` (default: all) as an (M, b, b) array."""
        nodes = np.arange(len(self.ancestor)) if nodes is None else np.asarray(nodes, dtype=np.int64).ravel()
        if len(nodes) and (nodes.min() < 0 or nodes.max() >= len(self.ancestor)):
            raise ValueError("node index out of range")
        b = self.block_size
        t_len = self.scaled.shape[1]
        out = np.empty((len(nodes), b, b))
        # Rows below a node's own depth are zero, so every stored row of its path counts.
        for start in range(0, len(nodes), _PAIR_BATCH):
            v = self.scaled[nodes[start:start + _PAIR_BATCH]].reshape(-1, t_len * b, b)
            out[start:start + _PAIR_BATCH] = np.swapaxes(v, 1, 2) @ v
        return out


def _node_graph(h, b):
    """Symmetric node adjacency (CSR, no diagonal) of a ``b``-block matrix."""
    coo = h.tocoo()
    n = h.shape[0] // b
    i, j = coo.row // b, coo.col // b
    off = i != j
    a = sp.csr_matrix((np.ones(np.count_nonzero(off)), (i[off], j[off])), shape=(n, n))
    a = ((a + a.T) > 0).astype(np.int8).tocsr()
    a.sort_indices()
    return a


def _subgraph(indptr, indices, nodes, local):
    """CSR adjacency among ``nodes`` (local numbering); ``local`` is a scratch array of -1 over all nodes."""
    local[nodes] = np.arange(len(nodes))
    starts = indptr[nodes]
    lens = indptr[nodes + 1] - starts
    total = int(lens.sum())
    offsets = np.repeat(starts - np.concatenate(([0], np.cumsum(lens)[:-1])), lens)
    cols = local[indices[offsets + np.arange(total)]]
    keep = cols >= 0
    row = np.repeat(np.arange(len(nodes)), lens)[keep]
    ptr = np.zeros(len(nodes) + 1, dtype=np.int64)
    np.cumsum(np.bincount(row, minlength=len(nodes)), out=ptr[1:])
    local[nodes] = -1
    return sp.csr_matrix((np.ones(len(row)), cols[keep], ptr), shape=(len(nodes), len(nodes)))


def nested_dissection_order(adjacency, leaf_nodes: int = _LEAF_NODES) -> np.ndarray:
    """Elimination order (node indices, first eliminated first) by nested dissection.

    ``adjacency`` is a symmetric sparse matrix (its pattern is the graph).
    Each connected subgraph larger than ``leaf_nodes`` is split by the
    middle level of a breadth-first level structure (shrunk to the nodes
    touching the next level); both halves are ordered first, the separator
    last.  The level structure is rooted at a node of the outermost level of
    the parent's structure (a far end of the subgraph), found by one more
    breadth-first sweep at the top.
    """
    adjacency = sp.csr_matrix(adjacency)
    n = adjacency.shape[0]
    indptr, indices = adjacency.indptr.astype(np.int64), adjacency.indices.astype(np.int64)
    local = np.full(n, -1, dtype=np.int64)
    order: list[np.ndarray] = []
    # Work items, last in first out: ("split", nodes, root) orders a subgraph from a local root (None: find
    # one), ("emit", nodes, None) appends a separator.
    pending: list = [("split", np.arange(n), None)]
    while pending:
        kind, nodes, root = pending.pop()
        if kind == "emit" or len(nodes) <= leaf_nodes:
            order.append(nodes)
            continue
        sub = _subgraph(indptr, indices, nodes, local)
        if root is None:
            first_sweep = csgraph.shortest_path(sub, method="D", unweighted=True, indices=0)
            root = int(np.argmax(np.where(np.isfinite(first_sweep), first_sweep, -1.0)))
        dist = csgraph.shortest_path(sub, method="D", unweighted=True, indices=root)
        reached = np.isfinite(dist)
        if not reached.all():
            # Another connected component: ordered on its own.
            pending.append(("split", nodes[~reached], None))
        dist = np.where(reached, dist, -1).astype(np.int64)
        counts = np.bincount(dist[reached])
        if len(counts) < 3:
            order.append(nodes[reached])
            continue
        k = int(np.searchsorted(np.cumsum(counts), np.count_nonzero(reached) / 2))
        k = min(max(k, 1), len(counts) - 2)
        level = dist == k
        touches_next = np.asarray(sub @ (dist == k + 1).astype(float)).ravel() > 0
        sep = level & touches_next
        first = reached & ((dist < k) | (level & ~touches_next))
        second = dist > k
        # Roots of the halves: their nodes farthest from this root (the far end, the rim of the ball).
        root_second = int(np.argmax(dist[second]))
        root_first = int(np.argmax(dist[first]))
        # Popped last in first out: first half, then second half, then the separator.
        pending.append(("emit", nodes[sep], None))
        pending.append(("split", nodes[second], root_second))
        pending.append(("split", nodes[first], root_first))
    return np.concatenate(order) if order else np.zeros(0, dtype=np.int64)


def _symbolic(adjacency, order):
    """Column patterns of the block factor in elimination order.

    Returns (struct (n, m_max) int64 padded with n, counts (n,), parent (n,)
    with -1 for roots); entries are elimination positions.
    """
    n = adjacency.shape[0]
    perm = adjacency[order][:, order].tocsr()
    perm.sort_indices()
    indptr, indices = perm.indptr, perm.indices.astype(np.int64)
    children: list[list[int]] = [[] for _ in range(n)]
    struct: list[np.ndarray] = [None] * n  # type: ignore[list-item]
    parent = np.full(n, -1, dtype=np.int64)
    for j in range(n):
        nb = indices[indptr[j]:indptr[j + 1]]
        parts = [nb[nb > j]]
        for c in children[j]:
            sc = struct[c]
            parts.append(sc[1:])  # struct of a child starts with j, its parent
        s = parts[0] if len(parts) == 1 else np.unique(np.concatenate(parts))
        struct[j] = s
        if len(s):
            parent[j] = s[0]
            children[int(s[0])].append(j)
    counts = np.fromiter((len(s) for s in struct), dtype=np.int64, count=n)
    m_max = int(counts.max()) if n else 0
    padded = np.full((n, max(m_max, 1)), n, dtype=np.int64)
    for j in range(n):
        padded[j, :counts[j]] = struct[j]
    return padded, counts, parent


def _heights_and_depths(parent):
    n = len(parent)
    height = np.zeros(n, dtype=np.int64)
    for j in range(n):  # parents come after their children
        p = parent[j]
        if p >= 0 and height[p] < height[j] + 1:
            height[p] = height[j] + 1
    depth = np.zeros(n, dtype=np.int64)
    for j in range(n - 1, -1, -1):
        p = parent[j]
        if p >= 0:
            depth[j] = depth[p] + 1
    return height, depth


def _factor(h, b, order, struct, counts, height):
    """Block LDL^T in elimination order: returns (D^-1 (n, b, b), L blocks (n, m_max, b, b))."""
    n, m_max = struct.shape
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)
    # Flat block slots: 0..n-1 diagonal of each column, n a discarded dummy, then n + 1 + j * m_max + r for
    # the block (struct[j, r], j).
    valid = np.arange(m_max)[None, :] < counts[:, None]
    cols = np.repeat(np.arange(n, dtype=np.int64), counts)
    keys = cols * n + struct[valid]  # sorted: columns ascending, rows ascending within a column
    flat_of_key = n + 1 + np.flatnonzero(valid.ravel())

    def slot(row, col):
        """Slot of block (row, col), row > col in elimination order (both present on the pattern)."""
        return flat_of_key[np.searchsorted(keys, col * n + row)]

    coo = h.tocoo()
    pr, pc = position[coo.row // b], position[coo.col // b]
    low = pr >= pc
    pr, pc = pr[low], pc[low]
    target = pc.copy()
    off = pr != pc
    target[off] = slot(pr[off], pc[off])
    flat = (target * b + coo.row[low] % b) * b + coo.col[low] % b
    store = np.bincount(flat, weights=coo.data[low], minlength=(n + 1 + n * m_max) * b * b).reshape(-1, b, b)

    d_inv = np.empty((n, b, b))
    lblocks = np.zeros((n, m_max, b, b))
    by_height = np.argsort(height, kind="stable")
    bounds = np.searchsorted(height[by_height], np.arange(height.max() + 2 if n else 1))
    for lv in range(len(bounds) - 1):
        cols_j = by_height[bounds[lv]:bounds[lv + 1]]
        d = store[cols_j]
        d = 0.5 * (d + np.swapaxes(d, 1, 2))
        try:
            np.linalg.cholesky(d)
        except np.linalg.LinAlgError:
            raise np.linalg.LinAlgError("matrix is not positive definite") from None
        dinv = np.linalg.inv(d)
        d_inv[cols_j] = dinv
        m = int(counts[cols_j].max())
        if m == 0:
            continue
        s = struct[cols_j, :m]
        c = store[n + 1 + cols_j[:, None] * m_max + np.arange(m)[None, :]]  # A[s, j]; zero on padding
        lc = c @ dinv[:, None]
        lblocks[cols_j, :m] = lc
        # Schur update A[s_p, s_q] -= L[s_p, j] A[s_q, j]^T for p >= q, accumulated over the level's columns.
        p, q = np.tril_indices(m)
        upd = lc[:, p] @ np.swapaxes(c[:, q], 2, 3)
        rows, colq = s[:, p], s[:, q]
        ok = rows < n
        tgt = np.full(rows.shape, n, dtype=np.int64)
        diag = ok & (p == q)[None, :]
        tgt[diag] = rows[diag]
        off = ok & (p != q)[None, :]
        tgt[off] = slot(rows[off], colq[off])
        uniq, inv = np.unique(tgt.ravel(), return_inverse=True)
        flat = (inv[:, None] * (b * b) + np.arange(b * b)[None, :]).ravel()
        store[uniq] -= np.bincount(flat, weights=upd.ravel(), minlength=len(uniq) * b * b).reshape(-1, b, b)
    return d_inv, lblocks


def sparse_inverse(h, block_size: int) -> SparseInverse:
    """Factor a sparse symmetric positive definite block matrix for reading blocks of its inverse.

    Parameters
    ----------
    h : (b*n, b*n) scipy sparse matrix, symmetric positive definite
        (only its lower triangle in elimination order is read, so it must be
        exactly symmetric).
    block_size : b, variables per node.

    Returns a :class:`SparseInverse`; ``.blocks(rows, cols)`` gives
    ``(H^-1)[rows[k], cols[k]]`` blocks for any node pairs.  Raises
    ``numpy.linalg.LinAlgError`` when H is not positive definite.
    """
    b = int(block_size)
    h = sp.csc_matrix(h)
    if h.shape[0] != h.shape[1] or h.shape[0] % b:
        raise ValueError(f"matrix of shape {h.shape} is not square in blocks of {b}")
    n = h.shape[0] // b
    if n == 0:
        return SparseInverse(block_size=b, ancestor=np.zeros((0, 1), dtype=np.int64), scaled=np.zeros((0, 1, b, b)))
    adjacency = _node_graph(h, b)
    order = nested_dissection_order(adjacency)
    struct, counts, parent = _symbolic(adjacency, order)
    height, depth = _heights_and_depths(parent)
    d_inv, lblocks = _factor(h, b, order, struct, counts, height)

    # Columns of L^-1 on their root paths, indexed by depth, top down, each block scaled on the left by R_k
    # with D_k^-1 = R_k^T R_k (the recursion multiplies on the right, so the scaling carries through):
    # V_q[depth(q)] = R_q and V_q[t] = -sum_{m in struct(q)} V_m[t] L[m, q].  Then
    # S[i, j] = sum over common ancestors of V_i[t]^T V_j[t].
    r_fac = np.swapaxes(np.linalg.cholesky(d_inv), 1, 2)
    t_len = int(depth.max()) + 1 if n else 1
    w = np.zeros((n + 1, t_len, b, b))  # row n: zero column for padded struct entries
    anc = np.full((n + 1, t_len), -1, dtype=np.int64)
    by_depth = np.argsort(depth, kind="stable")
    bounds = np.searchsorted(depth[by_depth], np.arange(t_len + 1))
    for dl in range(t_len):
        q = by_depth[bounds[dl]:bounds[dl + 1]]
        if dl:
            anc[q, :dl] = anc[parent[q], :dl]
            acc = np.zeros((len(q), dl * b, b))
            for r in range(int(counts[q].max())):
                acc -= w[struct[q, r], :dl].reshape(len(q), dl * b, b) @ lblocks[q, r]
            w[q, :dl] = acc.reshape(len(q), dl, b, b)
        w[q, dl] = r_fac[q]
        anc[q, dl] = q
    w = w[:n]
    anc = anc[:n]
    has = anc >= 0
    # Report nodes in the caller's numbering.
    node_anc = np.where(has, order[np.maximum(anc, 0)], -1)
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)
    return SparseInverse(block_size=b, ancestor=node_anc[position], scaled=w[position])
