"""Scan-log reading and writing (docs/formats.md, "Scan log") and its error messages."""

import gzip
import json

import numpy as np
import pytest

from closurecheck import cli
from closurecheck.errors import InputError
from closurecheck.io.scanlog import (
    Sensor,
    make_scanlog,
    read_scanlog,
    scan_points,
    write_scanlog,
)

SENSOR = Sensor(first_angle=-2.356, angle_step=0.00654, beams=8, min_range=0.05, max_range=20.0)
HEADER = {"scanlog": 1, "sensor": {"first_angle": -2.356, "angle_step": 0.00654, "beams": 8,
                                   "min_range": 0.05, "max_range": 20.0}, "notes": "unit test"}


def scan_line(t=0.0, odom=(0, 0, 0), ranges=None, truth=None):
    rec = {"t": t, "odom": list(odom), "ranges": [1.0] * 8 if ranges is None else ranges}
    if truth is not None:
        rec["truth"] = list(truth)
    return json.dumps(rec)


def write_lines(path, lines, compress=False):
    text = "\n".join(lines) + "\n"
    if compress:
        with gzip.open(path, "wt") as fh:
            fh.write(text)
    else:
        path.write_text(text)
    return path


def good_lines(n=3):
    return [json.dumps(HEADER)] + [scan_line(t=0.1 * k, odom=(k, 0, 0)) for k in range(n)]


class TestReading:
    def test_reads_header_and_scans(self, tmp_path):
        lines = [json.dumps(HEADER),
                 scan_line(0.0, (0, 0, 0), [1, None, 3, 4, 5, 6, 7, 8], truth=(0, 0, 0)),
                 scan_line(0.5, (1, 2, 4.0), [0.01, 25.0, 3, 4, 5, 6, 7, 8])]
        log = read_scanlog(write_lines(tmp_path / "a.jsonl", lines))
        assert len(log) == 2
        assert log.sensor == SENSOR
        assert log.header == {"notes": "unit test"}
        assert log.ranges.dtype == np.float32
        # null and values outside [min_range, max_range] are no return (docs/formats.md, "Scan log").
        assert np.isnan(log.ranges[0, 1]) and np.isnan(log.ranges[1, 0]) and np.isnan(log.ranges[1, 1])
        assert log.ranges[0, 2] == 3.0
        # Angles are wrapped to (-pi, pi].
        assert log.odom[1, 2] == pytest.approx(4.0 - 2 * np.pi)
        # Truth present on some scans only: NaN rows elsewhere.
        assert np.isnan(log.truth[1]).all() and np.isfinite(log.truth[0]).all()

    def test_gzip_detected_by_magic_bytes_not_name(self, tmp_path):
        plain = read_scanlog(write_lines(tmp_path / "a.jsonl", good_lines()))
        # gzip data under a plain name, and plain data under a .gz name.
        zipped = read_scanlog(write_lines(tmp_path / "b.jsonl", good_lines(), compress=True))
        misnamed = read_scanlog(write_lines(tmp_path / "c.jsonl.gz", good_lines()))
        for other in (zipped, misnamed):
            np.testing.assert_array_equal(other.ranges, plain.ranges)
            np.testing.assert_array_equal(other.odom, plain.odom)

    def test_scan_points_bearings(self):
        ranges = np.full(8, np.nan, dtype=np.float32)
        ranges[0] = 2.0
        ranges[5] = 1.0
        pts = scan_points(ranges, SENSOR)
        b0, b5 = SENSOR.first_angle, SENSOR.first_angle + 5 * SENSOR.angle_step
        np.testing.assert_allclose(pts, [[2 * np.cos(b0), 2 * np.sin(b0)], [np.cos(b5), np.sin(b5)]], rtol=1e-6)

    def test_mount_moves_points_into_robot_frame(self, tmp_path):
        header = dict(HEADER, mount=[0.3, 0.0, np.pi / 2])
        log = read_scanlog(write_lines(tmp_path / "m.jsonl", [json.dumps(header), scan_line()]))
        assert log.sensor.mount == (0.3, 0.0, np.pi / 2)
        ranges = np.full(8, np.nan)
        ranges[0] = 1.0
        b0 = SENSOR.first_angle
        # A point at bearing b0 in the sensor frame is at bearing b0 + 90 deg, offset 0.3 m ahead.
        np.testing.assert_allclose(scan_points(ranges, log.sensor),
                                   [[0.3 + np.cos(b0 + np.pi / 2), np.sin(b0 + np.pi / 2)]], atol=1e-12)


class TestRoundTrip:
    @pytest.mark.parametrize("name", ["log.jsonl", "log.jsonl.gz"])
    def test_write_then_read(self, tmp_path, name):
        rng = np.random.default_rng(5)
        n = 40
        ranges = rng.uniform(0.0, 22.0, (n, 8)).astype(np.float32)
        ranges[rng.random((n, 8)) < 0.1] = np.nan
        log = make_scanlog(SENSOR, np.cumsum(rng.uniform(0.05, 0.2, n)), rng.normal(size=(n, 3)), ranges,
                           truth=rng.normal(size=(n, 3)), header={"notes": "round trip"})
        path = tmp_path / name
        write_scanlog(path, log)
        with open(path, "rb") as fh:
            assert (fh.read(2) == b"\x1f\x8b") == name.endswith(".gz")
        back = read_scanlog(path)
        np.testing.assert_allclose(back.ranges, log.ranges, atol=5e-5, equal_nan=True)
        np.testing.assert_array_equal(np.isnan(back.ranges), np.isnan(log.ranges))
        np.testing.assert_array_equal(back.t, log.t)
        np.testing.assert_allclose(back.odom[:, :2], log.odom[:, :2], atol=1e-6)
        np.testing.assert_allclose(np.cos(back.odom[:, 2] - log.odom[:, 2]), 1.0, atol=1e-10)
        np.testing.assert_allclose(back.truth[:, :2], log.truth[:, :2], atol=1e-6)
        assert back.header == {"notes": "round trip"}

    def test_full_precision_mode_keeps_float32_exactly(self, tmp_path):
        rng = np.random.default_rng(6)
        ranges = rng.uniform(0.06, 19.9, (5, 8)).astype(np.float32)
        log = make_scanlog(SENSOR, np.arange(5.0), np.zeros((5, 3)), ranges)
        write_scanlog(tmp_path / "x.jsonl", log, decimals=None)
        np.testing.assert_array_equal(read_scanlog(tmp_path / "x.jsonl").ranges, ranges)

    def test_failed_write_keeps_previous_file(self, tmp_path):
        path = tmp_path / "keep.jsonl"
        path.write_text("previous good content\n")
        log = make_scanlog(SENSOR, [0.0], np.zeros((1, 3)), np.ones((1, 8)))
        bad = type("Broken", (), {})()  # not a ScanLog: fails mid-write
        with pytest.raises(Exception):
            write_scanlog(path, bad)
        assert path.read_text() == "previous good content\n"
        assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.jsonl"]
        write_scanlog(path, log)
        assert len(read_scanlog(path)) == 1


BAD_CASES = [
    # (lines, line number in the message, words in the message)
    ([], 1, "empty"),
    (["not json at all", scan_line()], 1, "header"),
    ([json.dumps({"sensor": HEADER["sensor"]}), scan_line()], 1, "missing header"),
    ([json.dumps({"scanlog": 2, "sensor": HEADER["sensor"]})], 1, "version"),
    ([json.dumps({"scanlog": 1, "sensor": dict(HEADER["sensor"], beams=0)})], 1, "beams"),
    ([json.dumps({"scanlog": 1, "sensor": dict(HEADER["sensor"], angle_step="x")})], 1, "angle_step"),
    ([json.dumps(HEADER), scan_line(), "{this is not json"], 3, "not JSON"),
    ([json.dumps(HEADER), scan_line(), scan_line(ranges=[1.0] * 7)], 3, "wrong beam count"),
    ([json.dumps(HEADER), scan_line(odom=(0, "a", 0))], 2, "odom"),
    ([json.dumps(HEADER), scan_line(t=1.0), scan_line(t=0.5)], 3, "time goes backwards"),
    ([json.dumps(HEADER), json.dumps({"t": 0.0, "odom": [0, None, 0], "ranges": [1.0] * 8})], 2, "non-finite"),
    ([json.dumps(HEADER), json.dumps({"t": 0.0, "ranges": [1.0] * 8})], 2, "odom"),
    ([json.dumps(HEADER), json.dumps({"t": "noon", "odom": [0, 0, 0], "ranges": [1.0] * 8})], 2, '"t"'),
    ([json.dumps(HEADER), scan_line(ranges=["a"] * 8)], 2, "ranges"),
    ([json.dumps(HEADER), scan_line(truth=(0, 1))], 2, "truth"),
    ([json.dumps(HEADER), "[1, 2, 3]"], 2, "object"),
    ([json.dumps(HEADER), scan_line(), "", scan_line(t=1.0)], 3, "empty line"),
]


class TestBadInput:
    @pytest.mark.parametrize("lines,line_no,words", BAD_CASES)
    def test_error_names_file_line_and_problem(self, tmp_path, lines, line_no, words):
        path = tmp_path / "bad.jsonl"
        path.write_text("\n".join(lines) + ("\n" if lines else ""))
        with pytest.raises(InputError) as info:
            read_scanlog(path)
        msg = str(info.value)
        assert msg.startswith(f"{path}:{line_no}: "), msg
        assert words.lower() in msg.lower(), msg
        assert "\n" not in msg

    @pytest.mark.parametrize("lines,line_no,words", BAD_CASES)
    def test_cli_exit_status_two_with_line_number(self, tmp_path, capsys, lines, line_no, words):
        path = tmp_path / "bad.jsonl"
        path.write_text("\n".join(lines) + ("\n" if lines else ""))
        assert cli.main(["info", str(path)]) == 2
        err = capsys.readouterr().err.strip()
        assert err.count("\n") == 0 and f":{line_no}: " in err and "Traceback" not in err

    def test_nan_literal_is_not_json(self, tmp_path):
        # RFC 8259, section 6: NaN and Infinity are not JSON numbers.
        path = write_lines(tmp_path / "n.jsonl",
                           [json.dumps(HEADER), '{"t": 0.0, "odom": [0, NaN, 0], "ranges": [1,1,1,1,1,1,1,1]}'])
        with pytest.raises(InputError, match=r"n\.jsonl:2: not JSON \(NaN is not a JSON number"):
            read_scanlog(path)

    def test_truncated_gzip(self, tmp_path):
        full = write_lines(tmp_path / "full.jsonl.gz", good_lines(400), compress=True)
        data = full.read_bytes()
        cut = tmp_path / "cut.jsonl.gz"
        cut.write_bytes(data[: len(data) // 2])
        with pytest.raises(InputError, match="truncated gzip") as info:
            read_scanlog(cut)
        assert str(info.value).startswith(f"{cut}:")
        assert cli.main(["info", str(cut)]) == 2

    def test_missing_file_and_directory(self, tmp_path):
        with pytest.raises(InputError, match="no such file"):
            read_scanlog(tmp_path / "nope.jsonl")
        with pytest.raises(InputError, match="directory"):
            read_scanlog(tmp_path)


def test_info_command_summarises_a_log(tmp_path, capsys):
    path = write_lines(tmp_path / "ok.jsonl", good_lines(5))
    assert cli.main(["info", str(path)]) == 0
    out = capsys.readouterr().out
    assert "5 scans" in out and "8 beams" in out
