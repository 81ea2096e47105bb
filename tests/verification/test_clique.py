"""Maximum clique: checked against networkx (reference library).

* networkx.algorithms.clique.max_weight_clique(G, weight=None) gives the
  clique number of each random graph.
* networkx.find_cliques enumerates all maximal cliques (Bron-Kerbosch); every
  maximum clique is maximal, so it yields the full set of optimal cliques and
  therefore the answer our documented tie rule must pick.
* networkx.core_number gives the core numbers.
"""

import networkx as nx
import numpy as np
import pytest
import scipy.sparse

from closurecheck.errors import InputError
from closurecheck.verification.clique import (
    CliqueOptions,
    core_numbers,
    heuristic_clique,
    max_clique,
)


def random_graph(rng, n, p):
    a = np.triu(rng.random((n, n)) < p, 1)
    return a | a.T


def is_clique(a, members):
    sub = a[np.ix_(members, members)]
    return bool(np.all(sub | np.eye(len(members), dtype=bool)))


def reference_choice(a, weights=None, rtol=1e-9):
    """The clique our tie rule names, found by exhaustive enumeration."""
    g = nx.from_numpy_array(a.astype(int))
    cliques = [tuple(sorted(c)) for c in nx.find_cliques(g)]
    omega = max(len(c) for c in cliques)
    best = [c for c in cliques if len(c) == omega]
    if weights is not None:
        top = max(weights[list(c)].sum() for c in best)
        best = [c for c in best if weights[list(c)].sum() >= top - rtol * max(1.0, abs(top))]
    return omega, min(best)


def random_cases(seed, count):
    rng = np.random.default_rng(seed)
    for _ in range(count):
        n = int(rng.integers(5, 61))
        p = float(rng.choice([0.1, 0.3, 0.5, 0.7, 0.9]))
        if p > 0.8:
            n = min(n, 40)  # keeps the reference enumeration of maximal cliques fast
        yield rng, n, p, random_graph(rng, n, p)


def test_size_matches_networkx_max_weight_clique():
    for _, n, p, a in random_cases(seed=11, count=60):
        res = max_clique(a)
        _, ref_weight = nx.max_weight_clique(nx.from_numpy_array(a.astype(int)), weight=None)
        assert res.exact
        assert res.size == ref_weight, (n, p)
        assert res.upper_bound == res.size
        assert is_clique(a, res.members)


def test_unweighted_tie_rule_is_lexicographically_smallest_maximum_clique():
    for _, n, p, a in random_cases(seed=12, count=50):
        res = max_clique(a)
        omega, ref = reference_choice(a)
        assert res.exact and res.canonical
        assert tuple(res.members.tolist()) == ref, (n, p)


def test_weighted_tie_rule_prefers_weight_then_indices():
    for rng, n, p, a in random_cases(seed=13, count=50):
        # Few distinct integer weights so that weight ties really happen.
        w = rng.integers(1, 4, n).astype(float)
        res = max_clique(a, weights=w)
        omega, ref = reference_choice(a, w)
        assert res.exact and res.canonical
        assert tuple(res.members.tolist()) == ref, (n, p)
        assert res.weight == pytest.approx(w[list(ref)].sum())


def test_weights_break_size_ties_only():
    # Triangle {0,1,2} and a disjoint edge {3,4} with huge weights: size wins.
    a = np.zeros((5, 5), dtype=bool)
    for i, j in [(0, 1), (1, 2), (0, 2), (3, 4)]:
        a[i, j] = a[j, i] = True
    res = max_clique(a, weights=[1, 1, 1, 100, 100])
    assert res.members.tolist() == [0, 1, 2]
    # Two triangles sharing nothing: the heavier one wins over the lower indices.
    b = np.zeros((6, 6), dtype=bool)
    for i, j in [(0, 1), (1, 2), (0, 2), (3, 4), (4, 5), (3, 5)]:
        b[i, j] = b[j, i] = True
    assert max_clique(b).members.tolist() == [0, 1, 2]
    assert max_clique(b, weights=[1, 1, 1, 1, 1, 2]).members.tolist() == [3, 4, 5]


def join(rng, sizes, p):
    """Random graphs on consecutive vertex blocks, every cross-block pair
    joined: the complement splits into (at least) one component per block."""
    n = sum(sizes)
    a = np.ones((n, n), dtype=bool)
    start = 0
    for m in sizes:
        a[start : start + m, start : start + m] = random_graph(rng, m, p)
        start += m
    np.fill_diagonal(a, False)
    perm = rng.permutation(n)
    return a[np.ix_(perm, perm)]


@pytest.mark.parametrize("weighted", [False, True])
def test_graphs_whose_complement_splits_follow_the_tie_rule(weighted):
    rng = np.random.default_rng(18)
    for _ in range(8):
        a = join(rng, rng.integers(1, 12, size=3), float(rng.choice([0.3, 0.6, 0.9])))
        w = rng.integers(1, 4, len(a)).astype(float) if weighted else None
        res = max_clique(a, weights=w)
        _, ref = reference_choice(a, w)
        assert res.exact and res.canonical
        assert tuple(res.members.tolist()) == ref


def test_tie_phase_budget_only_affects_canonical_flag():
    rng = np.random.default_rng(19)
    a = random_graph(rng, 60, 0.8)
    full = max_clique(a)
    quick = max_clique(a, options=CliqueOptions(tie_max_expansions=0))
    assert full.canonical and quick.exact and not quick.canonical
    assert quick.size == full.size and is_clique(a, quick.members)
    assert max_clique(a, options=CliqueOptions(tie_max_expansions=0)).members.tolist() == quick.members.tolist()


def test_heuristic_returns_a_clique_no_larger_than_the_maximum():
    for _, n, p, a in random_cases(seed=14, count=60):
        h = heuristic_clique(a)
        omega, _ = reference_choice(a)
        assert len(h.members) >= 1
        assert is_clique(a, h.members)
        assert h.size <= omega
        assert not h.canonical
        if h.exact:
            assert h.size == omega


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_heuristic_finds_a_planted_clique(seed):
    # A clique of 40 hidden among 200 vertices of a sparse random graph:
    # far larger than any clique the random part forms, so both the heuristic
    # and the exact search must return exactly the planted vertices.
    rng = np.random.default_rng(seed)
    n, k = 200, 40
    a = random_graph(rng, n, 0.1)
    planted = np.sort(rng.choice(n, k, replace=False))
    a[np.ix_(planted, planted)] = True
    np.fill_diagonal(a, False)
    h = heuristic_clique(a)
    assert h.members.tolist() == planted.tolist()
    assert max_clique(a).members.tolist() == planted.tolist()


def test_deterministic_and_representation_independent():
    rng = np.random.default_rng(15)
    a = random_graph(rng, 60, 0.5)
    w = rng.random(60)
    first = max_clique(a, weights=w)
    again = max_clique(a.copy(), weights=w.copy())
    sparse = max_clique(scipy.sparse.csr_array(a), weights=w)
    numeric = max_clique(a.astype(float) * 3.0, weights=w)
    for other in (again, sparse, numeric):
        assert other.members.tolist() == first.members.tolist()
        assert other.expansions == first.expansions
    # The canonical answer does not depend on the search order, so the
    # non-canonical run finds a clique of the same size and weight.
    loose = max_clique(a, weights=w, options=CliqueOptions(canonical=False))
    assert loose.size == first.size and loose.weight == pytest.approx(first.weight)


def test_budget_exhaustion_reports_inexact_valid_clique():
    rng = np.random.default_rng(16)
    a = random_graph(rng, 150, 0.7)
    full = max_clique(a)
    assert full.exact and full.expansions > 5
    cut = max_clique(a, options=CliqueOptions(max_expansions=5))
    assert not cut.exact and not cut.canonical
    assert cut.expansions <= 5
    assert is_clique(a, cut.members)
    assert cut.size <= full.size <= cut.upper_bound


def test_clique_deeper_than_python_recursion_limit():
    # Complete graph on 1050 vertices minus two edges among the highest
    # indices: the maximum clique has 1048 vertices and the lexicographic
    # phase has to descend through ~1000 levels.
    n = 1050
    a = np.ones((n, n), dtype=bool)
    np.fill_diagonal(a, False)
    for i, j in [(n - 3, n - 2), (n - 4, n - 1)]:
        a[i, j] = a[j, i] = False
    res = max_clique(a)
    assert res.exact and res.canonical
    assert res.members.tolist() == list(range(n - 2))


def test_core_numbers_match_networkx():
    for _, n, p, a in random_cases(seed=17, count=20):
        ref = nx.core_number(nx.from_numpy_array(a.astype(int)))
        assert core_numbers(a).tolist() == [ref[v] for v in range(n)]


def test_trivial_graphs():
    assert max_clique(np.zeros((0, 0), dtype=bool)).members.tolist() == []
    assert max_clique(np.zeros((3, 3), dtype=bool)).members.tolist() == [0]
    diag_only = np.eye(4, dtype=bool)  # self loops are ignored
    assert max_clique(diag_only).members.tolist() == [0]


@pytest.mark.parametrize(
    "adjacency, weights",
    [
        (np.array([[0, 1], [0, 0]]), None),  # not symmetric
        (np.zeros((2, 3)), None),  # not square
        (np.array([[0, np.nan], [np.nan, 0]]), None),
        (np.zeros((2, 2)), [1.0, -1.0]),  # negative weight
        (np.zeros((2, 2)), [1.0]),  # wrong length
    ],
)
def test_bad_input_raises_input_error(adjacency, weights):
    with pytest.raises(InputError):
        max_clique(adjacency, weights=weights)
