"""The one atomic writer: every file the tool writes whole goes through :func:`atomic_write`.

A file is written to a temporary name beside its target (``.<name>.<random>.partial``),
created exclusively (``O_CREAT | O_EXCL | O_NOFOLLOW``: never an existing file, never
through a symlink) with the mode an ordinary new file gets (``0666`` less the umask:
0644 under the usual umask 022), flushed to disk (``fsync``), renamed over the target in
one step, and the directory is flushed. A reader finds the old file or the new one, never
a mix. The target must be absent or a regular file: a symlink, directory, FIFO, device
node or socket at the output path is refused with a sentence (``--overwrite`` included).
"""

from __future__ import annotations

import errno
import os
import secrets
import shutil
import stat
from contextlib import contextmanager
from pathlib import Path

from ..errors import CompositionError

_KINDS = ((stat.S_ISLNK, "a symbolic link"), (stat.S_ISDIR, "a directory"), (stat.S_ISFIFO, "a FIFO"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


class WriteError(CompositionError):
    """Writing an output file failed; ``reason`` says why in a few words."""

    def __init__(self, path, exc: BaseException, what: str = "file"):
        self.path = Path(path)
        self.reason = os_reason(exc)
        super().__init__(f"cannot write the {what} {self.path} ({self.reason}).")


def os_reason(exc: BaseException) -> str:
    """A few plain words for an operating-system failure (h5py hides errno in its text)."""
    code = getattr(exc, "errno", None)
    text = str(exc)
    if code == errno.ENOSPC or "No space left" in text or "errno = 28" in text:
        return "no space left on the device"
    if code == errno.EDQUOT or "Disk quota" in text or "errno = 122" in text:
        return "disk quota exceeded"
    if code == errno.EROFS or "Read-only file system" in text or "errno = 30" in text:
        return "read-only file system"
    if code in (errno.EACCES, errno.EPERM) or "Permission denied" in text or "errno = 13" in text:
        return "permission denied"
    if code == errno.ELOOP:
        return "it is a symbolic link"
    if code == errno.EIO or "errno = 5" in text:
        return "input/output error"
    if getattr(exc, "strerror", None):
        return exc.strerror
    return text.splitlines()[0] if text.strip() else type(exc).__name__


def special_kind(path: str | os.PathLike) -> str | None:
    """``"a symbolic link"``, ``"a FIFO"``, ... if ``path`` exists and is not a regular file, else None."""
    try:
        mode = os.lstat(path).st_mode
    except FileNotFoundError:
        return None
    except OSError as exc:
        return f"not accessible ({os_reason(exc)})"
    for test, kind in _KINDS:
        if test(mode):
            return kind
    return None if stat.S_ISREG(mode) else "not a regular file"


def check_target(path: str | os.PathLike, what: str = "output file") -> None:
    """Refuse an output path that exists and is not a regular file (a symlink, a device, ...)."""
    kind = special_kind(path)
    if kind is not None:
        raise CompositionError(f"the {what} path {path} is {kind}; this tool replaces only regular files, "
                               "so remove it or choose another path.")


def directory_of(path: Path) -> Path:
    return path.parent if str(path.parent) else Path(".")


def temporary_name(path: Path) -> Path:
    return directory_of(path) / f".{path.name}.{secrets.token_hex(8)}.partial"


def create_exclusive(path: Path, mode: int = 0o666) -> int:
    """Open a new file for writing; never an existing one, never through a symlink. # -> fd"""
    return os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0), mode)


@contextmanager
def atomic_write(path: str | os.PathLike, *, copy_from: str | os.PathLike | None = None, what: str = "file",
                 error=WriteError):
    """Yield a temporary path beside ``path``; on success flush it, rename it over ``path``
    and flush the directory. On any failure the temporary file is removed and ``path`` is
    left as it was; an operating-system failure raises ``error(path, exc, what)``.

    ``copy_from``: the temporary file starts as a copy of that file (to add to it).
    """
    path = Path(path)
    directory = directory_of(path)
    if not directory.is_dir():
        raise CompositionError(f"output directory {directory} does not exist.")
    check_target(path, what)
    tmp = temporary_name(path)
    with _removed_on_failure(tmp, path, what, error):
        fd = create_exclusive(tmp)
        try:
            if copy_from is not None:
                with open(copy_from, "rb") as src:
                    with os.fdopen(os.dup(fd), "wb") as dst:
                        shutil.copyfileobj(src, dst, 1 << 20)
        finally:
            os.close(fd)
    with _removed_on_failure(tmp, path, what, error):
        yield tmp
        fsync_file(tmp)
        check_target(path, what)  # nothing planted meanwhile
        os.replace(tmp, path)
        fsync_dir(directory)


@contextmanager
def _removed_on_failure(tmp: Path, path: Path, what: str, error):
    """On any failure inside, remove ``tmp``; an operating-system failure becomes ``error(path, exc, what)``."""
    try:
        yield
    except OSError as exc:
        remove_quietly(tmp)
        raise error(path, exc, what) from None
    except BaseException:
        remove_quietly(tmp)
        raise


def write_bytes(path: str | os.PathLike, data: bytes, what: str = "file") -> Path:
    """Write ``data`` to ``path`` atomically (CSV, HTML, small files)."""
    with atomic_write(path, what=what) as tmp:
        with open(tmp, "wb") as f:
            f.write(data)
    return Path(path)


def fsync_file(path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def remove_quietly(path) -> None:
    try:
        os.remove(path)
    except OSError:
        pass
