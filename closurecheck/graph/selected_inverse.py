"""Selected blocks of the inverse of a sparse symmetric positive definite block matrix.

The map gate needs 3x3 blocks of ``S = H^-1`` (H the gauge-fixed normal
matrix of a pose graph, one block per node): diagonal blocks and the cross
blocks of arbitrary node pairs.  Solving for whole block columns costs O(N)
per needed node, so O(N^2) when most nodes are needed.  Here instead:

1. the nodes are ordered by nested dissection (George, "Nested dissection of
   a regular finite element mesh", SIAM J. Numer. Anal. 10(2), 1973), the
   separators found by METIS's multilevel scheme
   (:func:`nested_dissection_order`).  Pose graphs are an odometry chain
   plus closures between nearby places, so separators stay small and the
   elimination tree stays shallow;
2. a block LDL^T factorisation ``H = L D L^T`` (L unit lower block
   triangular, D block diagonal) runs on the symbolic pattern of L, stored
   column by column without padding, in one compiled right-looking loop;
3. column q of ``L^-1`` is non-zero only on the path from q to the root of
   the elimination tree, and follows from its ancestors' columns
   (``L^-1 L = I`` gives ``L^-1[:, q] = e_q - sum_{m in struct(q)}
   L^-1[:, m] L[m, q]``, every m in struct(q) an ancestor of q), so one
   depth-first walk of the tree computes them all while holding only the
   current node's ancestors (:mod:`closurecheck.graph._inverse_kernels`);
4. ``S = L^-T D^-1 L^-1`` then gives any block as a sum over the common
   ancestors of the two nodes: ``S[i, j] = sum_k L^-1[k, i]^T D_k^-1
   L^-1[k, j]``, summed when the walk reaches the later of the two nodes;
   the earlier one's column is kept aside until then, and only as deep as
   its pairs' common ancestors reach.  The blocks asked for must therefore
   be known before the walk (:func:`inverse_blocks` takes them as
   arguments).

Time is O(N * depth * front) for N nodes, elimination-tree depth
``depth`` and column pattern ``front``; memory is the factor, ``depth^2 / 2``
blocks of the walk's ancestor columns and the kept columns of the nodes
asked for, instead of N times the number of needed nodes (block columns
solved one by one) or all N columns along their root paths (O(N * depth)).
On the 100,000-scan log's map-gate graph (33,332 nodes, depth up to 1,192,
patterns up to 599 blocks, 20,027 pairs) the former numpy formulation,
padded to the widest pattern and the deepest node, held 20.0 M factor
blocks and 39.8 M path blocks (9.1 GB of the verify() process) and took
451.5 s for one call; stored unpadded, 2.3 M and 26.3 M (1.9 GB) and 30 s;
with the depth-first walk 2.3 M factor blocks, 0.71 M ancestor blocks and
the kept columns, freed after their last pair (the call's process at
0.80 GB instead of 2.38 GB), in 29 s (all with the former level-structure
ordering; with METIS's: depth 627 and 1.44 M factor blocks).  Depth
and fronts grow slowly for the locally
connected graphs of a mapping run (measured on the graphs of
benchmarks/verification_scaling.py: depth 29 at 1,667 nodes, 64 at 6,667).
A graph whose edges join random far-apart nodes (an expander) has large
separators and a deep tree; the map gate never builds one, since H holds
only odometry and verified closures.

Blocks are ``b x b`` with ``b`` the number of variables per node (3 for
SE(2) poses); node ``k`` holds variables ``b*k .. b*k + b - 1``.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ._inverse_kernels import block_ldl, selected_path_products
from .ordering import nested_dissection_order
from .ordering import node_graph as _node_graph


def _find_slots(colptr, rows, row, col):
    """Slots of the blocks (row, col) of the ragged pattern (positions, row > col); -1 where absent."""
    n = len(colptr) - 1
    # Rows ascend within a column and columns ascend, so col * n + row is sorted over the slots.
    keys = np.repeat(np.arange(n, dtype=np.int64), np.diff(colptr)) * n + rows
    want = col * n + row
    at = np.searchsorted(keys, want)
    at_c = np.minimum(at, max(len(keys) - 1, 0))
    found = (at < len(keys)) & (keys[at_c] == want) if len(keys) else np.zeros(len(want), dtype=bool)
    return np.where(found, at, -1)


def _symbolic(adjacency, order):
    """Column patterns of the block factor in elimination order.

    Returns (colptr (n + 1,), rows (nnz,) with the rows of column j in
    ``rows[colptr[j]:colptr[j + 1]]``, ascending, and parent (n,) with -1 for
    roots); entries are elimination positions.
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
            parts.append(struct[c][1:])  # struct of a child starts with j, its parent
        s = parts[0] if len(parts) == 1 else np.unique(np.concatenate(parts))
        struct[j] = s
        if len(s):
            parent[j] = s[0]
            children[int(s[0])].append(j)
    counts = np.fromiter((len(x) for x in struct), dtype=np.int64, count=n)
    colptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=colptr[1:])
    rows = np.concatenate(struct).astype(np.int64) if n else np.zeros(0, dtype=np.int64)
    return colptr, rows, parent


def _depths(parent):
    """Elimination-tree depth of each position (roots 0; parents come after their children)."""
    n = len(parent)
    depth = np.zeros(n, dtype=np.int64)
    for j in range(n - 1, -1, -1):
        p = parent[j]
        if p >= 0:
            depth[j] = depth[p] + 1
    return depth


def _factor(h, b, order, colptr, rows):
    """Block LDL^T in elimination order: (R (n, b, b) with D^-1 = R^T R, L blocks (nnz, b, b) on the pattern)."""
    n = len(order)
    nnz = len(rows)
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)
    coo = h.tocoo()
    pr, pc = position[coo.row // b], position[coo.col // b]
    low = pr >= pc
    pr, pc = pr[low], pc[low]
    # Slots 0..n-1: the diagonal blocks; n + k: the pattern's block k.
    target = pc.copy()
    off = pr != pc
    target[off] = n + _find_slots(colptr, rows, pr[off], pc[off])
    flat = (target * b + coo.row[low] % b) * b + coo.col[low] % b
    store = np.bincount(flat, weights=coo.data[low], minlength=(n + nnz) * b * b).reshape(-1, b, b)
    diag, lower = np.ascontiguousarray(store[:n]), np.ascontiguousarray(store[n:])
    del store
    r_fac, failed = block_ldl(colptr, rows, diag, lower)
    if failed >= 0:
        raise np.linalg.LinAlgError("matrix is not positive definite")
    return r_fac, lower


def inverse_blocks(h, block_size: int, rows, cols) -> np.ndarray:
    """Blocks ``(H^-1)[rows[k], cols[k]]`` of a sparse symmetric positive definite block matrix.

    Parameters
    ----------
    h : (b*n, b*n) scipy sparse matrix, symmetric positive definite
        (only its lower triangle in elimination order is read, so it must be
        exactly symmetric).
    block_size : b, variables per node.
    rows, cols : (P,) node indices (0 .. n - 1) of the blocks asked for;
        ``rows[k] == cols[k]`` asks for a diagonal block.

    Returns
    -------
    (P, b, b) array, block k ``(H^-1)[b*rows[k]:b*rows[k]+b, b*cols[k]:b*cols[k]+b]``.
    Raises ``numpy.linalg.LinAlgError`` when H is not positive definite.

    Examples
    --------
    >>> import numpy as np, scipy.sparse as sp
    >>> h = np.array([[4.0, 1, 0], [1, 3, 1], [0, 1, 2]])
    >>> s = inverse_blocks(sp.csc_matrix(h), 1, [0, 2, 1], [2, 0, 1])
    >>> bool(np.allclose(s[:, 0, 0], np.linalg.inv(h)[[0, 2, 1], [2, 0, 1]]))
    True
    """
    b = int(block_size)
    h = sp.csc_matrix(h)
    if h.shape[0] != h.shape[1] or h.shape[0] % b:
        raise ValueError(f"matrix of shape {h.shape} is not square in blocks of {b}")
    n = h.shape[0] // b
    rows = np.asarray(rows, dtype=np.int64).ravel()
    cols = np.asarray(cols, dtype=np.int64).ravel()
    if rows.shape != cols.shape:
        raise ValueError("rows and cols must have the same length")
    for nodes in (rows, cols):
        if len(nodes) and (nodes.min() < 0 or nodes.max() >= n):
            raise ValueError("node index out of range")
    if n == 0:
        return np.zeros((0, b, b))
    adjacency = _node_graph(h, b)
    order = nested_dissection_order(adjacency)
    colptr, frows, parent = _symbolic(adjacency, order)
    depth = _depths(parent)
    r_fac, lblocks = _factor(h, b, order, colptr, frows)
    position = np.empty(n, dtype=np.int64)
    position[order] = np.arange(n)
    # D_k^-1 = R_k^T R_k; the recursion multiplies on the right, so the scaling carries through.
    return selected_path_products(colptr, frows, lblocks, r_fac, parent, depth, position[rows], position[cols])
