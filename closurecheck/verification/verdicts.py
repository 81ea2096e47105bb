"""The verdict trail: one row per candidate considered, as arrays.

Reason codes and their meaning: :class:`closurecheck.verification.reasons.Reason`
(docs/verification.md lists them with their checks).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .reasons import Reason, codes


@dataclass(frozen=True, eq=False)
class VerdictTable:
    """Candidates with their verdicts.

    Attributes
    ----------
    src, dst : (C,) int scan ids; the delta is ``src^-1 ∘ dst`` (src frame).
    origin : (C,) str, which proposer found the pair (descriptor,
        proximity, external).
    accepted : (C,) bool.
    reason : (C,) str, a :class:`~closurecheck.verification.reasons.Reason` code each
        (checked when the table is built: an unknown code is an error).
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

    def __post_init__(self):
        codes(np.unique(self.reason.astype(str)))

    def __len__(self) -> int:
        return len(self.src)

    def counts(self) -> dict:
        """Number of candidates per reason code, in the order of :class:`Reason`."""
        vals, n = np.unique(self.reason.astype(str), return_counts=True)
        found = dict(zip(vals.tolist(), n.tolist()))
        return {r.value: found[r.value] for r in Reason if r.value in found}

    def checks(self, k: int) -> dict:
        """The figures of candidate k as a plain dict (graph.json ``checks``)."""
        out = {"origin": str(self.origin[k])}
        for name, arr in self.figures.items():
            v = arr[k]
            out[name] = v.item() if hasattr(v, "item") else v
        return out
