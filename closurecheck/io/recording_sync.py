"""Pairing laser scans with odometry by time stamp (the numpy half of reading recordings).

Recordings carry scans and odometry as two independent message streams at
their own rates.  A scan log needs one odometry pose per scan, so the
odometry is interpolated at each scan's stamp: linearly in x and y, and along
the shorter arc in heading.  Scans the odometry does not cover (before its
first message, after its last, or inside a gap longer than a threshold) are
dropped rather than extrapolated.

Everything here works on plain arrays; :mod:`closurecheck.io.recordings` does the
file reading.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import se2


@dataclass(frozen=True)
class Pairing:
    """Which scans were kept and the odometry pose of each kept scan.

    Attributes
    ----------
    keep : (K,) int, indices into the (time-sorted) scan stamps that were kept.
    odom : (K, 3) float64, odometry poses ``[x, y, theta]`` (metres, radians,
        theta in (-pi, pi]) at the kept scans' stamps, in the odometry frame.
    before, after : number of scans stamped before the first / after the last
        odometry message.
    in_gaps : number of scans inside an odometry gap longer than the limit.
    largest_gap_s : the longest interval between consecutive odometry stamps
        that a kept scan was interpolated across (seconds).
    """

    keep: np.ndarray
    odom: np.ndarray
    before: int
    after: int
    in_gaps: int
    largest_gap_s: float


def yaw_from_quaternion(x, y, z, w) -> np.ndarray:
    """Heading (radians, (-pi, pi]) of quaternions ``(x, y, z, w)``, vectorised.

    The rotation about the vertical axis of the ZYX (yaw-pitch-roll) Euler
    decomposition.  This form of atan2 is invariant to the quaternion's scale,
    so slightly unnormalised quaternions (common after float32 round trips)
    give the right heading.
    """
    x, y, z, w = (np.asarray(v, dtype=np.float64) for v in (x, y, z, w))
    with np.errstate(over="ignore", invalid="ignore"):  # garbage in gives non-finite out, dropped later
        return se2.wrap(np.arctan2(2.0 * (w * z + x * y), w * w + x * x - y * y - z * z))


def clean_odometry(stamps_ns, poses) -> tuple[np.ndarray, np.ndarray, int, int]:
    """Sort odometry by stamp and drop unusable samples.

    Parameters
    ----------
    stamps_ns : (M,) int64 nanoseconds.
    poses : (M, 3) float64 ``[x, y, theta]``.

    Returns ``(stamps_ns, poses, non_finite, repeated)``: the sorted, usable
    samples and how many were dropped for a non-finite pose or for repeating
    an earlier stamp (the first sample with a given stamp is kept, because
    interpolation needs strictly increasing times).
    """
    stamps_ns = np.asarray(stamps_ns, dtype=np.int64)
    poses = np.asarray(poses, dtype=np.float64).reshape(-1, 3)
    finite = np.isfinite(poses).all(axis=1)
    stamps_ns, poses = stamps_ns[finite], poses[finite]
    order = np.argsort(stamps_ns, kind="stable")
    stamps_ns, poses = stamps_ns[order], poses[order]
    first = np.ones(len(stamps_ns), dtype=bool)
    first[1:] = np.diff(stamps_ns) > 0
    return stamps_ns[first], poses[first], int((~finite).sum()), int((~first).sum())


def interpolate_poses(t_odom, poses, t_query) -> np.ndarray:
    """Poses at ``t_query`` by linear interpolation of an odometry track.

    Parameters
    ----------
    t_odom : (M,) float64 seconds, strictly increasing, M >= 1.
    poses : (M, 3) ``[x, y, theta]`` at ``t_odom``.
    t_query : (K,) float64 seconds within ``[t_odom[0], t_odom[-1]]``.

    x and y are interpolated linearly; theta along the shorter arc between
    the two bracketing samples (the track's headings are unwrapped first, so
    crossing +-pi does not swing the long way round).  Returns (K, 3) with
    theta wrapped to (-pi, pi].
    """
    t_odom = np.asarray(t_odom, dtype=np.float64)
    poses = np.asarray(poses, dtype=np.float64).reshape(-1, 3)
    t_query = np.asarray(t_query, dtype=np.float64)
    heading = np.unwrap(poses[:, 2])
    out = np.empty((len(t_query), 3))
    out[:, 0] = np.interp(t_query, t_odom, poses[:, 0])
    out[:, 1] = np.interp(t_query, t_odom, poses[:, 1])
    out[:, 2] = se2.wrap(np.interp(t_query, t_odom, heading))
    return out


def pair_scans(scan_ns, odom_ns, odom_poses, max_gap_s: float) -> Pairing:
    """Give each scan the odometry pose at its stamp, dropping uncovered scans.

    Parameters
    ----------
    scan_ns : (N,) int64 scan stamps in nanoseconds, non-decreasing.
    odom_ns : (M,) int64 odometry stamps in nanoseconds, strictly increasing.
    odom_poses : (M, 3) odometry poses ``[x, y, theta]``.
    max_gap_s : longest odometry interval (seconds) a scan may be
        interpolated across; scans inside longer gaps are dropped.

    Stamps stay integers until they are made relative to the first odometry
    stamp, so float64 keeps nanosecond resolution for hours of recording.
    """
    scan_ns = np.asarray(scan_ns, dtype=np.int64)
    odom_ns = np.asarray(odom_ns, dtype=np.int64)
    origin = odom_ns[0]
    ts = (scan_ns - origin).astype(np.float64) * 1e-9
    to = (odom_ns - origin).astype(np.float64) * 1e-9
    before = scan_ns < odom_ns[0]
    after = scan_ns > odom_ns[-1]
    inside = ~(before | after)

    # Bracketing samples: hi is the first odometry stamp >= the scan stamp, so
    # a scan exactly on an odometry stamp has a zero-length bracket.
    hi = np.clip(np.searchsorted(odom_ns, scan_ns, side="left"), 0, len(odom_ns) - 1)
    lo = np.where(odom_ns[hi] == scan_ns, hi, np.maximum(hi - 1, 0))
    gap = to[hi] - to[lo]
    in_gap = inside & (gap > max_gap_s)
    keep = np.flatnonzero(inside & ~in_gap)
    largest = float(gap[keep].max()) if len(keep) else 0.0
    return Pairing(
        keep=keep,
        odom=interpolate_poses(to, odom_poses, ts[keep]),
        before=int(before.sum()),
        after=int(after.sum()),
        in_gaps=int(in_gap.sum()),
        largest_gap_s=largest,
    )
