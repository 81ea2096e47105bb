"""The windowed, sparse PCM test against the exhaustive dense formulation.

The verification stage tests only the closure pairs whose PCM cycle runs
through at most ``pair_window_m`` of odometry on each side and keeps the
failing pairs as a sparse conflict graph; its maximum clique is taken on the
complement of that graph.  These tests hold it against

* the exhaustive formulation kept as the reference
  (``_pairwise_consistency_dense``: every pair, dense matrices, the
  implementation the project shipped before) and ``max_clique`` on the
  consistency graph itself;
* networkx (reference library): ``max_weight_clique(weight=None)`` of the
  complement of the conflicts gives the clique size;
* simulated drives of the invented warehouse and yard routes, several
  rounds, with the odometry of the robustness work (heading bias up to
  30 degrees per 100 m, distance scale error up to 3%): the sparse
  formulation testing every pair must accept the dense reference's set,
  closure for closure; the windowed one must decide every pair inside its
  window as the exhaustive test does.  (The windowed one does NOT in
  general accept the same set: long cycles that fail under drift go
  untested; docs/performance.md has the measured differences.)
"""

import dataclasses

import networkx as nx
import numpy as np
import pytest
import scipy.sparse

from closurecheck.core import se2
from closurecheck.core.odometry import OdometryChain, noise_from_header
from closurecheck.frontend.keyframes import select_keyframes
from closurecheck.simulation.simulate import DEFAULT_OPTIONS, SCENARIOS, drive, odometry
from closurecheck.verification.clique import CliqueOptions, max_clique, max_clique_of_conflicts
from closurecheck.verification.consistency import (
    ConsistencyOptions,
    _pairwise_consistency_dense,
    pairwise_consistency,
)

CLOSURE_SIGMA = np.array([0.02, 0.02, np.deg2rad(0.3)])  # registration noise [m, m, rad] (invented, typical of ICP)


def simulated_closures(scenario, laps, bias, scale, seed, outlier_share=0.1, per_keyframe=2, closures=700):
    """Keyframe chain of a simulated drive and loop closures between its visits.

    Closures join keyframes of different visits whose true positions are
    within 1 m; their deltas are the truth plus registration noise, and an
    ``outlier_share`` of them is a look-alike (offset by 1 to 3 m and up to
    8 degrees).  Returns (src, dst, deltas, covariances, poses, prefix).
    """
    options = dataclasses.replace(DEFAULT_OPTIONS, odom_heading_bias_rad_per_m=bias, odom_distance_scale_error=scale)
    plan = SCENARIOS[scenario]()
    one_lap = len(drive(plan, None, options).t)
    motion = drive(plan, int(laps * one_lap), options)
    rng = np.random.default_rng(seed)
    odom = odometry(motion.truth, motion.step_m, rng, options)
    keyframes = select_keyframes(odom)
    chain = OdometryChain.build(odom, keyframes, noise_from_header({"odometry_noise": options.odometry_noise_header()}))
    truth = motion.truth[keyframes]
    src, dst = [], []
    for j in range(len(keyframes)):
        d = np.hypot(*(truth[: max(j - 200, 0), :2] - truth[j, :2]).T)
        near = np.flatnonzero(d < 1.0)
        if len(near):
            pick = rng.choice(near, min(per_keyframe, len(near)), replace=False)
            src += [j] * len(pick)
            dst += pick.tolist()
    src, dst = np.array(src), np.array(dst)
    keep = rng.random(len(src)) < min(1.0, closures / len(src))
    src, dst = src[keep], dst[keep]
    k = len(src)
    cov = np.tile(np.diag(CLOSURE_SIGMA**2), (k, 1, 1))
    deltas = se2.between(truth[src], truth[dst]) + rng.normal(0.0, CLOSURE_SIGMA, (k, 3))
    bad = rng.random(k) < outlier_share
    offset = rng.uniform(1.0, 3.0, bad.sum()) * np.exp(1j * rng.uniform(-np.pi, np.pi, bad.sum()))
    deltas[bad] += np.column_stack([offset.real, offset.imag, np.deg2rad(rng.uniform(-8, 8, bad.sum()))])
    deltas[:, 2] = se2.wrap(deltas[:, 2])
    return src, dst, deltas, cov, chain.poses, chain.prefix


@pytest.mark.slow
@pytest.mark.parametrize("scenario, bias_deg_per_100m, scale, seed", [
    ("warehouse", 2.3, 0.002, 1),   # the simulator's default odometry
    ("warehouse", 17.0, 0.02, 2),   # strong drift
    ("warehouse", 30.0, 0.01, 3),   # stronger heading bias
    ("yard", 10.0, 0.03, 4),
])
def test_sparse_formulation_accepts_what_the_dense_reference_accepts(scenario, bias_deg_per_100m, scale, seed):
    args = simulated_closures(scenario, 3.2, np.deg2rad(bias_deg_per_100m) / 100.0, scale, seed, closures=300)
    k = len(args[0])
    options = ConsistencyOptions(pair_probability=0.999)
    sparse = pairwise_consistency(*args, options=options)
    assert sparse.exhaustive and sparse.pairs_tested == k * (k - 1) // 2
    dense = _pairwise_consistency_dense(*args, options=options)
    budget = CliqueOptions(max_expansions=200_000)
    reference = max_clique(dense.adjacency, options=budget)
    ours = max_clique_of_conflicts(sparse.conflicts, options=budget)
    assert reference.exact
    assert np.array_equal(ours.members, reference.members)
    assert (ours.exact, ours.canonical) == (reference.exact, reference.canonical)


@pytest.mark.parametrize("window_m", [150.0, 300.0])
def test_windowed_test_decides_like_the_exhaustive_one_inside_the_window(window_m):
    # Strong drift: many long cycles fail, which the window leaves untested.
    args = simulated_closures("warehouse", 3.2, np.deg2rad(17.0) / 100.0, 0.02, seed=2, closures=300)
    full = pairwise_consistency(*args)
    windowed = pairwise_consistency(*args, options=ConsistencyOptions(pair_window_m=window_m))
    assert not windowed.exhaustive and windowed.pairs_tested < full.pairs_tested // 2
    inside = _inside(args, window_m)
    assert np.array_equal(windowed.conflicts.toarray(), full.conflicts.toarray() & inside)
    # Fewer conflicts: the windowed clique is a superset-size answer, and no
    # tested pair inside it conflicts.
    small = max_clique_of_conflicts(full.conflicts)
    wide = max_clique_of_conflicts(windowed.conflicts)
    assert wide.exact and wide.size >= small.size
    assert not windowed.conflicts.toarray()[np.ix_(wide.members, wide.members)].any()


def _inside(args, window):
    src, dst, _, _, poses, _ = args
    travel = np.r_[0.0, np.cumsum(np.hypot(*np.diff(poses[:, :2], axis=0).T))]
    lo, hi = travel[np.minimum(src, dst)], travel[np.maximum(src, dst)]
    inside = (np.abs(lo[:, None] - lo[None, :]) <= window) & (np.abs(hi[:, None] - hi[None, :]) <= window)
    np.fill_diagonal(inside, False)
    return inside


def test_sparse_conflicts_are_the_dense_references_failures():
    args = simulated_closures("warehouse", 1.6, np.deg2rad(17.0) / 100.0, 0.02, seed=5)
    k = len(args[0])
    for block in (100_000, 997):
        opts = ConsistencyOptions(pairs_per_block=block)
        res = pairwise_consistency(*args, options=opts)
        ref = _pairwise_consistency_dense(*args, options=opts)
        fails = ~ref.adjacency.toarray()
        np.fill_diagonal(fails, False)
        assert np.array_equal(res.conflicts.toarray(), fails)
        assert np.array_equal(res.support, ref.adjacency.toarray().sum(axis=1))
        assert res.pairs_tested == k * (k - 1) // 2 and res.exhaustive
        assert np.array_equal(res.adjacency().toarray(), ref.adjacency.toarray())


def test_window_tests_exactly_the_pairs_within_it():
    args = simulated_closures("yard", 2.2, np.deg2rad(10.0) / 100.0, 0.01, seed=6)
    window = 120.0
    inside = _inside(args, window)
    for block in (100_000, 333):
        res = pairwise_consistency(*args, options=ConsistencyOptions(pair_window_m=window, pairs_per_block=block))
        full = pairwise_consistency(*args)
        assert res.pairs_tested == inside.sum() // 2
        assert np.array_equal(res.conflicts.toarray(), full.conflicts.toarray() & inside)
    # A window longer than the log is the exhaustive test.
    length = float(np.sum(np.hypot(*np.diff(args[4][:, :2], axis=0).T)))
    wide = pairwise_consistency(*args, options=ConsistencyOptions(pair_window_m=length + 1.0))
    assert wide.exhaustive and (wide.conflicts != full.conflicts).nnz == 0


@pytest.mark.parametrize("n, p, weighted", [(40, 0.05, False), (40, 0.3, True), (60, 0.1, False), (25, 0.6, True),
                                            (80, 0.02, True), (1, 0.0, False)])
def test_clique_of_conflicts_matches_networkx_and_max_clique(n, p, weighted):
    rng = np.random.default_rng(n + int(100 * p))
    upper = np.triu(rng.random((n, n)) < p, 1)
    conflicts = upper | upper.T
    adjacency = ~conflicts
    np.fill_diagonal(adjacency, False)
    weights = rng.random(n) if weighted else None
    ours = max_clique_of_conflicts(scipy.sparse.csr_array(conflicts), weights)
    assert ours.exact
    g = nx.from_numpy_array(adjacency.astype(int))
    _, nx_size = nx.max_weight_clique(g, weight=None)
    assert ours.size == nx_size
    sub = adjacency[np.ix_(ours.members, ours.members)]
    assert sub.sum() == ours.size * (ours.size - 1)
    for options in (CliqueOptions(), CliqueOptions(max_expansions=2), CliqueOptions(tie_max_expansions=1)):
        a = max_clique(adjacency, weights, options)
        b = max_clique_of_conflicts(conflicts, weights, options)
        assert np.array_equal(a.members, b.members)
        assert (a.exact, a.canonical, a.upper_bound, a.expansions) == (b.exact, b.canonical, b.upper_bound,
                                                                       b.expansions)
