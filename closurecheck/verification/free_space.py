"""The scans must not contradict each other: surfaces of one visit in the free space of another.

A range beam says two things: there is a surface at its range, and there is
none before it.  Once the map is optimised, two keyframes from different
visits of one place see the same walls, so every surface point of one scan
must lie at or beyond the other scan's beam in that direction, never in
front of it.  A wrong loop closure misplaces one visit against the other,
and its walls then cross the space the other visit saw through.  This check
needs no ground truth: only the scans and the optimised poses.

For a keyframe pair (a, b) the points of b are placed in a's sensor frame
and each is compared with a's beam in its direction and the two beside it:
the point contradicts a when it lies closer than all three returns by more
than ``margin_m + margin_per_m * range`` (pose error after optimisation,
beam width and grazing walls).  Beams without a return say nothing (a
dropout is not free space).  The pair's figure is the larger of the two
directions' shares of contradicting points among the points that fell on a
beam with a return.  A person or cart that moved between the visits also
contradicts, but only in a few points; a misplaced visit contradicts along
whole walls.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse
import scipy.sparse.csgraph
import scipy.spatial

from ..core import se2
from ..core.options import options, setting
from ..io.scanlog import Sensor
from . import _free_space_kernels as _kernels


@options
class FreeSpaceOptions:
    """Which keyframe pairs are compared, and when a pair contradicts.

    max_distance_m : pairs of keyframes closer than this in the optimised
        map are compared.
    max_heading_rad : ... whose headings differ by less than this (their
        views overlap).
    min_gap_m : ... and whose odometry path lengths differ by more than this
        (different visits, not consecutive views).
    pairs_per_keyframe : nearest other-visit keyframes compared per keyframe.
    margin_m, margin_per_m : a point contradicts a beam when it lies closer
        than the beam's return by more than ``margin_m + margin_per_m * range``.
    min_run : contradicting points count only in runs of at least this many
        consecutive points.
    min_judged_m : a pair is judged only when at least this much surface fell
        on beams with a return, both directions together (metres).
    min_length_m, max_share : a pair contradicts when at least this much
        surface and more than this share of it contradicts.
    """

    max_distance_m: float = setting(2.0, above=0.0)
    max_heading_rad: float = setting(1.0, above=0.0)
    min_gap_m: float = setting(5.0, at_least=0.0)
    pairs_per_keyframe: int = setting(3, at_least=1)
    margin_m: float = setting(0.25, above=0.0)
    margin_per_m: float = setting(0.02, at_least=0.0)
    min_run: int = setting(5, at_least=1)
    min_judged_m: float = setting(5.0, above=0.0)
    min_length_m: float = setting(3.0, above=0.0)
    max_share: float = setting(0.2, above=0.0, below=1.0)


@dataclass(frozen=True, eq=False)
class KeyframeScans:
    """The keyframes' scans as the check reads them.

    ranges : (K, beams) float32 metres, NaN where no return.
    sensor : the beam geometry (and mount) of the log.
    """

    ranges: np.ndarray
    sensor: Sensor

    def points(self, k: int) -> np.ndarray:
        """(M, 2) points of keyframe k in its sensor frame (metres).

        :func:`check_free_space` rebuilds the same points, to the bit, in its
        compiled loop (``_free_space_kernels._scan_points``): a change here
        must be made there too (tests/verification/test_free_space.py
        compares the two through the check).
        """
        r = self.ranges[k].astype(np.float64)
        ok = np.isfinite(r) & (r >= self.sensor.min_range) & (r <= self.sensor.max_range)
        b = self.sensor.bearings()[ok]
        return np.column_stack([r[ok] * np.cos(b), r[ok] * np.sin(b)])


@dataclass(frozen=True, eq=False)
class FreeSpaceCheck:
    """Contradiction figures of the compared keyframe pairs.

    a, b : (P,) keyframe positions (a < b).
    share : (P,) the larger of the two directions' contradicting shares of
        judged surface.
    length_m : (P,) contradicting surface, both directions (metres).
    judged_m : (P,) surface that fell on beams with a return (metres).
    contradicts : (P,) bool.
    """

    a: np.ndarray
    b: np.ndarray
    share: np.ndarray
    length_m: np.ndarray
    judged_m: np.ndarray
    contradicts: np.ndarray

    @property
    def count(self) -> int:
        return int(self.contradicts.sum())


def _sensor_poses(poses, sensor: Sensor):
    mount = np.asarray(sensor.mount, dtype=float)
    return se2.compose(poses, mount) if np.any(mount) else np.asarray(poses, dtype=float)


def compared_pairs(poses, travel, options: FreeSpaceOptions = FreeSpaceOptions()) -> tuple[np.ndarray, np.ndarray]:
    """Keyframe pairs (a < b) of different visits that overlap in the map.

    ``poses`` (K, 3) optimised keyframe poses; ``travel`` (K,) odometry path
    length (m).  Each keyframe is paired with at most ``pairs_per_keyframe``
    nearest keyframes of other visits within ``max_distance_m`` and
    ``max_heading_rad``.
    """
    poses = np.asarray(poses, dtype=float)
    k = len(poses)
    if k < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    tree = scipy.spatial.cKDTree(poses[:, :2])
    # Enough neighbours to find a few of other visits past the consecutive ones.
    want = min(k, 16 + 2 * options.pairs_per_keyframe)
    dist, idx = tree.query(poses[:, :2], k=want, distance_upper_bound=options.max_distance_m)
    rows = np.repeat(np.arange(k), want)
    cols = idx.ravel()
    ok = cols < k
    rows, cols, dist = rows[ok], cols[ok], dist.ravel()[ok]
    ok = (np.abs(travel[rows] - travel[cols]) > options.min_gap_m) & \
        (np.abs(se2.wrap(poses[rows, 2] - poses[cols, 2])) < options.max_heading_rad)
    rows, cols, dist = rows[ok], cols[ok], dist[ok]
    # The nearest few per keyframe (query results come sorted by distance).
    first = np.r_[0, np.flatnonzero(np.diff(rows)) + 1]
    rank = np.arange(len(rows)) - np.repeat(first, np.diff(np.r_[first, len(rows)]))
    keep = rank < options.pairs_per_keyframe
    a, b = np.minimum(rows[keep], cols[keep]), np.maximum(rows[keep], cols[keep])
    pairs = np.unique(a * k + b)
    return (pairs // k).astype(np.int64), (pairs % k).astype(np.int64)


def check_free_space(poses, travel, scans: KeyframeScans, options: FreeSpaceOptions = FreeSpaceOptions(),
                     pairs=None) -> FreeSpaceCheck:
    """Compare overlapping keyframes of different visits for scans that contradict each other.

    Parameters
    ----------
    poses : (K, 3) optimised keyframe poses (robot frames, one map frame).
    travel : (K,) odometry path length of each keyframe (m).
    scans : the keyframes' ranges and the sensor.
    options : :class:`FreeSpaceOptions`.
    pairs : optional (a, b) integer arrays (P,) of keyframe positions to
        compare instead of :func:`compared_pairs`.

    Returns
    -------
    FreeSpaceCheck
        The figures of each compared pair (a < b), in the order of ``pairs``
        or of :func:`compared_pairs`.

    Examples
    --------
    Two keyframes facing a wall 5 m ahead; the second is placed 2 m short of
    where it was, so 3.4 m of its wall lies in the first's free space:

    >>> import numpy as np
    >>> from closurecheck.io.scanlog import Sensor
    >>> sensor = Sensor(first_angle=-0.75, angle_step=0.015, beams=101, min_range=0.05, max_range=20.0)
    >>> ranges = np.tile((5.0 / np.cos(sensor.bearings())).astype(np.float32), (2, 1))
    >>> poses = np.array([[0.0, 0.0, 0.0], [-2.0, 0.0, 0.0]])
    >>> check = check_free_space(poses, np.array([0.0, 50.0]), KeyframeScans(ranges, sensor),
    ...                          pairs=(np.array([0]), np.array([1])))
    >>> bool(check.contradicts[0]), round(float(check.share[0]), 2)
    (True, 1.0)
    """
    poses = _sensor_poses(np.asarray(poses, dtype=float), scans.sensor)
    a, b = compared_pairs(poses, np.asarray(travel, float), options) if pairs is None else pairs
    a, b = np.asarray(a, np.int64), np.asarray(b, np.int64)
    share = np.zeros(len(a))
    length = np.zeros(len(a))
    judged = np.zeros(len(a))
    if len(a):
        # All pairs in one compiled loop (_free_space_kernels.pairs_against), with the relative poses, their
        # inverses and the cosines and sines vectorised before it.  The per-pair Python loop spent most of
        # its time rebuilding each keyframe's points and in se2.between / se2.inverse's per-call overhead
        # on single poses (8.8 of 11.3 s on the 100,000-scan log's verification, profiled); CPU time of one
        # check, 5 runs alternated on a loaded machine (load 2.5-3.5): 20,000-scan log's final map (11,945
        # pairs) 3.1-3.5 -> 1.31-1.38 s; 100,000-scan log under odometry poses (61,339 pairs) 13.6-15.5 ->
        # 6.4-7.3 s (3 runs), what is left being the comparisons themselves, about 52 us each.
        # Every value is the per-pair loop's bits: the same numpy functions on the same float64 inputs (the
        # vectorised se2.between / se2.inverse / np.cos / np.sin gave the one-element calls' bits on all
        # 11,945 pairs, and np.cos / np.sin on 270,000 random angles, on this AVX2 machine without AVX-512),
        # the same products in the kernel (tests/verification/test_free_space.py compares with the loop).
        sensor = scans.sensor
        rel = se2.between(poses[a], poses[b])
        inv = se2.inverse(rel)
        cs_rel = np.column_stack([np.cos(rel[:, 2]), np.sin(rel[:, 2])])
        cs_inv = np.column_stack([np.cos(inv[:, 2]), np.sin(inv[:, 2])])
        bearings = sensor.bearings()
        _kernels.pairs_against(a, b, np.ascontiguousarray(scans.ranges), np.cos(bearings), np.sin(bearings),
                               float(sensor.min_range), float(sensor.max_range), rel, cs_rel, inv, cs_inv,
                               float(sensor.first_angle), float(sensor.angle_step), int(sensor.beams),
                               float(options.margin_m), float(options.margin_per_m), int(options.min_run),
                               share, length, judged)
    contradicts = (judged >= options.min_judged_m) & (length >= options.min_length_m) & (share > options.max_share)
    return FreeSpaceCheck(a=a, b=b, share=share, length_m=length,
                          judged_m=judged, contradicts=contradicts)


def closure_groups(src, dst, window: int) -> np.ndarray:
    """Group labels (K,) of closures between two stretches of the chain: one revisit event each.

    Two closures are in one group when both their ends lie within ``window``
    chain positions of each other (either orientation); groups are the
    connected components of that relation.
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    k = len(src)
    if k == 0:
        return np.zeros(0, np.int64)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    pts = np.column_stack([lo, hi]).astype(float)
    pairs = scipy.spatial.cKDTree(pts).query_pairs(window, p=np.inf, output_type="ndarray")
    graph = scipy.sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(k, k)) \
        if len(pairs) else scipy.sparse.coo_matrix((k, k))
    _, labels = scipy.sparse.csgraph.connected_components(graph, directed=False)
    return labels.astype(np.int64)


def blame(check: FreeSpaceCheck, src, dst, groups, window: int) -> np.ndarray:
    """For each group label, how many of its closures end near a contradicting pair: (G,) counts.

    A closure is near a contradicting pair (a, b) when one of its ends lies
    within ``window`` chain positions of a or of b: it is among the closures
    that placed those stretches in the map.  (The closure at fault need not
    join a to b: a wrong closure that moves a's stretch also makes a
    contradict every other visit of the place.)
    """
    n_groups = int(groups.max()) + 1 if len(groups) else 0
    out = np.zeros(n_groups, dtype=np.int64)
    bad = np.flatnonzero(check.contradicts)
    if not len(bad) or not n_groups:
        return out
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    a, b = check.a[bad], check.b[bad]
    ends = np.sort(np.concatenate([a, b]))

    def near(x):
        # Some end within [x - window, x + window]: sorted ends and two
        # searches, O((K + B) log B) instead of a K x B matrix.
        return np.searchsorted(ends, x + window, side="right") > np.searchsorted(ends, x - window, side="left")

    links = near(lo) | near(hi)
    np.add.at(out, groups[links], 1)
    return out
