"""Fill-reducing orderings of pose-graph matrices: one home for both factorisations.

The map gate's selected inverse (:mod:`closurecheck.graph.selected_inverse`)
and the optimiser's sparse Cholesky (:mod:`closurecheck.graph.solver`) both
eliminate the nodes of a pose graph in the order :func:`nested_dissection_order`
gives.  This module imports no compiled kernels (pymetis is imported when
an order is asked for), so the solver stays light to import.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp


def node_graph(h, b):
    """Symmetric node adjacency (CSR, no diagonal) of a ``b``-block matrix.

    ``h`` is a (b*n, b*n) scipy sparse matrix whose node k holds variables
    ``b*k .. b*k + b - 1``; the result is an (n, n) int8 CSR matrix with a 1
    where any entry of block (i, j) or (j, i), i != j, is stored.
    """
    coo = h.tocoo()
    n = h.shape[0] // b
    i, j = coo.row // b, coo.col // b
    off = i != j
    a = sp.csr_matrix((np.ones(np.count_nonzero(off)), (i[off], j[off])), shape=(n, n))
    a = ((a + a.T) > 0).astype(np.int8).tocsr()
    a.sort_indices()
    return a


def nested_dissection_order(adjacency) -> np.ndarray:
    """Elimination order (node indices, first eliminated first) by METIS's multilevel nested dissection.

    ``adjacency`` is a symmetric sparse matrix (its pattern is the graph;
    the diagonal is ignored).  METIS (Karypis and Kumar, "A fast and high
    quality multilevel scheme for partitioning irregular graphs", SIAM J.
    Sci. Comput. 20(1), 1998; ``METIS_NodeND`` through pymetis) finds small
    vertex separators on coarsened copies of the graph and refines them.
    Its random choices start from a fixed seed, so the order is the same
    in every process.

    Why METIS and not the breadth-first level structures this module used
    before (the middle level of a level structure from a far node as the
    separator): on the 100,000-scan log's map-gate graphs (33,332 nodes, the
    warehouse route driven about 30 times, so every level of a level
    structure crosses all the laps) METIS gave an elimination tree 627
    deep instead of 1,173 and 1.44 M factor blocks instead of 2.30 M; the
    factorisation took 2.2 s instead of 4.9 s and the walk 4.0 s instead of
    11.8 s on the first call (docs/performance.md, tenth round).

    Examples
    --------
    >>> import numpy as np, scipy.sparse as sp
    >>> path = sp.diags([np.ones(6), np.ones(6)], [-1, 1], format="csr")
    >>> order = nested_dissection_order(path)
    >>> sorted(order.tolist()) == list(range(7))
    True
    """
    import pymetis

    adjacency = sp.csr_matrix(adjacency)
    n = adjacency.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    adjacency = adjacency.copy()
    adjacency.setdiag(0)
    adjacency.eliminate_zeros()
    adjacency.sort_indices()
    perm, _ = pymetis.nested_dissection(adjacency=pymetis.CSRAdjacency(adjacency.indptr.astype(np.int64),
                                                                       adjacency.indices.astype(np.int64)))
    return np.asarray(perm, dtype=np.int64)
