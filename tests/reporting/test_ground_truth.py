"""Scoring of candidate proposals: true revisits, events, recall, precision-recall."""

import math
import warnings

import numpy as np
import pytest
from sklearn.metrics import average_precision_score, precision_recall_curve

from closurecheck.core import se2
from closurecheck.frontend.candidates import CandidateOptions, excluded
from closurecheck.reporting.ground_truth import (
    RevisitOptions,
    candidate_recall,
    covered_pairs,
    descriptor_pair_labels,
    precision_recall,
    revisit_events,
    revisit_truth,
    true_revisits,
)

# --------------------------------------------------------------------------
# precision-recall against scikit-learn (reference implementation)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_precision_recall_matches_scikit_learn(seed):
    rng = np.random.default_rng(seed)
    n = 500
    positive = rng.random(n) < 0.2
    # Rounded distances create ties, which must be handled as sklearn does.
    distance = np.round(np.where(positive, rng.normal(1.0, 0.5, n), rng.normal(2.0, 0.6, n)), 1)
    ours = precision_recall(distance, positive)
    # sklearn scores "larger = more positive", so it gets the negated distance;
    # it lists thresholds in increasing score with a final (1, 0) point.
    p, r, thr = precision_recall_curve(positive, -distance)
    np.testing.assert_allclose(ours.thresholds, -thr[::-1])
    np.testing.assert_allclose(ours.precision, p[:-1][::-1])
    np.testing.assert_allclose(ours.recall, r[:-1][::-1])
    assert ours.average_precision() == pytest.approx(average_precision_score(positive, -distance), rel=1e-12)


def test_precision_recall_without_positives_matches_scikit_learn():
    distance = np.array([0.3, 0.1, 0.2, 0.2])
    positive = np.zeros(4, dtype=bool)
    ours = precision_recall(distance, positive)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p, r, _ = precision_recall_curve(positive, -distance)
    np.testing.assert_allclose(ours.precision, p[:-1][::-1])
    np.testing.assert_allclose(ours.recall, r[:-1][::-1])


def test_best_f1_picks_the_separating_threshold():
    pr = precision_recall([0.1, 0.2, 0.3, 0.9, 1.0], [True, True, True, False, False])
    f1, thr = pr.best_f1()
    assert f1 == pytest.approx(1.0) and thr == pytest.approx(0.3)


# --------------------------------------------------------------------------
# true revisits and events


def test_true_revisits_match_exhaustive_search():
    rng = np.random.default_rng(3)
    k = 300
    truth = np.column_stack([rng.uniform(0, 8, k), rng.uniform(0, 8, k), rng.uniform(-math.pi, math.pi, k)])
    truth[7] = np.nan  # a keyframe without truth
    t = np.arange(k, dtype=float)
    travel = 0.5 * np.arange(k)
    gap = CandidateOptions(exclude_time_s=10.0, exclude_travel_m=3.0)
    got = true_revisits(truth, t, travel, gap)
    expected = []
    for i in range(k):
        for j in range(i + 1, k):
            if not (np.isfinite(truth[i]).all() and np.isfinite(truth[j]).all()):
                continue
            close = np.hypot(*(truth[i, :2] - truth[j, :2])) <= 1.0
            aligned = abs(se2.wrap(truth[i, 2] - truth[j, 2])) <= math.radians(30)
            if close and aligned and not excluded(t, travel, i, j, gap):
                expected.append((i, j))
    assert len(expected) > 20
    np.testing.assert_array_equal(got, np.array(expected))


def _run(i0, j0, n):
    return np.column_stack([np.arange(i0, i0 + n), np.arange(j0, j0 + n)])


def test_events_are_runs_cut_into_spans():
    opts = RevisitOptions(event_link_keyframes=2, event_span_keyframes=10)
    a = _run(10, 200, 25)                  # one long re-drive: 3 events of <= 10 keyframes
    b = _run(60, 400, 4)                   # a separate short revisit
    c = np.vstack([_run(100, 600, 3), _run(103, 604, 3)])  # j jumps by 2: still linked
    d = np.vstack([_run(150, 700, 3), _run(153, 706, 3)])  # j jumps by 4: two events
    pairs = np.vstack([a, b, c, d])
    order = np.lexsort((pairs[:, 1], pairs[:, 0]))
    labels = revisit_events(pairs[order], 1000, opts)[np.argsort(order)]
    la, lb, lc, ld = np.split(labels, np.cumsum([len(a), len(b), len(c)]))
    assert len(np.unique(la)) == 3 and np.all(np.diff(la[:10]) == 0)
    assert len(np.unique(lb)) == 1 and len(np.unique(lc)) == 1
    assert len(np.unique(ld)) == 2
    assert len(np.unique(labels)) == 3 + 1 + 1 + 2


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_events_match_connected_components_of_networkx(seed):
    # Reference: networkx.connected_components over every link found by brute force (both pairs'
    # coordinates within event_link_keyframes), each component cut into spans of its later pass,
    # labels numbered in the order of (component's first pair, span), as the module docstring
    # defines events.  Dense random pairs make long chains of links and many ties.
    import networkx as nx

    rng = np.random.default_rng(seed)
    count, m = 400, 1500
    opts = RevisitOptions(event_link_keyframes=2, event_span_keyframes=10)
    raw = np.sort(rng.integers(0, count, (m, 2)), axis=1)
    raw = raw[raw[:, 0] < raw[:, 1]]
    pairs = np.unique(raw, axis=0)
    got = revisit_events(pairs, count, opts)
    near = ((np.abs(pairs[:, None, 0] - pairs[None, :, 0]) <= 2)
            & (np.abs(pairs[:, None, 1] - pairs[None, :, 1]) <= 2))
    g = nx.Graph()
    g.add_nodes_from(range(len(pairs)))
    g.add_edges_from(zip(*np.nonzero(np.triu(near, 1))))
    comp = np.empty(len(pairs), dtype=np.int64)
    for members in nx.connected_components(g):
        members = sorted(members)
        comp[members] = members[0]
    start = {c: pairs[comp == c, 1].min() for c in np.unique(comp)}
    piece = np.array([(pairs[k, 1] - start[comp[k]]) // 10 for k in range(len(pairs))])
    # Labels rank (component, span) with components numbered by their first pair, as
    # scipy's connected_components numbers them.
    _, ref = np.unique(comp * count + piece, return_inverse=True)
    assert np.array_equal(got, ref.ravel())
    assert len(np.unique(got)) > 10 and np.bincount(got).max() > 5


def _corridor(passes, id_step):
    """Keyframes 0.5 m apart on a 20 m line driven ``passes`` times in the same direction (invented):
    keyframe k and k + 40 are the same place.  Returns (truth, scan ids, t, travel, gap)."""
    k = 40 * passes
    x = np.tile(np.arange(40) * 0.5, passes)
    truth = np.column_stack([x, np.zeros(k), np.zeros(k)])
    t = np.arange(k, dtype=float) * 2
    travel = np.arange(k, dtype=float) * 0.5
    return truth, np.arange(k) * id_step, t, travel, CandidateOptions(exclude_time_s=20.0, exclude_travel_m=5.0)


def test_shared_revisits_give_the_same_recall():
    truth, ids, t, travel, gap = _corridor(3, 2)
    rev = revisit_truth(truth, t, travel, gap)
    src, dst = ids[[45, 65, 100]], ids[[5, 25, 61]]
    assert candidate_recall(ids, truth, t, travel, src, dst, gap, revisits=rev) == \
        candidate_recall(ids, truth, t, travel, src, dst, gap)
    assert rev.event_count == len(np.unique(rev.events)) > 0


def test_coverage_uses_the_index_neighbourhood_in_either_order():
    true = np.array([[10, 100], [50, 300]])
    opts = RevisitOptions(neighbourhood_keyframes=2)
    assert covered_pairs(true, np.array([[102, 12]]), 1000, opts).tolist() == [True, False]
    assert covered_pairs(true, np.array([[13, 100]]), 1000, opts).tolist() == [False, False]
    assert covered_pairs(true, np.array([[48, 302], [10, 100]]), 1000, opts).tolist() == [True, True]
    assert covered_pairs(true, np.zeros((0, 2)), 1000, opts).tolist() == [False, False]


def test_candidate_recall_counts_events_and_proposals():
    # Keyframes on a line, driven twice in the same direction.
    truth, ids, t, travel, gap = _corridor(2, 3)
    opts = RevisitOptions(event_span_keyframes=10)
    # One proposal in the first and third stretches of the re-drive.
    src, dst = ids[[45, 65]], ids[[5, 25]]
    r = candidate_recall(ids, truth, t, travel, src, dst, gap, opts)
    assert r.events == 4 and r.covered_events == 2
    assert r.recall == 0.5
    assert r.proposals == 2 and r.proposals_per_keyframe == 2 / 80
    assert 0 < r.pair_recall < 0.5
    with pytest.raises(ValueError):
        candidate_recall(ids, truth, t, travel, np.array([1]), np.array([3]), gap, opts)


def test_descriptor_pair_labels_cover_all_pairs_outside_the_gap():
    rng = np.random.default_rng(5)
    k = 90
    truth = np.column_stack([rng.uniform(0, 5, k), rng.uniform(0, 5, k), rng.uniform(-0.5, 0.5, k)])
    v = rng.normal(size=(k, 4))
    t = np.arange(k, dtype=float)
    travel = np.arange(k, dtype=float)
    gap = CandidateOptions(exclude_time_s=5.0, exclude_travel_m=5.0)
    pairs, dist, positive = descriptor_pair_labels(v, truth, t, travel, gap, block=17)
    i, j = np.triu_indices(k, 1)
    keep = ~excluded(t, travel, i, j, gap)
    np.testing.assert_array_equal(np.sort(pairs[:, 0] * k + pairs[:, 1]), np.sort(i[keep] * k + j[keep]))
    np.testing.assert_allclose(dist, np.linalg.norm(v[pairs[:, 0]] - v[pairs[:, 1]], axis=1))
    true = true_revisits(truth, t, travel, gap)
    assert positive.sum() == len(true) > 0
