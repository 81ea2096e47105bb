"""Atomic file writes: write to a temporary name beside the target, then rename.

An interrupted or failing write never leaves a truncated file at the target
name, and a previous good file stays in place until the new one is complete.
"""

from __future__ import annotations

import contextlib
import gzip
import io
import os
import tempfile
from pathlib import Path


@contextlib.contextmanager
def atomic_open(path, mode: str = "w", *, compress: bool | None = None, encoding: str = "utf-8"):
    """Open ``path`` for writing so that it appears only when complete.

    ``mode`` is "w" (text) or "wb" (bytes).  ``compress`` gzips the stream;
    by default it is on when the name ends in ``.gz``.  The data is flushed
    and fsynced before the rename so a crash cannot publish an empty file.
    """
    path = Path(path)
    if mode not in ("w", "wb"):
        raise ValueError("atomic_open supports modes 'w' and 'wb'")
    if compress is None:
        compress = path.name.endswith(".gz")
    directory = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=directory)
    # mkstemp creates owner-only files; outputs should get the usual
    # permissions that the user's umask gives a new file.
    os.chmod(tmp, 0o666 & ~_umask())
    raw = os.fdopen(fd, "wb")
    try:
        # mtime=0 keeps gzip output byte-identical across runs.
        inner = gzip.GzipFile(fileobj=raw, mode="wb", mtime=0, compresslevel=6) if compress else raw
        stream = io.TextIOWrapper(inner, encoding=encoding, newline="\n") if mode == "w" else inner
        yield stream
        stream.flush()
        if mode == "w":
            stream.detach()
        if compress:
            inner.close()
        raw.flush()
        os.fsync(raw.fileno())
        raw.close()
        os.replace(tmp, path)
    except BaseException:
        raw.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_text(path, text: str) -> None:
    """Write a whole text file atomically."""
    with atomic_open(path, "w") as fh:
        fh.write(text)


def write_bytes(path, data: bytes) -> None:
    """Write a whole binary file atomically."""
    with atomic_open(path, "wb") as fh:
        fh.write(data)
