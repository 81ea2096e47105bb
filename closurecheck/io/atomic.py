"""Atomic writes: a file, or a whole folder of files, appears only when complete.

A file is written under a temporary name beside its target, then renamed
(:func:`atomic_open`).  A folder of outputs (one run's graph.json,
candidates.csv, ... ) is written into a hidden staging folder beside its
target and put in place as a whole by renaming (:func:`staged_folder`), so
the target folder always holds one complete set of outputs: the previous
one until the new one is complete, then the new one (docs/cli.md, "What an
interrupted or failed run leaves").

Errors name the target, never the temporary name.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import gzip
import io
import os
import secrets
import shutil
import signal
import stat
import sys
import tempfile
import threading
from pathlib import Path

# Hidden names beside a target folder: ".NAME.closurecheck-staging-PID-TOKEN"
# while a run writes, ".NAME.closurecheck-old-PID-TOKEN" for the moment the
# previous folder is moved away.  The PID lets a later run remove what a
# killed run left behind.
STAGING_MARK = ".closurecheck-"


def _named(exc: OSError, name) -> OSError:
    """The same OS error with ``name`` as its file name (keeps the errno and so the subclass)."""
    if exc.errno is None:
        return exc
    new = OSError(exc.errno, exc.strerror or os.strerror(exc.errno), str(name))
    new.__cause__ = exc
    return new


@contextlib.contextmanager
def atomic_open(path, mode: str = "w", *, compress: bool | None = None, encoding: str = "utf-8"):
    """Open ``path`` for writing so that it appears only when complete.

    ``mode`` is "w" (text) or "wb" (bytes).  ``compress`` gzips the stream;
    by default it is on when the name ends in ``.gz``.  The data is flushed
    and fsynced before the rename so a crash cannot publish an empty file.
    An :class:`OSError` (permission denied, disk full) names ``path``, not
    the temporary file.
    """
    path = Path(path)
    if mode not in ("w", "wb"):
        raise ValueError("atomic_open supports modes 'w' and 'wb'")
    if compress is None:
        compress = path.name.endswith(".gz")
    directory = path.parent if str(path.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=directory)
    except OSError as exc:
        raise _named(exc, path) from exc
    raw = None
    try:
        # mkstemp creates owner-only files; outputs should get the usual
        # permissions that the user's umask gives a new file.
        os.chmod(tmp, 0o666 & ~_umask())
        raw = os.fdopen(fd, "wb")
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
    except BaseException as exc:
        if raw is not None:
            with contextlib.suppress(OSError):
                raw.close()
        else:
            with contextlib.suppress(OSError):
                os.close(fd)
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise _named(exc, path) from exc
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


# --- whole folders ---------------------------------------------------------------------------------

class StagedFolder:
    """A hidden folder beside ``target`` that replaces it as a whole on :meth:`commit`.

    target : the folder to produce (it may exist: it is replaced, never
        merged).  A symbolic link is followed: the folder it points to is
        replaced and the link keeps pointing at it.
    path : the staging folder to write into; same parent as the target, so
        the final rename never crosses file systems.
    """

    def __init__(self, target):
        self.given = Path(target)
        self.target = Path(os.path.realpath(self.given))
        parent = self.target.parent
        remove_stale(parent, self.target.name)
        self.path = _fresh_dir(parent, f".{self.target.name}{STAGING_MARK}staging-{os.getpid()}-", self.given)
        self.done = False

    def final(self, path) -> Path:
        """Where a path inside the staging folder ends up (for messages), as the user named the target."""
        try:
            return self.given / Path(path).relative_to(self.path)
        except ValueError:
            return Path(path)

    def commit(self, check=None) -> None:
        """Put the staging folder in place of the target.

        ``check(target)`` is called first and may raise to refuse replacing
        what is there now.  Ctrl-C and SIGTERM are held back until the folder
        is in place, so an interruption cannot leave the target missing.
        """
        with _signals_held():
            if check is not None:
                check(self.given)
            target, parent = self.target, self.target.parent
            if os.path.lexists(target):
                with contextlib.suppress(OSError):
                    os.chmod(self.path, stat.S_IMODE(os.stat(target).st_mode))
                if _exchange(self.path, target):
                    old = self.path
                else:
                    old = _fresh_name(parent, f".{target.name}{STAGING_MARK}old-{os.getpid()}-")
                    os.rename(target, old)
                    try:
                        os.rename(self.path, target)
                    except BaseException:
                        os.rename(old, target)
                        raise
            else:
                os.rename(self.path, target)
                old = None
            self.done = True
            _fsync_dir(parent)
            if old is not None:
                shutil.rmtree(old, ignore_errors=True)

    def discard(self) -> None:
        """Remove the staging folder (after a failure); the target is untouched."""
        if not self.done:
            shutil.rmtree(self.path, ignore_errors=True)


@contextlib.contextmanager
def staged_folder(target, check=None):
    """Write a folder's files into a staging folder, then replace ``target`` with it as a whole.

    Yields a :class:`StagedFolder`; write into ``stage.path``.  When the
    block ends normally the staging folder replaces ``target`` (after
    ``check(target)``, see :meth:`StagedFolder.commit`); when it raises
    (bad input, disk full, Ctrl-C) the staging folder is removed and the
    target keeps its previous content.  An :class:`OSError` raised inside
    names the file by its final path, not the staging one.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> root = pathlib.Path(tempfile.mkdtemp())
    >>> with staged_folder(root / "run") as stage:
    ...     write_text(stage.path / "a.txt", "new")
    >>> sorted(p.name for p in root.iterdir())
    ['run']
    """
    stage = StagedFolder(target)
    try:
        yield stage
        stage.commit(check)
    except BaseException as exc:
        stage.discard()
        if isinstance(exc, OSError) and exc.filename is not None:
            raise _named(exc, stage.final(exc.filename)) from exc
        raise


def staging_leftovers(parent, name: str) -> list[Path]:
    """Hidden staging folders of target ``name`` in ``parent`` (a run in progress or a killed one)."""
    prefix = f".{name}{STAGING_MARK}"
    try:
        return sorted(p for p in Path(parent).iterdir() if p.name.startswith(prefix))
    except OSError:
        return []


def remove_stale(parent, name: str) -> None:
    """Remove staging folders of ``name`` whose process is gone (a run killed before it could clean up)."""
    for p in staging_leftovers(parent, name):
        try:
            pid = int(p.name.rsplit("-", 2)[-2])
        except (ValueError, IndexError):
            continue
        if pid != os.getpid() and not _alive(pid):
            shutil.rmtree(p, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # another user's process: alive
        return True
    return True


def _fresh_name(parent: Path, prefix: str) -> Path:
    while True:
        p = parent / (prefix + secrets.token_hex(4))
        if not os.path.lexists(p):
            return p


def _fresh_dir(parent: Path, prefix: str, given: Path) -> Path:
    # os.mkdir (unlike mkdtemp) gives the usual umask permissions to the
    # folder that becomes the user's output folder.
    for _ in range(100):
        p = parent / (prefix + secrets.token_hex(4))
        try:
            os.mkdir(p)
            return p
        except FileExistsError:
            continue
        except OSError as exc:
            raise _named(exc, given) from exc
    raise FileExistsError(errno.EEXIST, "cannot find a free staging name", str(given))


_RENAME_EXCHANGE = 2  # linux/fs.h
_AT_FDCWD = -100


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths in one step (Linux renameat2 RENAME_EXCHANGE); False where unsupported."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    if fn(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP):
        return False  # the file system or kernel cannot swap: rename twice instead
    raise OSError(err, os.strerror(err), str(b))


def _fsync_dir(path: Path) -> None:
    # Makes the renames durable; not every platform can open a folder.
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def _signals_held():
    """Hold back Ctrl-C and SIGTERM (delivered when the block ends); a no-op off the main thread or off Unix."""
    if not hasattr(signal, "pthread_sigmask") or threading.current_thread() is not threading.main_thread():
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)
