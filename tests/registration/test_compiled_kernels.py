"""Compiled kernels of registration (closurecheck/registration/_kernels.py) against reference libraries.

References: scipy.spatial.cKDTree's nearest-neighbour queries (with
``distance_upper_bound``) for the cell index that replaces it in ICP's
association and fit score, and for the neighbourhoods of the line fits;
numpy.linalg.lstsq for the local line models' least-squares coefficients.
Scans are ray cast in the invented workshop of test_icp.py; random clouds
add clusters, a straight wall and a wide extent.  scipy.sparse.csgraph.connected_components
for the groups of neighbours that small objects are found by.
"""

import numpy as np
import pytest
from scipy.spatial import cKDTree
from test_icp import PAIRS, scan

from closurecheck.registration import _kernels
from closurecheck.registration.icp import _CELL_M, RegistrationOptions, prepare_scan


def _clouds():
    rng = np.random.default_rng(11)
    yield "scan", np.ascontiguousarray(scan(PAIRS[0][0], rng)), 1.0
    yield "uniform", rng.uniform(-10.0, 10.0, (600, 2)), 1.0
    yield "wide", rng.uniform(-150.0, 150.0, (400, 2)), 1.0     # cells widened to keep memory O(N)
    wall = np.column_stack([rng.uniform(-5.0, 5.0, 500), rng.normal(0.0, 0.01, 500)])
    yield "wall", wall, 0.3


@pytest.mark.parametrize("upper", [0.05, 0.2, 0.4, 0.5, 1.3])
@pytest.mark.parametrize("name, pts, spread", list(_clouds()), ids=lambda v: v if isinstance(v, str) else "")
def test_nearest_matches_ckdtree_with_upper_bound(name, pts, spread, upper):
    rng = np.random.default_rng(len(pts))
    queries = np.concatenate([pts[rng.integers(0, len(pts), 400)] + rng.normal(0.0, spread, (400, 2)),
                              rng.uniform(-400.0, 400.0, (50, 2))])            # some far outside the cells
    index = _kernels.cell_index(pts, _CELL_M)
    d, i, _ = _kernels.nearest(pts, *index, queries, upper)
    ref_d, ref_i = cKDTree(pts).query(queries, distance_upper_bound=upper)
    np.testing.assert_array_equal(i, ref_i)
    np.testing.assert_array_equal(d, ref_d)


@pytest.mark.parametrize("k, radius", [(16, 0.3), (5, 0.3), (21, 0.5), (40, 2.0)])
def test_neighbourhoods_match_ckdtree(k, radius):
    rng = np.random.default_rng(k)
    for pts in (scan(PAIRS[1][1], rng), rng.uniform(-3.0, 3.0, (300, 2))):
        pts = np.ascontiguousarray(pts)
        idx, _ = _kernels.neighbourhoods(pts, k, radius)
        _, ref = cKDTree(pts).query(pts, k=k, distance_upper_bound=radius)
        np.testing.assert_array_equal(idx, ref.reshape(len(pts), k))


@pytest.mark.parametrize("model", ["quadratic", "line"])
def test_line_models_are_least_squares_fits(model):
    # Reference: numpy.linalg.lstsq of the offsets across each line on [1, a] or [1, a, a^2].
    opt = RegistrationOptions(line_model=model)
    pts = scan(PAIRS[2][0], np.random.default_rng(5))
    s = prepare_scan(pts, opt, grid=False)
    line, nidx = s.line, s.nbr_index
    for m in np.random.default_rng(6).choice(len(line), 40, replace=False):
        nb = pts[nidx[m]]
        used = np.abs(s.nbr_coef[m]).sum(axis=1) > 0
        nb = nb[used]
        c, n = line[m, :2], line[m, 2:4]
        t = np.array([n[1], -n[0]])
        a, h = (nb - c) @ t, (nb - c) @ n
        cols = [np.ones_like(a), a] + ([a * a] if model == "quadratic" else [])
        beta = np.linalg.lstsq(np.column_stack(cols), h, rcond=None)[0]
        np.testing.assert_allclose(line[m, 4:4 + len(beta)], beta, rtol=1e-6, atol=1e-9)
        assert line[m, 13] == pytest.approx(np.abs(a).max(), abs=1e-12)


def test_equal_distances_follow_the_kdtree():
    # Ranges quantised to 1 cm put many neighbours at exactly equal distances, and repeated
    # points make ties of the nearest one; both must come out as the kd-tree orders them.
    from closurecheck.registration.icp import DEFAULT_OPTIONS, _line_features, _nearest_line

    rng = np.random.default_rng(8)
    pts = np.round(scan(PAIRS[0][0], rng) * 100.0) / 100.0
    pts = np.concatenate([pts, pts[::5]])
    idx, used, *_ = _line_features(pts, DEFAULT_OPTIONS)
    _, ref = cKDTree(pts).query(pts, k=DEFAULT_OPTIONS.line_neighbours,
                                distance_upper_bound=DEFAULT_OPTIONS.line_radius_m)
    np.testing.assert_array_equal(idx[used], ref[used])
    target = prepare_scan(pts, grid=False)
    queries = target.points[target.line_index][::3] + np.round(rng.normal(0.0, 0.05, (1, 2)), 2)
    queries = np.concatenate([queries, target.points[target.line_index][::7]])
    d, j = _nearest_line(target, queries, 0.5)
    ref_d, ref_j = target.tree.query(queries, distance_upper_bound=0.5)
    np.testing.assert_array_equal(j, ref_j)
    np.testing.assert_array_equal(d, ref_d)


def test_an_empty_index_answers_like_an_empty_kdtree():
    # A scan registered on small objects alone has no line points.
    pts = np.zeros((0, 2))
    queries = np.random.default_rng(3).uniform(-5.0, 5.0, (20, 2))
    d, i, tied = _kernels.nearest(pts, *_kernels.cell_index(pts, _CELL_M), queries, 0.5)
    ref_d, ref_i = cKDTree(pts).query(queries, distance_upper_bound=0.5)
    np.testing.assert_array_equal(i, ref_i)
    np.testing.assert_array_equal(d, ref_d)
    assert not tied.any()


def test_a_scan_of_small_posts_alone_prepares_and_registers():
    # Posts seen by 3 readings each: matched to segments, no line points at
    # all, so ICP's nearest-line index is empty (it divided by zero).
    from closurecheck.registration.icp import register

    posts = np.array([[3.0, 1.0], [4.0, -2.0], [6.0, 2.5], [2.0, -3.5], [7.0, -1.0], [5.0, 4.0], [8.0, 1.5]])
    offsets = np.array([[-0.06, -0.05], [0.0, 0.0], [0.06, -0.05]])
    pts = (posts[:, None, :] + offsets[None]).reshape(-1, 2)
    prepared = prepare_scan(pts, RegistrationOptions(point_features=True))
    assert len(prepared.line_index) == 0 and len(prepared.point_index) > 0
    r = register(pts, pts + [0.05, 0.0], np.zeros(3), coarse=False, point_features=True)
    assert np.all(np.isfinite(r.delta))


@pytest.mark.parametrize("k, radius", [(16, 0.3), (5, 0.3), (16, 0.05)])
def test_components_match_scipy_connected_components(k, radius):
    # Reference: scipy.sparse.csgraph.connected_components on the undirected neighbour graph; the
    # labels themselves must agree (both number the groups by their smallest point), and each
    # group's bounding box must be numpy's min / max over its points.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    rng = np.random.default_rng(k)
    posts = rng.uniform(-8.0, 8.0, (30, 2))
    clouds = (np.ascontiguousarray(scan(PAIRS[1][0], rng)),
              (posts[:, None, :] + rng.normal(0.0, 0.05, (30, 6, 2))).reshape(-1, 2),
              rng.uniform(-3.0, 3.0, (500, 2)))
    for pts in clouds:
        idx, _ = _kernels.neighbourhoods(pts, k, radius)
        used = idx < len(pts)
        idx[~used] = 0
        label, lo, hi = _kernels.components(pts, idx, used)
        rows = np.repeat(np.arange(len(pts)), k)[used.ravel()]
        graph = coo_matrix((np.ones(len(rows)), (rows, idx.ravel()[used.ravel()])), shape=(len(pts),) * 2)
        count, ref = connected_components(graph.tocsr(), directed=False)
        np.testing.assert_array_equal(label, ref)
        assert len(lo) == count > 1
        for c in rng.choice(count, min(count, 25), replace=False):
            np.testing.assert_array_equal(lo[c], pts[ref == c].min(axis=0))
            np.testing.assert_array_equal(hi[c], pts[ref == c].max(axis=0))
