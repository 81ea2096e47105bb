"""Reviewer decisions: a CSV that overrules the verifier for named pairs (docs/formats.md, "Reviewer decisions").

Columns ``from,to,decision[,note]``: two scan ids (an unordered pair), the
word ``accept`` or ``reject``, and an optional free-text note.  The same
rows can be recorded in a run's config.toml (``[review] decisions``, a list
of ``[from, to, decision, note]``), so that ``--config DIR/config.toml``
repeats the run with the same decisions; both forms pass the same checks
(:func:`decision_rows`).

A bad row is refused with one line naming the file and the line: a missing
``from``, ``to`` or ``decision`` column, a scan id that is not a
non-negative integer or not a scan of the log, a pair of a scan with itself,
a decision word other than ``accept`` / ``reject``, and the same pair given
twice with different decisions (the same decision twice is harmless; the
first row counts).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from .pairs_csv import csv_header, open_csv

DECISION_COLUMNS = ("from", "to", "decision")
NOTE_COLUMN = "note"
DECISIONS = ("accept", "reject")


@dataclass(frozen=True, eq=False)
class ReviewDecisions:
    """D reviewer decisions, one per unordered pair.

    src, dst : (D,) int64 scan ids as written (the pair is unordered).
    accept : (D,) bool, True for ``accept`` and False for ``reject``.
    note : (D,) str, the reviewer's note ("" when none).
    lines : (D,) int64 line of each decision in ``source`` (for messages).
    source : the file (or setting) the decisions came from.
    """

    src: np.ndarray
    dst: np.ndarray
    accept: np.ndarray
    note: np.ndarray
    lines: np.ndarray
    source: str = ""

    def __len__(self) -> int:
        return len(self.src)

    @property
    def scan_ids(self) -> np.ndarray:
        """Sorted unique scan ids named by the decisions."""
        return np.union1d(self.src, self.dst).astype(np.int64)

    def rows(self) -> tuple:
        """The decisions as ``(from, to, decision, note)`` tuples (config.toml's ``[review] decisions``)."""
        return tuple((int(a), int(b), DECISIONS[0] if acc else DECISIONS[1], str(n))
                     for a, b, acc, n in zip(self.src, self.dst, self.accept, self.note))

    def check_scans(self, scan_count: int) -> None:
        """Raise InputError naming the line of the first decision whose scan id the log does not have."""
        for a, b, line in zip(self.src.tolist(), self.dst.tolist(), self.lines.tolist()):
            for column, value in (("from", a), ("to", b)):
                if value >= scan_count:
                    raise InputError(f'column "{column}": unknown scan id {value} (the log has scans '
                                     f'0..{scan_count - 1})', self.source or None, line)


NO_DECISIONS = ReviewDecisions(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, bool),
                               np.zeros(0, dtype=object), np.zeros(0, np.int64))


def decision_rows(rows, source: str = "", lines=None) -> ReviewDecisions:
    """Check ``(from, to, decision[, note])`` rows and return them as :class:`ReviewDecisions`.

    The one home of the rules both the CSV file and config.toml follow
    (module docstring).  ``lines`` gives each row's line for messages
    (default: 1, 2, ...).  Scan ids are checked against a log later, by
    :meth:`ReviewDecisions.check_scans`.

    Examples
    --------
    >>> from closurecheck.io.decisions_csv import decision_rows
    >>> d = decision_rows([(812, 40, "accept", "walls line up"), (40, 812, "accept", "")])
    >>> len(d), d.rows()
    (1, ((812, 40, 'accept', 'walls line up'),))
    >>> decision_rows([(812, 40, "accept"), (40, 812, "reject")], source="decisions.csv", lines=[2, 3])
    Traceback (most recent call last):
    ...
    closurecheck.errors.InputError: decisions.csv:3: pair (40, 812) is decided twice, differently (line 2 says accept)
    """
    rows = list(rows)
    lines = list(range(1, len(rows) + 1)) if lines is None else list(lines)
    where = source or None
    src, dst, accept, note, kept_lines = [], [], [], [], []
    seen: dict[tuple[int, int], tuple[int, str]] = {}
    for row, line in zip(rows, lines):
        if not isinstance(row, (list, tuple)) or not 3 <= len(row) <= 4:
            raise InputError("a decision is [from, to, decision] or [from, to, decision, note]", where, line)
        a, b, word = row[0], row[1], row[2]
        text = row[3] if len(row) == 4 else ""
        for column, value in (("from", a), ("to", b)):
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
                raise InputError(f'column "{column}": scan id must be a non-negative integer, got {value!r}',
                                 where, line)
        a, b = int(a), int(b)
        if a == b:
            raise InputError(f"from and to are the same scan ({a})", where, line)
        word = word.strip().lower() if isinstance(word, str) else word
        if word not in DECISIONS:
            raise InputError(f'column "decision": must be accept or reject, got {row[2]!r}', where, line)
        if not isinstance(text, str):
            raise InputError(f'column "note": must be text, got {text!r}', where, line)
        key = (min(a, b), max(a, b))
        if key in seen:
            first_line, first_word = seen[key]
            if first_word != word:
                raise InputError(f"pair ({a}, {b}) is decided twice, differently (line {first_line} says "
                                 f"{first_word})", where, line)
            continue
        seen[key] = (line, word)
        src.append(a)
        dst.append(b)
        accept.append(word == DECISIONS[0])
        note.append(text.strip())
        kept_lines.append(line)
    return ReviewDecisions(src=np.asarray(src, np.int64), dst=np.asarray(dst, np.int64),
                           accept=np.asarray(accept, bool), note=np.asarray(note, dtype=object),
                           lines=np.asarray(kept_lines, np.int64), source=source)


def read_decisions(path, scan_count: int | None = None) -> ReviewDecisions:
    """Read a reviewer-decisions CSV (docs/formats.md, "Reviewer decisions").

    Parameters
    ----------
    path : the CSV file.
    scan_count : number of scans of the log, to refuse unknown scan ids
        (None: checked later with :meth:`ReviewDecisions.check_scans`).

    Raises :class:`InputError` with the file and line for every rule of the
    module docstring.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> from closurecheck.io.decisions_csv import read_decisions
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "decisions.csv"
    >>> _ = path.write_text("from,to,decision,note\\n812,40,accept,overlay fits\\n96,12,reject,\\n")
    >>> d = read_decisions(path, scan_count=1000)
    >>> d.accept.tolist(), d.lines.tolist()
    ([True, False], [2, 3])
    >>> _ = path.write_text("from,to,decision\\n812,40,maybe\\n")
    >>> read_decisions(path)
    Traceback (most recent call last):
    ...
    closurecheck.errors.InputError: ...decisions.csv:2: column "decision": must be accept or reject, got 'maybe'
    """
    path = Path(path)
    reader = open_csv(path)
    rows, lines = [], []
    try:
        names, header_line = csv_header(reader, path, "from,to,decision[,note]")
        names = [n.lower() for n in names]
        for name in DECISION_COLUMNS:
            if name not in names:
                raise InputError(f'missing column "{name}" (header has: {",".join(names)}; expected '
                                 f'from,to,decision[,note])', path, header_line)
        for name in DECISION_COLUMNS + (NOTE_COLUMN,):
            if names.count(name) > 1:
                raise InputError(f'column "{name}" appears twice in the header', path, header_line)
        col = {n: names.index(n) for n in DECISION_COLUMNS}
        width = max(col.values()) + 1
        note_col = names.index(NOTE_COLUMN) if NOTE_COLUMN in names else None
        for row in reader:
            line = reader.line_num
            if not any(c.strip() for c in row):
                continue
            if len(row) < width:
                raise InputError(f"row has {len(row)} cells, the header needs at least {width}", path, line)
            ids = []
            for column in ("from", "to"):
                cell = row[col[column]].strip()
                try:
                    ids.append(int(cell))
                except ValueError:
                    raise InputError(f'column "{column}": scan id must be an integer, got {cell!r}', path,
                                     line) from None
            note = row[note_col] if note_col is not None and note_col < len(row) else ""
            rows.append((ids[0], ids[1], row[col["decision"]], note))
            lines.append(line)
    except csv.Error as exc:
        raise InputError(f"malformed CSV ({exc})", path, reader.line_num) from None
    decisions = decision_rows(rows, source=str(path), lines=lines)
    if scan_count is not None:
        decisions.check_scans(scan_count)
    return decisions
