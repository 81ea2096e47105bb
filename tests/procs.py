"""Processes seen through /proc (Linux): for tests that check no process outlives a run."""

from __future__ import annotations

import os


def _state(pid: int) -> tuple[str, int] | None:
    """(state letter, parent pid) of a process, None when it is gone."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            rest = fh.read().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return rest[0], int(rest[1])


def descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (children, their children, ...)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            st = _state(int(entry))
            if st is not None:
                children.setdefault(st[1], []).append(int(entry))
    out, todo = [], [pid]
    while todo:
        for c in children.get(todo.pop(), []):
            out.append(c)
            todo.append(c)
    return out


def alive(pid: int) -> bool:
    """True while ``pid`` runs; a zombie (exited, not yet reaped) counts as gone."""
    st = _state(pid)
    return st is not None and st[0] != "Z"
