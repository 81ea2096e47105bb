"""The compiled PCM pair test (closurecheck/verification/_pcm_kernels.py) against the numpy one.

The compiled loop must give the numpy formulation's squared distances to
the last bit, hence the same conflict graph and support counts.  References:

* ``consistency._pair_block`` (numpy, vectorised), which
  tests/verification/test_consistency.py holds against a per-pair loop with
  central finite differences of se2.compose / se2.between (the first-order
  covariance of the PCM cycle, Mangelson et al., ICRA 2018);
* ``_pairwise_consistency_dense``, the exhaustive reference that still runs
  on ``_pair_block``;
* ``numpy.remainder`` (reference library) for the angle wrap;
* scipy.sparse (reference library) for the conflict graph's CSR.

Inputs: simulated drives of the invented warehouse and yard routes (the
helper of test_pcm_window.py), heading bias from none to 30 degrees per
100 m, 10% look-alike closures.

The pair test runs on all cores (numba ``prange``); the failing pairs must
still come out as the serial loop wrote them (row by row, j ascending),
whatever thread tested which row and however the rows are cut into waves.
"""

import numpy as np
import pytest
import scipy.sparse
from numba import njit
from test_pcm_window import simulated_closures

from closurecheck.core.stats import chi2_threshold
from closurecheck.verification import _pcm_kernels
from closurecheck.verification.consistency import (
    ConsistencyOptions,
    _all_blocks,
    _arrays,
    _closure_terms,
    _columns,
    _kernel_rows,
    _pair_block,
    _pairwise_consistency_dense,
    _prefix_columns,
    _symmetric_conflicts,
    pairwise_consistency,
)

DRIVES = [
    ("warehouse", 0.0, 0.0, 11),
    ("warehouse", 2.3, 0.002, 12),   # the simulator's default odometry
    ("warehouse", 17.0, 0.02, 13),   # strong drift: many long cycles fail
    ("warehouse", 30.0, 0.01, 14),
    ("yard", 10.0, 0.03, 15),
]


def _drive(scenario, bias_deg_per_100m, scale, seed, closures=400):
    return simulated_closures(scenario, 2.2, np.deg2rad(bias_deg_per_100m) / 100.0, scale, seed, closures=closures)


@pytest.mark.parametrize("scenario, bias, scale, seed", DRIVES)
@pytest.mark.parametrize("shared", [True, False])
def test_compiled_distances_are_the_numpy_ones_bit_for_bit(scenario, bias, scale, seed, shared):
    src, dst, deltas, cov, poses, prefix = _arrays(*_drive(scenario, bias, scale, seed))
    cols = _columns(_closure_terms(src, dst, deltas, cov, poses))
    pcs = _prefix_columns(prefix)
    k = len(src)
    i, j = np.triu_indices(k, 1)
    # Both orders of each pair: the cycle starts at the first closure's src node.
    i, j = np.r_[i, j], np.r_[j, i]
    ref = _pair_block(cols, pcs, i, j, shared)
    got = _pcm_kernels.pair_distances(_kernel_rows(cols), cols.src.astype(np.int64), cols.dst.astype(np.int64),
                                      np.column_stack(pcs), i.astype(np.int64), j.astype(np.int64), shared)
    assert np.isfinite(ref).all()
    assert np.array_equal(got.view(np.int64), ref.view(np.int64))


@pytest.mark.parametrize("scenario, bias, scale, seed", DRIVES)
def test_conflicts_and_support_are_the_dense_references(scenario, bias, scale, seed):
    args = _drive(scenario, bias, scale, seed)
    k = len(args[0])
    options = ConsistencyOptions(pair_probability=0.999)
    ours = pairwise_consistency(*args, options=options)
    ref = _pairwise_consistency_dense(*args, options=options)
    fails = ~ref.adjacency.toarray()
    np.fill_diagonal(fails, False)
    assert fails.any() and not fails.all()
    assert np.array_equal(ours.conflicts.toarray(), fails)
    assert np.array_equal(ours.support, ref.adjacency.toarray().sum(axis=1))
    assert ours.pairs_tested == k * (k - 1) // 2 and ours.exhaustive


# A few thousand closures: several waves of the default size, both covariance models.
LARGE_DRIVES = [
    ("warehouse", 2.3, 0.002, 21, True),
    ("yard", 10.0, 0.03, 22, False),
]


def _large_drive(scenario, bias_deg_per_100m, scale, seed):
    return simulated_closures(scenario, 6.0, np.deg2rad(bias_deg_per_100m) / 100.0, scale, seed, per_keyframe=3,
                              closures=3000)


def _failing_upper(args, shared, threshold):
    """(K, K) bool, True at i < j where _pair_block's distance of (i, j) exceeds the threshold."""
    src, dst, deltas, cov, poses, prefix = _arrays(*args)
    cols = _columns(_closure_terms(src, dst, deltas, cov, poses))
    pcs = _prefix_columns(prefix)
    k = len(src)
    fail = np.zeros((k, k), dtype=bool)
    for i, j in _all_blocks(k, 500_000):
        d2 = _pair_block(cols, pcs, i, j, shared)
        assert np.isfinite(d2).all()
        fail[i, j] = d2 > threshold
    return cols, pcs, fail


@pytest.mark.parametrize("scenario, bias, scale, seed, shared", LARGE_DRIVES)
def test_parallel_failing_pairs_are_the_serial_order_of_the_numpy_ones(scenario, bias, scale, seed, shared):
    args = _large_drive(scenario, bias, scale, seed)
    threshold = chi2_threshold(0.999)
    cols, pcs, fail = _failing_upper(args, shared, threshold)
    k = len(cols.src)
    assert k > 2500 and 0.01 < fail.sum() / (k * (k - 1) / 2) < 0.99
    # The serial order: row-major over the upper triangle (np.nonzero's order).
    ref_i, ref_j = np.nonzero(fail)
    q, a, b, pc = _kernel_rows(cols), cols.src.astype(np.int64), cols.dst.astype(np.int64), np.column_stack(pcs)
    rows = np.arange(k - 1, dtype=np.int64)
    # Waves of the default size (one here), and of odd sizes that cut the
    # rows unevenly (about 3 and 33 waves), in 64-bit words of one bit a pair.
    for wave in [_pcm_kernels.WAVE_WORDS, 20_011, 2_003]:
        for _ in range(2):  # and again: the same arrays, whatever thread ran which row
            fi, fj = _pcm_kernels.failing_pairs(q, a, b, pc, shared, threshold, rows, wave)
            assert fi.dtype == np.int32 and fj.dtype == np.int32
            assert np.array_equal(fi, ref_i) and np.array_equal(fj, ref_j)
    # Waves narrower than a row (one row each), on the first 150 closures.
    few = 150
    fi, fj = _pcm_kernels.failing_pairs(q[:few], a[:few], b[:few], pc, shared, threshold, rows[:few - 1], 1)
    keep = ref_j < few
    assert np.array_equal(fi, ref_i[keep]) and np.array_equal(fj, ref_j[keep])
    # Rows in any order and any subset: each row's run in the order given.
    some = np.random.default_rng(seed).permutation(k)[: k // 3].astype(np.int64)
    fi, fj = _pcm_kernels.failing_pairs(q, a, b, pc, shared, threshold, some, 5_003)
    want_j = [np.flatnonzero(fail[r, r + 1:]) + r + 1 for r in some]
    assert np.array_equal(fi, np.repeat(some, [len(w) for w in want_j]))
    assert np.array_equal(fj, np.concatenate(want_j))


def test_parallel_conflict_graph_is_the_dense_reference_on_thousands_of_closures():
    args = _large_drive("warehouse", 2.3, 0.002, 21)
    options = ConsistencyOptions(pair_probability=0.999)
    ours = pairwise_consistency(*args, options=options)
    again = pairwise_consistency(*args, options=options)
    ref = _pairwise_consistency_dense(*args, options=options)
    fails = ~ref.adjacency.toarray()
    np.fill_diagonal(fails, False)
    assert np.array_equal(ours.conflicts.toarray(), fails)
    assert np.array_equal(ours.support, ref.adjacency.toarray().sum(axis=1))
    for x, y in [(ours.conflicts.indptr, again.conflicts.indptr), (ours.conflicts.indices, again.conflicts.indices),
                 (ours.support, again.support)]:
        assert x.dtype == y.dtype and np.array_equal(x, y)


@njit
def _wrap_all(x):
    out = np.empty_like(x)
    for p in range(len(x)):
        out[p] = _pcm_kernels._wrap(x[p])
    return out


def test_compiled_wrap_is_numpys_remainder_bit_for_bit():
    rng = np.random.default_rng(3)
    special = [np.pi, -np.pi, 0.0, -0.0, 3 * np.pi, -3 * np.pi, 2 * np.pi, -2 * np.pi, 1e-300, -1e-300,
               np.nextafter(np.pi, 0.0), np.nextafter(-np.pi, 0.0), 1e6, -1e6]
    x = np.r_[rng.uniform(-20.0, 20.0, 200_000), special]
    ref = np.pi - np.remainder(np.pi - x, 2.0 * np.pi)  # se2.wrap's formula
    assert np.array_equal(_wrap_all(x).view(np.int64), ref.view(np.int64))


@pytest.mark.parametrize("k, p", [(1, 0.0), (7, 0.0), (50, 0.05), (200, 0.4), (120, 1.0)])
def test_conflict_graph_is_scipys_canonical_csr(k, p):
    # scipy.sparse (reference library): COO to CSR with sorted indices.
    rng = np.random.default_rng(k)
    i, j = np.triu_indices(k, 1)
    keep = rng.random(len(i)) < p
    i, j = i[keep].astype(np.int32), j[keep].astype(np.int32)
    ref = scipy.sparse.coo_array((np.ones(2 * len(i), dtype=bool), (np.r_[i, j], np.r_[j, i])), shape=(k, k)).tocsr()
    ref.sort_indices()
    got = _symmetric_conflicts(k, i, j)
    assert got.has_canonical_format
    assert np.array_equal(got.indptr, ref.indptr) and np.array_equal(got.indices, ref.indices)
    assert (got != ref).nnz == 0 and got.shape == (k, k)
