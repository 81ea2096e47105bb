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
    frontend_score : (C,) float, the pairs file's ``score`` (the front-end's
        confidence, NaN for pairs it did not give), or None when it had none.
    verifier_reason : (C,) str, the reason the checks alone give each pair
        (without the reviewer's decisions), or None when there were none.
    review_note : (C,) str, the reviewer's note on each pair it decided
        ("" elsewhere), or None when there were no decisions.
    """

    src: np.ndarray
    dst: np.ndarray
    origin: np.ndarray
    accepted: np.ndarray
    reason: np.ndarray
    delta: np.ndarray
    covariance: np.ndarray
    figures: dict = field(default_factory=dict)
    frontend_score: np.ndarray | None = None
    verifier_reason: np.ndarray | None = None
    review_note: np.ndarray | None = None

    def __post_init__(self):
        codes(np.unique(self.reason.astype(str)))
        if self.verifier_reason is not None:
            codes(np.unique(self.verifier_reason.astype(str)))

    def optional_columns(self) -> dict:
        """The columns of candidates.csv that only some runs have, by name (docs/formats.md, "Candidate pairs"):
        ``score`` with a scored pairs file, ``verifier_reason`` and ``review_note`` with reviewer decisions."""
        out = {}
        if self.frontend_score is not None:
            out["score"] = self.frontend_score
        if self.verifier_reason is not None:
            out["verifier_reason"] = self.verifier_reason
        if self.review_note is not None:
            out["review_note"] = self.review_note
        return out

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
        for name, arr in {**self.optional_columns(), **self.figures}.items():
            v = arr[k]
            out[name] = v.item() if hasattr(v, "item") else v
        return out
