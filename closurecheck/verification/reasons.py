"""Reason codes: which check decided a candidate, what it means, and where the report groups it.

The codes are the ``reason`` column of candidates.csv and the keys of
summary.json's ``reasons`` (docs/formats.md, "Candidate pairs"; docs/verification.md
lists the checks).  Every code is a member of :class:`Reason`; an unknown
code is an error, never a row that silently vanishes from a count.

Examples
--------
>>> from closurecheck.verification.reasons import Reason
>>> Reason("odometry_gate").group
'odometry'
>>> str(Reason.LOW_OVERLAP), Reason.LOW_OVERLAP.text
('low_overlap', 'too few points found a partner after alignment')
"""

from __future__ import annotations

from enum import Enum

# Report groups of rejections, in the order the report lists them.
GROUPS = ("registration", "odometry", "consistency", "reviewer")


class Reason(str, Enum):
    """The check that decided a candidate (``accepted`` when it passed them all)."""

    ACCEPTED = "accepted"
    NO_POINTS = "no_points"
    NOT_CONVERGED = "not_converged"
    LOW_OVERLAP = "low_overlap"
    HIGH_RMSE = "high_rmse"
    AMBIGUOUS = "ambiguous"
    DEGENERATE = "degenerate"
    ODOMETRY_GATE = "odometry_gate"
    UNCHECKED_ODOMETRY = "unchecked_odometry"
    PAIR_INCONSISTENT = "pair_inconsistent"
    GRAPH_RESIDUAL = "graph_residual"
    RIVAL_GROUP = "rival_group"
    UNSUPPORTED_GROUP = "unsupported_group"
    SCAN_CONTRADICTION = "scan_contradiction"
    DUPLICATE = "duplicate"
    REVIEWER_ACCEPTED = "reviewer_accepted"
    REVIEWER_REJECTED = "reviewer_rejected"

    def __str__(self) -> str:
        return self.value

    @property
    def text(self) -> str:
        """One line for people: what the code means."""
        return _TEXT[self][0]

    @property
    def group(self) -> str:
        """``accepted`` or the report group of the rejection (one of :data:`GROUPS`)."""
        return _TEXT[self][1]


_TEXT = {
    Reason.ACCEPTED: ("passed every check; an edge of graph.json", "accepted"),
    Reason.NO_POINTS: ("a scan had too few valid returns or no straight structure to register", "registration"),
    Reason.NOT_CONVERGED: ("registration did not settle on an alignment", "registration"),
    Reason.LOW_OVERLAP: ("too few points found a partner after alignment", "registration"),
    Reason.HIGH_RMSE: ("the aligned scans stay too far apart", "registration"),
    Reason.AMBIGUOUS: ("a distinct second alignment fits almost as well (look-alike place)", "registration"),
    Reason.DEGENERATE: ("the geometry leaves a direction unobservable (e.g. a bare corridor)", "registration"),
    Reason.ODOMETRY_GATE: ("the registered motion is implausible given the odometry", "odometry"),
    Reason.UNCHECKED_ODOMETRY: ("the registered motion disagrees with the odometry, but the odometry between the "
                                "two scans runs through steps their scans could not check, where a slip would "
                                "explain it: the checks cannot decide", "odometry"),
    Reason.PAIR_INCONSISTENT: ("does not close consistent cycles with the other closures", "consistency"),
    Reason.GRAPH_RESIDUAL: ("failed the chi-square residual test after optimisation", "consistency"),
    Reason.RIVAL_GROUP: ("one of two consistent groups of closures that contradict each other, neither clearly "
                         "larger (repeating structure); both were rejected", "consistency"),
    Reason.UNSUPPORTED_GROUP: ("one of the largest consistent group of closures, set aside because the odometry "
                               "does not support it as a whole; a smaller group the odometry supports was kept",
                               "consistency"),
    Reason.SCAN_CONTRADICTION: ("its revisit made the scans of two visits contradict each other (a wall inside "
                                "the other's free space)", "consistency"),
    Reason.DUPLICATE: ("the same pair was already considered", "consistency"),
    Reason.REVIEWER_ACCEPTED: ("accepted by a reviewer's decision (--decisions), whatever the checks said; "
                               "an edge of graph.json", "accepted"),
    Reason.REVIEWER_REJECTED: ("rejected by a reviewer's decision (--decisions), whatever the checks said",
                               "reviewer"),
}


def is_accepted(code) -> bool:
    """Whether a reason code means the pair is an edge of graph.json (``accepted`` or ``reviewer_accepted``).

    Examples
    --------
    >>> from closurecheck.verification.reasons import is_accepted
    >>> is_accepted("reviewer_accepted"), is_accepted("odometry_gate")
    (True, False)
    """
    return Reason(str(code)).group == "accepted"


def codes(values) -> list[Reason]:
    """The :class:`Reason` of each code in ``values``; raises ValueError naming an unknown code."""
    out = []
    for v in values:
        try:
            out.append(Reason(str(v)))
        except ValueError:
            raise ValueError(f"unknown reason code {str(v)!r}") from None
    return out
