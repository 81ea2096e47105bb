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
class PairResults:
    """Registration figures for P pairs, as arrays (NaN where none).

    delta : (P, 3) ``src^-1 ∘ dst`` in the src frame; covariance : (P, 3, 3).
    valid : both scans had enough points and registration produced a result.
    """

    delta: np.ndarray
    covariance: np.ndarray
    valid: np.ndarray
    converged: np.ndarray
    overlap: np.ndarray
    rmse_m: np.ndarray
    ambiguity: np.ndarray
    degenerate: np.ndarray
    degeneracy: np.ndarray
    iterations: np.ndarray
    fit_score: np.ndarray

    def quality(self) -> dict:
        """The arrays :func:`closurecheck.verification.verify.verify` reads."""
        return {"valid": self.valid, "converged": self.converged, "overlap": self.overlap,
                "rmse_m": self.rmse_m, "ambiguity": self.ambiguity, "degenerate": self.degenerate}

    def figures(self) -> dict:
        """Per-pair numbers for the verdict trail."""
        return {"overlap": self.overlap, "rmse_m": self.rmse_m, "ambiguity": self.ambiguity,
                "degeneracy": self.degeneracy, "iterations": self.iterations, "fit_score": self.fit_score}


_FLOAT_FIELDS = ("overlap", "rmse_m", "ambiguity", "degeneracy", "fit_score")


def empty_results(p: int) -> PairResults:
    return PairResults(
        delta=np.full((p, 3), np.nan), covariance=np.full((p, 3, 3), np.nan),
        valid=np.zeros(p, bool), converged=np.zeros(p, bool), overlap=np.full(p, np.nan),
        rmse_m=np.full(p, np.nan), ambiguity=np.full(p, np.nan), degenerate=np.zeros(p, bool),
        degeneracy=np.full(p, np.nan), iterations=np.zeros(p, np.int64), fit_score=np.full(p, np.nan))


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

    Returns a list of per-pair tuples (or None where a scan lacked points);
    plain tuples keep what crosses process boundaries small.
    """
    out = []
    for s, d, seed in zip(src, dst, seeds):
        tgt: PreparedScan | None = prepared.get(int(s))
        srcs: PreparedScan | None = prepared.get(int(d))
        if tgt is None or srcs is None:
            out.append(None)
            continue
        r = register_prepared(srcs, tgt, seed, options)
        out.append((r.delta, r.covariance, bool(r.converged), float(r.overlap), float(r.rmse),
                    float(r.ambiguity), bool(r.degenerate), float(r.degeneracy), int(r.iterations),
                    float(r.fit_score)))
    return out


def collect(results: list) -> PairResults:
    """Assemble per-pair tuples from :func:`register_batch` into arrays."""
    p = len(results)
    res = empty_results(p)
    for k, r in enumerate(results):
        if r is None:
            continue
        delta, cov, conv, overlap, rmse, amb, degen, degeneracy, its, fit = r
        res.delta[k] = delta
        res.covariance[k] = cov
        res.valid[k] = True
        res.converged[k] = conv
        res.overlap[k] = overlap
        res.rmse_m[k] = rmse
        res.ambiguity[k] = amb
        res.degenerate[k] = degen
        res.degeneracy[k] = degeneracy
        res.iterations[k] = its
        res.fit_score[k] = fit
    return res
