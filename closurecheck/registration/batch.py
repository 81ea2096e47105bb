"""Register every candidate pair: scans prepared once, pairs in batches.

A keyframe takes part in many candidate pairs, so each scan's preparation
(points, kd-tree, line normals, coarse likelihood grid) is built once and
reused.  The work is a list of independent batches, which
:mod:`closurecheck.runners` can hand to a process pool or a Dask cluster;
the results do not depend on how the batches are run.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import se2
from .icp import PreparedScan, RegistrationOptions, register_prepared

# Registration needs a few points to fit three parameters; scans with fewer
# valid returns than this are not registered at all (reason "no_points").
MIN_POINTS = 20


@dataclass(frozen=True, eq=False)
class PairFit:
    """One registered pair, as it crosses a process boundary (small to pickle).

    delta : (3,) ``src^-1 ∘ dst`` in the src frame (m, m, rad).
    covariance : (3, 3) its covariance in the src frame.
    The other fields are :class:`closurecheck.registration.icp.Registration`'s
    figures of the same names (``rmse_m`` is its ``rmse``).
    """

    delta: np.ndarray
    covariance: np.ndarray
    converged: bool
    overlap: float
    rmse_m: float
    ambiguity: float
    degenerate: bool
    degeneracy: float
    iterations: int
    fit_score: float


@dataclass(frozen=True, eq=False)
class RegistrationQuality:
    """Quality figures of P registered pairs, (P,) arrays; NaN / False where a pair got no result.

    valid : both scans could be prepared and registration produced a result.
    converged, overlap, rmse_m (m), ambiguity (NaN without a coarse search),
    degenerate, degeneracy, iterations, fit_score : as in
    :class:`closurecheck.registration.icp.Registration`.
    """

    valid: np.ndarray
    converged: np.ndarray
    overlap: np.ndarray
    rmse_m: np.ndarray
    ambiguity: np.ndarray
    degenerate: np.ndarray
    degeneracy: np.ndarray
    iterations: np.ndarray
    fit_score: np.ndarray

    def figures(self) -> dict:
        """Per-pair numbers for the verdict trail (candidates.csv columns, graph.json ``checks``)."""
        return {"overlap": self.overlap, "rmse_m": self.rmse_m, "ambiguity": self.ambiguity,
                "degeneracy": self.degeneracy, "iterations": self.iterations, "fit_score": self.fit_score}


@dataclass(frozen=True, eq=False)
class RegisteredClosures:
    """The registration stage's hand-over: P candidate pairs with their registered deltas.

    src, dst : (P,) int scan ids; the delta is ``src^-1 ∘ dst``.
    delta : (P, 3) in the src frame (m, m, rad), NaN where registration gave none.
    covariance : (P, 3, 3) registration's covariance in the src frame, NaN where none.
    quality : the figures the verification's first checks read.
    """

    src: np.ndarray
    dst: np.ndarray
    delta: np.ndarray
    covariance: np.ndarray
    quality: RegistrationQuality

    def __len__(self) -> int:
        return len(self.src)


def collect(src, dst, fits: list) -> RegisteredClosures:
    """Assemble the per-pair :class:`PairFit` results (None where a scan lacked points) into arrays."""
    p = len(fits)
    delta = np.full((p, 3), np.nan)
    covariance = np.full((p, 3, 3), np.nan)
    q = RegistrationQuality(
        valid=np.zeros(p, bool), converged=np.zeros(p, bool), overlap=np.full(p, np.nan),
        rmse_m=np.full(p, np.nan), ambiguity=np.full(p, np.nan), degenerate=np.zeros(p, bool),
        degeneracy=np.full(p, np.nan), iterations=np.zeros(p, np.int64), fit_score=np.full(p, np.nan))
    for k, r in enumerate(fits):
        if r is None:
            continue
        delta[k] = r.delta
        covariance[k] = r.covariance
        q.valid[k] = True
        for name in ("converged", "overlap", "rmse_m", "ambiguity", "degenerate", "degeneracy", "iterations",
                     "fit_score"):
            getattr(q, name)[k] = getattr(r, name)
    return RegisteredClosures(src=np.asarray(src, dtype=np.int64), dst=np.asarray(dst, dtype=np.int64),
                              delta=delta, covariance=covariance, quality=q)


def seeds_for(guess: np.ndarray, yaw: np.ndarray, window_rad: float) -> np.ndarray:
    """Registration seeds of one pair (radians, metres, src frame).

    The guess, plus the guess turned to each further yaw hypothesis of the
    descriptors that the coarse search around the seeds so far would not
    reach (more than ``window_rad`` away): every seed widens the coarse
    search by its own window (the seeds are searched together, so a seed far
    from the answer is cheap, but not free), and one that lies inside
    another's window adds nothing.
    """
    seeds = [np.asarray(guess, dtype=float)]
    for h in yaw:
        if np.isfinite(h) and all(abs(se2.wrap(h - s[2])) > window_rad for s in seeds):
            seeds.append(np.array([guess[0], guess[1], h]))
    return np.asarray(seeds, dtype=float)


def register_batch(prepared: dict, src, dst, seeds: list, options: RegistrationOptions) -> list:
    """Register pairs ``(src[k], dst[k])``: target = src scan, source = dst scan.

    Returns one :class:`PairFit` per pair (None where a scan lacked points).
    """
    out = []
    for s, d, seed in zip(src, dst, seeds):
        tgt: PreparedScan | None = prepared.get(int(s))
        srcs: PreparedScan | None = prepared.get(int(d))
        if tgt is None or srcs is None:
            out.append(None)
            continue
        r = register_prepared(srcs, tgt, seed, options)
        out.append(PairFit(delta=r.delta, covariance=r.covariance, converged=bool(r.converged),
                           overlap=float(r.overlap), rmse_m=float(r.rmse), ambiguity=float(r.ambiguity),
                           degenerate=bool(r.degenerate), degeneracy=float(r.degeneracy),
                           iterations=int(r.iterations), fit_score=float(r.fit_score)))
    return out
