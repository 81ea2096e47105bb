"""Fill-reducing orderings (closurecheck.graph.ordering)."""

import numpy as np
import scipy.sparse as sp

from closurecheck.graph.ordering import nested_dissection_order, node_graph
from closurecheck.graph.selected_inverse import _symbolic


def _grid(k):
    """The k x k five-point grid graph (the model problem of nested dissection)."""
    path = sp.diags([np.ones(k - 1), np.ones(k - 1)], [-1, 1])
    eye = sp.identity(k)
    return (sp.kron(eye, path) + sp.kron(path, eye)).tocsr()


def test_order_is_a_deterministic_permutation():
    adj = _grid(20)
    order = nested_dissection_order(adj)
    assert np.array_equal(np.sort(order), np.arange(400))
    np.testing.assert_array_equal(nested_dissection_order(adj), order)


def test_nested_dissection_fills_a_grid_far_less_than_its_natural_order():
    # George (SIAM J. Numer. Anal. 10(2), 1973): on a k x k grid nested dissection leaves
    # O(k^2 log k) entries in the factor, the natural (banded) order O(k^3).  At k = 40 the band holds
    # about k^3 = 64,000; a correct nested dissection well under half of that.
    k = 40
    adj = _grid(k)
    natural = len(_symbolic(adj, np.arange(k * k))[1])
    nd = len(_symbolic(adj, nested_dissection_order(adj))[1])
    assert natural > 0.9 * k ** 3
    assert nd < 0.4 * natural


def test_edge_cases_and_the_diagonal():
    assert len(nested_dissection_order(sp.csr_matrix((0, 0)))) == 0
    np.testing.assert_array_equal(nested_dissection_order(sp.identity(1, format="csr")), [0])
    # Nodes without edges, and a stored diagonal, are ordered like any other node.
    adj = sp.csr_matrix(np.array([[1, 1, 0], [1, 1, 0], [0, 0, 5]]))
    assert sorted(nested_dissection_order(adj).tolist()) == [0, 1, 2]


def test_node_graph_joins_the_blocks_of_a_block_matrix():
    # Two 3 x 3 blocks coupled by one off-diagonal entry, a third block alone.
    h = sp.lil_matrix((9, 9))
    h.setdiag(1.0)
    h[1, 5] = 0.5
    a = node_graph(sp.csc_matrix(h), 3).toarray()
    np.testing.assert_array_equal(a, [[0, 1, 0], [1, 0, 0], [0, 0, 0]])
