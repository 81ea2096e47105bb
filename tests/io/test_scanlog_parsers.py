"""The scan-log reader parses scan lines with orjson where it can and with Python's json elsewhere;
both must give the arrays and the error messages Python's json alone gives (docs/formats.md, "Scan log").

The reference below reads a log with the standard library's ``json.loads``
and numpy only, independently of closurecheck's reader: JSON null is no
return (NaN), ranges are float32 and outside [min_range, max_range] no
return, angles wrapped to (-pi, pi] with ``se2.wrap`` (the project's one
home for the wrap, not part of the reader).
"""

import gzip
import json
import random
from pathlib import Path

import numpy as np
import pytest

from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.io import scanlog
from closurecheck.io.scanlog import read_scanlog

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "scans_demo" / "warehouse_demo.jsonl.gz"

HEADER = {"scanlog": 1, "sensor": {"first_angle": -2.356, "angle_step": 0.00654, "beams": 8,
                                   "min_range": 0.05, "max_range": 20.0}, "notes": "unit test"}


def reference_read(path):
    """(t, odom, ranges, truth) of a valid log, parsed by Python's json module and numpy alone."""
    raw = path.read_bytes()
    if raw[:2] == b"\x1f\x8b":
        raw = gzip.decompress(raw)
    lines = [ln for ln in raw.split(b"\n") if ln.strip()]
    sensor = json.loads(lines[0])["sensor"]
    t, odom, ranges, truth = [], [], [], []
    has_truth = False
    with np.errstate(over="ignore", invalid="ignore"):  # 1e39 is inf as a float32: no return, no warning
        for ln in lines[1:]:
            rec = json.loads(ln)
            t.append(rec["t"])
            odom.append(rec["odom"])
            ranges.append(np.array([np.nan if v is None else v for v in rec["ranges"]], dtype=np.float32))
            tr = rec.get("truth")
            truth.append([np.nan] * 3 if tr is None else tr)
            has_truth = has_truth or tr is not None
        r = np.array(ranges, dtype=np.float32).reshape(len(t), sensor["beams"])
        r[~((r >= np.float32(sensor["min_range"])) & (r <= np.float32(sensor["max_range"])))] = np.nan
    odom = np.array(odom, dtype=np.float64).reshape(-1, 3)
    odom[:, 2] = se2.wrap(odom[:, 2])
    truth = np.array(truth, dtype=np.float64).reshape(-1, 3)
    truth[:, 2] = se2.wrap(truth[:, 2])
    return np.array(t, dtype=np.float64), odom, r, truth if has_truth else None


def assert_same_bits(log, ref):
    t, odom, ranges, truth = ref
    for got, want in ((log.t, t), (log.odom, odom), (log.ranges, ranges)):
        assert got.dtype == want.dtype and got.shape == want.shape
        assert got.tobytes() == want.tobytes()  # NaN payloads and the sign of zero included
    if truth is None:
        assert log.truth is None
    else:
        assert log.truth.tobytes() == truth.tobytes()


# --- arrays: the same bits as Python's json ----------------------------------------------------------

def test_demo_log_reads_as_pythons_json_reads_it():
    log = read_scanlog(DEMO)
    assert len(log) == 2952
    assert_same_bits(log, reference_read(DEMO))


def test_demo_log_lines_all_take_the_orjson_path(monkeypatch):
    # The speed-up holds only if ordinary lines are ones the fast path is sure of.
    slow = []
    checked = scanlog._checked_scan
    monkeypatch.setattr(scanlog, "_checked_scan", lambda *a: slow.append(a[2]) or checked(*a))
    assert len(read_scanlog(DEMO)) == 2952
    assert slow == []


def _number(rnd, lo, hi):
    """A JSON number token for a value near [lo, hi], in one of the spellings JSON allows."""
    v = rnd.uniform(lo, hi)
    kind = rnd.randrange(9)
    if kind == 0:
        return str(int(v))
    if kind == 1:
        return rnd.choice(["-0", "-0.0", "0e0", "-0E+0", "0.0"])
    if kind == 2:
        return f"{v:.3e}".replace("e", rnd.choice(["e", "E"]))
    if kind == 3:
        return f"{v * 1000:.1f}e-3"
    if kind == 4:
        return repr(float(np.float32(v)))  # shortest float64 of a float32
    if kind == 5:
        return f"{v:.25f}"  # more digits than a float64 holds: rounding must agree
    if kind == 6:
        return f"{v:.4f}"
    if kind == 7:  # halfway between two float32 neighbours: float64 first, then float32
        a = np.float32(abs(v))
        b = np.nextafter(a, np.float32(np.inf))
        return repr((float(a) + float(b)) / 2)
    return repr(v)


def _scan_text(rnd, t_token, beams):
    ranges = []
    for _ in range(beams):
        pick = rnd.random()
        if pick < 0.2:
            ranges.append("null")
        elif pick < 0.25:  # beyond max_range, beyond float32, beyond float64, below float64's smallest
            ranges.append(rnd.choice(["1e39", "1e400", "-1e400", "1e-400", "12345678901234567890123",
                                      "-5", "25", "20", "0.05", "0.0499999"]))
        else:
            ranges.append(_number(rnd, 0.0, 21.0))
    sep = rnd.choice([",", ", ", " , ", ",\t"])
    parts = {"t": t_token,
             "odom": "[" + sep.join(_number(rnd, -40.0, 40.0) for _ in range(3)) + "]",
             "ranges": "[" + sep.join(ranges) + "]"}
    truth = rnd.random()
    if truth < 0.3:
        parts["truth"] = "null"
    elif truth < 0.7:
        parts["truth"] = "[" + sep.join(_number(rnd, -10.0, 10.0) for _ in range(3)) + "]"
    keys = list(parts)
    rnd.shuffle(keys)
    return "{" + sep.join(f'"{k}": {parts[k]}' for k in keys) + "}"


@pytest.mark.parametrize("seed", range(6))
def test_generated_lines_read_as_pythons_json_reads_them(tmp_path, seed):
    rnd = random.Random(seed)
    lines = [json.dumps(HEADER)]
    t = 0.0
    for k in range(60):
        t += rnd.choice([0.0, 0.25, 0.5, 3.0])  # exact in binary, so every spelling below is the same time
        token = rnd.choice([repr(t), f"{t:.6e}", f"{t * 100:.0f}E-2", str(int(t)) if t == int(t) else repr(t)])
        lines.append(_scan_text(rnd, token, 8))
    # A time beyond 64 bits as an integer (json: int, orjson: float) and a time that is an integer.
    lines.append(_scan_text(rnd, "123456789012345678901234", 8))
    path = tmp_path / f"g{seed}.jsonl"
    path.write_text("\n".join(lines) + "\n")
    assert_same_bits(read_scanlog(path), reference_read(path))


def test_lines_only_pythons_json_reads_are_read_the_same(tmp_path):
    # Each line below is valid for the reader and refused or read otherwise by
    # orjson, so it goes to the json path; the arrays must still be json's.
    base = '"t": %s, "odom": [1, 2, 3], "ranges": [1, null, 3, 4, 5, 6, 7, 8]'
    lines = [json.dumps(HEADER),
             "{" + base % "0.5" + "}",
             "\ufeff{" + base % "0.6" + "}",  # a byte order mark: json reads it, orjson refuses it
             "{" + base % "0.7" + ', "label": "\\ud800 NaN Infinity true null \\"ranges\\""}',  # lone surrogate
             '{"ranges": ["a", "b"], ' + base % "0.8" + "}",  # duplicate key, the last one counts
             '{"t": "noon", ' + base % "0.9" + ', "truth": null}',  # duplicate "t"
             "{" + base % "18446744073709551616" + ', "truth": [1e-400, -0, 18446744073709551615]}',
             '{"\\u0074": 1e20, "odom": [1, 2, 3], "ranges": [1, null, 3, 4, 5, 6, 7, 8]}',  # an escaped key
             "{" + base % "1e20" + ', "extra": ' + "[" * 500 + "]" * 500 + "}"]
    path = tmp_path / "odd.jsonl"
    path.write_bytes(("\n".join(lines) + "\n").encode("utf-8", "surrogatepass"))
    log = read_scanlog(path)
    assert len(log) == 8
    assert_same_bits(log, reference_read(path))


# --- errors: the same messages as before the orjson path ----------------------------------------------

def _line(t="0.0", odom="[0, 0, 0]", ranges="[1, 2, 3, 4, 5, 6, 7, 8]", truth=None):
    s = '{"t": %s, "odom": %s, "ranges": %s' % (t, odom, ranges)
    return s + (', "truth": %s}' % truth if truth is not None else "}")


def _deep(depth):
    return "[" * depth + "]" * depth


# Lines on which orjson and Python's json disagree (refuse one and read the
# other, or read different values).  The expected messages were produced by
# the reader as it was before the orjson path (main; closurecheck/io as at d93398d) on these very
# lines, and are asserted literally.
DISAGREEING = [
    ("nan_in_ranges", [_line(ranges="[1, NaN, 3, 4, 5, 6, 7, 8]")], 2,
     "not JSON (NaN is not a JSON number (write null for no return))"),
    ("infinity_t", [_line(t="Infinity")], 2,
     "not JSON (Infinity is not a JSON number (write null for no return))"),
    ("minus_infinity_truth", [_line(truth="[0, -Infinity, 0]")], 2,
     "not JSON (-Infinity is not a JSON number (write null for no return))"),
    ("nan_on_line_3", [_line(), _line(t="1.0", odom="[NaN, 0, 0]")], 3,
     "not JSON (NaN is not a JSON number (write null for no return))"),
    ("huge_int_in_ranges", [_line(ranges="[1, 2, " + "9" * 400 + ", 4, 5, 6, 7, 8]")], 2,
     '"ranges": beam 2 is out of the range of numbers (' + "9" * 59 + "... (400 characters))"),
    ("huge_int_odom", [_line(odom="[0, -" + "9" * 400 + ", 0]")], 2, 'non-finite pose in "odom"'),
    ("huge_int_t", [_line(t="9" * 400)], 2, '"t" must be a finite number (seconds)'),
    ("1e400_t", [_line(t="1e400")], 2, '"t" must be a finite number (seconds)'),
    ("1e400_odom", [_line(odom="[0, 0, 1e400]")], 2, 'non-finite pose in "odom"'),
    ("minus_1e400_truth", [_line(truth="[-1e400, 0, 0]")], 2, 'non-finite pose in "truth"'),
    # json reads the second t as the integer 10**25, below the float 1e25; orjson reads both as 1e25.
    ("int_beyond_64_bits_after_float", [_line(t="1e25"), _line(t="1" + "0" * 25)], 3,
     "time goes backwards (t=10000000000000000000000000 after t=1e+25)"),
    # orjson reads nesting up to 1024 levels, Python's json stops near its recursion limit (1000).
    ("deep_ranges", [_line(ranges=_deep(1010))], 2, "not JSON (nested too deeply)"),
    ("deep_ranges_200", [_line(ranges=_deep(200))], 2, "wrong beam count: 1 ranges, header says 8"),
    ("deep_overwritten_key", ['{"t": ' + _deep(1010) + ", " + _line()[1:]], 2, "not JSON (nested too deeply)"),
    ("deep_extra_key", [_line()[:-1] + ', "x": ' + _deep(1010) + "}"], 2, "not JSON (nested too deeply)"),
    ("duplicate_t_last_is_string", ['{"t": 1.0, ' + _line(t='"x"')[1:]], 2,
     '"t" must be a finite number (seconds)'),
    # Python's json path reads the text "null" as "NaN" (its null-to-NaN rewrite); the message keeps that.
    ("string_null_in_ranges", [_line(ranges='[1, "null", 3, 4, 5, 6, 7, 8]')], 2,
     "\"ranges\" must hold numbers or null; beam 1 is 'NaN'"),
    ("boolean_in_ranges", [_line(ranges="[1, true, 3, 4, 5, 6, 7, 8]")], 2,
     '"ranges" must hold numbers or null; beam 1 is True'),
    ("list_in_ranges", [_line(ranges="[[1], 2, 3, 4, 5, 6, 7, 8]")], 2,
     '"ranges" must hold numbers or null; beam 0 is [1]'),
    # numpy makes a (beams, 1) or (beams, 0) array of these lists: not a row of ranges.
    ("one_list_per_beam", [_line(ranges="[[1],[2],[3],[4],[5],[6],[7],[8]]")], 2,
     '"ranges" must hold numbers or null; beam 0 is [1]'),
    ("empty_list_per_beam", [_line(ranges="[[],[],[],[],[],[],[],[]]")], 2,
     '"ranges" must hold numbers or null; beam 0 is []'),
    ("list_at_the_last_beam", [_line(ranges="[1, 2, 3, 4, 5, 6, 7, [8, 9]]")], 2,
     '"ranges" must hold numbers or null; beam 7 is [8, 9]'),
    ("empty_object_in_ranges", [_line(ranges="[{}, 2, 3, 4, 5, 6, 7, 8]")], 2,
     '"ranges" must hold numbers or null; beam 0 is {}'),
    ("null_t", [_line(t="null")], 2, '"t" must be a finite number (seconds)'),
    ("null_in_odom", [_line(odom="[0, null, 0]")], 2, 'non-finite pose in "odom"'),
    ("null_in_truth", [_line(truth="[0, null, 0]")], 2, 'non-finite pose in "truth"'),
]


@pytest.mark.parametrize("name,scans,line_no,message", DISAGREEING, ids=[c[0] for c in DISAGREEING])
def test_lines_the_parsers_disagree_on_keep_their_messages(tmp_path, name, scans, line_no, message):
    path = tmp_path / "bad.jsonl"
    path.write_text("\n".join([json.dumps(HEADER)] + scans) + "\n")
    with pytest.raises(InputError) as info:
        read_scanlog(path)
    assert str(info.value) == f"{path}:{line_no}: {message}"
