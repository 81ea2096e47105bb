"""Compiled comparison of one scan's points against another's beams (:func:`against`) and
free_space.check_free_space's loop over all pairs (:func:`pairs_against`); numba, cached on disk.

Why compiled code here: the free-space check compares each keyframe with a
few of other visits, in both directions (2,548 pairs, 5,096 comparisons of
about 670 points a pass on the 5,000-scan warehouse log), in the main
process while a core idles.  As a dozen numpy calls on (M,) arrays per
comparison it took 182-190 us a comparison, most of it call overhead; one
loop per comparison takes 43-44 us (measured side by side, 199
comparisons, quiet machine), most of it the arctangent and the hypotenuse
of each point.

Each expression is the numpy version's, per point, in the same order of
operations (the cosine and sine of the pose come from numpy); only the two sums run point by point
instead of numpy's pairwise order, so the surface lengths may differ from
the numpy version's in the last bits.

Why the loop over pairs is compiled too (:func:`pairs_against`): called
from Python once per comparison, with each keyframe's points rebuilt in
numpy and the relative pose and its inverse computed by se2 on single
poses, the Python side cost about twice the comparisons themselves
(1.31-1.38 s against 3.1-3.5 s for one check of the 20,000-scan log's
final map, 11,945 pairs; figures in free_space.check_free_space).  In
:func:`pairs_against` the check's results are the per-pair loop's to the
bit (same comparison, same points, poses and cosines computed by numpy
beforehand).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


_TWO_PI = 2.0 * np.pi


@njit(cache=True, nogil=True)
def against(points_b, x, y, c, s, ranges_a, first_angle, angle_step, beams, max_range, margin_m, margin_per_m,
            min_run):
    """(contradicting, judged) surface in metres of b's points under the pose (x, y, cos, sin) against a's ranges.

    points_b : (M, 2) float64, b's sensor frame, in beam order.
    ranges_a : (beams,) float32 ranges of a (NaN where no return).
    A point is judged when its beam and the two beside it have returns,
    and contradicts when it lies closer than all three by more than
    ``margin_m + margin_per_m * range``; contradicting points count only in
    runs of at least ``min_run`` consecutive points.  Each point stands
    for ``range * |angle_step|`` metres of surface.
    """
    m = points_b.shape[0]
    step = abs(angle_step)
    judged = 0.0
    bad_total = 0.0
    run = 0
    run_arc = 0.0
    for i in range(m):
        px = c * points_b[i, 0] - s * points_b[i, 1] + x
        py = s * points_b[i, 0] + c * points_b[i, 1] + y
        rho = math.hypot(px, py)
        phi = math.atan2(py, px)
        # numba's np.mod is numpy's floating remainder; round() goes half to even, as np.rint.
        beam = round(np.mod(phi - first_angle, _TWO_PI) / angle_step)
        bad = False
        if beam >= 1 and beam < beams - 1 and rho <= max_range:
            k = beam
            r0 = np.float64(ranges_a[k - 1])
            r1 = np.float64(ranges_a[k])
            r2 = np.float64(ranges_a[k + 1])
            if math.isfinite(r0) and math.isfinite(r1) and math.isfinite(r2):
                arc = rho * step
                judged += arc
                closest = min(r0, r1, r2)
                if rho < closest - (margin_m + margin_per_m * rho):
                    bad = True
                    run += 1
                    run_arc += arc
        if not bad:
            if run >= min_run:
                bad_total += run_arc
            run = 0
            run_arc = 0.0
    if run >= min_run:
        bad_total += run_arc
    return bad_total, judged


@njit(cache=True, nogil=True)
def _scan_points(out, ranges_k, cos_b, sin_b, min_range, max_range):
    """Fill out[:m] with keyframe k's (M, 2) points in its sensor frame and return m.

    free_space.KeyframeScans.points per beam: the float32 range widened to
    float64 times the cosine and sine of the bearing (numpy's, passed in), so
    the same bits.
    """
    m = 0
    for k in range(ranges_k.shape[0]):
        r = np.float64(ranges_k[k])
        if math.isfinite(r) and r >= min_range and r <= max_range:
            out[m, 0] = r * cos_b[k]
            out[m, 1] = r * sin_b[k]
            m += 1
    return m


@njit(cache=True, nogil=True)
def pairs_against(a, b, ranges, cos_b, sin_b, min_range, max_range, rel, cs_rel, inv, cs_inv, first_angle,
                  angle_step, beams, margin_m, margin_per_m, min_run, share, length, judged):
    """Both directions of every keyframe pair (a[n], b[n]): fill share, length and judged (P,).

    ranges : (K, beams) float32, the keyframes' ranges.
    cos_b, sin_b : (beams,) float64 cosine and sine of the bearings.
    rel, cs_rel : (P, 3) poses of b in a's sensor frame and (P, 2) cosine
        and sine of their headings; inv, cs_inv : the same of a in b's frame.
    Per pair as free_space.check_free_space's per-pair loop was: b's points
    against a's beams under rel, a's points against b's beams under inv,
    the two summed and the larger share kept.  A keyframe's points are
    rebuilt for each comparison (a few hundred products, next to the
    arctangent and hypotenuse of each point): a table of every keyframe's
    points would hold 354 MB on the 100,000-scan log (33,333 keyframes of
    721 beams, 92% with a return).
    """
    points = np.empty((ranges.shape[1], 2))
    for n in range(a.shape[0]):
        i = a[n]
        j = b[n]
        m = _scan_points(points, ranges[j], cos_b, sin_b, min_range, max_range)
        bad_b, seen_b = against(points[:m], rel[n, 0], rel[n, 1], cs_rel[n, 0], cs_rel[n, 1], ranges[i],
                                first_angle, angle_step, beams, max_range, margin_m, margin_per_m, min_run)
        m = _scan_points(points, ranges[i], cos_b, sin_b, min_range, max_range)
        bad_a, seen_a = against(points[:m], inv[n, 0], inv[n, 1], cs_inv[n, 0], cs_inv[n, 1], ranges[j],
                                first_angle, angle_step, beams, max_range, margin_m, margin_per_m, min_run)
        judged[n] = seen_a + seen_b
        length[n] = bad_a + bad_b
        # Python's max(x, y) keeps x unless y is larger; the same choices here.
        q_b = bad_b / (1e-9 if 1e-9 > seen_b else seen_b)
        q_a = bad_a / (1e-9 if 1e-9 > seen_a else seen_a)
        share[n] = q_a if q_a > q_b else q_b
