"""Per-scan line features and the lazily built target side, against independent references.

References: the neighbourhoods are scipy.spatial.cKDTree's k nearest
neighbours within the radius, queried here on their own; each local line is
the principal axis of its neighbourhood's scatter matrix from
numpy.linalg.eigh (principal component analysis), the normal the
eigenvector of the smaller eigenvalue.  Scans are ray cast in the invented
workshop of test_icp.py.
"""

import numpy as np
import pytest
from scipy.spatial import cKDTree
from test_icp import PAIRS, scan

from closurecheck.registration._kernels import _sum_slots
from closurecheck.registration.icp import (
    DEFAULT_OPTIONS,
    RegistrationOptions,
    _line_features,
    prepare_scan,
    register_prepared,
)


@pytest.fixture(scope="module")
def scans():
    rng = np.random.default_rng(3)
    return [scan(a, rng) for a, _ in PAIRS] + [scan(b, rng) for _, b in PAIRS]


@pytest.mark.parametrize("opt", [DEFAULT_OPTIONS, RegistrationOptions(line_neighbours=5, min_line_points=3),
                                 RegistrationOptions(line_neighbours=21, line_radius_m=0.5)])
def test_line_features_match_eigh_of_ckdtree_neighbourhoods(scans, opt):
    for pts in scans:
        idx, used, count, centroid, normal, tangent, thickness, has_line = _line_features(pts, opt)
        k = min(opt.line_neighbours, len(pts))
        _, ref_idx = cKDTree(pts).query(pts, k=k, distance_upper_bound=opt.line_radius_m)
        ref_idx = ref_idx.reshape(len(pts), k)
        np.testing.assert_array_equal(used, ref_idx < len(pts))
        np.testing.assert_array_equal(idx[used], ref_idx[used])
        np.testing.assert_array_equal(count, used.sum(axis=1))
        for i in np.flatnonzero(count >= 2):
            nb = pts[ref_idx[i][used[i]]]
            c = nb.mean(axis=0)
            evals, evecs = np.linalg.eigh((nb - c).T @ (nb - c))
            np.testing.assert_allclose(centroid[i], c, atol=1e-12)
            if evals[1] <= 0 or evals[1] - evals[0] < 1e-9 * evals[1]:
                continue                      # no distinct direction: any normal is as good
            n = evecs[:, 0] * (-1.0 if evecs[:, 0] @ c > 0 else 1.0)     # facing the sensor at the origin
            np.testing.assert_allclose(normal[i], n, atol=1e-7)
            np.testing.assert_allclose(tangent[i], [n[1], -n[0]], atol=1e-7)
            if count[i] >= opt.min_line_points:
                assert thickness[i] == pytest.approx(np.sqrt(max(evals[0], 0.0) / evals[1]), abs=1e-7)
        enough = count >= opt.min_line_points
        assert np.isnan(thickness[~enough]).all()
        np.testing.assert_array_equal(has_line, enough & (thickness <= opt.max_line_thickness))


def test_target_side_built_on_first_use_with_the_same_values(scans):
    a, b = scans[0], scans[5]
    eager_t, eager_s = prepare_scan(a), prepare_scan(b)
    lazy_t, lazy_s = prepare_scan(a, grid=False), prepare_scan(b, grid=False)
    assert "target" in eager_t._lazy and "target" not in lazy_t._lazy
    for name in ("line", "nbr_index", "nbr_coef"):
        np.testing.assert_array_equal(getattr(lazy_t, name), getattr(eager_t, name))
    np.testing.assert_array_equal(lazy_t.grid.fine, eager_t.grid.fine)
    np.testing.assert_array_equal(lazy_t.tree.data, eager_t.tree.data)
    guess = np.array([1.0, 0.6, 0.4])
    one = register_prepared(eager_s, eager_t, guess)
    two = register_prepared(lazy_s, lazy_t, guess)
    np.testing.assert_array_equal(one.delta, two.delta)
    np.testing.assert_array_equal(one.covariance, two.covariance)
    # A scan that was only ever a source never built its target side.
    assert "target" not in lazy_s._lazy


@pytest.mark.parametrize("k", [1, 5, 7, 8, 12, 16, 17, 24, 64, 129, 300])
def test_compiled_sums_add_in_numpys_order(k):
    # Reference: numpy.sum along a contiguous axis, to the bit (the compiled line fits must not move results).
    a = np.random.default_rng(k).normal(size=(k, 41)) * 10.0 ** np.random.default_rng(k + 1).integers(-8, 8, (k, 41))
    ref = np.ascontiguousarray(a.T).sum(axis=1)
    np.testing.assert_array_equal([_sum_slots(np.ascontiguousarray(a[:, j]), k) for j in range(a.shape[1])], ref)
