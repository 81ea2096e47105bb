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

from closurecheck.core import se2
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


@pytest.mark.parametrize("name, pts, spread", list(_clouds()), ids=lambda v: v if isinstance(v, str) else "")
def test_cell_index_orders_points_by_cell_as_a_stable_sort(name, pts, spread):
    # Reference: np.argsort of each point's cell number with a stable sort (what the index used).
    origin, cell, columns, start, order = _kernels.cell_index(pts, _CELL_M)
    rows = (len(start) - 1) // columns
    ci = np.minimum(((pts[:, 0] - origin[0]) / cell).astype(np.int64), rows - 1)
    cj = np.minimum(((pts[:, 1] - origin[1]) / cell).astype(np.int64), columns - 1)
    key = ci * columns + cj
    np.testing.assert_array_equal(order, np.argsort(key, kind="stable"))
    np.testing.assert_array_equal(start, np.concatenate([[0], np.cumsum(np.bincount(key, minlength=len(start) - 1))]))
    assert order.dtype == start.dtype == np.int32


@pytest.mark.parametrize("cell", [0.05, 0.2, 1.0])
@pytest.mark.parametrize("name, pts, spread", list(_clouds()), ids=lambda v: v if isinstance(v, str) else "")
def test_first_in_cells_match_numpy_unique(name, pts, spread, cell):
    # Reference: the first point of each cell key as np.unique(..., return_index=True) gives it
    # (the code correlative.downsample used), for clouds whose keys collide in the hash table.
    keys = np.floor(pts / cell).astype(np.int64)
    _, ref = np.unique(keys[:, 0] * 1_000_003 + keys[:, 1], return_index=True)
    got = _kernels.first_in_cells(np.ascontiguousarray(pts), cell)
    np.testing.assert_array_equal(got, np.sort(ref))
    if cell >= 0.2 and name != "wide":
        assert 1 < len(got) < len(pts)          # cells shared, so the table's lookups take part


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


def _pair_at(k, noise="range", duplicates=False):
    """A prepared source and target of the workshop and the true pose, plus a pose 0.2 m and 4 deg off.

    ``duplicates``: every fifth target reading twice, so that nearest line points tie exactly."""
    rng = np.random.default_rng(20 + k)
    pa, pb = PAIRS[k]
    truth = se2.between(np.asarray(pa, float), np.asarray(pb, float))
    opt = RegistrationOptions(coarse=False, point_noise=noise)
    target_pts = scan(pa, rng)
    if duplicates:
        target_pts = np.concatenate([target_pts, target_pts[::5]])
    tgt = prepare_scan(target_pts, opt, grid=False)
    src = prepare_scan(scan(pb, rng), opt, grid=False)
    return src, tgt, opt, [truth, truth + [0.2, -0.1, np.radians(4.0)]]


@pytest.mark.parametrize("k, duplicates", [(0, False), (1, False), (2, False), (0, True)])
@pytest.mark.parametrize("normals", [True, False])
def test_association_matches_kdtree_and_numpy(k, duplicates, normals):
    # Reference: scipy's cKDTree for the nearest line point, then the support and normal tests
    # written in numpy (the code the compiled association replaced); the same pairs and rows, to the bit.
    # Duplicated target readings make exact ties, which the kd-tree resolves (its own order).
    from closurecheck.registration.icp import _associate

    src, tgt, opt, poses = _pair_at(k, duplicates=duplicates)
    if not normals:
        opt = RegistrationOptions(coarse=False, max_normal_angle_rad=4.0)
    cos_max = np.cos(opt.max_normal_angle_rad) if normals else None
    for x in poses:
        i, j, p, u, lt = _associate(src, tgt, x, opt, cos_max)
        cand = src.line_index if normals else np.arange(len(src.points))
        c, s = np.cos(x[2]), np.sin(x[2])
        rot_t = np.array([[c, s], [-s, c]])
        pw = src.points[cand] @ rot_t + x[:2]
        _, ref_j = cKDTree(tgt.points[tgt.line_index]).query(pw, distance_upper_bound=opt.max_correspondence_m)
        hit = np.flatnonzero(ref_j < len(tgt.line_index))
        ln = tgt.line[ref_j[hit]]
        along = np.abs(ln[:, 3] * (pw[hit, 0] - ln[:, 0]) - ln[:, 2] * (pw[hit, 1] - ln[:, 1]))
        ok = along <= ln[:, 13] + opt.max_extrapolation_m
        if normals:
            ok &= ((src.normals[cand[hit]] @ rot_t) * ln[:, 2:4]).sum(axis=1) >= cos_max
        assert ok.sum() > 100
        np.testing.assert_array_equal(i, cand[hit[ok]])
        np.testing.assert_array_equal(j, ref_j[hit[ok]])
        np.testing.assert_array_equal(lt, ln[ok].T)
        np.testing.assert_array_equal(p, src.points[i])
        np.testing.assert_array_equal(u, src.beams[i])


@pytest.mark.parametrize("noise", ["range", "isotropic"])
def test_linearised_rows_match_the_numpy_expressions(noise):
    # Reference: the residual model of icp._linearise evaluated with numpy arrays, expression by
    # expression (the numpy version the compiled loop replaced); equal to the bit.
    from closurecheck.registration.icp import _associate, _linearise

    src, tgt, opt, poses = _pair_at(1, noise)
    for x in poses:
        pairs = _associate(src, tgt, x, opt, np.cos(opt.max_normal_angle_rad))
        r, v, jac, (s_al, phi2), sc, z = _linearise(pairs, x, opt, noise == "range")
        _, _, p, u, lt = pairs
        c, s = np.cos(x[2]), np.sin(x[2])
        rot_t = np.array([[c, s], [-s, c]])
        rp = p @ rot_t
        nx, ny = lt[2], lt[3]
        dx = rp[:, 0] + (x[0] - lt[0])
        dy = rp[:, 1] + (x[1] - lt[1])
        ref_s = ny * dx - nx * dy
        m = np.minimum(np.maximum(ref_s, -lt[13]), lt[13])
        ref_phi2 = (2.0 * ref_s - m) * m
        ref_r = nx * dx + ny * dy - (lt[4] + ref_s * lt[5] + ref_phi2 * lt[6])
        fp = lt[5] + 2.0 * lt[6] * m
        gx, gy = nx - fp * ny, ny + fp * nx
        if noise == "range":
            ub = u @ rot_t
            ref_sc = np.maximum(np.abs(gx * ub[:, 0] + gy * ub[:, 1]), opt.min_incidence_cos)
        else:
            ref_sc = np.hypot(gx, gy)
        ref_v = ref_sc * ref_sc + (lt[7] + ref_s * (2.0 * lt[8] + ref_s * lt[10])
                                   + ref_phi2 * (2.0 * lt[9] + 2.0 * ref_s * lt[11] + ref_phi2 * lt[12]))
        assert np.abs(ref_phi2).max() > 0          # the quadratic term takes part
        for got, ref in ((r, ref_r), (v, ref_v), (s_al, ref_s), (phi2, ref_phi2), (sc, ref_sc),
                         (jac, np.column_stack([gx, gy, gy * rp[:, 0] - gx * rp[:, 1]])), (z, ref_r / np.sqrt(ref_v))):
            np.testing.assert_array_equal(got, ref)


def _line_rows(k, seed):
    """The line rows of _pair_at(k) associated and linearised at the guess, with random robust weights:
    (target, jac, omega, source coefficients, target line rows, s along, phi2)."""
    from closurecheck.registration.icp import _associate, _linearise

    src, tgt, opt, poses = _pair_at(k)
    pairs = _associate(src, tgt, poses[0], opt, np.cos(opt.max_normal_angle_rad))
    r, v, jac, (s_al, phi2), sc, _ = _linearise(pairs, poses[0], opt, True)
    om = np.random.default_rng(seed).uniform(0.2, 1.0, len(r)) / v
    return tgt, jac, om, sc, pairs[1], s_al, phi2


def test_censi_middle_of_line_rows_matches_bincount_version():
    # Reference: covariance.censi_middle, numpy bincounts over the gathered (n, k) sensitivities.
    from closurecheck.registration.covariance import censi_middle, censi_middle_lines

    tgt, jac, om, sc, rows, s_al, phi2 = _line_rows(2, 1)
    got = censi_middle_lines(jac, om, sc, rows, tgt.nbr_index, tgt.nbr_coef, np.column_stack([s_al, phi2]),
                             len(tgt.points))
    w = tgt.nbr_coef[rows]
    coef_t = -(w[..., 0] + s_al[:, None] * w[..., 1] + phi2[:, None] * w[..., 2])
    ref = censi_middle(jac, om, sc, tgt.nbr_index[rows], coef_t, len(tgt.points))
    np.testing.assert_array_equal(got, ref)
    assert np.linalg.eigvalsh(ref).min() > 0


def test_block_bookkeeping_matches_numpy_indexing():
    # Reference: numpy boolean and fancy indexing and np.concatenate, which the coarse search's
    # batch bookkeeping used before (correlative.search).
    rng = np.random.default_rng(4)
    nodes = np.column_stack([rng.integers(0, 30, 500), rng.integers(-40, 40, (500, 2)), rng.integers(0, 5, 500)])
    score = rng.integers(0, 5000, 500)
    row_seed = rng.integers(0, 3, 30)
    bar = np.array([1200.0, -1.0, 3999.5])
    live = score > bar[row_seed[nodes[:, 0]]]
    got_nodes, got_score = _kernels.live_blocks(nodes, score, bar, row_seed)
    np.testing.assert_array_equal(got_nodes, nodes[live])
    np.testing.assert_array_equal(got_score, score[live])
    assert 0 < live.sum() < len(live)
    sel = np.argpartition(-score, 63)[:64]
    rest = np.ones(len(score), bool)
    rest[sel] = False
    parents, rest_nodes, rest_score = _kernels.take_rest(nodes, score, sel)
    np.testing.assert_array_equal(parents, nodes[sel])
    np.testing.assert_array_equal(rest_nodes, nodes[rest])
    np.testing.assert_array_equal(rest_score, score[rest])
    both, both_score = _kernels.append_blocks(nodes[:7], score[:7], nodes[100:], score[100:])
    np.testing.assert_array_equal(both, np.concatenate([nodes[:7], nodes[100:]]))
    np.testing.assert_array_equal(both_score, np.concatenate([score[:7], score[100:]]))
    empty, empty_score = _kernels.live_blocks(nodes[:0], score[:0], bar, row_seed)
    assert empty.shape == (0, 4) and empty_score.shape == (0,)


def test_top_sums_match_numpy_gathers():
    # Reference: numpy's fancy-indexed gather and sum over the points for each top block of
    # top_blocks' rows, as block sums were taken before (correlative.search).
    rng = np.random.default_rng(8)
    hp, rows_n, level = 60, 50, 3
    size = rows_n * hp
    stack = rng.integers(0, 256, 5 * size).astype(np.uint8)
    starts = np.array([-9, -1, 7])
    base = rng.integers(12, 38, (6, 40))
    base = (base * hp + rng.integers(12, 38, (6, 40))).astype(np.int32)
    tops = _kernels.top_blocks(6, starts, level)
    off = tops[:, 3] * size + tops[:, 1] * hp + tops[:, 2]
    ref = stack[base[tops[:, 0]] + off[:, None]].astype(np.int64).sum(axis=1)
    np.testing.assert_array_equal(_kernels.top_sums(base, stack, starts, level, size, hp), ref)


def _take_by_lists(nodes, score, bar, row_seed, batch):
    """The top level's visit as coarse_search made it before it kept the level ranked: live_blocks,
    then _best_rows and take_rest (or everything)."""
    live_nodes, live_score = _kernels.live_blocks(nodes, score, bar, row_seed)
    if len(live_score) > batch:
        parents, rest, rest_score = _kernels.take_rest(live_nodes, live_score,
                                                       _kernels._best_rows(live_score, batch))
        return parents, rest, rest_score
    return live_nodes, live_nodes[:0], live_score[:0]


@pytest.mark.parametrize("n_seeds", [1, 3])
def test_ranked_top_level_takes_what_the_lists_took(n_seeds):
    # Reference: the list bookkeeping above, visit after visit with bars that rise and sometimes fall
    # again (a suppressed leaf lowers the k-th best); bounds from a small range, so ties are everywhere.
    rng = np.random.default_rng(10 + n_seeds)
    n_rows = 12 * n_seeds
    row_seed = np.repeat(np.arange(n_seeds), 12)
    tops = _kernels.top_blocks(n_rows, np.array([-5, 3, 11]), 4)
    score = rng.integers(0, 40, len(tops))
    order, head, tail = _kernels._rank_tops(score, row_seed[tops[:, 0]], n_seeds)
    nodes, node_score = tops, score
    bar = np.full(n_seeds, -1.0)
    visits = 0
    while True:
        ref, nodes, node_score = _take_by_lists(nodes, node_score, bar, row_seed, 16)
        got = _kernels._take_tops(tops, score, order, head, tail, bar, 16)
        np.testing.assert_array_equal(got, ref)
        if len(ref) == 0:
            break
        visits += 1
        bar = bar + rng.choice([-3.0, 0.0, 2.0, 5.0], n_seeds)
    assert visits >= 4


@pytest.mark.parametrize("n", [1, 2, 7, 600, 601])
def test_huber_rows_match_the_numpy_weights(n):
    # Reference: numpy's median and the Huber weight of closurecheck.core.kernels (the numpy path
    # icp._robust still takes for the other kernels), then the weighted Jacobian rows.
    from closurecheck.core.kernels import kernel_from_name
    from closurecheck.registration.icp import _MAD_TO_SIGMA, _robust

    rng = np.random.default_rng(n)
    z = rng.standard_t(3, n) * 0.01
    v = rng.uniform(0.5, 2.0, n)
    jac = rng.normal(size=(n, 3))
    opt = RegistrationOptions()
    kernel = kernel_from_name("huber", opt.kernel_scale)
    w, scale, jw = _kernels.huber_rows(z, v, jac, kernel.scale, _MAD_TO_SIGMA, opt.min_noise_m)
    ref_w, ref_scale = _robust(z * np.sqrt(v), v, opt, kernel, z)
    assert scale == ref_scale == max(_MAD_TO_SIGMA * float(np.median(np.abs(z))), opt.min_noise_m)
    np.testing.assert_array_equal(w, ref_w)
    np.testing.assert_array_equal(jw, jac * (ref_w / v)[:, None])
    assert n < 7 or 0 < (w < 1).sum() < n       # both sides of the threshold


@pytest.mark.parametrize("model", ["quadratic", "line"])
@pytest.mark.parametrize("noise", ["range", "isotropic"])
def test_line_models_match_the_numpy_expressions(model, noise):
    # Reference: the local line models computed with numpy arrays throughout (the expressions the
    # compiled offsets replaced, and numpy.linalg.inv with batched products for the compiled solve).
    # The offsets agree to the bit; the solve and its sums run in another order than LAPACK's and
    # BLAS's, so the models agree to rounding.
    from closurecheck.registration.icp import _prepare, _target_side

    opt = RegistrationOptions(line_model=model, point_noise=noise)
    pts = scan(PAIRS[3][0], np.random.default_rng(9))
    prepared = _prepare(pts, opt, False)
    idx, used, normal, tangent, centroid, li, _ = prepared._lazy["fit"]
    nidx, used_l, n_l, t_l, c_l = idx[li], used[li], normal[li], tangent[li], centroid[li]
    lp, line, nbr, coef, _ = _target_side(prepared, idx, used, normal, tangent, centroid, li, opt)
    np.testing.assert_array_equal(lp, pts[li])
    np.testing.assert_array_equal(nbr, nidx)
    assert nbr.dtype == np.int32 and coef.dtype == np.float32
    nused = used_l.astype(float)
    dx = pts[:, 0][nidx] - c_l[:, :1]
    dy = pts[:, 1][nidx] - c_l[:, 1:]
    a = (dx * t_l[:, :1] + dy * t_l[:, 1:]) * nused
    h = (dx * n_l[:, :1] + dy * n_l[:, 1:]) * nused
    x = np.stack([nused, a, a * a if model == "quadratic" else np.zeros_like(a)], axis=-1)
    xtx = x.transpose(0, 2, 1) @ x
    if model == "line":
        xtx[:, 2, 2] = 1.0
    xtx += (1e-12 * np.trace(xtx, axis1=1, axis2=2))[:, None, None] * np.eye(3)
    wts = x @ np.linalg.inv(xtx)
    beta = (h[:, None, :] @ wts)[:, 0, :]
    beams = prepared.beams
    if noise == "range":
        nu = np.maximum(np.abs(beams[:, 0][nidx] * n_l[:, :1] + beams[:, 1][nidx] * n_l[:, 1:]),
                        opt.min_incidence_cos)
    else:
        nu = np.ones_like(a)
    nu = nu * nused
    q = (wts * (nu * nu)[..., None]).transpose(0, 2, 1) @ wts
    ref = np.column_stack([c_l, n_l, beta, q[:, 0, 0], q[:, 0, 1], q[:, 0, 2], q[:, 1, 1], q[:, 1, 2], q[:, 2, 2],
                           np.abs(a).max(axis=1)])
    np.testing.assert_array_equal(line[:, [0, 1, 2, 3, 13]], ref[:, [0, 1, 2, 3, 13]])
    # The coefficients (m, 1/m) to rounding of metres, Q to rounding of its largest entry (an
    # intercept or an off-diagonal may be nearly zero, so relative errors of single entries mean nothing).
    np.testing.assert_allclose(line[:, 4:7], ref[:, 4:7], rtol=0, atol=1e-12)
    np.testing.assert_allclose(line[:, 7:13], ref[:, 7:13], rtol=0, atol=1e-12 * np.abs(ref[:, 7:13]).max())
    want = (nu[..., None] * wts).astype(np.float32)
    np.testing.assert_allclose(coef, want, rtol=2e-6, atol=1e-6 * float(np.abs(want).max()))
    assert (~used_l).any()          # some slots unused, so the masking takes part


def test_inverse3_matches_numpy_inv_with_pivoting():
    # Reference: numpy.linalg.inv.  Random matrices, permuted so that every pivot order occurs,
    # and near-degenerate symmetric ones like a line fit's normal matrix with all offsets close.
    rng = np.random.default_rng(3)
    mats = [rng.normal(size=(3, 3)) for _ in range(200)]
    mats += [m[list(p)] for m in mats[:6] for p in ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1),
                                                      (2, 1, 0))]
    for _ in range(50):
        a = rng.normal(0.0, 1e-3, 8)
        x = np.column_stack([np.ones(8), a, a * a])
        xtx = x.T @ x
        mats.append(xtx + 1e-12 * np.trace(xtx) * np.eye(3))
    lu, perm, unit, inv = np.empty((3, 3)), np.empty(3, np.int64), np.empty(3), np.empty((3, 3))
    for m in mats:
        _kernels._inverse3(m, lu, perm, unit, inv)
        np.testing.assert_array_equal(inv[:, 1], _kernels._solve3(m, np.array([0.0, 1.0, 0.0])))
        ref = np.linalg.inv(m)
        np.testing.assert_allclose(inv @ m, np.eye(3), atol=1e-9 * np.linalg.cond(m) * 1e-6 + 1e-9)
        np.testing.assert_allclose(inv, ref, rtol=1e-12 * np.linalg.cond(m), atol=1e-14 * np.abs(ref).max())


def test_point_candidates_match_the_numpy_masks():
    # Reference: the numpy masks the compiled selection replaced (icp._point_like).
    from closurecheck.registration.icp import DEFAULT_OPTIONS, _line_features

    rng = np.random.default_rng(12)
    posts = rng.uniform(-8.0, 8.0, (30, 2))
    blobs = (posts[:, None, :] + rng.normal(0.0, 0.04, (30, 4, 2))).reshape(-1, 2)
    pts = np.concatenate([scan(PAIRS[4][0], rng), blobs])
    idx, used, _, _, _, _, _, has_line = _line_features(pts, DEFAULT_OPTIONS)
    ref = np.flatnonzero(~has_line & (used.sum(axis=1) >= 3) & ~(has_line[idx] & used).any(axis=1))
    got = _kernels.point_candidates(idx, used, has_line, 3)
    np.testing.assert_array_equal(got, ref)
    assert 0 < len(ref) < (~has_line).sum()


@pytest.mark.parametrize("n_old, n_new", [(0, 40), (30, 200), (4000, 300)])
def test_seed_leaves_match_lexsort_and_numpy_selection(n_old, n_new):
    # Reference: np.lexsort on (y, x, theta, -score), then the distinct selection and the masks the
    # coarse search used in numpy (correlative._Best.add).  Scores drawn from few values, so that
    # many leaves tie and the order of equal scores decides.
    from closurecheck.registration.correlative import distinct

    rng = np.random.default_rng(n_old + n_new)

    def leaves(n):
        return np.column_stack([rng.integers(0, 12, n) * 100.0, rng.integers(-5, 5, (n, 2)) * 0.1,
                                rng.integers(-4, 4, n) * 0.05, rng.integers(0, 2, n)]).astype(float)

    own, records = leaves(n_old), leaves(n_new)
    own = own[own[:, 4] == 1]
    kept, best, kth, over = _kernels.seed_leaves(own, records, 1, 3, 0.25, 0.1, 4096)
    cat = np.concatenate([own, records[records[:, 4] == 1]])
    assert over == (len(cat) > 4096)
    if over:
        np.testing.assert_array_equal(kept, cat)
        cat = cat[np.argpartition(-cat[:, 0], 4095)[:4096]]
        kept, best, kth, over = _kernels.seed_leaves(cat, cat[:0], 1, 3, 0.25, 0.1, 4096)
    srt = cat[np.lexsort((cat[:, 2], cat[:, 1], cat[:, 3], -cat[:, 0]))]
    keep = distinct(srt, 3, 0.25, 0.1)
    ref_kth = srt[keep[-1], 0] if len(keep) == 3 else -1.0
    np.testing.assert_array_equal(best, srt[keep])
    assert kth == ref_kth
    np.testing.assert_array_equal(kept, srt[srt[:, 0] >= ref_kth])


def test_cell_bases_and_top_blocks_match_numpy():
    # Reference: the numpy steps correlative.search used (floor, clip, pad, flatten; a meshgrid).
    rng = np.random.default_rng(6)
    cells = rng.uniform(-300.0, 300.0, (50, 2, 9))
    cells[0, 0, 0] = 7.0                          # exactly on a cell edge
    offset = rng.uniform(-20.0, 20.0, (2, 9))
    reach, w, h, pad = 60, 150, 120, 100
    hp = h + 2 * pad
    ref = np.floor(cells + offset)
    np.clip(ref, -reach, np.array([[w - 1 + reach], [h - 1 + reach]]), out=ref)
    ref += pad
    ref = (ref[:, 0] * hp + ref[:, 1]).T.astype(np.int64)
    for dtype in (np.int64, np.int32):
        got = _kernels.cell_bases(cells, offset, reach, float(w - 1 + reach), float(h - 1 + reach), float(pad),
                                  float(hp), np.empty((9, 50), dtype))
        np.testing.assert_array_equal(got, ref)
    assert (ref == pad - reach + (pad - reach) * hp).any() or (ref < (pad - reach + 1) * hp).any()   # clipped
    starts = np.array([-35, -19, -3, 13, 29])
    ta, tx, ty = np.meshgrid(np.arange(4), starts, starts, indexing="ij")
    ref_tops = np.column_stack([ta.ravel(), tx.ravel(), ty.ravel(), np.full(ta.size, 4)])
    np.testing.assert_array_equal(_kernels.top_blocks(4, starts, 4), ref_tops)


def test_stamp_grid_matches_maximum_at():
    # Reference: numpy's np.maximum.at over every (occupied cell, stamp offset) pair inside the grid.
    from closurecheck.registration.correlative import _stamp

    rng = np.random.default_rng(2)
    rows, cols = 40, 55
    occupied = np.unique(rng.integers(0, rows * cols, 120))
    di, dj, value = _stamp(0.1, 0.1)
    ti = occupied[:, None] // cols + di
    tj = occupied[:, None] % cols + dj
    inside = (ti >= 0) & (ti < rows) & (tj >= 0) & (tj < cols)
    ref = np.zeros((rows, cols), np.uint8)
    np.maximum.at(ref.ravel(), (ti * cols + tj)[inside], np.broadcast_to(value, ti.shape)[inside])
    got = _kernels.stamp_grid(occupied, rows, cols, di, dj, value)
    np.testing.assert_array_equal(got, ref)
    assert (~inside).any() and value.max() == 255 and len(np.unique(ref)) > 5
    # Cells repeated and out of order (a scan's points, several to a cell): the same grid.
    repeated = rng.permutation(np.concatenate([occupied, occupied[::3], occupied[:7]]))
    np.testing.assert_array_equal(_kernels.stamp_grid(repeated, rows, cols, di, dj, value), ref)


def test_line_frames_match_the_numpy_expressions():
    # Reference: the eigen-decomposition steps of icp._line_features as numpy expressions (the numpy
    # version the compiled pass replaced); equal to the bit, NaN and the sign of zero included.
    rng = np.random.default_rng(5)
    clouds = [np.ascontiguousarray(scan(pose, rng)) for pose, _ in PAIRS[:3]]
    clouds.append(np.repeat(rng.uniform(-2.0, 2.0, (30, 2)), 4, axis=0))    # no spread: lam_max 0
    clouds.append(np.column_stack([np.arange(40) * 0.05, np.zeros(40)]))      # exact line: lam_min 0
    seen = set()
    for pts in clouds:
        n = len(pts)
        idx, _ = _kernels.neighbourhoods(pts, 16, 0.3)
        count, cx, cy, sxx, syy, sxy, diff, two_sxy, got_rad = _kernels.scatter(pts, idx)
        np.testing.assert_array_equal(diff, sxx - syy)
        np.testing.assert_array_equal(two_sxy, 2.0 * sxy)
        np.testing.assert_array_equal(got_rad, np.hypot(0.5 * (sxx - syy), sxy))
        ref_used = idx < n
        ref_idx = np.where(ref_used, idx, 0)
        half_tr = 0.5 * (sxx + syy)
        rad = np.hypot(0.5 * (sxx - syy), sxy)
        phi = 0.5 * np.arctan2(2.0 * sxy, sxx - syy)
        nx, ny = -np.sin(phi), np.cos(phi)
        lam_min, lam_max = np.maximum(half_tr - rad, 0.0), half_tr + rad
        flip = nx * cx + ny * cy > 0
        nx[flip] *= -1.0
        ny[flip] *= -1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            thick = np.sqrt(lam_min / lam_max)
        enough = count >= 5
        thick = np.where(enough & (lam_max > 0), thick, np.nan)
        ref_line = enough & (lam_max > 0) & (thick <= 0.3)
        used, normal, centroid, tangent, thickness, has_line = _kernels.line_frames(
            idx, count, cx, cy, sxx, syy, rad, np.sin(phi), np.cos(phi), 5, 0.3)
        refs = ((idx, ref_idx), (used, ref_used), (normal, np.column_stack([nx, ny])),
                (centroid, np.column_stack([cx, cy])), (tangent, np.column_stack([ny, -nx])),
                (thickness, thick), (has_line, ref_line))
        for got, ref in refs:
            np.testing.assert_array_equal(got, ref)
            if got.dtype.kind == "f":
                np.testing.assert_array_equal(np.signbit(got[~np.isnan(got)]), np.signbit(ref[~np.isnan(ref)]))
        seen.update({"line"} if has_line.any() else set(), {"none"} if not has_line.all() else set(),
                    {"nan"} if np.isnan(thickness).any() else set(), {"zero"} if (thickness == 0).any() else set())
    assert seen == {"line", "none", "nan", "zero"}      # every branch of the pass was taken


def _analyse_in_numpy(h, middle, sigma2, n_corr, length_m, method, degeneracy_threshold, unobservable_sigma_m, kappa,
                      points_per_normal):
    # covariance.analyse as numpy code, before its element-by-element steps were compiled.
    scale = np.array([1.0, 1.0, 1.0 / length_m])
    per = 1.0 / max(n_corr, 1)
    evals, evecs = np.linalg.eigh(h * scale[:, None] * scale[None, :] * per)
    evals = np.maximum(evals, 0.0)
    top = evals[-1] if evals[-1] > 0 else 1.0
    degeneracy = float(evals[0] / top)
    weak = evals < degeneracy_threshold * top
    inv_s = (evecs / np.maximum(evals, 1e-12 * top)) @ evecs.T * per
    if method == "censi":
        ms = middle * scale[:, None] * scale[None, :]
        cov_s = kappa * sigma2 * inv_s @ ms @ inv_s
    else:
        cov_s = kappa * sigma2 * inv_s
    if weak.any():
        big = unobservable_sigma_m ** 2
        for w in np.flatnonzero(weak):
            cov_s = cov_s + big * np.outer(evecs[:, w], evecs[:, w])
            for k in np.flatnonzero(~weak):
                tau2 = evals[w] / evals[k] * points_per_normal * per
                cov_s = cov_s + big * tau2 * np.outer(evecs[:, k], evecs[:, k])
    cov = cov_s * scale[:, None] * scale[None, :]
    return 0.5 * (cov + cov.T), evals, evecs, degeneracy, bool(weak.any())


@pytest.mark.parametrize("method", ["censi", "hessian"])
def test_covariance_analysis_matches_the_numpy_version(method):
    # Reference: the numpy code above, to the bit, on well-posed, degenerate (a corridor: one
    # direction nearly free, or exactly free) and rank-two Hessians.
    from closurecheck.registration.covariance import analyse

    rng = np.random.default_rng(21)
    cases = 0
    for trial in range(300):
        jac = rng.normal(size=(rng.integers(3, 400), 3)) * [1.0, 1.0, rng.uniform(0.5, 20.0)]
        kind = trial % 3
        if kind == 1:
            jac[:, 0] *= 10.0 ** rng.uniform(-6, -1)        # nearly unconstrained along x
        elif kind == 2:
            jac[:, 1] = 0.0                                  # exactly unconstrained along y
        h = jac.T @ jac
        g = rng.normal(size=(3, 3))
        middle = h + g @ g.T
        args = (rng.uniform(1e-6, 1e-3), len(jac), rng.uniform(0.5, 30.0))
        opts = dict(degeneracy_threshold=0.01, unobservable_sigma_m=5.0, kappa=1.04, points_per_normal=16.0)
        got = analyse(h, middle if method == "censi" else None, *args, method=method, **opts)
        ref = _analyse_in_numpy(h, middle, *args, method, *opts.values())
        np.testing.assert_array_equal(got.covariance, ref[0])
        np.testing.assert_array_equal(got.eigenvalues, ref[1])
        np.testing.assert_array_equal(got.eigenvectors, ref[2])
        assert got.degeneracy == ref[3] and got.degenerate == ref[4]
        assert np.signbit(got.eigenvalues).tolist() == np.signbit(ref[1]).tolist()
        cases += ref[4]
    assert 100 <= cases < 300          # both sides of the degeneracy test


def test_seed_leaves_chained_rounds_match_lexsort():
    # Reference: np.lexsort on (y, x, theta, -score) of the kept and the new leaves together, as in
    # the test above, but round after round with the kept leaves fed back, as the coarse search does:
    # then the kept leaves come in order and the kernel merges instead of sorting them again.
    from closurecheck.registration.correlative import distinct

    rng = np.random.default_rng(44)
    merged_rounds = 0
    for _ in range(40):
        own = np.empty((0, 5))
        for _ in range(int(rng.integers(2, 12))):
            n = int(rng.integers(0, 120))
            records = np.column_stack([rng.integers(0, 6, n) * 100.0, rng.integers(-3, 3, (n, 2)) * 0.1,
                                       rng.integers(-2, 2, n) * 0.05, rng.integers(0, 2, n)]).astype(float)
            kept, best, kth, over = _kernels.seed_leaves(own, records, 1, 3, 0.25, 0.1, 4096)
            cat = np.concatenate([own, records[records[:, 4] == 1]])
            srt = cat[np.lexsort((cat[:, 2], cat[:, 1], cat[:, 3], -cat[:, 0]))]
            keep = distinct(srt, 3, 0.25, 0.1)
            ref_kth = srt[keep[-1], 0] if len(keep) == 3 else -1.0
            assert not over and kth == ref_kth
            np.testing.assert_array_equal(best, srt[keep])
            np.testing.assert_array_equal(kept, srt[srt[:, 0] >= ref_kth])
            merged_rounds += len(own) > 1
            own = kept
    assert merged_rounds > 100        # the merge was taken, with ties among the kept leaves


def _greedy_distinct(records, k, sep_m, sep_rad):
    # The plain greedy loop: pick the first row of the highest alive score, drop the alive rows
    # within both separations of it (np.hypot and np.mod: the same libm hypot and modulo as the kernel).
    alive = np.ones(len(records), bool)
    keep = []
    while len(keep) < k and alive.any():
        i = -1
        for r in range(len(records)):
            if alive[r] and (i < 0 or records[r, 0] > records[i, 0]):
                i = r
        keep.append(i)
        for r in range(len(records)):
            dt = abs(np.mod(records[r, 3] - records[i, 3] + np.pi, 2.0 * np.pi) - np.pi)
            if alive[r] and np.hypot(records[r, 1] - records[i, 1], records[r, 2] - records[i, 2]) < sep_m \
                    and dt < sep_rad:
                alive[r] = False
        alive[i] = False
    return np.array(keep, np.int64)


@pytest.mark.parametrize("ordered", [True, False])
def test_distinct_matches_the_plain_greedy_loop_at_the_separations(ordered):
    # Tie-heavy rows on lattices whose steps are the separations, halves and 0.6 / 0.8 of them (a
    # 3-4-5 triangle), with one-ulp offsets: many distances and angle differences sit at or next to
    # the separations, where the kernel's shortcuts must hand over to the exact test.  Angles also
    # near +-pi (the wrap), and rows sorted best first or not (the kernel's two ways of picking).
    rng = np.random.default_rng(3 + ordered)
    cut = 0
    for _ in range(1500):
        n = int(rng.integers(0, 30))
        sep_m = float(rng.choice([0.25, 0.1, 0.5]))
        sep_rad = float(rng.choice([0.1, 0.15, 0.5]))
        rows = np.empty((n, 4))
        rows[:, 0] = rng.integers(0, 4, n) * 100.0
        steps = rng.choice([sep_m, sep_m / 2, 0.6 * sep_m, 0.8 * sep_m], (n, 2))
        ulps = rng.choice([0.0, 0.0, 1.0, -1.0], (n, 2)) * np.spacing(steps)
        rows[:, 1:3] = rng.choice([0.0, 1.0, -3.0]) + rng.integers(-1, 2, (n, 2)) * steps + ulps
        rows[:, 3] = (rng.choice([sep_rad, sep_rad / 2, np.pi], n) * rng.integers(-1, 2, n)
                      + rng.choice([0.0, 0.0, 1e-16, -1e-16, -0.0], n))
        if ordered:
            rows = rows[np.argsort(-rows[:, 0], kind="stable")]
        k = int(rng.integers(1, 6))
        ref = _greedy_distinct(rows, k, sep_m, sep_rad)
        np.testing.assert_array_equal(_kernels.distinct(rows, k, sep_m, sep_rad), ref)
        cut += not np.array_equal(ref, np.argsort(-rows[:, 0], kind="stable")[:k])
    assert cut > 500                  # suppression decided the outcome often


@pytest.mark.parametrize("n", [0, 1, 7, 8, 9, 16, 17, 100, 1000])
def test_lex_order_is_lexsort_on_tied_leaves(n):
    # Reference: np.lexsort on (y, x, theta, -score).  Few values per key, with -0.0 beside 0.0,
    # so that most rows tie on the first keys and many on all four (then the input order decides:
    # the sort must be stable); lengths around the insertion-sort runs and the merges.
    rng = np.random.default_rng(n)
    for _ in range(20):
        rows = np.column_stack([rng.integers(0, 4, n) * 255.0, rng.choice([-0.1, -0.0, 0.0, 0.1], (n, 2)),
                                rng.choice([-0.05, -0.0, 0.0, 0.05], n), rng.integers(0, 2, n)]).astype(float)
        ref = np.lexsort((rows[:, 2], rows[:, 1], rows[:, 3], -rows[:, 0]))
        np.testing.assert_array_equal(_kernels._lex_order(rows), ref)


def test_seed_leaves_chained_rounds_keep_signed_zeros_where_lexsort_puts_them():
    # As the chained test above, with -0.0 and 0.0 among the keys: such leaves tie on every key yet
    # differ in their bits, so the merge must put the old before the new exactly where the stable
    # sorts of the whole do (compared bit for bit).  Up to 4 distinct leaves (k) and three seeds'
    # records, a few rounds over the record limit (the caller thins those, as _add_leaves does).
    from closurecheck.registration.correlative import distinct

    rng = np.random.default_rng(45)
    merged_rounds = 0
    for _ in range(60):
        own = np.empty((0, 5))
        k = int(rng.integers(1, 5))
        for _ in range(int(rng.integers(2, 10))):
            n = int(rng.integers(0, 150))
            records = np.column_stack([rng.integers(0, 4, n) * 255.0, rng.choice([-0.1, -0.0, 0.0, 0.1], (n, 2)),
                                       rng.choice([-0.05, -0.0, 0.0], n), rng.integers(0, 3, n)]).astype(float)
            kept, best, kth, over = _kernels.seed_leaves(own, records, 1, k, 0.25, 0.1, 400)
            cat = np.concatenate([own, records[records[:, 4] == 1]])
            if over:
                np.testing.assert_array_equal(kept.view(np.int64), cat.view(np.int64))
                cat = cat[np.argsort(-cat[:, 0], kind="stable")[:400]]
                kept, best, kth, over = _kernels.seed_leaves(cat, cat[:0], 1, k, 0.25, 0.1, 400)
            srt = cat[np.lexsort((cat[:, 2], cat[:, 1], cat[:, 3], -cat[:, 0]))]
            keep = distinct(srt, k, 0.25, 0.1)
            ref_kth = srt[keep[-1], 0] if len(keep) == k else -1.0
            assert not over and kth == ref_kth
            np.testing.assert_array_equal(best.view(np.int64), srt[keep].view(np.int64))
            np.testing.assert_array_equal(kept.view(np.int64), srt[srt[:, 0] >= ref_kth].view(np.int64))
            merged_rounds += len(own) > 1
            own = kept
    assert merged_rounds > 200


@pytest.mark.parametrize("n", [1, 7, 40, 300])
def test_point_target_sums_match_bincount(n):
    # Reference: icp._point_middle's numpy version, weighted rows and three bincounts over the
    # segments' ends (readings shared by several rows, as neighbouring segments share them).
    rng = np.random.default_rng(n)
    n_target = 50
    jac = rng.normal(size=(n, 3))
    om = rng.uniform(0.1, 10.0, n)
    src_coef = rng.normal(size=n)
    ends = rng.integers(0, n_target, (n, 2))
    tgt_coef = rng.normal(size=(n, 2)) * 10.0 ** rng.uniform(-6, 6, (n, 2))
    wj = jac * om[:, None]
    ref_m = np.column_stack([np.bincount(ends.ravel(), weights=(tgt_coef * wj[:, d:d + 1]).ravel(),
                                         minlength=n_target) for d in range(3)])
    a, b, m = _kernels.point_target_sums(jac, om, src_coef, ends, tgt_coef, n_target)
    np.testing.assert_array_equal(a, wj * src_coef[:, None])
    np.testing.assert_array_equal(b, wj * src_coef[:, None])
    assert a is not b
    np.testing.assert_array_equal(m, ref_m)
    np.testing.assert_array_equal(a.T @ b + m.T @ m, (wj * src_coef[:, None]).T @ (wj * src_coef[:, None])
                                  + ref_m.T @ ref_m)


@pytest.mark.parametrize("n, p", [(3, 0), (7, 2), (150, 9), (700, 40)])
def test_stacked_rows_and_inlier_rmse_match_numpy(n, p):
    # Reference: icp._finish's numpy steps: the concatenated rows and weights, then the inliers'
    # root-mean-square residual (np.add.reduce's pairwise sum) and count.
    rng = np.random.default_rng(n + p)
    r, pr = rng.standard_t(2, n) * 0.01, rng.standard_t(2, p) * 0.01
    v, pv = rng.uniform(0.3, 3.0, n), rng.uniform(0.3, 3.0, p)
    w, pw = rng.uniform(0.2, 1.0, n), rng.uniform(0.2, 1.0, p)
    jac, pjac = rng.normal(size=(n, 3)), rng.normal(size=(p, 3))
    r_all, v_all, om_all, jac_all = _kernels.stack_rows(r, v, w, jac, pr, pv, pw, pjac)
    np.testing.assert_array_equal(r_all, np.concatenate([r, pr]))
    np.testing.assert_array_equal(v_all, np.concatenate([v, pv]))
    np.testing.assert_array_equal(om_all, np.concatenate([w / v, pw / pv]))
    np.testing.assert_array_equal(jac_all, np.concatenate([jac, pjac]))
    z = np.abs(r_all / np.sqrt(v_all))
    for bound in (0.0, np.median(z), 1.0):
        inl = z <= bound
        r_in = r_all[inl]
        ref = np.sqrt(np.add.reduce(r_in * r_in) / len(r_in)) if len(r_in) else np.nan
        rmse, count = _kernels.inlier_rmse(r_all, v_all, bound)
        np.testing.assert_array_equal(rmse, ref)
        assert count == np.count_nonzero(inl)


def test_small_objects_and_scan_arrays_match_numpy():
    # Reference: icp._point_like's and icp._prepare's steps on a scan with posts: the candidates and
    # groups (point_candidates, components) and the numpy selection of the small ones, then the
    # beams, the small objects that take a line, the line points, their normals, and the ranges'
    # root-mean-square (np.add.reduce) and maximum.
    from closurecheck.registration.icp import DEFAULT_OPTIONS, _line_features

    rng = np.random.default_rng(13)
    posts = rng.uniform(-8.0, 8.0, (30, 2))
    big = (posts[:15, None, :] + rng.normal(0.0, 0.06, (15, 7, 2))).reshape(-1, 2)     # seen by enough for a line
    few = (posts[15:, None, :] + rng.normal(0.0, 0.03, (15, 3, 2))).reshape(-1, 2)
    spread = rng.normal(size=(200, 2)) * 10.0 ** rng.uniform(-3.0, 3.0, (200, 1))   # ranges whose sum rounds
    pts = np.concatenate([scan(PAIRS[4][0], rng), big, few, spread, [[0.0, 0.0]]])      # a reading at the sensor
    idx, used, count, _, normal, _, _, has_line = _line_features(pts, DEFAULT_OPTIONS)
    pick = _kernels.point_candidates(idx, used, has_line, 3)
    label, lo, hi = _kernels.components(pts, idx, used)
    span = np.hypot(*(hi - lo).T)
    spans = np.unique(span[label[pick]])
    limit = float(spans[len(spans) // 2])        # some objects on either side
    lab = label[pick]
    small = span[lab] <= limit
    point_index, point_object = _kernels.small_objects(pts, idx, used, has_line, 3, limit)
    np.testing.assert_array_equal(point_index, pick[small])
    np.testing.assert_array_equal(point_object, lab[small])
    assert 0 < small.sum() < len(small)
    rng_m = np.hypot(pts[:, 0], pts[:, 1])
    curve = count[point_index] >= 5
    ref_line = has_line.copy()
    ref_line[point_index[curve]] = True
    assert 0 < curve.sum() < len(curve)
    got = _kernels.scan_arrays(pts, normal, has_line, count, point_index, point_object, 5)
    refs = (pts / np.maximum(rng_m, 1e-12)[:, None], np.where(ref_line[:, None], normal, 0.0), ref_line,
            np.flatnonzero(ref_line), point_index[~curve], point_object[~curve])
    for g, ref in zip(got[:6], refs):
        np.testing.assert_array_equal(g, ref)
    assert got[6] == float(np.sqrt(np.add.reduce(rng_m * rng_m) / len(rng_m)))
    assert got[7] == float(rng_m.max())


def test_fit_exponents_match_numpy():
    # Reference: icp._fit_score's numpy steps before the exponential, inf (no neighbour) dropped.
    rng = np.random.default_rng(3)
    d = rng.uniform(0.0, 0.4, 500) * 10.0 ** rng.uniform(-6, 0, 500)
    d[rng.integers(0, 500, 60)] = np.inf
    got = _kernels.fit_exponents(d, 0.1)
    finite = d[np.isfinite(d)]
    np.testing.assert_array_equal(got, -0.5 * (finite / 0.1) ** 2)
    assert 0 < len(got) < len(d)


@pytest.mark.parametrize("k, radius", [(5, 0.3), (16, 0.3), (40, 1.0), (150, 2.0)])
def test_scatter_matches_numpy_sums(k, radius):
    # Reference: the neighbourhood sums as numpy computes them (icp._line_features before they were
    # compiled): the centroid adding the neighbours one after another, the scatter sums with
    # np.add.reduce along each row (pairwise for 8 slots or more, in blocks beyond 128).
    rng = np.random.default_rng(k)
    pts = np.concatenate([rng.uniform(-3.0, 3.0, (400, 2)), rng.normal(0.0, 0.2, (200, 2))])
    idx, _ = _kernels.neighbourhoods(pts, k, radius)
    n = len(pts)
    used = idx < n
    safe = np.where(used, idx, 0)
    count = used.sum(axis=1)
    sx, sy = pts[safe[:, 0], 0].copy(), pts[safe[:, 0], 1].copy()
    for j in range(1, k):
        sx = np.where(used[:, j], sx + pts[safe[:, j], 0], sx)
        sy = np.where(used[:, j], sy + pts[safe[:, j], 1], sy)
    cnt = np.maximum(count, 1).astype(float)
    cx, cy = sx / cnt, sy / cnt
    dx = np.where(used, pts[safe, 0] - cx[:, None], 0.0)
    dy = np.where(used, pts[safe, 1] - cy[:, None], 0.0)
    got = _kernels.scatter(pts, idx)
    refs = (count, cx, cy, np.add.reduce(dx * dx, axis=1), np.add.reduce(dy * dy, axis=1),
            np.add.reduce(dx * dy, axis=1))
    for g, ref in zip(got[:6], refs):
        np.testing.assert_array_equal(g, ref)
    assert (count > 1).any() and (count == k).any()


@pytest.mark.parametrize("upper", [0.05, 0.4, 1.3])
def test_nearest_of_a_union_is_the_nearer_of_its_parts(upper):
    # Reference: the lookup over the union of two point sets (the fit score's targets, line points
    # and small objects' readings), against the nearer of the lookups over each (icp._fit_score).
    rng = np.random.default_rng(int(upper * 100))
    lines = np.ascontiguousarray(scan(PAIRS[2][0], rng))
    posts = np.ascontiguousarray(rng.uniform(-6.0, 6.0, (40, 2)))
    union = np.concatenate([lines, posts])
    queries = np.concatenate([union + rng.normal(0.0, 0.3, union.shape), rng.uniform(-30.0, 30.0, (50, 2))])
    ref = _kernels.nearest(union, *_kernels.cell_index(union, _CELL_M), queries, upper)[0]
    got = np.minimum(_kernels.nearest(lines, *_kernels.cell_index(lines, _CELL_M), queries, upper)[0],
                     _kernels.nearest(posts, *_kernels.cell_index(posts, _CELL_M), queries, upper)[0])
    np.testing.assert_array_equal(got, ref)
    assert np.isinf(ref).any() and np.isfinite(ref).any()


def test_neighbourhood_sums_match_their_two_kernels():
    # Reference: neighbourhoods, then scatter of them; with equal distances (quantised ranges) the
    # sums are left to the caller (empty), who first takes the kd-tree's order (icp._line_features).
    rng = np.random.default_rng(9)
    pts = np.ascontiguousarray(scan(PAIRS[3][0], rng))
    quantised = np.round(pts / 0.02) * 0.02
    for cloud, ties in ((pts, False), (quantised, True)):
        idx, tied, any_tied, *sums = _kernels.neighbourhood_sums(cloud, 16, 0.3)
        ref_idx, ref_tied = _kernels.neighbourhoods(cloud, 16, 0.3)
        np.testing.assert_array_equal(idx, ref_idx)
        np.testing.assert_array_equal(tied, ref_tied)
        assert any_tied == ties == ref_tied.any()
        refs = _kernels.scatter(cloud, ref_idx) if not ties else [a[:0] for a in _kernels.scatter(cloud, ref_idx)]
        assert len(sums) == len(refs)
        for got, ref in zip(sums, refs):
            np.testing.assert_array_equal(got, ref)
            assert got.dtype == ref.dtype


def test_all_finite_matches_numpy():
    # Reference: np.isfinite(a).all(), on contiguous arrays and on views (icp._as_points takes the
    # caller's array as it comes).
    rng = np.random.default_rng(2)
    a = rng.normal(size=(50, 2))
    for bad in (None, np.nan, np.inf, -np.inf):
        b = a.copy()
        if bad is not None:
            b[int(rng.integers(0, 50)), int(rng.integers(0, 2))] = bad
        for v in (b, b[::2], np.asfortranarray(b), b[:, ::-1], b[:0]):
            assert _kernels.all_finite(v) == bool(np.isfinite(v).all())


def test_target_sums_match_the_numpy_rows_and_bincounts():
    # Reference: covariance.censi_middle's numpy steps on the gathered (n, k) sensitivities of a
    # registered pair's line rows: the weighted source rows and three bincounts over the readings.
    tgt, jac, om, sc, rows, s_al, phi2 = _line_rows(1, 4)
    ms, mt = _kernels.target_sums(jac, om, sc, rows, tgt.nbr_index, tgt.nbr_coef, np.column_stack([s_al, phi2]),
                                  len(tgt.points))
    wj = jac * om[:, None]
    w = tgt.nbr_coef[rows]
    coef_t = -(w[..., 0] + s_al[:, None] * w[..., 1] + phi2[:, None] * w[..., 2])
    idx = tgt.nbr_index[rows].ravel()
    ref_mt = np.column_stack([np.bincount(idx, weights=(coef_t * wj[:, d:d + 1]).ravel(), minlength=len(tgt.points))
                              for d in range(3)])
    np.testing.assert_array_equal(ms, wj * sc[:, None])
    np.testing.assert_array_equal(mt, ref_mt)


def test_park_sets_aside_only_blocks_whose_leaves_the_best_leaf_suppresses():
    # The property _kernels._park relies on, checked with distinct itself: every leaf of every block
    # set aside comes after the zone's leaf in the seed's sorted list (a lower score) and is suppressed
    # by it, so dropping the block changes no pick.  Blocks of levels 0-3 scattered around each
    # seed's best leaf, some straddling the separation's edge in distance and in angle.
    rng = np.random.default_rng(12)
    r, sep_m, sep_rad = 0.1, 0.5, 0.15
    rows = np.array([[0.3, -0.2, 0.01 * a - 0.2, a // 41] for a in range(82)])       # two seeds, 41 angles each
    row_seed = rows[:, 3].astype(np.int64)
    zone = np.array([[900.0, 0.73, -0.41, rows[20, 2]], [np.nan] * 4])      # seed 1 has no leaf yet
    n = 3000
    kids = np.column_stack([rng.integers(0, 82, n), rng.integers(-3, 12, n), rng.integers(-11, 3, n),
                            rng.integers(0, 4, n)]).astype(np.int64)
    kid_score = rng.integers(850, 950, n).astype(np.int64)
    before = (np.zeros((2, 4), np.int64), np.array([5, 6], np.int64))
    kept, kept_score, parked, parked_score = _kernels._park(kids, kid_score, zone, rows, r, sep_m, sep_rad,
                                                            row_seed, *before)
    np.testing.assert_array_equal(parked[:2], before[0])
    np.testing.assert_array_equal(parked_score[:2], before[1])
    aside, aside_score = parked[2:], parked_score[2:]
    assert len(aside) > 50 and len(kept) > 50 and len(kept) + len(aside) == n
    # Every block is either kept or set aside, in its order.
    both = np.concatenate([kept, aside])
    assert sorted(map(tuple, both)) == sorted(map(tuple, kids))
    for block, score in zip(aside, aside_score):
        a, ox, oy, lvl = block
        assert row_seed[a] == 0 and score < zone[0, 0]
        span = np.arange(1 << lvl)
        gx, gy = np.meshgrid(ox + span, oy + span, indexing="ij")
        leaves = np.column_stack([np.full(gx.size, float(score)), rows[a, 0] + r * gx.ravel(),
                                  rows[a, 1] + r * gy.ravel(), np.full(gx.size, rows[a, 2])])
        records = np.vstack([zone[0], leaves])
        assert list(_kernels.distinct(records, len(records), sep_m, sep_rad)) == [0]


def test_settle_puts_back_what_a_zone_set_aside_once_the_zone_moves():
    # Two seeds, one angle row each.  Their first leaves set the zones; a leaf and a block of seed 0
    # and a block of seed 1 near those leaves are set aside; a better leaf of seed 0 far away then
    # moves seed 0's zone, and what seed 0 had set aside comes back (the block to its level's open
    # list, the leaf to seed 0's leaves) while seed 1's stays aside.
    from numba.typed import List

    rows = np.array([[0.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.01, 1.0]])
    row_seed = np.array([0, 1], np.int64)
    own = List([np.empty((0, 5)), np.empty((0, 5))])
    lists = List([np.empty((0, 5)), np.empty((0, 5))])
    kth = np.full(2, -1.0)
    open_nodes = List([np.zeros((0, 4), np.int64) for _ in range(4)])
    open_score = List([np.zeros(0, np.int64) for _ in range(4)])
    zone = np.full((2, 4), np.nan)
    parked, parked_score = np.zeros((0, 4), np.int64), np.zeros(0, np.int64)
    args = (0.1, row_seed, 3, 0.5, 0.15, 4096)

    first = np.array([[100.0, 0.5, 0.5, 0.0, 0.0], [90.0, 0.0, 0.0, 0.01, 1.0]])
    merged, bar = _kernels._add_leaves(first, own, lists, kth, 3, 0.5, 0.15, 4096)
    merged, bar, parked, parked_score = _kernels._settle(merged, bar, own, lists, kth, zone, parked, parked_score,
                                                         open_nodes, open_score, rows, *args)
    np.testing.assert_array_equal(zone, first[:, :4])
    assert len(parked) == 0

    kids = np.array([[0, 5, 6, 0], [0, 4, 4, 2], [1, 0, 0, 1]], np.int64)
    kept, _, parked, parked_score = _kernels._park(kids, np.array([60, 80, 50], np.int64), zone, rows, 0.1, 0.5,
                                                   0.15, row_seed, parked, parked_score)
    assert len(kept) == 0 and len(parked) == 3

    better = np.array([[120.0, 3.0, 3.0, 0.0, 0.0]])
    merged, bar = _kernels._add_leaves(better, own, lists, kth, 3, 0.5, 0.15, 4096)
    merged, bar, parked, parked_score = _kernels._settle(merged, bar, own, lists, kth, zone, parked, parked_score,
                                                         open_nodes, open_score, rows, *args)
    np.testing.assert_array_equal(zone[0], better[0, :4])
    np.testing.assert_array_equal(parked, kids[2:])
    np.testing.assert_array_equal(parked_score, [50])
    np.testing.assert_array_equal(open_nodes[2], kids[1:2])
    np.testing.assert_array_equal(open_score[2], [80])
    # The leaf is among seed 0's leaves again (x 0.5, y 0.6); its best list, the new leaf and the old
    # best, suppresses it as before.
    assert any(row[0] == 60.0 and abs(row[1] - 0.5) < 1e-12 and abs(row[2] - 0.6) < 1e-12 for row in own[0])
    np.testing.assert_array_equal(lists[0][:, 0], [120.0, 100.0])
