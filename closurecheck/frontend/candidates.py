"""Loop-closure candidates: which keyframe pairs the verifier gets to see.

Three sources, merged and deduplicated:

* **descriptor**: the ``descriptor_neighbours`` nearest keyframes in
  descriptor space (a kd-tree search, Euclidean metric), per keyframe,
  among keyframes outside the exclusion gap;
* **proximity**: keyframes whose odometry-predicted relative pose is close,
  under the odometry uncertainty accumulated along the chain between them;
* **external**: pairs read from a CSV file (:mod:`closurecheck.io.pairs_csv`).

Exclusion gap.  Keyframes closer than ``exclude_time_s`` in time *or*
``exclude_travel_m`` in odometry path length are never paired: they are
consecutive views, not revisits.

Proximity gate.  For keyframes i < j the odometry predicts ``T = x_i^-1 ∘
x_j`` with first-order covariance ``C`` (:class:`closurecheck.core.odometry.OdometryChain`).
"Close" means the true delta lies in a region of about ``near_distance_m``
and ``near_heading_rad`` around the identity, modelled as a zero-mean
Gaussian ``N = diag(near_distance_m^2, near_distance_m^2, near_heading_rad^2)``.
The pair passes when ``T^T (C + N)^-1 T <= chi2_3(gate_probability)``, so the
gate widens as drift accumulates.  For speed the pairs examined are the
``proximity_neighbours`` nearest keyframes in odometry pose space (a KD-tree
over position and scaled heading, outside the exclusion gap, within
``proximity_max_radius_m``): O(K log K) for K keyframes, where checking all
pairs would be O(K^2).

Ranking and budget.  Each keyframe pools its descriptor and proximity
candidates and scores every one by :func:`rank_score`: the gate statistic
(relative to the threshold) plus the squared descriptor distance (relative
to the typical best-match distance); candidates outside the gate get a
fixed penalty instead of the gate term; candidates scoring above
``max_score`` are dropped.  One candidate per keyframe is exempt from the
descriptor term: its best partner by the gate when the odometry predicts
the same place (within ``near_distance_m`` and ``near_heading_rad``, or a
gate statistic below the chi-square median, as typical of a true revisit
as half of them): in a
grid of identical columns a place half a metre and 17 degrees away can
describe worse than a look-alike one pitch away, and the descriptor term
would otherwise drop the true pair.
In ascending score it keeps at most
``max_per_keyframe``, of which at most ``max_ungated_per_keyframe`` outside
the gate, skipping any candidate within ``suppress_keyframes``
chain positions of one already kept: a revisit of a place visited several
times before must reach *each* earlier pass, and look-alike places far away
in odometry must not use up the budget.  The kept pairs of all keyframes
are merged, so the set has at most ``max_per_keyframe`` pairs per keyframe.

Orientation.  A proposed pair has ``src`` = the later scan id and ``dst`` =
the earlier one; the delta it stands for is ``src^-1 ∘ dst`` (the pose of
the earlier keyframe in the later one's frame), and ``guess``, ``yaw`` and
``odometry_delta`` follow that orientation.  External pairs keep the
orientation of their file.

Guess.  An external guess when the file has one.  Otherwise, inside the
proximity gate, the most probable delta given the odometry prediction and
the "same place" prior (the odometry delta when the chain between the two
keyframes is tight, shrinking towards the identity as drift grows), with
its heading replaced by the nearest yaw hypothesis; outside the gate
``[0, 0, yaw]`` with the best yaw hypothesis (the descriptor says "same
place", so zero translation is the best prior).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.spatial

from ..core import se2
from ..core.odometry import OdometryChain, OdometryNoise, noise_from_header
from ..core.options import options, setting
from ..core.stats import chi2_median, chi2_threshold
from ..errors import InputError
from ..io.pairs_csv import ExternalPairs
from .descriptors import (
    DescriptorOptions,
    ScanDescriptors,
    describe,
    estimate_yaw_pairs,
)
from .keyframes import odometry_travel

SOURCE_DESCRIPTOR = 1
SOURCE_PROXIMITY = 2
SOURCE_EXTERNAL = 4
# A pair named only by a reviewer's decisions file (registered so its decision can be applied).
SOURCE_REVIEW = 8
_SOURCE_NAMES = ((SOURCE_EXTERNAL, "external"), (SOURCE_DESCRIPTOR, "descriptor"), (SOURCE_PROXIMITY, "proximity"),
                 (SOURCE_REVIEW, "reviewer"))


@options
class CandidateOptions:
    """Thresholds of candidate proposal (see the module docstring).

    exclude_time_s, exclude_travel_m : exclusion gap; pairs closer in time
        or in odometry path length are never proposed.
    descriptor_neighbours : descriptor-space neighbours retrieved per keyframe.
    proximity_neighbours : nearest keyframes (odometry position) examined by
        the proximity gate per keyframe.
    proximity_max_radius_m : odometry distance beyond which the proximity
        gate does not look (descriptors still may).
    near_distance_m, near_heading_rad : size of the "same place" region of
        the proximity gate (1 m and 30 degrees, the revisit definition of
        :mod:`closurecheck.reporting.ground_truth`).
    gate_probability : chi-square(3) probability of the proximity gate.
    max_per_keyframe : candidates kept per keyframe.
    max_ungated_per_keyframe : of those, at most this many may fail the
        proximity gate (descriptor matches the odometry finds implausible;
        they still matter when the odometry has unmodelled errors).
    descriptor_weight : weight w of the descriptor term in the score
        (:func:`rank_score`).
    ungated_penalty : score added to candidates that fail the gate.
    max_score : candidates scoring above this are not proposed at all, so a
        keyframe without a plausible revisit does not fill its budget with
        implausible ones.  32 was chosen on the simulated scenarios
        (benchmarks/candidates.py: it drops about a third of the proposals
        and no more than 1-2 % of the revisit events); a huge value
        disables it.
    odometry_revisit_first : each keyframe's best partner by the gate, when
        the odometry predicts the same place (within ``near_distance_m`` and
        ``near_heading_rad``, or a gate statistic below the chi-square
        median), is scored without the descriptor term (module
        docstring, "Ranking and budget").
    suppress_keyframes : candidates of one keyframe closer than this many
        chain positions to a better one are skipped.
    yaw_hypotheses : yaw hypotheses kept per candidate.
    tree : tree for descriptor search: "kd_tree" (scipy's, :func:`nearest_exact`)
        or "ball_tree" (scikit-learn's); the same neighbours, at another speed.
    search_dims : principal components of the descriptors searched by the
        tree (:func:`search_space`); 0 searches the full descriptors.
    block_keyframes : keyframes processed together (bounds the working
        memory, not the results).
    """

    exclude_time_s: float = setting(20.0, at_least=0.0)
    exclude_travel_m: float = setting(5.0, at_least=0.0)
    descriptor_neighbours: int = setting(10, at_least=0)
    proximity_neighbours: int = setting(48, at_least=0)
    proximity_max_radius_m: float = setting(15.0, above=0.0)
    near_distance_m: float = setting(1.0, above=0.0)
    near_heading_rad: float = setting(math.radians(30.0), above=0.0)
    gate_probability: float = setting(0.99, above=0.0, below=1.0)
    max_per_keyframe: int = setting(4, at_least=1)
    max_ungated_per_keyframe: int = setting(1, at_least=0)
    descriptor_weight: float = setting(1.0, at_least=0.0)
    ungated_penalty: float = setting(1.0, at_least=0.0)
    max_score: float = setting(32.0, above=0.0, allow_inf=True)
    odometry_revisit_first: bool = setting(True)
    suppress_keyframes: int = setting(4, at_least=0)
    yaw_hypotheses: int = setting(3, at_least=1)
    tree: str = setting("kd_tree", choices=("kd_tree", "ball_tree"))
    search_dims: int = setting(12, at_least=0)
    block_keyframes: int = setting(2048, at_least=1)

    @property
    def gate_threshold(self) -> float:
        """Chi-square(3) quantile of the proximity gate (e.g. 11.345 at 0.99)."""
        return chi2_threshold(self.gate_probability)


@dataclass(frozen=True, eq=False)
class CandidateSet:
    """Candidate pairs (P of them), one row per unordered pair.

    src, dst : (P,) int64 scan ids; the candidate is the delta ``src^-1 ∘ dst``.
    sources : (P,) uint8 bit flags: SOURCE_DESCRIPTOR, SOURCE_PROXIMITY,
        SOURCE_EXTERNAL (a pair found several ways has several bits).
    descriptor_distance : (P,) Euclidean distance of the two descriptors.
    gate_distance_sq : (P,) squared Mahalanobis distance of the odometry
        prediction from "same place" (the proximity gate statistic; the pair
        is SOURCE_PROXIMITY-eligible when it is <= the gate threshold).
    odometry_delta : (P, 3) odometry-predicted ``src^-1 ∘ dst`` (src frame).
    yaw : (P, H) yaw hypotheses (radians, best first; NaN = none) for the
        heading of ``src^-1 ∘ dst``, from the scans' signatures.
    yaw_score : (P, H) normalised cross-correlation of each hypothesis.
    guess : (P, 3) initial delta for registration (module docstring).
    score : (P,) selection score, smaller = more promising (see
        :func:`rank_score`); inf for external pairs that no source chose.
    """

    src: np.ndarray
    dst: np.ndarray
    sources: np.ndarray
    descriptor_distance: np.ndarray
    gate_distance_sq: np.ndarray
    odometry_delta: np.ndarray
    yaw: np.ndarray
    yaw_score: np.ndarray
    guess: np.ndarray
    score: np.ndarray

    def __len__(self) -> int:
        return len(self.src)

    def take(self, rows) -> "CandidateSet":
        """Subset (or reordering) of the rows."""
        return CandidateSet(*(getattr(self, f)[rows] for f in _FIELDS))

    def source_names(self) -> list[str]:
        """Per pair, its sources joined with '+', e.g. 'descriptor+proximity'."""
        return ["+".join(n for bit, n in _SOURCE_NAMES if flags & bit) for flags in self.sources.tolist()]


_FIELDS = ("src", "dst", "sources", "descriptor_distance", "gate_distance_sq", "odometry_delta",
           "yaw", "yaw_score", "guess", "score")


def empty_candidates(yaw_hypotheses: int = 3) -> CandidateSet:
    """A CandidateSet with no rows."""
    z = np.zeros(0)
    return CandidateSet(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.uint8), z, z,
                        np.zeros((0, 3)), np.zeros((0, yaw_hypotheses)), np.zeros((0, yaw_hypotheses)),
                        np.zeros((0, 3)), z.copy())


# --------------------------------------------------------------------------
# exclusion gap and k-nearest search outside it


def excluded(t, travel, i, j, options: CandidateOptions) -> np.ndarray:
    """True where keyframes i and j (positions) are inside the exclusion gap.

    ``t`` (K,) seconds and ``travel`` (K,) odometry path length (metres) of
    the keyframes; ``i``, ``j`` broadcastable integer arrays of positions.
    """
    return (np.abs(t[i] - t[j]) < options.exclude_time_s) | (np.abs(travel[i] - travel[j]) < options.exclude_travel_m)


def _knn_outside_gap(query, k, count, t, travel, options, max_distance=np.inf):
    """k nearest neighbours of every row outside the exclusion gap.

    ``query(rows, n)`` returns (distances, indices) of the n nearest points
    of rows (including the row itself).  Neighbours in the gap are dropped;
    rows left with fewer than k neighbours are asked again with twice as many
    until they have k or their search covered every point (or reached
    ``max_distance``).  Rows are processed ``block_keyframes`` at a time so
    the working memory does not grow with the log.  Returns (dist (count,
    k), idx (count, k)) padded with inf / -1, sorted by distance.
    """
    out_d = np.full((count, k), np.inf)
    out_i = np.full((count, k), -1, dtype=np.int64)
    if k == 0 or count < 2:
        return out_d, out_i
    for start in range(0, count, options.block_keyframes):
        rows = np.arange(start, min(start + options.block_keyframes, count))
        n = min(count, 2 * k + 8)
        while len(rows):
            d, idx = query(rows, n)
            idx = np.asarray(idx, dtype=np.int64)
            ok = np.isfinite(d) & (idx >= 0) & (idx < count)
            safe = np.where(ok, idx, 0)
            ok &= ~excluded(t, travel, rows[:, None], safe, options)
            # Keep the first k valid neighbours of each row, in distance order.
            order = np.argsort(~ok, axis=1, kind="stable")[:, :k]
            got_d = np.where(np.take_along_axis(ok, order, 1), np.take_along_axis(d, order, 1), np.inf)
            got_i = np.where(np.isfinite(got_d), np.take_along_axis(safe, order, 1), -1)
            width = got_d.shape[1]
            out_d[rows, :width] = got_d
            out_i[rows, :width] = got_i
            enough = ok.sum(axis=1) >= k
            exhausted = (n >= count) | (d[:, -1] > max_distance) | ~np.isfinite(d[:, -1])
            rows = rows[~(enough | exhausted)]
            n = min(count, 2 * n)
    return out_d, out_i


def descriptor_neighbours(vectors, t, travel, options: CandidateOptions = CandidateOptions()):
    """Nearest keyframes in descriptor space, outside the exclusion gap.

    Parameters
    ----------
    vectors : (K, D) descriptors.
    t, travel : (K,) keyframe times (s) and odometry path length (m).

    Returns
    -------
    dist : (K, k) Euclidean descriptor distances, ascending, inf-padded.
    idx : (K, k) keyframe positions of the neighbours, -1-padded;
        k = ``options.descriptor_neighbours``.
    """
    vectors = np.asarray(vectors, dtype=np.float64)
    count = len(vectors)
    k = options.descriptor_neighbours
    if count < 2 or k == 0:
        return np.full((count, k), np.inf), np.full((count, k), -1, dtype=np.int64)
    if options.tree == "ball_tree":
        # Imported here: scikit-learn (with the scipy.stats it imports) takes about 1.1 s to import, a
        # fifth of a 5,000-scan run's serial part (docs/performance.md); the default tree needs none of it.
        from sklearn.neighbors import NearestNeighbors

        nn = NearestNeighbors(algorithm="ball_tree").fit(vectors)

        def query(rows, n):
            return nn.kneighbors(vectors[rows], n_neighbors=n)
    else:
        tree = scipy.spatial.cKDTree(vectors)

        def query(rows, n):
            return nearest_exact(tree, vectors, rows, n)

    return _knn_outside_gap(query, k, count, t, travel, options)


# Relative error bound of scipy's kd-tree distances against the dimension-order sums: a sum of D
# squares in another order differs by at most about D ulps (D <= a few hundred here), far below this.
_TREE_DISTANCE_SLACK = 1e-12


def nearest_exact(tree, vectors, rows, n: int):
    """The n nearest of ``vectors`` to each of ``vectors[rows]``, distances summed in dimension order.

    scipy's kd-tree sums the squared differences of the coordinates four at a
    time, scikit-learn's trees one after the other; the two differ in the
    last bits, which reach the candidates' ranking (``descriptor_distance``).
    The tree proposes a few more neighbours than asked; their distances are
    summed again in dimension order (scikit-learn's
    ``EuclideanDistance.rdist``, then the square root) and sorted, ties by
    index.  A row whose n-th distance comes within the rounding slack of
    the furthest proposed one asks the tree for twice as many, so no point
    outside the proposals can belong to the n nearest.

    Parameters
    ----------
    tree : ``scipy.spatial.cKDTree`` built on ``vectors``.
    vectors : (K, D) float64 points.
    rows : (m,) int positions of the query points (each finds itself, at 0).
    n : neighbours wanted, 1 <= n <= K.

    Returns
    -------
    dist : (m, n) Euclidean distances, ascending.
    idx : (m, n) int64 positions in ``vectors``.

    Examples
    --------
    Four points on a line: the nearest two to the second point are itself
    and the first (ties broken by index).

    >>> import numpy as np, scipy.spatial
    >>> from closurecheck.frontend.candidates import nearest_exact
    >>> v = np.array([[0.0], [1.0], [2.0], [4.0]])
    >>> d, i = nearest_exact(scipy.spatial.cKDTree(v), v, np.array([1]), 2)
    >>> d.tolist(), i.tolist()
    ([[0.0, 1.0]], [[1, 0]])
    """
    rows = np.asarray(rows, dtype=np.int64)
    count = len(vectors)
    dist = np.empty((len(rows), n))
    idx = np.empty((len(rows), n), dtype=np.int64)
    todo = np.arange(len(rows))
    asked = min(count, n + 4)
    while len(todo):
        ck_d, ck_i = tree.query(vectors[rows[todo]], k=np.arange(1, asked + 1))
        ck_i = np.asarray(ck_i, dtype=np.int64)
        # One coordinate at a time: the working memory stays that of the (rows, asked) distances
        # (a row short of partners outside the exclusion gap may ask for every point).
        query = vectors[rows[todo]]
        sq = np.zeros(ck_i.shape)
        for j in range(vectors.shape[1]):
            t = vectors[ck_i, j] - query[:, j, None]
            sq += t * t
        exact = np.sqrt(sq)
        order = np.lexsort((ck_i, exact), axis=-1)[:, :n]
        got_d = np.take_along_axis(exact, order, 1)
        # Safe when every point left out (tree distance >= the last proposal's) is further than the
        # n-th kept one even after the rounding of both.
        safe = (asked >= count) | (got_d[:, -1] < ck_d[:, -1] * (1.0 - _TREE_DISTANCE_SLACK))
        dist[todo[safe]] = got_d[safe]
        idx[todo[safe]] = np.take_along_axis(ck_i, order, 1)[safe]
        todo = todo[~safe]
        asked = min(count, 2 * asked)
    return dist, idx


def search_space(vectors, options: CandidateOptions = CandidateOptions()) -> np.ndarray:
    """Descriptors projected on their ``search_dims`` leading principal components.

    Tree search is only faster than brute force in few dimensions; the
    descriptors' variance sits in a few directions, so searching the
    leading principal components (computed from these descriptors with
    a principal component analysis) keeps the neighbours while the search stays near
    O(K log K).  ``search_dims = 0`` (or at least the descriptor length)
    searches the full vectors.

    The projection is scikit-learn's ``PCA(svd_solver="full").fit_transform``
    step for step (mean, centring, ``scipy.linalg.svd``, the signs of
    ``svd_flip`` from the rows of V^T, then ``U * S``), so the same bits
    (tests/frontend/test_candidates.py holds the two against each other),
    without importing scikit-learn for it.
    """
    vectors = np.asarray(vectors, dtype=np.float64)
    dims = options.search_dims
    if dims == 0 or dims >= vectors.shape[1] or len(vectors) <= dims:
        return vectors
    centred = vectors - np.mean(vectors, axis=0)
    u, s, vt = scipy.linalg.svd(centred, full_matrices=False)
    # svd_flip(u_based_decision=False): each component's largest |entry| in V^T made positive.
    signs = np.sign(vt[np.arange(len(vt)), np.argmax(np.abs(vt), axis=1)])
    u *= signs[np.newaxis, :]
    u = u[:, :dims]
    u *= s[:dims]
    return u


def _mahalanobis_sq3(e, c):
    """``e^T C^-1 e`` for stacks of symmetric positive definite 3x3 C.

    The adjugate formula works element by element, several times faster
    than a batched LAPACK solve on millions of tiny matrices.
    """
    a, b, cc = c[..., 0, 0], c[..., 0, 1], c[..., 0, 2]
    d, f, g = c[..., 1, 1], c[..., 1, 2], c[..., 2, 2]
    A, B, C = d * g - f * f, cc * f - b * g, b * f - cc * d
    D, E, F = a * g - cc * cc, b * cc - a * f, a * d - b * b
    det = a * A + b * B + cc * C
    x, y, z = e[..., 0], e[..., 1], e[..., 2]
    return (A * x * x + D * y * y + F * z * z + 2.0 * (B * x * y + C * x * z + E * y * z)) / det


def gate_distance_sq(chain: OdometryChain, i, j, options: CandidateOptions = CandidateOptions()) -> np.ndarray:
    """Proximity gate statistic of keyframe positions i, j (any order).

    ``T^T (C + N)^-1 T`` with T the odometry delta between the two keyframes
    (computed from the earlier one, so the value is symmetric in i and j),
    C its chain covariance and N the "same place" region.
    """
    i = np.asarray(i, dtype=np.int64)
    j = np.asarray(j, dtype=np.int64)
    if i.size == 0:
        return np.zeros(i.shape)
    shape = np.broadcast(i, j).shape
    i, j = np.broadcast_to(i, shape).reshape(-1), np.broadcast_to(j, shape).reshape(-1)
    delta, cov = chain.forward(np.minimum(i, j), np.maximum(i, j))
    return _mahalanobis_sq3(delta, cov + _near_covariance(options)).reshape(shape)


def _pose_points(poses, options: CandidateOptions) -> np.ndarray:
    """Odometry poses as 4D points (x, y, r cos theta, r sin theta), metres.

    ``r = near_distance_m / near_heading_rad`` turns a heading difference of
    ``near_heading_rad`` into about ``near_distance_m``, so the nearest
    points are near in position *and* heading; passes the other way round
    do not crowd out the ones in the same direction.
    """
    r = options.near_distance_m / options.near_heading_rad
    return np.column_stack([poses[:, 0], poses[:, 1], r * np.cos(poses[:, 2]), r * np.sin(poses[:, 2])])


def proximity_neighbours(chain: OdometryChain, t, travel, options: CandidateOptions = CandidateOptions()):
    """Keyframes that pass the proximity gate, per keyframe.

    The ``proximity_neighbours`` nearest keyframes in odometry pose space
    (position plus heading scaled as in the gate; outside the exclusion gap,
    within ``proximity_max_radius_m``) are examined; those passing the gate
    are kept.

    Returns
    -------
    dist_sq : (K, k) gate statistics, ascending, inf-padded.
    idx : (K, k) keyframe positions, -1-padded.
    """
    count = len(chain)
    k = options.proximity_neighbours
    if count < 2 or k == 0:
        return np.full((count, k), np.inf), np.full((count, k), -1, dtype=np.int64)
    pts = _pose_points(chain.poses, options)
    tree = scipy.spatial.cKDTree(pts)
    radius = options.proximity_max_radius_m

    def query(rows, n):
        return tree.query(pts[rows], k=n, distance_upper_bound=radius)

    _, idx = _knn_outside_gap(query, k, count, t, travel, options, max_distance=radius)
    m2 = np.full(idx.shape, np.inf)
    for start in range(0, count, options.block_keyframes):
        part = idx[start:start + options.block_keyframes]
        rows = np.broadcast_to(np.arange(start, start + len(part))[:, None], part.shape)
        have = part >= 0
        m2[start:start + len(part)][have] = gate_distance_sq(chain, rows[have], part[have], options)
    m2[m2 > options.gate_threshold] = np.inf
    order = np.argsort(m2, axis=1, kind="stable")
    m2 = np.take_along_axis(m2, order, 1)
    idx = np.where(np.isfinite(m2), np.take_along_axis(idx, order, 1), -1)
    return m2, idx


# --------------------------------------------------------------------------
# fusion and budget


def _union_rows(idx_a, idx_b):
    """Row-wise union of two -1-padded index arrays (duplicates of a in b become -1)."""
    dup = ((idx_b[:, :, None] == idx_a[:, None, :]) & (idx_b[:, :, None] >= 0)).any(axis=2)
    return np.concatenate([idx_a, np.where(dup, -1, idx_b)], axis=1)


def rank_score(gate_sq, descriptor_ratio, options: CandidateOptions = CandidateOptions()) -> np.ndarray:
    """Selection score of candidates, smaller = more promising.

    ``gate_sq`` is the proximity gate statistic and ``descriptor_ratio`` the
    descriptor distance divided by the median distance of keyframes to their
    best descriptor match.  A candidate inside the gate scores
    ``gate_sq / threshold + w * ratio^2``; outside the gate
    ``ungated_penalty + w * ratio^2``.
    """
    gated = gate_sq <= options.gate_threshold
    with np.errstate(invalid="ignore"):
        term = options.descriptor_weight * np.square(descriptor_ratio)
    return np.where(gated, gate_sq / options.gate_threshold, options.ungated_penalty) + term


def _odometry_revisit_first(score, m2, part, chain: OdometryChain, start: int, options: CandidateOptions):
    """Drop the descriptor term (in place) of each row's best gated partner where the odometry predicts the same place.

    ``score``, ``m2`` and ``part`` are the (B, L) scores, gate statistics and
    partner positions of keyframes ``start .. start + B - 1``.
    """
    gated = np.isfinite(m2) & (m2 <= options.gate_threshold)
    rows = np.flatnonzero(gated.any(axis=1))
    if not len(rows):
        return
    col = np.argmin(np.where(gated, m2, np.inf)[rows], axis=1)
    odo, _ = chain.relative_by_index(start + rows, part[rows, col])
    near = (np.hypot(odo[:, 0], odo[:, 1]) <= options.near_distance_m) & (np.abs(odo[:, 2]) <= options.near_heading_rad)
    # A prediction just outside the region can still be the typical true
    # revisit: on the column hall at 50 deg/100 m the odometry put the last
    # keyframe 1.12 m from the first (truly 0.82 m) with a gate statistic of
    # 0.37, and the pair was never proposed.  Below the chi-square median
    # the pair fits "same place" better than half of all true revisits do.
    sure = near | (m2[rows, col] <= chi2_median())
    score[rows[sure], col[sure]] = m2[rows[sure], col[sure]] / options.gate_threshold


def _select(part, score, gated, options: CandidateOptions):
    """Greedy per-keyframe selection.

    ``part`` (K, L) partner positions (-1 = none), ``score`` (K, L) lower is
    better, ``gated`` (K, L) passes the proximity gate.  Returns the kept
    partners (K, max_per_keyframe), -1-padded, and their scores.
    """
    count = len(part)
    part = np.where(score <= options.max_score, part, -1)
    score = np.where(part >= 0, score, np.inf)
    order = np.argsort(score, axis=1, kind="stable")
    part = np.take_along_axis(part, order, 1)
    score = np.take_along_axis(score, order, 1)
    gated = np.take_along_axis(gated, order, 1)
    cap = options.max_per_keyframe
    chosen = np.full((count, cap), -1, dtype=np.int64)
    chosen_score = np.full((count, cap), np.inf)
    filled = np.zeros(count, dtype=np.int64)
    ungated = np.zeros(count, dtype=np.int64)
    rows = np.arange(count)
    w = options.suppress_keyframes
    # Greedy suppression, vectorised over keyframes: one pass per rank slot.
    for r in range(part.shape[1]):
        cand = part[:, r]
        near = (chosen >= 0) & (np.abs(chosen - cand[:, None]) <= w)
        ok = (cand >= 0) & (filled < cap) & ~near.any(axis=1)
        ok &= gated[:, r] | (ungated < options.max_ungated_per_keyframe)
        chosen[rows[ok], filled[ok]] = cand[ok]
        chosen_score[rows[ok], filled[ok]] = score[ok, r]
        filled += ok
        ungated += ok & ~gated[:, r]
    return chosen, chosen_score


def _near_covariance(options: CandidateOptions) -> np.ndarray:
    return np.diag([options.near_distance_m ** 2, options.near_distance_m ** 2, options.near_heading_rad ** 2])


def _pair_fields(src_pos, dst_pos, chain, desc, options):
    """Descriptor distance, gate statistic, odometry delta, yaw and guess of pairs (positions)."""
    h = options.yaw_hypotheses
    if len(src_pos) == 0:
        z = np.zeros(0)
        return z, z.copy(), np.zeros((0, 3)), np.zeros((0, h)), np.zeros((0, h)), np.zeros((0, 3))
    ddist = np.linalg.norm(desc.vectors[src_pos] - desc.vectors[dst_pos], axis=1)
    m2 = gate_distance_sq(chain, src_pos, dst_pos, options)
    odo, cov = chain.relative_by_index(src_pos, dst_pos)
    yaw, score = estimate_yaw_pairs(desc.sectors, src_pos, dst_pos, count=h)
    return ddist, m2, odo, yaw, score, _guess(odo, cov, yaw, m2 <= options.gate_threshold, options)


def _guess(odo, cov, yaw, gated, options):
    """Initial delta for registration (module docstring, "Guess").

    Inside the gate: the most probable delta given the "same place" prior
    N(0, N) and the odometry's N(delta, C), i.e. ``N (N + C)^-1 T``, which is
    the odometry delta when the chain is tight and shrinks towards the
    identity as drift grows; its heading is replaced by the nearest yaw
    hypothesis within ``near_heading_rad``.  Outside the gate: ``[0, 0,
    best yaw]``.
    """
    near = _near_covariance(options)
    post = (near @ np.linalg.solve(near + cov, odo[..., None]))[..., 0]
    diff = np.abs(se2.wrap(yaw - post[:, 2:3]))
    diff = np.where(np.isfinite(diff), diff, np.inf)
    k = np.argmin(diff, axis=1)
    rows = np.arange(len(odo))
    close = diff[rows, k] <= options.near_heading_rad
    post[close, 2] = yaw[rows[close], k[close]]
    guess = np.zeros_like(odo)
    guess[:, 2] = np.nan_to_num(yaw[:, 0], nan=0.0)
    guess[gated] = post[gated]
    return guess


def propose(t, travel, descriptors: ScanDescriptors, chain: OdometryChain,
            options: CandidateOptions = CandidateOptions()) -> CandidateSet:
    """Propose loop-closure candidates among keyframes.

    Parameters
    ----------
    t : (K,) keyframe times in seconds.
    travel : (K,) odometry path length at each keyframe (metres), e.g.
        ``keyframes.odometry_travel(log.odom)[0][keyframe_ids]``.
    descriptors : descriptors of the K keyframes, in keyframe order.
    chain : odometry chain over the same keyframes (its ``ids`` are the
        scan ids written into the result).
    options : thresholds.

    Returns
    -------
    CandidateSet with src the later and dst the earlier scan id of each
    pair, sorted by (src, dst).
    """
    t = np.asarray(t, dtype=float)
    travel = np.asarray(travel, dtype=float)
    count = len(chain)
    if not (len(t) == len(travel) == len(descriptors) == count):
        raise InputError(f"propose: got {len(t)} times, {len(travel)} travel values, "
                         f"{len(descriptors)} descriptors and {count} chain nodes; they must match")
    if count < 2:
        return empty_candidates(options.yaw_hypotheses)
    d_desc, idx_desc = descriptor_neighbours(search_space(descriptors.vectors, options), t, travel, options)
    _, idx_prox = proximity_neighbours(chain, t, travel, options)
    # Descriptor distances are scaled by the typical distance to the best
    # match, so the weighting does not depend on the descriptor's units.
    best = d_desc[:, 0][np.isfinite(d_desc[:, 0])] if d_desc.shape[1] else np.zeros(0)
    d_ref = float(np.median(best)) if len(best) and np.median(best) > 0 else 1.0
    chosen = np.full((count, options.max_per_keyframe), -1, dtype=np.int64)
    chosen_score = np.full(chosen.shape, np.inf)
    for start in range(0, count, options.block_keyframes):
        stop = min(start + options.block_keyframes, count)
        part = _union_rows(idx_desc[start:stop], idx_prox[start:stop])
        rows = np.broadcast_to(np.arange(start, stop)[:, None], part.shape)
        have = part >= 0
        m2 = np.full(part.shape, np.inf)
        dd = np.full(part.shape, np.inf)
        m2[have] = gate_distance_sq(chain, rows[have], part[have], options)
        dd[have] = np.linalg.norm(descriptors.vectors[rows[have]] - descriptors.vectors[part[have]], axis=1)
        score = rank_score(m2, dd / d_ref, options)
        if options.odometry_revisit_first:
            _odometry_revisit_first(score, m2, part, chain, start, options)
        chosen[start:stop], chosen_score[start:stop] = _select(part, score, m2 <= options.gate_threshold, options)
    q = np.broadcast_to(np.arange(count)[:, None], chosen.shape)
    keep = chosen >= 0
    a, b, s = q[keep], chosen[keep], chosen_score[keep]
    hi, lo = np.maximum(a, b), np.minimum(a, b)
    key = hi * count + lo
    uniq, first, inv = np.unique(key, return_index=True, return_inverse=True)
    best_score = np.full(len(uniq), np.inf)
    np.minimum.at(best_score, inv, s)
    hi, lo = hi[first], lo[first]
    # Source flags are properties of the pair, not of which keyframe kept it.
    desc_pairs = _pair_keys(idx_desc, count)
    flags = np.where(np.isin(uniq, desc_pairs), SOURCE_DESCRIPTOR, 0).astype(np.uint8)
    ddist, m2, odo, yaw, yscore, guess = _pair_fields(hi, lo, chain, descriptors, options)
    flags |= np.where(m2 <= options.gate_threshold, SOURCE_PROXIMITY, 0).astype(np.uint8)
    return CandidateSet(
        src=chain.ids[hi], dst=chain.ids[lo], sources=flags, descriptor_distance=ddist, gate_distance_sq=m2,
        odometry_delta=odo, yaw=yaw, yaw_score=yscore, guess=guess, score=best_score)


def _pair_keys(idx, count):
    rows = np.broadcast_to(np.arange(len(idx))[:, None], idx.shape)
    ok = idx >= 0
    a, b = rows[ok], idx[ok]
    return np.unique(np.maximum(a, b) * count + np.minimum(a, b))


def external_candidates(pairs: ExternalPairs, descriptors: ScanDescriptors, chain: OdometryChain,
                        options: CandidateOptions = CandidateOptions(), source: int = SOURCE_EXTERNAL) -> CandidateSet:
    """Candidates from an external pairs file, in the file's order and orientation.

    Every scan id of ``pairs`` must be a keyframe of ``chain`` (use
    :func:`closurecheck.frontend.keyframes.merge_keyframes` with ``pairs.scan_ids``
    before building the chain and the descriptors).  ``descriptors`` are in
    chain order.  The file's guess is used where given.  No exclusion gap
    or budget applies: every listed pair is a candidate.  ``source`` is the
    origin flag the pairs get (SOURCE_EXTERNAL, or SOURCE_REVIEW for the
    pairs of a reviewer's decisions).
    """
    try:
        a = chain.index_of(pairs.src)
        b = chain.index_of(pairs.dst)
    except ValueError as exc:
        raise InputError(f"external pairs: {exc}; merge the pairs' scan ids into the keyframes first") from None
    ddist, m2, odo, yaw, yscore, guess = _pair_fields(a, b, chain, descriptors, options)
    flags = (source | np.where(m2 <= options.gate_threshold, SOURCE_PROXIMITY, 0)).astype(np.uint8)
    given = np.isfinite(pairs.guess).all(axis=1)
    guess[given] = pairs.guess[given]
    return CandidateSet(
        src=pairs.src.copy(), dst=pairs.dst.copy(), sources=flags, descriptor_distance=ddist,
        gate_distance_sq=m2, odometry_delta=odo, yaw=yaw, yaw_score=yscore, guess=guess,
        score=np.full(len(a), np.inf))


def merge_candidates(*sets: CandidateSet) -> CandidateSet:
    """Union of candidate sets, one row per unordered pair.

    The first set naming a pair supplies its row (orientation, guess, ...);
    source flags (bitwise or) and score (minimum) combine over all sets.  Pass external candidates
    first so the file's orientation and guesses win.
    """
    sets = [s for s in sets if len(s)]
    if not sets:
        return empty_candidates()
    h = {s.yaw.shape[1] for s in sets}
    if len(h) != 1:
        raise ValueError("merge_candidates: all sets need the same number of yaw hypotheses")
    cat = CandidateSet(*(np.concatenate([getattr(s, f) for s in sets]) for f in _FIELDS))
    lo = np.minimum(cat.src, cat.dst)
    hi = np.maximum(cat.src, cat.dst)
    _, first, inv = np.unique(np.stack([lo, hi], 1), axis=0, return_index=True, return_inverse=True)
    inv = inv.reshape(-1)
    flags = np.zeros(len(first), dtype=np.uint8)
    np.bitwise_or.at(flags, inv, cat.sources)
    score = np.full(len(first), np.inf)
    np.minimum.at(score, inv, cat.score)
    # Rows in order of first appearance, so earlier sets keep their order.
    order = np.argsort(first, kind="stable")
    out = cat.take(first[order])
    return CandidateSet(**{**{f: getattr(out, f) for f in _FIELDS},
                           "sources": flags[order], "score": score[order]})


# --------------------------------------------------------------------------
# whole log


@dataclass(frozen=True, eq=False)
class KeyframeData:
    """Everything the candidate stage derives from a log for a keyframe set.

    ids : (K,) keyframe scan ids; t : (K,) seconds; travel : (K,) odometry
    path length (metres); descriptors : per keyframe; chain : odometry chain.
    """

    ids: np.ndarray
    t: np.ndarray
    travel: np.ndarray
    descriptors: ScanDescriptors
    chain: OdometryChain


def proposal_noise(log_noise: OdometryNoise) -> OdometryNoise:
    """Noise model of the proximity gate: at least the built-in defaults.

    A log's ``odometry_noise`` describes the random walk of its odometry;
    real odometry also drifts systematically (unequal wheels, a scale
    error), which the random walk does not cover.  Proposals must survive
    that drift, so the gate uses each coefficient's larger value of the
    log's model and :class:`OdometryNoise` defaults.  The verification
    stages use the log's model as is.
    """
    return log_noise.at_least(OdometryNoise())


def prepare(log, keyframe_ids, noise: OdometryNoise | None = None,
            descriptor_options: DescriptorOptions = DescriptorOptions(),
            chain: OdometryChain | None = None, descriptors: ScanDescriptors | None = None) -> KeyframeData:
    """Describe the keyframes of a :class:`closurecheck.io.scanlog.ScanLog`.

    ``chain`` is the keyframes' odometry the proximity gate uses (the
    pipeline passes the calibrated one); without it, the log's odometry with
    ``noise``, by default :func:`proposal_noise` of the model in the log's
    header.  ``descriptors``: the keyframes' descriptors when already made
    (``describe(log.ranges[keyframe_ids], log.sensor, descriptor_options)``;
    the pipeline makes them while the odometry is calibrated).
    """
    ids = np.asarray(keyframe_ids, dtype=np.int64)
    if chain is None:
        if noise is None:
            noise = proposal_noise(noise_from_header(log.header, log.source or None))
        chain = OdometryChain.build(log.odom, ids, noise)
    travel, _ = odometry_travel(log.odom)
    desc = describe(log.ranges[ids], log.sensor, descriptor_options) if descriptors is None else descriptors
    return KeyframeData(ids, np.asarray(log.t)[ids], travel[ids], desc, chain)


def propose_for(data: KeyframeData, options: CandidateOptions = CandidateOptions()) -> CandidateSet:
    """:func:`propose` on prepared keyframe data."""
    return propose(data.t, data.travel, data.descriptors, data.chain, options)
