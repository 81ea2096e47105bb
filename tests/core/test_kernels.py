"""Robust kernels against Barron's paper and scipy.optimize.least_squares' losses."""

import numpy as np
import pytest
from scipy.optimize import least_squares

from closurecheck.core.kernels import (
    KERNEL_NAMES,
    Kernel,
    barron_rho,
    barron_weight,
    kernel_from_name,
)
from closurecheck.errors import InputError

X = np.concatenate([np.linspace(0.0, 3.0, 31), np.geomspace(3.5, 200.0, 25)])

ALL_KERNELS = [
    Kernel("l2"),
    Kernel("huber", 1.345),
    Kernel("cauchy", 2.0),
    Kernel("geman_mcclure", 1.5),
    Kernel("pseudo_huber", 0.7),
    Kernel("welsch", 2.5),
    Kernel("barron", 1.2, alpha=1.5),
    Kernel("barron", 1.2, alpha=0.0),
    Kernel("barron", 1.2, alpha=-2.0),
    Kernel("barron", 1.2, alpha=-7.0),
    Kernel("barron", 1.2, alpha=-np.inf),
]


# --- Barron's special cases: Barron, "A General and Adaptive Robust Loss Function", CVPR 2019, section 1.


@pytest.mark.parametrize("c", [0.5, 1.0, 3.0])
def test_barron_alpha_2_is_l2(c):
    # Barron (2019): rho(x, 2, c) = 0.5 (x/c)^2, the L2 loss.
    np.testing.assert_allclose(barron_rho(X, 2.0, c), 0.5 * (X / c) ** 2, rtol=1e-12)
    # Approaching alpha=2 through the general formula must give the same limit.
    np.testing.assert_allclose(barron_rho(X, 2.0 - 1e-9, c), 0.5 * (X / c) ** 2, rtol=1e-6)


@pytest.mark.parametrize("c", [0.5, 1.0, 3.0])
def test_barron_alpha_0_is_cauchy_lorentzian(c):
    # Barron (2019): rho(x, 0, c) = log(0.5 (x/c)^2 + 1), the Cauchy / Lorentzian loss.
    expected = np.log(0.5 * (X / c) ** 2 + 1.0)
    np.testing.assert_allclose(barron_rho(X, 0.0, c), expected, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(barron_rho(X, 1e-9, c), expected, rtol=1e-6)
    np.testing.assert_allclose(barron_rho(X, -1e-9, c), expected, rtol=1e-6)


@pytest.mark.parametrize("c", [0.5, 1.0, 3.0])
def test_barron_alpha_minus_2_is_geman_mcclure(c):
    # Barron (2019): rho(x, -2, c) = 2 (x/c)^2 / ((x/c)^2 + 4), Geman-McClure.
    u2 = (X / c) ** 2
    np.testing.assert_allclose(barron_rho(X, -2.0, c), 2.0 * u2 / (u2 + 4.0), rtol=1e-12)


@pytest.mark.parametrize("c", [0.5, 1.0, 3.0])
def test_barron_alpha_1_is_pseudo_huber_charbonnier(c):
    # Barron (2019): rho(x, 1, c) = sqrt((x/c)^2 + 1) - 1, pseudo-Huber / Charbonnier.
    np.testing.assert_allclose(barron_rho(X, 1.0, c), np.sqrt((X / c) ** 2 + 1.0) - 1.0, rtol=1e-12, atol=1e-15)


def test_barron_alpha_minus_inf_is_welsch():
    # Barron (2019): rho(x, -inf, c) = 1 - exp(-0.5 (x/c)^2), Welsch / Leclerc.
    np.testing.assert_allclose(barron_rho(X, -np.inf, 1.3), 1.0 - np.exp(-0.5 * (X / 1.3) ** 2), rtol=1e-12)
    # Large negative alpha approaches that limit (Barron 2019, figure 1).
    np.testing.assert_allclose(barron_rho(X, -1e7, 1.3), barron_rho(X, -np.inf, 1.3), atol=1e-6)


def test_named_kernels_equal_scaled_barron_members():
    # The relations follow from Barron (2019)'s special cases: with our rho ~ x^2/2
    # normalisation, c^2 rho_B(x, 1, c) is pseudo-Huber(c), c^2 rho_B(x, 0, c) is
    # Cauchy(sqrt(2) c) and c^2 rho_B(x, -2, c) is Geman-McClure(2 c).
    c = 0.8
    np.testing.assert_allclose(Kernel("barron", c, 1.0).rho(X), Kernel("pseudo_huber", c).rho(X), rtol=1e-12)
    np.testing.assert_allclose(Kernel("barron", c, 0.0).rho(X), Kernel("cauchy", np.sqrt(2) * c).rho(X), rtol=1e-12)
    np.testing.assert_allclose(Kernel("barron", c, -2.0).rho(X), Kernel("geman_mcclure", 2 * c).rho(X), rtol=1e-12)
    np.testing.assert_allclose(Kernel("barron", c, -np.inf).rho(X), Kernel("welsch", c).rho(X), rtol=1e-12)
    np.testing.assert_allclose(Kernel("barron", c, 2.0).rho(X), Kernel("l2").rho(X), rtol=1e-12)


# --- Weights are rho'(x)/x: checked against central differences of rho.


def _numeric_derivative(kernel, x, h=1e-6):
    return (kernel.rho(x + h) - kernel.rho(x - h)) / (2 * h)


@pytest.mark.parametrize("kernel", ALL_KERNELS, ids=lambda k: f"{k.name}-{k.alpha}")
def test_weight_is_derivative_over_x(kernel):
    x = X[X > 0.05]
    # Huber's second derivative jumps at x = c; keep the stencil off the kink.
    if kernel.name == "huber":
        x = x[np.abs(x - kernel.scale) > 1e-3]
    # Compare rho'(x) = x w(x); the absolute floor covers the round-off of a
    # difference quotient of an O(1) cost with h = 1e-6.
    np.testing.assert_allclose(x * kernel.weight(x), _numeric_derivative(kernel, x), rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("alpha", [1.5, 0.0, 1e-10, -2.0, 2.0 - 1e-10, 2.0, -np.inf])
def test_barron_weight_is_derivative_over_x(alpha):
    c = 0.9
    x = X[X > 0.05]
    h = 1e-6
    numeric = (barron_rho(x + h, alpha, c) - barron_rho(x - h, alpha, c)) / (2 * h)
    np.testing.assert_allclose(x * barron_weight(x, alpha, c), numeric, rtol=1e-5, atol=1e-8)


@pytest.mark.parametrize("kernel", ALL_KERNELS, ids=lambda k: f"{k.name}-{k.alpha}")
def test_weight_is_one_near_zero_and_falls_for_large_errors(kernel):
    # Near zero every kernel is plain least squares (common practice for IRLS kernels).
    w0 = kernel.weight(np.array([0.0, 1e-8, -1e-8]))
    assert np.all(np.isfinite(w0))
    np.testing.assert_allclose(w0, 1.0, atol=1e-12)
    np.testing.assert_allclose(kernel.rho(1e-4), 0.5e-8, rtol=1e-6)
    w = kernel.weight(X)
    if kernel.name == "l2":
        np.testing.assert_allclose(w, 1.0)
        return
    # Monotone non-increasing in |x| and clearly below 1 far out.
    assert np.all(np.diff(w) <= 1e-15) and np.all(w >= 0.0)
    assert w[-1] < 0.1
    np.testing.assert_allclose(kernel.weight(-X), w)
    np.testing.assert_allclose(kernel.rho(-X), kernel.rho(X))


def test_huber_weight_is_exactly_one_inside_scale():
    k = Kernel("huber", 2.0)
    np.testing.assert_array_equal(k.weight(np.array([0.0, 1.0, 2.0])), 1.0)
    np.testing.assert_allclose(k.weight(np.array([4.0, 8.0])), [0.5, 0.25])


# --- Reference library: scipy.optimize.least_squares' 'huber' and 'cauchy' losses.
# scipy docs: cost = 0.5 * sum(C**2 * rho(f**2 / C**2)) with rho(z) = z if z <= 1
# else 2*z**0.5 - 1 ('huber') and rho(z) = ln(1 + z) ('cauchy'); C is f_scale.


def _scipy_loss_cost(residual, loss, f_scale):
    # A residual that does not depend on the parameter has a zero Jacobian,
    # so least_squares stops at x0 and reports the robust cost of `residual`.
    res = least_squares(lambda p: np.array([residual]), x0=np.zeros(1), loss=loss, f_scale=f_scale)
    assert res.nfev <= 2
    return res.cost


@pytest.mark.parametrize(("name", "loss"), [("huber", "huber"), ("cauchy", "cauchy")])
@pytest.mark.parametrize("c", [0.5, 1.345, 3.0])
def test_matches_scipy_least_squares_loss(name, loss, c):
    kernel = Kernel(name, c)
    xs = np.array([0.0, 0.1, 0.6, 1.0, 1.3, 2.0, 4.5, 10.0, 60.0])
    scipy_costs = np.array([_scipy_loss_cost(x, loss, c) for x in xs])
    np.testing.assert_allclose(kernel.rho(xs), scipy_costs, rtol=1e-12, atol=1e-15)
    # IRLS weight against the derivative of scipy's cost (central difference).
    h = 1e-5
    xs = xs[(xs > 0.05) & (np.abs(xs - c) > 1e-3)]
    d = np.array([(_scipy_loss_cost(x + h, loss, c) - _scipy_loss_cost(x - h, loss, c)) / (2 * h) for x in xs])
    np.testing.assert_allclose(kernel.weight(xs), d / xs, rtol=1e-6)


# --- Construction and errors.


def test_kernel_from_name_aliases_and_errors():
    assert kernel_from_name("Lorentzian", 2.0) == Kernel("cauchy", 2.0)
    assert kernel_from_name("Pseudo-Huber", 1.0).name == "pseudo_huber"
    assert kernel_from_name("charbonnier").name == "pseudo_huber"
    assert kernel_from_name("barron", 1.0, alpha=-2).alpha == -2.0
    for name in KERNEL_NAMES:
        kernel_from_name(name, 1.0, alpha=0.5)
    with pytest.raises(InputError, match="unknown robust kernel"):
        kernel_from_name("tukey-ish", 1.0)
    with pytest.raises(InputError):
        kernel_from_name("huber", 0.0)
    with pytest.raises(InputError):
        kernel_from_name("huber", float("nan"))
    with pytest.raises(InputError):
        kernel_from_name("barron", 1.0)
    with pytest.raises(InputError):
        kernel_from_name("barron", 1.0, alpha=3.0)
    with pytest.raises(InputError):
        kernel_from_name("barron", 1.0, alpha=float("nan"))
