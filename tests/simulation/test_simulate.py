"""Scenario generator: determinism, format, noise statistics, drift, revisits, moving objects, CLI."""

import gzip
import math

import numpy as np
import pytest
from scipy import stats
from scipy.spatial import cKDTree

from closurecheck.cli import main
from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.io.scanlog import read_scanlog, write_scanlog
from closurecheck.simulation.floorplans import FLOORPLANS
from closurecheck.simulation.simulate import (
    DEFAULT_SCENARIO,
    SCENARIOS,
    SimOptions,
    corrupt,
    drive,
    odometry,
    odometry_drift,
    render,
    simulate_log,
)

# Fewer beams keep the statistical tests fast; the geometry is the same.
FAST = SimOptions(beams=181)


def test_scenarios_are_registered_with_natural_lengths_of_a_few_hundred_metres():
    assert {"warehouse", "ring", "yard"} <= set(SCENARIOS)
    assert DEFAULT_SCENARIO == "warehouse"
    for name, build in SCENARIOS.items():
        d = drive(build())
        assert 1500 <= len(d.t) <= 3000, name
        assert 250.0 <= d.step_m.sum() <= 650.0, name
        assert d.laps[-1] >= 1.0 > d.laps[-2]


def test_same_seed_gives_byte_identical_files(tmp_path):
    paths = []
    for k, seed in enumerate((3, 3, 4)):
        p = tmp_path / f"log{k}.jsonl.gz"
        write_scanlog(p, simulate_log("ring", seed=seed, scans=30))
        paths.append(p.read_bytes())
    assert paths[0] == paths[1]
    assert paths[0] != paths[2]


def test_a_short_log_is_the_start_of_a_longer_one():
    opts = SimOptions(beams=61, scans_per_block=16)
    short = simulate_log("yard", seed=5, scans=23, options=opts)
    long = simulate_log("yard", seed=5, scans=70, options=opts)
    np.testing.assert_array_equal(short.ranges, long.ranges[:23])
    np.testing.assert_array_equal(short.odom, long.odom[:23])
    np.testing.assert_array_equal(short.truth, long.truth[:23])
    np.testing.assert_array_equal(short.t, long.t[:23])


def test_header_validates_and_log_round_trips(tmp_path):
    log = simulate_log("warehouse", seed=1, scans=25)
    s = log.sensor
    assert s.beams == 721
    assert s.first_angle == pytest.approx(-3 * math.pi / 4)
    assert s.angle_step == pytest.approx(1.5 * math.pi / 720)
    assert (s.min_range, s.max_range) == (0.05, 20.0)
    assert set(log.header["odometry_noise"]) == {
        "translation_m_per_sqrt_m", "heading_rad_per_sqrt_m", "heading_rad_per_sqrt_rad"}
    assert "warehouse" in log.header["notes"] and "seed 1" in log.header["notes"]
    assert np.allclose(log.odom[0], 0.0)
    assert np.all(np.abs(log.truth[:, 2]) <= math.pi)

    path = tmp_path / "w.jsonl.gz"
    write_scanlog(path, log)
    with gzip.open(path, "rt") as fh:
        assert fh.readline().startswith('{"scanlog": 1')
    back = read_scanlog(path)
    assert back.sensor == log.sensor
    assert back.header == log.header
    np.testing.assert_array_equal(np.isnan(back.ranges), np.isnan(log.ranges))
    ok = ~np.isnan(log.ranges)
    np.testing.assert_allclose(back.ranges[ok], log.ranges[ok], atol=0.6e-4)  # 4 decimals written
    np.testing.assert_allclose(back.odom[:, :2], log.odom[:, :2], atol=1e-6)
    assert np.abs(se2.wrap(back.odom[:, 2] - log.odom[:, 2])).max() < 1e-6
    np.testing.assert_allclose(back.truth[:, :2], log.truth[:, :2], atol=1e-6)
    assert np.abs(se2.wrap(back.truth[:, 2] - log.truth[:, 2])).max() < 1e-6
    np.testing.assert_array_equal(back.t, log.t)


def test_sensor_options_override_beams_and_the_yard_sees_farther():
    log = simulate_log("warehouse", seed=0, scans=3, options=SimOptions(beams=1081))
    assert log.ranges.shape == (3, 1081)
    assert log.sensor.angle_step == pytest.approx(1.5 * math.pi / 1080)
    assert simulate_log("yard", scans=2, options=FAST).sensor.max_range == 30.0


def _residuals(name, log, options):
    plan = SCENARIOS[name]()
    clean = render(plan, log.truth, log.t, log.sensor, options)
    return clean, log.ranges.astype(np.float64) - clean


def test_range_noise_is_gaussian_with_the_configured_std():
    opts = SimOptions(beams=181, range_resolution_m=0.0, dropout_probability=0.0,
                      burst_probability_per_scan=0.0)
    log = simulate_log("warehouse", seed=11, scans=60, options=opts)
    clean, res = _residuals("warehouse", log, opts)
    inner = np.isfinite(clean) & (clean > 0.2) & (clean < log.sensor.max_range - 0.2)
    assert np.isnan(log.ranges[inner]).sum() == 0  # no dropouts configured
    r = res[inner]
    assert r.size > 5000
    # float32 storage adds < 1e-6 m; the residual should be N(0, 0.015^2)
    assert np.std(r) == pytest.approx(0.015, rel=0.03)
    assert abs(np.mean(r)) < 3 * 0.015 / math.sqrt(r.size)
    # Kolmogorov-Smirnov test against the normal distribution (scipy.stats.kstest)
    assert stats.kstest(r[:4000] / 0.015, "norm").pvalue > 1e-3


def test_ranges_are_rounded_to_the_sensor_resolution():
    log = simulate_log("ring", seed=2, scans=5, options=FAST)
    r = log.ranges[np.isfinite(log.ranges)].astype(np.float64)
    assert np.abs(r * 1000 - np.round(r * 1000)).max() < 1e-3


def test_single_beam_dropouts_occur_at_the_configured_rate():
    opts = SimOptions(beams=181, dropout_probability=0.01, burst_probability_per_scan=0.0)
    log = simulate_log("warehouse", seed=4, scans=120, options=opts)
    clean, _ = _residuals("warehouse", log, opts)
    inner = np.isfinite(clean) & (clean > 0.2) & (clean < log.sensor.max_range - 0.2)
    lost = int(np.isnan(log.ranges[inner]).sum())
    # exact binomial test (scipy.stats.binomtest) of the dropout count against p = 0.01
    assert stats.binomtest(lost, int(inner.sum()), 0.01).pvalue > 1e-3
    assert lost > 0


def test_dropout_bursts_are_contiguous_runs_of_the_configured_length():
    opts = SimOptions(beams=181, dropout_probability=0.0, burst_probability_per_scan=1.0,
                      burst_min_beams=5, burst_max_beams=12, scans_per_block=64)
    sensor = opts.sensor(FLOORPLANS["ring"]())
    clean = np.full((64, 181), 5.0)  # every beam would return
    out = corrupt(clean, np.random.default_rng(1), np.random.default_rng(2), sensor, opts)
    lengths = []
    for row in np.isnan(out):
        idx = np.flatnonzero(row)
        assert len(idx) > 0 and np.all(np.diff(idx) == 1)  # one contiguous run per scan
        if idx.max() < 180:  # runs cut short by the last beam may be shorter
            assert 5 <= len(idx) <= 12
            lengths.append(len(idx))
    assert len(set(lengths)) > 3  # lengths vary over the configured range


def test_dropout_count_on_a_plain_wall_follows_the_binomial_law():
    opts = SimOptions(beams=181, dropout_probability=0.02, burst_probability_per_scan=0.0, scans_per_block=200)
    sensor = opts.sensor(FLOORPLANS["ring"]())
    out = corrupt(np.full((200, 181), 5.0), np.random.default_rng(3), np.random.default_rng(4), sensor, opts)
    lost = int(np.isnan(out).sum())
    # exact binomial test (scipy.stats.binomtest) against p = 0.02
    assert stats.binomtest(lost, out.size, 0.02).pvalue > 1e-3


def test_odometry_noise_matches_the_header_model():
    # On a steady arc (known step length s and rotation r per step) the odometry increments' errors
    # must have std a*sqrt(s) per axis and sqrt(b^2 s + c^2 |r|) in heading.
    n, s, r = 4001, 0.2, 0.05
    th = np.arange(n) * r
    radius = s / r
    truth = np.column_stack([radius * np.sin(th), radius * (1 - np.cos(th)), se2.wrap(th)])
    step = np.full(n, s)
    step[0] = 0.0
    opts = SimOptions(odom_heading_bias_rad_per_m=0.0, odom_distance_scale_error=0.0)
    odom = odometry(truth, step, np.random.default_rng(9), opts)
    arc = se2.between(truth[:-1], truth[1:])
    err = se2.between(odom[:-1], odom[1:]) - arc
    err[:, 2] = se2.wrap(err[:, 2])
    a, b, c = (opts.odom_translation_m_per_sqrt_m, opts.odom_heading_rad_per_sqrt_m,
               opts.odom_heading_rad_per_sqrt_rad)
    assert np.std(err[:, 0]) == pytest.approx(a * math.sqrt(s), rel=0.06)
    assert np.std(err[:, 1]) == pytest.approx(a * math.sqrt(s), rel=0.06)
    assert np.std(err[:, 2]) == pytest.approx(math.sqrt(b * b * s + c * c * r), rel=0.06)
    noise = SimOptions().odometry_noise_header()
    assert noise == {"translation_m_per_sqrt_m": a, "heading_rad_per_sqrt_m": b, "heading_rad_per_sqrt_rad": c}


def test_odometry_drift_grows_with_distance_to_a_few_metres():
    plan = FLOORPLANS["warehouse"]()
    d = drive(plan)
    for seed in (0, 1):
        odom = odometry(d.truth, d.step_m, np.random.default_rng(seed))
        aligned = se2.compose(d.truth[0], se2.between(odom[0], odom))
        err = np.hypot(*(aligned[:, :2] - d.truth[:, :2]).T)
        q = len(err) // 4
        assert err[:q].mean() * 3 < err[-q:].mean()
        assert 1.0 < err[-1] < 10.0


def test_odometry_drift_helper_measures_against_truth():
    log = simulate_log("ring", seed=0, scans=200, options=SimOptions(beams=31))
    drift = odometry_drift(log)
    assert drift[0] == 0.0 and drift[-1] > drift[10] > 0.0


@pytest.mark.parametrize("name", sorted(FLOORPLANS))
def test_route_revisits_places_in_both_directions(name):
    truth = drive(FLOORPLANS[name]()).truth
    tree = cKDTree(truth[:, :2])
    same = opposite = 0
    for i, j in tree.query_pairs(1.0):
        i, j = min(i, j), max(i, j)
        if j - i <= 50:
            continue
        turn = abs(se2.wrap(truth[j, 2] - truth[i, 2]))
        same += turn < np.pi / 4
        opposite += turn > 3 * np.pi / 4
    assert same > 200 and opposite > 200


@pytest.mark.parametrize("name", sorted(FLOORPLANS))
def test_route_keeps_clear_of_walls_and_pillars(name):
    plan = FLOORPLANS[name]()
    p = drive(plan).truth[:, :2]
    a, e = plan.segments[:, :2], plan.segments[:, 2:] - plan.segments[:, :2]
    w = p[:, None, :] - a[None]
    u = np.clip((w * e).sum(-1) / (e * e).sum(-1), 0.0, 1.0)
    wall = np.hypot(*(w - u[..., None] * e).transpose(2, 0, 1)).min()
    post = (np.hypot(*(p[:, None, :] - plan.circles[None, :, :2]).transpose(2, 0, 1)) - plan.circles[:, 2]).min()
    assert min(wall, post) > SimOptions().robot_radius_m + 0.5


def test_moving_objects_change_some_beams_between_two_scans_at_one_pose():
    plan = FLOORPLANS["warehouse"]()
    cart = next(m for m in plan.movers if m.kind == "cart")
    times = np.arange(0.0, 60.0, 0.1)
    xs = cart.pose_at(times)[0][:, 0]
    t_near = times[np.argmin(np.abs(xs - 24.0))]   # cart right in front of the sensor
    t_far = times[np.argmax(np.abs(xs - 24.0))]    # cart at an end of its run
    sensor = SimOptions().sensor(plan)
    pose = np.array([[24.0, 4.0, np.pi / 2]])       # in the south cross aisle, facing the cart's lane
    near = render(plan, pose, [t_near], sensor)[0]
    far = render(plan, pose, [t_far], sensor)[0]
    static = render(plan, pose, [t_near], sensor, with_movers=False)[0]
    changed = ~np.isclose(near, far)
    assert changed.sum() >= 20
    assert np.all(near <= static) and np.all(far <= static)  # objects only ever occlude
    # straight ahead the cart (1.1 m wide, centre 2.6 m away) is hit at about 2.05 m
    assert near[len(near) // 2] == pytest.approx(6.6 - 0.55 - 4.0, abs=0.05)


def test_cli_writes_a_readable_log(tmp_path, capsys):
    out = tmp_path / "s.jsonl.gz"
    assert main(["simulate", "--scenario", "ring", "--seed", "2", "--scans", "12", "--out", str(out)]) == 0
    assert "12 scans" in capsys.readouterr().out
    log = read_scanlog(out)
    assert len(log) == 12 and log.has_truth and log.sensor.beams == 721


@pytest.mark.parametrize("args", [["--scenario", "nowhere"], ["--scans", "-5"], ["--scans", "0"],
                                  ["--scans", "many"], ["--seed", "-1"]])
def test_cli_rejects_bad_arguments_with_status_2(tmp_path, args, capsys):
    out = tmp_path / "x.jsonl"
    assert main(["simulate", "--out", str(out), *args]) == 2
    assert "error" in capsys.readouterr().err
    assert not out.exists()


def test_api_rejects_bad_arguments():
    with pytest.raises(InputError):
        simulate_log("nowhere")
    with pytest.raises(InputError):
        simulate_log("yard", scans=0)
    with pytest.raises(InputError):
        simulate_log("yard", scans=2, options=SimOptions(beams=1))
