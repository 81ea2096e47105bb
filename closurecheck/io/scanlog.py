"""Scan logs: the JSON Lines input format (docs/formats.md, "Scan log").

Reading builds numpy arrays directly: one parse per line and one C-level
conversion of each line's ``ranges`` list to float32, so no per-beam Python
objects outlive the line being parsed.  Ranges are kept as float32 (metres)
with NaN meaning "no return".  Scan lines are parsed with orjson when the
line is one it is sure of (``_fast_scan``), else with Python's json
(``_checked_scan``), which also makes every error message; the header is
always read with Python's json.
"""

from __future__ import annotations

import gzip
import json
import math
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import orjson

from ..core import se2
from ..errors import InputError, shorten
from .atomic import atomic_open
from .files import check_regular_file

FORMAT_VERSION = 1
GZIP_MAGIC = b"\x1f\x8b"
_SENSOR_KEYS = ("first_angle", "angle_step", "beams", "min_range", "max_range")

# Caps on what one file may ask of the reader (docs/formats.md, "Limits"):
# without them a header could size a buffer of hundreds of GiB before any
# scan is read, and a file without line breaks (or /dev/zero) would be read
# whole into one line.  2D scanners give a few hundred to a few thousand
# beams per scan; 65,536 leaves a wide margin.
MAX_BEAMS = 65_536
MAX_HEADER_BYTES = 1 << 20
# A scan line holds t, odom, ranges and truth: 64 bytes per beam fit any
# number JSON can write in full precision with its separator and spaces
# (a float64 needs at most 24 characters); 64 KiB more for the rest.
LINE_BYTES_PER_BEAM = 64
LINE_BYTES_EXTRA = 64 * 1024

# Ranges are collected in blocks of about 8.5 MB (2048 rows of 1081 beams):
# few enough copies for long logs, small enough for wide scans.
_BLOCK_BYTES = 2048 * 1081 * 4


def max_line_bytes(beams: int) -> int:
    """Longest scan line accepted for a sensor of ``beams`` beams, in bytes (docs/formats.md, "Limits")."""
    return LINE_BYTES_EXTRA + LINE_BYTES_PER_BEAM * int(beams)


@dataclass(frozen=True)
class Sensor:
    """Geometry of a 2D range sensor.

    Beam k has bearing ``first_angle + k * angle_step`` (radians, CCW positive,
    0 straight ahead) in the sensor frame; returns outside
    [min_range, max_range] (metres) are no return.  ``mount`` is the sensor's
    pose in the robot frame ``[x, y, theta]`` (identity when absent).
    """

    first_angle: float
    angle_step: float
    beams: int
    min_range: float
    max_range: float
    mount: tuple[float, float, float] = (0.0, 0.0, 0.0)

    def bearings(self) -> np.ndarray:
        """Beam bearings (beams,) in radians, in the sensor frame."""
        return self.first_angle + self.angle_step * np.arange(self.beams)

    def to_header(self) -> dict:
        return {k: (int(v) if k == "beams" else float(v)) for k, v in
                ((k, getattr(self, k)) for k in _SENSOR_KEYS)}


@dataclass(frozen=True, eq=False)
class ScanLog:
    """A scan log held as arrays.

    Attributes
    ----------
    sensor : Sensor
    t : (N,) float64, seconds, non-decreasing.
    odom : (N, 3) float64, odometry poses in an arbitrary fixed frame.
    ranges : (N, beams) float32, metres, NaN for no return.
    truth : (N, 3) float64 or None; rows of NaN where a scan has no truth.
    header : dict of the optional header keys (``notes``, ``mount`` and any
        tool-defined keys), kept verbatim so a rewrite preserves them.
    source : name of the file the log came from ("" when built in memory).
    """

    sensor: Sensor
    t: np.ndarray
    odom: np.ndarray
    ranges: np.ndarray
    truth: np.ndarray | None = None
    header: dict = field(default_factory=dict)
    source: str = ""

    def __len__(self) -> int:
        return len(self.t)

    def points(self, index: int) -> np.ndarray:
        """Valid returns of scan ``index`` as (M, 2) points in the robot frame (metres)."""
        return scan_points(self.ranges[index], self.sensor)

    @property
    def has_truth(self) -> bool:
        return self.truth is not None and bool(np.isfinite(self.truth).all(axis=1).any())


def scan_points(ranges, sensor: Sensor) -> np.ndarray:
    """Convert one scan's ranges (beams,) to (M, 2) robot-frame points.

    Beams with no return (NaN or outside the sensor's limits) are dropped.
    The sensor's mount pose, when set, maps sensor-frame points to the robot
    frame.
    """
    r = np.asarray(ranges, dtype=np.float64)
    ok = np.isfinite(r) & (r >= sensor.min_range) & (r <= sensor.max_range)
    b = sensor.bearings()[ok]
    rr = r[ok]
    pts = np.stack([rr * np.cos(b), rr * np.sin(b)], axis=-1)
    if sensor.mount != (0.0, 0.0, 0.0):
        pts = se2.transform_points(np.asarray(sensor.mount), pts)
    return pts


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _finite(v) -> bool:
    """A JSON number that is finite as a float64 (a 400-digit integer is not); False for anything else."""
    if type(v) is float:
        return math.isfinite(v)
    if type(v) is int:
        try:
            return math.isfinite(float(v))
        except OverflowError:
            return False
    return False


def _parse_sensor(obj, path, line) -> Sensor:
    if not isinstance(obj, dict):
        raise InputError('header: "sensor" must be an object', path, line)
    vals = {}
    for key in _SENSOR_KEYS:
        v = obj.get(key)
        if not _finite(v):
            raise InputError(f'header: sensor "{key}" must be a finite number', path, line)
        vals[key] = v
    if int(vals["beams"]) != vals["beams"] or vals["beams"] < 1:
        raise InputError('header: sensor "beams" must be a positive integer', path, line)
    if vals["beams"] > MAX_BEAMS:
        raise InputError(f'header: sensor "beams" is {shorten(vals["beams"])}, more than this tool reads '
                         f'({MAX_BEAMS}, docs/formats.md "Limits")', path, line)
    if vals["angle_step"] == 0:
        raise InputError('header: sensor "angle_step" must not be zero', path, line)
    if not 0 <= vals["min_range"] < vals["max_range"]:
        raise InputError("header: sensor needs 0 <= min_range < max_range", path, line)
    return Sensor(float(vals["first_angle"]), float(vals["angle_step"]), int(vals["beams"]),
                  float(vals["min_range"]), float(vals["max_range"]))


def _parse_pose(value, what, path, line):
    if not isinstance(value, list) or len(value) != 3 or not all(_is_number(v) for v in value):
        raise InputError(f'"{what}" must be a list of 3 numbers [x, y, theta]', path, line)
    if not all(_finite(v) for v in value):
        raise InputError(f'non-finite pose in "{what}"', path, line)
    return value


def _loads(raw: bytes):
    """json.loads of one line; a nesting too deep for the parser is a ValueError like any bad JSON."""
    try:
        return json.loads(raw)
    except RecursionError:
        raise ValueError("nested too deeply") from None


def _refuse_constant(token: str):
    raise ValueError(f"{token} is not a JSON number (write null for no return)")


def parse_header(raw: bytes, path) -> tuple[Sensor, dict]:
    """Parse and validate line 1 of a scan log; returns (sensor, other keys)."""
    try:
        obj = json.loads(raw, parse_constant=_refuse_constant)
    except RecursionError:
        raise InputError("missing or ill-formed header: not JSON (nested too deeply)", path, 1) from None
    except ValueError as exc:
        raise InputError(f"missing or ill-formed header: not JSON ({_json_reason(exc)})", path, 1) from None
    if not isinstance(obj, dict) or "scanlog" not in obj:
        raise InputError('missing header: line 1 must be a JSON object with "scanlog": 1', path, 1)
    if obj["scanlog"] != FORMAT_VERSION or isinstance(obj["scanlog"], bool):
        raise InputError(f'unsupported scan log version {shorten(obj["scanlog"])} (this tool reads version 1)',
                         path, 1)
    if "sensor" not in obj:
        raise InputError('header: missing "sensor"', path, 1)
    sensor = _parse_sensor(obj["sensor"], path, 1)
    extra = {k: v for k, v in obj.items() if k not in ("scanlog", "sensor")}
    if "notes" in extra and not isinstance(extra["notes"], str):
        raise InputError('header: "notes" must be a string', path, 1)
    if "mount" in extra:
        mount = _parse_pose(extra["mount"], "mount", path, 1)
        sensor = Sensor(*(getattr(sensor, k) for k in _SENSOR_KEYS), mount=tuple(float(v) for v in mount))
    return sensor, extra


def _json_reason(exc: ValueError) -> str:
    if isinstance(exc, json.JSONDecodeError):
        return f"{exc.msg} at column {exc.colno}"
    return "not valid UTF-8 text" if isinstance(exc, UnicodeDecodeError) else str(exc)


def _open_bytes(path: Path):
    check_regular_file(path, "scan log file")
    try:
        with open(path, "rb") as fh:
            magic = fh.read(2)
    except IsADirectoryError:
        raise InputError("is a directory, expected a scan log file", path) from None
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except PermissionError:
        raise InputError("permission denied", path) from None
    if magic == GZIP_MAGIC:
        return gzip.open(path, "rb")
    return open(path, "rb")


class _Lines:
    """Numbered lines of a plain or gzip file, each at most ``limit`` bytes.

    Reading stops at the cap, so a file without line breaks costs no more
    memory than one line may take; decompression errors become InputError.
    """

    def __init__(self, path: Path):
        self.path = path
        self.fh = _open_bytes(path)
        self.number = 0

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.fh.close()

    def read(self, limit: int) -> bytes:
        """The next line (b"" at the end of the file); InputError when longer than ``limit`` bytes."""
        self.number += 1
        try:
            raw = self.fh.readline(limit + 1)
        except EOFError:
            raise InputError(f"truncated gzip stream (file ends inside line {self.number})", self.path,
                             self.number) from None
        except (gzip.BadGzipFile, zlib.error, OSError) as exc:
            raise InputError(f"corrupt compressed data ({exc})", self.path, self.number) from None
        if len(raw) > limit:
            raise InputError(f"line longer than {limit} bytes, the most a line may hold here "
                             f'(docs/formats.md "Limits"); is this a scan log?', self.path, self.number)
        return raw


def read_scanlog(path) -> ScanLog:
    """Read a scan log (plain or gzip JSON Lines) into a :class:`ScanLog`.

    Parameters
    ----------
    path : a ``.jsonl`` or ``.jsonl.gz`` file (docs/formats.md, "Scan log");
        gzip is recognised by its magic bytes, not by the name.

    Returns
    -------
    ScanLog : times (s), odometry poses (m, m, rad; the log's odometry
    frame), ranges (m, NaN = no return) and truth poses where given.

    Raises :class:`InputError` naming the file, the line number and the
    problem for any deviation from the format, and for a file beyond the
    reader's limits (docs/formats.md, "Limits").

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from closurecheck import read_scanlog, simulate_log, write_scanlog
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "ring.jsonl.gz"
    >>> write_scanlog(path, simulate_log("ring", seed=1, scans=20))
    >>> log = read_scanlog(path)
    >>> len(log), log.sensor.beams, log.points(0).shape[1]
    (20, 721, 2)
    """
    path = Path(path)
    # A range beyond float32 (1e39) becomes inf, i.e. no return, without a warning on the terminal.
    with _Lines(path) as lines, np.errstate(over="ignore"):
        return _read_lines(lines, path)


_SCAN_KEYS = frozenset(("t", "odom", "ranges", "truth"))


def _plain_ranges(raw: bytes, rec: dict) -> bool:
    """True when the bytes of the line's ranges list can hold only numbers and null.

    Called once ``t``, ``odom`` and ``truth`` are known to be numbers, so with
    no other keys the first ``"ranges"`` is the key, and its list ends at the
    first ``]`` (a nested list fails the conversion to float32 anyway).  A
    string needs a quote and a boolean a ``t`` or an ``f``, none of which a
    number or null contains.  Three byte searches over the list take about
    1 us for 1081 beams against about 300 us for parsing the line; False
    sends the line to the exact check of every value.
    """
    if not _SCAN_KEYS.issuperset(rec):
        return False
    k = raw.find(b'"ranges"')
    e = raw.find(b"]", k)
    if k < 0 or e < 0 or raw.find(b'"ranges"', e) >= 0:
        return False
    return raw.find(b'"', k + 8, e) < 0 and raw.find(b"t", k, e) < 0 and raw.find(b"f", k, e) < 0


def _bad_range(rng, path, number):
    """InputError for the first range that is not a number (a string, a boolean, a list, ...)."""
    for k, v in enumerate(rng):
        if type(v) is not float and type(v) is not int:
            return InputError(f'"ranges" must hold numbers or null; beam {k} is {shorten(v)}', path, number)
        if type(v) is int and not _finite(v):
            return InputError(f'"ranges": beam {k} is out of the range of numbers ({shorten(v)})', path, number)
    return InputError('"ranges" must hold numbers or null', path, number)


def _checked_scan(raw: bytes, path, number: int, beams: int, last_t, block: np.ndarray, fill: int):
    """Parse and check one scan line with Python's json module, its ranges into ``block[fill]``.

    Returns ``(t, odom, truth)``, truth None when absent or null; raises
    InputError naming the line for any deviation from the format.  This is
    the reader's reference path: every line :func:`_fast_scan` declines comes
    here, so every error message is made by this code.
    """
    if b"N" in raw or b"I" in raw:
        # Python's json module reads NaN and Infinity, strict JSON has no
        # such tokens; a valid line has no capital N or I outside strings,
        # so only then does a strict parse look for them (and only them).
        try:
            json.loads(raw, parse_constant=_refuse_constant)
        except RecursionError:
            pass
        except ValueError as exc:
            raise InputError(f"not JSON ({_json_reason(exc)})", path, number) from None
    try:
        # JSON null is "no return"; parsing it as NaN lets the ranges list
        # go to float32 in one C-level conversion.
        rec = _loads(raw.replace(b"null", b"NaN"))
    except ValueError as exc:
        raise InputError(f"not JSON ({_json_reason(exc)})", path, number) from None
    if not isinstance(rec, dict):
        raise InputError("a scan line must be a JSON object", path, number)
    t = rec.get("t")
    if not _finite(t):
        raise InputError('"t" must be a finite number (seconds)', path, number)
    if t < last_t:
        raise InputError(f"time goes backwards (t={shorten(t)} after t={shorten(last_t)})", path, number)
    if "odom" not in rec:
        raise InputError('missing "odom"', path, number)
    odom = _parse_pose(rec["odom"], "odom", path, number)
    tr = rec.get("truth")
    if tr is None or (isinstance(tr, float) and math.isnan(tr)):
        tr = None
    else:
        tr = _parse_pose(tr, "truth", path, number)
    rng = rec.get("ranges")
    if not isinstance(rng, list):
        raise InputError('missing "ranges" list', path, number)
    if len(rng) != beams:
        raise InputError(f"wrong beam count: {len(rng)} ranges, header says {beams}", path, number)
    # numpy would take "1.5" and true as numbers; each range is looked at
    # only when the line's bytes leave room for a string or a boolean.
    if not _plain_ranges(raw, rec):
        if not all(type(v) is float or type(v) is int for v in rng):
            raise _bad_range(rng, path, number)
    try:
        block[fill] = rng
    except (TypeError, ValueError, OverflowError):
        raise _bad_range(rng, path, number) from None
    return t, odom, tr


# orjson reads an integer beyond 64 bits as the nearest float64, Python's json
# as an int; the two compare differently with the previous time, so such a
# "t" (|t| >= 2**63) goes to the reference path.
_INT64_EDGE = float(2 ** 63)


def _fast_pose(v) -> bool:
    return type(v) is list and len(v) == 3 and all(
        type(x) is int or (type(x) is float and math.isfinite(x)) for x in v)


def _fast_scan(raw: bytes, beams: int, last_t, block: np.ndarray, fill: int):
    """One valid scan line parsed with orjson: ``(t, odom, truth)`` with ``block[fill]`` filled, or None.

    None sends the line to :func:`_checked_scan`, which parses it again with
    Python's json and makes any error message, so this path only has to
    recognise a line it is sure of, and give what the reference path gives
    for it.  It is sure of a line that orjson reads (so it holds no NaN or
    Infinity token and no number beyond float64: orjson refuses those), that
    has no backslash and no string but its keys (two quotes a key, so no
    duplicate key and no string value, even an overwritten one), whose keys
    are the format's, whose t, odom and truth are numbers of the right shape,
    and whose ranges are numbers or null (:func:`_plain_ranges`; a nested list
    or ``{}`` fails the conversion below).  On such a line the two parsers
    agree value for value (floats correctly rounded by both, and an integer
    beyond 64 bits read by orjson as the float64 Python's float() gives it:
    480,000 tokens compared on 2026-12-03, midpoints between float64s
    included; tests/io/test_scanlog_parsers.py compares whole logs), and null
    becomes NaN in the float64 conversion as it does in the reference path's
    float32 one.

    Measured on the 5,000-scan warehouse log (721 beams, about 59 nulls a
    line): orjson.loads 43 us a line against 200 us for json.loads of the
    line with null written as NaN; np.array of the ranges with their None
    21 us against 32 us for a list comprehension replacing None first.
    """
    try:
        rec = orjson.loads(raw)
    except Exception:  # orjson.JSONDecodeError and anything else: the reference path says what is wrong
        return None
    if (type(rec) is not dict or not _SCAN_KEYS.issuperset(rec) or raw.count(b'"') != 2 * len(rec)
            or b"\\" in raw):
        return None
    t = rec.get("t")
    if not (type(t) is int or (type(t) is float and -_INT64_EDGE < t < _INT64_EDGE)) or t < last_t:
        return None
    odom = rec.get("odom")
    tr = rec.get("truth")
    if not _fast_pose(odom) or (tr is not None and not _fast_pose(tr)):
        return None
    rng = rec.get("ranges")
    if type(rng) is not list or len(rng) != beams or not _plain_ranges(raw, rec):
        return None
    try:
        arr = np.array(rng, dtype=np.float64)
    except (TypeError, ValueError, OverflowError):
        return None
    if arr.shape != (beams,):
        return None
    block[fill] = arr
    return t, odom, tr


def _read_lines(lines: _Lines, path: Path) -> ScanLog:
    first = lines.read(MAX_HEADER_BYTES)
    if not first.strip():
        raise InputError("missing header: the file is empty" if not first else
                         "missing header: line 1 is empty", path, 1)
    sensor, extra = parse_header(first, path)
    beams = sensor.beams
    limit = max_line_bytes(beams)
    block_rows = max(16, _BLOCK_BYTES // (4 * beams))

    blocks: list[np.ndarray] = []
    block = np.empty((block_rows, beams), dtype=np.float32)
    fill = 0
    times: list[float] = []
    odoms: list[list] = []
    truths: list = []
    any_truth = False
    last_t = -math.inf
    pending_blank = None

    while True:
        raw = lines.read(limit)
        if not raw:
            break
        number = lines.number
        if not raw.strip():
            pending_blank = number
            continue
        if pending_blank is not None:
            raise InputError("empty line inside the log", path, pending_blank)
        # orjson first: load_input of the 5,000-scan warehouse log took 1.377 s with json per line and
        # 0.442 s so (medians of 5 alternating runs, load average 1.5-1.8; docs/performance.md).
        scan = _fast_scan(raw, beams, last_t, block, fill)
        if scan is None:
            scan = _checked_scan(raw, path, number, beams, last_t, block, fill)
        t, odom, tr = scan
        last_t = t
        odoms.append(odom)
        if tr is None:
            truths.append((math.nan, math.nan, math.nan))
        else:
            truths.append(tr)
            any_truth = True
        times.append(t)
        fill += 1
        if fill == block_rows:
            blocks.append(block)
            block = np.empty((block_rows, beams), dtype=np.float32)
            fill = 0

    blocks.append(block[:fill])
    ranges = blocks[0] if len(blocks) == 1 else np.concatenate(blocks)
    del blocks, block
    _mask_out_of_range(ranges, sensor)
    n = len(times)
    return ScanLog(
        sensor=sensor,
        t=np.asarray(times, dtype=np.float64),
        odom=_poses(odoms, n),
        ranges=ranges,
        truth=_poses(truths, n) if any_truth else None,
        header=extra,
        source=path.name,
    )


def _poses(rows, n) -> np.ndarray:
    arr = np.asarray(rows, dtype=np.float64).reshape(n, 3)
    arr[:, 2] = se2.wrap(arr[:, 2])
    return arr


def _mask_out_of_range(ranges: np.ndarray, sensor: Sensor) -> None:
    lo, hi = np.float32(sensor.min_range), np.float32(sensor.max_range)
    rows = max(16, _BLOCK_BYTES // (4 * max(1, sensor.beams)))
    for start in range(0, len(ranges), rows):
        part = ranges[start:start + rows]
        with np.errstate(invalid="ignore"):
            part[~((part >= lo) & (part <= hi))] = np.nan


def make_scanlog(sensor: Sensor, t, odom, ranges, truth=None, header=None, source="") -> ScanLog:
    """Build a validated :class:`ScanLog` from arrays (the in-memory boundary)."""
    t = np.asarray(t, dtype=np.float64).reshape(-1)
    n = len(t)
    odom = np.asarray(odom, dtype=np.float64).reshape(n, 3)
    ranges = np.array(ranges, dtype=np.float32).reshape(n, sensor.beams)
    if not np.isfinite(t).all() or (np.diff(t) < 0).any():
        raise InputError("times must be finite and non-decreasing")
    if not np.isfinite(odom).all():
        raise InputError("non-finite odometry pose")
    if truth is not None:
        truth = np.asarray(truth, dtype=np.float64).reshape(n, 3)
    _mask_out_of_range(ranges, sensor)
    return ScanLog(sensor, t, odom, ranges, truth, dict(header or {}), source)


def _header_line(log: ScanLog) -> str:
    header = {"scanlog": FORMAT_VERSION, "sensor": log.sensor.to_header()}
    extra = dict(log.header)
    if log.sensor.mount != (0.0, 0.0, 0.0):
        extra["mount"] = list(log.sensor.mount)
    header.update(extra)
    return json.dumps(header, separators=(", ", ": "))


def write_scanlog(path, log: ScanLog, *, decimals: int | None = 4) -> None:
    """Write ``log`` as JSON Lines, gzip-compressed when ``path`` ends in ``.gz``.

    ``decimals`` is the number of decimals kept for ranges (4 = 0.1 mm);
    ``None`` writes float32 ranges at full precision.  The file appears
    atomically: a failing write leaves any previous file untouched.  The
    format is docs/formats.md, "Scan log".

    Examples
    --------
    >>> import tempfile, pathlib
    >>> import numpy as np
    >>> from closurecheck import read_scanlog, simulate_log, write_scanlog
    >>> log = simulate_log("warehouse", seed=2, scans=5)
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "w.jsonl"
    >>> write_scanlog(path, log)
    >>> again = read_scanlog(path)
    >>> noise = again.header["odometry_noise"] == log.header["odometry_noise"]
    >>> bool(np.allclose(again.odom, log.odom, atol=1e-6)), noise
    (True, True)
    """
    rfmt = "%.9g" if decimals is None else f"%.{int(decimals)}f"
    fmt = ",".join([rfmt] * log.sensor.beams)
    truth = log.truth
    with atomic_open(path, "w") as out:
        out.write(_header_line(log) + "\n")
        for i in range(len(log)):
            body = (fmt % tuple(log.ranges[i].tolist())).replace("nan", "null")
            o = log.odom[i]
            line = f'{{"t": {float(log.t[i])!r}, "odom": [{o[0]:.6f}, {o[1]:.6f}, {o[2]:.6f}], "ranges": [{body}]'
            if truth is not None and np.isfinite(truth[i]).all():
                g = truth[i]
                line += f', "truth": [{g[0]:.6f}, {g[1]:.6f}, {g[2]:.6f}]'
            out.write(line + "}\n")
