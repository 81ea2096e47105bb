"""The chi-square bounds every gate uses, in one place.

The quantile comes from ``scipy.special.gammaincinv``, the very call
``scipy.stats.chi2.ppf`` makes (scipy 1.17: ``chi2_gen._ppf`` returns
``2*sc.gammaincinv(df/2, p)``, which ``rv_continuous.ppf`` multiplies by
scale 1 and adds loc 0; ``median`` is ``ppf(0.5)``), so the bounds are the
same bits (tests/core/test_stats.py checks a dense grid against
scipy.stats.chi2).  Importing scipy.stats cost about 0.5 s of every run's
start (scipy.stats with the scipy.optimize it pulls in, measured with
``python -X importtime``); scipy.special is loaded anyway by scipy.spatial.
"""

from __future__ import annotations

import math

from scipy.special import gammaincinv

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
    # chi-square(k) is gamma(k/2, scale 2): its quantile is twice the regularised
    # lower incomplete gamma function's inverse, written as scipy.stats writes it.
    return float(2 * gammaincinv(dof / 2, probability))


def chi2_median(dof: int = POSE_DOF) -> float:
    """Median of chi-square(``dof``) (2.366 for 3 degrees of freedom).

    Examples
    --------
    >>> from closurecheck.core.stats import chi2_median
    >>> round(chi2_median(3), 3)
    2.366
    """
    return chi2_threshold(0.5, dof)
