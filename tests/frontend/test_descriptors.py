"""Rotation-invariant scan descriptors and yaw estimates, on an invented room."""

import math

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.frontend.descriptors import (
    DescriptorOptions,
    correlate_signatures,
    describe,
    estimate_yaw,
    estimate_yaw_pairs,
)
from closurecheck.io.scanlog import Sensor
from closurecheck.simulation import raycast

# An invented 10 m x 6 m storeroom with a few crates, a shelf and two posts.
ROOM = np.array([[0, 0, 10, 0], [10, 0, 10, 6], [10, 6, 0, 6], [0, 6, 0, 0],
                 [3, 2, 4, 2], [4, 2, 4, 3], [6, 4, 8, 4.5], [2, 5, 2, 6]], float)
POSTS = np.array([[7, 1.5, 0.4], [1.5, 3.5, 0.3]])
FULL = Sensor(-math.pi, 2 * math.pi / 720, 720, 0.05, 20.0)
PARTIAL = Sensor(-2.356, 0.00654, 721, 0.05, 20.0)  # 270-degree field of view


def scans(poses, sensor, segments=ROOM, circles=POSTS):
    r = raycast.cast(np.atleast_2d(poses), sensor.bearings(), segments, circles, max_range=sensor.max_range)
    r[~np.isfinite(r)] = np.nan
    return r


def test_exact_invariance_for_rotations_by_whole_beam_steps():
    # Rotating a uniform full-circle sensor by k beam steps only renumbers its
    # beams, so any rotation-invariant descriptor must not change at all.
    k = np.array([0, 1, 37, 360, 719])
    poses = np.column_stack([np.full(5, 5.0), np.full(5, 3.0), se2.wrap(0.2 + k * FULL.angle_step)])
    v = describe(scans(poses, FULL), FULL).vectors
    np.testing.assert_allclose(v, np.repeat(v[:1], 5, axis=0), rtol=1e-9, atol=1e-12)


def test_any_rotation_keeps_the_descriptor_of_a_full_circle_scan():
    rng = np.random.default_rng(1)
    angles = rng.uniform(-math.pi, math.pi, 16)
    here = describe(scans(np.column_stack([np.full(16, 5.0), np.full(16, 3.0), angles]), FULL), FULL).vectors
    elsewhere = describe(scans(np.array([[5.5, 3.0, 0.0], [5.0, 3.5, 0.0], [7.0, 2.5, 1.0]]), FULL), FULL).vectors
    spread = np.linalg.norm(here - here[0], axis=1).max()
    gap = np.linalg.norm(elsewhere - here[0], axis=1).min()
    # Beam sampling alone changes the descriptor; it must stay far below the
    # change caused by moving half a metre.
    assert spread < 0.05 * gap
    assert spread < 0.01 * np.linalg.norm(here[0])


def test_dropouts_and_a_passer_by_still_retrieve_the_right_place():
    # Reference places every 0.5 m over the room; an altered scan must still
    # be nearest to its own place (or a neighbour at most 0.5 m away).
    gx, gy = np.meshgrid(np.arange(0.5, 10, 0.5), np.arange(0.5, 6, 0.5))
    grid = np.column_stack([gx.ravel(), gy.ravel(), np.full(gx.size, 0.3)])
    free = np.nanmin(scans(grid, FULL), axis=1) > 0.4  # clear of walls and obstacles
    grid = grid[free]
    ref = describe(scans(grid, PARTIAL), PARTIAL).vectors
    rng = np.random.default_rng(2)
    picks = rng.choice(len(grid), 12, replace=False)
    for k in picks:
        base = scans(grid[k], PARTIAL)
        dropped = base.copy()
        dropped[rng.random(base.shape) < 0.05] = np.nan
        # A person (0.2 m radius) standing 2 m away along a random bearing.
        b = grid[k, 2] + rng.uniform(-2, 2)
        person_at = grid[k, :2] + 2.0 * np.array([math.cos(b), math.sin(b)])
        person = scans(grid[k], PARTIAL, circles=np.vstack([POSTS, [[*person_at, 0.2]]]))
        for changed in (dropped, person):
            v = describe(changed, PARTIAL).vectors[0]
            best = np.argmin(np.linalg.norm(ref - v, axis=1))
            assert np.linalg.norm(grid[best, :2] - grid[k, :2]) <= 0.5 + 1e-9


@pytest.mark.parametrize("sensor", [FULL, PARTIAL], ids=["360deg", "270deg"])
def test_yaw_estimate_recovers_known_rotations(sensor):
    rng = np.random.default_rng(3)
    turns = np.concatenate([[0.0, 0.4, -2.5, math.pi], rng.uniform(-math.pi, math.pi, 8)])
    n = len(turns)
    a = describe(scans(np.array([4.6, 3.2, 0.7]), sensor), sensor)
    b = describe(scans(np.column_stack([np.full(n, 4.6), np.full(n, 3.2), se2.wrap(0.7 + turns)]), sensor), sensor)
    yaw, score = estimate_yaw(np.repeat(a.sectors, n, axis=0), b.sectors, count=3)
    # Convention: yaw estimates theta_b - theta_a, the heading of a^-1 ∘ b.
    err = np.abs(se2.wrap(yaw[:, 0] - turns))
    assert err.max() < math.radians(1.0)
    assert np.all(score[:, 0] > 0.9)
    assert np.all(score[:, 0] >= np.nan_to_num(score[:, 1], neginf=-2))


def test_yaw_estimate_tolerates_a_small_translation():
    a = describe(scans(np.array([4.6, 3.4, 0.0]), PARTIAL), PARTIAL)
    b = describe(scans(np.array([5.0, 3.2, 0.5]), PARTIAL), PARTIAL)
    yaw, _ = estimate_yaw(a.sectors[0], b.sectors[0], count=3)
    assert abs(se2.wrap(yaw[0] - 0.5)) < math.radians(3.0)


def test_symmetric_room_gives_both_mirror_hypotheses():
    # A bare rectangle seen from its centre looks the same after a half turn.
    bare = ROOM[:4]
    a = describe(scans(np.array([5.0, 3.0, 0.0]), FULL, bare, None), FULL)
    b = describe(scans(np.array([5.0, 3.0, 0.3]), FULL, bare, None), FULL)
    yaw, score = estimate_yaw(a.sectors[0], b.sectors[0], count=2, min_separation_rad=math.radians(20))
    got = np.sort(se2.wrap(yaw - 0.3) % (2 * math.pi))
    np.testing.assert_allclose(got, [0.0, math.pi], atol=math.radians(1.5))
    assert abs(score[0] - score[1]) < 0.05


def test_correlation_equals_direct_masked_pearson():
    # The FFT path must agree with a per-shift Pearson correlation (numpy
    # corrcoef) over the sectors both signatures see.
    rng = np.random.default_rng(4)
    s = 48
    a = rng.uniform(1, 5, s)
    b = rng.uniform(1, 5, s)
    a[rng.random(s) < 0.2] = np.nan
    b[10:22] = np.nan
    c = correlate_signatures(a[None], b[None], DescriptorOptions(yaw_sectors=s, yaw_min_overlap=0.25))[0]
    for shift in range(s):
        sa = np.roll(a, -shift)  # sa[m] = a[m + shift]
        both = np.isfinite(sa) & np.isfinite(b)
        if both.sum() >= 0.25 * s:
            assert c[shift] == pytest.approx(np.corrcoef(sa[both], b[both])[0, 1], abs=1e-9)
        else:
            assert c[shift] == -np.inf


def test_empty_scan_gives_finite_descriptor_and_no_yaw():
    empty = np.full((1, PARTIAL.beams), np.nan)
    d = describe(empty, PARTIAL)
    assert d.vectors.shape == (1, DescriptorOptions().size)
    assert np.isfinite(d.vectors).all()
    yaw, score = estimate_yaw(d.sectors[0], d.sectors[0])
    assert np.isnan(yaw).all() and np.isneginf(score).all()


def test_batches_do_not_change_results():
    poses = np.column_stack([np.linspace(1, 9, 7), np.full(7, 3.0), np.linspace(-3, 3, 7)])
    r = scans(poses, PARTIAL)
    one = describe(r, PARTIAL)
    many = describe(r, PARTIAL, DescriptorOptions(batch_scans=2))
    np.testing.assert_array_equal(one.vectors, many.vectors)
    np.testing.assert_array_equal(one.sectors, many.sectors)


def test_yaw_for_index_pairs_equals_yaw_of_gathered_rows():
    poses = np.column_stack([np.linspace(1, 9, 6), np.full(6, 3.2), np.linspace(-3, 3, 6)])
    sig = describe(scans(poses, PARTIAL), PARTIAL).sectors
    a = np.array([0, 1, 2, 5, 4, 3, 0])
    b = np.array([1, 2, 3, 0, 4, 5, 5])
    yaw, score = estimate_yaw_pairs(sig, a, b, count=2, batch_pairs=3)
    ref_yaw, ref_score = estimate_yaw(sig[a], sig[b], count=2)
    np.testing.assert_array_equal(yaw, ref_yaw)
    np.testing.assert_array_equal(score, ref_score)


def test_wrong_beam_count_is_input_error():
    with pytest.raises(InputError, match="ranges must have shape"):
        describe(np.zeros((2, 10)), PARTIAL)
    with pytest.raises(InputError):
        DescriptorOptions(rings=0)
