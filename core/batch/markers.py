"""Finished-file markers: ``<file folder>/done.json`` lets a re-run skip what is done.

A marker holds the file's summary row, the recipe digest (extended by the
contents of a spillover CSV the recipe names: :func:`inputs_digest`), the
input file's size and modification time and the control file's path, size and
modification time.  A file is skipped only while all of them still match
(and, with ``--csv`` and a control, the CSV was written).  Imports only the
standard library and small core modules.
"""

from __future__ import annotations

import hashlib
import json
import os
from typing import Any

from ..atomic import atomic_write
from ..errors import ExportError
from .layout import DONE_NAME, file_out_dir


def source_stamp(path: str) -> dict:
    """What identifies the version of a file on disk: ``{"size", "mtime_ns"}``."""
    st = os.stat(path)
    return {"size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)}


def sha256_file(path: str) -> str:
    """Hex SHA-256 of a file's bytes (read in 1 MB blocks)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def inputs_digest(recipe: Any, digest: str) -> str:
    """The recipe digest extended by the contents of the spillover CSV the recipe
    names (compensation source "csv"): a changed matrix at the same path must redo
    finished files and the prepared control.  ``digest`` itself stays the recipe's
    (it is what exports record as provenance)."""
    comp = getattr(recipe, "compensation", None) or {}
    if comp.get("source") != "csv":
        return digest
    path = recipe.csv_path_resolved()
    if not path or not os.path.isfile(path):
        return digest  # the analysis reports the missing file itself
    return hashlib.sha256(f"{digest}:{sha256_file(path)}".encode("ascii")).hexdigest()[:16]


def write_done(folder: str, task: dict, row: dict, control_used: dict | None) -> None:
    """Write the marker of a finished file (atomic; last of the file's outputs)."""
    control = task.get("control")
    with atomic_write(os.path.join(folder, DONE_NAME), "w", overwrite=True, encoding="utf-8") as fh:
        json.dump({"row": row, "recipe_digest": task["digest"],
                   "inputs_digest": task.get("inputs_digest", task["digest"]), "control": control,
                   "control_source": source_stamp(control) if control else None,
                   "control_prepared": control_used, "source": source_stamp(task["path"]),
                   "csv": bool(task.get("csv"))}, fh, indent=1)


def finished_row(out_dir: str, path: str, key: str, control: str | None,
                 names: dict | None = None, csv: bool = False) -> dict | None:
    """The summary row of a file finished by an earlier run with the same inputs, else None."""
    try:
        marker = os.path.join(file_out_dir(out_dir, path, names), DONE_NAME)
        with open(marker, encoding="utf-8") as fh:
            done = json.load(fh)
        if (done.get("inputs_digest") == key and done.get("control") == control
                and done.get("control_source") == (source_stamp(control) if control else None)
                and done.get("source") == source_stamp(path) and done["row"].get("status") == "ok"
                and (not csv or not control or done.get("csv"))):
            return dict(done["row"])
    except (OSError, ValueError, KeyError, TypeError, AttributeError, RecursionError, ExportError):
        pass
    return None
