"""Heading drift of the odometry, measured by verified loop closures.

Wheel odometry drifts systematically: unequal wheel diameters or a
miscalibrated track width turn the robot's heading estimate a little with
every metre travelled, the same way every time.  Such a bias is not noise
and no covariance describes it: over a long stretch it bends the odometry
path into an arc, and where no closure pins that stretch the optimised map
keeps the bend.

Each verified closure measures it.  Between the closure's keyframes a
(later) and b (earlier), the odometry heading change exceeds the true one
(the closure's measured heading) by ``rate * (travel(b) - travel(a))`` plus
random-walk noise, so the rate is the slope of a generalised least-squares
line through the origin: heading residual against signed travel, with the
residuals' full covariance (closures over shared stretches share their
noise).  This is the systematic-error calibration of dead
reckoning (J. Borenstein and L. Feng, "Measurement and correction of
systematic odometry errors in mobile robots", IEEE Trans. Robotics and
Automation 12(6), 1996), with loop closures in place of a surveyed test
path.

The correction removes ``rate * s`` from the heading increment of every
step of length s and integrates the steps again.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ..core import se2
from ..core.odometry import odometry_travel
from ..core.options import options, setting


@options
class DriftOptions:
    """When a heading drift is estimated and applied.

    min_closures : at least this many verified closures are needed.
    min_significance : the rate is applied only when it is at least this
        many standard errors from zero (a rate indistinguishable from zero
        would only add noise).
    outlier_sigmas : closures whose residual from the fitted line exceeds
        this many standard deviations are left out and the line refitted
        once (a closure can be right and still sit on a stretch with an
        unmodelled disturbance, e.g. a wheel slip).
    max_closures : at most this many closures enter the fit (its
        covariance is dense, K x K).
    consensus_sigmas, consensus_margin : the first guess from unverified
        candidates (:func:`heading_drift_consensus`): a candidate votes for
        the rates within this many standard deviations of its residual, and
        the winner needs this many times the votes of zero drift.
    """

    min_closures: int = setting(10, at_least=2)
    min_significance: float = setting(3.0, at_least=0.0)
    outlier_sigmas: float = setting(4.0, above=0.0)
    max_closures: int = setting(1500, at_least=2)
    consensus_sigmas: float = setting(3.0, above=0.0)
    consensus_margin: float = setting(1.5, at_least=1.0)


@dataclass(frozen=True)
class HeadingDrift:
    """Estimated heading drift of the odometry.

    rate_rad_per_m : heading error the odometry adds per metre travelled
        (positive: the odometry turns anticlockwise more than the robot).
    std_rad_per_m : its standard error (scaled by the fit's reduced
        chi-square when that exceeds 1).
    closures : closures used in the final fit.
    applied : whether the rate is significant.
    removed_rad_per_m : the rate actually removed from the odometry (the
        estimate, or a first guess within two standard errors of it; 0 when
        nothing was removed).
    """

    rate_rad_per_m: float
    std_rad_per_m: float
    closures: int
    applied: bool
    removed_rad_per_m: float = 0.0


NO_DRIFT = HeadingDrift(0.0, float("nan"), 0, False)


def chain_travel(odom_poses) -> np.ndarray:
    """Cumulative path length (m) along the keyframe chain, (N,), 0 at node 0."""
    return odometry_travel(odom_poses)[0]


def _heading_residuals(odom_poses, step_covariances, src, dst, delta, covariance):
    """Per closure: signed travel dst - src (m), heading residual odometry - measurement (rad),
    the chain's cumulative heading variance (N,), and the residual's standard deviation (rad)."""
    odom_poses = np.asarray(odom_poses, dtype=float)
    travel = chain_travel(odom_poses)
    signed = travel[dst] - travel[src]
    resid = se2.wrap(odom_poses[dst, 2] - odom_poses[src, 2] - np.asarray(delta, float)[:, 2])
    # Heading variance of a stretch is the sum of its steps' (heading noise
    # does not depend on the path's shape); cum_var[k] covers steps 0..k-1.
    cum_var = np.r_[0.0, np.cumsum(np.asarray(step_covariances, float)[:, 2, 2])]
    sd = np.sqrt(np.abs(cum_var[dst] - cum_var[src]) + np.maximum(np.asarray(covariance, float)[:, 2, 2], 1e-18))
    return signed, resid, cum_var, sd


def estimate_heading_drift(odom_poses, step_covariances, src, dst, delta, covariance,
                           options: DriftOptions = DriftOptions()) -> HeadingDrift:
    """Generalised least-squares heading drift rate from verified closures.

    Parameters
    ----------
    odom_poses : (N, 3) odometry keyframe poses, one fixed frame.
    step_covariances : (N-1, 3, 3) the odometry model's step covariances
        (only their heading variances matter here).
    src, dst : (K,) node indices of verified closures.
    delta, covariance : (K, 3) measured ``src^-1 ∘ dst`` and (K, 3, 3) its
        covariance, in the src frame.

    Closures over overlapping stretches of the chain share the same heading
    noise, so their residuals are correlated: the covariance of two
    residuals is the heading variance of the steps their stretches share
    (plus each closure's own measurement variance on the diagonal).  The
    fit uses that full covariance; treating the residuals as independent
    would make hundreds of closures along the same few passes look like
    hundreds of independent witnesses and the standard error far too small.
    At most ``max_closures`` closures (evenly spread over the sequence) enter
    the fit, as the covariance is dense.
    """
    src = np.asarray(src, dtype=np.intp)
    dst = np.asarray(dst, dtype=np.intp)
    if len(src) < options.min_closures:
        return NO_DRIFT
    delta = np.asarray(delta, dtype=float)
    covariance = np.asarray(covariance, dtype=float)
    if len(src) > options.max_closures:
        pick = np.sort(np.argsort(src, kind="stable")[np.linspace(0, len(src) - 1, options.max_closures).astype(int)])
        src, dst, delta, covariance = src[pick], dst[pick], delta[pick], covariance[pick]
    signed, resid, cum_var, marginal = _heading_residuals(odom_poses, step_covariances, src, dst, delta, covariance)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    # The residual is odometry minus measurement: a stretch run backwards
    # (src after dst) enters with the opposite sign.
    sign = np.where(dst >= src, 1.0, -1.0)
    use = np.ones(len(src), dtype=bool)
    for _ in range(2):
        idx = np.flatnonzero(use)
        if len(idx) < options.min_closures:
            return NO_DRIFT
        shared = cum_var[np.minimum.outer(hi[idx], hi[idx])] - cum_var[np.maximum.outer(lo[idx], lo[idx])]
        cov = np.maximum(shared, 0.0) * np.outer(sign[idx], sign[idx])
        cov[np.diag_indices_from(cov)] += np.maximum(covariance[idx, 2, 2], 1e-18)
        try:
            factor = scipy.linalg.cho_factor(cov, lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            return NO_DRIFT
        cx = scipy.linalg.cho_solve(factor, signed[idx], check_finite=False)
        info = float(signed[idx] @ cx)
        if info <= 0.0:
            return NO_DRIFT
        rate = float(cx @ resid[idx] / info)
        fitted = resid - rate * signed
        keep = np.abs(fitted) <= options.outlier_sigmas * marginal
        if np.array_equal(keep, use):
            break
        use = keep
    dof = max(len(idx) - 1, 1)
    reduced = float(fitted[idx] @ scipy.linalg.cho_solve(factor, fitted[idx], check_finite=False)) / dof
    # The random-walk model may understate the noise (it is the log's own
    # claim); the fit's reduced chi-square says by how much.
    std = float(np.sqrt(max(reduced, 1.0) / info))
    applied = abs(rate) >= options.min_significance * std
    return HeadingDrift(rate_rad_per_m=rate, std_rad_per_m=std, closures=len(idx), applied=bool(applied))


def heading_drift_consensus(odom_poses, step_covariances, src, dst, delta, covariance,
                            options: DriftOptions = DriftOptions()) -> float:
    """A first guess of the heading drift rate (rad/m) from unverified candidates.

    Where the odometry drifts by several degrees per 100 m, the strict
    odometry gate rejects every closure over a long stretch and no verified
    closure is left to measure the drift from.  Candidates can still vote:
    each one is consistent with the rates for which its heading residual
    minus rate times travel lies within ``consensus_sigmas`` of its standard
    deviation, an interval of rates; the rate inside the most intervals wins
    (a sweep over the interval ends).  Look-alike places rarely disturb the
    vote: a neighbouring aisle is wrong in position, not in heading.

    Returns the rate (refined by weighted least squares over its voters)
    when it gathers at least ``min_closures`` votes and at least
    ``consensus_margin`` times the votes of zero drift; otherwise 0.
    Parameters as :func:`estimate_heading_drift`.
    """
    src = np.asarray(src, dtype=np.intp)
    dst = np.asarray(dst, dtype=np.intp)
    if len(src) < options.min_closures:
        return 0.0
    signed, resid, _, sd = _heading_residuals(odom_poses, step_covariances, src, dst, delta, covariance)
    ok = np.abs(signed) > 0
    signed, resid, sd = signed[ok], resid[ok], sd[ok]
    a = (resid - options.consensus_sigmas * sd) / signed
    b = (resid + options.consensus_sigmas * sd) / signed
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    at_zero = int(np.sum((lo <= 0.0) & (hi >= 0.0)))
    # Sweep: +1 at each interval start, -1 after each end; starts first on ties.
    ends = np.r_[lo, hi]
    step = np.r_[np.ones(len(lo), int), -np.ones(len(hi), int)]
    order = np.lexsort((-step, ends))
    count = np.cumsum(step[order])
    best = int(np.argmax(count))
    votes = int(count[best])
    if votes < options.min_closures or votes < options.consensus_margin * max(at_zero, 1):
        return 0.0
    # The middle of the best-supported stretch of rates, refined by weighted
    # least squares over the candidates that voted for it.
    right = ends[order][best + 1] if best + 1 < len(ends) else ends[order][best]
    mid = 0.5 * (ends[order][best] + right)
    voters = (lo <= mid) & (hi >= mid)
    w = 1.0 / sd[voters] ** 2
    return float(np.sum(w * signed[voters] * resid[voters]) / np.sum(w * signed[voters] ** 2))


def remove_heading_drift(odom_poses, rate_rad_per_m: float) -> np.ndarray:
    """Odometry keyframe poses (N, 3) with a heading drift removed.

    Every step keeps its length and direction in its own frame; its heading
    increment loses ``rate * s`` (s its length, metres), so the heading of
    node k loses ``rate * travel_k`` and each step's displacement turns with
    it.  Node 0 is unchanged.
    """
    odom_poses = np.asarray(odom_poses, dtype=float)
    if len(odom_poses) < 2 or rate_rad_per_m == 0.0:
        return odom_poses.copy()
    travel = chain_travel(odom_poses)
    turn = -rate_rad_per_m * travel  # heading correction of each node
    step = np.diff(odom_poses[:, :2], axis=0)
    c, s = np.cos(turn[:-1]), np.sin(turn[:-1])
    # The step from node k is rotated about node k by node k's correction.
    moved = np.column_stack([c * step[:, 0] - s * step[:, 1], s * step[:, 0] + c * step[:, 1]])
    out = np.empty_like(odom_poses)
    out[0] = odom_poses[0]
    out[1:, :2] = odom_poses[0, :2] + np.cumsum(moved, axis=0)
    out[:, 2] = se2.wrap(odom_poses[:, 2] + turn)
    return out
