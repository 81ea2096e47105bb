"""The chi-square bounds every gate uses, in one place."""

from __future__ import annotations

from scipy.stats import chi2

# A pose (x, y, theta) has three degrees of freedom: the squared Mahalanobis
# distance of a consistent pose error follows chi-square(3).
POSE_DOF = 3


def chi2_threshold(probability: float, dof: int = POSE_DOF) -> float:
    """The bound a consistent squared Mahalanobis distance stays below with ``probability``.

    Parameters
    ----------
    probability : in (0, 1), the share of consistent residuals accepted.
    dof : degrees of freedom (3 for an SE(2) pose error).

    Examples
    --------
    Published chi-square tables (e.g. NIST/SEMATECH e-Handbook of
    Statistical Methods, table 1.3.6.7.4) give 11.345 at 0.99 and 16.266 at
    0.999 for three degrees of freedom:

    >>> from closurecheck.core.stats import chi2_threshold
    >>> round(chi2_threshold(0.99), 3), round(chi2_threshold(0.999), 3)
    (11.345, 16.266)
    """
    return float(chi2.ppf(probability, dof))


def chi2_median(dof: int = POSE_DOF) -> float:
    """Median of chi-square(``dof``) (2.366 for 3 degrees of freedom)."""
    return float(chi2.median(dof))
