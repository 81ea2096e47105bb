"""Open what the user points at: a scan log, or a robot recording to convert on the fly."""

from __future__ import annotations

import os
import unicodedata
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError
from .files import check_regular_file
from .scanlog import ScanLog, read_scanlog


@dataclass(frozen=True)
class RecordingChoice:
    """How to read a robot recording (see docs/recordings.md); None = auto."""

    scan_topic: str | None = None
    odom_topic: str | None = None
    mount: tuple | None = None
    max_odom_gap_s: float | None = None


def load_input(path, choice: RecordingChoice = RecordingChoice()) -> tuple[ScanLog, list[str]]:
    """Read a scan log, or convert a recording; returns (log, notes for the user).

    What ``closurecheck run`` and ``closurecheck info`` read: a scan log
    (docs/formats.md), a recording file or a ROS 2 bag folder
    (docs/recordings.md).  Anything else (a folder that is not a bag, a
    named pipe, a device) is refused with a one-line :class:`InputError`.
    """
    path = Path(path)
    if not os.path.exists(path):
        raise InputError("no such file or directory", path)
    from . import recordings

    if not path.is_dir():
        check_regular_file(path, "scan log or recording")
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


# Names a log's output folder must not take inside --out: the batch's index
# page (and its case variants on case-insensitive file systems).
_RESERVED = {"index.html"}
_NAME_CHARS = 80


def output_name(path: Path) -> str:
    """A safe folder name for the outputs of one log: its file name without the log suffix.

    Safe means it stays inside ``--out``: never empty, ``.`` or ``..``, no
    path separators, no leading dot (hidden, and the prefix of staging
    folders), no control characters, at most 80 characters.  Characters
    other than letters, digits and ``-_.+`` become ``_``.  Two logs may
    still get the same name; :func:`output_names` makes a batch's names unique.

    Examples
    --------
    >>> output_name(Path("shift3.jsonl.gz"))
    'shift3'
    >>> output_name(Path("...jsonl"))
    'log'
    >>> output_name(Path("north aisle/../x.jsonl"))
    'x'
    """
    name = Path(path).name
    for suffix in _LOG_SUFFIXES:
        if name.endswith(suffix):
            name = name[: -len(suffix)]
            break
    else:
        name = Path(name).stem or name
    name = unicodedata.normalize("NFC", name)
    name = "".join(c if (c.isalnum() or c in "-_.+") and c.isprintable() else "_" for c in name)
    name = name.lstrip(".")[:_NAME_CHARS].rstrip(". ")
    if not name.strip("_") or name.casefold() in _RESERVED:
        name = "log" if not name.strip("_") else name + "_"
    return name


def output_names(paths) -> list[str]:
    """Unique, safe output folder names for a batch of logs, in input order.

    Each is :func:`output_name` of the log; a name taken already (compared
    without case, as some file systems do) gets ``-2``, ``-3``, ... so two
    logs called ``ok.jsonl.gz`` in different folders go to ``ok`` and ``ok-2``.

    Examples
    --------
    >>> output_names([Path("a/ok.jsonl.gz"), Path("b/ok.jsonl.gz"), Path("OK.jsonl")])
    ['ok', 'ok-2', 'OK-3']
    """
    taken: set[str] = set()
    names = []
    for p in paths:
        base = output_name(Path(p))
        name, k = base, 1
        while name.casefold() in taken:
            k += 1
            name = f"{base}-{k}"
        taken.add(name.casefold())
        names.append(name)
    return names
