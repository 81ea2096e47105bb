"""Scoring against ground truth.

Sections:

* candidate proposals: true revisits, revisit events, candidate recall and
  proposals per keyframe;
* precision-recall curves over a distance threshold (descriptor retrieval).

Definitions (candidate stage):

* A **true revisit** is a pair of keyframes outside the candidate exclusion
  gap (:func:`closurecheck.frontend.candidates.excluded`: far enough apart in time
  and odometry path length) whose ground-truth poses are within
  ``max_distance_m`` (1 m) and ``max_heading_rad`` (30 degrees).
* A **revisit event** is one occasion of coming back to a place: the true
  revisit pairs, as points (i, j) of keyframe positions i < j, linked when
  both coordinates differ by at most ``event_link_keyframes``, form
  connected runs; a run is cut into events of ``event_span_keyframes``
  consecutive keyframes of its later pass (j).  Driving along an earlier
  path for ten keyframes gives one event of ten-odd pairs, not ten events,
  while re-driving a whole lap gives one event per stretch of about
  ``event_span_keyframes`` keyframes (5 m at the default keyframe spacing),
  so a single proposal cannot stand for a whole lap.
* A true pair is **covered** by a proposed pair (a, b), a < b, when
  ``|a - i| <= neighbourhood_keyframes`` and ``|b - j| <=
  neighbourhood_keyframes``: registering a neighbouring keyframe finds the
  same revisit.  An event is covered when any of its pairs is.
* **Candidate recall** is covered events / events.
* **Proposals per keyframe** is the number of distinct proposed pairs
  divided by the number of keyframes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.sparse
import scipy.sparse.csgraph
import scipy.spatial

from ..core import se2
from ..core.options import options, setting
from ..frontend.candidates import CandidateOptions, excluded


@options
class RevisitOptions:
    """Definition of a true revisit and of candidate coverage (module docstring)."""

    max_distance_m: float = setting(1.0, above=0.0)
    max_heading_rad: float = setting(math.radians(30.0), above=0.0)
    neighbourhood_keyframes: int = setting(2, at_least=0)
    event_link_keyframes: int = setting(2, at_least=0)
    event_span_keyframes: int = setting(10, at_least=0)


# --------------------------------------------------------------------------
# candidate proposals


def true_revisits(truth, t, travel, gap: CandidateOptions = CandidateOptions(),
                  options: RevisitOptions = RevisitOptions()) -> np.ndarray:
    """Keyframe pairs that truly revisit a place.

    Parameters
    ----------
    truth : (K, 3) ground-truth keyframe poses (rows with NaN are ignored).
    t, travel : (K,) keyframe times (s) and odometry path length (m), for
        the exclusion gap of ``gap``.

    Returns
    -------
    (M, 2) int64 keyframe positions (i, j) with i < j, sorted.
    """
    truth = np.asarray(truth, dtype=float)
    t = np.asarray(t, dtype=float)
    travel = np.asarray(travel, dtype=float)
    known = np.flatnonzero(np.isfinite(truth).all(axis=1))
    if len(known) < 2:
        return np.zeros((0, 2), dtype=np.int64)
    tree = scipy.spatial.cKDTree(truth[known, :2])
    pairs = tree.query_pairs(options.max_distance_m, output_type="ndarray")
    if len(pairs) == 0:
        return np.zeros((0, 2), dtype=np.int64)
    i, j = known[pairs[:, 0]], known[pairs[:, 1]]
    i, j = np.minimum(i, j), np.maximum(i, j)
    dh = np.abs(se2.wrap(truth[j, 2] - truth[i, 2]))
    keep = (dh <= options.max_heading_rad) & ~excluded(t, travel, i, j, gap)
    out = np.stack([i[keep], j[keep]], axis=1).astype(np.int64)
    return out[np.lexsort((out[:, 1], out[:, 0]))]


def _keys(pairs: np.ndarray, count: int) -> np.ndarray:
    return pairs[:, 0].astype(np.int64) * count + pairs[:, 1]


def _box_offsets(radius: int, half: bool = False) -> list:
    """Offsets (di, dj) with both within ``radius``; ``half``: only those after (0, 0) in (di, dj) order."""
    box = [(di, dj) for di in range(-radius, radius + 1) for dj in range(-radius, radius + 1)]
    return [o for o in box if o > (0, 0)] if half else box


def _box_hits(pairs, others_sorted_keys, count, offsets) -> tuple[np.ndarray, np.ndarray]:
    """For every pair and offset (di, dj), the pair's index and that of the key (i + di, j + dj) in others, where
    there is one."""
    others = others_sorted_keys
    if not len(others) or not len(pairs):
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty.copy()
    # One key per pair, shifted by each offset: an offset moves every key by the same amount, so the
    # searches see the pairs' sorted order (numpy's searchsorted starts from the previous hit then)
    # and no per-offset pair arrays are built.  With the events' half box and int64 labels below, the
    # 100,000-scan log's events (2.3 M true pairs) took 4.9-5.0 s instead of 14.5-15.8 s, the same
    # labels (docs/performance.md, sixth round).
    base = _keys(pairs, count)
    i, j = pairs[:, 0], pairs[:, 1]
    last = len(others) - 1
    hits_self, hits_other = [], []
    for di, dj in offsets:
        # A shifted key of an off-grid (a, b) could alias a grid key, so the grid test stays.
        inside = (i >= -di) & (i < count - di) & (j >= -dj) & (j < count - dj)
        key = base + (di * count + dj)
        pos = np.searchsorted(others, key)
        np.minimum(pos, last, out=pos)
        found = inside & (others[pos] == key)
        hits_self.append(np.flatnonzero(found))
        hits_other.append(pos[found])
    return np.concatenate(hits_self), np.concatenate(hits_other)


def revisit_events(pairs, count: int, options: RevisitOptions = RevisitOptions()) -> np.ndarray:
    """Event label (0..E-1) of each true revisit pair (see the module docstring).

    ``pairs`` is (M, 2) sorted keyframe positions from :func:`true_revisits`;
    ``count`` the number of keyframes.
    """
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    m = len(pairs)
    if m == 0:
        return np.zeros(0, dtype=np.int64)
    keys = _keys(pairs, count)
    order = np.argsort(keys)
    # A link joins both pairs whichever one finds the other, so half the offsets find every link.
    a, b = _box_hits(pairs, keys[order], count, _box_offsets(options.event_link_keyframes, half=True))
    graph = scipy.sparse.coo_array((np.ones(len(a)), (a, order[b])), shape=(m, m))
    _, runs = scipy.sparse.csgraph.connected_components(graph, directed=False)
    j = pairs[:, 1]
    start = np.full(runs.max() + 1, np.iinfo(np.int64).max)
    np.minimum.at(start, runs, j)
    piece = (j - start[runs]) // max(int(options.event_span_keyframes), 1)
    # Labels in the lexicographic order of (run, piece), as a row-wise unique gives them: piece is in
    # [0, span), so run * span + piece sorts the same; one int64 sort instead of a sort of rows
    # (6.5 of 16 s of the 100,000-scan log's events).
    span = int(piece.max()) + 1
    _, labels = np.unique(runs.astype(np.int64) * span + piece, return_inverse=True)
    return labels.reshape(-1).astype(np.int64)


def covered_pairs(true_pairs, proposed_pairs, count: int, options: RevisitOptions = RevisitOptions()) -> np.ndarray:
    """(M,) bool: true pair covered by some proposed pair (positions, any order)."""
    true_pairs = np.asarray(true_pairs, dtype=np.int64).reshape(-1, 2)
    prop = np.asarray(proposed_pairs, dtype=np.int64).reshape(-1, 2)
    prop = np.stack([prop.min(axis=1), prop.max(axis=1)], axis=1)
    keys = np.unique(_keys(prop, count))
    hit, _ = _box_hits(true_pairs, keys, count, _box_offsets(options.neighbourhood_keyframes))
    out = np.zeros(len(true_pairs), dtype=bool)
    out[hit] = True
    return out


@dataclass(frozen=True)
class CandidateRecall:
    """Candidate-stage scores.

    keyframes : number of keyframes.
    proposals : distinct proposed pairs.
    true_pairs, covered_pairs : true revisit pairs and how many are covered.
    events, covered_events : revisit events and how many are covered.
    """

    keyframes: int
    proposals: int
    true_pairs: int
    covered_pairs: int
    events: int
    covered_events: int

    @property
    def recall(self) -> float:
        """Covered events / events (NaN when there is no event)."""
        return self.covered_events / self.events if self.events else math.nan

    @property
    def pair_recall(self) -> float:
        """Covered true pairs / true pairs (NaN when there is none)."""
        return self.covered_pairs / self.true_pairs if self.true_pairs else math.nan

    @property
    def proposals_per_keyframe(self) -> float:
        return self.proposals / self.keyframes if self.keyframes else math.nan


@dataclass(frozen=True, eq=False)
class TrueRevisits:
    """The true revisit pairs of a log's keyframes and their events (module docstring).

    count : number of keyframes.
    pairs : (M, 2) int64 keyframe positions (i, j), i < j, sorted (:func:`true_revisits`).
    events : (M,) int64 event label of each pair (:func:`revisit_events`).
    """

    count: int
    pairs: np.ndarray
    events: np.ndarray

    @property
    def event_count(self) -> int:
        return int(self.events.max()) + 1 if len(self.events) else 0


def revisit_truth(truth, t, travel, gap: CandidateOptions = CandidateOptions(),
                  options: RevisitOptions = RevisitOptions()) -> TrueRevisits:
    """True revisits and their events of K keyframes, to score several sets of pairs against.

    Arguments as in :func:`true_revisits`.  A log driven round and round
    has true pairs in proportion to its keyframes times its passes (2.3 M
    for the 100,000-scan log's 33,333 keyframes), so a run that scores both
    its proposals and its verified closures finds them once.

    Examples
    --------
    A corridor driven twice, 0.5 m between keyframes (times far apart):

    >>> import numpy as np
    >>> from closurecheck.reporting.ground_truth import revisit_truth
    >>> x = np.r_[np.arange(20) * 0.5, np.arange(20) * 0.5]
    >>> truth = np.column_stack([x, np.zeros(40), np.zeros(40)])
    >>> t = np.arange(40) * 10.0
    >>> travel = np.arange(40) * 0.5 + np.r_[np.zeros(20), np.full(20, 100.0)]
    >>> rev = revisit_truth(truth, t, travel)
    >>> len(rev.pairs) > 20, rev.event_count
    (True, 2)
    """
    pairs = true_revisits(truth, t, travel, gap, options)
    return TrueRevisits(count=len(np.asarray(truth)), pairs=pairs,
                        events=revisit_events(pairs, len(np.asarray(truth)), options))


def candidate_recall(keyframe_ids, truth, t, travel, src, dst, gap: CandidateOptions = CandidateOptions(),
                     options: RevisitOptions = RevisitOptions(), revisits: TrueRevisits | None = None
                     ) -> CandidateRecall:
    """Score proposed candidates against ground truth.

    Parameters
    ----------
    keyframe_ids : (K,) increasing keyframe scan ids.
    truth : (K, 3) ground-truth poses of the keyframes.
    t, travel : (K,) keyframe times (s) and odometry path length (m).
    src, dst : (P,) scan ids of the proposed pairs (any orientation); every
        id must be a keyframe.
    gap : supplies the exclusion gap used by the proposals.
    revisits : :func:`revisit_truth` of the same truth, t, travel, gap and
        options, when the caller has it (then those arguments are not read
        again); None finds them.
    """
    keyframe_ids = np.asarray(keyframe_ids, dtype=np.int64)
    count = len(keyframe_ids)
    src = np.asarray(src, dtype=np.int64).reshape(-1)
    dst = np.asarray(dst, dtype=np.int64).reshape(-1)
    a = np.searchsorted(keyframe_ids, src)
    b = np.searchsorted(keyframe_ids, dst)
    if len(src) and (a.max() >= count or b.max() >= count or np.any(keyframe_ids[a] != src)
                     or np.any(keyframe_ids[b] != dst)):
        raise ValueError("candidate_recall: every proposed scan id must be a keyframe")
    prop = np.stack([np.minimum(a, b), np.maximum(a, b)], axis=1)
    n_prop = len(np.unique(_keys(prop, count))) if len(prop) else 0
    if revisits is None:
        revisits = revisit_truth(truth, t, travel, gap, options)
    true, events = revisits.pairs, revisits.events
    cov = covered_pairs(true, prop, count, options)
    n_events = revisits.event_count
    ev_cov = np.zeros(n_events, dtype=bool)
    ev_cov[events[cov]] = True
    return CandidateRecall(count, n_prop, len(true), int(cov.sum()), n_events, int(ev_cov.sum()))


# --------------------------------------------------------------------------
# precision-recall over a distance threshold


@dataclass(frozen=True)
class PrecisionRecall:
    """Precision and recall of "distance <= threshold" for each distinct threshold.

    thresholds : (T,) distinct distances, ascending.
    precision, recall : (T,) at each threshold (recall non-decreasing).
    positives : number of positive samples.
    """

    thresholds: np.ndarray
    precision: np.ndarray
    recall: np.ndarray
    positives: int

    def average_precision(self) -> float:
        """Sum over thresholds of (recall step) * precision, as scikit-learn's
        ``average_precision_score`` defines it."""
        steps = np.diff(np.concatenate([[0.0], self.recall]))
        return float(np.sum(steps * self.precision))

    def best_f1(self) -> tuple[float, float]:
        """(F1, threshold) at the threshold with the highest F1 score."""
        with np.errstate(invalid="ignore", divide="ignore"):
            f1 = np.where(self.precision + self.recall > 0,
                          2 * self.precision * self.recall / (self.precision + self.recall), 0.0)
        if len(f1) == 0:
            return math.nan, math.nan
        k = int(np.argmax(f1))
        return float(f1[k]), float(self.thresholds[k])


def precision_recall(distance, positive) -> PrecisionRecall:
    """Precision-recall curve of accepting samples with ``distance <= threshold``.

    Parameters
    ----------
    distance : (n,) distances (smaller = more likely positive).
    positive : (n,) bool ground-truth labels.

    Every distinct distance is a threshold.  Precision is TP / (TP + FP)
    among accepted samples, recall TP / positives (1 everywhere when there
    is no positive, as scikit-learn does).
    """
    d = np.asarray(distance, dtype=float).reshape(-1)
    y = np.asarray(positive, dtype=bool).reshape(-1)
    if d.shape != y.shape:
        raise ValueError(f"precision_recall: {d.shape} distances but {y.shape} labels")
    order = np.argsort(d, kind="stable")
    d, y = d[order], y[order]
    tp = np.cumsum(y)
    fp = np.cumsum(~y)
    # The last sample of each run of equal distances closes that threshold.
    last = np.flatnonzero(np.r_[d[1:] != d[:-1], True]) if len(d) else np.zeros(0, dtype=np.int64)
    tp, fp = tp[last], fp[last]
    positives = int(y.sum())
    precision = tp / np.maximum(tp + fp, 1)
    recall = tp / positives if positives else np.ones(len(tp))
    return PrecisionRecall(d[last], precision, recall, positives)


def descriptor_pair_labels(vectors, truth, t, travel, gap: CandidateOptions = CandidateOptions(),
                           options: RevisitOptions = RevisitOptions(), block: int = 512):
    """All keyframe pairs outside the exclusion gap, their descriptor distance and truth label.

    O(K^2) in time and memory: meant for evaluation on logs of a few
    thousand keyframes.  Returns (pairs (n, 2) positions i < j, distance
    (n,), positive (n,) bool: the pair is a true revisit).
    """
    v = np.asarray(vectors, dtype=float)
    count = len(v)
    true = true_revisits(truth, t, travel, gap, options)
    true_keys = np.sort(_keys(true, count)) if len(true) else np.zeros(0, dtype=np.int64)
    pairs, dist = [], []
    for start in range(0, count, block):
        i = np.arange(start, min(start + block, count))
        ii, jj = np.meshgrid(i, np.arange(count), indexing="ij")
        keep = (jj > ii) & ~excluded(t, travel, ii, jj, gap)
        ii, jj = ii[keep], jj[keep]
        pairs.append(np.stack([ii, jj], axis=1))
        dist.append(np.linalg.norm(v[ii] - v[jj], axis=1))
    pairs = np.concatenate(pairs) if pairs else np.zeros((0, 2), dtype=np.int64)
    dist = np.concatenate(dist) if dist else np.zeros(0)
    positive = np.isin(_keys(pairs, count), true_keys)
    return pairs, dist, positive
