"""Atomic file writing: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and an existing file is only
replaced when the caller asks for it (``overwrite=True``).  Every target goes
through :func:`core.write_guard.check_target` (before the temporary file is
created and again just before the rename): an input file, a link to one, or an
FCS file this program did not write is never replaced.  Temporary files are
named ``.boscage-*.part``; :func:`remove_stale_parts` removes those a killed
process left behind.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from typing import IO, Iterator

from . import write_guard
from .errors import ExportError

#: Prefix and suffix of the temporary files (a killed writer may leave one behind).
PART_PREFIX, PART_SUFFIX = ".boscage-", ".part"


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, mode: str = "wb", overwrite: bool = False,
                 encoding: str | None = None, sources=()) -> Iterator[IO]:
    """Open a temporary file in ``path``'s folder; rename it onto ``path`` on success.

    Raises :class:`ExportError` naming the path when the folder is not writable,
    when ``path`` exists and ``overwrite`` is False, or when the write guard
    refuses ``path`` (an input file, one of ``sources``, a link to one, an FCS
    acquisition, a folder; see :mod:`core.write_guard`).  On any exception the
    temporary file is removed and ``path`` is untouched.
    """
    path = write_guard.check_target(path, overwrite, sources)
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ExportError(f"{path}: the folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=PART_PREFIX, suffix=PART_SUFFIX, dir=folder)
    except OSError as exc:
        raise ExportError(f"{path}: cannot write in {folder} ({exc.strerror or exc})") from exc
    try:
        with os.fdopen(fd, mode, encoding=encoding) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        try:
            write_guard.before_commit(path, overwrite, sources)
        except ExportError as exc:
            if not overwrite and os.path.lexists(path):
                raise ExportError(f"{path}: a file of that name appeared while writing; nothing was "
                                  "replaced") from exc
            raise
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


def remove_stale_parts(folder: str | os.PathLike, recursive: bool = True) -> int:
    """Remove the temporary files (``.boscage-*.part``) of writes killed mid-way in ``folder``
    (and its sub-folders, hidden ones included); return how many were removed.

    Only files with this module's prefix and suffix are touched; call it when no
    other process writes in ``folder`` (the batch does, at the start of a run).
    """
    removed = 0
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        return 0
    walker = os.walk(folder) if recursive else [(folder, [], os.listdir(folder))]
    for root, _dirs, files in walker:
        for name in files:
            if name.startswith(PART_PREFIX) and name.endswith(PART_SUFFIX):
                full = os.path.join(root, name)
                if os.path.isfile(full) and not os.path.islink(full):
                    with contextlib.suppress(OSError):
                        os.unlink(full)
                        removed += 1
    return removed
