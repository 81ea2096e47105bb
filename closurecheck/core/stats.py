"""The chi-square bounds every gate uses, in one place.

The quantile comes from ``scipy.special.gammaincinv``, the very call
``scipy.stats.chi2.ppf`` makes (scipy 1.17: ``chi2_gen._ppf`` returns
``2*sc.gammaincinv(df/2, p)``, which ``rv_continuous.ppf`` multiplies by
scale 1 and adds loc 0; ``median`` is ``ppf(0.5)``), so the bounds are the
same bits (tests/core/test_stats.py checks a dense grid against
scipy.stats.chi2); the distribution function likewise is
``scipy.special.chdtr``, which ``chi2_gen._cdf`` returns.  A run imports
scipy.stats anyway (scikit-learn does), but the report's picture workers
need only these: without scipy.stats (about 0.8 s to import in a fresh
process) they are ready sooner (closurecheck.reporting.picture_worker).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import chdtr, gammaincinv

# A pose (x, y, theta) has three degrees of freedom: the squared Mahalanobis
# distance of a consistent pose error follows chi-square(3).
POSE_DOF = 3


def chi2_threshold(probability: float, dof: int = POSE_DOF) -> float:
    """The bound a consistent squared Mahalanobis distance stays below with ``probability``.

    Parameters
    ----------
    probability : in (0, 1), the share of consistent residuals accepted
        (0 gives 0.0, 1 gives inf, outside [0, 1] nan, as scipy.stats.chi2.ppf).
    dof : degrees of freedom (3 for an SE(2) pose error); not positive gives nan.

    Returns
    -------
    float : the chi-square(``dof``) quantile at ``probability`` (a squared
        Mahalanobis distance, no unit).

    Examples
    --------
    Published chi-square tables (e.g. NIST/SEMATECH e-Handbook of
    Statistical Methods, table 1.3.6.7.4) give 11.345 at 0.99 and 16.266 at
    0.999 for three degrees of freedom:

    >>> from closurecheck.core.stats import chi2_threshold
    >>> round(chi2_threshold(0.99), 3), round(chi2_threshold(0.999), 3)
    (11.345, 16.266)
    """
    if not dof > 0:
        # scipy.stats.chi2's shape check (rv_continuous._argcheck: df > 0) gives nan even at
        # probability 0 or 1, where gammaincinv alone would give 0 or inf.
        return math.nan
    return float(chi2_quantiles(probability, dof))


def chi2_median(dof: int = POSE_DOF) -> float:
    """Median of chi-square(``dof``) (2.366 for 3 degrees of freedom).

    Examples
    --------
    >>> from closurecheck.core.stats import chi2_median
    >>> round(chi2_median(3), 3)
    2.366
    """
    return chi2_threshold(0.5, dof)


def chi2_quantiles(probabilities, dof: int = POSE_DOF) -> np.ndarray:
    """Quantiles of chi-square(``dof``) at an array of probabilities, as :func:`chi2_threshold` gives one.

    Parameters
    ----------
    probabilities : array_like in [0, 1] (outside: nan, as scipy.stats.chi2.ppf).
    dof : degrees of freedom, positive.

    Returns
    -------
    ndarray of the same shape: squared Mahalanobis distances, no unit.

    Examples
    --------
    The quartiles of chi-square(3) (NIST/SEMATECH e-Handbook of Statistical
    Methods, table 1.3.6.7.4, gives 1.213 and 4.108):

    >>> from closurecheck.core.stats import chi2_quantiles
    >>> chi2_quantiles([0.25, 0.75]).round(3)
    array([1.213, 4.108])
    """
    # chi-square(k) is gamma(k/2, scale 2): its quantile is twice the regularised
    # lower incomplete gamma function's inverse, written as scipy.stats writes it.
    return 2 * gammaincinv(dof / 2, np.asarray(probabilities, dtype=float))


def chi2_cdf(values, dof: int = POSE_DOF) -> np.ndarray:
    """The probability that chi-square(``dof``) stays below each of ``values`` (the distribution function).

    Parameters
    ----------
    values : array_like of squared Mahalanobis distances (no unit); below 0 gives 0.
    dof : degrees of freedom, positive.

    Returns
    -------
    ndarray of the same shape, in [0, 1].

    Examples
    --------
    >>> from closurecheck.core.stats import chi2_cdf, chi2_threshold
    >>> float(chi2_cdf(chi2_threshold(0.99)).round(6))
    0.99
    """
    # Below the support scipy.stats gives 0 where chdtr gives nan; np.maximum keeps a nan a nan.
    return chdtr(dof, np.maximum(np.asarray(values, dtype=float), 0.0))
