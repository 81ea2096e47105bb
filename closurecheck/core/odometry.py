"""Odometry noise model and the uncertainty of odometry between keyframes.

The model is a random walk: the error of an odometry step grows with the
distance driven and the angle turned, independently from step to step.

* positional standard deviation ``a * sqrt(distance)`` on each of x and y,
* heading standard deviation ``sqrt(b^2 * distance + c^2 * |rotation|)``,

with ``a = translation_m_per_sqrt_m``, ``b = heading_rad_per_sqrt_m`` and
``c = heading_rad_per_sqrt_rad``.  "distance" is the odometry path length of
the step and "|rotation|" its accumulated absolute heading change (see
:func:`closurecheck.frontend.keyframes.odometry_travel`), so a step that wiggles costs
more than its net motion suggests.

A scan log may carry the model in its header (contract section 1 allows
tool-defined optional keys)::

    "odometry_noise": {"translation_m_per_sqrt_m": 0.03,
                       "heading_rad_per_sqrt_m": 0.01,
                       "heading_rad_per_sqrt_rad": 0.03}

Missing keys (or a missing ``odometry_noise``) take the defaults of
:class:`OdometryNoise`.

Heading error is what makes drift grow faster than sqrt(distance) along a
chain: it swings every later position sideways.  :class:`OdometryChain`
captures that exactly to first order through :func:`closurecheck.core.se2.chain_prefix`,
giving the relative pose and covariance between any two keyframes in O(1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from ..errors import InputError, show
from ..frontend.keyframes import odometry_travel
from . import se2

HEADER_KEY = "odometry_noise"
_MODEL_KEYS = ("translation_m_per_sqrt_m", "heading_rad_per_sqrt_m", "heading_rad_per_sqrt_rad")


@dataclass(frozen=True)
class OdometryNoise:
    """Random-walk odometry noise model (see the module docstring).

    Defaults describe wheel odometry of an indoor robot on a hard floor:
    about 3 cm of positional error per sqrt(metre), 0.01 rad (0.6 degree)
    of heading error per sqrt(metre) and 0.03 rad per sqrt(radian) turned
    (common practice for differential-drive robots; no published source).

    ``min_translation_std_m`` and ``min_heading_std_rad`` floor the standard
    deviations of a step, so a step with no motion (possible when an
    external pair inserts a keyframe next to another) still has an
    invertible covariance.
    """

    translation_m_per_sqrt_m: float = 0.03
    heading_rad_per_sqrt_m: float = 0.01
    heading_rad_per_sqrt_rad: float = 0.03
    min_translation_std_m: float = 1e-3
    min_heading_std_rad: float = 1e-4

    def __post_init__(self):
        for f in fields(self):
            v = getattr(self, f.name)
            if not _finite_number(v) or v < 0:
                raise InputError(f"odometry noise {f.name} must be a finite number >= 0, got {show(v)}")

    def to_header(self) -> dict:
        """The model as the ``odometry_noise`` header object."""
        return {k: float(getattr(self, k)) for k in _MODEL_KEYS}

    def at_least(self, other: "OdometryNoise") -> "OdometryNoise":
        """Model with each coefficient the larger of this one's and ``other``'s."""
        return OdometryNoise(*(max(getattr(self, f.name), getattr(other, f.name)) for f in fields(self)))

    def step_covariance(self, distance_m, rotation_rad) -> np.ndarray:
        """Covariance (..., 3, 3) of steps with the given path length and turn.

        Expressed in each step's start frame on ``[x, y, theta]``.  The
        position noise is isotropic and uncorrelated with the heading noise
        within one step; correlation builds up along a chain.
        """
        d = np.abs(np.asarray(distance_m, dtype=float))
        r = np.abs(np.asarray(rotation_rad, dtype=float))
        var_xy = np.maximum(self.translation_m_per_sqrt_m ** 2 * d, self.min_translation_std_m ** 2)
        var_t = np.maximum(self.heading_rad_per_sqrt_m ** 2 * d + self.heading_rad_per_sqrt_rad ** 2 * r,
                           self.min_heading_std_rad ** 2)
        cov = np.zeros(d.shape + (3, 3))
        cov[..., 0, 0] = var_xy
        cov[..., 1, 1] = var_xy
        cov[..., 2, 2] = var_t
        return cov


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _finite_number(v) -> bool:
    """A number (not a boolean) that is finite as a float64; a 400-digit integer is not."""
    if not _is_number(v):
        return False
    try:
        return math.isfinite(v)
    except OverflowError:
        return False


def noise_from_header(header: dict | None, path=None) -> OdometryNoise:
    """Read the optional ``odometry_noise`` key of a scan-log header.

    ``header`` is :attr:`closurecheck.io.scanlog.ScanLog.header` (the optional
    keys).  Absent key or absent fields take the defaults.  A malformed
    value raises :class:`InputError` naming ``path`` and line 1.
    """
    raw = (header or {}).get(HEADER_KEY)
    if raw is None:
        return OdometryNoise()
    if not isinstance(raw, dict):
        raise InputError(f'header: "{HEADER_KEY}" must be an object with keys {", ".join(_MODEL_KEYS)}', path, 1)
    unknown = sorted(set(raw) - set(_MODEL_KEYS))
    if unknown:
        raise InputError(f'header: unknown key "{unknown[0]}" in "{HEADER_KEY}" '
                         f'(expected {", ".join(_MODEL_KEYS)})', path, 1)
    for key, value in raw.items():
        if not _finite_number(value) or value < 0:
            raise InputError(f'header: "{HEADER_KEY}" "{key}" must be a finite number >= 0, got {show(value)}',
                             path, 1)
    return OdometryNoise(**{k: float(v) for k, v in raw.items()})


def keyframe_step_covariances(noise: OdometryNoise, odom, keyframes) -> np.ndarray:
    """Covariance of each keyframe-to-keyframe odometry step.

    Parameters
    ----------
    noise : the noise model.
    odom : (N, 3) odometry poses of every scan of the log; the path length
        and turn of a step are accumulated over all scans between the two
        keyframes, not only their end points.
    keyframes : (K,) increasing scan ids.

    Returns
    -------
    (K - 1, 3, 3) array: entry k is the covariance of
    ``odom[keyframes[k]]^-1 ∘ odom[keyframes[k + 1]]`` in the frame of
    keyframe k, on ``[x, y, theta]``.
    """
    keyframes = np.asarray(keyframes, dtype=np.int64)
    travel, rotation = odometry_travel(odom)
    return noise.step_covariance(np.diff(travel[keyframes]), np.diff(rotation[keyframes]))


def _inverse_jacobian(delta) -> np.ndarray:
    """Parameter Jacobian (..., 3, 3) of ``se2.inverse`` at ``delta``."""
    x, y, t = delta[..., 0], delta[..., 1], delta[..., 2]
    c, s = np.cos(t), np.sin(t)
    j = np.zeros(delta.shape[:-1] + (3, 3))
    j[..., 0, 0] = -c
    j[..., 0, 1] = -s
    j[..., 0, 2] = s * x - c * y
    j[..., 1, 0] = s
    j[..., 1, 1] = -c
    j[..., 1, 2] = c * x + s * y
    j[..., 2, 2] = -1.0
    return j


@dataclass(frozen=True, eq=False)
class OdometryChain:
    """Odometry of the keyframes with the prefix sums of its uncertainty.

    Attributes
    ----------
    ids : (K,) increasing keyframe scan ids.
    poses : (K, 3) odometry poses of the keyframes (odometry frame).
    prefix : (K, 3, 3) :func:`closurecheck.core.se2.chain_prefix` of the chain.
    """

    ids: np.ndarray
    poses: np.ndarray
    prefix: np.ndarray

    @classmethod
    def build(cls, odom, keyframes, noise: OdometryNoise = OdometryNoise()) -> "OdometryChain":
        """Chain over ``keyframes`` (scan ids) of a log with odometry ``odom`` (N, 3)."""
        keyframes = np.asarray(keyframes, dtype=np.int64)
        odom = np.asarray(odom, dtype=float)
        poses = odom[keyframes]
        steps = keyframe_step_covariances(noise, odom, keyframes)
        return cls(keyframes, poses, se2.chain_prefix(poses, steps))

    def __len__(self) -> int:
        return len(self.ids)

    def index_of(self, scan_ids) -> np.ndarray:
        """Positions of scan ids in :attr:`ids`; raises ValueError for non-keyframes."""
        scan_ids = np.asarray(scan_ids, dtype=np.int64)
        pos = np.searchsorted(self.ids, scan_ids)
        ok = (pos < len(self.ids)) & (self.ids[np.minimum(pos, len(self.ids) - 1)] == scan_ids)
        if not np.all(ok):
            bad = np.asarray(scan_ids)[~ok].reshape(-1)[0]
            raise ValueError(f"scan {bad} is not a keyframe of this chain")
        return pos

    def forward(self, lo, hi) -> tuple[np.ndarray, np.ndarray]:
        """Delta ``x_lo^-1 ∘ x_hi`` and covariance for positions ``lo <= hi`` (1-D arrays).

        The same quantity as :func:`closurecheck.core.se2.chain_relative`, written
        out element by element: the covariance is ``M (S[hi] - S[lo]) M^T``
        with ``M = blockdiag(R(dtheta), 1) Ad(x_hi^-1)``, which simplifies to
        ``[[R(theta_lo)^T, w], [0, 0, 1]]`` with ``w = R(dtheta) (y', -x')``
        and ``(x', y')`` the position of ``x_hi^-1``.  Written this way it
        avoids stacks of 3x3 matrix products, about 3x faster on 10^6 pairs,
        which is what the proximity gate evaluates.
        """
        lo = np.asarray(lo, dtype=np.int64).reshape(-1)
        hi = np.asarray(hi, dtype=np.int64).reshape(-1)
        p = self.poses
        xi, yi, ti = p[lo, 0], p[lo, 1], p[lo, 2]
        xj, yj, tj = p[hi, 0], p[hi, 1], p[hi, 2]
        ci, si = np.cos(ti), np.sin(ti)
        cj, sj = np.cos(tj), np.sin(tj)
        dx, dy = xj - xi, yj - yi
        dt = tj - ti
        delta = np.stack([ci * dx + si * dy, -si * dx + ci * dy, se2.wrap(dt)], axis=-1)
        px, py = -cj * xj - sj * yj, sj * xj - cj * yj
        cd, sd = np.cos(dt), np.sin(dt)
        w0, w1 = cd * py + sd * px, sd * py - cd * px
        s = self.prefix[hi] - self.prefix[lo]
        a, b, c, d, e, f = s[:, 0, 0], s[:, 0, 1], s[:, 0, 2], s[:, 1, 1], s[:, 1, 2], s[:, 2, 2]
        # Rows of M: r0 = (ci, si, w0), r1 = (-si, ci, w1), r2 = (0, 0, 1).
        s_r0 = (a * ci + b * si + c * w0, b * ci + d * si + e * w0, c * ci + e * si + f * w0)
        s_r1 = (-a * si + b * ci + c * w1, -b * si + d * ci + e * w1, -c * si + e * ci + f * w1)
        cov = np.empty(s.shape)
        cov[:, 0, 0] = ci * s_r0[0] + si * s_r0[1] + w0 * s_r0[2]
        cov[:, 0, 1] = cov[:, 1, 0] = -si * s_r0[0] + ci * s_r0[1] + w1 * s_r0[2]
        cov[:, 1, 1] = -si * s_r1[0] + ci * s_r1[1] + w1 * s_r1[2]
        cov[:, 0, 2] = cov[:, 2, 0] = s_r0[2]
        cov[:, 1, 2] = cov[:, 2, 1] = s_r1[2]
        cov[:, 2, 2] = f
        return delta, cov

    def relative_by_index(self, a, b) -> tuple[np.ndarray, np.ndarray]:
        """Odometry delta ``x_a^-1 ∘ x_b`` and covariance for keyframe positions a, b.

        ``a`` and ``b`` are integer arrays of positions in the chain, in any
        order.  Returns (deltas (..., 3), covariances (..., 3, 3)), both in
        the frame of a (the ``from`` node).
        """
        a = np.asarray(a, dtype=np.int64)
        b = np.asarray(b, dtype=np.int64)
        shape = np.broadcast(a, b).shape
        a, b = np.broadcast_to(a, shape).reshape(-1), np.broadcast_to(b, shape).reshape(-1)
        delta, cov = self.forward(np.minimum(a, b), np.maximum(a, b))
        flip = a > b
        if np.any(flip):
            # Going backwards along the chain is the inverse relative pose;
            # its covariance follows by the inverse's Jacobian.
            j = _inverse_jacobian(delta)
            inv_cov = j @ cov @ np.swapaxes(j, -1, -2)
            delta = np.where(flip[..., None], se2.inverse(delta), delta)
            cov = np.where(flip[..., None, None], 0.5 * (inv_cov + np.swapaxes(inv_cov, -1, -2)), cov)
        return delta.reshape(shape + (3,)), cov.reshape(shape + (3, 3))

    def relative(self, from_ids, to_ids) -> tuple[np.ndarray, np.ndarray]:
        """Odometry-predicted delta ``from^-1 ∘ to`` and its covariance, by scan id.

        Both ids must be keyframes of the chain.  Covariance is first order,
        in the frame of the ``from`` node, ordered (x, y, theta).
        """
        return self.relative_by_index(self.index_of(from_ids), self.index_of(to_ids))
