"""Robust kernels and their iteratively-reweighted-least-squares weights.

Every kernel acts on a *normalised* residual ``x`` (dimensionless): the square
root of an edge's squared Mahalanobis distance ``sqrt(e^T Omega e)``, or a
scalar residual divided by its standard deviation.  ``scale`` is the residual
(in the same normalised units) at which the kernel starts to down-weight.

Normalisation used throughout: ``rho(x) ~ x**2 / 2`` for small ``x``, so a
kernel's cost is directly comparable to the least-squares cost
``0.5 * e^T Omega e`` and the IRLS weight ``w(x) = rho'(x) / x`` is 1 near
zero error.  For Huber and Cauchy this is exactly the convention of
``scipy.optimize.least_squares`` (``0.5 * C**2 * rho(f**2 / C**2)``).

Barron's general family (Barron, "A General and Adaptive Robust Loss
Function", CVPR 2019) is available in the paper's own normalisation through
:func:`barron_rho` / :func:`barron_weight`; the ``"barron"`` kernel multiplies
it by ``scale**2`` so that it follows the normalisation above.  Special cases
in the paper's parameterisation: alpha=2 is L2, alpha=1 pseudo-Huber /
Charbonnier, alpha=0 Cauchy / Lorentzian, alpha=-2 Geman-McClure and
alpha=-inf Welsch.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

# Canonical kernel names; aliases map onto them in kernel_from_name.
KERNEL_NAMES = ("l2", "huber", "cauchy", "geman_mcclure", "pseudo_huber", "welsch", "barron")
_ALIASES = {
    "least_squares": "l2",
    "lorentzian": "cauchy",
    "charbonnier": "pseudo_huber",
    "gm": "geman_mcclure",
}
# Every name kernel_from_name accepts (options declare these as their choices).
KERNEL_CHOICES = KERNEL_NAMES + tuple(_ALIASES)


def barron_rho(x, alpha: float, c: float):
    """Barron's general robust loss rho(x, alpha, c) in the paper's normalisation.

    Barron (CVPR 2019), eq. 1 and its limits: ``x**2 / (2 c**2)`` for alpha=2,
    ``log(0.5 (x/c)**2 + 1)`` for alpha=0, ``1 - exp(-0.5 (x/c)**2)`` for
    alpha=-inf.  ``x`` and ``c`` share one unit; the result is dimensionless.
    """
    z = np.square(np.asarray(x, dtype=float) / c)
    if alpha == 2.0:
        return 0.5 * z
    if alpha == 0.0:
        return np.log1p(0.5 * z)
    if alpha == -np.inf:
        return -np.expm1(-0.5 * z)
    b = abs(alpha - 2.0)
    # expm1/log1p keep the expression accurate as alpha approaches 0 (where
    # the prefactor b/alpha blows up) and 2 (where z/b blows up).
    return b / alpha * np.expm1(0.5 * alpha * np.log1p(z / b))


def barron_weight(x, alpha: float, c: float):
    """IRLS weight ``rho'(x) / x`` of :func:`barron_rho` (unit 1/c**2).

    Barron (CVPR 2019), derivative of eq. 1:
    ``rho'(x)/x = c**-2 ((x/c)**2 / |alpha-2| + 1) ** (alpha/2 - 1)``.
    Finite at x = 0, where it equals ``1 / c**2``.
    """
    z = np.square(np.asarray(x, dtype=float) / c)
    if alpha == 2.0:
        w = np.ones_like(z)
    elif alpha == 0.0:
        w = 1.0 / (0.5 * z + 1.0)
    elif alpha == -np.inf:
        w = np.exp(-0.5 * z)
    else:
        b = abs(alpha - 2.0)
        w = np.exp((0.5 * alpha - 1.0) * np.log1p(z / b))
    return w / (c * c)


@dataclass(frozen=True)
class Kernel:
    """A robust kernel on normalised residuals.

    Parameters
    ----------
    name : str
        One of :data:`KERNEL_NAMES` (use :func:`kernel_from_name` for aliases).
    scale : float
        Normalised residual (dimensionless, e.g. Mahalanobis distance) where
        down-weighting sets in; must be positive.
    alpha : float, optional
        Shape parameter of the ``"barron"`` kernel, in [-inf, 2]; unused by
        the other kernels.  Weights of every kernel lie in [0, 1].
    """

    name: str
    scale: float = 1.0
    alpha: float | None = None

    def __post_init__(self):
        if self.name not in KERNEL_NAMES:
            raise InputError(f"unknown robust kernel {self.name!r}; expected one of {', '.join(KERNEL_NAMES)}")
        if not (np.isfinite(self.scale) and self.scale > 0):
            raise InputError(f"kernel scale must be a positive finite number, got {self.scale!r}")
        if self.name == "barron":
            # alpha > 2 is defined in the paper but grows faster than L2: it
            # would up-weight large residuals, the opposite of a robust kernel.
            if self.alpha is None or not self.alpha <= 2.0:
                raise InputError(f"the barron kernel needs a shape alpha in [-inf, 2], got {self.alpha!r}")

    def rho(self, x):
        """Kernel cost of normalised residuals ``x`` (any shape); ``~ x**2/2`` near 0."""
        x = np.abs(np.asarray(x, dtype=float))
        c = self.scale
        u2 = np.square(x / c)
        if self.name == "l2":
            return 0.5 * x * x
        if self.name == "huber":
            return np.where(x <= c, 0.5 * x * x, c * x - 0.5 * c * c)
        if self.name == "cauchy":
            return 0.5 * c * c * np.log1p(u2)
        if self.name == "geman_mcclure":
            return 0.5 * x * x / (1.0 + u2)
        if self.name == "pseudo_huber":
            # sqrt(1+u2) - 1 written without cancellation for small u2.
            return c * c * u2 / (np.sqrt(1.0 + u2) + 1.0)
        if self.name == "welsch":
            return -c * c * np.expm1(-0.5 * u2)
        return c * c * barron_rho(x, self.alpha, c)

    def weight(self, x):
        """IRLS weight ``rho'(x) / x`` of normalised residuals ``x``; equals 1 at x = 0."""
        x = np.abs(np.asarray(x, dtype=float))
        c = self.scale
        u2 = np.square(x / c)
        if self.name == "l2":
            return np.ones_like(x)
        if self.name == "huber":
            # c / x only where x > c, so x = 0 never divides.
            return np.minimum(1.0, c / np.maximum(x, c))
        if self.name == "cauchy":
            return 1.0 / (1.0 + u2)
        if self.name == "geman_mcclure":
            return 1.0 / np.square(1.0 + u2)
        if self.name == "pseudo_huber":
            return 1.0 / np.sqrt(1.0 + u2)
        if self.name == "welsch":
            return np.exp(-0.5 * u2)
        return c * c * barron_weight(x, self.alpha, c)


def kernel_from_name(name: str, scale: float = 1.0, alpha: float | None = None) -> Kernel:
    """Build a :class:`Kernel` from a user-facing name (case and ``-``/``_`` insensitive).

    Accepts the canonical names in :data:`KERNEL_NAMES` plus the aliases
    ``lorentzian`` (Cauchy), ``charbonnier`` (pseudo-Huber), ``gm``
    (Geman-McClure) and ``least_squares`` (L2).  Raises InputError on an
    unknown name, a non-positive scale or a missing Barron alpha.
    """
    key = str(name).strip().lower().replace("-", "_").replace(" ", "_")
    key = _ALIASES.get(key, key)
    return Kernel(key, float(scale), None if alpha is None else float(alpha))
