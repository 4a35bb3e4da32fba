"""Atomic file writes: a file is either complete or absent, never half-written.

Write to a temporary file in the same folder, flush it to disk, then
``os.replace`` it onto the target (atomic on POSIX and Windows). A killed
writer leaves only a ``.tmp-*`` file, which :func:`remove_stale_temporaries`
deletes. Every writer of sedtemp goes through here.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

__all__ = ["TMP_PREFIX", "atomic_path", "atomic_write_text", "atomic_write_bytes",
           "atomic_write_with", "remove_stale_temporaries"]

#: Prefix of every temporary file; anything starting with it is incomplete.
TMP_PREFIX = ".tmp-"
#: Permissions of files sedtemp writes (before the umask), like any other program's.
_FILE_MODE = 0o666


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Context manager yielding a temporary path; on success it replaces ``path``.

    On any exception the temporary file is removed and ``path`` is untouched.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_path(d / "a.txt") as tmp:
    ...     _ = tmp.write_text("done")
    >>> (d / "a.txt").read_text()
    'done'
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=TMP_PREFIX, suffix=path.suffix, dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, _FILE_MODE & ~umask)  # mkstemp makes 0600; give the usual mode
    try:
        yield tmp
        _fsync(tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _fsync(path: Path) -> None:
    with contextlib.suppress(OSError), open(path, "rb+") as fh:
        os.fsync(fh.fileno())


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically; the path written."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically; the path written."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def atomic_write_with(path: str | os.PathLike, write: Callable[[Path], object]) -> Path:
    """Call ``write(tmp_path)`` and move the result onto ``path`` atomically."""
    with atomic_path(path) as tmp:
        write(tmp)
    return Path(path)


def remove_stale_temporaries(folder: str | os.PathLike) -> list[Path]:
    """Delete the ``.tmp-*`` files a killed writer left in ``folder``; those removed."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    gone = [p for p in folder.glob(TMP_PREFIX + "*") if p.is_file()]
    for p in gone:
        p.unlink(missing_ok=True)
    return gone
