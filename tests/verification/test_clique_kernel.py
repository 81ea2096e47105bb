"""The Nemhauser-Trotter split that proves the maximum clique of long logs' consistency graphs.

Checked against things outside the search itself:

* the linear relaxation of minimum vertex cover solved by scipy's linear
  programming (``scipy.optimize.linprog``, HiGHS): the split's half-integral
  solution is feasible and has the optimal value (Nemhauser and Trotter,
  Math. Programming 8, 1975: an optimal solution with values in {0, 1/2, 1}
  exists; ours is read off a maximum matching of the bipartite double cover);
* networkx (reference library): ``max_weight_clique(weight=None)`` of the
  complement gives the clique size;
* the same search with the split switched off (the search the project
  shipped before): same members, same exact and canonical flags, on graphs
  shaped like PCM conflict graphs (closures that each conflict with a few
  others, look-alikes that conflict with many), where the split proves the
  maximum without searching.
"""

import networkx as nx
import numpy as np
import pytest
import scipy.optimize
import scipy.sparse

from closurecheck.verification import clique as clique_module
from closurecheck.verification.clique import CliqueOptions, max_clique, max_clique_of_conflicts


def pcm_like_conflicts(rng, n, outliers, pair_p, hub_p):
    """Symmetric boolean conflicts: n closures, the first ``outliers`` are look-alikes.

    Correct closures conflict with each other rarely (probability ``pair_p``,
    as a 0.99 test fails 1% of correct pairs); look-alikes conflict with a
    share ``hub_p`` of all others.
    """
    upper = np.triu(rng.random((n, n)) < pair_p, 1)
    hubs = rng.random((outliers, n)) < hub_p
    upper[:outliers] |= np.triu(hubs, 1)
    c = upper | upper.T
    np.fill_diagonal(c, False)
    return c


def without_split(monkeypatch):
    monkeypatch.setattr(clique_module, "_kernel_search", lambda *args: None)


@pytest.mark.parametrize("seed", range(6))
def test_split_is_an_optimal_lp_solution(seed):
    rng = np.random.default_rng(seed)
    c = pcm_like_conflicts(rng, 70, 8, 0.03, 0.3)
    zero, half = clique_module._lp_split(scipy.sparse.csr_array(c))
    x = np.where(zero, 0.0, np.where(half, 0.5, 1.0))
    i, j = np.nonzero(np.triu(c, 1))
    assert np.all(x[i] + x[j] >= 1.0)  # a fractional vertex cover
    # min sum x subject to x_i + x_j >= 1 on every conflict, 0 <= x <= 1.
    a_ub = np.zeros((len(i), len(x)))
    a_ub[np.arange(len(i)), i] = -1.0
    a_ub[np.arange(len(i)), j] = -1.0
    lp = scipy.optimize.linprog(np.ones(len(x)), A_ub=a_ub, b_ub=-np.ones(len(i)), bounds=(0.0, 1.0),
                                method="highs")
    assert lp.status == 0
    assert x.sum() == pytest.approx(lp.fun, abs=1e-9)


@pytest.mark.parametrize("seed", range(8))
def test_split_gives_the_search_without_it(seed, monkeypatch):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(40, 90))
    c = pcm_like_conflicts(rng, n, int(rng.integers(2, 12)), float(rng.uniform(0.005, 0.04)),
                           float(rng.uniform(0.1, 0.5)))
    conflicts = scipy.sparse.csr_array(c)
    ours = max_clique_of_conflicts(conflicts)
    dense = max_clique(~c & ~np.eye(n, dtype=bool))
    g = nx.from_numpy_array((~c & ~np.eye(n, dtype=bool)).astype(int))
    _, nx_size = nx.max_weight_clique(g, weight=None)
    without_split(monkeypatch)
    before = max_clique_of_conflicts(conflicts)
    assert ours.exact and before.exact
    assert ours.size == before.size == nx_size
    assert ours.members.tolist() == before.members.tolist() == dense.members.tolist()
    assert ours.canonical == before.canonical
    assert ours.expansions <= before.expansions


def test_split_proves_what_the_search_cannot_within_budget(monkeypatch):
    # 600 closures, 30 look-alikes: with 3 expansions the search alone stops
    # one short of a proof; the split proves the maximum without searching.
    rng = np.random.default_rng(0)
    c = pcm_like_conflicts(rng, 600, 30, 0.001, 0.4)
    conflicts = scipy.sparse.csr_array(c)
    tight = CliqueOptions(max_expansions=3)
    ours = max_clique_of_conflicts(conflicts, options=tight)
    assert ours.exact and ours.upper_bound == ours.size
    without_split(monkeypatch)
    cut = max_clique_of_conflicts(conflicts, options=tight)
    assert not cut.exact and cut.upper_bound > ours.size
    full = max_clique_of_conflicts(conflicts)  # the former search, generous budget
    assert full.exact and full.members.tolist() == ours.members.tolist()


def test_wide_components_skip_the_tie_phase_and_say_so():
    rng = np.random.default_rng(11)
    c = pcm_like_conflicts(rng, 120, 10, 0.03, 0.3)
    conflicts = scipy.sparse.csr_array(c)
    full = max_clique_of_conflicts(conflicts)
    capped = max_clique_of_conflicts(conflicts, options=CliqueOptions(tie_max_vertices=10))
    assert full.exact and full.canonical
    assert capped.exact and not capped.canonical
    assert capped.size == full.size
    assert not c[np.ix_(capped.members, capped.members)].any()


def test_budget_counts_work_on_wide_components_and_never_overshoots():
    # A 600-vertex component (wider than 512) that the split cannot settle:
    # each expansion there costs (600 / 512 rounded up)^2 = 4 units.
    rng = np.random.default_rng(1)
    c = pcm_like_conflicts(rng, 600, 30, 0.002, 0.4)
    conflicts = scipy.sparse.csr_array(c)
    generous = max_clique_of_conflicts(conflicts, options=CliqueOptions(max_expansions=200_000, canonical=False))
    assert generous.exact
    for budget in (0, 3, 41, 400):
        cut = max_clique_of_conflicts(conflicts, options=CliqueOptions(max_expansions=budget, canonical=False))
        assert cut.expansions <= budget
        assert not c[np.ix_(cut.members, cut.members)].any()
        assert cut.size <= generous.size <= cut.upper_bound
