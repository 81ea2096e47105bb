"""Keyframe selection: which scans become pose-graph nodes.

A scan becomes a keyframe when the odometry has travelled far enough, or
turned far enough, since the previous keyframe.  "Travelled" is the odometry
*path length* (sum of the lengths of the per-scan odometry steps) and
"turned" is the *accumulated absolute heading change* (sum of the absolute,
wrapped per-scan heading steps).  Both are monotone along the log, which is
why the next keyframe can be found by a binary search instead of a scan over
every row: the selection costs O(K log N) for K keyframes among N scans.

Using accumulated rather than net motion means a robot that drives 1 m
forward and back still gets keyframes (it has seen new things on the way),
and a robot turning on the spot gets a keyframe every ``turn_rad``.

Node ids are scan ids (the 0-based row of the scan in the log, contract
section 1), so the returned arrays hold scan ids, sorted and unique.  Scans
named by external candidate pairs that are not keyframes are added with
:func:`merge_keyframes`.
"""

from __future__ import annotations

import math

import numpy as np

from ..core.odometry import odometry_travel
from ..core.options import options, setting


@options
class KeyframeOptions:
    """Thresholds of keyframe selection.

    spacing_m : odometry path length (metres) since the last keyframe that
        makes a new keyframe.  0.5 m suits indoor robots with a 20 m range
        sensor: consecutive keyframes share almost all of their view (common
        practice).
    turn_rad : accumulated absolute heading change (radians) since the last
        keyframe that makes a new keyframe (default 20 degrees, common
        practice for 2D range sensors).
    """

    spacing_m: float = setting(0.5, above=0.0)
    turn_rad: float = setting(math.radians(20.0), above=0.0)


def select_keyframes(odom, options: KeyframeOptions = KeyframeOptions()) -> np.ndarray:
    """Scan ids of the keyframes of a log, from its odometry.

    Scan 0 is always a keyframe.  Scan k becomes the next keyframe after
    keyframe j when ``travel[k] - travel[j] >= options.spacing_m`` or
    ``rotation[k] - rotation[j] >= options.turn_rad`` (see
    :func:`closurecheck.core.odometry.odometry_travel`), whichever happens first.

    Parameters
    ----------
    odom : (N, 3) odometry poses.
    options : thresholds.

    Returns
    -------
    (K,) int64 array of scan ids, increasing.
    """
    odom = np.asarray(odom, dtype=float).reshape(-1, 3)
    n = len(odom)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    travel, rotation = odometry_travel(odom)
    ids = [0]
    last = 0
    while True:
        # First scan whose cumulative motion reaches the threshold; both
        # cumulative sums are non-decreasing, so searchsorted is exact.
        k_travel = np.searchsorted(travel, travel[last] + options.spacing_m, side="left")
        k_turn = np.searchsorted(rotation, rotation[last] + options.turn_rad, side="left")
        nxt = int(min(k_travel, k_turn))
        if nxt >= n:
            break
        nxt = max(nxt, last + 1)
        ids.append(nxt)
        last = nxt
    return np.asarray(ids, dtype=np.int64)


def merge_keyframes(keyframes, extra_ids) -> np.ndarray:
    """Union of keyframe scan ids and extra scan ids (e.g. from external pairs).

    The pose graph needs a node for every scan that an external candidate
    names, so such scans simply become keyframes too.  Returns a sorted
    unique int64 array; the odometry chain between keyframes is rebuilt from
    the merged set, so an inserted scan splits one odometry step in two.
    """
    merged = np.union1d(np.asarray(keyframes, dtype=np.int64).reshape(-1),
                        np.asarray(extra_ids, dtype=np.int64).reshape(-1))
    return merged.astype(np.int64)
