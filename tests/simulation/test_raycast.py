"""Ray casting against closed-form plane geometry and an independent per-ray loop."""

import math

import numpy as np
import pytest

from closurecheck.errors import InputError
from closurecheck.simulation.raycast import CastOptions, cast, cast_per_pose


def _square(half):
    h = half
    return np.array([[-h, -h, h, -h], [h, -h, h, h], [h, h, -h, h], [-h, h, -h, -h]], float)


def _ray_segment(px, py, ang, seg):
    """Intersection distance by plain float math (Cramer's rule on p + t d = a + u (b - a))."""
    dx, dy = math.cos(ang), math.sin(ang)
    x0, y0, x1, y1 = seg
    ex, ey = x1 - x0, y1 - y0
    den = dx * ey - dy * ex
    if den == 0.0:
        return math.inf
    wx, wy = x0 - px, y0 - py
    t = (wx * ey - wy * ex) / den
    u = (wx * dy - wy * dx) / den
    return t if t >= 0.0 and 0.0 <= u <= 1.0 else math.inf


def _ray_circle(px, py, ang, circ):
    """Smallest t >= 0 with |p + t d - c| = r, from the quadratic formula."""
    cx, cy, r = circ
    dx, dy = math.cos(ang), math.sin(ang)
    wx, wy = px - cx, py - cy
    b = wx * dx + wy * dy
    c = wx * wx + wy * wy - r * r
    disc = b * b - c
    if disc < 0.0:
        return math.inf
    roots = sorted((-b - math.sqrt(disc), -b + math.sqrt(disc)))
    for t in roots:
        if t >= 0.0:
            return t
    return math.inf


def _brute(poses, bearings, segments, circles, max_range):
    out = np.full((len(poses), len(bearings)), math.inf)
    for i, (x, y, th) in enumerate(poses):
        for k, bb in enumerate(bearings):
            best = math.inf
            for s in segments:
                best = min(best, _ray_segment(x, y, th + bb, s))
            for c in circles:
                best = min(best, _ray_circle(x, y, th + bb, c))
            out[i, k] = best if best <= max_range else math.inf
    return out


def test_centre_of_square_room_matches_half_width_over_cosine():
    # Plane geometry: from the centre of a square of half-width h, the wall
    # faced by a beam at angle phi within 45 degrees of its normal lies at h / |cos(phi)|.
    h = 3.0
    bearings = np.linspace(-np.pi / 4 + 1e-3, np.pi / 4 - 1e-3, 41)
    for theta in (0.0, np.pi / 2, np.pi, -np.pi / 2, 0.3):
        got = cast([0.0, 0.0, theta], bearings, _square(h))
        # the nearest wall normal relative to the beam's world direction
        world = theta + bearings
        rel = (world + np.pi / 4) % (np.pi / 2) - np.pi / 4
        np.testing.assert_allclose(got, h / np.abs(np.cos(rel)), rtol=1e-12)


def test_full_circle_of_beams_in_square_room_all_hit_within_corner_distance():
    h = 2.5
    bearings = np.linspace(-np.pi, np.pi, 360, endpoint=False)
    got = cast([0.4, -0.7, 0.1], bearings, _square(h))
    assert np.isfinite(got).all()
    # no beam escapes through a corner: farthest reachable point is a corner
    corners = np.array([[h, h], [h, -h], [-h, h], [-h, -h]])
    assert got.max() <= np.hypot(*(corners - [0.4, -0.7]).T).max() + 1e-9
    assert got.min() >= h - 0.7 - 1e-9


@pytest.mark.parametrize("d,r", [(5.0, 0.5), (1.2, 1.0), (10.0, 0.05)])
def test_circle_straight_ahead_hits_at_distance_minus_radius(d, r):
    # Plane geometry: the near point of a circle centred on the ray is d - r away.
    theta = 0.7
    pose = [1.0, 2.0, theta]
    centre = [1.0 + d * math.cos(theta), 2.0 + d * math.sin(theta), r]
    got = cast(pose, [0.0], np.zeros((0, 4)), [centre])
    assert got[0] == pytest.approx(d - r, rel=1e-12)


def test_circle_tangent_and_offset_beams():
    # A beam at bearing phi from a circle of radius r at distance d passes at
    # perpendicular distance d sin(phi); it hits iff d sin(phi) <= r, at d cos(phi) - sqrt(r^2 - (d sin phi)^2).
    d, r = 4.0, 1.0
    phis = np.array([0.1, 0.2, 0.25, 0.3, -0.2])
    got = cast([0.0, 0.0, 0.0], phis, None, [[d, 0.0, r]])
    off = d * np.sin(np.abs(phis))
    want = np.where(off <= r, d * np.cos(phis) - np.sqrt(np.clip(r * r - off ** 2, 0, None)), np.inf)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    assert np.isinf(got[3])  # asin(1/4) = 0.2527 < 0.3: passes by


def test_sensor_inside_circle_sees_its_wall():
    got = cast([0.0, 0.0, 0.0], [0.0, 1.0, 2.5], None, [[0.0, 0.0, 2.0]])
    np.testing.assert_allclose(got, 2.0, rtol=1e-12)


def test_parallel_rays_miss_a_segment():
    seg = np.array([[1.0, 0.0, 5.0, 0.0]])       # along the x axis
    # a ray along the same line and one parallel beside it both miss
    got = cast(np.array([[0.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, -1.0, np.pi]]), [0.0], seg)
    assert np.isinf(got).all()


def test_segment_behind_or_beside_is_missed_and_endpoints_hit():
    seg = np.array([[2.0, -1.0, 2.0, 1.0]])
    got = cast([0.0, 0.0, 0.0], [0.0, np.pi, math.atan2(1.0, 2.0), math.atan2(1.01, 2.0)], seg)
    assert got[0] == pytest.approx(2.0)
    assert np.isinf(got[1])
    assert got[2] == pytest.approx(math.hypot(2.0, 1.0))
    assert np.isinf(got[3])
    # a micrometre either side of the end point at (2, 1): just inside hits, just outside misses
    edge = cast([0.0, 0.0, 0.0], [math.atan2(1.0 - 1e-6, 2.0), math.atan2(1.0 + 1e-6, 2.0)], seg)
    assert edge[0] == pytest.approx(math.hypot(2.0, 1.0 - 1e-6)) and np.isinf(edge[1])
    ring = cast([0.0, 0.0, 0.0], [math.asin(0.5) - 1e-7, math.asin(0.5) + 1e-7], None, [[2.0, 0.0, 1.0]])
    assert np.isfinite(ring[0]) and np.isinf(ring[1])  # tangent at asin(r / d)


def test_hits_beyond_max_range_are_inf():
    seg = np.array([[3.0, -1.0, 3.0, 1.0], [7.0, -10.0, 7.0, 10.0]])
    bearings = np.array([0.0, 0.5])
    got = cast([0.0, 0.0, 0.0], bearings, seg, max_range=5.0)
    assert got[0] == pytest.approx(3.0)
    assert np.isinf(got[1])  # would hit x=7 at 7/cos(0.5) = 7.98 m
    assert cast([0.0, 0.0, 0.0], bearings, seg)[1] == pytest.approx(7.0 / math.cos(0.5))


def test_nearest_of_several_shapes_wins():
    seg = np.array([[5.0, -1.0, 5.0, 1.0], [3.0, -1.0, 3.0, 1.0]])
    got = cast([0.0, 0.0, 0.0], [0.0], seg, [[2.0, 0.0, 0.5]])
    assert got[0] == pytest.approx(1.5)


def _random_scene(rng, n_seg=25, n_circ=6, extent=12.0):
    a = rng.uniform(-extent, extent, size=(n_seg, 2))
    b = a + rng.normal(scale=3.0, size=(n_seg, 2))
    segs = np.hstack([a, b])
    circ = np.column_stack([rng.uniform(-extent, extent, size=(n_circ, 2)), rng.uniform(0.1, 1.0, n_circ)])
    return segs, circ


@pytest.mark.parametrize("max_range", [np.inf, 8.0])
def test_matches_brute_force_loop_on_random_scenes(max_range):
    rng = np.random.default_rng(3)
    segs, circ = _random_scene(rng)
    poses = np.column_stack([rng.uniform(-14, 14, size=(30, 2)), rng.uniform(-np.pi, np.pi, 30)])
    bearings = np.linspace(-3 * np.pi / 4, 3 * np.pi / 4, 37)
    want = _brute(poses, bearings, segs, circ, max_range)
    # tiny chunks exercise the batching and the per-chunk culling
    got = cast(poses, bearings, segs, circ, max_range=max_range,
               options=CastOptions(poses_per_chunk=7, chunk_elements=500))
    assert got.shape == (30, 37) and got.dtype == np.float64
    np.testing.assert_array_equal(np.isinf(got), np.isinf(want))
    fin = np.isfinite(want)
    np.testing.assert_allclose(got[fin], want[fin], rtol=1e-9, atol=1e-9)
    assert fin.mean() > 0.3  # the scene is not mostly empty, so the comparison means something


def test_culling_does_not_change_results_along_a_long_route():
    rng = np.random.default_rng(5)
    segs, circ = _random_scene(rng, n_seg=60, n_circ=10, extent=40.0)
    xs = np.linspace(-40, 40, 200)
    poses = np.column_stack([xs, 3 * np.sin(xs / 5), np.linspace(-3, 3, 200)])
    bearings = np.linspace(-np.pi, np.pi, 90, endpoint=False)
    culled = cast(poses, bearings, segs, circ, max_range=10.0,
                  options=CastOptions(poses_per_chunk=5, chunk_elements=2_000))
    full = cast(poses, bearings, segs, circ)
    full[full > 10.0] = np.inf
    np.testing.assert_array_equal(culled, full)


def test_cast_per_pose_uses_each_poses_own_shapes():
    rng = np.random.default_rng(11)
    poses = np.column_stack([rng.uniform(-3, 3, size=(12, 2)), rng.uniform(-np.pi, np.pi, 12)])
    bearings = np.linspace(-np.pi, np.pi, 24, endpoint=False)
    segs = np.stack([_random_scene(rng, n_seg=3, n_circ=0, extent=5.0)[0] for _ in range(12)])
    circs = np.stack([_random_scene(rng, n_seg=0, n_circ=2, extent=5.0)[1] for _ in range(12)])
    got = cast_per_pose(poses, bearings, segs, circs, options=CastOptions(poses_per_chunk=5, chunk_elements=100))
    for i in range(12):
        np.testing.assert_array_equal(got[i], cast(poses[i], bearings, segs[i], circs[i]))


def test_single_pose_returns_one_row_and_bad_shapes_raise():
    assert cast([0.0, 0.0, 0.0], [0.0, 0.1], _square(1.0)).shape == (2,)
    with pytest.raises(InputError):
        cast(np.zeros((4, 2)), [0.0], _square(1.0))
    with pytest.raises(InputError):
        cast([0.0, 0.0, 0.0], [0.0], np.zeros((3, 3)))
    with pytest.raises(InputError):
        cast([0.0, 0.0, 0.0], [0.0], _square(1.0), max_range=0.0)
    with pytest.raises(InputError):
        cast([0.0, np.nan, 0.0], [0.0], _square(1.0))


def test_beams_aimed_exactly_at_room_corners_hit_the_corner():
    # From the centre of a square of half-width h the corners lie at h * sqrt(2) on the diagonals.
    h = 2.0
    got = cast([0.0, 0.0, 0.0], np.array([-3, -1, 1, 3]) * np.pi / 4, _square(h))
    np.testing.assert_allclose(got, h * np.sqrt(2.0), rtol=1e-12)


def test_any_bearing_layout_gives_the_same_ranges():
    # Bearings may be unsorted, beyond +-pi or a full turn; each beam's range depends only on its direction.
    rng = np.random.default_rng(21)
    segs, circ = _random_scene(rng, n_seg=15, n_circ=4, extent=6.0)
    poses = np.column_stack([rng.uniform(-5, 5, size=(8, 2)), rng.uniform(-np.pi, np.pi, 8)])
    bearings = rng.uniform(-np.pi, np.pi, 50)
    ref = cast(poses, bearings, segs, circ)
    np.testing.assert_allclose(cast(poses, bearings + 2 * np.pi, segs, circ), ref, rtol=1e-9)
    np.testing.assert_allclose(cast(poses, bearings - 4 * np.pi, segs, circ), ref, rtol=1e-9)
    perm = rng.permutation(50)
    np.testing.assert_array_equal(cast(poses, bearings[perm], segs, circ), ref[:, perm])
    full = np.linspace(0.0, 2 * np.pi, 73)  # first and last beam point the same way
    both = cast(poses, full, segs, circ)
    np.testing.assert_allclose(both[:, 0], both[:, -1], rtol=1e-9)
    np.testing.assert_array_equal(np.isinf(both), np.isinf(_brute(poses, full, segs, circ, np.inf)))


def test_chunk_sizes_do_not_change_results():
    rng = np.random.default_rng(8)
    segs, circ = _random_scene(rng, n_seg=40, n_circ=8, extent=15.0)
    poses = np.column_stack([rng.uniform(-15, 15, size=(40, 2)), rng.uniform(-np.pi, np.pi, 40)])
    bearings = np.linspace(-3 * np.pi / 4, 3 * np.pi / 4, 181)
    a = cast(poses, bearings, segs, circ, max_range=12.0)
    b = cast(poses, bearings, segs, circ, max_range=12.0, options=CastOptions(poses_per_chunk=1, chunk_elements=1))
    np.testing.assert_array_equal(a, b)
