"""Consistency checks: odometry chi-square gate and pairwise (PCM) cycle test.

External references:
* NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4
  (critical values of the chi-square distribution): 3 degrees of freedom,
  upper-tail 0.05 -> 7.815 and 0.01 -> 11.345.
* scipy.stats.chi2 (reference library) for quantiles and the chi-square(3)
  law the distances must follow (mean 3, P(d2 <= q95) = 0.95).
* Mangelson et al., ICRA 2018 (PCM): the cycle a -> b -> d -> c -> a of two
  consistent closures composes to the identity.
* Central finite differences of se2.compose / se2.between for the first-order
  covariance propagation, in a plain per-pair loop written here.
"""

import numpy as np
import pytest
import scipy.stats

from closurecheck.core import se2
from closurecheck.core.stats import chi2_threshold
from closurecheck.errors import InputError
from closurecheck.verification.clique import max_clique
from closurecheck.verification.consistency import (
    ConsistencyOptions,
    _pairwise_consistency_dense,
    odometry_gate,
    pair_distances,
    pairwise_consistency,
)

STEP_SIGMA = np.array([0.01, 0.005, 0.004])  # odometry step noise [m, m, rad] (invented demo scale)
CLOSURE_SIGMA = np.array([0.03, 0.03, 0.01])  # registration noise [m, m, rad] (invented demo scale)


def random_steps(rng, n_steps):
    return np.column_stack(
        [rng.uniform(0.3, 0.6, n_steps), rng.normal(0.0, 0.03, n_steps), rng.normal(0.0, 0.25, n_steps)]
    )


def step_covariances(rng, n_steps, sigma=STEP_SIGMA):
    q = np.zeros((n_steps, 3, 3))
    q[:, [0, 1, 2], [0, 1, 2]] = sigma**2
    q[:, 0, 1] = q[:, 1, 0] = 0.3 * sigma[0] * sigma[1]
    return q


def random_spd(rng, k, sigma=CLOSURE_SIGMA):
    """SPD covariances with correlations, diagonal near sigma^2."""
    out = np.empty((k, 3, 3))
    for i in range(k):
        corr = rng.uniform(-0.4, 0.4, 3)
        c = np.array([[1, corr[0], corr[1]], [corr[0], 1, corr[2]], [corr[1], corr[2], 1]])
        c += np.eye(3) * max(0.0, 0.05 - np.linalg.eigvalsh(c)[0])
        out[i] = c * np.outer(sigma, sigma)
    return out


def sample(rng, cov):
    return np.einsum("...ij,...j->...i", np.linalg.cholesky(cov), rng.normal(size=cov.shape[:-1]))


class Scene:
    """Truth trajectory, noisy odometry of it, and loop closures measured from truth."""

    def __init__(self, rng, n_nodes, closures, odometry_noise=True, closure_noise=True):
        self.truth, _ = se2.chain(random_steps(rng, n_nodes - 1))
        self.truth = se2.compose(np.array([3.0, -2.0, 0.7]), self.truth)
        self.q = step_covariances(rng, n_nodes - 1)
        true_steps = se2.between(self.truth[:-1], self.truth[1:])
        meas_steps = true_steps + (sample(rng, self.q) if odometry_noise else 0.0)
        meas_steps[:, 2] = se2.wrap(meas_steps[:, 2])
        self.steps = meas_steps
        rel, _ = se2.chain(meas_steps)
        self.poses = se2.compose(self.truth[0], rel)
        self.prefix = se2.chain_prefix(self.poses, self.q)
        closures = np.asarray(closures)
        self.src, self.dst = closures[:, 0], closures[:, 1]
        self.cov = random_spd(rng, len(closures))
        self.deltas = se2.between(self.truth[self.src], self.truth[self.dst])
        if closure_noise:
            self.deltas = self.deltas + sample(rng, self.cov)
            self.deltas[:, 2] = se2.wrap(self.deltas[:, 2])

    def args(self):
        return self.src, self.dst, self.deltas, self.cov, self.poses, self.prefix


# --------------------------------------------------------------------------
# reference implementation: plain loops, numerical Jacobians


def numerical_jacobian(f, x, eps=1e-6):
    cols = []
    for k in range(len(x)):
        d = np.zeros_like(x)
        d[k] = eps
        diff = f(x + d) - f(x - d)
        diff[2] = se2.wrap(diff[2])
        cols.append(diff / (2 * eps))
    return np.stack(cols, axis=-1)


def odometry_delta(steps, i, j):
    """poses[i]^-1 ∘ poses[j] by composing steps one by one (either order)."""
    lo, hi = min(i, j), max(i, j)
    t = np.zeros(3)
    for k in range(lo, hi):
        t = se2.compose(t, steps[k])
    return t if i <= j else se2.inverse(t)


def oriented(scene, k):
    """Closure k turned to run from its earlier to its later node, the
    covariance carried through a numerical Jacobian of se2.inverse."""
    a, b, z, cov = scene.src[k], scene.dst[k], scene.deltas[k], scene.cov[k]
    if a <= b:
        return a, b, z, cov
    jac = numerical_jacobian(se2.inverse, z)
    return b, a, se2.inverse(z), jac @ cov @ jac.T


def loop_pair_distance_all_steps(scene, i, j):
    """Cycle distance with every odometry step as an independent variable:
    the exact first-order covariance, shared steps included."""
    a, b, zi0, cov_i = oriented(scene, i)
    c, d, zj0, cov_j = oriented(scene, j)
    n_steps = len(scene.steps)

    def cycle(v):
        zi, zj, steps = v[:3], v[3:6], v[6:].reshape(n_steps, 3)
        e = se2.compose(se2.compose(zi, odometry_delta(steps, b, d)), se2.inverse(zj))
        return se2.compose(e, odometry_delta(steps, c, a))

    v = np.concatenate([zi0, zj0, scene.steps.ravel()])
    jac = numerical_jacobian(cycle, v)
    sigma = np.zeros((len(v), len(v)))
    sigma[:3, :3] = cov_i
    sigma[3:6, 3:6] = cov_j
    for k in range(n_steps):
        sigma[6 + 3 * k : 9 + 3 * k, 6 + 3 * k : 9 + 3 * k] = scene.q[k]
    e = cycle(v)
    return e @ np.linalg.solve(jac @ sigma @ jac.T, e)


def segment_covariance(scene, i, j):
    """Covariance of poses[i]^-1 ∘ poses[j] from se2.chain; for i > j the
    inverse's covariance through a numerical Jacobian of se2.inverse."""
    lo, hi = min(i, j), max(i, j)
    t, cov = se2.chain(scene.steps[lo:hi], scene.q[lo:hi])
    if i <= j:
        return cov[-1]
    jac = numerical_jacobian(se2.inverse, t[-1])
    return jac @ cov[-1] @ jac.T


def loop_pair_distance_independent_segments(scene, i, j):
    """Cycle distance with the two odometry segments treated as independent."""
    a, b, zi, cov_i = oriented(scene, i)
    c, d, zj, cov_j = oriented(scene, j)
    t_bd = odometry_delta(scene.steps, b, d)
    t_ca = odometry_delta(scene.steps, c, a)

    def cycle(v):
        return se2.compose(se2.compose(se2.compose(v[:3], v[3:6]), se2.inverse(v[6:9])), v[9:12])

    v = np.concatenate([zi, t_bd, zj, t_ca])
    jac = numerical_jacobian(cycle, v)
    sigma = np.zeros((12, 12))
    sigma[:3, :3] = cov_i
    sigma[3:6, 3:6] = segment_covariance(scene, b, d)
    sigma[6:9, 6:9] = cov_j
    sigma[9:12, 9:12] = segment_covariance(scene, c, a)
    e = cycle(v)
    return e @ np.linalg.solve(jac @ sigma @ jac.T, e)


def loop_gate_distance(scene, k):
    a, b = scene.src[k], scene.dst[k]
    n_steps = len(scene.steps)

    def error(v):
        return se2.between(odometry_delta(v[3:].reshape(n_steps, 3), a, b), v[:3])

    v = np.concatenate([scene.deltas[k], scene.steps.ravel()])
    jac = numerical_jacobian(error, v)
    sigma = np.zeros((len(v), len(v)))
    sigma[:3, :3] = scene.cov[k]
    for s in range(n_steps):
        sigma[3 + 3 * s : 6 + 3 * s, 3 + 3 * s : 6 + 3 * s] = scene.q[s]
    e = error(v)
    return e @ np.linalg.solve(jac @ sigma @ jac.T, e)


# --------------------------------------------------------------------------
# chi-square quantiles


# --------------------------------------------------------------------------
# agreement with the plain loop


# Both directions; after orientation (earlier node first) the pairs
# (1, 5)-(13, 7) and (8, 11)-(15, 18) have cycles whose odometry segments
# share steps, the others do not.
MIXED_CLOSURES = [(2, 14), (17, 4), (6, 21), (23, 9), (8, 11), (1, 5), (13, 7), (15, 18)]


def test_pair_distances_equal_per_pair_loop_with_shared_steps():
    rng = np.random.default_rng(21)
    scene = Scene(rng, 25, MIXED_CLOSURES)
    k = len(MIXED_CLOSURES)
    first, second = np.array([(i, j) for i in range(k) for j in range(k) if i != j]).T
    got = pair_distances(*scene.args(), first, second)
    ref = np.array([loop_pair_distance_all_steps(scene, i, j) for i, j in zip(first, second)])
    # Several pairs have overlapping segments in one or both directions.
    assert got == pytest.approx(ref, rel=1e-6)


def test_pair_distances_equal_per_pair_loop_with_independent_segments():
    rng = np.random.default_rng(22)
    scene = Scene(rng, 25, MIXED_CLOSURES)
    k = len(MIXED_CLOSURES)
    first, second = np.array([(i, j) for i in range(k) for j in range(k) if i != j]).T
    got = pair_distances(*scene.args(), first, second, shared_odometry=False)
    ref = np.array([loop_pair_distance_independent_segments(scene, i, j) for i, j in zip(first, second)])
    assert got == pytest.approx(ref, rel=1e-6)
    shared = pair_distances(*scene.args(), first, second, shared_odometry=True)
    assert not np.allclose(shared, got, rtol=1e-3)  # the overlap does change the answer


def test_gate_equals_per_closure_loop_including_src_after_dst():
    rng = np.random.default_rng(23)
    scene = Scene(rng, 25, MIXED_CLOSURES)
    gate = odometry_gate(*scene.args())
    ref = np.array([loop_gate_distance(scene, k) for k in range(len(MIXED_CLOSURES))])
    assert gate.distance_sq == pytest.approx(ref, rel=1e-6)
    for k, (a, b) in enumerate(MIXED_CLOSURES):
        assert gate.predicted[k] == pytest.approx(se2.between(scene.poses[a], scene.poses[b]), abs=1e-9)
        assert gate.predicted_covariance[k] == pytest.approx(segment_covariance(scene, a, b), rel=1e-5, abs=1e-12)


def test_reversing_a_closure_changes_distances_only_at_second_order():
    rng = np.random.default_rng(24)
    scene = Scene(rng, 25, MIXED_CLOSURES)
    flipped = Scene(np.random.default_rng(24), 25, MIXED_CLOSURES)
    k = 1
    jac = numerical_jacobian(se2.inverse, scene.deltas[k])
    flipped.src[k], flipped.dst[k] = scene.dst[k], scene.src[k]
    flipped.deltas[k] = se2.inverse(scene.deltas[k])
    flipped.cov[k] = jac @ scene.cov[k] @ jac.T
    g0, g1 = odometry_gate(*scene.args()), odometry_gate(*flipped.args())
    assert g1.distance_sq[k] == pytest.approx(g0.distance_sq[k], rel=0.05)
    others = np.arange(len(MIXED_CLOSURES)) != k
    assert g1.distance_sq[others] == pytest.approx(g0.distance_sq[others], rel=1e-12)
    first = np.full(len(MIXED_CLOSURES) - 1, k)
    second = np.flatnonzero(others)
    p0 = pair_distances(*scene.args(), first, second)
    p1 = pair_distances(*flipped.args(), first, second)
    assert p1 == pytest.approx(p0, rel=0.05)


# --------------------------------------------------------------------------
# the noise-free case and the chi-square law


def test_cycle_is_identity_for_exact_closures_on_noise_free_chain():
    rng = np.random.default_rng(31)
    scene = Scene(rng, 40, [(0, 30), (35, 5), (12, 27), (20, 8), (3, 39)], odometry_noise=False, closure_noise=False)
    res = _pairwise_consistency_dense(*scene.args())
    assert np.max(res.distance_sq) < 1e-18
    assert res.adjacency.nnz == 5 * 4
    assert pairwise_consistency(*scene.args()).conflicts.nnz == 0
    gate = odometry_gate(*scene.args())
    assert np.max(gate.distance_sq) < 1e-18
    assert gate.passed.all()


def regional_scene(rng, n_regions, layout, region_nodes=12):
    """Many independent regions of one chain, each with its own closures,
    so the distances of different regions are independent samples."""
    layout = np.asarray(layout)
    offsets = np.arange(n_regions)[:, None, None] * region_nodes
    closures = (layout[None] + offsets).reshape(-1, 2)
    return Scene(rng, n_regions * region_nodes, closures)


def assert_chi2_3(d2, label):
    n = len(d2)
    q95 = scipy.stats.chi2.ppf(0.95, 3)
    frac = np.mean(d2 <= q95)
    # Binomial standard error of the fraction, 4 sigma.
    tol = 4 * np.sqrt(0.95 * 0.05 / n)
    assert abs(frac - 0.95) < tol, (label, frac)
    # chi-square(3) has variance 6: standard error of the mean sqrt(6 / n), 4 sigma.
    assert abs(np.mean(d2) - 3.0) < 4 * np.sqrt(6.0 / n), (label, np.mean(d2))


@pytest.mark.parametrize(
    "layout",
    [
        [(0, 6), (3, 10)],  # odometry segments 6->10 and 3->0: disjoint
        [(2, 10), (4, 7)],  # nested closures: 10->7 and 4->2, disjoint
        [(0, 4), (6, 10)],  # 4->10 and 6->0 share steps 4..6 in opposite directions
        [(5, 1), (11, 7)],  # given later-to-earlier; oriented: 5->11 and 7->1 share 5..7
    ],
)
def test_pair_distance_of_correct_closures_follows_chi2_3(layout):
    rng = np.random.default_rng(41)
    n_regions = 3000
    scene = regional_scene(rng, n_regions, layout)
    first = np.arange(n_regions) * 2
    d2 = pair_distances(*scene.args(), first, first + 1)
    assert_chi2_3(d2, layout)


def test_treating_overlapping_segments_as_independent_is_conservative():
    # Closures (0, 3) and (8, 11): the cycle's segments 3->11 and 8->0 share
    # steps 3..8 in opposite directions, whose errors cancel in the cycle.
    # Treating the segments as independent (common practice in PCM) counts
    # those steps twice, so correct closures get distances well below
    # chi-square(3): the test stays valid but loses power.
    rng = np.random.default_rng(42)
    n_regions = 3000
    scene = regional_scene(rng, n_regions, [(0, 3), (8, 11)])
    first = np.arange(n_regions) * 2
    d2 = pair_distances(*scene.args(), first, first + 1, shared_odometry=False)
    assert np.mean(d2) < 3.0 - 8 * np.sqrt(6.0 / n_regions)
    d2_shared = pair_distances(*scene.args(), first, first + 1)
    assert_chi2_3(d2_shared, "shared")


def test_gate_distance_of_correct_closures_follows_chi2_3():
    rng = np.random.default_rng(43)
    scene = regional_scene(rng, 4000, [(1, 10)])
    gate = odometry_gate(*scene.args())
    assert_chi2_3(gate.distance_sq, "gate")
    reversed_scene = regional_scene(np.random.default_rng(44), 4000, [(10, 1)])
    assert_chi2_3(odometry_gate(*reversed_scene.args()).distance_sq, "gate reversed")


# --------------------------------------------------------------------------
# wrong closures


@pytest.mark.parametrize("offset", [(1.0, 0.0, 0.0), (0.0, 0.0, np.deg2rad(10.0)), (0.0, -1.0, 0.0)])
def test_wrong_closure_is_inconsistent_with_correct_ones(offset):
    rng = np.random.default_rng(51)
    closures = [(0, 20), (25, 3), (8, 28), (30, 12), (5, 33), (15, 35), (2, 18), (27, 10)]
    scene = Scene(rng, 36, closures)
    bad = 4
    scene.deltas[bad] = se2.compose(scene.deltas[bad], np.array(offset))
    res = pairwise_consistency(*scene.args())
    adj = res.adjacency().toarray()
    assert not adj[bad].any()
    good = np.arange(len(closures)) != bad
    clique = max_clique(res.adjacency())
    assert clique.exact
    assert bad not in clique.members
    assert len(clique.members) >= good.sum() - 1
    gate = odometry_gate(*scene.args())
    assert gate.informative[bad] and not gate.passed[bad]


# --------------------------------------------------------------------------
# bookkeeping of the consistency graph


def test_graph_is_symmetric_thresholded_and_block_size_independent():
    rng = np.random.default_rng(61)
    pairs = rng.integers(0, 60, size=(40, 2))
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    scene = Scene(rng, 60, pairs)
    wrong = rng.choice(len(pairs), 8, replace=False)
    scene.deltas[wrong] += rng.normal(0.0, [1.0, 1.0, 0.3], size=(8, 3))
    scene.deltas[:, 2] = se2.wrap(scene.deltas[:, 2])
    res = _pairwise_consistency_dense(*scene.args())
    small = _pairwise_consistency_dense(*scene.args(), options=ConsistencyOptions(pairs_per_block=7))
    k = len(pairs)
    dense = res.adjacency.toarray()
    assert res.adjacency.shape == (k, k)
    assert np.array_equal(dense, dense.T)
    assert not dense.diagonal().any()
    off = ~np.eye(k, dtype=bool)
    assert np.array_equal(dense[off], (res.distance_sq <= res.threshold)[off])
    assert np.array_equal(small.adjacency.toarray(), dense)
    assert np.array_equal(small.distance_sq, res.distance_sq)
    iu, ju = np.triu_indices(k, 1)
    # The matrix keeps float32 (memory); the test itself was decided in float64.
    assert res.distance_sq[iu, ju] == pytest.approx(pair_distances(*scene.args(), iu, ju), rel=1e-6)
    assert 0 < dense.sum() < k * (k - 1)
    assert res.threshold == pytest.approx(chi2_threshold(0.99))


def test_informative_flag_follows_chain_uncertainty():
    rng = np.random.default_rng(71)
    scene = Scene(rng, 400, [(10, 14), (10, 390), (390, 10)])
    options = ConsistencyOptions(informative_max_std_m=0.2, informative_max_std_rad=0.05)
    gate = odometry_gate(*scene.args(), options=options)
    for k in range(3):
        cov = gate.predicted_covariance[k]
        assert gate.chain_std_m[k] == pytest.approx(np.sqrt(np.linalg.eigvalsh(cov[:2, :2])[-1]))
        assert gate.chain_std_rad[k] == pytest.approx(np.sqrt(cov[2, 2]))
    assert gate.informative.tolist() == [True, False, False]


def test_empty_and_single_closure_sets():
    rng = np.random.default_rng(81)
    scene = Scene(rng, 10, [(1, 5)])
    res = pairwise_consistency(*scene.args())
    assert res.conflicts.shape == (1, 1) and res.conflicts.nnz == 0 and res.support.tolist() == [0]
    empty = pairwise_consistency(np.zeros(0, int), np.zeros(0, int), np.zeros((0, 3)), np.zeros((0, 3, 3)), scene.poses, scene.prefix)
    assert empty.conflicts.shape == (0, 0) and empty.pairs_tested == 0
    dense_empty = _pairwise_consistency_dense(np.zeros(0, int), np.zeros(0, int), np.zeros((0, 3)), np.zeros((0, 3, 3)),
                                              scene.poses, scene.prefix)
    assert dense_empty.distance_sq.shape == (0, 0)
    assert odometry_gate(np.zeros(0, int), np.zeros(0, int), np.zeros((0, 3)), np.zeros((0, 3, 3)), scene.poses, scene.prefix).passed.shape == (0,)


def test_bad_options_raise_input_error():
    # The arrays come from the verification stage and are trusted; the
    # options are checked when they are built.
    with pytest.raises(InputError):
        ConsistencyOptions(pair_probability=1.0)
