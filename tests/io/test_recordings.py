"""Robot recordings (ROS 1 bags, ROS 2 bags in MCAP and SQLite storage) to scan logs.

The recordings are written in the tests with the rosbags library itself (the
reference implementation of the three storage formats we read), from a scan
log built here with closed-form ranges and an analytic trajectory, then
converted back and compared with the original.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest

from closurecheck.errors import InputError
from closurecheck.io import recordings
from closurecheck.io.recording_sync import (
    clean_odometry,
    interpolate_poses,
    pair_scans,
    yaw_from_quaternion,
)
from closurecheck.io.recordings import RecordingOptions, is_recording, read_recording
from closurecheck.io.scanlog import Sensor, make_scanlog, read_scanlog, write_scanlog

# --- the scene: a robot on an ellipse inside a round room -------------------------------------------

ROOM_RADIUS_M = 6.0
OMEGA = 0.8                      # rad/s along the ellipse
AX, AY = 2.0, 1.5                # ellipse semi-axes (m)
WOBBLE, WOBBLE_RATE = 0.3, 2.0   # heading wobble amplitude (rad) and its rate multiple of OMEGA
T0_NS = 1_700_000_000_123_456_789  # an epoch-sized stamp: float64 seconds must keep it
SCAN_PERIOD_NS = 100_000_000     # 10 Hz scans
SCAN_OFFSET_NS = 13_700_000      # scans are not on the odometry's time grid
ODOM_PERIOD_NS = 20_000_000      # 50 Hz odometry
N_SCANS = 40
SENSOR = Sensor(first_angle=-2.0, angle_step=4.0 / 99, beams=100, min_range=0.1, max_range=7.0)


def path_pose(t):
    """Analytic trajectory [x, y, theta] at times t (s): smooth, heading crosses +-pi."""
    t = np.asarray(t, dtype=np.float64)
    theta = OMEGA * t + math.pi / 2 + WOBBLE * np.sin(WOBBLE_RATE * OMEGA * t)
    out = np.stack([AX * np.cos(OMEGA * t), AY * np.sin(OMEGA * t), theta], axis=-1)
    out[..., 2] = np.pi - np.mod(np.pi - out[..., 2], 2 * np.pi)
    return out


def room_ranges(poses, sensor):
    """Closed-form ranges from each pose to the round room's wall (ray-circle intersection)."""
    b = poses[:, 2:3] + sensor.bearings()[None, :]
    px, py = poses[:, 0:1], poses[:, 1:2]
    pd = px * np.cos(b) + py * np.sin(b)
    return -pd + np.sqrt(pd ** 2 - (px ** 2 + py ** 2) + ROOM_RADIUS_M ** 2)


def scan_stamps(n=N_SCANS):
    return T0_NS + SCAN_OFFSET_NS + SCAN_PERIOD_NS * np.arange(n, dtype=np.int64)


def rel_s(ns):
    return (np.asarray(ns, dtype=np.int64) - T0_NS).astype(np.float64) * 1e-9


def original_log(n=N_SCANS):
    """The scan log the recordings are written from: some beams have no return."""
    ns = scan_stamps(n)
    poses = path_pose(rel_s(ns))
    ranges = room_ranges(poses, SENSOR).astype(np.float32)
    rng = np.random.default_rng(7)
    ranges[rng.random(ranges.shape) < 0.08] = np.nan
    log = make_scanlog(SENSOR, ns * 1e-9, poses, ranges)
    assert np.isnan(log.ranges).any() and np.isfinite(log.ranges).mean() > 0.5
    return log, ns


def encode_no_returns(ranges, sensor):
    """How drivers spell "no return" in a LaserScan: NaN, +inf, or a value outside the limits."""
    out = np.array(ranges, dtype=np.float32)
    idx = np.flatnonzero(np.isnan(out))
    below = sensor.min_range / 2 if sensor.min_range > 0 else -1.0
    choices = np.array([np.nan, np.inf, below, sensor.max_range * 3], dtype=np.float32)
    out[idx] = choices[idx % len(choices)]
    return out


def odom_track(start_ns, end_ns, period_ns=ODOM_PERIOD_NS):
    ns = np.arange(start_ns, end_ns + 1, period_ns, dtype=np.int64)
    return ns, path_pose(rel_s(ns))


# --- writing recordings with rosbags -----------------------------------------------------------------

class _Msgs:
    """Builds LaserScan and Odometry messages for one ROS version."""

    def __init__(self, ros1: bool):
        rosbags_typesys = pytest.importorskip("rosbags.typesys")
        store = rosbags_typesys.Stores.ROS1_NOETIC if ros1 else rosbags_typesys.Stores.ROS2_HUMBLE
        self.ros1 = ros1
        self.ts = rosbags_typesys.get_typestore(store)
        self.ty = self.ts.types

    def header(self, ns, frame):
        kw = dict(stamp=self.ty["builtin_interfaces/msg/Time"](sec=int(ns) // 10 ** 9, nanosec=int(ns) % 10 ** 9),
                  frame_id=frame)
        if self.ros1:
            kw["seq"] = 0
        return self.ty["std_msgs/msg/Header"](**kw)

    def serialize(self, msg):
        return (self.ts.serialize_ros1 if self.ros1 else self.ts.serialize_cdr)(msg, msg.__msgtype__)

    def scan(self, ns, ranges, angle_min, angle_inc, rmin, rmax):
        return self.serialize(self.ty["sensor_msgs/msg/LaserScan"](
            header=self.header(ns, "laser"), angle_min=angle_min,
            angle_max=angle_min + angle_inc * (len(ranges) - 1), angle_increment=angle_inc,
            time_increment=0.0, scan_time=0.1, range_min=rmin, range_max=rmax,
            ranges=np.asarray(ranges, dtype=np.float32), intensities=np.zeros(0, dtype=np.float32)))

    def odom(self, ns, x, y, yaw, quat=None):
        t = self.ty
        qx, qy, qz, qw = quat if quat is not None else (0.0, 0.0, math.sin(yaw / 2), math.cos(yaw / 2))
        pose = t["geometry_msgs/msg/Pose"](position=t["geometry_msgs/msg/Point"](x=x, y=y, z=0.0),
                                           orientation=t["geometry_msgs/msg/Quaternion"](x=qx, y=qy, z=qz, w=qw))
        zero3 = t["geometry_msgs/msg/Vector3"](x=0.0, y=0.0, z=0.0)
        return self.serialize(t["nav_msgs/msg/Odometry"](
            header=self.header(ns, "odom"), child_frame_id="base",
            pose=t["geometry_msgs/msg/PoseWithCovariance"](pose=pose, covariance=np.zeros(36)),
            twist=t["geometry_msgs/msg/TwistWithCovariance"](
                twist=t["geometry_msgs/msg/Twist"](linear=zero3, angular=zero3), covariance=np.zeros(36))))


def write_bag(path: Path, fmt: str, topics: dict[str, str], messages) -> Path:
    """Write a recording.

    fmt: "mcap", "sqlite3" (ROS 2 bag folders) or "ros1" (a .bag file).
    topics: topic name -> message type.  messages: (topic, receive_ns, raw bytes),
    written in receive order.
    """
    if fmt == "ros1":
        from rosbags.rosbag1 import Writer
        path = path.with_suffix(".bag")
        writer = Writer(path)
        ts = _Msgs(True).ts
    else:
        from rosbags.rosbag2 import StoragePlugin, Writer
        plugin = StoragePlugin.MCAP if fmt == "mcap" else StoragePlugin.SQLITE3
        writer = Writer(path, version=9, storage_plugin=plugin)
        ts = _Msgs(False).ts
    with writer:
        conns = {name: writer.add_connection(name, msgtype, typestore=ts) for name, msgtype in topics.items()}
        for topic, rec_ns, raw in sorted(messages, key=lambda m: m[1]):
            writer.write(conns[topic], int(rec_ns), raw)
    return path


SCAN_T = "sensor_msgs/msg/LaserScan"
ODOM_T = "nav_msgs/msg/Odometry"
FORMATS = ["mcap", "sqlite3", "ros1"]


def recording_from_log(tmp_path, fmt, log, stamps_ns, odom_ns, odom_poses, *, scan_latency_ns=4_000_000,
                       scan_topic="/scan", odom_topic="/odom", extra_topics=None, extra_messages=()):
    """A recording of ``log``'s scans (stamped ``stamps_ns``) and an odometry track.

    Receive times lag the header stamps, so reading the wrong clock would
    show up as a pose error.
    """
    m = _Msgs(fmt == "ros1")
    s = log.sensor
    msgs = [(scan_topic, ns + scan_latency_ns,
             m.scan(ns, encode_no_returns(r, s), np.float32(s.first_angle), np.float32(s.angle_step),
                    s.min_range, s.max_range))
            for ns, r in zip(stamps_ns, log.ranges)]
    msgs += [(odom_topic, ns + 1_000_000, m.odom(ns, *p)) for ns, p in zip(odom_ns, odom_poses)]
    topics = {scan_topic: SCAN_T, odom_topic: ODOM_T, **(extra_topics or {})}
    return write_bag(tmp_path / f"rec_{fmt}", fmt, topics, msgs + list(extra_messages))


def interpolation_bound(h_s):
    """Largest error of linear interpolation of the analytic path at sample spacing h_s.

    For f with a bounded second derivative, linear interpolation between
    samples h apart errs by at most h^2/8 * max|f''| (the interpolation error
    theorem, e.g. Burden & Faires, Numerical Analysis, Thm. 3.3 with n = 1).
    Here |x''| <= AX*OMEGA^2, |y''| <= AY*OMEGA^2 and
    |theta''| <= WOBBLE*(WOBBLE_RATE*OMEGA)^2.
    """
    return (h_s ** 2 / 8 * max(AX, AY) * OMEGA ** 2, h_s ** 2 / 8 * WOBBLE * (WOBBLE_RATE * OMEGA) ** 2)


def angle_diff(a, b):
    return np.abs(np.pi - np.mod(np.pi - (np.asarray(a) - np.asarray(b)), 2 * np.pi))


# --- round trips ---------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def scene():
    log, ns = original_log()
    # Odometry starts after the third scan and stops before the last four.
    odom_ns, odom_poses = odom_track(T0_NS + 250_000_000, T0_NS + 3_550_000_000)
    return log, ns, odom_ns, odom_poses


@pytest.mark.parametrize("fmt", FORMATS)
def test_round_trip_matches_original(tmp_path, scene, fmt):
    log, ns, odom_ns, odom_poses = scene
    rec = recording_from_log(tmp_path, fmt, log, ns, odom_ns, odom_poses)
    out, summary = read_recording(rec)

    inside = (ns >= odom_ns[0]) & (ns <= odom_ns[-1])
    assert summary.dropped_before_odom == int((ns < odom_ns[0]).sum()) == 3
    assert summary.dropped_after_odom == int((ns > odom_ns[-1]).sum()) == 4
    assert summary.scans_kept == len(out) == int(inside.sum())
    assert summary.scan_messages == N_SCANS and summary.odom_messages == len(odom_ns)
    assert summary.scan_topic == "/scan" and summary.odom_topic == "/odom"

    # Beam geometry survives the float32 message fields: the header holds the
    # shortest decimal of each float32 value, which reads back as that value.
    assert out.sensor.beams == SENSOR.beams
    for key in ("first_angle", "angle_step", "min_range", "max_range"):
        got, sent = getattr(out.sensor, key), np.float32(getattr(SENSOR, key))
        assert np.float32(got) == sent and got == float(str(sent)), key
    assert out.sensor.first_angle == SENSOR.first_angle and out.sensor.max_range == SENSOR.max_range

    # Ranges: float32 in the message and in the log, so they must be identical;
    # every spelling of "no return" (NaN, inf, below min, above max) became NaN.
    expected = log.ranges[inside]
    np.testing.assert_array_equal(np.isnan(out.ranges), np.isnan(expected))
    np.testing.assert_array_equal(out.ranges, expected)

    # Times: the header stamps, at float64 resolution of epoch seconds.
    np.testing.assert_allclose(out.t, ns[inside] * 1e-9, rtol=0, atol=1e-6)
    assert (np.diff(out.t) > 0).all()

    # Poses: within the linear-interpolation bound of the 50 Hz odometry.
    bound_xy, bound_th = interpolation_bound(ODOM_PERIOD_NS * 1e-9)
    err_xy = np.abs(out.odom[:, :2] - log.odom[inside, :2]).max()
    err_th = angle_diff(out.odom[:, 2], log.odom[inside, 2]).max()
    assert err_xy <= bound_xy + 1e-9, (err_xy, bound_xy)
    assert err_th <= bound_th + 1e-9, (err_th, bound_th)
    # The heading crosses +-pi while odometry covers the scans (shortest-arc case is exercised).
    assert (np.abs(np.diff(np.unwrap(log.odom[inside, 2])) - np.diff(log.odom[inside, 2])) > 1).any()

    assert "rec_" in out.header["notes"] and "/scan" in out.header["notes"] and "/odom" in out.header["notes"]
    text = summary.describe()
    assert "dropped 7" in text and "/scan" in text


@pytest.mark.parametrize("fmt", ["mcap", "sqlite3"])
def test_single_storage_file_is_read_like_its_folder(tmp_path, scene, fmt):
    log, ns, odom_ns, odom_poses = scene
    folder = recording_from_log(tmp_path, fmt, log, ns, odom_ns, odom_poses)
    (storage,) = [p for p in folder.iterdir() if p.suffix in (".mcap", ".db3")]
    a, _ = read_recording(folder)
    b, summary = read_recording(storage)
    assert is_recording(folder) and is_recording(storage)
    assert "SQLite" in summary.storage if fmt == "sqlite3" else "MCAP" in summary.storage
    np.testing.assert_array_equal(a.ranges, b.ranges)
    np.testing.assert_array_equal(a.odom, b.odom)


def test_exact_when_odometry_is_linear_in_time(tmp_path):
    """Straight line at constant speed and turn rate: interpolation must be exact."""
    n = 25
    ns = scan_stamps(n)
    v, w = np.array([0.7, -0.2]), 0.3

    def line(ns_):
        t = rel_s(ns_)
        return np.column_stack([1.0 + v[0] * t, 2.0 + v[1] * t, -0.5 + w * t])

    poses = line(ns)
    log = make_scanlog(SENSOR, ns * 1e-9, poses, room_ranges(poses, SENSOR).astype(np.float32))
    odom_ns = np.arange(T0_NS, ns[-1] + 30_000_000, 30_000_000, dtype=np.int64)  # 33 Hz, off the scan grid
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, line(odom_ns))
    out, summary = read_recording(rec)
    assert len(out) == n and summary.dropped == 0
    np.testing.assert_allclose(out.odom, poses, rtol=0, atol=1e-9)


def test_cli_convert_writes_a_log_that_reads_back(tmp_path, scene, capsys):
    cli = _cli()
    log, ns, odom_ns, odom_poses = scene
    rec = recording_from_log(tmp_path, "ros1", log, ns, odom_ns, odom_poses)
    out_path = tmp_path / "log.jsonl.gz"
    status = cli.main(["convert", str(rec), "--out", str(out_path), "--mount", "0.2,-0.05,0.01"])
    assert status == 0, capsys.readouterr().err
    printed = capsys.readouterr().out
    assert "dropped 7" in printed and f"wrote {N_SCANS - 7} scans" in printed
    back = read_scanlog(out_path)
    direct, _ = read_recording(rec, mount=(0.2, -0.05, 0.01))
    assert back.sensor.mount == (0.2, -0.05, 0.01)
    assert back.header["mount"] == [0.2, -0.05, 0.01]
    np.testing.assert_array_equal(back.ranges, direct.ranges)  # full float32 precision in the file
    np.testing.assert_array_equal(back.t, direct.t)
    np.testing.assert_allclose(back.odom, direct.odom, atol=1e-6)  # the log keeps 6 decimals of pose


def test_mount_recorded_in_sensor_and_header(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, odom_poses)
    out, summary = read_recording(rec, mount=(0.3, 0.0, math.pi))
    assert out.sensor.mount == (0.3, 0.0, math.pi) and out.header["mount"] == [0.3, 0.0, math.pi]
    assert summary.mount == (0.3, 0.0, math.pi) and "mount" in summary.describe()
    plain, _ = read_recording(rec)
    assert plain.sensor.mount == (0.0, 0.0, 0.0) and "mount" not in plain.header
    with pytest.raises(InputError, match="mount"):
        read_recording(rec, mount=(0.0, float("nan"), 0.0))


def test_out_of_order_scans_are_sorted_and_reported(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    # Scans 10 and 11 are recorded in swapped order: their receive times are
    # in order but their header stamps are not.
    m = _Msgs(False)
    s = log.sensor
    order = list(range(N_SCANS))
    order[10], order[11] = 11, 10
    msgs = [("/scan", T0_NS + 5_000_000 * k + SCAN_OFFSET_NS + SCAN_PERIOD_NS * k,
             m.scan(ns[i], log.ranges[i], s.first_angle, s.angle_step, s.min_range, s.max_range))
            for k, i in enumerate(order)]
    msgs += [("/odom", ns_, m.odom(ns_, *p)) for ns_, p in zip(odom_ns, odom_poses)]
    rec = write_bag(tmp_path / "swapped", "mcap", {"/scan": SCAN_T, "/odom": ODOM_T}, msgs)
    out, summary = read_recording(rec)
    assert summary.scans_out_of_order == 1 and "out of stamp order" in summary.describe()
    inside = (ns >= odom_ns[0]) & (ns <= odom_ns[-1])
    assert (np.diff(out.t) >= 0).all()
    np.testing.assert_array_equal(out.ranges, log.ranges[inside])  # each scan stays with its stamp


def test_zero_header_stamps_fall_back_to_receive_times(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    m = _Msgs(True)
    s = log.sensor
    msgs = [("/scan", t, m.scan(0, r, s.first_angle, s.angle_step, s.min_range, s.max_range))
            for t, r in zip(ns, log.ranges)]
    msgs += [("/odom", t, m.odom(t, *p)) for t, p in zip(odom_ns, odom_poses)]
    rec = write_bag(tmp_path / "nostamp", "ros1", {"/scan": SCAN_T, "/odom": ODOM_T}, msgs)
    out, summary = read_recording(rec)
    assert summary.scan_stamp_source == "recording" and summary.odom_stamp_source == "header"
    assert "receive times" in summary.describe()
    inside = (ns >= odom_ns[0]) & (ns <= odom_ns[-1])
    np.testing.assert_allclose(out.t, ns[inside] * 1e-9, atol=1e-6)


@pytest.mark.parametrize("range_max", [float("inf"), float("nan")])
def test_unbounded_range_max_uses_the_largest_range(tmp_path, scene, range_max):
    log, ns, odom_ns, odom_poses = scene
    m = _Msgs(False)
    s = log.sensor
    msgs = [("/scan", t, m.scan(t, r, s.first_angle, s.angle_step, 0.0, range_max)) for t, r in zip(ns, log.ranges)]
    msgs += [("/odom", t, m.odom(t, *p)) for t, p in zip(odom_ns, odom_poses)]
    rec = write_bag(tmp_path / "unbounded", "mcap", {"/scan": SCAN_T, "/odom": ODOM_T}, msgs)
    out, summary = read_recording(rec)
    inside = (ns >= odom_ns[0]) & (ns <= odom_ns[-1])
    assert summary.max_range_from_data and "largest range" in summary.describe()
    assert np.float32(out.sensor.max_range) == np.nanmax(log.ranges) and out.sensor.min_range == 0.0
    np.testing.assert_array_equal(out.ranges, log.ranges[inside])


def test_each_scan_is_masked_with_its_own_range_limits(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    m = _Msgs(True)
    s = log.sensor
    short = np.arange(len(ns)) % 2 == 1  # every other message claims a 5 m range_max
    msgs = [("/scan", t, m.scan(t, r, s.first_angle, s.angle_step, s.min_range, 5.0 if sh else s.max_range))
            for t, r, sh in zip(ns, log.ranges, short)]
    msgs += [("/odom", t, m.odom(t, *p)) for t, p in zip(odom_ns, odom_poses)]
    rec = write_bag(tmp_path / "limits", "ros1", {"/scan": SCAN_T, "/odom": ODOM_T}, msgs)
    out, summary = read_recording(rec)
    inside = (ns >= odom_ns[0]) & (ns <= odom_ns[-1])
    expected = log.ranges.copy()
    expected[short] = np.where(expected[short] <= 5.0, expected[short], np.nan)
    assert summary.range_limits_varied and out.sensor.max_range == s.max_range
    assert (np.isnan(expected) & ~np.isnan(log.ranges)).sum() > 50  # the 5 m limit did remove beams
    np.testing.assert_array_equal(out.ranges, expected[inside])


def test_scans_in_odometry_gaps_are_dropped(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    gap = (odom_ns > T0_NS + 1_500_000_000) & (odom_ns < T0_NS + 2_300_000_000)  # 0.8 s without odometry
    kept_ns = odom_ns[~gap]
    rec = recording_from_log(tmp_path, "sqlite3", log, ns, kept_ns, odom_poses[~gap])
    lo_edge, hi_edge = kept_ns[kept_ns < T0_NS + 1_500_000_000].max(), kept_ns[kept_ns > T0_NS + 2_300_000_000].min()
    in_gap = (ns > lo_edge) & (ns < hi_edge)
    out, summary = read_recording(rec)
    assert summary.dropped_in_odom_gaps == int(in_gap.sum()) == 8
    assert summary.largest_odom_gap_s == pytest.approx(ODOM_PERIOD_NS * 1e-9)
    relaxed, s2 = read_recording(rec, options=RecordingOptions(max_odom_gap_s=2.0))
    assert s2.dropped_in_odom_gaps == 0 and len(relaxed) == len(out) + 8
    assert s2.largest_odom_gap_s == pytest.approx((hi_edge - lo_edge) * 1e-9, abs=1e-9)


def test_cli_max_odom_gap_option(tmp_path, scene, capsys):
    cli = _cli()
    log, ns, odom_ns, odom_poses = scene
    gap = (odom_ns > T0_NS + 1_500_000_000) & (odom_ns < T0_NS + 2_300_000_000)
    rec = recording_from_log(tmp_path, "ros1", log, ns, odom_ns[~gap], odom_poses[~gap])
    strict, relaxed = tmp_path / "strict.jsonl", tmp_path / "relaxed.jsonl"
    assert cli.main(["convert", str(rec), "--out", str(strict), "-q"]) == 0
    assert cli.main(["convert", str(rec), "--out", str(relaxed), "-q", "--max-odom-gap", "1.5"]) == 0
    assert len(read_scanlog(relaxed)) == len(read_scanlog(strict)) + 8
    assert cli.main(["convert", str(rec), "--out", str(strict), "--max-odom-gap", "0"]) == 2
    assert "max_odom_gap_s: must be > 0" in capsys.readouterr().err


def test_topic_choice_by_name_and_errors_list_candidates(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    m = _Msgs(False)
    s = log.sensor
    # A second laser on /scan_rear with a different beam count.
    rear = [("/scan_rear", t, m.scan(t, np.full(10, 2.0), 0.0, 0.1, 0.1, 5.0)) for t in ns]
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, odom_poses,
                             extra_topics={"/scan_rear": SCAN_T}, extra_messages=rear)
    with pytest.raises(InputError) as err:
        read_recording(rec)
    assert "/scan, /scan_rear" in str(err.value) and "scan_topic" in str(err.value)
    with pytest.raises(InputError, match=r"no topic /laser .*/scan, /scan_rear"):
        read_recording(rec, scan_topic="/laser")
    with pytest.raises(InputError, match="has type nav_msgs/msg/Odometry"):
        read_recording(rec, scan_topic="/odom")
    front, _ = read_recording(rec, scan_topic="/scan")
    back, _ = read_recording(rec, scan_topic="/scan_rear", odom_topic="/odom")
    assert front.sensor.beams == s.beams and back.sensor.beams == 10


# --- bad recordings ------------------------------------------------------------------------------------

def _cli():
    try:
        import closurecheck.simulation.simulate  # noqa: F401 - the CLI parser lists its scenarios
    except ImportError:
        pytest.skip("closurecheck.cli needs closurecheck.simulation.simulate to build its parser")
    from closurecheck import cli
    return cli


def _bad_cases(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    m2, m1 = _Msgs(False), _Msgs(True)
    s = log.sensor

    def scans(m, beams=None):
        out = []
        for k, (t, r) in enumerate(zip(ns, log.ranges)):
            rr = r if beams is None or k != 5 else r[:beams]
            out.append(("/scan", t, m.scan(t, rr, s.first_angle, s.angle_step, s.min_range, s.max_range)))
        return out

    def odom(m):
        return [("/odom", t, m.odom(t, *p)) for t, p in zip(odom_ns, odom_poses)]

    cases = {}
    cases["no laser topic"] = (write_bag(tmp_path / "nolaser", "mcap", {"/odom": ODOM_T}, odom(m2)),
                               r"no laser scan topic \(sensor_msgs/msg/LaserScan\).*/odom \(nav_msgs/msg/Odometry\)")
    cases["beam count changes"] = (
        write_bag(tmp_path / "beams", "ros1", {"/scan": SCAN_T, "/odom": ODOM_T}, scans(m1, 60) + odom(m1)),
        "message 6 has 60 ranges, the first had 100")
    tilted = scans(m2)
    tilted[7] = ("/scan", ns[7], m2.scan(ns[7], log.ranges[7], s.first_angle + 0.01, s.angle_step,
                                         s.min_range, s.max_range))
    cases["angles change"] = (
        write_bag(tmp_path / "angles", "sqlite3", {"/scan": SCAN_T, "/odom": ODOM_T}, tilted + odom(m2)),
        "message 8 has angle_min")
    cases["odometry missing"] = (write_bag(tmp_path / "noodom", "sqlite3", {"/scan": SCAN_T}, scans(m2)),
                                 r"no odometry topic .*/scan \(sensor_msgs/msg/LaserScan\)")
    cases["odometry empty"] = (
        write_bag(tmp_path / "emptyodom", "mcap", {"/scan": SCAN_T, "/odom": ODOM_T}, scans(m2)),
        "odometry topic /odom has no messages")
    late = [("/odom", t + 10 ** 11, m1.odom(t + 10 ** 11, *p)) for t, p in zip(odom_ns, odom_poses)]
    cases["no overlap in time"] = (
        write_bag(tmp_path / "late", "ros1", {"/scan": SCAN_T, "/odom": ODOM_T}, scans(m1) + late),
        "no scan can be paired with odometry")
    nan_odom = [("/odom", t, m2.odom(t, float("nan"), 0.0, 0.0)) for t in odom_ns]
    cases["odometry all non-finite"] = (
        write_bag(tmp_path / "nanodom", "mcap", {"/scan": SCAN_T, "/odom": ODOM_T}, scans(m2) + nan_odom),
        "no message has a finite pose")

    good = {}
    for fmt in FORMATS:
        (tmp_path / fmt).mkdir()
        good[fmt] = recording_from_log(tmp_path / fmt, fmt, log, ns, odom_ns, odom_poses)
    for fmt, suffix in (("mcap", ".mcap"), ("sqlite3", ".db3"), ("ros1", ".bag")):
        src = good[fmt] if fmt == "ros1" else next(good[fmt].glob(f"*{suffix}"))
        data = src.read_bytes()
        cut = tmp_path / f"truncated{suffix}"
        cut.write_bytes(data[: len(data) // 2])
        cases[f"truncated {fmt}"] = (cut, "truncated or corrupt file|not a valid")
    folder = good["mcap"]
    (folder / "metadata.yaml").write_text("rosbag2_bagfile_information: [unclosed\n")
    cases["broken metadata.yaml"] = (folder, "truncated or corrupt file")
    cases["missing path"] = (tmp_path / "nowhere.bag", "no such file or folder")
    jsonl = tmp_path / "log.jsonl"
    write_scanlog(jsonl, log)
    cases["a scan log, not a recording"] = (jsonl, "not a robot recording")
    renamed = tmp_path / "renamed.db3"
    renamed.write_bytes(good["ros1"].read_bytes())
    cases["ROS 1 bag with another name"] = (renamed, r"holds a ROS 1 bag .* rename it to end in \.bag")
    return cases


def test_bad_recordings_raise_one_line_input_errors(tmp_path, scene):
    for name, (path, pattern) in _bad_cases(tmp_path, scene).items():
        with pytest.raises(InputError, match=pattern) as err:
            read_recording(path)
        assert "\n" not in str(err.value), name
        assert str(path) in str(err.value), name


def test_bad_recordings_exit_status_2_in_cli(tmp_path, scene, capsys):
    cli = _cli()
    cases = _bad_cases(tmp_path, scene)
    for name, (path, _) in cases.items():
        out = tmp_path / "out.jsonl"
        assert cli.main(["convert", str(path), "--out", str(out)]) == 2, name
        err = capsys.readouterr().err
        assert err.startswith("closurecheck: error: ") and err.count("\n") == 1, (name, err)
        assert "Traceback" not in err and not out.exists(), name


def test_missing_extra_gives_install_hint(tmp_path, scene, monkeypatch):
    log, ns, odom_ns, odom_poses = scene
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, odom_poses)
    # A module set to None in sys.modules makes its import fail, as if not installed.
    for name in [n for n in sys.modules if n == "rosbags" or n.startswith("rosbags.")]:
        monkeypatch.setitem(sys.modules, name, None)
    monkeypatch.setitem(sys.modules, "rosbags", None)
    with pytest.raises(InputError) as err:
        read_recording(rec)
    assert str(err.value) == recordings.MISSING_EXTRA
    assert "pip install 'closurecheck[recordings]'" in str(err.value)


def test_is_recording_tells_recordings_from_scan_logs(tmp_path, scene):
    log, ns, odom_ns, odom_poses = scene
    jsonl = tmp_path / "log.jsonl.gz"
    write_scanlog(jsonl, log)
    assert not is_recording(jsonl)
    assert not is_recording(tmp_path)  # a folder without metadata.yaml or a storage file
    ros1 = recording_from_log(tmp_path, "ros1", log, ns, odom_ns, odom_poses)
    plain_name = tmp_path / "recording"
    plain_name.write_bytes(ros1.read_bytes())
    assert is_recording(ros1) and is_recording(plain_name)


# --- the numpy half: interpolation and pairing ---------------------------------------------------------

def test_yaw_from_quaternion_matches_scipy():
    Rotation = pytest.importorskip("scipy.spatial.transform").Rotation
    rot = Rotation.random(200, random_state=3)
    q = rot.as_quat()  # scalar-last (x, y, z, w), the ROS order
    # scipy's intrinsic ZYX Euler angles: the first is the yaw of the ZYX decomposition.
    expected = rot.as_euler("ZYX")[:, 0]
    got = yaw_from_quaternion(*(q * 3.7).T)  # scale must not matter
    np.testing.assert_allclose(angle_diff(got, expected), 0.0, atol=1e-12)


def test_interpolation_takes_the_short_way_across_pi():
    t = np.array([0.0, 1.0])
    poses = np.array([[0.0, 0.0, math.pi - 0.1], [2.0, -4.0, -math.pi + 0.1]])
    mid = interpolate_poses(t, poses, np.array([0.25, 0.5]))
    np.testing.assert_allclose(mid[:, :2], [[0.5, -1.0], [1.0, -2.0]])
    np.testing.assert_allclose(angle_diff(mid[:, 2], [math.pi - 0.05, math.pi]), 0.0, atol=1e-12)
    assert mid[1, 2] == pytest.approx(math.pi)  # wrapped to (-pi, pi]


def test_pairing_counts_and_exact_stamps():
    odom_ns = np.array([100, 200, 300, 1300, 1400], dtype=np.int64)
    poses = np.column_stack([odom_ns * 1e-2, np.zeros(5), np.zeros(5)])
    scan_ns = np.array([50, 100, 150, 300, 800, 1400, 1500], dtype=np.int64)
    p = pair_scans(scan_ns, odom_ns, poses, max_gap_s=500e-9)
    assert (p.before, p.after, p.in_gaps) == (1, 1, 1)
    np.testing.assert_array_equal(p.keep, [1, 2, 3, 5])
    np.testing.assert_allclose(p.odom[:, 0], [1.0, 1.5, 3.0, 14.0])
    assert p.largest_gap_s == pytest.approx(100e-9)


def test_clean_odometry_sorts_and_drops_bad_samples():
    ns = np.array([30, 10, 20, 20, 40])
    poses = np.array([[3, 0, 0], [1, 0, 0], [2, 0, 0], [9, 0, 0], [np.nan, 0, 0]], dtype=float)
    ns2, poses2, non_finite, repeated = clean_odometry(ns, poses)
    np.testing.assert_array_equal(ns2, [10, 20, 30])
    np.testing.assert_array_equal(poses2[:, 0], [1, 2, 3])
    assert (non_finite, repeated) == (1, 1)


def test_options_validate():
    with pytest.raises(InputError, match="max_odom_gap_s"):
        RecordingOptions(max_odom_gap_s=0.0)
    with pytest.raises(InputError, match="angle_tolerance_rad"):
        RecordingOptions(angle_tolerance_rad=float("nan"))


def test_with_a_simulated_log_when_available(tmp_path):
    simulate = pytest.importorskip("closurecheck.simulation.simulate")
    log = simulate.simulate_log(simulate.DEFAULT_SCENARIO, seed=1, scans=30)
    ns = T0_NS + np.round((log.t - log.t[0]) * 1e9).astype(np.int64) + SCAN_OFFSET_NS
    # Odometry at every scan and half-way between: linear interpolation of the
    # midpoint samples makes the kept poses exact at the scan stamps.
    odom_ns = np.concatenate([ns, (ns[:-1] + ns[1:]) // 2])
    mid = interpolate_poses(rel_s(ns), log.odom, rel_s(odom_ns))
    order = np.argsort(odom_ns)
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns[order], mid[order])
    out, summary = read_recording(rec, options=RecordingOptions(max_odom_gap_s=10.0))
    assert summary.dropped == 0 and len(out) == len(log)
    np.testing.assert_array_equal(out.ranges, log.ranges)
    np.testing.assert_allclose(out.odom[:, :2], log.odom[:, :2], atol=1e-9)
    np.testing.assert_allclose(angle_diff(out.odom[:, 2], log.odom[:, 2]), 0, atol=1e-9)


def test_cli_run_takes_a_recording_directly(tmp_path, scene, capsys):
    # `closurecheck run RECORDING` converts on the fly: same graph nodes as
    # running on the converted log.
    import json

    cli = _cli()
    log, ns, odom_ns, odom_poses = scene
    rec = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, odom_poses)
    conv = tmp_path / "conv.jsonl.gz"
    assert cli.main(["convert", str(rec), "--out", str(conv), "-q"]) == 0
    for src, out in ((rec, tmp_path / "from_rec"), (conv, tmp_path / "from_log")):
        status = cli.main(["run", str(src), "--out", str(out), "-q", "--no-report", "--jobs", "1"])
        assert status == 0, capsys.readouterr().err
    a = json.loads((tmp_path / "from_rec" / "graph.json").read_text())
    b = json.loads((tmp_path / "from_log" / "graph.json").read_text())
    assert [n["id"] for n in a["nodes"]] == [n["id"] for n in b["nodes"]]
    np.testing.assert_allclose([n["odom"] for n in a["nodes"]], [n["odom"] for n in b["nodes"]], atol=1e-5)


def test_info_reads_recordings_as_run_does(tmp_path, scene, capsys):
    # `info` used to refuse what `run` takes: "not JSON" for an MCAP file,
    # "is a directory" for a bag folder.
    cli = _cli()
    log, ns, odom_ns, odom_poses = scene
    folder = recording_from_log(tmp_path, "mcap", log, ns, odom_ns, odom_poses)
    (storage,) = [p for p in folder.iterdir() if p.suffix == ".mcap"]
    kept, _ = read_recording(folder)
    for target in (folder, storage):
        assert cli.main(["info", str(target)]) == 0, capsys.readouterr().err
        out = capsys.readouterr().out
        assert out.startswith(f"{target}: {len(kept)} scans") and f"{SENSOR.beams} beams" in out
        assert "ROS 2" in out and "/scan" in out  # what the conversion read and kept
    # and refuses what run refuses, with the same line
    assert cli.main(["info", str(storage), "--scan-topic", "/nope"]) == 2
    info_err = capsys.readouterr().err
    assert cli.main(["run", str(storage), "--scan-topic", "/nope", "--out", str(tmp_path / "o"), "-q"]) == 2
    assert capsys.readouterr().err == info_err and "/nope" in info_err
