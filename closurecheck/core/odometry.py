"""Odometry noise model and the uncertainty of odometry between keyframes.

The model is a random walk: the error of an odometry step grows with the
distance driven and the angle turned, independently from step to step.

* positional standard deviation ``a * sqrt(distance)`` on each of x and y,
* heading standard deviation ``sqrt(b^2 * distance + c^2 * |rotation|)``,

with ``a = translation_m_per_sqrt_m``, ``b = heading_rad_per_sqrt_m`` and
``c = heading_rad_per_sqrt_rad``.  "distance" is the odometry path length of
the step and "|rotation|" its accumulated absolute heading change (see
:func:`odometry_travel`), so a step that wiggles costs
more than its net motion suggests.

A scan log may carry the model in its header (docs/formats.md, "Scan log", allows
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

from ..errors import InputError, shorten
from . import se2
from .options import options, setting

HEADER_KEY = "odometry_noise"
_MODEL_KEYS = ("translation_m_per_sqrt_m", "heading_rad_per_sqrt_m", "heading_rad_per_sqrt_rad")


@options
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

    translation_m_per_sqrt_m: float = setting(0.03, at_least=0.0)
    heading_rad_per_sqrt_m: float = setting(0.01, at_least=0.0)
    heading_rad_per_sqrt_rad: float = setting(0.03, at_least=0.0)
    min_translation_std_m: float = setting(1e-3, at_least=0.0)
    min_heading_std_rad: float = setting(1e-4, at_least=0.0)

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
            raise InputError(f'header: "{HEADER_KEY}" "{key}" must be a finite number >= 0, got {shorten(value)}',
                             path, 1)
    return OdometryNoise(**{k: float(v) for k, v in raw.items()})


def odometry_travel(odom) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative odometry path length and accumulated absolute rotation.

    Parameters
    ----------
    odom : (N, 3) odometry poses ``[x, y, theta]`` in the odometry frame.

    Returns
    -------
    travel_m : (N,) path length in metres from scan 0 to each scan.
    rotation_rad : (N,) sum of absolute wrapped heading steps (radians)
        from scan 0 to each scan.
    """
    odom = np.asarray(odom, dtype=float).reshape(-1, 3)
    travel = np.zeros(len(odom))
    rotation = np.zeros(len(odom))
    if len(odom) > 1:
        step = np.hypot(np.diff(odom[:, 0]), np.diff(odom[:, 1]))
        turn = np.abs(se2.wrap(np.diff(odom[:, 2])))
        travel[1:] = np.cumsum(step)
        rotation[1:] = np.cumsum(turn)
    return travel, rotation


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


@dataclass(frozen=True, eq=False)
class OdometryChain:
    """The keyframes' odometry with its noise model: the one odometry record every stage uses.

    Attributes
    ----------
    ids : (K,) increasing keyframe scan ids.
    poses : (K, 3) odometry poses of the keyframes (odometry frame).
    steps : (K - 1, 3, 3) covariance of each keyframe-to-keyframe step, in
        the step's start frame on ``[x, y, theta]``
        (:func:`keyframe_step_covariances`).
    prefix : (K, 3, 3) :func:`closurecheck.core.se2.chain_prefix` of the
        chain: any sub-chain's covariance in O(1).

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.core.odometry import OdometryChain, OdometryNoise
    >>> odom = np.column_stack([np.arange(5.0), np.zeros(5), np.zeros(5)])  # 1 m steps along x
    >>> chain = OdometryChain.build(odom, [0, 2, 4], OdometryNoise(translation_m_per_sqrt_m=0.1))
    >>> delta, cov = chain.relative([0], [4])
    >>> delta.round(6).tolist(), round(float(cov[0, 0, 0]), 6)
    ([[4.0, 0.0, 0.0]], 0.04)
    """

    ids: np.ndarray
    poses: np.ndarray
    steps: np.ndarray
    prefix: np.ndarray

    @classmethod
    def build(cls, odom, keyframes, noise: OdometryNoise = OdometryNoise()) -> "OdometryChain":
        """Chain over ``keyframes`` (scan ids) of a log with odometry ``odom`` (N, 3)."""
        keyframes = np.asarray(keyframes, dtype=np.int64)
        odom = np.asarray(odom, dtype=float)
        return cls.from_steps(keyframes, odom[keyframes], keyframe_step_covariances(noise, odom, keyframes))

    @classmethod
    def from_steps(cls, ids, poses, steps) -> "OdometryChain":
        """Chain of keyframe ``poses`` (K, 3) with step covariances ``steps`` (K - 1, 3, 3)."""
        poses = np.asarray(poses, dtype=float)
        steps = np.asarray(steps, dtype=float)
        return cls(np.asarray(ids, dtype=np.int64), poses, steps, se2.chain_prefix(poses, steps))

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

        :func:`closurecheck.core.se2.chain_relative_unrolled` on this chain.
        """
        return se2.chain_relative_unrolled(self.poses, self.prefix, lo, hi)

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
            j = se2.inverse_jacobian(delta)
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
