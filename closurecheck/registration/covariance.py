"""Covariance of a point-to-line registration and its degeneracy analysis.

The registration (closurecheck/registration.py) minimises

    J(x) = sum_i  w_i / v_i * r_i(x)^2,     r_i = n_j . (R(theta) p_i + t - c_j)

over x = [t_x, t_y, theta] (metres, metres, radians; the pose of the source
scan in the target scan's frame), where ``c_j`` and ``n_j`` are the centroid
and unit normal of a line fitted to the neighbours of target point ``j``,
``w_i`` a robust-kernel weight and ``v_i`` the variance of ``r_i`` in units
of the range-noise variance ``sigma^2`` (see ``residual_variance_units``).

Two covariances on [x, y, theta] in the target frame are offered:

* ``"hessian"``: ``sigma^2 H^-1`` with ``H = sum_i w_i / v_i J_i J_i^T``, the
  textbook least-squares covariance.  It treats every residual as
  independent.
* ``"censi"``: Censi's closed form (A. Censi, "An accurate closed-form
  estimate of ICP's covariance", ICRA 2007),
  ``(d2J/dx2)^-1 (d2J/dz dx) Sigma_z (d2J/dz dx)^T (d2J/dx2)^-1``, with the
  measurements ``z`` being every range reading of *both* scans.  A target
  reading enters through the line fitted to its neighbourhood (centroid and
  normal), so source points that share target lines get correlated errors;
  this is what makes the plain Hessian over-confident.  Terms proportional to
  the residuals themselves (second derivatives of ``r_i``) are dropped, the
  usual Gauss-Newton approximation.

``sigma^2`` is estimated from the residuals, ``sum_i w_i r_i^2 / v_i / (n - 3)``
(n - 3: three parameters were fitted), divided by the kernel's Gaussian
consistency constant ``E[w u^2]``; both covariances treat the final robust
weights as fixed and are multiplied by the kernel's efficiency ratio kappa
(see :func:`kernel_moments`), so that they match the robust estimator's
asymptotic variance for Gaussian noise.

Degeneracy: the Hessian is expressed in scaled coordinates (x, y, L * theta),
``L`` the root-mean-square distance of the source points from the sensor, so
that all three axes are metres, and normalised per correspondence.  Its
eigenvalues measure how strongly each direction is constrained; when the
smallest one falls below ``degeneracy_threshold`` times the largest (a
straight corridor leaves the translation along it unconstrained), the
covariance is inflated along that eigenvector by ``unobservable_sigma_m``
squared so that it is never falsely small there.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from . import _kernels


@dataclass(frozen=True, eq=False)
class CovarianceEstimate:
    """Covariance of a registration on [x, y, theta] in the target frame.

    Attributes
    ----------
    covariance : (3, 3) m^2 / m rad / rad^2, after any degeneracy inflation.
    sigma_m : estimated range-noise standard deviation (metres).
    eigenvalues : (3,) ascending eigenvalues of the per-correspondence Hessian
        in scaled coordinates (x, y, L theta); dimensionless, about 0.5 for a
        direction constrained by half of the points.
    eigenvectors : (3, 3) the matching unit eigenvectors as columns, in
        scaled coordinates.
    degeneracy : smallest / largest eigenvalue, in [0, 1]; near 0 means one
        direction is unconstrained.
    degenerate : True when ``degeneracy`` is below the threshold and the
        covariance was inflated.
    length_m : the length L used to scale theta (metres).
    """

    covariance: np.ndarray
    sigma_m: float
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    degeneracy: float
    degenerate: bool
    length_m: float


def residual_variance_units(src_coef, s, line_c0, line_c1, line_c2):
    """Variance of each point-to-line residual in units of sigma^2.

    ``src_coef`` (n,) is ``n_j . d p_i / d eps_i``, the sensitivity of the
    residual to the source point's own noise (``n_j . R u_i`` for range noise
    along the beam ``u_i``); ``s`` (n,) the along-line offset (metres) of the
    source point from the target line's centroid; ``line_c*`` (n,) the
    target line's offset variance coefficients: the fitted line's
    displacement at along-line offset s has variance
    ``sigma^2 (c0 + c1 s + c2 s^2)``.
    """
    return src_coef * src_coef + line_c0 + s * (line_c1 + s * line_c2)


def hessian(jac, omega):
    """Gauss-Newton Hessian ``sum_i omega_i J_i J_i^T`` (3, 3) of (n, 3) Jacobians."""
    return (jac * omega[:, None]).T @ jac


def noise_variance(residuals, omega, weighted_second_moment: float = 1.0, n_params: int = 3) -> float:
    """Residual-based estimate of sigma^2 (m^2) with the n - p degrees-of-freedom correction.

    ``omega`` are the total weights ``w_i / v_i``.  Robust weights shrink
    the weighted sum of squares: for Gaussian residuals its expectation is
    ``sigma^2 E[w(u) u^2]`` per residual, so the sum is divided by that
    ``weighted_second_moment`` (from :func:`kernel_moments`) to stay
    consistent.
    """
    dof = max(len(residuals) - n_params, 1)
    return float(np.dot(omega, residuals * residuals) / (dof * weighted_second_moment))


@lru_cache(maxsize=32)
def kernel_moments(kernel) -> tuple[float, float]:
    """Gaussian consistency constants of a robust kernel (closurecheck.core.kernels.Kernel).

    For u ~ N(0, 1) (a residual over its robust scale), with IRLS weight
    ``w(u)`` and influence ``psi(u) = u w(u)``, returns

    * ``E[w u^2]``: makes the weighted residual variance consistent
      (see :func:`noise_variance`);
    * ``kappa = (E[psi^2] / E[psi']^2) / (E[w^2] / E[w]^2)``: ratio of the
      M-estimator's asymptotic variance (P. J. Huber, "Robust Statistics",
      1981, ch. 7) to the variance a weighted least-squares fit with the
      same weights held fixed would have.  The covariance formulas below
      treat the final weights as fixed, so they are multiplied by kappa
      (about 1.04 for Huber at 1.345).

    Computed once per kernel by quadrature on a fine grid over [-12, 12].
    """
    u = np.linspace(-12.0, 12.0, 240_001)
    du = u[1] - u[0]
    phi = np.exp(-0.5 * u * u) / np.sqrt(2.0 * np.pi) * du
    w = kernel.weight(u)
    psi = u * w
    dpsi = np.gradient(psi, du)
    e_w, e_w2, e_wu2 = (phi * w).sum(), (phi * w * w).sum(), (phi * w * u * u).sum()
    e_psi2, e_dpsi = (phi * psi * psi).sum(), (phi * dpsi).sum()
    kappa = (e_psi2 / e_dpsi ** 2) / (e_w2 / e_w ** 2)
    return float(e_wu2), float(kappa)


def censi_middle(jac, omega, src_coef, nbr_index, nbr_coef, n_target: int):
    """The middle term ``(d2J/dz dx) Sigma_z (d2J/dz dx)^T / sigma^2`` of Censi's formula.

    Parameters
    ----------
    jac : (n, 3) residual Jacobians ``d r_i / d x``.
    omega : (n,) total weights ``w_i / v_i``.
    src_coef : (n,) ``d r_i / d eps_i`` for the source reading behind residual i.
    nbr_index : (n, k) indices of the target readings that shaped the target
        line of residual i (entries with zero coefficient are ignored).
    nbr_coef : (n, k) ``d r_i / d eps_l`` for those target readings.
    n_target : number of target readings (length of the index space).

    Each reading's noise is independent with variance sigma^2, so the term is
    ``sum_readings m_e m_e^T`` with ``m_e = sum_i omega_i J_i d r_i / d eps_e``.
    A source reading feeds one residual; a target reading feeds every residual
    whose line it helped fit, which is summed with bincount.
    """
    wj = jac * omega[:, None]
    ms = wj * src_coef[:, None]
    middle = ms.T @ ms
    idx = nbr_index.ravel()
    mt = np.empty((n_target, 3))
    for d in range(3):
        mt[:, d] = np.bincount(idx, weights=(nbr_coef * wj[:, d:d + 1]).ravel(), minlength=n_target)
    middle += mt.T @ mt
    return middle


def censi_middle_lines(jac, omega, src_coef, rows, nbr_index, nbr_coef, basis, n_target: int):
    """:func:`censi_middle` for residuals on the local line models of closurecheck.registration.icp.

    Parameters
    ----------
    jac, omega, src_coef, n_target : as for :func:`censi_middle`.
    rows : (n,) the target line of each residual.
    nbr_index : (M, k) the target readings that fitted each line.
    nbr_coef : (M, k, 3) each reading's influence on the line's model
        coefficients (b0, b1, b2) per unit of its noise.
    basis : (n, 2) each residual's along-line offset s (m) and the model's
        third basis function phi2(s) (m^2): the residual's sensitivity to
        reading l is ``-(c0 + s c1 + phi2 c2)``.

    The same value as :func:`censi_middle` on the gathered (n, k) arrays,
    to the bit (tests/registration/test_compiled_kernels.py), with the
    per-reading sums compiled (closurecheck/registration/_kernels.py): the
    gathers and three bincounts of (n, k) arrays cost about 0.25 ms per
    registration in numpy.
    """
    ms, mt = _kernels.target_sums(jac, omega, src_coef, rows, nbr_index, nbr_coef, basis, n_target)
    middle = ms.T @ ms
    middle += mt.T @ mt
    return middle


def analyse(h, middle, sigma2: float, n_corr: int, length_m: float, *, method: str,
            degeneracy_threshold: float, unobservable_sigma_m: float, kappa: float = 1.0,
            points_per_normal: float = 1.0) -> CovarianceEstimate:
    """Covariance from the Hessian (and Censi's middle term), with degeneracy guard.

    ``h`` (3, 3) is the Gauss-Newton Hessian, ``middle`` the output of
    :func:`censi_middle` (ignored for ``method="hessian"``), ``sigma2`` the
    noise variance (m^2), ``n_corr`` the number of correspondences,
    ``length_m`` the length scale for theta (metres) and ``kappa`` the
    kernel's efficiency ratio (:func:`kernel_moments`).

    Inflation: along a weak eigenvector v the covariance gains
    ``unobservable_sigma_m^2``.  The eigenvector itself comes from noisy
    normals and is tilted from the truly unconstrained direction, so an
    error along the true direction (as large as the initial guess's) would
    leak into the directions the covariance calls precise.  First-order
    eigenvector perturbation gives the tilt towards another eigenvector u_k
    a variance ``tau_k^2 = (lambda_weak / lambda_k) * points_per_normal / n``
    (the weak eigenvalue is the normals' scatter; ``points_per_normal``
    readings share each independent normal estimate), so each u_k also gains
    ``unobservable_sigma_m^2 tau_k^2``: a cone around v rather than a line.
    """
    # The element-by-element steps on (3, 3) arrays run compiled (scale_both, eigen_floor, times_two,
    # unscale_symmetric in _kernels.py, numpy's order of operations in each), the eigen-decomposition
    # and the products stay numpy's (LAPACK, BLAS): about twenty numpy calls of a microsecond each
    # on 3 x 3 arrays made up most of this function's time (27 -> 16 µs a registration of
    # benchmarks/registration.py).
    inv_length = 1.0 / length_m
    per = 1.0 / max(n_corr, 1)
    a, ms = _kernels.scale_both(h, middle if method == "censi" else h, inv_length, per)
    evals, evecs = np.linalg.eigh(a)
    evals, top, degeneracy, weak, d = _kernels.eigen_floor(evals, evecs, degeneracy_threshold)
    degeneracy = float(degeneracy)

    # Invert in scaled, per-correspondence units, where a degenerate Hessian
    # has a tiny but well-defined eigenvalue; a floored eigen-inverse keeps
    # the computation finite when it is exactly zero, and the inflation
    # below then supplies the large variance.
    inv_s, cov_s = _kernels.times_two(d @ evecs.T, per, kappa * sigma2)      # (D H D)^-1, kappa sigma^2 times it
    if method == "censi":
        cov_s = cov_s @ ms @ inv_s
    degenerate = bool(weak[0] or weak[1] or weak[2])
    if degenerate:
        big = unobservable_sigma_m ** 2
        for w in np.flatnonzero(weak):
            cov_s = cov_s + big * np.outer(evecs[:, w], evecs[:, w])
            for k in np.flatnonzero(~weak):
                tau2 = evals[w] / evals[k] * points_per_normal * per
                cov_s = cov_s + big * tau2 * np.outer(evecs[:, k], evecs[:, k])
    cov = _kernels.unscale_symmetric(cov_s, inv_length)
    return CovarianceEstimate(
        covariance=cov,
        sigma_m=math.sqrt(sigma2),      # IEEE square root, as np.sqrt's, without a numpy scalar
        eigenvalues=evals,
        eigenvectors=evecs,
        degeneracy=degeneracy,
        degenerate=degenerate,
        length_m=float(length_m),
    )
