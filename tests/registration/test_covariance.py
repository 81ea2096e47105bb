"""Registration covariance: Monte Carlo calibration (NEES), degeneracy, robust-kernel constants.

Scans are ray cast (closurecheck.simulation.raycast) in invented floor plans with 1.5 cm
Gaussian range noise.
"""

import numpy as np
import pytest
from scipy import integrate, stats

from closurecheck.core import se2
from closurecheck.core.kernels import Kernel
from closurecheck.registration.covariance import (
    analyse,
    censi_middle,
    hessian,
    kernel_moments,
)
from closurecheck.registration.icp import (
    RegistrationOptions,
    prepare_scan,
    register,
    register_prepared,
)
from closurecheck.simulation.raycast import cast

BEARINGS = -2.356 + 0.00654 * np.arange(721)
RANGE_NOISE_M = 0.015

# Invented floor plan: a print shop with a counter, a column and a slanted rack (metres).
SHOP = np.array([
    [0, 0, 10, 0], [10, 0, 10, 7], [10, 7, 0, 7], [0, 7, 0, 0],
    [2, 4.5, 4.5, 4.5], [4.5, 4.5, 4.5, 5.5],
    [7, 1, 8.2, 2.1], [1, 1, 1, 2.2],
], float)
COLUMN = np.array([[6.5, 5.0, 0.3]])


def to_points(ranges, rng):
    ok = np.isfinite(ranges)
    r = ranges[ok] + rng.normal(0.0, RANGE_NOISE_M, ok.sum())
    return np.column_stack([r * np.cos(BEARINGS[ok]), r * np.sin(BEARINGS[ok])])


def nees(err, cov):
    return float(err @ np.linalg.solve(cov, err))


@pytest.fixture(scope="module")
def monte_carlo():
    """200 re-noisings of one fixed pair; errors and covariances of each registration."""
    a, b = np.array([3.0, 2.5, 0.4]), np.array([4.2, 3.1, 1.1])
    ra = cast(a, BEARINGS, SHOP, COLUMN, max_range=20.0)
    rb = cast(b, BEARINGS, SHOP, COLUMN, max_range=20.0)
    truth = se2.between(a, b)
    rng = np.random.default_rng(20070410)
    opt = RegistrationOptions(coarse=False)
    opt_h = RegistrationOptions(coarse=False, covariance="hessian")
    errs, covs, covs_h = [], [], []
    for k in range(200):
        pa = prepare_scan(to_points(ra, rng), opt, grid=False)
        pb = prepare_scan(to_points(rb, rng), opt, grid=False)
        guess = truth + rng.normal(0.0, [0.05, 0.05, 0.02])
        res = register_prepared(pb, pa, guess, opt)
        e = res.delta - truth
        e[2] = se2.wrap(e[2])
        errs.append(e)
        covs.append(res.covariance)
        if k < 60:
            covs_h.append(register_prepared(pb, pa, guess, opt_h).covariance)
    return np.array(errs), np.array(covs), np.array(covs_h)


def test_monte_carlo_nees_is_within_the_chi_square_band(monte_carlo):
    # NEES consistency test: Bar-Shalom, Li and Kirubarajan, "Estimation with
    # Applications to Tracking and Navigation" (2001), section 5.4.2: for n
    # independent runs of a consistent 3-DoF estimator, n * mean(NEES) is
    # chi-square with 3n degrees of freedom, so the two-sided 95% band for the
    # mean is chi2.ppf([0.025, 0.975], 3n) / n.
    errs, covs, _ = monte_carlo
    n = len(errs)
    assert n >= 200
    values = np.array([nees(e, c) for e, c in zip(errs, covs)])
    lo, hi = stats.chi2.ppf([0.025, 0.975], 3 * n) / n
    assert lo < values.mean() < hi, f"mean NEES {values.mean():.3f} outside [{lo:.3f}, {hi:.3f}]"


def test_monte_carlo_per_axis_variance_is_consistent(monte_carlo):
    # Same test per axis (1 DoF): mean of e_k^2 / P_kk within chi2.ppf([0.025, 0.975], n) / n.
    errs, covs, _ = monte_carlo
    n = len(errs)
    lo, hi = stats.chi2.ppf([0.025, 0.975], n) / n
    ratios = (errs ** 2 / np.einsum("nii->ni", covs)).mean(axis=0)
    assert ((lo < ratios) & (ratios < hi)).all(), ratios


def test_plain_hessian_covariance_is_over_confident(monte_carlo):
    # Neighbouring source points share target lines, so their residual errors
    # are correlated; sigma^2 H^-1 ignores that and is too small.  This is why
    # Censi's closed form is the default.
    errs, _, covs_h = monte_carlo
    n = len(covs_h)
    values = np.array([nees(e, c) for e, c in zip(errs[:n], covs_h)])
    hi = stats.chi2.ppf(0.975, 3 * n) / n
    assert values.mean() > hi


def test_accuracy_on_the_monte_carlo_pair(monte_carlo):
    # Accuracy floor of the registration issue: <= 1 cm and 0.1 degree (medians).
    errs, _, _ = monte_carlo
    assert np.median(np.hypot(errs[:, 0], errs[:, 1])) < 0.01
    assert np.median(np.abs(errs[:, 2])) < np.radians(0.1)


def corridor(end_wall: bool):
    walls = [[-40.0, 0.0, 40.0, 0.0], [-40.0, 2.0, 40.0, 2.0]]
    if end_wall:
        walls.append([8.0, 0.0, 8.0, 2.0])
    return np.array(walls)


@pytest.mark.parametrize("end_wall", [False, True])
def test_corridor_degeneracy(end_wall):
    rng = np.random.default_rng(3)
    walls = corridor(end_wall)
    a, b = np.array([0.0, 1.0, 0.1]), np.array([1.0, 1.1, 0.0])
    target = to_points(cast(a, BEARINGS, walls, None, max_range=20.0), rng)
    source = to_points(cast(b, BEARINGS, walls, None, max_range=20.0), rng)
    truth = se2.between(a, b)
    guess = truth + np.array([0.3, 0.05, 0.02])
    res = register(source, target, guess, coarse=False)
    axis = np.array([np.cos(-a[2]), np.sin(-a[2])])          # corridor direction in the target frame
    across = np.array([-axis[1], axis[0]])
    err = res.delta - truth
    err[2] = se2.wrap(err[2])
    np.linalg.cholesky(res.information)                      # symmetric positive definite
    var_across = across @ res.covariance[:2, :2] @ across
    var_along = axis @ res.covariance[:2, :2] @ axis
    assert abs(err[:2] @ across) < 0.01
    if end_wall:
        # The end wall pins the position along the corridor.
        assert not res.degenerate
        assert abs(err[:2] @ axis) < 0.02
        assert var_along < 0.02 ** 2 and var_across < 0.01 ** 2
    else:
        # Nothing fixes the position along the corridor: flagged, and the
        # covariance says so instead of being falsely small.
        assert res.degenerate
        assert res.degeneracy < 0.01
        assert abs(res.weakest_direction[:2] @ axis) > 0.95
        assert var_along > 1.0 ** 2
        # The inflation follows the weakest eigenvector, which normal noise
        # tilts by a fraction of a degree, so the across direction inherits
        # a few centimetres (covariance.analyse); still far below the axis.
        assert var_across < 0.2 ** 2 and var_along > 100 * var_across
        # The error left along the axis (the guess's) is well inside the covariance.
        assert nees(err, res.covariance) < stats.chi2.ppf(0.975, 3)


def test_censi_reduces_to_hessian_for_independent_residuals():
    # With no shared target readings and each residual fed by one reading of
    # variance v_i, Censi's sandwich H^-1 (sum w^2 v J J^T / v^2) H^-1 equals
    # H^-1 when the weights are 1 / v.
    rng = np.random.default_rng(0)
    jac = rng.normal(size=(50, 3))
    v = rng.uniform(0.5, 2.0, 50)
    omega = 1.0 / v
    h = hessian(jac, omega)
    middle = censi_middle(jac, omega, np.sqrt(v), np.zeros((50, 1), int), np.zeros((50, 1)), 1)
    kw = dict(degeneracy_threshold=0.0, unobservable_sigma_m=10.0)
    a = analyse(h, middle, 0.01, 50, 2.0, method="censi", **kw).covariance
    b = analyse(h, None, 0.01, 50, 2.0, method="hessian", **kw).covariance
    np.testing.assert_allclose(a, b, rtol=1e-10)
    np.testing.assert_allclose(b, 0.01 * np.linalg.inv(h), rtol=1e-8)


def test_shared_target_readings_inflate_censi():
    # Two residuals driven by the same target reading add coherently.
    jac = np.array([[1.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    omega = np.ones(4)
    shared = censi_middle(jac, omega, np.zeros(4), np.array([[0], [0], [1], [2]]), np.ones((4, 1)), 3)
    apart = censi_middle(jac, omega, np.zeros(4), np.array([[0], [3], [1], [2]]), np.ones((4, 1)), 4)
    assert shared[0, 0] == pytest.approx(4.0)
    assert apart[0, 0] == pytest.approx(2.0)


def test_huber_consistency_constants():
    # Huber's estimator at k = 1.345 has 95% asymptotic efficiency on Gaussian
    # data (Holland and Welsch, 1977; Huber, "Robust Statistics", 1981):
    # E[psi^2] / E[psi']^2 = 1 / 0.95.  E[w u^2] = E[psi u] = 2 Phi(k) - 1.
    k = 1.345
    e_wu2, kappa = kernel_moments(Kernel("huber", k))
    assert e_wu2 == pytest.approx(2 * stats.norm.cdf(k) - 1, abs=1e-6)
    w = lambda u: min(1.0, k / max(abs(u), 1e-300))                     # noqa: E731
    quad = lambda f: integrate.quad(lambda u: f(u) * stats.norm.pdf(u), -12, 12, points=[-k, k])[0]  # noqa: E731
    fixed_weights = quad(lambda u: w(u) ** 2) / quad(w) ** 2
    assert kappa * fixed_weights == pytest.approx(1 / 0.95, abs=2e-3)
    # Least squares needs no correction.
    assert kernel_moments(Kernel("l2")) == pytest.approx((1.0, 1.0), abs=1e-6)
