"""Property-based tests: whatever is wrong with a file, the answer is one clear
InputError (exit status 2 from the CLI), never a traceback or another exception."""

import gzip
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from closurecheck import cli
from closurecheck.errors import InputError
from closurecheck.io.pairs_csv import read_pairs
from closurecheck.io.scanlog import MAX_BEAMS, MAX_HEADER_BYTES, max_line_bytes, read_scanlog

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


# --- resource bounds: nesting, huge numbers, huge headers, endless lines (docs/formats.md, "Limits") -------

WIDE = {"scanlog": 1, "sensor": {"first_angle": -1.0, "angle_step": 0.0005, "beams": 4000,
                                 "min_range": 0.05, "max_range": 10.0}}


def _cli_one_line(capsys, args, *words):
    """Run the CLI; it must exit 2 with exactly one line on stderr and no traceback."""
    assert cli.main(args) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and err.startswith("closurecheck: error: ") and "Traceback" not in err, err
    for w in words:
        assert w in err, err
    return err


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(depth=st.integers(1, 150_000), where=st.sampled_from(["header", "scan", "toml"]))
@example(depth=100_000, where="header")
@example(depth=100_000, where="scan")
@example(depth=100_000, where="toml")
def test_deep_nesting_is_bad_input_not_a_crash(tmp_path, capsys, depth, where):
    nest = "[" * depth + "]" * depth
    if where == "toml":
        path = tmp_path / "deep.toml"
        path.write_text(f"a = {nest}\n")
        log = tmp_path / "ok.jsonl"
        log.write_text("\n".join(valid_lines(3)) + "\n")
        _cli_one_line(capsys, ["run", str(log), "--out", str(tmp_path / "o"), "--config", str(path), "-q"],
                      "deep.toml")
        return
    path = tmp_path / "deep.jsonl"
    if where == "header":
        path.write_text(nest + "\n")
    else:
        path.write_text(json.dumps(WIDE) + '\n{"t": 0, "odom": [0, 0, 0], "ranges": ' + nest + "}\n")
    _cli_one_line(capsys, ["info", str(path)], "deep.jsonl:" + ("1" if where == "header" else "2"))


def _place_number(where: str, token: str) -> list[str]:
    lines = valid_lines(3)
    if where in ("beams", "first_angle"):
        lines[0] = lines[0].replace(f'"{where}": ' + json.dumps(HEADER["sensor"][where]), f'"{where}": {token}')
    elif where == "odometry_noise":
        lines[0] = lines[0][:-1] + f', "odometry_noise": {{"heading_rad_per_sqrt_m": {token}}}}}'
    elif where == "t":
        lines[2] = lines[2].replace('"t": 0.1', f'"t": {token}')
    elif where == "odom":
        lines[2] = lines[2].replace('"odom": [0.1', f'"odom": [{token}')
    elif where == "truth":
        lines[2] = lines[2][:-1] + f', "truth": [0, {token}, 0]}}'
    else:  # ranges
        lines[2] = lines[2].replace('"ranges": [1.0', f'"ranges": [{token}')
    assert token in "\n".join(lines)
    return lines


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(digits=st.integers(310, 4000), negative=st.booleans(),
       where=st.sampled_from(["beams", "first_angle", "odometry_noise", "t", "odom", "truth", "ranges"]))
@example(digits=401, negative=False, where="odom")
@example(digits=401, negative=False, where="ranges")
@example(digits=401, negative=False, where="t")
@example(digits=401, negative=False, where="beams")
def test_numbers_beyond_float64_are_bad_input(tmp_path, capsys, digits, negative, where):
    # float64 ends near 1.8e308 (IEEE 754): a 310-digit integer is valid JSON but no float.
    token = ("-" if negative else "") + "9" * digits
    path = tmp_path / "big.jsonl"
    path.write_text("\n".join(_place_number(where, token)) + "\n")
    line = "1" if where in ("beams", "first_angle", "odometry_noise") else "3"
    err = _cli_one_line(capsys, ["info", str(path)], f"big.jsonl:{line}:")
    assert len(err) < 400


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(beams=st.integers(MAX_BEAMS + 1, 10 ** 15))
@example(beams=100_000_000)
def test_a_header_beyond_the_beam_cap_is_refused_before_any_buffer(tmp_path, beams):
    import tracemalloc

    header = dict(HEADER, sensor=dict(HEADER["sensor"], beams=beams))
    path = tmp_path / "wide.jsonl"
    path.write_text(json.dumps(header) + "\n")
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match=f'"beams" is {beams}, more than this tool reads \\({MAX_BEAMS}'):
            read_scanlog(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 5_000_000  # the old reader sized beams x 2048 float32 before reading a scan


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(pad=st.integers(-200, 200), line=st.sampled_from([1, 2]))
def test_line_length_cap_is_exact(tmp_path, pad, line):
    # A line may hold max_line_bytes(beams) bytes (newline included), the
    # header MAX_HEADER_BYTES: whitespace fills a valid line to the cap plus pad.
    lines = valid_lines(3)
    cap = MAX_HEADER_BYTES if line == 1 else max_line_bytes(BEAMS)
    body = lines[line - 1]
    lines[line - 1] = body[:-1] + " " * (cap - 1 - len(body) + pad) + body[-1]
    path = tmp_path / "long.jsonl"
    path.write_text("\n".join(lines) + "\n")
    if pad <= 0:
        assert len(read_scanlog(path)) == 3
    else:
        with pytest.raises(InputError, match=f"long.jsonl:{line}: line longer than {cap} bytes"):
            read_scanlog(path)


def test_a_file_without_line_breaks_is_read_only_up_to_the_cap(tmp_path):
    import tracemalloc

    path = tmp_path / "zeros.jsonl"
    path.write_bytes(b"\0" * (8 * MAX_HEADER_BYTES))
    tracemalloc.start()
    try:
        with pytest.raises(InputError, match="zeros.jsonl:1: line longer than"):
            read_scanlog(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 3 * MAX_HEADER_BYTES


def test_dev_zero_as_a_log_is_refused(capsys):
    import os

    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero here")
    _cli_one_line(capsys, ["info", "/dev/zero"], "/dev/zero", "not a regular file")


# --- ranges are numbers or null; NaN and Infinity are not JSON (RFC 8259, section 6) ----------------

NOT_A_NUMBER = st.one_of(st.booleans(), st.text(max_size=12), st.floats(allow_nan=False).map(str),
                         st.lists(st.integers(0, 3), max_size=2), st.just({}))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(beam=st.integers(0, BEAMS - 1), value=NOT_A_NUMBER, scan=st.integers(0, 3),
       extra=st.sampled_from([None, "a note", 'say "NaN" or true']))
def test_ranges_that_are_not_numbers_are_refused(tmp_path, beam, value, scan, extra):
    lines = valid_lines(4)
    rec = json.loads(lines[1 + scan])
    rec["ranges"][beam] = value
    if extra is not None:
        rec["note"] = extra  # strings elsewhere on the line must not hide the bad range
    lines[1 + scan] = json.dumps(rec)
    path = tmp_path / "typed.jsonl"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as info:
        read_scanlog(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}:{scan + 2}: ") and "\n" not in msg
    if not isinstance(value, (list, dict)):
        assert f"beam {beam}" in msg


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(token=st.sampled_from(["NaN", "Infinity", "-Infinity"]),
       where=st.sampled_from(["t", "odom", "truth", "ranges", "first_angle", "odometry_noise"]))
def test_nan_and_infinity_tokens_are_refused(tmp_path, token, where):
    path = tmp_path / "tokens.jsonl"
    path.write_text("\n".join(_place_number(where, token)) + "\n")
    with pytest.raises(InputError, match=f"not JSON \\({token} is not a JSON number"):
        read_scanlog(path)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(st.lists(st.one_of(st.none(), st.integers(0, 30),
                                        st.floats(0.0, 30.0, allow_nan=False, width=32)),
                              min_size=BEAMS, max_size=BEAMS), min_size=1, max_size=5),
       note=st.sampled_from([None, "NaN", "Infinity true false", '"quoted"', "ranges"]))
def test_valid_ranges_still_read_exactly(tmp_path, rows, note):
    # The fast checks must not refuse what is valid: null, integers, floats,
    # and strings in keys the format does not know.
    lines = [json.dumps(HEADER)]
    for k, r in enumerate(rows):
        rec = {"t": float(k), "odom": [0.0, 0.0, 0.0], "ranges": r}
        if note is not None:
            rec["label"] = note
        lines.append(json.dumps(rec))
    path = tmp_path / "ok.jsonl"
    path.write_text("\n".join(lines) + "\n")
    log = read_scanlog(path)
    want = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float32)
    lo, hi = HEADER["sensor"]["min_range"], HEADER["sensor"]["max_range"]
    want[(want < lo) | (want > hi)] = np.nan
    np.testing.assert_array_equal(log.ranges, want)


# --- fuzz: random corruptions of a valid log and pairs file, through `closurecheck run` -------------

FUZZ_SECONDS = 4.0


def _corrupt_bytes(data: bytes, rnd) -> bytes:
    ops = ("flip", "delete", "insert", "dup_line", "swap_lines", "truncate", "newline", "token")
    op = rnd.choice(ops)
    n = len(data)
    i = rnd.randrange(n)
    if op == "flip":
        return data[:i] + bytes([rnd.randrange(256)]) + data[i + 1:]
    if op == "delete":
        return data[:i] + data[i + rnd.randrange(1, 200):]
    if op == "insert":
        return data[:i] + bytes(rnd.randrange(256) for _ in range(rnd.randrange(1, 40))) + data[i:]
    lines = data.split(b"\n")
    if op == "dup_line":
        k = rnd.randrange(len(lines))
        lines.insert(k, lines[k])
    elif op == "swap_lines":
        a, b = rnd.randrange(len(lines)), rnd.randrange(len(lines))
        lines[a], lines[b] = lines[b], lines[a]
    elif op == "truncate":
        return data[:i]
    elif op == "newline":
        return data[:i] + b"\n" + data[i:]
    else:
        tokens = [b"NaN", b"true", b'"1.5"', b"9" * 400, b"[[[]]]", b"-1e400", b"null", b"{}", b"1e30"]
        j = data.find(b",", i)
        return data if j < 0 else data[:j + 1] + rnd.choice(tokens) + data[j + 1:]
    return b"\n".join(lines)


def _check_run(tmp_path, args, capsys):
    import shutil

    out = tmp_path / "fuzz_out"
    code = cli.main(args + ["--out", str(out), "-q", "--jobs", "1", "--no-report"])
    err = capsys.readouterr().err
    # 3: the run finished and its own checks found the map doubtful (outputs complete, marked).
    assert code in (0, 2, 3), err
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".fuzz_out.closurecheck-")]
    assert leftovers == []
    if code == 2:
        assert err.count("\n") == 1 and err.startswith("closurecheck: error: ") and "Traceback" not in err, err
        assert not out.exists()  # nothing half-written
    else:
        assert sorted(p.name for p in out.iterdir()) == ["candidates.csv", "config.toml", "graph.json",
                                                         "summary.json"]
        json.loads((out / "graph.json").read_text(), parse_constant=lambda t: pytest.fail(t))
        shutil.rmtree(out)
    return code


@pytest.fixture(scope="module")
def fuzz_inputs(tmp_path_factory):
    from closurecheck.io.scanlog import write_scanlog
    from closurecheck.simulation.simulate import SimOptions, simulate_log

    base = tmp_path_factory.mktemp("fuzz")
    log = base / "seed.jsonl"
    write_scanlog(log, simulate_log("ring", seed=2, scans=40, options=SimOptions(beams=181)))
    return log.read_bytes(), b"from,to,dx,dy,dtheta\n0,5,0.1,0,0\n3,12,,,\n20,2,0,0,0.1\n"


@pytest.mark.parametrize("target", ["log", "pairs"])
def test_fuzz_readers_through_run(tmp_path, capsys, fuzz_inputs, target):
    import random
    import time

    log_bytes, pairs_bytes = fuzz_inputs
    rnd = random.Random(20240611 + (target == "pairs"))
    t0, runs, codes = time.monotonic(), 0, set()
    while time.monotonic() - t0 < FUZZ_SECONDS or runs < 10:
        data = log_bytes if target == "log" else pairs_bytes
        for _ in range(rnd.randrange(1, 4)):
            data = _corrupt_bytes(data, rnd) or b"x"
        log, pairs = tmp_path / "f.jsonl", tmp_path / "f.csv"
        if target == "log":
            log.write_bytes(gzip.compress(data, mtime=0) if rnd.random() < 0.3 else data)
            args = ["run", str(log)]
        else:
            log.write_bytes(log_bytes)
            pairs.write_bytes(data)
            args = ["run", str(log), "--candidates", str(pairs)]
        codes.add(_check_run(tmp_path, args, capsys))
        runs += 1
    assert 2 in codes  # the corruptions did reach the readers' checks
