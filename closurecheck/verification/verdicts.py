"""The verdict trail: one row per candidate considered, as arrays.

Reason codes (docs/verification.md lists them with their checks):

========================  ====================================================
``accepted``              passed every check and stayed in the final graph
``no_points``             a scan had too few valid returns to register
``not_converged``         ICP did not converge
``low_overlap``           too few source points found a partner in the target
``high_rmse``             the aligned scans stay too far apart
``ambiguous``             a second, distinct alignment fits almost as well
``degenerate``            the geometry leaves a direction unobservable
``odometry_gate``         the registered delta is implausible under odometry
``pair_inconsistent``     outside the largest pairwise-consistent set (PCM)
``graph_residual``        failed the chi-square test after optimisation
``duplicate``             the same pair was already accepted
========================  ====================================================
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

REASONS = (
    "accepted", "no_points", "not_converged", "low_overlap", "high_rmse", "ambiguous", "degenerate",
    "odometry_gate", "pair_inconsistent", "graph_residual", "duplicate",
)


@dataclass(frozen=True, eq=False)
class VerdictTable:
    """Candidates with their verdicts.

    Attributes
    ----------
    src, dst : (C,) int scan ids; the delta is ``src^-1 ∘ dst`` (src frame).
    origin : (C,) str, which proposer found the pair (descriptor,
        proximity, external).
    accepted : (C,) bool.
    reason : (C,) str, one of :data:`REASONS`.
    delta : (C, 3) registered delta, NaN when registration gave none.
    covariance : (C, 3, 3) its covariance in the src frame, NaN when none.
    figures : per-candidate numbers behind the verdict, name -> (C,) array.
    """

    src: np.ndarray
    dst: np.ndarray
    origin: np.ndarray
    accepted: np.ndarray
    reason: np.ndarray
    delta: np.ndarray
    covariance: np.ndarray
    figures: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.src)

    def counts(self) -> dict:
        """Number of candidates per reason code, in the order of REASONS."""
        vals, n = np.unique(self.reason.astype(str), return_counts=True)
        found = dict(zip(vals.tolist(), n.tolist()))
        return {r: found[r] for r in REASONS if r in found}

    def checks(self, k: int) -> dict:
        """The figures of candidate k as a plain dict (graph.json ``checks``)."""
        out = {"origin": str(self.origin[k])}
        for name, arr in self.figures.items():
            v = arr[k]
            out[name] = v.item() if hasattr(v, "item") else v
        return out
