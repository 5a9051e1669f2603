"""The one check every file write goes through: input files are never replaced.

:func:`check_target` is called by :func:`core.atomic.atomic_write` (so by the
batch, the exports, recipes, model files and the app) before anything is
created, and again just before the temporary file is renamed onto the target.
It refuses, with :class:`~core.errors.ExportError` naming the file:

* a target that is an **input** -- a file read by :func:`core.fcs.read_fcs` in
  this process or registered with :func:`protect` (the batch registers every
  file of the run and the control).  "Is" means: the same file after links
  are followed (``os.path.samefile``: symbolic links and hard links, by
  device and inode), or the same real path compared case-insensitively (a
  case-insensitive file system maps ``X.FCS`` and ``x.fcs`` to one file);
* an existing **FCS file this program did not write** (its TEXT segment has
  no ``BOSCAGE_VERSION`` keyword): an acquisition is an input even when it
  was not opened, so ``overwrite=True`` never replaces one;
* an existing target when ``overwrite`` is False, and a target that is a folder.

:func:`check_output_folder` is the batch's rule for ``--out`` (see its
docstring); file names follow the one rule of :mod:`core.naming`.

A worker process can set :func:`set_abort_check` (the batch's parent-death
check): it is called before each rename, so an orphaned worker writes nothing.
"""

from __future__ import annotations

import os
import threading
from typing import Callable, Iterable, Sequence

from . import SOFTWARE_NAME
from .errors import ExportError
from .naming import file_names, file_part, short_hash  # noqa: F401  (re-exported: old import path)

_LOCK = threading.Lock()
_INPUT_IDS: dict = {}         # (st_dev, st_ino) of inputs -> (size, mtime_ns) when registered
_INPUT_NAMES: set = set()     # casefolded real paths of inputs
_ABORT_CHECK: list = [None]   # callable() -> None, raises (or exits) when writing must stop
_SEEN: set = set()            # paths already given to protect() (skips repeated work)

#: Bytes of an existing FCS file looked at to decide whether this program wrote it.
_OWN_MARK_BYTES = 1 << 16
_OWN_MARK = b"BOSCAGE_VERSION"


def _folded(path: str) -> str:
    return os.path.normcase(os.path.realpath(path)).casefold()


def protect(paths: str | os.PathLike | Iterable) -> None:
    """Register input file(s): no write of this process may replace them."""
    if isinstance(paths, (str, bytes, os.PathLike)):
        paths = [paths]
    for p in paths:
        try:
            p = os.fspath(p)
        except TypeError:
            continue
        if isinstance(p, bytes):
            p = os.fsdecode(p)
        if p in _SEEN:
            continue
        with _LOCK:
            _SEEN.add(p)
            _INPUT_NAMES.add(_folded(p))
            try:
                st = os.stat(p)
                _INPUT_IDS[(st.st_dev, st.st_ino)] = (st.st_size, st.st_mtime_ns)
            except OSError:
                pass


def is_input(path: str | os.PathLike) -> bool:
    """True when ``path`` resolves to a registered input (links followed, case-insensitive)."""
    path = os.fspath(path)
    with _LOCK:
        if _folded(path) in _INPUT_NAMES:
            return True
        try:
            st = os.stat(path)
        except OSError:
            return False
        # the same inode with the same size and time: the input itself or a hard link to it
        # (an inode reused after the input was deleted has another time, and is not refused)
        return _INPUT_IDS.get((st.st_dev, st.st_ino)) == (st.st_size, st.st_mtime_ns)


def set_abort_check(check: Callable[[], None] | None) -> None:
    """Install ``check()``, called before every rename onto a target (None removes it)."""
    _ABORT_CHECK[0] = check


def _is_foreign_fcs(path: str) -> bool:
    """True for an existing FCS file whose TEXT segment carries no mark of this program."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(_OWN_MARK_BYTES)
            if not (head[:3] == b"FCS" and head[3:6].replace(b".", b"").isdigit()):
                return False
            if _OWN_MARK in head:
                return False
            try:  # a long TEXT segment (a large spillover matrix): read it whole, up to 16 MB
                t0, t1 = int(head[10:18]), int(head[18:26])
            except ValueError:
                return True
            if t1 < len(head) or t1 <= t0:
                return True
            fh.seek(t0)
            return _OWN_MARK not in fh.read(min(t1 - t0 + 1, 1 << 24))
    except OSError:
        return False


def path_text(path) -> str:
    """``path`` (str, bytes or os.PathLike) as str; TypeError for anything else.

    The one coercion of a caller's path; each caller turns the TypeError into
    its own error type (FCS file, model file, output file)."""
    path = os.fspath(path)
    return os.fsdecode(path) if isinstance(path, bytes) else path


def check_target(path: str | os.PathLike, overwrite: bool = False, sources: Sequence = ()) -> str:
    """Refuse writing ``path`` (ExportError) for the reasons in the module docstring.

    ``sources``: extra input files of this write (for example an export's
    source file), refused like registered inputs.  Returns ``path`` as str.
    """
    try:
        path = path_text(path)
    except TypeError:
        raise ExportError(f"{path!r} is not a file path") from None
    if not path or "\x00" in path:
        raise ExportError(f"{path!r} is not a usable file path")
    name = os.path.basename(path) or path
    for src in sources:
        if src and _same(path, os.fspath(src)):
            raise ExportError(f"{path}: this is the input file {os.path.basename(os.fspath(src))}; input "
                              "files are never overwritten. Choose another name.")
    if is_input(path):
        raise ExportError(f"{path}: this is an input file ({name}, or a link to it); input files are "
                          "never overwritten. Choose another name.")
    if os.path.isdir(path):
        raise ExportError(f"{path}: a folder of that name exists; choose another file name")
    if os.path.lexists(path):
        if not overwrite:
            raise ExportError(f"{path}: a file of that name exists already; choose another name")
        if _is_foreign_fcs(path):
            raise ExportError(f"{path}: this is an FCS file that {_software()} did not write (an "
                              "acquisition); it is never replaced. Choose another name.")
    return path


def before_commit(path: str, overwrite: bool, sources: Sequence = ()) -> None:
    """The last check before the temporary file is renamed onto ``path``."""
    check = _ABORT_CHECK[0]
    if check is not None:
        check()
    check_target(path, overwrite, sources)


def _same(a: str, b: str) -> bool:
    try:
        if os.path.exists(a) and os.path.exists(b) and os.path.samefile(a, b):
            return True
    except OSError:
        pass
    return _folded(a) == _folded(b)


def _software() -> str:
    return SOFTWARE_NAME


# --------------------------------------------------------------------------- folders

def _real_existing(path: str) -> str:
    """Real path of ``path``, resolving the part that exists (a new folder's parent)."""
    return os.path.normcase(os.path.realpath(os.path.abspath(path)))


def _inside(child: str, parent: str) -> bool:
    c, p = child.casefold(), parent.casefold()
    return c == p or c.startswith(p.rstrip(os.sep) + os.sep)


def check_output_folder(out_dir: str, input_dirs: Sequence[str], what: str = "--out") -> None:
    """Refuse a batch output folder that would mix outputs with inputs (ExportError).

    Rule, with links resolved and case ignored: the output folder may not BE an
    input folder, nor CONTAIN one (``batch X/run1 --out X`` would write the
    per-file folder ``X/run1`` into the inputs).  A folder inside an input
    folder (``batch X --out X/results``) is allowed: the batch reads only the
    files directly in its input folder, so outputs there never mix with them.
    """
    out = _real_existing(out_dir)
    for d in input_dirs:
        inp = _real_existing(d)
        if out.casefold() == inp.casefold():
            raise ExportError(f"{out_dir}: this is the input folder {d} (or a link to it); choose an "
                              f"output folder outside the inputs")
        if _inside(inp, out):
            raise ExportError(f"{out_dir}: this folder contains the input folder {d}; outputs would be "
                              "written among the inputs. Choose an output folder that does not hold them")


# --------------------------------------------------------------------------- names

# File names follow the one rule of core.naming; these names stay importable from here.
clean_name = file_part
safe_unique_names = file_names
