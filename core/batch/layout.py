"""The batch's output folder: the names it writes, the per-file folders, and the checks on OUT_DIR.

File and folder names follow the one rule of :mod:`core.naming`; whether a
folder may be written at all is :mod:`core.write_guard`'s rule.  Imports only
the standard library and small core modules (no science).
"""

from __future__ import annotations

import os
from typing import Sequence

from .. import SOFTWARE_NAME, __version__
from ..atomic import atomic_write, remove_stale_parts
from ..errors import ExportError
from ..naming import events_file_name, file_names

SUMMARY_NAME = "summary.csv"
README_NAME = "README.txt"
RECIPE_NAME = "recipe.json"
#: The per-file marker of a finished file (:mod:`core.batch.markers`).
DONE_NAME = "done.json"
#: Marks OUT_DIR as a batch output folder (its summary, README and recipe may be replaced).
OUT_MARK = ".boscage-batch"
#: The control prepared once per batch (:mod:`core.batch.control`).
CONTROL_DIR = ".prepared-control"
#: The population tables (:func:`core.batch.reports.write_population_tables`), beside the summary.
POPULATIONS_NAME = "populations.csv"
POPULATION_CHANGES_NAME = "population_changes.csv"
#: Names the batch writes directly in OUT_DIR: no input's folder may take one.
RESERVED_NAMES = (SUMMARY_NAME, README_NAME, RECIPE_NAME, DONE_NAME, CONTROL_DIR, OUT_MARK,
                  POPULATIONS_NAME, POPULATION_CHANGES_NAME)


def output_folder_names(paths: Sequence[str]) -> dict:
    """Folder name (inside OUT_DIR) of each input file: ``{basename: name or None}``.

    The file's stem made a name part by :func:`core.naming.file_names`, with the
    batch's own names reserved: the same input gets the same folder on every
    run, and two inputs never share one (``x.fcs`` / ``x.FCS``, ``a:b.fcs`` /
    ``a-b.fcs``, ``summary.csv.fcs`` / the summary).  None: no distinct name
    could be made (the file is reported with status error).
    """
    bases = [os.path.basename(os.fspath(p)) for p in paths]
    return file_names(bases, RESERVED_NAMES, "file", bases=[os.path.splitext(b)[0] for b in bases])


def file_out_dir(out_dir: str, path: str, names: dict | None = None) -> str:
    """The output folder of one input file: ``OUT_DIR/<name>`` (see :func:`output_folder_names`;
    ``names`` is its result for all files of the run, default: this file alone)."""
    base = os.path.basename(os.fspath(path))
    name = (names if names is not None else output_folder_names([path])).get(base)
    if name is None:
        raise ExportError(f"{base}: no output folder name distinct from the other inputs' can be made; "
                          "rename the file")
    return os.path.join(out_dir, name)


def region_file_names(names: Sequence[str], where: str) -> dict:
    """File-name part of each region: safe, stable, distinct (``a/b`` and ``a-b`` never share a file)."""
    out = file_names(list(names), (), "region")
    for name, part in out.items():
        if part is None:
            raise ExportError(f"{where}: region {name!r} cannot be given a file name distinct from the other "
                              "regions'; rename it")
    return out


def events_path(folder: str, what: str, name: str | None = None, ext: str = "fcs") -> str:
    """``<folder>/<stem>_<what>[_<name>].<ext>``, the stem being the folder's name (:mod:`core.naming`)."""
    return os.path.join(folder, events_file_name(os.path.basename(folder), what, name, ext))


def make_folder(folder: str) -> None:
    """Create ``folder`` (and parents); ExportError with a sentence when it cannot be."""
    if os.path.lexists(folder) and not os.path.isdir(folder):
        raise ExportError(f"{folder}: a file of that name exists, so the output folder cannot be created "
                          "there; choose another output folder")
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError as exc:
        raise ExportError(f"{folder}: the output folder cannot be created ({exc.strerror or exc}); choose "
                          "a folder you can write in") from None


def is_batch_folder(out_dir: str) -> bool:
    """True when ``out_dir`` was written by a batch (its mark, or the README of earlier versions)."""
    if os.path.isfile(os.path.join(out_dir, OUT_MARK)):
        return True
    try:
        with open(os.path.join(out_dir, README_NAME), encoding="utf-8") as fh:
            first = fh.readline()
    except (OSError, UnicodeDecodeError):
        return False
    return first.startswith(f"{SOFTWARE_NAME} ") and "batch output" in first


def prepare_out_dir(out_dir: str, folder_names: Sequence[str]) -> None:
    """Create OUT_DIR, or check that an existing one may receive this batch's files.

    A folder no batch wrote (no ``.boscage-batch`` mark) is refused when it holds
    a file or folder the batch would replace (``summary.csv``, ``README.txt``,
    ``recipe.json``, a per-file folder...): those are the user's files.  Then the
    mark is written and the temporary files of an earlier, killed run removed.
    Raises ExportError with a sentence (exit code 2 on the command line).
    """
    if os.path.isdir(out_dir) and not is_batch_folder(out_dir):
        ours = {n.casefold() for n in list(RESERVED_NAMES) + [n for n in folder_names if n]}
        try:
            clash = sorted(n for n in os.listdir(out_dir) if n.casefold() in ours)
        except OSError as exc:
            raise ExportError(f"{out_dir}: the output folder cannot be read ({exc.strerror or exc})") from None
        if clash:
            raise ExportError(f"{out_dir}: this folder was not written by a batch and holds "
                              f"{', '.join(clash[:5])}, which the batch would replace; choose a new or "
                              "empty output folder")
    make_folder(out_dir)
    mark = os.path.join(out_dir, OUT_MARK)
    if not os.path.isfile(mark):
        with atomic_write(mark, "w", overwrite=True, encoding="utf-8") as fh:
            fh.write(f"{SOFTWARE_NAME} {__version__} batch output folder\n")
    remove_stale_parts(out_dir)
