"""Scan logs: the JSON Lines input format (docs/formats.md, "Scan log").

Reading builds numpy arrays directly: one ``json.loads`` per line and one
C-level conversion of each line's ``ranges`` list to float32, so no
per-beam Python objects outlive the line being parsed.  Ranges are kept as
float32 (metres) with NaN meaning "no return".
"""

from __future__ import annotations

import gzip
import json
import math
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core import se2
from ..errors import InputError
from .atomic import atomic_open

FORMAT_VERSION = 1
GZIP_MAGIC = b"\x1f\x8b"
_BLOCK_ROWS = 2048
_SENSOR_KEYS = ("first_angle", "angle_step", "beams", "min_range", "max_range")


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


def _parse_sensor(obj, path, line) -> Sensor:
    if not isinstance(obj, dict):
        raise InputError('header: "sensor" must be an object', path, line)
    vals = {}
    for key in _SENSOR_KEYS:
        v = obj.get(key)
        if not _is_number(v) or not math.isfinite(v):
            raise InputError(f'header: sensor "{key}" must be a finite number', path, line)
        vals[key] = v
    if int(vals["beams"]) != vals["beams"] or vals["beams"] < 1:
        raise InputError('header: sensor "beams" must be a positive integer', path, line)
    if vals["angle_step"] == 0:
        raise InputError('header: sensor "angle_step" must not be zero', path, line)
    if not 0 <= vals["min_range"] < vals["max_range"]:
        raise InputError("header: sensor needs 0 <= min_range < max_range", path, line)
    return Sensor(float(vals["first_angle"]), float(vals["angle_step"]), int(vals["beams"]),
                  float(vals["min_range"]), float(vals["max_range"]))


def _parse_pose(value, what, path, line):
    if not isinstance(value, list) or len(value) != 3 or not all(_is_number(v) for v in value):
        raise InputError(f'"{what}" must be a list of 3 numbers [x, y, theta]', path, line)
    if not all(math.isfinite(v) for v in value):
        raise InputError(f'non-finite pose in "{what}"', path, line)
    return value


def parse_header(raw: bytes, path) -> tuple[Sensor, dict]:
    """Parse and validate line 1 of a scan log; returns (sensor, other keys)."""
    try:
        obj = json.loads(raw)
    except ValueError as exc:
        raise InputError(f"missing or ill-formed header: not JSON ({_json_reason(exc)})", path, 1) from None
    if not isinstance(obj, dict) or "scanlog" not in obj:
        raise InputError('missing header: line 1 must be a JSON object with "scanlog": 1', path, 1)
    if obj["scanlog"] != FORMAT_VERSION or isinstance(obj["scanlog"], bool):
        raise InputError(f'unsupported scan log version {obj["scanlog"]!r} (this tool reads version 1)', path, 1)
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


def _lines(path: Path):
    """Yield (line_number, bytes) for each line; decompression errors become InputError."""
    number = 0
    fh = _open_bytes(path)
    try:
        with fh:
            for number, raw in enumerate(fh, start=1):
                yield number, raw
    except EOFError:
        raise InputError(f"truncated gzip stream (file ends inside line {number + 1})", path, number + 1) from None
    except (gzip.BadGzipFile, zlib.error, OSError) as exc:
        raise InputError(f"corrupt compressed data ({exc})", path, number + 1) from None


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
    problem for any deviation from the format.

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
    lines = _lines(path)
    first = next(lines, None)
    if first is None or not first[1].strip():
        raise InputError("missing header: the file is empty" if first is None else
                         "missing header: line 1 is empty", path, 1)
    sensor, extra = parse_header(first[1], path)
    beams = sensor.beams

    blocks: list[np.ndarray] = []
    block = np.empty((_BLOCK_ROWS, beams), dtype=np.float32)
    fill = 0
    times: list[float] = []
    odoms: list[list] = []
    truths: list = []
    any_truth = False
    last_t = -math.inf
    pending_blank = None

    for number, raw in lines:
        if not raw.strip():
            pending_blank = number
            continue
        if pending_blank is not None:
            raise InputError("empty line inside the log", path, pending_blank)
        try:
            # JSON null is "no return"; parsing it as NaN lets the ranges list
            # go to float32 in one C-level conversion.
            rec = json.loads(raw.replace(b"null", b"NaN"))
        except ValueError as exc:
            raise InputError(f"not JSON ({_json_reason(exc)})", path, number) from None
        if not isinstance(rec, dict):
            raise InputError("a scan line must be a JSON object", path, number)
        t = rec.get("t")
        if not _is_number(t) or not math.isfinite(t):
            raise InputError('"t" must be a finite number (seconds)', path, number)
        if t < last_t:
            raise InputError(f"time goes backwards (t={t!r} after t={last_t!r})", path, number)
        last_t = t
        if "odom" not in rec:
            raise InputError('missing "odom"', path, number)
        odoms.append(_parse_pose(rec["odom"], "odom", path, number))
        tr = rec.get("truth")
        if tr is None or (isinstance(tr, float) and math.isnan(tr)):
            truths.append((math.nan, math.nan, math.nan))
        else:
            truths.append(_parse_pose(tr, "truth", path, number))
            any_truth = True
        rng = rec.get("ranges")
        if not isinstance(rng, list):
            raise InputError('missing "ranges" list', path, number)
        if len(rng) != beams:
            raise InputError(f"wrong beam count: {len(rng)} ranges, header says {beams}", path, number)
        try:
            block[fill] = rng
        except (TypeError, ValueError):
            raise InputError('"ranges" must hold numbers or null', path, number) from None
        times.append(t)
        fill += 1
        if fill == _BLOCK_ROWS:
            blocks.append(block)
            block = np.empty((_BLOCK_ROWS, beams), dtype=np.float32)
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
    for start in range(0, len(ranges), _BLOCK_ROWS):
        part = ranges[start:start + _BLOCK_ROWS]
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
    >>> bool(np.allclose(again.odom, log.odom, atol=1e-6)), again.header["odometry_noise"] == log.header["odometry_noise"]
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
