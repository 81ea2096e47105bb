"""Simulated odometry errors: the systematic-error model against Borenstein and Feng's square-path test,
slips, and the odometry_noise header that may be missing or understated."""

import math

import numpy as np
import pytest
from scipy import stats

from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.simulation.simulate import SimOptions, odometry, simulate_log

SIDE_M = 4.0          # UMBmark drives a 4 m x 4 m square
STEP_M = 0.05
TURN_STEP_RAD = math.radians(5.0)

NO_RANDOM_WALK = {"odom_translation_m_per_sqrt_m": 0.0, "odom_heading_rad_per_sqrt_m": 0.0,
                  "odom_heading_rad_per_sqrt_rad": 0.0}


def square(clockwise: bool, side_m: float = SIDE_M) -> tuple[np.ndarray, np.ndarray]:
    """True poses (N, 3) and step lengths (N,) of a square driven from the origin facing +x, turning on the spot.

    Four legs of ``side_m`` and three 90-degree turns between them: the
    robot ends where it started, so the odometry's end point is its error.
    """
    sign = -1.0 if clockwise else 1.0
    poses, steps = [(0.0, 0.0, 0.0)], [0.0]
    x = y = th = 0.0
    n_leg, n_turn = round(side_m / STEP_M), round(math.pi / 2 / TURN_STEP_RAD)
    for leg in range(4):
        for _ in range(n_leg):
            x, y = x + STEP_M * math.cos(th), y + STEP_M * math.sin(th)
            poses.append((x, y, th))
            steps.append(STEP_M)
        if leg < 3:
            for _ in range(n_turn):
                th += sign * TURN_STEP_RAD
                poses.append((x, y, th))
                steps.append(0.0)
    truth = np.asarray(poses)
    truth[:, 2] = se2.wrap(truth[:, 2])
    return truth, np.asarray(steps)


def end_error(clockwise: bool, options: SimOptions, rng) -> np.ndarray:
    truth, steps = square(clockwise)
    odom = odometry(truth, steps, rng, options)
    return odom[-1, :2] - truth[-1, :2]


def predicted_end_errors(turn_scale_error: float, bias_rad_per_m: float, side_m: float = SIDE_M):
    """End-point errors (x, y) of odometry minus truth after the square, clockwise and anticlockwise.

    Our own first-order (small-angle) derivation, in the spirit of Borenstein
    and Feng's: a heading error psi swings the rest of a leg sideways by
    psi times its length.  With alpha = turn_scale_error * pi / 2 (heading
    error per 90-degree turn: their "Type A", wheelbase) and beta =
    bias * side (heading error per leg: their "Type B", unequal wheel
    diameters), the heading error at the start of leg k is k*(beta + alpha)
    anticlockwise and k*(beta - alpha) clockwise, and summing the sideways
    swings of the four legs gives

        anticlockwise: ( 2 L (alpha + beta), -2 L (alpha + beta))
        clockwise:     ( 2 L (alpha - beta),  2 L (alpha - beta))

    (the swing within each leg, beta L / 2, cancels round the closed
    square, and so does a distance scale error).
    """
    alpha = turn_scale_error * math.pi / 2
    beta = bias_rad_per_m * side_m
    g_ccw, g_cw = alpha + beta, alpha - beta
    return np.array([2 * side_m * g_cw, 2 * side_m * g_cw]), np.array([2 * side_m * g_ccw, -2 * side_m * g_ccw])


# Borenstein and Feng, "Measurement and correction of systematic odometry errors in mobile robots",
# IEEE Trans. Robotics and Automation 12(6), 1996 (UMBmark): driving a square both ways separates the two
# dominant systematic errors of differential-drive odometry.  An error of the wheelbase (Type A) turns the
# robot too far (or too little) in both directions, so the end points of the two directions lie mirrored
# about the starting direction (same x, opposite y); unequal wheel diameters (Type B) curve every straight
# the same way, adding in one direction and cancelling in the other (opposite x).  Their correction reads
# the two errors back from the centre of gravity of each direction's end points,
#     alpha = (x_cw + x_ccw) / (-4 L),   beta = (x_cw - x_ccw) / (-4 L)   (radians; from memory),
# where their x is the robot's true position relative to where its odometry believes it is; ours is the
# odometry's error relative to the truth, which flips the sign of alpha's formula, and beta's sign also
# depends on which way the curving is counted.  We check magnitudes and the mirror structure with theirs,
# and the signs against our own first-order derivation (predicted_end_errors).
@pytest.mark.parametrize("turn_scale, bias_deg_per_100m", [(0.01, 0.0), (0.0, 10.0), (0.01, 10.0), (-0.01, 25.0)])
def test_square_path_end_points_follow_the_systematic_error_model(turn_scale, bias_deg_per_100m):
    bias = math.radians(bias_deg_per_100m) / 100
    opts = SimOptions(**NO_RANDOM_WALK, odom_turn_scale_error=turn_scale, odom_heading_bias_rad_per_m=bias,
                      odom_distance_scale_error=0.02)
    rng = np.random.default_rng(0)
    cw, ccw = end_error(True, opts, rng), end_error(False, opts, rng)
    want_cw, want_ccw = predicted_end_errors(turn_scale, bias)
    # second-order terms are about (heading error)^2 * L: a few per cent here
    scale = max(np.linalg.norm(want_cw), np.linalg.norm(want_ccw))
    assert np.linalg.norm(cw - want_cw) < 0.08 * scale
    assert np.linalg.norm(ccw - want_ccw) < 0.08 * scale
    # UMBmark's read-back of the two errors from the x coordinates (magnitudes; signs as explained above)
    alpha, beta = turn_scale * math.pi / 2, bias * SIDE_M
    assert abs((cw[0] + ccw[0]) / (4 * SIDE_M)) == pytest.approx(abs(alpha), abs=0.08 * (abs(alpha) + abs(beta)))
    assert abs((cw[0] - ccw[0]) / (4 * SIDE_M)) == pytest.approx(abs(beta), abs=0.08 * (abs(alpha) + abs(beta)))
    if bias == 0:   # Type A alone: mirror images about the x axis
        assert cw[0] == pytest.approx(ccw[0], rel=0.05) and cw[1] == pytest.approx(-ccw[1], rel=0.05)
    if turn_scale == 0:  # Type B alone: x of opposite signs, the same y
        assert cw[0] == pytest.approx(-ccw[0], rel=0.05) and cw[1] == pytest.approx(ccw[1], rel=0.05)


def test_square_path_with_random_walk_gives_two_clusters_round_the_predicted_centres():
    # Borenstein and Feng 1996 (UMBmark) run each direction several times and use each direction's centre of
    # gravity, because random errors scatter the end points round it.
    turn_scale, bias = 0.015, math.radians(20.0) / 100
    opts = SimOptions(odom_turn_scale_error=turn_scale, odom_heading_bias_rad_per_m=bias)
    rng = np.random.default_rng(42)
    runs = 12
    cw = np.array([end_error(True, opts, rng) for _ in range(runs)])
    ccw = np.array([end_error(False, opts, rng) for _ in range(runs)])
    want_cw, want_ccw = predicted_end_errors(turn_scale, bias)
    for ends, want in ((cw, want_cw), (ccw, want_ccw)):
        centre = ends.mean(axis=0)
        spread = ends.std(axis=0, ddof=1)
        assert np.all(spread > 0)  # the random walk does scatter them
        # centroid within 4 standard errors of the prediction, plus the few per cent of second-order terms
        assert np.all(np.abs(centre - want) < 4 * spread / math.sqrt(runs) + 0.05 * np.linalg.norm(want))
    # two separate clusters: farther apart than either one's scatter
    gap = np.linalg.norm(cw.mean(axis=0) - ccw.mean(axis=0))
    assert gap > 5 * max(np.linalg.norm(cw.std(axis=0)), np.linalg.norm(ccw.std(axis=0)))


def _straight(n: int, step: float):
    truth = np.column_stack([np.arange(n) * step, np.zeros(n), np.zeros(n)])
    steps = np.full(n, step)
    steps[0] = 0.0
    return truth, steps


def test_slips_happen_at_the_configured_rate_and_stay_within_their_bounds():
    n, step, rate = 20001, 0.2, 0.05
    truth, steps = _straight(n, step)
    opts = SimOptions(**NO_RANDOM_WALK, odom_heading_bias_rad_per_m=0.0, odom_distance_scale_error=0.0,
                      odom_slip_rate_per_m=rate, scans_per_block=64)
    odom = odometry(truth, steps, np.random.default_rng(1), opts, np.random.default_rng(2))
    err = se2.between(odom[:-1], odom[1:]) - se2.between(truth[:-1], truth[1:])
    err[:, 2] = se2.wrap(err[:, 2])
    slipped = np.abs(err).max(axis=1) > 1e-9
    # exact binomial test (scipy.stats.binomtest): a slip in a step with probability 1 - exp(-rate * step)
    k = int(slipped.sum())
    assert k > 100
    assert stats.binomtest(k, n - 1, -math.expm1(-rate * step)).pvalue > 1e-3
    jump = np.hypot(err[slipped, 0], err[slipped, 1])
    assert jump.max() <= 0.3 + 1e-9 and np.abs(err[slipped, 2]).max() <= math.radians(5.0) + 1e-9
    # lengths uniform on [0, 0.3] m and heading jumps on +-5 degrees (Kolmogorov-Smirnov, scipy.stats.kstest)
    assert stats.kstest(jump, stats.uniform(0, 0.3).cdf).pvalue > 1e-3
    assert stats.kstest(err[slipped, 2], stats.uniform(-math.radians(5), math.radians(10)).cdf).pvalue > 1e-3


def test_slips_need_their_own_stream_and_leave_the_other_draws_alone():
    truth, steps = _straight(300, 0.2)
    base = SimOptions()
    slips = SimOptions(odom_slip_rate_per_m=0.5)
    plain = odometry(truth, steps, np.random.default_rng(5), base)
    with pytest.raises(InputError):
        odometry(truth, steps, np.random.default_rng(5), slips)
    slipped = odometry(truth, steps, np.random.default_rng(5), slips, np.random.default_rng(6))
    assert not np.allclose(plain, slipped)
    # the random walk is drawn from the same stream as before: with the slips' jumps removed, the same steps
    d_plain = se2.between(plain[:-1], plain[1:])
    d_slip = se2.between(slipped[:-1], slipped[1:])
    same = np.abs(se2.wrap(d_plain[:, 2] - d_slip[:, 2])) < 1e-12
    assert 0.5 < same.mean() < 1.0


def test_a_short_log_with_slips_is_the_start_of_a_longer_one():
    opts = SimOptions(beams=31, scans_per_block=16, odom_slip_rate_per_m=0.3, odom_turn_scale_error=0.02)
    short = simulate_log("lot", seed=5, scans=23, options=opts)
    long = simulate_log("lot", seed=5, scans=70, options=opts)
    np.testing.assert_array_equal(short.odom, long.odom[:23])


def test_the_header_states_the_noise_understates_it_or_is_missing():
    exact = simulate_log("hall", seed=1, scans=3, options=SimOptions(beams=31))
    low = simulate_log("hall", seed=1, scans=3, options=SimOptions(beams=31, odom_header_factor=3.0))
    none = simulate_log("hall", seed=1, scans=3, options=SimOptions(beams=31, odom_header_factor=None))
    for key, value in exact.header["odometry_noise"].items():
        assert low.header["odometry_noise"][key] == pytest.approx(value / 3.0)
    assert "odometry_noise" not in none.header
    assert "no odometry_noise header" in none.header["notes"]
    assert "understates the random walk 3 times" in low.header["notes"]
    assert "systematic" not in exact.header["notes"]  # the default notes are as they always were
    np.testing.assert_array_equal(exact.odom, none.odom)  # only the header differs


@pytest.mark.parametrize("change", [
    {"odom_turn_scale_error": 0.7}, {"odom_distance_scale_error": -0.6}, {"odom_slip_rate_per_m": -0.1},
    {"odom_slip_max_m": float("nan")}, {"odom_slip_max_rad": 4.0}, {"odom_header_factor": 0.0},
    {"odom_header_factor": float("inf")}, {"odom_heading_bias_rad_per_m": float("inf")},
    {"odom_translation_m_per_sqrt_m": -0.01},
])
def test_bad_odometry_options_are_refused_in_one_line(change):
    with pytest.raises(InputError) as err:
        simulate_log("ring", scans=2, options=SimOptions(beams=31, **change))
    assert "\n" not in str(err.value) and "odom" in str(err.value)
