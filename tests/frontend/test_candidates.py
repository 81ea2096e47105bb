"""Candidate proposal: descriptor retrieval, proximity gate, fusion, external pairs."""

import math

import numpy as np
import pytest
import scipy.spatial
import scipy.stats
from sklearn.decomposition import PCA
from sklearn.neighbors import NearestNeighbors

from closurecheck.core import se2
from closurecheck.core.odometry import (
    OdometryChain,
    OdometryNoise,
    keyframe_step_covariances,
)
from closurecheck.errors import InputError
from closurecheck.frontend import candidates as cand
from closurecheck.frontend.candidates import (
    SOURCE_DESCRIPTOR,
    SOURCE_EXTERNAL,
    SOURCE_PROXIMITY,
    CandidateOptions,
    descriptor_neighbours,
    excluded,
    external_candidates,
    gate_distance_sq,
    merge_candidates,
    prepare,
    propose_for,
    proximity_neighbours,
)
from closurecheck.frontend.keyframes import odometry_travel, select_keyframes
from closurecheck.io.pairs_csv import ExternalPairs
from closurecheck.io.scanlog import Sensor, make_scanlog
from closurecheck.reporting import ground_truth
from closurecheck.simulation import raycast

# --------------------------------------------------------------------------
# descriptor retrieval against scikit-learn's brute-force search


def _brute_reference(x, t, travel, k, options):
    """k nearest outside the gap from an exhaustive search by the reference
    library, scikit-learn NearestNeighbors(algorithm="brute")."""
    n = len(x)
    dist, idx = NearestNeighbors(algorithm="brute").fit(x).kneighbors(x, n_neighbors=n)
    out_d = np.full((n, k), np.inf)
    out_i = np.full((n, k), -1)
    for r in range(n):
        keep = ~excluded(t, travel, np.full(n, r), idx[r], options)
        out_d[r, :keep.sum()] = dist[r, keep][:k]
        out_i[r, :keep.sum()] = idx[r, keep][:k]
    return out_d[:, :k], out_i[:, :k]


@pytest.mark.parametrize("tree", ["kd_tree", "ball_tree"])
def test_retrieval_matches_brute_force_search(tree):
    rng = np.random.default_rng(0)
    n = 400
    # Clustered vectors, like descriptors of places visited several times.
    centres = rng.normal(size=(40, 12))
    x = centres[rng.integers(0, 40, n)] + 0.3 * rng.normal(size=(n, 12))
    t = np.cumsum(rng.uniform(0.5, 1.5, n))
    travel = np.cumsum(rng.uniform(0.3, 0.7, n))
    opts = CandidateOptions(descriptor_neighbours=7, exclude_time_s=15.0, exclude_travel_m=4.0, tree=tree)
    dist, idx = descriptor_neighbours(x, t, travel, opts)
    ref_d, ref_i = _brute_reference(x, t, travel, 7, opts)
    np.testing.assert_array_equal(idx, ref_i)
    np.testing.assert_allclose(dist, ref_d, rtol=1e-12)


def test_kd_tree_distances_are_scikit_learns_to_the_bit():
    # The reference library: scikit-learn's KDTree (NearestNeighbors(algorithm="kd_tree")), whose
    # distances the candidates used before and whose bits reach the ranking (descriptor_distance).
    # scipy's kd-tree alone sums the squares in another order and differs in the last bits.
    rng = np.random.default_rng(7)
    for dims in (1, 5, 12, 30):
        centres = rng.normal(size=(30, dims))
        x = centres[rng.integers(0, 30, 500)] + 0.2 * rng.normal(size=(500, dims))
        rows = rng.choice(500, 200, replace=False)
        ref_d, ref_i = NearestNeighbors(algorithm="kd_tree").fit(x).kneighbors(x[rows], n_neighbors=9)
        d, i = cand.nearest_exact(scipy.spatial.cKDTree(x), x, rows, 9)
        np.testing.assert_array_equal(i, ref_i)
        assert np.array_equal(d, ref_d)


def test_nearest_exact_breaks_ties_by_index_and_widens_past_them():
    # Points of an integer lattice: many neighbours at exactly the same distance, so the n-th
    # distance often equals the last proposed one and the query must widen. Reference: an
    # exhaustive search, sorted by distance then index.
    g = np.arange(9.0)
    x = np.stack(np.meshgrid(g, g, indexing="ij"), axis=-1).reshape(-1, 2)
    full = np.sqrt(((x[:, None, :] - x[None, :, :]) ** 2).sum(-1))
    tree = scipy.spatial.cKDTree(x)
    rows = np.arange(len(x))
    for n in (1, 2, 5, 9, 13, 40, len(x)):
        d, i = cand.nearest_exact(tree, x, rows, n)
        order = np.lexsort((np.broadcast_to(np.arange(len(x)), full.shape), full), axis=-1)[:, :n]
        np.testing.assert_array_equal(i, order)
        np.testing.assert_array_equal(d, np.take_along_axis(full, order, 1))


def test_search_space_is_scikit_learns_pca_to_the_bit(loop):
    # The reference library: PCA(svd_solver="full").fit_transform, which search_space follows step
    # for step without importing scikit-learn.
    _, _, data = loop
    rng = np.random.default_rng(3)
    for x, dims in ((data.descriptors.vectors, 12), (rng.normal(size=(300, 40)) @ rng.normal(size=(40, 40)), 5),
                    (rng.normal(size=(50, 8)), 7)):
        ours = cand.search_space(x, CandidateOptions(search_dims=dims))
        ref = PCA(n_components=dims, svd_solver="full").fit_transform(x)
        assert ours.shape == ref.shape and np.array_equal(ours, ref)


def test_a_run_imports_neither_scikit_learn_nor_scipy_stats():
    # Both took about 1.1 s of a run's start (docs/performance.md); the default run needs neither.
    import subprocess
    import sys

    code = ("import sys, closurecheck.cli, closurecheck.pipeline, closurecheck.reporting.scoring\n"
            "print(sorted(m for m in ('scipy.stats', 'sklearn') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=300)
    assert out.stdout.strip() == "[]"


def test_retrieval_pads_rows_without_enough_partners():
    # Only the first and last 5 of 60 keyframes are far enough apart in
    # time, so most rows must search the whole set and come back short.
    rng = np.random.default_rng(1)
    x = rng.normal(size=(60, 5))
    t = np.arange(60.0)
    travel = np.arange(60.0)
    opts = CandidateOptions(descriptor_neighbours=8, exclude_time_s=55.0, exclude_travel_m=0.0)
    dist, idx = descriptor_neighbours(x, t, travel, opts)
    ref_d, ref_i = _brute_reference(x, t, travel, 8, opts)
    np.testing.assert_array_equal(idx, ref_i)
    assert (idx[10:50] == -1).all() and np.isinf(dist[10:50]).all()
    assert (idx[0, :5] >= 55).all() and (idx[0, 5:] == -1).all()


# --------------------------------------------------------------------------
# proximity gate


@pytest.mark.parametrize("probability, table", [(0.95, 7.815), (0.99, 11.345)])
def test_gate_threshold_is_the_chi_square_quantile(probability, table):
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4,
    # upper critical values of the chi-square distribution, 3 degrees of
    # freedom: 7.815 (0.95) and 11.345 (0.99).
    opts = CandidateOptions(gate_probability=probability)
    assert opts.gate_threshold == pytest.approx(table, abs=5e-4)
    assert opts.gate_threshold == pytest.approx(scipy.stats.chi2.ppf(probability, 3), rel=1e-12)


def _spiral_chain(noise=OdometryNoise(0.05, 0.02, 0.03)):
    """Three laps of a circle of radius 5 m whose radius grows 0.6 m per lap:
    pairs of laps pass at many different distances."""
    n_per_lap = 40
    s = np.arange(3 * n_per_lap)
    ang = 2 * math.pi * s / n_per_lap
    radius = 5.0 + 0.6 * s / n_per_lap
    poses = np.column_stack([radius * np.cos(ang), radius * np.sin(ang), se2.wrap(ang + math.pi / 2)])
    chain = OdometryChain.build(poses, np.arange(len(poses)), noise)
    travel, _ = odometry_travel(poses)
    return chain, np.arange(len(poses), dtype=float), travel, noise


def test_gate_statistic_matches_sequential_propagation():
    chain, _, _, noise = _spiral_chain()
    q = keyframe_step_covariances(noise, chain.poses, chain.ids)
    steps = se2.between(chain.poses[:-1], chain.poses[1:])
    opts = CandidateOptions()
    near = np.diag([1.0, 1.0, math.radians(30) ** 2])
    for i, j in [(0, 40), (5, 46), (3, 117), (50, 91)]:
        delta, cov = se2.chain_covariance_between(steps, q, i, j)
        ref = delta @ np.linalg.inv(cov + near) @ delta
        assert gate_distance_sq(chain, np.array([i]), np.array([j]), opts)[0] == pytest.approx(ref, rel=1e-9)
        # Symmetric in the pair's order.
        assert gate_distance_sq(chain, np.array([j]), np.array([i]), opts)[0] == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("probability", [0.95, 0.99])
def test_proximity_keeps_exactly_the_pairs_inside_the_chi_square_gate(probability):
    chain, t, travel, _ = _spiral_chain()
    opts = CandidateOptions(gate_probability=probability, proximity_neighbours=200, proximity_max_radius_m=100.0,
                            exclude_time_s=10.0, exclude_travel_m=5.0)
    m2, idx = proximity_neighbours(chain, t, travel, opts)
    n = len(chain)
    i, j = np.triu_indices(n, 1)
    keep = ~excluded(t, travel, i, j, opts)
    i, j = i[keep], j[keep]
    stat = gate_distance_sq(chain, i, j, opts)
    thr = scipy.stats.chi2.ppf(probability, 3)
    expected = {(a, b) for a, b, s in zip(i, j, stat) if s <= thr}
    rows = np.broadcast_to(np.arange(n)[:, None], idx.shape)
    got = {(min(a, b), max(a, b)) for a, b in zip(rows[idx >= 0], idx[idx >= 0])}
    assert got == expected
    assert np.all(m2[idx >= 0] <= thr)
    # The spiral has pairs between the two quantiles, so the probability matters.
    assert np.any((stat > 7.815) & (stat <= 11.345))


def _circle_then_offset(radius, offset_m, n=40):
    """A closed circle of keyframes back to the start, then one step to
    ``offset_m`` ahead of the start: the delta first -> last is (offset, 0, 0)
    whatever the circle's size."""
    ang = 2 * math.pi * np.arange(n + 1) / n
    circle = np.column_stack([radius * np.sin(ang), radius * (1 - np.cos(ang)), se2.wrap(ang)])
    poses = np.vstack([circle, [offset_m, 0.0, 0.0]])
    return OdometryChain.build(poses, np.arange(len(poses)), OdometryNoise())


def test_gate_widens_as_drift_accumulates():
    opts = CandidateOptions()
    first_last = (np.array([0]), np.array([41]))
    short = _circle_then_offset(2.0, 4.0)   # 17 m of odometry between them
    long = _circle_then_offset(15.0, 4.0)   # 98 m
    for chain in (short, long):
        delta, _ = chain.relative_by_index(*first_last)
        np.testing.assert_allclose(delta[0], [4.0, 0.0, 0.0], atol=1e-9)
    # Same predicted delta; only the drift accumulated on the way differs.
    assert gate_distance_sq(short, *first_last, opts)[0] > opts.gate_threshold
    assert gate_distance_sq(long, *first_last, opts)[0] < opts.gate_threshold


# --------------------------------------------------------------------------
# a small invented corridor loop, driven twice


def _loop_log(seed=0):
    outer = [[0, 0, 16, 0], [16, 0, 16, 10], [16, 10, 0, 10], [0, 10, 0, 0]]
    inner = [[2, 2, 14, 2], [14, 2, 14, 8], [14, 8, 2, 8], [2, 8, 2, 2]]
    marks = [[5, 0, 5, 0.7], [9, 10, 9, 9.3], [16, 5, 15.4, 5.4], [0, 3, 0.5, 3], [11, 0, 11.4, 0.4]]
    segments = np.array(outer + inner + marks, float)
    posts = np.array([[7, 1.0, 0.2], [12, 9.0, 0.25], [1, 7, 0.3], [15, 2.5, 0.2]])
    corners = np.array([[1, 1], [15, 1], [15, 9], [1, 9], [1, 1]], float)
    pts = []
    for _ in range(2):
        for a, b in zip(corners[:-1], corners[1:]):
            n = int(np.linalg.norm(b - a) / 0.25)
            pts.extend(a + (b - a) * k / n for k in range(n))
    pts = np.array(pts)
    d = np.roll(pts, -1, axis=0) - pts
    truth = np.column_stack([pts, np.arctan2(d[:, 1], d[:, 0])])
    sensor = Sensor(-2.356, 0.00654, 721, 0.05, 20.0)
    rng = np.random.default_rng(seed)
    r = raycast.cast(truth, sensor.bearings(), segments, posts, max_range=20.0) + rng.normal(0, 0.01, (len(truth), 721))
    r[rng.random(r.shape) < 0.02] = np.nan
    steps = se2.between(truth[:-1], truth[1:])
    steps[:, 2] += 0.004 + rng.normal(0, 0.003, len(steps))  # a heading bias: the odometry drifts
    odom = np.vstack([[0, 0, 0], se2.chain(steps)[0][1:]])
    return make_scanlog(sensor, np.arange(len(truth)) * 0.25, odom, r, truth)


@pytest.fixture(scope="module")
def loop():
    log = _loop_log()
    kf = select_keyframes(log.odom)
    return log, kf, prepare(log, kf)


def test_proposals_on_a_loop_find_the_revisits_within_budget(loop):
    log, kf, data = loop
    opts = CandidateOptions()
    c = propose_for(data, opts)
    assert len(c) > 0
    assert np.all(c.src > c.dst)
    key = np.minimum(c.src, c.dst) * 10 ** 6 + np.maximum(c.src, c.dst)
    assert len(np.unique(key)) == len(c)
    a, b = np.searchsorted(kf, c.src), np.searchsorted(kf, c.dst)
    assert not np.any(excluded(data.t, data.travel, a, b, opts))
    assert len(c) <= opts.max_per_keyframe * len(kf)
    # Source flags describe the pair: the proximity bit is the gate's verdict.
    np.testing.assert_array_equal((c.sources & SOURCE_PROXIMITY) > 0, c.gate_distance_sq <= opts.gate_threshold)
    _, idx = descriptor_neighbours(cand.search_space(data.descriptors.vectors, opts), data.t, data.travel, opts)
    listed = {(min(r, q), max(r, q)) for r, row in enumerate(idx) for q in row if q >= 0}
    np.testing.assert_array_equal((c.sources & SOURCE_DESCRIPTOR) > 0,
                                  [(min(x, y), max(x, y)) in listed for x, y in zip(a, b)])
    r = ground_truth.candidate_recall(kf, log.truth[kf], data.t, data.travel, c.src, c.dst, opts)
    assert r.events >= 5
    assert r.recall >= 0.95


def test_search_space_keeps_most_full_descriptor_neighbours(loop):
    _, _, data = loop
    opts = CandidateOptions()
    full = descriptor_neighbours(data.descriptors.vectors, data.t, data.travel, opts)[1]
    reduced_vectors = cand.search_space(data.descriptors.vectors, opts)
    assert reduced_vectors.shape == (len(full), opts.search_dims)
    reduced = descriptor_neighbours(reduced_vectors, data.t, data.travel, opts)[1]
    overlap = np.mean([len(set(f) & set(r)) / len(f) for f, r in zip(full, reduced)])
    assert overlap > 0.8
    same = cand.search_space(data.descriptors.vectors, CandidateOptions(search_dims=0))
    np.testing.assert_array_equal(same, data.descriptors.vectors)


def test_blocks_do_not_change_the_proposals(loop):
    _, _, data = loop
    one = propose_for(data, CandidateOptions())
    many = propose_for(data, CandidateOptions(block_keyframes=7))
    np.testing.assert_array_equal(one.src, many.src)
    np.testing.assert_array_equal(one.dst, many.dst)
    np.testing.assert_array_equal(one.guess, many.guess)


def test_guess_is_closer_to_truth_than_raw_odometry(loop):
    log, _, data = loop
    c = propose_for(data)
    truth = se2.between(log.truth[c.src], log.truth[c.dst])
    same = np.hypot(truth[:, 0], truth[:, 1]) < 1.0
    err_guess = np.hypot(*(c.guess - truth)[same, :2].T)
    err_odo = np.hypot(*(c.odometry_delta - truth)[same, :2].T)
    assert np.median(err_guess) < 0.5 * np.median(err_odo)
    yaw_err = np.abs(se2.wrap(c.guess[same, 2] - truth[same, 2]))
    assert np.median(yaw_err) < math.radians(2)


def test_max_per_keyframe_bounds_the_proposals(loop):
    _, kf, data = loop
    few = propose_for(data, CandidateOptions(max_per_keyframe=1, max_score=1e9))
    many = propose_for(data, CandidateOptions(max_per_keyframe=4, max_score=1e9))
    assert len(few) <= len(kf) < len(many) <= 4 * len(kf)


def test_max_score_drops_implausible_candidates(loop):
    _, _, data = loop
    strict = propose_for(data, CandidateOptions(max_score=2.0))
    loose = propose_for(data, CandidateOptions(max_score=1e9))
    assert np.all(strict.score <= 2.0)
    assert len(strict) < len(loose) and np.any(loose.score > 2.0)
    # Dropping candidates only frees budget: a keyframe keeps a pair it would
    # keep anyway, so the strict set's best pairs are all in the loose set.
    loose_keys = set(zip(loose.src.tolist(), loose.dst.tolist()))
    best = strict.score <= np.median(strict.score)
    assert all(k in loose_keys for k in zip(strict.src[best].tolist(), strict.dst[best].tolist()))


def test_external_pairs_keep_orientation_and_merge_with_proposals(loop):
    _, kf, data = loop
    proposed = propose_for(data)
    p0 = (int(proposed.src[0]), int(proposed.dst[0]))
    pairs = ExternalPairs(src=np.array([p0[1], kf[3]]), dst=np.array([p0[0], kf[40]]),
                          guess=np.array([[0.1, 0.2, 0.3], [np.nan] * 3]), lines=np.array([2, 3]))
    ext = external_candidates(pairs, data.descriptors, data.chain)
    np.testing.assert_array_equal(ext.src, pairs.src)
    np.testing.assert_allclose(ext.guess[0], [0.1, 0.2, 0.3])
    assert np.all(ext.sources & SOURCE_EXTERNAL)
    merged = merge_candidates(ext, proposed)
    assert len(merged) == len(proposed) + 1
    # The file's orientation wins; the flags combine.
    assert (int(merged.src[0]), int(merged.dst[0])) == (p0[1], p0[0])
    assert merged.sources[0] == ext.sources[0] | proposed.sources[0]
    assert merged.score[0] == proposed.score[0]
    assert merged.source_names()[0].startswith("external+")


def test_external_pairs_must_be_keyframes(loop):
    _, kf, data = loop
    bad = int(np.setdiff1d(np.arange(kf[-1]), kf)[0])
    pairs = ExternalPairs(np.array([bad]), np.array([kf[0]]), np.full((1, 3), np.nan), np.array([2]))
    with pytest.raises(InputError, match="merge the pairs' scan ids"):
        external_candidates(pairs, data.descriptors, data.chain)


@pytest.mark.parametrize("kwargs", [{"gate_probability": 1.0}, {"max_per_keyframe": 0}, {"tree": "brute"},
                                    {"exclude_time_s": -1.0}, {"descriptor_neighbours": 2.5}])
def test_bad_options_raise_input_error(kwargs):
    with pytest.raises(InputError):
        CandidateOptions(**kwargs)


def test_tiny_inputs_give_no_candidates():
    chain = OdometryChain.build(np.zeros((1, 3)), np.array([0]))
    desc = cand.describe(np.full((1, 721), np.nan), Sensor(-2.356, 0.00654, 721, 0.05, 20.0))
    c = cand.propose(np.zeros(1), np.zeros(1), desc, chain)
    assert len(c) == 0 and c.yaw.shape == (0, 3)


def test_a_revisit_the_odometry_predicts_is_proposed_however_it_describes(loop):
    # In a grid of identical columns a place half a metre away can describe
    # worse than a look-alike one pitch away.  Spoil the descriptors of the
    # second lap: the revisits the odometry predicts must still be proposed.
    import dataclasses

    log, kf, data = loop
    opts = CandidateOptions()
    # Odometry as good as the truth, so that it predicts every revisit.
    data = dataclasses.replace(data, chain=OdometryChain.from_steps(kf, log.truth[kf], data.chain.steps))
    odo, _ = data.chain.relative_by_index(np.arange(len(kf))[:, None], np.arange(len(kf))[None, :])
    near = (np.hypot(odo[..., 0], odo[..., 1]) <= opts.near_distance_m) & (np.abs(odo[..., 2]) <= opts.near_heading_rad)
    half = len(kf) // 2
    second = [r for r in range(half + 10, len(kf)) if near[r, :half - 10].any()]
    assert len(second) >= 10
    vectors = data.descriptors.vectors.copy()
    rng = np.random.default_rng(0)
    vectors[half:] += rng.normal(0, 50 * vectors.std(), vectors[half:].shape)
    spoiled = dataclasses.replace(data, descriptors=dataclasses.replace(data.descriptors, vectors=vectors))

    def covered(c):
        a, b = np.searchsorted(kf, c.src), np.searchsorted(kf, c.dst)
        pairs = set(zip(a.tolist(), b.tolist()))
        return sum(any((r, q) in pairs for q in np.flatnonzero(near[r, :half - 10])) for r in second)

    with_rule = covered(propose_for(spoiled, opts))
    without = covered(propose_for(spoiled, CandidateOptions(odometry_revisit_first=False)))
    assert with_rule >= 0.9 * len(second)
    assert without < with_rule


def test_a_revisit_just_outside_the_near_region_is_still_proposed(loop):
    # Odometry that puts the second lap about 1.15 m off the first (beyond
    # the 1 m "same place" region, as heading drift does late in a log) with
    # spoiled descriptors: the gate statistic (below the chi-square median)
    # still marks each true revisit as the typical one, so it is proposed.
    import dataclasses

    log, kf, data = loop
    opts = CandidateOptions()
    truth = log.truth[kf]
    d = np.hypot(*(truth[:, None, :2] - truth[None, :, :2]).transpose(2, 0, 1))
    half = len(kf) // 2
    second = [r for r in range(half + 10, len(kf)) if (d[r, :half - 10] <= 0.3).any()]
    assert len(second) >= 10
    poses = truth.copy()
    poses[half:, 0] += 1.15
    data = dataclasses.replace(data, chain=OdometryChain.from_steps(kf, poses, data.chain.steps))
    nearest = np.array([int(np.argmin(d[r, :half - 10])) for r in second])
    odo, _ = data.chain.relative_by_index(np.array(second), nearest)
    assert np.all(np.hypot(odo[:, 0], odo[:, 1]) > opts.near_distance_m)
    vectors = data.descriptors.vectors.copy()
    vectors[half:] += np.random.default_rng(0).normal(0, 50 * vectors.std(), vectors[half:].shape)
    spoiled = dataclasses.replace(data, descriptors=dataclasses.replace(data.descriptors, vectors=vectors))

    def covered(c):
        a, b = np.searchsorted(kf, c.src), np.searchsorted(kf, c.dst)
        pairs = set(zip(a.tolist(), b.tolist()))
        return sum(any((r, q) in pairs for q in np.flatnonzero(d[r, :half - 10] <= 1.0)) for r in second)

    with_rule = covered(propose_for(spoiled, opts))
    without = covered(propose_for(spoiled, CandidateOptions(odometry_revisit_first=False)))
    assert with_rule >= 0.9 * len(second)
    assert without < with_rule
