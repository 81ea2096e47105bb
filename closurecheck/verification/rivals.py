"""Rival groups: a consistent set of closures that the chosen one cannot out-vote.

The maximum clique of the pairwise-consistency graph (PCM) is the largest
set of closures that agree with each other, and the usual rule keeps it.
Repeating structure (a grid of identical columns, racks at a fixed pitch)
breaks the premise that wrong closures rarely agree: every closure shifted
by one pitch agrees with every other shifted the same way, so look-alikes
come in consistent families, and under strong odometry drift a family can
be as large as the true set.  Keeping the larger of two such groups is then
a coin toss weighted by how many candidates the front-end happened to
propose.

The rule here: let ``S`` be the consistent set and ``R`` a clique among the
closures outside it (a rival group).  ``D``, the members of ``S`` that
contradict at least one member of ``R``, is what ``R`` disputes.  The world
``(S - D) + R`` is consistent as well, so the evidence for ``S`` over it is
``|D|`` closures against ``|R|`` (``|D| >= |R|`` because ``S`` is a maximum
clique).  ``S`` stands only when ``|D| >= margin * |R|``; otherwise both
``D`` and ``R`` are rejected and the run says so.  Rivals are taken largest
first, each against what is left of ``S``.

The rule is off by default (``verify.rival_margin = 1``), because size is
weak evidence between structured families.  Measured on our warehouse
route with 25 degrees per 100 m of heading drift (seed 0 of
benchmarks/robustness.py): the maximum clique was 400 closures, all right
against the truth, and the largest rival 290 look-alike closures, all
wrong; at a margin of 2 the rule rejected all 400 and the
map fell back to odometry.  On the shipped demo log the largest rival is
133 wrong closures against 407 right ones (ratio 3.1).  A user whose site
is dominated by one repeating pattern, and who prefers no closure to a
coin toss, can turn it on (a margin of 2 is the smallest majority we would
call decisive; a rule of our own, not a published test).

Examples
--------
Five closures: 0-2 agree with each other, 3-4 agree with each other and
with closure 0, but contradict 1 and 2.  The set {0, 1, 2} disputes only
two closures against a rival of two, so both sides of the dispute go:

>>> import numpy as np
>>> from closurecheck.verification.rivals import rival_groups
>>> conflicts = np.zeros((5, 5), dtype=bool)
>>> for i, j in [(1, 3), (1, 4), (2, 3), (2, 4)]:
...     conflicts[i, j] = conflicts[j, i] = True
>>> check = rival_groups(conflicts, np.array([0, 1, 2]), margin=2.0)
>>> [(d.disputed.tolist(), d.rival.tolist()) for d in check.disputes]
[([1, 2], [3, 4])]
>>> check.rejected.tolist()
[1, 2, 3, 4]
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse

from .clique import CliqueOptions, max_clique_of_conflicts

# A single closure is not a group: one stray look-alike against the one
# true closure it contradicts would otherwise take that closure with it.
MIN_RIVAL_SIZE = 2

@dataclass(frozen=True)
class RivalDispute:
    """One rival group and what it disputed.

    disputed: (d,) indices of consistent-set members that contradict the rival.
    rival: (r,) indices of the rival group (a clique outside the consistent set).
    rejected: whether the consistent set failed to out-vote the rival
        (``d < margin * r``), so that both sides were rejected.
    """

    disputed: np.ndarray
    rival: np.ndarray
    rejected: bool


@dataclass(frozen=True)
class RivalCheck:
    """The rival groups found against a consistent set.

    disputes: every rival of at least :data:`MIN_RIVAL_SIZE` closures,
        largest first, with its verdict.
    rejected: sorted indices rejected on both sides of the lost disputes.
    exhausted: True when the search stopped at ``max_rounds`` with rivals left.
    """

    disputes: tuple
    rejected: np.ndarray
    exhausted: bool

    @property
    def lost(self) -> tuple:
        """The disputes the consistent set did not win."""
        return tuple(d for d in self.disputes if d.rejected)

    def relabelled(self, index: np.ndarray) -> RivalCheck:
        """The same check with every index ``i`` replaced by ``index[i]`` (a subset's ids to the full set's)."""
        index = np.asarray(index, dtype=np.intp)
        return RivalCheck(disputes=tuple(RivalDispute(disputed=index[d.disputed], rival=index[d.rival],
                                                      rejected=d.rejected) for d in self.disputes),
                          rejected=index[self.rejected], exhausted=self.exhausted)


NO_RIVALS = RivalCheck(disputes=(), rejected=np.zeros(0, dtype=np.intp), exhausted=False)


def rival_groups(conflicts, members, margin: float, max_rounds: int = 64,
                 clique_options: CliqueOptions = CliqueOptions()) -> RivalCheck:
    """Test a consistent set against the rival groups outside it (module docstring).

    Parameters
    ----------
    conflicts : (K, K) symmetric boolean matrix or scipy.sparse array
        The pairs of K closures that contradict each other
        (``PairConsistency.conflicts``); the diagonal is ignored.
    members : (m,) int array
        The consistent set (a maximum clique of the complement of ``conflicts``).
    margin : float, >= 1
        How many times the size of a rival the disputed part of the set
        must be for the set to stand.
    max_rounds : int
        At most this many rival groups are looked for.
    clique_options : budget of each rival search.

    Returns
    -------
    RivalCheck
    """
    c = scipy.sparse.csr_array(conflicts, dtype=bool)
    k = c.shape[0]
    inside = np.zeros(k, dtype=bool)
    inside[np.asarray(members, dtype=np.intp)] = True
    set_idx = np.flatnonzero(inside)
    others = np.flatnonzero(~inside)
    disputes = []
    rejected = []
    exhausted = False
    if len(set_idx) and len(others) >= MIN_RIVAL_SIZE and margin > 1.0:
        # Sparse: a member of the set and an outsider conflict only where
        # their cycle test failed.
        conflict = c[set_idx][:, others]
        standing = np.ones(len(set_idx), dtype=bool)
        left = np.arange(len(others))
        for round_ in range(max_rounds + 1):
            if len(left) < MIN_RIVAL_SIZE:
                break
            if round_ == max_rounds:
                exhausted = True
                break
            best = max_clique_of_conflicts(c[others[left]][:, others[left]], options=clique_options)
            if best.size < MIN_RIVAL_SIZE:
                break
            rival = left[best.members]
            hits = np.asarray(conflict[:, rival].sum(axis=1)).ravel() > 0
            disputed = np.flatnonzero(hits & standing)
            # A rival that contradicts nothing still standing (what it
            # disputed has already gone) is no contest.
            lost = 0 < len(disputed) < margin * len(rival)
            disputes.append(RivalDispute(disputed=set_idx[disputed], rival=others[rival], rejected=bool(lost)))
            if lost:
                standing[disputed] = False
                rejected.extend([set_idx[disputed], others[rival]])
            left = np.setdiff1d(left, rival)
    out = np.unique(np.concatenate(rejected)) if rejected else np.zeros(0, dtype=np.intp)
    return RivalCheck(disputes=tuple(disputes), rejected=out.astype(np.intp), exhausted=exhausted)
