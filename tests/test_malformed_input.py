"""Property-based tests: whatever is wrong with a file, the answer is one clear
InputError (exit status 2 from the CLI), never a traceback or another exception."""

import gzip
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from closurecheck import cli
from closurecheck.errors import InputError
from closurecheck.io.pairs_csv import read_pairs
from closurecheck.io.scanlog import read_scanlog

BEAMS = 6
HEADER = {"scanlog": 1, "sensor": {"first_angle": -1.0, "angle_step": 0.4, "beams": BEAMS,
                                   "min_range": 0.05, "max_range": 10.0}}


def valid_lines(n):
    lines = [json.dumps(HEADER)]
    for k in range(n):
        lines.append(json.dumps({"t": 0.1 * k, "odom": [0.1 * k, 0.0, 0.0], "ranges": [1.0 + 0.1 * b for b in range(BEAMS)]}))
    return lines


CORRUPTIONS = st.sampled_from([
    "truncate_line", "drop_key", "beam_count", "time_back", "nan_pose", "garbage", "bad_type", "blank_middle",
    "bad_header", "binary",
])


def corrupt(lines, kind, where, data):
    lines = list(lines)
    k = 2 + where % (len(lines) - 2)  # a scan line with one before it
    rec = json.loads(lines[k])
    if kind == "truncate_line":
        lines[k] = lines[k][: max(1, data % len(lines[k]))]
    elif kind == "drop_key":
        rec.pop(["t", "odom", "ranges"][data % 3])
        lines[k] = json.dumps(rec)
    elif kind == "beam_count":
        rec["ranges"] = rec["ranges"][: data % BEAMS] if data % 2 else rec["ranges"] + [1.0] * (1 + data % 3)
        lines[k] = json.dumps(rec)
    elif kind == "time_back":
        rec["t"] = -1.0 - data
        lines[k] = json.dumps(rec)
    elif kind == "nan_pose":
        lines[k] = lines[k].replace('"odom": [', '"odom": [NaN, ', 1).replace(", 0.0, 0.0]", ", 0.0]", 1)
    elif kind == "garbage":
        lines[k] = "}{" * (1 + data % 4)
    elif kind == "bad_type":
        rec[["t", "odom", "ranges"][data % 3]] = "text"
        lines[k] = json.dumps(rec)
    elif kind == "blank_middle":
        lines.insert(k, "")
        return lines, k + 1
    elif kind == "bad_header":
        lines[0] = json.dumps({"scanlog": 1, "sensor": {"beams": BEAMS}})
        return lines, 1
    elif kind == "binary":
        lines[k] = "\x00\x01\x02"
    return lines, k + 1


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(kind=CORRUPTIONS, where=st.integers(0, 100), data=st.integers(0, 1000), zipped=st.booleans())
def test_corrupted_logs_give_one_line_input_errors(tmp_path, kind, where, data, zipped):
    lines, line_no = corrupt(valid_lines(8), kind, where, data)
    text = "\n".join(lines) + "\n"
    path = tmp_path / f"c_{kind}.jsonl"
    if zipped:
        path.write_bytes(gzip.compress(text.encode(), mtime=0))
    else:
        path.write_text(text)
    try:
        read_scanlog(path)
    except InputError as exc:
        msg = str(exc)
        assert "\n" not in msg and msg.startswith(str(path) + ":")
        assert f":{line_no}:" in msg, (kind, msg)
    else:
        pytest.fail(f"corruption {kind!r} was read without an error")


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(cut=st.integers(10, 4000))
def test_truncated_gzip_anywhere(tmp_path, cut):
    text = "\n".join(valid_lines(200)) + "\n"
    data = gzip.compress(text.encode(), mtime=0)
    path = tmp_path / "t.jsonl.gz"
    path.write_bytes(data[: min(cut, len(data) - 9)])
    with pytest.raises(InputError) as info:
        read_scanlog(path)
    assert str(info.value).startswith(str(path) + ":")


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(body=st.lists(st.sampled_from(list("0123456789,.-abe \"\nxyft") + ["from", "to", "dx", "nan", "1e9"]),
                     max_size=40).map("".join))
def test_random_pairs_files_parse_or_fail_cleanly(tmp_path, body):
    path = tmp_path / "pairs.csv"
    path.write_text("from,to\n" + body)
    try:
        pairs = read_pairs(path, scan_count=50)
    except InputError as exc:
        assert "\n" not in str(exc) and str(exc).startswith(str(path))
    else:
        assert np.all((pairs.src >= 0) & (pairs.src < 50) & (pairs.dst >= 0) & (pairs.dst < 50))
        assert np.all(pairs.src != pairs.dst)


def test_cli_maps_a_corrupt_log_to_exit_two_without_traceback(tmp_path, capsys):
    lines, _ = corrupt(valid_lines(5), "beam_count", 2, 1)
    path = tmp_path / "bad.jsonl"
    path.write_text("\n".join(lines) + "\n")
    out_dir = tmp_path / "out"
    assert cli.main(["run", str(path), "--out", str(out_dir), "-q"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.count("\n") == 1 and "wrong beam count" in err
    assert not (out_dir / "graph.json").exists()
