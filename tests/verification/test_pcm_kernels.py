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
"""

import numpy as np
import pytest
import scipy.sparse
from numba import njit
from test_pcm_window import simulated_closures

from closurecheck.verification import _pcm_kernels
from closurecheck.verification.consistency import (
    ConsistencyOptions,
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
