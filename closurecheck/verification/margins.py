"""How close each verdict was: the margin of a candidate against the check that decided it.

A margin is signed and relative to the check's bound, so margins of
different checks can be compared (docs/verification.md, "Margins"):

* a lower bound t on a figure v (overlap): ``(v - t) / t``;
* an upper bound t on a figure v (RMSE, ambiguity, map standard deviation):
  ``(t - v) / t``;
* a chi-square bound t on a squared Mahalanobis distance d² (odometry gate,
  map gate, residual after optimisation): in distance units,
  ``(sqrt(t) - sqrt(d²)) / sqrt(t)``;
* the GNC weight w against its floor t: ``(w - t) / t``.

Positive: the figure passed the bound by that share of it; negative: it
failed by that share; 0: on the bound.  A rejected candidate is measured
against the check named by its reason (where the map gate retried a
candidate the odometry gate or PCM had rejected, against the map gate, the
last check it failed).  An accepted closure passed every check it met: its
margin is the smallest of their margins, and the check is the one that
gave it.  Reasons not decided by a bound on a figure have no margin (NaN):
``no_points``, ``not_converged``, ``degenerate``, ``duplicate``, a PCM
rejection the map gate did not retry (the consistent set is chosen as a
whole), and a reviewer's decisions.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core.stats import chi2_threshold
from .reasons import Reason

# The figure each check reads; the map gate reads two (its margin is the
# smaller), so "map_std" folds into "map_gate".
CHECKS = {
    "overlap": "overlap",
    "rmse": "rmse_m",
    "ambiguity": "ambiguity",
    "odometry_gate": "odometry_chi2",
    "map_gate": "map_chi2",
    "map_std": "map_std_m",
    "gnc_weight": "gnc_weight",
    "graph_residual": "graph_chi2",
}


def check_bounds(verify_options) -> dict:
    """Bounds of the verification checks by figure name (same units as the figure).

    ``verify_options`` is a :class:`closurecheck.verification.verify.VerifyOptions`;
    the chi-square figures get the quantile of chi-square with 3 degrees of
    freedom at the configured probability (squared Mahalanobis distance of
    a 3-vector, dimensionless).  Options missing from the object are
    skipped.

    Examples
    --------
    Upper critical value of chi-square with 3 degrees of freedom at 0.999:
    16.266 (NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.4).

    >>> from closurecheck.verification.margins import check_bounds
    >>> from closurecheck.verification.verify import VerifyOptions
    >>> b = check_bounds(VerifyOptions())
    >>> b["overlap"], round(b["odometry_chi2"], 3)
    (0.3, 16.266)
    """
    out = {}
    for key, name in (("overlap", "min_overlap"), ("rmse_m", "max_rmse_m"), ("ambiguity", "max_ambiguity"),
                      ("map_std_m", "map_max_std_m"), ("gnc_weight", "gnc_min_weight")):
        if hasattr(verify_options, name):
            out[key] = float(getattr(verify_options, name))
    for key, name in (("odometry_chi2", "gate_probability"), ("map_chi2", "map_probability"),
                      ("graph_chi2", "residual_probability")):
        if hasattr(verify_options, name):
            out[key] = chi2_threshold(float(getattr(verify_options, name)))
    return out


@dataclass(frozen=True, eq=False)
class Margins:
    """Per candidate (C of them): ``value`` (C,) the signed relative margin
    (NaN where no bound decided) and ``check`` (C,) str, the key of
    :data:`CHECKS` it was measured against ("" where none)."""

    value: np.ndarray
    check: np.ndarray


def _relative(v, t, lower: bool):
    with np.errstate(invalid="ignore", divide="ignore"):
        return (v - t) / t if lower else (t - v) / t


def check_margins(figures: dict, bounds: dict) -> dict:
    """Each check's margin for every candidate, check key -> (C,) array (NaN where the check has no figure).

    ``figures`` are the verdict table's figures by name, ``bounds`` as
    :func:`check_bounds` gives them.  Zero or missing bounds leave the check
    out (a bound of 0 switches a lower-bound check off).
    """
    out = {}
    for check, name in CHECKS.items():
        if name not in figures or not bounds.get(name):
            continue
        v = np.asarray(figures[name], dtype=float)
        t = float(bounds[name])
        if name.endswith("_chi2"):
            with np.errstate(invalid="ignore"):
                out[check] = _relative(np.sqrt(np.clip(v, 0.0, None)), np.sqrt(t), lower=False)
        else:
            out[check] = _relative(v, t, lower=name in ("overlap", "gnc_weight"))
    if "odometry_gate" in out and "odometry_informative" in figures:
        # The gate decides only where the odometry chain is informative.
        out["odometry_gate"] = np.where(np.asarray(figures["odometry_informative"], bool), out["odometry_gate"],
                                        np.nan)
    return out


def decision_margins(reason, figures: dict, bounds: dict) -> Margins:
    """The margin of every candidate against the check that decided it (module docstring).

    Parameters
    ----------
    reason : (C,) reason codes (:class:`~closurecheck.verification.reasons.Reason` values).
    figures : the verdict table's figures, name -> (C,) array.
    bounds : the checks' bounds by figure name (:func:`check_bounds`).

    Examples
    --------
    An overlap of 0.33 against a lower bound of 0.3 passed by a tenth of
    the bound; one of 0.15 failed by half of it:

    >>> import numpy as np
    >>> from closurecheck.verification.margins import decision_margins
    >>> m = decision_margins(np.array(["accepted", "low_overlap"]), {"overlap": np.array([0.33, 0.15])},
    ...                      {"overlap": 0.3})
    >>> np.round(m.value, 3).tolist(), m.check.tolist()
    ([0.1, -0.5], ['overlap', 'overlap'])
    """
    reason = np.asarray(reason).astype(str)
    k = len(reason)
    per = check_margins(figures, bounds)
    value = np.full(k, np.nan)
    check = np.full(k, "", dtype=object)

    def take(rows, name):
        if name in per and rows.any():
            value[rows] = per[name][rows]
            check[rows] = np.where(np.isfinite(per[name][rows]), name, "")

    if "map_std" in per:
        # The map gate needs both: the distance within its bound and the map
        # tight there; its margin is the smaller of the two (fmin skips NaN).
        std = per.pop("map_std")
        per["map_gate"] = np.fmin(per["map_gate"], std) if "map_gate" in per else std
    tried = np.isfinite(per["map_gate"]) if "map_gate" in per else np.zeros(k, bool)

    take(reason == Reason.LOW_OVERLAP, "overlap")
    take(reason == Reason.HIGH_RMSE, "rmse")
    take(reason == Reason.AMBIGUOUS, "ambiguity")
    gate = (reason == Reason.ODOMETRY_GATE) | (reason == Reason.UNCHECKED_ODOMETRY)
    take(gate & ~tried, "odometry_gate")
    take((gate | (reason == Reason.PAIR_INCONSISTENT)
          | (reason == Reason.UNSUPPORTED_GROUP)) & tried, "map_gate")
    residual = reason == Reason.GRAPH_RESIDUAL
    if "graph_residual" in per:
        take(residual & np.isfinite(per["graph_residual"]), "graph_residual")
        residual &= ~np.isfinite(per["graph_residual"])
    take(residual, "gnc_weight")

    acc = np.flatnonzero(reason == Reason.ACCEPTED)
    if len(acc):
        names = [n for n in ("overlap", "rmse", "ambiguity", "odometry_gate", "map_gate", "gnc_weight",
                             "graph_residual") if n in per]
        if names:
            m = np.stack([per[n][acc] for n in names])
            # Only the checks it passed count; a failed odometry gate was
            # overruled by the map gate, which it passed.
            m = np.where(np.isfinite(m) & (m >= 0), m, np.inf)
            best = np.argmin(m, axis=0)
            low = m[best, np.arange(len(acc))]
            ok = np.isfinite(low)
            value[acc[ok]] = low[ok]
            check[acc[ok]] = np.array(names, dtype=object)[best[ok]]
    return Margins(value=value, check=check)
