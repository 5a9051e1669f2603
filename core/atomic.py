"""Atomic file writing: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and an existing file is only
replaced when the caller asks for it (``overwrite=True``).
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from typing import IO, Iterator

from .errors import ExportError


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "wb", overwrite: bool = False,
                 encoding: str | None = None) -> Iterator[IO]:
    """Open a temporary file in ``path``'s folder; rename it onto ``path`` on success.

    Raises :class:`ExportError` naming the path when the folder is not writable
    or when ``path`` exists and ``overwrite`` is False.  On any exception the
    temporary file is removed and ``path`` is untouched.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if not overwrite and os.path.exists(path):
        raise ExportError(f"{path}: a file of that name exists already; choose another name")
    if not os.path.isdir(folder):
        raise ExportError(f"{path}: the folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=".boscage-", suffix=".part", dir=folder)
    except OSError as exc:
        raise ExportError(f"{path}: cannot write in {folder} ({exc.strerror or exc})") from exc
    try:
        with os.fdopen(fd, mode, encoding=encoding) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        if not overwrite and os.path.exists(path):
            raise ExportError(f"{path}: a file of that name appeared while writing; nothing was replaced")
        # mkstemp creates owner-only files; give the result the usual permissions.
        os.chmod(tmp, 0o666 & ~_current_umask())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def unique_path(path: str | os.PathLike) -> str:
    """Return ``path`` or, when it exists, ``stem-2.ext``, ``stem-3.ext``, ... that does not."""
    path = os.fspath(path)
    if not os.path.exists(path):
        return path
    stem, ext = os.path.splitext(path)
    k = 2
    while os.path.exists(f"{stem}-{k}{ext}"):
        k += 1
    return f"{stem}-{k}{ext}"
