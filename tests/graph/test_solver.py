"""Pose-graph optimiser: against scipy.optimize.least_squares, sparsity, robustness, chi-square check."""

import numpy as np
import pytest
from scipy.optimize import approx_fprime, least_squares
from scipy.stats import chi2

from closurecheck.core import se2
from closurecheck.core.kernels import Kernel
from closurecheck.errors import InputError
from closurecheck.graph.solver import (
    GncOptions,
    SolverOptions,
    edge_residuals,
    normal_matrix,
    optimize_gnc,
    optimize_graph,
    prune_inconsistent_edges,
)

ODO_SIGMA = (0.03, 0.03, 0.01)
LOOP_SIGMA = (0.05, 0.05, 0.02)


def square_laps(n_per_lap=16, laps=2, side_m=4.0):
    """Truth poses driving round a square floor plan `laps` times (invented scenario)."""
    per_side = n_per_lap // 4
    corners = [(0.0, 0.0), (side_m, 0.0), (side_m, side_m), (0.0, side_m)]
    poses = []
    for _ in range(laps):
        for k in range(n_per_lap):
            side, j = divmod(k, per_side)
            heading = side * np.pi / 2
            f = j / per_side * side_m
            x0, y0 = corners[side]
            poses.append([x0 + f * np.cos(heading), y0 + f * np.sin(heading), se2.wrap(heading)])
    return np.array(poses)


def make_graph(truth, loops, rng, odo_sigma=ODO_SIGMA, loop_sigma=LOOP_SIGMA):
    """Odometry chain + given loop pairs, noisy deltas; initial poses from the odometry chain."""
    n = len(truth)
    loops = np.asarray(loops, dtype=int).reshape(-1, 2)
    src = np.concatenate([np.arange(n - 1), loops[:, 0]])
    dst = np.concatenate([np.arange(1, n), loops[:, 1]])
    sigma = np.concatenate([np.tile(odo_sigma, (n - 1, 1)), np.tile(loop_sigma, (len(loops), 1))])
    delta = se2.between(truth[src], truth[dst]) + rng.normal(size=sigma.shape) * sigma
    delta[:, 2] = se2.wrap(delta[:, 2])
    information = np.zeros((len(src), 3, 3))
    information[:, [0, 1, 2], [0, 1, 2]] = 1.0 / sigma**2
    # A correlated information matrix on some edges exercises the off-diagonal terms.
    information[::3, 0, 2] = information[::3, 2, 0] = 0.2 * np.sqrt(information[::3, 0, 0] * information[::3, 2, 2])
    robust = np.arange(len(src)) >= n - 1
    steps, _ = se2.chain(delta[: n - 1])
    initial = se2.compose(truth[0], steps)
    return initial, src, dst, delta, information, robust


def whitened_residuals(free_flat, anchor, src, dst, delta, chol):
    """L^T e per edge (Omega = L L^T), so that |L^T e|^2 = e^T Omega e."""
    x = np.vstack([anchor, free_flat.reshape(-1, 3)])
    e = se2.between(x[src], x[dst]) - delta
    e[:, 2] = se2.wrap(e[:, 2])
    return np.einsum("eji,ej->ei", chol, e).ravel()


def pose_difference(a, b):
    d = a - b
    d[:, 2] = se2.wrap(d[:, 2])
    return np.abs(d).max()


def position_rms(poses, truth):
    return float(np.sqrt(np.mean(np.sum((poses[:, :2] - truth[:, :2]) ** 2, axis=1))))


@pytest.fixture
def small_graph():
    rng = np.random.default_rng(11)
    truth = square_laps(16, 2)
    loops = [(i, i + 16) for i in range(0, 16, 2)]
    return truth, make_graph(truth, loops, rng)


# --- Reference library: scipy.optimize.least_squares on the same graph.


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_same_optimum_as_scipy_least_squares(seed):
    rng = np.random.default_rng(seed)
    truth = square_laps(12, 2)
    loops = [(i, i + 12) for i in range(12)] + [(3, 20)]
    initial, src, dst, delta, info, robust = make_graph(truth, loops, rng)
    # Start away from the odometry chain so several iterations are needed.
    initial = initial + rng.normal(scale=[0.3, 0.3, 0.1], size=initial.shape) * (np.arange(len(initial)) > 0)[:, None]

    sol = optimize_graph(initial, src, dst, delta, info, robust)

    chol = np.linalg.cholesky(info)
    ref = least_squares(whitened_residuals, initial[1:].ravel(), args=(initial[:1], src, dst, delta, chol),
                        method="lm", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    ref_poses = np.vstack([initial[:1], ref.x.reshape(-1, 3)])
    assert sol.converged
    np.testing.assert_allclose(sol.cost, ref.cost, rtol=1e-9)
    assert pose_difference(sol.poses, ref_poses) < 1e-6
    np.testing.assert_array_equal(sol.poses[0], initial[0])
    assert sol.cost < sol.initial_cost
    np.testing.assert_array_equal(sol.weights, 1.0)
    # residuals_sq is e^T Omega e at the solution, twice the per-edge cost.
    np.testing.assert_allclose(0.5 * sol.residuals_sq.sum(), sol.cost, rtol=1e-12)


def test_normal_matrix_equals_numerical_jacobian_product(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    weights = np.linspace(0.2, 1.0, len(src))
    h, g = normal_matrix(initial, src, dst, delta, info, weights)
    chol = np.linalg.cholesky(weights[:, None, None] * info)
    x0 = initial[1:].ravel()
    f0 = whitened_residuals(x0, initial[:1], src, dst, delta, chol)
    # Central differences of the whitened residual give J; then J^T J and J^T r.
    eps = 1e-6
    jac = np.empty((len(f0), len(x0)))
    for k in range(len(x0)):
        step = np.zeros_like(x0)
        step[k] = eps
        jac[:, k] = (whitened_residuals(x0 + step, initial[:1], src, dst, delta, chol)
                     - whitened_residuals(x0 - step, initial[:1], src, dst, delta, chol)) / (2 * eps)
    np.testing.assert_allclose(h.toarray(), jac.T @ jac, rtol=1e-6, atol=1e-3)
    np.testing.assert_allclose(g, jac.T @ f0, rtol=1e-6, atol=1e-5)
    np.testing.assert_allclose(h.toarray(), h.toarray().T, atol=1e-9)


def test_normal_matrix_is_sparse_and_grows_linearly():
    rng = np.random.default_rng(5)
    counts = []
    for n in (100, 200, 400, 800):
        truth = np.cumsum(rng.normal(size=(n, 3)) * [1.0, 1.0, 0.1], axis=0)
        loops = np.stack([rng.integers(0, n - 10, n), np.zeros(n, dtype=int)], axis=1)
        loops[:, 1] = loops[:, 0] + rng.integers(5, 10, n)
        initial, src, dst, delta, info, _ = make_graph(truth, loops, rng)
        h, _ = normal_matrix(initial, src, dst, delta, info)
        e = len(src)
        assert h.shape == (3 * (n - 1), 3 * (n - 1))
        # Each node has one 3x3 diagonal block, each edge at most two off-diagonal blocks.
        assert h.nnz <= 9 * (n + 2 * e)
        assert h.nnz < 0.05 * h.shape[0] ** 2
        counts.append(h.nnz / n)
    # Non-zeros per node stay constant as the graph grows (linear growth).
    assert max(counts) / min(counts) < 1.15


# --- Robust kernels (IRLS) and graduated non-convexity.


def _outlier_case():
    rng = np.random.default_rng(3)
    truth = square_laps(16, 3)
    loops = [(i, i + 16) for i in range(0, 32, 2)] + [(5, 30)]
    initial, src, dst, delta, info, robust = make_graph(truth, loops, rng)
    delta[-1] = [3.0, -2.0, 1.0]  # gross outlier loop edge: metres off
    return truth, initial, src, dst, delta, info, robust


@pytest.mark.parametrize("kernel", [Kernel("cauchy", 1.0), Kernel("geman_mcclure", 2.0),
                                    Kernel("barron", 1.0, alpha=-1.0)], ids=lambda k: k.name)
def test_robust_kernel_downweights_gross_outlier(kernel):
    truth, initial, src, dst, delta, info, robust = _outlier_case()
    clean = optimize_graph(initial, src[:-1], dst[:-1], delta[:-1], info[:-1], robust[:-1])
    clean_robust = optimize_graph(initial, src[:-1], dst[:-1], delta[:-1], info[:-1], robust[:-1], kernel=kernel)
    plain = optimize_graph(initial, src, dst, delta, info, robust)
    sol = optimize_graph(initial, src, dst, delta, info, robust, kernel=kernel)
    assert sol.converged
    assert sol.weights[-1] < 1e-3
    assert np.all(sol.weights[~robust] == 1.0)
    # The outlier barely moves the robust solution (same kernel, graph without the outlier),
    # while plain L2 is bent by a metres-scale error.
    assert pose_difference(sol.poses, clean_robust.poses) < 0.01
    assert pose_difference(sol.poses, clean.poses) < 0.15
    assert pose_difference(plain.poses, clean.poses) > 0.3
    assert position_rms(sol.poses, truth) < 0.5 * position_rms(plain.poses, truth)


def test_irls_solution_is_stationary_point_of_robust_cost():
    # The robust cost's gradient, by scipy.optimize.approx_fprime, vanishes at the IRLS optimum.
    truth, initial, src, dst, delta, info, robust = _outlier_case()
    kernel = Kernel("huber", 1.345)
    sol = optimize_graph(initial, src, dst, delta, info, robust, kernel=kernel)

    def robust_cost(free_flat):
        x = np.vstack([initial[:1], free_flat.reshape(-1, 3)])
        _, s = edge_residuals(x, src, dst, delta, info)
        return 0.5 * s[~robust].sum() + kernel.rho(np.sqrt(s[robust])).sum()

    x_opt = sol.poses[1:].ravel()
    np.testing.assert_allclose(robust_cost(x_opt), sol.cost, rtol=1e-12)
    grad = approx_fprime(x_opt, robust_cost, 1e-7)
    grad_start = approx_fprime(initial[1:].ravel(), robust_cost, 1e-7)
    assert np.abs(grad).max() < 1e-3 * np.abs(grad_start).max()


def _gnc_case(outlier_fraction, seed=21):
    rng = np.random.default_rng(seed)
    truth = square_laps(16, 3)
    n = len(truth)
    inliers = np.array([(i, i + 16) for i in range(0, 32, 4)])
    n_out = int(round(len(inliers) * outlier_fraction / (1.0 - outlier_fraction)))
    a = rng.integers(0, n, 3 * n_out)
    b = rng.integers(0, n, 3 * n_out)
    far = np.abs(a - b) > 2
    outliers = np.stack([a[far], b[far]], axis=1)[:n_out]
    initial, src, dst, delta, info, robust = make_graph(truth, np.vstack([inliers, outliers]), rng)
    is_out = np.arange(len(src)) >= n - 1 + len(inliers)
    # Wrong loop closures: random relative poses within a 10 m room.
    delta[is_out] = np.c_[rng.uniform(-5, 5, (n_out, 2)), rng.uniform(-np.pi, np.pi, n_out)]
    clean = optimize_graph(initial, src[~is_out], dst[~is_out], delta[~is_out], info[~is_out], robust[~is_out])
    return truth, initial, src, dst, delta, info, robust, is_out, clean


@pytest.mark.parametrize("surrogate", ["geman_mcclure", "truncated_least_squares"])
@pytest.mark.parametrize("fraction", [0.7, 0.8])
def test_gnc_survives_most_loops_being_outliers(surrogate, fraction):
    truth, initial, src, dst, delta, info, robust, is_out, clean = _gnc_case(fraction)
    assert is_out.sum() / robust.sum() >= fraction - 0.01
    plain = optimize_graph(initial, src, dst, delta, info, robust)
    sol = optimize_gnc(initial, src, dst, delta, info, robust, GncOptions(surrogate=surrogate))
    w = sol.weights
    assert np.all((w >= 0.0) & (w <= 1.0))
    assert np.all(w[~robust] == 1.0)
    assert w[is_out].max() < 0.05
    # An inlier inside the chi-square bound c keeps a Geman-McClure weight of at least
    # (c^2 / (c^2 + c^2))^2 = 0.25 (Yang et al. 2020, GM weight update at mu = 1); TLS gives 1.
    inlier_w = w[robust & ~is_out]
    assert inlier_w.min() > 0.2
    if surrogate == "truncated_least_squares":
        assert np.median(inlier_w) == 1.0
    assert pose_difference(sol.poses, clean.poses) < 0.1
    assert pose_difference(plain.poses, clean.poses) > 1.0


def test_gnc_at_ninety_percent_outliers():
    truth, initial, src, dst, delta, info, robust, is_out, clean = _gnc_case(0.9)
    sol = optimize_gnc(initial, src, dst, delta, info, robust)
    assert sol.weights[is_out].max() < 0.05
    assert position_rms(sol.poses, truth) < 2.0 * position_rms(clean.poses, truth) + 0.02


def test_gnc_without_outliers_matches_least_squares(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    plain = optimize_graph(initial, src, dst, delta, info, robust)
    sol = optimize_gnc(initial, src, dst, delta, info, robust, GncOptions(surrogate="truncated_least_squares"))
    np.testing.assert_array_equal(sol.weights, 1.0)
    assert pose_difference(sol.poses, plain.poses) < 1e-6


# --- Final chi-square check.


def test_prune_removes_injected_wrong_edge_and_keeps_consistent_ones():
    rng = np.random.default_rng(8)
    truth = square_laps(16, 3)
    loops = [(i, i + 16) for i in range(0, 32, 2)] + [(7, 25)]
    initial, src, dst, delta, info, robust = make_graph(truth, loops, rng)
    wrong = len(src) - 1
    # Modest error (0.6 m, 0.15 rad): not gross, but far outside the 5 cm / 0.02 rad noise.
    delta[wrong] = se2.compose(delta[wrong], [0.6, -0.3, 0.15])
    result = prune_inconsistent_edges(initial, src, dst, delta, info, robust, probability=0.99)
    assert result.removed.tolist() == [wrong]
    assert result.removed_residuals_sq[0] > result.threshold
    assert result.threshold == pytest.approx(chi2.ppf(0.99, 3))
    assert result.kept.sum() == len(src) - 1 and not result.kept[wrong]
    assert result.solution.weights[wrong] == 0.0
    kept_loops = result.kept & robust
    assert np.all(result.solution.residuals_sq[kept_loops] <= result.threshold)
    # The final poses equal a plain optimisation of the graph without the wrong edge.
    keep = np.arange(len(src)) != wrong
    ref = optimize_graph(initial, src[keep], dst[keep], delta[keep], info[keep], robust[keep])
    assert pose_difference(result.solution.poses, ref.poses) < 1e-6


def test_prune_keeps_a_consistent_graph_whole(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    result = prune_inconsistent_edges(initial, src, dst, delta, info, robust)
    assert result.removed.size == 0
    assert result.kept.all()


def test_prune_removes_worst_first_and_never_odometry():
    truth, initial, src, dst, delta, info, robust, is_out, clean = _gnc_case(0.5, seed=4)
    result = prune_inconsistent_edges(initial, src, dst, delta, info, robust, kernel=Kernel("cauchy", 1.0))
    assert set(result.removed.tolist()) >= set(np.flatnonzero(is_out).tolist())
    assert robust[result.removed].all()
    assert result.kept[~robust].all()


# --- Gauge, disconnected nodes, options.


def test_disconnected_node_keeps_its_pose(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    lonely = np.array([[10.0, -3.0, 0.5]])
    poses = np.vstack([initial, lonely])
    sol = optimize_graph(poses, src, dst, delta, info, robust)
    np.testing.assert_array_equal(sol.poses[-1], lonely[0])
    ref = optimize_graph(initial, src, dst, delta, info, robust)
    assert pose_difference(sol.poses[:-1], ref.poses) < 1e-9


@pytest.mark.parametrize("options", [SolverOptions(permc_spec="COLAMD"),
                                     SolverOptions(linear_solver="spsolve", permc_spec="COLAMD"),
                                     SolverOptions(supernode_relax=20, panel_size=10)])
def test_linear_solver_choices_agree(small_graph, options):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    a = optimize_graph(initial, src, dst, delta, info, robust)
    b = optimize_graph(initial, src, dst, delta, info, robust, options=options)
    assert pose_difference(a.poses, b.poses) < 1e-8


def test_reused_ordering_solves_with_the_current_values(small_graph):
    # The splu path orders the pattern once per layout and reuses it; every later solve must use the new
    # values.  Reference: scipy.sparse.linalg.spsolve on the same matrices.
    import scipy.sparse.linalg as spla

    from closurecheck.graph.solver import _Graph, _solve, _validate

    truth, (initial, src, dst, delta, info, robust) = small_graph
    graph = _Graph(*_validate(initial, src, dst, delta, info, robust))
    layout = graph.layout(np.ones(len(src), dtype=bool))
    e, _ = graph.errors(initial)
    rng = np.random.default_rng(5)
    for k in range(3):
        weights = rng.uniform(0.1, 1.0, len(src))
        data, grad = graph.linearise(initial, e, weights, layout)
        x = _solve(layout, data, -grad, SolverOptions(linear_solver="splu"))
        expected = spla.spsolve(layout.csc(data), -grad)
        np.testing.assert_allclose(x, expected, rtol=1e-9, atol=1e-12 * np.abs(expected).max())
        assert "MMD_AT_PLUS_A" in layout.orderings


def test_iteration_cap_reports_not_converged(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    initial = initial + np.r_[[0, 0, 0], [0.5, 0.5, 0.3] * (len(initial) - 1)].reshape(-1, 3)
    sol = optimize_graph(initial, src, dst, delta, info, robust, options=SolverOptions(max_iterations=1))
    assert sol.iterations == 1 and not sol.converged


# --- Bad input.


def test_bad_input_raises_input_error(small_graph):
    truth, (initial, src, dst, delta, info, robust) = small_graph
    n = len(initial)
    bad_src = src.copy()
    bad_src[3] = n
    with pytest.raises(InputError, match="not a node index"):
        optimize_graph(initial, bad_src, dst, delta, info, robust)
    neg = dst.copy()
    neg[0] = -1
    with pytest.raises(InputError):
        optimize_graph(initial, src, neg, delta, info, robust)
    not_spd = info.copy()
    not_spd[2] = np.diag([1.0, -1.0, 1.0])
    with pytest.raises(InputError, match="positive definite"):
        optimize_graph(initial, src, dst, delta, not_spd, robust)
    asym = info.copy()
    asym[1, 0, 1] += 1.0
    with pytest.raises(InputError, match="symmetric"):
        optimize_gnc(initial, src, dst, delta, asym, robust)
    with pytest.raises(InputError):
        optimize_graph(initial[:, :2], src, dst, delta, info, robust)
    with pytest.raises(InputError):
        optimize_graph(initial, src, dst[:-1], delta, info, robust)
    with pytest.raises(InputError):
        optimize_graph(initial, src, dst, delta[:, :2], info, robust)
    with pytest.raises(InputError):
        optimize_graph(initial, src, dst, delta, info[:, :2, :2], robust)
    with pytest.raises(InputError):
        optimize_graph(initial, src, dst, delta, info, robust[:-1])
    with pytest.raises(InputError):
        optimize_graph(initial, src + 0.5, dst, delta, info, robust)
    self_loop = dst.copy()
    self_loop[0] = src[0]
    with pytest.raises(InputError, match="itself"):
        prune_inconsistent_edges(initial, src, self_loop, delta, info, robust)
    nan_poses = initial.copy()
    nan_poses[4, 1] = np.nan
    with pytest.raises(InputError):
        optimize_graph(nan_poses, src, dst, delta, info, robust)
    with pytest.raises(InputError):
        optimize_graph(initial, src, dst, delta, info, robust, kernel="huber")
    with pytest.raises(InputError):
        GncOptions(surrogate="median")
    with pytest.raises(InputError):
        SolverOptions(linear_solver="dense")
    with pytest.raises(InputError):
        SolverOptions(panel_size=0)


def test_pure_gauss_newton_recovers_from_a_rejected_step(monkeypatch):
    # With initial_damping=0 a rejected step used to leave lambda at 0 (0 times nu) and the loop retried
    # the same step forever.  Reference: scipy.optimize.least_squares (MINPACK's LM) from the same start.
    import closurecheck.graph.solver as solver

    rng = np.random.default_rng(9)
    truth = square_laps(12, 2)
    loops = [(i, i + 12) for i in range(12)]
    initial, src, dst, delta, info, robust = make_graph(truth, loops, rng)
    # Headings off by 1.5 rad (one sigma): Gauss-Newton overshoots and a step is rejected (found by trying seeds).
    start = initial + rng.normal(scale=[0.5, 0.5, 1.5], size=initial.shape) * (np.arange(len(initial)) > 0)[:, None]
    calls = []
    real = solver._more_damping
    monkeypatch.setattr(solver, "_more_damping", lambda lam, nu: calls.append(lam) or real(lam, nu))

    # Tight tolerances: this start ends in a flat local minimum where the default stopping rule leaves
    # a few 1e-9 of relative cost.
    options = SolverOptions(initial_damping=0.0, relative_cost_tolerance=1e-15, step_tolerance=1e-12)
    sol = optimize_graph(start, src, dst, delta, info, robust, options=options)

    chol = np.linalg.cholesky(info)
    ref = least_squares(whitened_residuals, start[1:].ravel(), args=(start[:1], src, dst, delta, chol),
                        method="lm", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    assert 0.0 in calls  # a step was rejected while lambda was 0
    assert sol.converged
    np.testing.assert_allclose(sol.cost, ref.cost, rtol=1e-12)
    assert pose_difference(sol.poses, np.vstack([start[:1], ref.x.reshape(-1, 3)])) < 1e-5
