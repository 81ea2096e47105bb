"""Checks on input paths shared by every reader: only regular files are read."""

from __future__ import annotations

import os
import stat
from pathlib import Path

from ..errors import InputError


def check_regular_file(path, what: str = "file") -> Path:
    """Refuse anything but an existing regular file (or a link to one) with a one-line InputError.

    A named pipe (FIFO), a device such as ``/dev/zero`` or a socket would
    block a reader forever or feed it without end; a folder is not a file.
    Looking at the file's type does not open it, so this never blocks.
    Returns ``path`` as a :class:`~pathlib.Path`.
    """
    path = Path(path)
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except PermissionError:
        raise InputError("permission denied", path) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror or exc}", path) from None
    if stat.S_ISDIR(mode):
        raise InputError(f"is a directory, expected a {what}", path)
    if not stat.S_ISREG(mode):
        kind = ("a named pipe (FIFO)" if stat.S_ISFIFO(mode)
                else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode)
                else "a socket" if stat.S_ISSOCK(mode) else "a special file")
        raise InputError(f"is {kind}, not a regular file; expected a {what} (save the stream to a file first)",
                         path)
    return path


def is_regular_file(path) -> bool:
    """True for an existing regular file (or a link to one); never opens it."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except OSError:
        return False
