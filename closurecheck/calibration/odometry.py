"""The odometry measured against its own scans: systematic errors, noise and slips.

Wheel odometry is rarely calibrated.  Unequal wheel diameters turn the
heading a little with every metre; an uncertain wheelbase scales every
turn; worn tyres scale every distance (J. Borenstein and L. Feng,
"Measurement and correction of systematic odometry errors in mobile
robots", IEEE Trans. Robotics and Automation 12(6), 1996).  Over a 100 m
loop such errors bend the odometry by tens of metres, far beyond any
random-walk model, and a log rarely states its noise right, if at all.

Consecutive keyframes see almost the same scene from poses about half a
metre apart, so registering each keyframe to the next measures the true
step to millimetres, where no look-alike place can mislead it (the
odometry over one step is good to centimetres and a fraction of a degree
even when uncalibrated).  Against these measured steps:

1. **Systematic errors** (per step of path length ``d`` and measured turn
   ``w``): the odometry's heading change exceeds the true one by
   ``heading_per_m * d + turn_scale * w`` and its distance by
   ``distance_scale * d``.  The three rates are a robust weighted
   least-squares fit over all steps whose registration is sound, and every
   odometry step is corrected by them.
2. **Noise**: the corrected steps still differ from the measured ones by
   the odometry's random walk plus the registration's own error (its
   covariance is known).  The random-walk coefficients of
   :class:`closurecheck.core.odometry.OdometryNoise` are fitted to those
   residuals (robust, non-negative least squares on their squares).  The
   log's header, when it has one, is only a floor for steps that could not
   be measured.
3. **Slips**: a step whose residual is many standard deviations out (a
   wheel slipping on a wet floor, a bump) keeps its odometry, with a
   covariance widened to cover the jump, so that loop closures decide.
   A slip where registration failed cannot be seen here: those steps are
   listed (``unchecked``) and the verification looks for one there when
   the final map contradicts itself (:mod:`closurecheck.verification.slips`).

The result is a calibrated keyframe chain (poses and step covariances) for
every later stage; the input odometry itself is kept in graph.json's nodes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..core import se2
from ..core.odometry import OdometryChain, OdometryNoise, odometry_travel
from ..core.options import options, setting
from ..registration.batch import RegisteredClosures


@options
class CalibrationOptions:
    """When and how the odometry is measured against its own scans.

    enabled : measure the odometry (off: the header's model or the
        defaults, and no correction; the verification stage then relies on
        its own drift estimate from closures).
    min_steps : at least this many soundly registered steps are needed for
        a calibration; with fewer the odometry is used as it is.
    min_overlap, max_rmse_m : a step's registration is sound when it
        converged and matched at least this share of points with at most
        this RMS residual.  A degenerate step counts too: its covariance is
        wide along the direction it cannot see, which weights it out of the
        fits there.  Round pillars and posts give few line features, so the
        share matched is low even when the step is right (0.3-0.6 in a hall
        of columns, all right against the truth).
    outlier_sigmas : steps whose residual exceeds this many robust standard
        deviations are left out of the fits (slips, moving people).
    slip_sigmas : a step whose residual exceeds this many standard
        deviations of the fitted model is a slip.
    min_significance : a systematic error is removed only when its estimate
        lies at least this many standard errors from zero; otherwise it is
        taken as zero and the others are refitted without it.  Registration
        has small biases of its own where the scene is sparse: on an open
        lot of posts and containers, consecutive keyframes registered with
        a mean rotation error of -0.04 deg per 0.6 m step, which a fit over
        200 steps read as 3.0 +/- 2.2 deg per 100 m of heading drift and
        -2.8 +/- 1.5% of turn scale on odometry that had neither; removing
        them made the map worse than the raw odometry (ATE 0.23 m against
        0.10 m).  Three standard errors is common practice for such a test.
    """

    enabled: bool = setting(True)
    min_steps: int = setting(30, at_least=5)
    min_overlap: float = setting(0.25, above=0.0, at_most=1.0)
    max_rmse_m: float = setting(0.05, above=0.0)
    outlier_sigmas: float = setting(5.0, above=1.0)
    slip_sigmas: float = setting(8.0, above=1.0)
    min_significance: float = setting(3.0, at_least=0.0)


@dataclass(frozen=True)
class SystematicErrors:
    """Systematic odometry errors and their standard errors (Borenstein and Feng's two, plus distance scale).

    heading_per_m : heading gained per metre driven (rad/m; unequal wheels).
    turn_scale : heading gained per radian turned (dimensionless; wheelbase).
    distance_scale : distance gained per metre (dimensionless; tyre size).
    *_std : standard errors of the fits.
    not_significant : names of the rates whose estimate fell short of
        ``CalibrationOptions.min_significance`` standard errors; they are 0
        above and their ``*_std`` is that of the rejected estimate.
    """

    heading_per_m: float = 0.0
    turn_scale: float = 0.0
    distance_scale: float = 0.0
    heading_per_m_std: float = math.nan
    turn_scale_std: float = math.nan
    distance_scale_std: float = math.nan
    not_significant: tuple = ()


@dataclass(frozen=True, eq=False)
class OdometryCalibration:
    """What the calibration measured, and the calibrated chain.

    chain : keyframe poses with the systematic errors removed and slips
        replaced, and the step covariances of the fitted noise model
        (odometry frame of the first keyframe).
    systematic : the removed errors.
    noise : the fitted random-walk model (the header's or the defaults when
        not measured).
    measured : whether a calibration was made (enough sound steps).
    steps, steps_sound : keyframe steps, and those registered soundly.
    slips : (S,) indices of the steps found to be slips.
    notes : remarks for the report.
    unchecked : (U,) indices of the steps whose registration was not sound
        (empty when no calibration was made): a slip there is invisible to
        the calibration, and the verification may look for one
        (docs/verification.md, "Slips the scans could not see").
    """

    chain: OdometryChain
    systematic: SystematicErrors
    noise: OdometryNoise
    measured: bool
    steps: int
    steps_sound: int
    slips: np.ndarray
    notes: tuple = ()
    unchecked: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))


@dataclass(frozen=True, eq=False)
class _Steps:
    """Per keyframe step k (keyframe k to k + 1): odometry and measurement."""

    odo: np.ndarray        # (S, 3) odometry delta in frame k
    length: np.ndarray     # (S,) odometry path length, metres (all scans between)
    turn: np.ndarray       # (S,) odometry absolute turn, radians (all scans between)
    meas: np.ndarray       # (S, 3) registered delta (NaN when none)
    meas_cov: np.ndarray   # (S, 3, 3)
    sound: np.ndarray      # (S,) bool
    full: np.ndarray       # (S,) bool: sound and not degenerate (every direction measured)


def step_pairs(ids) -> tuple[np.ndarray, np.ndarray]:
    """The (src, dst) scan ids of the keyframe steps to register: each keyframe and the next."""
    ids = np.asarray(ids, dtype=np.int64)
    return ids[:-1], ids[1:]


def _steps(odom, ids, registered: RegisteredClosures, options: CalibrationOptions) -> _Steps:
    odom = np.asarray(odom, dtype=float)
    poses = odom[ids]
    travel, rotation = odometry_travel(odom)
    q = registered.quality
    sound = (q.valid & q.converged & (q.overlap >= options.min_overlap)
             & (q.rmse_m <= options.max_rmse_m) & np.isfinite(registered.delta).all(axis=1))
    return _Steps(odo=se2.between(poses[:-1], poses[1:]), length=np.diff(travel[ids]), turn=np.diff(rotation[ids]),
                  meas=registered.delta, meas_cov=registered.covariance, sound=sound, full=sound & ~q.degenerate)


# Zero-mean priors on the systematic errors, wide enough to cover any robot
# (common practice for regularising a calibration, no published source):
# 1 rad/m of heading drift, a 50% turn or distance scale.  They only matter
# where a route leaves a rate unobservable (no turns: the turn scale).
_PRIOR_STD = {"heading_per_m": 1.0, "turn_scale": 0.5, "distance_scale": 0.5}


def _irls(a, b, var, prior_std, outlier_sigmas, rounds: int = 4):
    """Weighted least squares ``a x ≈ b`` (variances ``var``) with a weak zero-mean prior, refitted without outliers.

    Returns (x, its covariance, inlier mask).  The covariance is scaled by the
    reduced chi-square when that exceeds one (the variances are estimates).
    """
    keep = np.ones(len(b), dtype=bool)
    prior = np.diag(1.0 / np.square(prior_std))
    for _ in range(rounds):
        w = 1.0 / var[keep]
        aw = a[keep] * w[:, None]
        info = aw.T @ a[keep] + prior
        x = np.linalg.solve(info, aw.T @ b[keep])
        z = (b - a @ x) / np.sqrt(var)
        # Robust spread of the normalised residuals (1.4826 MAD, the
        # Gaussian-consistent scale): outliers must not inflate the bound.
        spread = max(1.0, 1.4826 * float(np.median(np.abs(z[keep]))))
        new = np.abs(z) <= outlier_sigmas * spread
        if np.array_equal(new, keep) or new.sum() < a.shape[1] + 2:
            break
        keep = new
    dof = max(int(keep.sum()) - a.shape[1], 1)
    reduced = float(np.sum(((b - a @ x) ** 2 / var)[keep])) / dof
    return x, np.linalg.inv(info) * max(reduced, 1.0), keep


def _significant_fit(a, b, var, names, options: CalibrationOptions):
    """Fit the rates ``names`` (columns of ``a``), dropping the least significant until all pass.

    Returns (values, standard errors, dropped names); a dropped rate is 0
    with the standard error it had when it was dropped.
    """
    keep = list(range(len(names)))
    value = np.zeros(len(names))
    std = np.full(len(names), np.nan)
    dropped = []
    while keep:
        x, cov, _ = _irls(a[:, keep], b, var, tuple(_PRIOR_STD[names[i]] for i in keep), options.outlier_sigmas)
        se = np.sqrt(np.diag(cov))
        value[keep], std[keep] = x, se
        z = np.abs(x) / se
        worst = int(np.argmin(z))
        if z[worst] >= options.min_significance:
            break
        dropped.append(names[keep[worst]])
        value[keep[worst]] = 0.0
        del keep[worst]
    return value, std, tuple(dropped)


def _systematic(s: _Steps, noise: OdometryNoise, options: CalibrationOptions) -> SystematicErrors:
    idx = np.flatnonzero(s.sound)
    # Distance scale first: the heading rates are per metre actually driven.
    odo_d = np.hypot(s.odo[idx, 0], s.odo[idx, 1])
    meas_d = np.hypot(s.meas[idx, 0], s.meas[idx, 1])
    var_d = noise.translation_m_per_sqrt_m ** 2 * s.length[idx] + s.meas_cov[idx, 0, 0] \
        + noise.min_translation_std_m ** 2
    (k,), (k_std,), drop_d = _significant_fit(meas_d[:, None], odo_d - meas_d, var_d, ("distance_scale",), options)
    d = s.length[idx] / (1.0 + k)
    w = s.meas[idx, 2]
    var_t = noise.heading_rad_per_sqrt_m ** 2 * d + noise.heading_rad_per_sqrt_rad ** 2 * s.turn[idx] \
        + s.meas_cov[idx, 2, 2] + noise.min_heading_std_rad ** 2
    rt = se2.wrap(s.odo[idx, 2] - s.meas[idx, 2])
    (h, t), (h_std, t_std), drop_t = _significant_fit(np.column_stack([d, w]), rt, var_t,
                                                      ("heading_per_m", "turn_scale"), options)
    return SystematicErrors(heading_per_m=float(h), turn_scale=float(t), distance_scale=float(k),
                            heading_per_m_std=float(h_std), turn_scale_std=float(t_std),
                            distance_scale_std=float(k_std), not_significant=drop_d + drop_t)


def correct_steps(odo, length, sys: SystematicErrors) -> np.ndarray:
    """Odometry steps (S, 3) with the systematic errors removed.

    ``length`` is the odometry's path length of each step (metres).  The
    distance driven is ``length / (1 + distance_scale)``; a step's heading
    change loses ``heading_per_m`` times that and is divided by
    ``1 + turn_scale``; its displacement is divided by ``1 + distance_scale``
    and turned by half the heading correction (the correction grows along
    the step, so its chord turns by half of it).
    """
    odo = np.asarray(odo, dtype=float)
    driven = np.asarray(length, float) / (1.0 + sys.distance_scale)
    dth = (odo[:, 2] - sys.heading_per_m * driven) / (1.0 + sys.turn_scale)
    corr = dth - odo[:, 2]
    c, s = np.cos(0.5 * corr), np.sin(0.5 * corr)
    x, y = odo[:, 0] / (1.0 + sys.distance_scale), odo[:, 1] / (1.0 + sys.distance_scale)
    return np.column_stack([c * x - s * y, s * x + c * y, dth])


def _fit_noise(s: _Steps, steps, floor: OdometryNoise, options: CalibrationOptions) -> OdometryNoise:
    """Random-walk coefficients from the corrected steps' residuals against the measured ones.

    Only steps measured in every direction: a degenerate step's covariance
    is metres wide along the direction it cannot see, and subtracting it
    from a squared residual leaves nothing to fit.
    """
    idx = np.flatnonzero(s.full if s.full.sum() >= options.min_steps else s.sound)
    r = se2.between(s.meas[idx], steps[idx])
    d, turn = s.length[idx], s.turn[idx]
    mc = s.meas_cov[idx]
    # Squared residuals over their expectation: E[r_x^2 + r_y^2] = 2 a^2 d + tr(C_xy),
    # E[r_t^2] = b^2 d + c^2 |w| + C_tt.  Non-negative least squares on the
    # inliers (robust scale as in _irls), each row weighted by its expected size.
    rxy = r[:, 0] ** 2 + r[:, 1] ** 2 - (mc[:, 0, 0] + mc[:, 1, 1])
    rt = r[:, 2] ** 2 - mc[:, 2, 2]

    # Imported here: 0.1-0.35 s that the pipeline's import no longer pays before the run starts
    # (pipeline._AlongCalibration imports it while the workers register the steps).
    import scipy.optimize

    def nnls(rows, target, scale_guess):
        keep = np.ones(len(target), dtype=bool)
        coef = np.zeros(rows.shape[1])
        for _ in range(4):
            expect = np.maximum(rows @ coef, scale_guess)
            w = 1.0 / expect
            coef, _ = scipy.optimize.nnls(rows[keep] * w[keep, None], target[keep] * w[keep])
            expect = np.maximum(rows @ coef, scale_guess)
            new = target <= options.outlier_sigmas ** 2 * expect
            if np.array_equal(new, keep):
                break
            keep = new
        return coef

    (a2,) = nnls(2.0 * d[:, None], rxy, np.median(np.abs(rxy)) + 1e-12)
    b2, c2 = nnls(np.column_stack([d, turn]), rt, np.median(np.abs(rt)) + 1e-12)
    return OdometryNoise(translation_m_per_sqrt_m=float(np.sqrt(a2)), heading_rad_per_sqrt_m=float(np.sqrt(b2)),
                         heading_rad_per_sqrt_rad=float(np.sqrt(c2)),
                         min_translation_std_m=floor.min_translation_std_m,
                         min_heading_std_rad=floor.min_heading_std_rad)


def calibrate(odom, ids, registered: RegisteredClosures, prior: OdometryNoise,
              options: CalibrationOptions = CalibrationOptions()) -> OdometryCalibration:
    """Measure the odometry against the registered keyframe steps, and correct it.

    Parameters
    ----------
    odom : (N, 3) odometry poses of every scan (the log's odometry frame).
    ids : (K,) increasing keyframe scan ids.
    registered : the K - 1 steps of :func:`step_pairs`, registered
        (``src^-1 ∘ dst`` in the src frame).
    prior : the log header's noise model or the defaults: used as it is when
        too few steps register soundly, and as the starting weights of the fit.
    options : :class:`CalibrationOptions`.

    Returns
    -------
    OdometryCalibration

    Examples
    --------
    A straight drive whose odometry gains 30 degrees of heading per 100 m,
    every step measured exactly by registration:

    >>> import numpy as np
    >>> from closurecheck.calibration.odometry import calibrate, step_pairs
    >>> from closurecheck.core import se2
    >>> from closurecheck.core.odometry import OdometryNoise
    >>> from closurecheck.registration.batch import RegisteredClosures, RegistrationQuality
    >>> k = 60
    >>> truth = np.column_stack([0.5 * np.arange(k), np.zeros(k), np.zeros(k)])
    >>> true_steps = se2.between(truth[:-1], truth[1:])
    >>> odom = [np.zeros(3)]
    >>> for step in true_steps + [0.0, 0.0, np.radians(30) / 100 * 0.5]:
    ...     odom.append(se2.compose(odom[-1], step))
    >>> ok = np.ones(k - 1, dtype=bool)
    >>> q = RegistrationQuality(valid=ok, converged=ok, overlap=ok * 0.9, rmse_m=ok * 0.01, ambiguity=ok * np.nan,
    ...                         degenerate=~ok, degeneracy=ok * 0.5, iterations=ok * 3, fit_score=ok * 0.9)
    >>> src, dst = step_pairs(np.arange(k))
    >>> steps = RegisteredClosures(src, dst, true_steps, np.tile(np.diag([1e-6, 1e-6, 1e-8]), (k - 1, 1, 1)), q)
    >>> cal = calibrate(np.array(odom), np.arange(k), steps, OdometryNoise())
    >>> round(float(np.degrees(cal.systematic.heading_per_m) * 100), 1)
    30.0
    >>> def end_error(poses):
    ...     return round(float(np.hypot(*(poses[-1, :2] - truth[-1, :2]))), 2)
    >>> end_error(np.array(odom)), end_error(cal.chain.poses) < 0.05
    (2.24, True)
    """
    ids = np.asarray(ids, dtype=np.int64)
    odom = np.asarray(odom, dtype=float)
    s = _steps(odom, ids, registered, options)
    n_sound = int(s.sound.sum())
    poses = odom[ids]
    if not options.enabled or n_sound < options.min_steps:
        chain = OdometryChain.from_steps(ids, poses, prior.step_covariance(s.length, s.turn))
        note = () if not options.enabled else (
            f"odometry not calibrated: {n_sound} of {len(s.length)} keyframe steps registered soundly "
            f"(at least {options.min_steps} needed); the odometry model is the log's or the default",)
        return OdometryCalibration(chain=chain, systematic=SystematicErrors(), noise=prior, measured=False,
                                   steps=len(s.length), steps_sound=n_sound, slips=np.zeros(0, np.int64),
                                   notes=note)
    # The prior's noise only weights the first fit; the fitted noise weights
    # the second (and gives the rates' standard errors).
    noise = prior
    for _ in range(2):
        sys = _systematic(s, noise, options)
        steps = correct_steps(s.odo, s.length, sys)
        noise = _fit_noise(s, steps, prior, options)
    cov = noise.step_covariance(s.length, s.turn)
    # Slips: residuals far outside the fitted model.
    idx = np.flatnonzero(s.sound)
    r = se2.between(s.meas[idx], steps[idx])
    tot = cov[idx] + s.meas_cov[idx]
    z2 = np.einsum("ki,kij,kj->k", r, np.linalg.inv(tot), r)
    out_of_model = z2 > options.slip_sigmas ** 2
    slip = idx[out_of_model]
    # The step keeps its odometry but its covariance grows to cover the
    # jump: a registration can be wrong too (a person walking through, a
    # featureless stretch), and replacing the odometry by a wrong step would
    # bend the chain, where a wide step only lets the closures decide.
    jump = r[out_of_model]
    cov[slip] += np.einsum("ki,kj->kij", jump, jump)
    out = np.empty_like(poses)
    out[0] = poses[0]
    for k in range(len(steps)):
        out[k + 1] = se2.compose(out[k], steps[k])
    chain = OdometryChain.from_steps(ids, out, cov)
    notes = [f"odometry calibrated on {n_sound} of {len(s.length)} keyframe steps: heading drift "
             f"{np.degrees(sys.heading_per_m) * 100:.2f} +/- {np.degrees(sys.heading_per_m_std) * 100:.2f} "
             f"deg per 100 m, turn scale {100 * sys.turn_scale:+.2f}%, distance scale {100 * sys.distance_scale:+.2f}%"
             f"; noise {noise.translation_m_per_sqrt_m:.4f} m/sqrt(m), {noise.heading_rad_per_sqrt_m:.5f} "
             f"rad/sqrt(m), {noise.heading_rad_per_sqrt_rad:.4f} rad/sqrt(rad)"]
    if sys.not_significant:
        names = {"heading_per_m": "heading drift", "turn_scale": "turn scale", "distance_scale": "distance scale"}
        notes.append(f"not removed, because the scans could not tell it from zero (under "
                     f"{options.min_significance:g} standard errors): "
                     f"{', '.join(names[n] for n in sys.not_significant)}")
    if len(slip):
        notes.append(f"{len(slip)} odometry step(s) far outside the fitted model (slips, or moving objects in "
                     f"the scans); their uncertainty was widened to cover it")
    return OdometryCalibration(chain=chain, systematic=sys, noise=noise, measured=True, steps=len(s.length),
                               steps_sound=n_sound, slips=slip.astype(np.int64), notes=tuple(notes),
                               unchecked=np.flatnonzero(~s.sound).astype(np.int64))
