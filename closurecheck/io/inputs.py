"""Open what the user points at: a scan log, or a robot recording to convert on the fly."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from .scanlog import ScanLog, read_scanlog


@dataclass(frozen=True)
class RecordingChoice:
    """How to read a robot recording (see docs/recordings.md); None = auto."""

    scan_topic: str | None = None
    odom_topic: str | None = None
    mount: tuple | None = None
    max_odom_gap_s: float | None = None


def load_input(path, choice: RecordingChoice = RecordingChoice()) -> tuple[ScanLog, list[str]]:
    """Read a scan log, or convert a recording; returns (log, notes for the user)."""
    path = Path(path)
    if not path.exists():
        raise InputError("no such file or directory", path)
    from . import recordings

    if recordings.is_recording(path):
        opts = recordings.RecordingOptions() if choice.max_odom_gap_s is None else \
            recordings.RecordingOptions(max_odom_gap_s=choice.max_odom_gap_s)
        log, summary = recordings.read_recording(path, scan_topic=choice.scan_topic, odom_topic=choice.odom_topic,
                                                 mount=choice.mount, options=opts)
        return log, [summary.describe()]
    if path.is_dir():
        raise InputError("is a directory but not a recording (use a folder of logs with several LOG arguments "
                         "or name the files)", path)
    return read_scanlog(path), []


DEMO_LOG = Path(__file__).resolve().parents[2] / "scans_demo" / "warehouse_demo.jsonl.gz"
_LOG_SUFFIXES = (".jsonl", ".jsonl.gz", ".json.gz", ".bag", ".mcap", ".db3")


def expand_inputs(paths) -> list[Path]:
    """Files to process: each path as given, folders of logs expanded (sorted)."""
    from .recordings import is_recording

    out: list[Path] = []
    for p in map(Path, paths):
        if p.is_dir() and not is_recording(p):
            found = sorted(q for q in p.iterdir()
                           if (q.is_file() and q.name.endswith(_LOG_SUFFIXES)) or (q.is_dir() and is_recording(q)))
            if not found:
                raise InputError("folder holds no scan logs or recordings", p)
            out.extend(found)
        else:
            out.append(p)
    return out


def output_name(path: Path) -> str:
    name = path.name
    for suffix in _LOG_SUFFIXES:
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return path.stem or name


