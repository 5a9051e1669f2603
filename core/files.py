"""Which files are FCS files: one rule for the window and the batch.

An FCS data file is a regular file whose name ends in ``.fcs`` or ``.lmd``
(any letter case; ``.lmd`` "list mode data" is the same FCS format under
another extension, common practice for some instruments).  Folders are
searched one level deep, never recursively; results are absolute paths,
sorted by name (case-insensitive), without duplicates.
"""

from __future__ import annotations

import os
from typing import Iterable

#: Name endings of FCS data files (compared in lower case).
FCS_SUFFIXES = (".fcs", ".lmd")


def is_fcs_file(path: str | os.PathLike) -> bool:
    """True for an existing regular file named like an FCS data file."""
    p = os.fspath(path)
    return os.path.isfile(p) and p.lower().endswith(FCS_SUFFIXES)


def list_fcs_files(folder: str | os.PathLike) -> list[str]:
    """FCS data files directly in ``folder`` (absolute paths, sorted by name)."""
    folder = os.path.abspath(os.fspath(folder))
    try:
        names = os.listdir(folder)
    except OSError:
        return []
    files = [os.path.join(folder, n) for n in names if is_fcs_file(os.path.join(folder, n))]
    return sorted(files, key=lambda p: (os.path.basename(p).lower(), p))


def expand_paths(paths: Iterable[str | os.PathLike]) -> list[str]:
    """Files named in ``paths`` plus the FCS data files of each folder in it,
    as absolute paths in the order given, each once.  Named files are kept
    whatever their extension (the reader says whether they are FCS)."""
    out: list[str] = []
    seen: set[str] = set()
    for p in paths:
        p = os.fspath(p)
        found = list_fcs_files(p) if os.path.isdir(p) else [os.path.abspath(p)]
        for f in found:
            if f not in seen:
                seen.add(f)
                out.append(f)
    return out
