"""The compiled greedy start of the maximum-clique search, against the Python loop it replaces.

The compiled loop must take the same vertices in the same order and give the
same weight to the bit (closurecheck/verification/_clique_kernels.py).  The
reference is the former Python formulation, kept here; the greedy cliques
are also checked to be cliques of the complement by networkx
(``nx.complement`` and ``nx.is_clique`` would be the obvious call; the check
below is the definition: no conflict between two members).
"""

import networkx as nx
import numpy as np
import pytest
import scipy.sparse
import scipy.sparse.csgraph

from closurecheck.verification import clique as clique_module
from closurecheck.verification.clique import max_clique_of_conflicts
from tests.verification.test_clique_kernel import pcm_like_conflicts


def python_greedy(c, core, order, w, weighted):
    """The Python loop of clique._heuristic_conflicts before it was compiled (reference)."""
    n = c.shape[0]
    pos_order = order[::-1]
    pos = np.empty(n, dtype=np.intp)
    pos[pos_order] = np.arange(n)
    core_pos = core[pos_order]
    wpos = w[pos_order]
    best, best_size, best_w = [], 0, 0.0
    for p in range(min(n, clique_module._HEURISTIC_STARTS)):
        limit = int(core_pos[p]) + 1
        if limit < best_size or (limit == best_size and not weighted):
            break
        count = int(np.count_nonzero(core_pos >= max(best_size - 1, 0)))
        cand = np.zeros(n, dtype=bool)
        cand[:count] = True
        cand[p] = False
        v = pos_order[p]
        cand[pos[c.indices[c.indptr[v]:c.indptr[v + 1]]]] = False
        clique = [p]
        for u in np.flatnonzero(cand).tolist():
            if not cand[u]:
                continue
            clique.append(u)
            vu = pos_order[u]
            cand[pos[c.indices[c.indptr[vu]:c.indptr[vu + 1]]]] = False
        size = len(clique)
        weight = float(sum(wpos[q] for q in clique))
        if clique_module._better(size, weight, best_size, best_w, weighted):
            best, best_size, best_w = clique, size, weight
    return pos_order[best], best_size, best_w


def greedy_inputs(c):
    """Core numbers and the peeling order exactly as max_clique_of_conflicts computes them."""
    a = clique_module._adjacency_csr(c)
    core, order = clique_module._peel_conflicts(a)
    return a, core, order


@pytest.mark.parametrize("seed, n, outliers, pair_p, hub_p, weighted", [
    (0, 300, 30, 0.01, 0.7, False), (1, 800, 80, 0.02, 0.9, False), (2, 500, 0, 0.05, 0.0, False),
    (3, 400, 60, 0.01, 0.5, True), (4, 1, 0, 0.0, 0.0, False), (5, 60, 60, 0.3, 0.9, True),
])
def test_compiled_greedy_equals_the_python_loop(seed, n, outliers, pair_p, hub_p, weighted):
    rng = np.random.default_rng(seed)
    c = scipy.sparse.csr_array(pcm_like_conflicts(rng, n, outliers, pair_p, hub_p))
    a, core, order = greedy_inputs(c)
    w = rng.uniform(0.5, 2.0, n) if weighted else np.ones(n)
    got = clique_module._heuristic_conflicts(a, core, order, w, weighted)
    ref = python_greedy(a, core, order, w, weighted)
    assert np.array_equal(got[0], ref[0])
    assert got[1] == ref[1]
    assert got[2] == ref[2]  # same float, not just close
    members = got[0]
    # No two members conflict (the clique property of the complement).
    assert not c.toarray()[np.ix_(members, members)].any()


def test_greedy_is_a_lower_bound_of_networkx_maximum():
    # networkx (reference library): the greedy clique never beats the true maximum, and the exact
    # search's answer equals networkx's size.
    rng = np.random.default_rng(9)
    dense = pcm_like_conflicts(rng, 70, 10, 0.05, 0.6)
    a, core, order = greedy_inputs(scipy.sparse.csr_array(dense))
    _, greedy_size, _ = clique_module._heuristic_conflicts(a, core, order, np.ones(70), False)
    comp = nx.complement(nx.from_numpy_array(dense.astype(int)))
    _, best = nx.max_weight_clique(comp, weight=None)
    assert greedy_size <= best
    assert max_clique_of_conflicts(scipy.sparse.csr_array(dense)).size == best


@pytest.mark.parametrize("seed", range(6))
def test_symmetry_check_agrees_with_scipy_transpose(seed):
    # Reference: scipy.sparse's own transpose and comparison.
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 300))
    upper = scipy.sparse.random(n, n, density=0.05, random_state=seed, format="csr") > 0
    sym = scipy.sparse.csr_array(upper + upper.T)
    for a in (sym, scipy.sparse.csr_array(upper)):
        a = scipy.sparse.csr_array(a, dtype=bool)
        a.sort_indices()
        expected = (a != a.T).nnz == 0
        assert clique_module.is_symmetric(a.indptr, a.indices) == expected
    if sym.nnz:
        # One entry removed from a symmetric pattern breaks it.
        broken = sym.tolil()
        i, j = sym.nonzero()[0][0], sym.nonzero()[1][0]
        if i != j:
            broken[i, j] = False
            broken = scipy.sparse.csr_array(broken.tocsr())
            broken.eliminate_zeros()
            broken.sort_indices()
            assert not clique_module.is_symmetric(broken.indptr, broken.indices)


def scipy_split(c):
    """The Nemhauser-Trotter split as it was computed with scipy's matching and search (reference)."""
    from scipy.sparse.csgraph import breadth_first_order, maximum_bipartite_matching

    n = c.shape[0]
    match = maximum_bipartite_matching(c, perm_type="column")
    matched = np.flatnonzero(match >= 0)
    rows = np.concatenate([np.repeat(np.arange(n), np.diff(c.indptr)), n + match[matched],
                           np.full(n - len(matched), 2 * n)])
    cols = np.concatenate([n + c.indices, matched, np.flatnonzero(match < 0)])
    walk = scipy.sparse.csr_array((np.ones(len(rows), dtype=bool), (rows, cols)), shape=(2 * n + 1, 2 * n + 1))
    reached = np.zeros(2 * n + 1, dtype=bool)
    reached[breadth_first_order(walk, 2 * n, directed=True, return_predecessors=False)] = True
    twice_x = (~reached[:n]).astype(np.int8) + reached[n:2 * n]
    return twice_x == 0, twice_x == 1


@pytest.mark.parametrize("seed, n, density", [(0, 1, 0.0), (1, 50, 0.1), (2, 400, 0.01), (3, 300, 0.2),
                                               (4, 250, 0.002), (5, 120, 0.5)])
def test_matching_is_maximum_like_scipy(seed, n, density):
    # Reference: scipy.sparse.csgraph.maximum_bipartite_matching gives the matching's size; ours must be
    # a matching (each vertex at most once, along edges) of the same size, on asymmetric graphs too.
    rng = np.random.default_rng(seed)
    a = scipy.sparse.csr_array(rng.random((n, n + 7)) < density)
    a.sort_indices()
    match_l, match_r = clique_module.maximum_matching(a.indptr, a.indices, n + 7)
    ref = scipy.sparse.csgraph.maximum_bipartite_matching(a, perm_type="column")
    assert np.count_nonzero(match_l >= 0) == np.count_nonzero(ref >= 0)
    left = np.flatnonzero(match_l >= 0)
    assert np.array_equal(match_r[match_l[left]], left)
    assert np.all(a.toarray()[left, match_l[left]])
    assert np.count_nonzero(match_r >= 0) == len(left)


@pytest.mark.parametrize("seed, n, outliers, pair_p, hub_p", [
    (0, 300, 30, 0.01, 0.7), (1, 600, 60, 0.02, 0.9), (2, 500, 0, 0.004, 0.0), (3, 200, 100, 0.05, 0.5),
    (4, 80, 80, 0.3, 0.9),
])
def test_split_is_the_one_scipy_gave(seed, n, outliers, pair_p, hub_p):
    # The split depends only on the graph, not on the maximum matching found (Dulmage-Mendelsohn): the
    # compiled matching gives the masks of the former scipy formulation exactly.
    rng = np.random.default_rng(seed)
    c = scipy.sparse.csr_array(pcm_like_conflicts(rng, n, outliers, pair_p, hub_p))
    c.sort_indices()
    zero, half = clique_module._lp_split(c)
    ref_zero, ref_half = scipy_split(c)
    assert np.array_equal(zero, ref_zero)
    assert np.array_equal(half, ref_half)


@pytest.mark.parametrize("seed, n, outliers, pair_p, hub_p, weighted", [
    (0, 300, 30, 0.01, 0.7, False), (1, 200, 10, 0.05, 0.5, False), (2, 150, 20, 0.1, 0.3, True),
    (3, 2, 0, 0.0, 0.0, False),
])
def test_lex_improve_on_conflict_lists_equals_the_bitsets(seed, n, outliers, pair_p, hub_p, weighted):
    # Reference: the bitset formulation of clique._lex_improve (the complement's neighbour bitsets).
    # The start is a maximal clique grown from the largest indices down, so swaps towards smaller
    # indices exist.
    rng = np.random.default_rng(seed)
    c = scipy.sparse.csr_array(pcm_like_conflicts(rng, n, outliers, pair_p, hub_p))
    a = clique_module._adjacency_csr(c)
    w = rng.uniform(0.5, 2.0, n) if weighted else np.ones(n)
    dense = a.toarray()
    start = []
    for v in range(n - 1, -1, -1):
        if not dense[v, start].any():
            start.append(v)
    lists = clique_module._graph_of_conflicts(a, w, weighted)
    bitsets = clique_module._graph_of_conflicts(a, w, weighted)
    assert bitsets.nbr is not None and lists._nbr is None
    members = [int(p) for p in lists.pos[start]]
    weight = sum(lists.wpos[p] for p in members)
    min_weight = weight - 1e-9 * max(1.0, abs(weight))
    got = clique_module._lex_improve(lists, members, min_weight)
    ref = clique_module._lex_improve(bitsets, members, min_weight)
    assert lists._nbr is None  # the conflict-list scan never built the bitsets
    assert got == ref
    found = np.sort(lists.order[got])
    assert not dense[np.ix_(found, found)].any()
    if seed == 0:
        assert not np.array_equal(found, np.sort(start))  # swaps happened
