"""Trajectory error against ground truth: ATE after rigid alignment and RPE.

* Absolute trajectory error (ATE): RMSE of positions after the rigid motion
  (rotation + translation, no scale) that best aligns the estimate to the
  truth in the least-squares sense (Kabsch/Umeyama solution via an SVD).
* Relative pose error (RPE) over fixed travelled distances: for every start
  pose, the pose that lies ``d`` metres further along the true path; the
  error of the estimated relative motion against the true one, as in the
  odometry evaluation of Geiger, Lenz, Urtasun (CVPR 2012).

All positions in metres, headings in radians.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import se2


@dataclass(frozen=True)
class RigidAlignment:
    """``truth ≈ R @ estimate + t`` (2D)."""

    rotation: np.ndarray  # (2, 2)
    translation: np.ndarray  # (2,)

    @property
    def angle(self) -> float:
        return float(np.arctan2(self.rotation[1, 0], self.rotation[0, 0]))


def align_rigid(estimate_xy, truth_xy) -> RigidAlignment:
    """Least-squares rigid alignment of (N, 2) estimated positions onto truth."""
    p = np.asarray(estimate_xy, dtype=float)
    q = np.asarray(truth_xy, dtype=float)
    pc, qc = p.mean(axis=0), q.mean(axis=0)
    h = (p - pc).T @ (q - qc)
    u, _, vt = np.linalg.svd(h)
    d = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
    r = vt.T @ np.diag([1.0, d]) @ u.T
    return RigidAlignment(r, qc - r @ pc)


def ate_rmse(estimate, truth) -> float:
    """Position RMSE (m) of (N, 3) estimated poses after rigid alignment to truth."""
    estimate = np.asarray(estimate, dtype=float)
    truth = np.asarray(truth, dtype=float)
    ok = np.isfinite(truth).all(axis=1) & np.isfinite(estimate).all(axis=1)
    if ok.sum() < 2:
        return float("nan")
    al = align_rigid(estimate[ok, :2], truth[ok, :2])
    moved = estimate[ok, :2] @ al.rotation.T + al.translation
    return float(np.sqrt(np.mean(np.sum((moved - truth[ok, :2]) ** 2, axis=1))))


@dataclass(frozen=True)
class RelativeError:
    distance_m: float
    pairs: int
    translation_rmse_m: float
    rotation_rmse_rad: float


def rpe(estimate, truth, distances_m=(1.0, 5.0, 10.0, 25.0)) -> list[RelativeError]:
    """Relative pose error over fixed travelled distances along the true path.

    For each start index i, the end index j is the first pose whose true path
    length from i reaches ``d``; the error is ``between(est_i, est_j)``
    against ``between(truth_i, truth_j)``. Distances with no such pair are
    reported with ``pairs = 0`` and NaN errors.
    """
    estimate = np.asarray(estimate, dtype=float)
    truth = np.asarray(truth, dtype=float)
    ok = np.isfinite(truth).all(axis=1)
    estimate, truth = estimate[ok], truth[ok]
    steps = np.hypot(*np.diff(truth[:, :2], axis=0).T) if len(truth) > 1 else np.zeros(0)
    travelled = np.concatenate([[0.0], np.cumsum(steps)])
    out = []
    for d in distances_m:
        # A nanometre of slack keeps float round-off in the cumulative sum
        # from pushing the end one pose too far.
        j = np.searchsorted(travelled, travelled + d - 1e-9, side="left")
        i = np.nonzero(j < len(truth))[0]
        j = j[i]
        if len(i) == 0:
            out.append(RelativeError(float(d), 0, float("nan"), float("nan")))
            continue
        err = se2.between(se2.between(truth[i], truth[j]), se2.between(estimate[i], estimate[j]))
        out.append(RelativeError(float(d), int(len(i)), float(np.sqrt(np.mean(np.sum(err[:, :2] ** 2, 1)))),
                                 float(np.sqrt(np.mean(err[:, 2] ** 2)))))
    return out
