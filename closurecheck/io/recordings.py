"""Robot recordings to scan logs: ROS 1 bags and ROS 2 bags (MCAP or SQLite storage).

A recording holds a laser scan topic (``sensor_msgs/msg/LaserScan``) and an
odometry topic (``nav_msgs/msg/Odometry``) as separate message streams.
:func:`read_recording` picks the two topics, pairs every scan with the
odometry interpolated at the scan's header stamp
(:mod:`closurecheck.io.recording_sync`) and returns a :class:`ScanLog` (contract
section 1) plus a :class:`RecordingSummary` of what was kept and dropped.

Files are read with the ``rosbags`` library, an optional extra
(``pip install 'closurecheck[recordings]'``).  It is imported only when a
recording is actually read, so the rest of the tool works without it, and
every failure inside it (missing file, truncated or corrupt storage,
undecodable message) becomes a one-line :class:`InputError`.
"""

from __future__ import annotations

import importlib
import math
import sqlite3
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.options import options, setting
from ..errors import InputError, one_line
from .files import is_regular_file
from .recording_sync import clean_odometry, pair_scans, yaw_from_quaternion
from .scanlog import ScanLog, Sensor, make_scanlog

SCAN_TYPE = "sensor_msgs/msg/LaserScan"
ODOM_TYPE = "nav_msgs/msg/Odometry"
MISSING_EXTRA = "reading robot recordings needs the optional extra: pip install 'closurecheck[recordings]'"

# Leading bytes of each storage format; detection goes by content, not only by name.
_ROS1_MAGIC = b"#ROSBAG V2.0"
_MCAP_MAGIC = b"\x89MCAP0\r\n"
_SQLITE_MAGIC = b"SQLite format 3\x00"
_SUFFIXES = {".bag": "ROS 1 bag", ".mcap": "ROS 2 MCAP file", ".db3": "ROS 2 SQLite file"}
_TOPIC_LIST_MAX = 8


@options
class RecordingOptions:
    """Thresholds for turning a recording into a scan log.

    max_odom_gap_s : a scan is given an odometry pose only if the two odometry
        messages around its stamp are at most this far apart (seconds);
        scans in longer gaps (a stalled or restarted odometry publisher) are
        dropped instead of being interpolated across the gap.
    angle_tolerance_rad : how far a message's ``angle_min``, or its
        ``angle_increment`` summed over all beams, may differ from the first
        scan message's before the recording counts as inconsistent (radians).
    """

    max_odom_gap_s: float = setting(0.5, above=0.0)
    angle_tolerance_rad: float = setting(1e-5, at_least=0.0)


@dataclass(frozen=True)
class RecordingSummary:
    """What a conversion read, kept and dropped (counts of messages).

    ``stamp_source`` says where scan times came from: ``"header"`` (the
    message header stamp) or ``"recording"`` (the time the recorder received
    the message, used when every header stamp of the topic is zero).
    """

    recording: str
    storage: str
    scan_topic: str
    odom_topic: str
    scan_messages: int
    odom_messages: int
    scans_kept: int
    dropped_before_odom: int
    dropped_after_odom: int
    dropped_in_odom_gaps: int
    scans_out_of_order: int
    odom_out_of_order: int
    odom_non_finite: int
    odom_repeated_stamps: int
    scan_stamp_source: str
    odom_stamp_source: str
    beams: int
    no_return_fraction: float
    range_limits_varied: bool
    max_range_from_data: bool
    start_s: float
    end_s: float
    largest_odom_gap_s: float
    mount: tuple[float, float, float] | None

    @property
    def dropped(self) -> int:
        """Scans not in the log because the odometry did not cover them."""
        return self.dropped_before_odom + self.dropped_after_odom + self.dropped_in_odom_gaps

    def describe(self) -> str:
        """A few lines of plain text for the terminal."""
        lines = [
            f"recording {self.recording} ({self.storage})",
            f"scans: {self.scan_topic}, {self.scan_messages} messages, {self.beams} beams, "
            f"{100.0 * self.no_return_fraction:.1f}% no return",
            f"odometry: {self.odom_topic}, {self.odom_messages} messages",
            f"kept {self.scans_kept} scans over {self.end_s - self.start_s:.3f} s; "
            f"dropped {self.dropped} outside the odometry's time span "
            f"({self.dropped_before_odom} before, {self.dropped_after_odom} after, "
            f"{self.dropped_in_odom_gaps} in odometry gaps)",
        ]
        notes = []
        if self.scans_out_of_order:
            notes.append(f"{self.scans_out_of_order} scan messages were out of stamp order (sorted by stamp)")
        if self.odom_out_of_order:
            notes.append(f"{self.odom_out_of_order} odometry messages were out of stamp order (sorted by stamp)")
        if self.odom_non_finite:
            notes.append(f"{self.odom_non_finite} odometry messages with a non-finite pose were ignored")
        if self.odom_repeated_stamps:
            notes.append(f"{self.odom_repeated_stamps} odometry messages repeating an earlier stamp were ignored")
        for what, source in (("scan", self.scan_stamp_source), ("odometry", self.odom_stamp_source)):
            if source != "header":
                notes.append(f"all {what} header stamps are zero: used the recording's receive times")
        if self.range_limits_varied:
            notes.append("range limits varied between scans: each scan was masked with its own limits")
        if self.max_range_from_data:
            notes.append("the scans give no finite range_max: used the largest range seen")
        if self.mount is not None:
            notes.append("sensor mount on the robot: x=%g m, y=%g m, theta=%g rad" % self.mount)
        lines += [f"note: {n}" for n in notes]
        return "\n".join(lines)


def is_recording(path) -> bool:
    """True when ``path`` looks like a robot recording rather than a scan log.

    A ROS 2 bag folder (with ``metadata.yaml`` or one ``.mcap``/``.db3``
    file), or a file whose first bytes or name mark it as a ROS 1 bag, an
    MCAP file or an SQLite database.  It does not check that the file is
    readable: :func:`read_recording` reports what is wrong with it.
    """
    path = Path(path)
    if path.is_dir():
        return (path / "metadata.yaml").exists() or len(_storage_files(path)) == 1
    if path.suffix.lower() in _SUFFIXES:
        return True
    return _sniff(path) is not None


def read_recording(path, *, scan_topic: str | None = None, odom_topic: str | None = None,
                   mount=None, options: RecordingOptions | None = None) -> tuple[ScanLog, RecordingSummary]:
    """Convert a robot recording to a scan log.

    Parameters
    ----------
    path : a ROS 1 ``.bag`` file, a ROS 2 ``.mcap`` or ``.db3`` file, or a
        ROS 2 bag folder.
    scan_topic, odom_topic : topic names; each may be omitted when the
        recording has exactly one topic of that type
        (``sensor_msgs/msg/LaserScan``, ``nav_msgs/msg/Odometry``).
    mount : the sensor's pose on the robot ``(x, y, theta)`` in metres and
        radians, or None for "sensor frame = robot frame".  Recorded in the
        log header as ``"mount"`` and in ``Sensor.mount``.
    options : :class:`RecordingOptions` thresholds.

    Returns ``(log, summary)``.  Scan times are the scans' header stamps in
    seconds (float64); ``odom`` is the odometry pose interpolated at each
    stamp, in the odometry topic's fixed frame.  Ranges that are NaN,
    infinite or outside the message's ``[range_min, range_max]`` become NaN
    (no return).  Raises :class:`InputError` with one line for anything
    that cannot be read or paired.
    """
    options = options or RecordingOptions()
    mount = _check_mount(mount)
    path = Path(path)
    target, storage = _locate(path)
    rb = _import_rosbags()
    try:
        streams = _read_streams(rb, path, target, storage, scan_topic, odom_topic, options)
    except InputError:
        raise
    except rb.errors as exc:
        raise InputError(f"cannot read {storage}: {_reason(exc)} (truncated or corrupt file?)", path) from None
    return _assemble(path, storage, streams, mount, options)


# --- locating and identifying the recording -------------------------------------------------------

def _storage_files(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in (".mcap", ".db3"))


def _sniff(path: Path) -> str | None:
    if not is_regular_file(path):
        return None  # opening a named pipe or a device would block or never end
    try:
        with open(path, "rb") as fh:
            head = fh.read(16)
    except OSError:
        return None
    for magic, suffix in ((_ROS1_MAGIC, ".bag"), (_MCAP_MAGIC, ".mcap"), (_SQLITE_MAGIC, ".db3")):
        if head.startswith(magic):
            return suffix
    return None


def _locate(path: Path) -> tuple[Path, str]:
    """The path to hand to the reader and a human name of the storage format."""
    if not path.exists():
        raise InputError("no such file or folder", path)
    if path.is_dir():
        if (path / "metadata.yaml").exists():
            return path, "ROS 2 bag folder"
        files = _storage_files(path)
        if len(files) == 1:
            return files[0], _SUFFIXES[files[0].suffix.lower()]
        raise InputError("folder is not a ROS 2 bag: no metadata.yaml"
                         + (f" and {len(files)} storage files" if files else " and no .mcap or .db3 file"), path)
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", path) from None
    suffix = path.suffix.lower()
    kind = _sniff(path)
    if size == 0:
        raise InputError("empty file, not a robot recording", path)
    if kind is None:
        if suffix in _SUFFIXES:
            raise InputError(f"not a valid {_SUFFIXES[suffix]}: unexpected leading bytes (corrupt file?)", path)
        if _first_bytes(path, 2) == b"#R":
            raise InputError("unsupported ROS 1 bag version (only version 2.0 bags can be read)", path)
        raise InputError("not a robot recording: expected a ROS 1 .bag, a ROS 2 .mcap or .db3 file, "
                         "or a ROS 2 bag folder", path)
    if suffix != kind:
        # The reader picks its storage plugin by file name, so a renamed file cannot be opened.
        raise InputError(f"the file holds a {_SUFFIXES[kind]} but its name does not end in {kind}: "
                         f"rename it to end in {kind}", path)
    return path, _SUFFIXES[kind]


def _first_bytes(path: Path, n: int) -> bytes:
    with open(path, "rb") as fh:
        return fh.read(n)


def _check_mount(mount):
    if mount is None:
        return None
    try:
        vals = tuple(float(v) for v in mount)
    except (TypeError, ValueError):
        vals = ()
    if len(vals) != 3 or not all(math.isfinite(v) for v in vals):
        raise InputError(f"mount must be three finite numbers x, y, theta (metres, radians), got {mount!r}")
    return vals


# --- rosbags access ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Rosbags:
    AnyReader: type
    typestore_ros1: object
    typestore_ros2: object
    errors: tuple


def _import_rosbags() -> _Rosbags:
    try:
        from rosbags.highlevel import AnyReader, AnyReaderError
        from rosbags.rosbag1 import ReaderError as Reader1Error
        from rosbags.rosbag2 import ReaderError as Reader2Error
        from rosbags.serde import SerdeError
        from rosbags.typesys import Stores, TypesysError, get_typestore
    except ImportError:
        raise InputError(MISSING_EXTRA) from None
    # What a damaged file can raise from inside rosbags and the decoders it
    # calls: its own errors, I/O and decompression failures (lz4 raises
    # RuntimeError), SQLite errors, and the asserts and lookups its parsers
    # make on the file's bytes.
    errors = [AnyReaderError, Reader1Error, Reader2Error, SerdeError, TypesysError,
              OSError, EOFError, struct.error, zlib.error, sqlite3.Error, RuntimeError,
              ValueError, KeyError, IndexError, AssertionError]
    for module, name in (("apsw", "Error"), ("compression.zstd", "ZstdError"), ("backports.zstd", "ZstdError")):
        try:
            errors.append(getattr(importlib.import_module(module), name))
        except (ImportError, AttributeError):
            pass
    # Bags with embedded definitions (all MCAP and ROS 1 bags, recent SQLite
    # bags) need no type store; older SQLite bags fall back to these.  The two
    # message types have not changed between distributions.
    return _Rosbags(AnyReader, get_typestore(Stores.ROS1_NOETIC), get_typestore(Stores.ROS2_HUMBLE),
                    tuple(errors))


def _reason(exc: BaseException) -> str:
    return one_line(str(exc) or type(exc).__name__, 200)


@dataclass
class _Streams:
    scan_topic: str
    odom_topic: str
    scan_ns: np.ndarray            # header stamps, int64 ns
    scan_rec_ns: np.ndarray        # recorder receive times, int64 ns
    ranges: np.ndarray             # (N, beams) float32, NaN = no return
    angle_min: float
    angle_increment: float
    range_min: np.ndarray          # (N,) float64 holding float32 values
    range_max: np.ndarray          # (N,) float64 holding float32 values
    frame_id: str
    odom_ns: np.ndarray
    odom_rec_ns: np.ndarray
    odom_poses: np.ndarray         # (M, 3)


def _read_streams(rb: _Rosbags, path: Path, target: Path, storage: str, scan_topic, odom_topic,
                  options: RecordingOptions) -> _Streams:
    typestore = rb.typestore_ros1 if target.suffix.lower() == ".bag" else rb.typestore_ros2
    with rb.AnyReader([target], default_typestore=typestore) as reader:
        topics = {name: info.msgtype for name, info in reader.topics.items()}
        scan_name = _choose_topic(topics, SCAN_TYPE, scan_topic, "laser scan", "scan_topic", path)
        odom_name = _choose_topic(topics, ODOM_TYPE, odom_topic, "odometry", "odom_topic", path)
        conns = [c for c in reader.connections if c.topic in (scan_name, odom_name)]
        scans = _ScanCollector(scan_name, options, path)
        odom_ns, odom_rec, odom_rows = [], [], []
        for conn, rec_ns, raw in reader.messages(connections=conns):
            msg = reader.deserialize(raw, conn.msgtype)
            if conn.topic == scan_name:
                scans.add(msg, rec_ns)
            else:
                p = msg.pose.pose
                odom_ns.append(_stamp_ns(msg.header.stamp))
                odom_rec.append(rec_ns)
                odom_rows.append((p.position.x, p.position.y, p.orientation.x, p.orientation.y,
                                  p.orientation.z, p.orientation.w))
    if not scans.count:
        raise InputError(f"laser scan topic {scan_name} has no messages", path)
    if not odom_rows:
        raise InputError(f"odometry topic {odom_name} has no messages", path)
    q = np.asarray(odom_rows, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        bad_q = ~(np.einsum("ij,ij->i", q[:, 2:], q[:, 2:]) > 0)
    poses = np.column_stack([q[:, 0], q[:, 1], yaw_from_quaternion(q[:, 2], q[:, 3], q[:, 4], q[:, 5])])
    poses[bad_q, 2] = np.nan  # a zero quaternion has no heading
    return _Streams(scan_name, odom_name, np.asarray(scans.stamps, np.int64), np.asarray(scans.rec, np.int64),
                    scans.ranges(), scans.angle_min, scans.angle_increment,
                    np.asarray(scans.rmin, np.float64), np.asarray(scans.rmax, np.float64), scans.frame_id,
                    np.asarray(odom_ns, np.int64), np.asarray(odom_rec, np.int64), poses)


def _float32_value(v) -> float:
    """The shortest decimal that reads back as the same float32.

    Message fields are float32, so 0.05 arrives as 0.0500000007...; the
    shortest round-trip decimal is the value the driver meant and keeps the
    log header readable, and it maps back to the identical float32.
    """
    return float(str(np.float32(v)))


def _stamp_ns(stamp) -> int:
    return int(stamp.sec) * 1_000_000_000 + int(stamp.nanosec)


def _choose_topic(topics: dict, msgtype: str, wanted, what: str, option: str, path) -> str:
    candidates = sorted(name for name, t in topics.items() if t == msgtype)
    if wanted is not None:
        if wanted not in topics:
            have = ", ".join(candidates) if candidates else "none"
            raise InputError(f"no topic {wanted} in the recording ({what} topics: {have})", path)
        if topics[wanted] != msgtype:
            raise InputError(f"topic {wanted} has type {topics[wanted]}, expected {msgtype}", path)
        return wanted
    if len(candidates) == 1:
        return candidates[0]
    if not candidates:
        listed = sorted(topics.items())
        shown = ", ".join(f"{n} ({t})" for n, t in listed[:_TOPIC_LIST_MAX])
        if len(listed) > _TOPIC_LIST_MAX:
            shown += f", ... ({len(listed) - _TOPIC_LIST_MAX} more)"
        raise InputError(f"no {what} topic ({msgtype}) in the recording; its topics: {shown or 'none'}", path)
    raise InputError(f"{len(candidates)} {what} topics ({msgtype}): {', '.join(candidates)}; "
                     f"choose one with the {option} setting", path)


class _ScanCollector:
    """Accumulates LaserScan messages, checking that the beam geometry never changes."""

    def __init__(self, topic: str, options: RecordingOptions, path):
        self.topic, self.options, self.path = topic, options, path
        self.count = 0
        self.stamps: list[int] = []
        self.rec: list[int] = []
        self.rows: list[np.ndarray] = []
        self.rmin: list[float] = []
        self.rmax: list[float] = []
        self.angle_min = self.angle_increment = 0.0
        self.frame_id = ""

    def add(self, msg, rec_ns: int) -> None:
        self.count += 1
        ranges = np.asarray(msg.ranges, dtype=np.float32)
        a0, da = _float32_value(msg.angle_min), _float32_value(msg.angle_increment)
        if self.count == 1:
            if len(ranges) == 0:
                raise InputError(f"laser scan topic {self.topic}: message 1 has no ranges", self.path)
            if not (math.isfinite(a0) and math.isfinite(da) and da != 0):
                raise InputError(f"laser scan topic {self.topic}: message 1 has an unusable angle_min/"
                                 f"angle_increment ({a0!r}, {da!r})", self.path)
            self.angle_min, self.angle_increment = a0, da
            self.frame_id = str(msg.header.frame_id)
        else:
            beams = len(self.rows[0])
            if len(ranges) != beams:
                raise InputError(f"laser scan topic {self.topic}: message {self.count} has {len(ranges)} ranges, "
                                 f"the first had {beams} (the beam count must not change)", self.path)
            tol = self.options.angle_tolerance_rad
            if not (abs(a0 - self.angle_min) <= tol and abs(da - self.angle_increment) * beams <= tol):
                raise InputError(f"laser scan topic {self.topic}: message {self.count} has angle_min={a0:.7g}, "
                                 f"angle_increment={da:.7g}, the first had {self.angle_min:.7g}, "
                                 f"{self.angle_increment:.7g} (the beam angles must not change)", self.path)
        lo, hi = np.float32(msg.range_min), np.float32(msg.range_max)
        # A NaN limit means no limit on that side (rather than "every beam is out of range").
        lo = lo if np.isfinite(lo) else np.float32(0.0)
        hi = hi if not np.isnan(hi) else np.float32(np.inf)
        with np.errstate(invalid="ignore"):
            ranges = np.where((ranges >= lo) & (ranges <= hi) & np.isfinite(ranges), ranges, np.float32(np.nan))
        self.rows.append(ranges.astype(np.float32, copy=False))
        self.stamps.append(_stamp_ns(msg.header.stamp))
        self.rec.append(int(rec_ns))
        self.rmin.append(_float32_value(lo))
        self.rmax.append(_float32_value(hi))

    def ranges(self) -> np.ndarray:
        return np.stack(self.rows) if self.rows else np.empty((0, 0), np.float32)


# --- building the scan log --------------------------------------------------------------------------

def _stamps(header_ns: np.ndarray, rec_ns: np.ndarray) -> tuple[np.ndarray, str]:
    # Some drivers leave header stamps at zero; the receive time is then the
    # best available clock for the whole topic.
    if (header_ns == 0).all():
        return rec_ns, "recording"
    return header_ns, "header"


def _sensor_limits(s: _Streams, path) -> tuple[float, float, bool, bool]:
    finite_max = s.range_max[np.isfinite(s.range_max)]
    lo = max(0.0, float(np.nanmin(s.range_min))) if np.isfinite(s.range_min).any() else 0.0
    from_data = len(finite_max) == 0
    if from_data:
        hi = _float32_value(np.nanmax(s.ranges)) if np.isfinite(s.ranges).any() else math.nan
    else:
        hi = float(finite_max.max())
    if not (math.isfinite(hi) and hi > lo):
        raise InputError(f"laser scan topic {s.scan_topic}: unusable range limits "
                         f"(range_min={lo:g}, range_max={hi:g})", path)
    varied = bool((s.range_min != s.range_min[0]).any() or (s.range_max != s.range_max[0]).any())
    return lo, hi, varied, from_data


def _assemble(path: Path, storage: str, s: _Streams, mount, options: RecordingOptions):
    scan_ns, scan_src = _stamps(s.scan_ns, s.scan_rec_ns)
    odom_ns, odom_src = _stamps(s.odom_ns, s.odom_rec_ns)
    scans_out_of_order = int(np.count_nonzero(np.diff(scan_ns) < 0))
    odom_out_of_order = int(np.count_nonzero(np.diff(odom_ns) < 0))
    order = np.argsort(scan_ns, kind="stable")
    scan_ns = scan_ns[order]

    odom_ns, odom_poses, non_finite, repeated = clean_odometry(odom_ns, s.odom_poses)
    if len(odom_ns) == 0:
        raise InputError(f"odometry topic {s.odom_topic}: no message has a finite pose", path)
    pairing = pair_scans(scan_ns, odom_ns, odom_poses, options.max_odom_gap_s)
    if len(pairing.keep) == 0:
        raise InputError(
            f"no scan can be paired with odometry: scans span {scan_ns[0] * 1e-9:.3f}..{scan_ns[-1] * 1e-9:.3f} s, "
            f"odometry spans {odom_ns[0] * 1e-9:.3f}..{odom_ns[-1] * 1e-9:.3f} s "
            f"({pairing.in_gaps} scans fall in odometry gaps over {options.max_odom_gap_s:g} s"
            + ("; allow longer gaps with --max-odom-gap" if pairing.in_gaps else "") + ")", path)

    lo, hi, varied, from_data = _sensor_limits(s, path)
    sensor = Sensor(first_angle=s.angle_min, angle_step=s.angle_increment, beams=s.ranges.shape[1],
                    min_range=lo, max_range=hi, mount=mount or (0.0, 0.0, 0.0))
    rows = order[pairing.keep]
    ranges = s.ranges[rows]
    kept_ns = scan_ns[pairing.keep]
    header = {"notes": (f"converted from {path.name} ({storage}): scans from {s.scan_topic}"
                        + (f" (frame {s.frame_id})" if s.frame_id else "")
                        + f", odometry from {s.odom_topic}; t is the scan {'header stamp' if scan_src == 'header' else 'receive time'} in seconds")}
    if mount is not None:
        header["mount"] = list(mount)
    # Seconds as float64: whole seconds and nanoseconds are added separately
    # so the conversion loses nothing beyond float64's own resolution.
    t = (kept_ns // 1_000_000_000).astype(np.float64) + (kept_ns % 1_000_000_000).astype(np.float64) * 1e-9
    log = make_scanlog(sensor, t, pairing.odom, ranges, header=header, source=path.name)
    summary = RecordingSummary(
        recording=str(path), storage=storage, scan_topic=s.scan_topic, odom_topic=s.odom_topic,
        scan_messages=len(s.scan_ns), odom_messages=len(s.odom_ns), scans_kept=len(log),
        dropped_before_odom=pairing.before, dropped_after_odom=pairing.after,
        dropped_in_odom_gaps=pairing.in_gaps, scans_out_of_order=scans_out_of_order,
        odom_out_of_order=odom_out_of_order, odom_non_finite=non_finite, odom_repeated_stamps=repeated,
        scan_stamp_source=scan_src, odom_stamp_source=odom_src, beams=sensor.beams,
        no_return_fraction=float(np.isnan(log.ranges).mean()) if log.ranges.size else 0.0,
        range_limits_varied=varied, max_range_from_data=from_data,
        start_s=float(t[0]), end_s=float(t[-1]), largest_odom_gap_s=pairing.largest_gap_s, mount=mount)
    return log, summary
