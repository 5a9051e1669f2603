"""Export selected events to FCS 3.1 or CSV, with provenance and the research-use caution.

* :func:`export_events_fcs` writes the selected events' *original* values as
  read from the source file (uncompensated, untransformed; ``EventFile.data``)
  plus added parameters (for example "log density", "rarity percentile", one
  0/1 column per region), as float32 FCS 3.1 via :func:`core.fcs.write_fcs`.
  Provenance TEXT keywords: ``BOSCAGE_SOURCE`` (source file name),
  ``BOSCAGE_RECIPE`` (recipe digest), ``BOSCAGE_VERSION``, ``BOSCAGE_CAUTION``
  and ``$COM`` (the research-use caution); the source's spillover matrix is
  carried as ``$SPILLOVER`` so the exported file can be compensated as the
  original could.
* :func:`export_events_csv` writes a ``# `` comment line with the caution,
  a header row, then one row per selected event, numbers in the shortest text
  that reads back to the identical float64 (Python ``repr``).

Every write is atomic (:func:`core.atomic.atomic_write`): a failed export
leaves nothing behind.  An input file is never overwritten, not even with
``overwrite=True`` or through a link: every target passes
:func:`core.write_guard.check_target` (files read in this process, the
export's source and FCS files this program did not write are refused).
"""

from __future__ import annotations

import csv
import math
import os
from typing import Any, Mapping, Sequence

import numpy as np

from . import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from . import write_guard
from .atomic import atomic_write
from .compensation import SPILLOVER_KEYWORDS, spillover_from_keywords, spillover_to_keyword
from .errors import BoscageError, ExportError
from .fcs import write_fcs

#: Source keywords copied to an exported FCS file (acquisition context, when present).
CARRIED_KEYWORDS = ("$CYT", "$CYTSN", "$DATE", "$BTIM", "$ETIM", "$INST", "$OP", "$SRC",
                    "$SMNO", "$PROJ", "$EXP", "$TIMESTEP", "$VOL")

#: Events formatted per block when writing CSV (bounds memory for large files).
_CSV_BLOCK = 50_000


def _refuse_source(path: str, sources: Sequence[str], overwrite: bool = True) -> None:
    """The write guard's verdict on ``path`` before any work (ExportError); see :mod:`core.write_guard`."""
    write_guard.check_target(path, overwrite, [s for s in sources if s])


def _selection(mask: Any, n_events: int) -> np.ndarray:
    """Bool mask (n_events,) from ``mask`` (None = every event)."""
    if mask is None:
        return np.ones(n_events, dtype=bool)
    m = np.asarray(mask)
    if m.dtype != bool:
        raise ExportError(f"the selection must be a true/false mask over the events; got {m.dtype} values")
    m = m.ravel()
    if m.shape[0] != n_events:
        raise ExportError(f"the selection has {m.shape[0]} entries but there are {n_events} events")
    return m


def _extra_arrays(extra_columns: Mapping[str, Any] | None, n_events: int,
                  existing: Sequence[str]) -> list[tuple[str, np.ndarray]]:
    out = []
    taken = {str(c) for c in existing}
    for name, col in (extra_columns or {}).items():
        name = str(name)
        if not name.strip():
            raise ExportError("an added column has an empty name")
        if name in taken:
            raise ExportError(f"the added column {name!r} has the name of another column; rename it")
        taken.add(name)
        arr = np.asarray(col)
        if arr.ndim != 1 or arr.shape[0] != n_events:
            raise ExportError(f"the added column {name!r} has shape {arr.shape}; it needs one value per "
                              f"event ({n_events})")
        if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
            raise ExportError(f"the added column {name!r} must hold numbers; got {arr.dtype}")
        out.append((name, arr))
    return out


def _spillover_keyword(keywords: Mapping[str, str], source: str) -> dict[str, str]:
    """The source's spillover matrix as an FCS 3.1 ``$SPILLOVER`` keyword (empty dict when none)."""
    try:
        S = spillover_from_keywords(dict(keywords), source=source)
        if S is None:
            return {}
        return {"$SPILLOVER": spillover_to_keyword(S)}
    except BoscageError:
        # Unreadable for us: carry the text exactly as the source wrote it.
        for key in SPILLOVER_KEYWORDS:
            for k, v in keywords.items():
                if str(k).strip().upper() == key and str(v).strip():
                    return {str(k): str(v)}
    return {}


def export_events_fcs(path: str | os.PathLike, event_file: Any, mask: Any,
                      extra_columns: Mapping[str, Any] | None, recipe_digest: str,
                      overwrite: bool = False, missing_value: float | None = None,
                      extra_keywords: Mapping[str, str] | None = None) -> str:
    """Write the selected events of ``event_file`` to an FCS 3.1 file; return the path.

    ``event_file``: a :class:`core.fcs.EventFile`; its ``data`` (events x
    channels, values as read, uncompensated) is written for the selected
    events, followed by ``extra_columns`` (name -> array (n_events,), e.g.
    "log density" in nats, "rarity percentile" 0-100, a 0/1 column per region).
    ``mask``: bool (n_events,), or None for every event.  An empty selection
    writes a valid file with no events ($TOT 0).  Selected events holding NaN
    or infinite values (FCS cannot store them) are left out and counted in
    the keyword ``BOSCAGE_NONFINITE`` and in ``$COM``.
    ``recipe_digest``: :func:`core.recipe.recipe_digest` of the recipe used.
    ``extra_keywords``: more TEXT keywords (e.g. ``BOSCAGE_CONTROL``), added
    after the provenance keywords.
    ``missing_value``: FCS holds no NaN; NaN in an added column (e.g. the log
    density of an event removed by cleaning) is written as this number, or
    refused (ExportError) when it is None.

    Raises :class:`ExportError` (nothing written) for a bad selection or column,
    a target that is an input file, an existing target without ``overwrite``,
    or a folder that cannot be written.
    """
    path = os.fspath(path)
    source = os.fspath(getattr(event_file, "path", "") or "")
    _refuse_source(path, [source], overwrite)
    data = np.asarray(event_file.data)
    if data.ndim != 2:
        raise ExportError(f"{path}: the event data must be events x channels; got shape {data.shape}")
    n_events = data.shape[0]
    sel = _selection(mask, n_events)
    names = [str(c) for c in event_file.channel_names]
    extras = _extra_arrays(extra_columns, n_events, names)

    src_name = os.path.basename(source) if source else "(unknown source)"
    # FCS data cannot carry NaN/inf: such events are left out and counted in BOSCAGE_NONFINITE.
    nonfinite = sel & ~np.isfinite(data).all(axis=1)
    n_nonfinite = int(nonfinite.sum())
    sel = sel & ~nonfinite
    n_sel = int(sel.sum())

    columns = [data[sel].astype(np.float64)]
    labels = list(getattr(event_file, "channel_labels", None) or [""] * len(names))
    src_ranges = getattr(event_file, "channel_ranges", None)
    ranges = (list(np.asarray(src_ranges, dtype=np.float64).ravel()) if src_ranges is not None
              else [float(max(1.0, math.ceil(np.max(columns[0][:, j], initial=1.0))))
                    for j in range(len(names))])
    ranges = [r if math.isfinite(r) and r > 0 else 1.0 for r in ranges]
    for name, arr in extras:
        col = arr[sel].astype(np.float64)
        nan = np.isnan(col)
        if nan.any():
            if missing_value is None:
                raise ExportError(f"{path}: the added column {name!r} has no value (NaN) for "
                                  f"{int(nan.sum())} selected events (events removed by cleaning?); "
                                  "leave them out of the selection or give a missing value")
            col[nan] = float(missing_value)
        if not np.isfinite(col).all():
            raise ExportError(f"{path}: the added column {name!r} holds infinite values, which FCS "
                              "files cannot carry")
        columns.append(col[:, None])
        names.append(name)
        labels.append("")
        top = float(np.max(col)) if col.size else 1.0
        ranges.append(float(max(1.0, math.ceil(top))))

    kw_src = dict(getattr(event_file, "keywords", {}) or {})
    keywords: dict[str, str] = {}
    for key in CARRIED_KEYWORDS:
        if kw_src.get(key, "").strip():
            keywords[key] = kw_src[key]
    keywords.update(_spillover_keyword(kw_src, src_name))
    keywords.update({
        "$FIL": os.path.basename(path),
        "$COM": f"Events exported by {SOFTWARE_NAME} {__version__} from {src_name}. {RESEARCH_USE_NOTE}",
        "BOSCAGE_SOURCE": src_name,
        "BOSCAGE_RECIPE": str(recipe_digest or "none"),
        "BOSCAGE_VERSION": __version__,
        "BOSCAGE_CAUTION": RESEARCH_USE_NOTE,
        "BOSCAGE_EVENTS": f"{n_sel} of {n_events}",
    })
    keywords.update({str(k): str(v) for k, v in (extra_keywords or {}).items()})
    if n_nonfinite:
        keywords["BOSCAGE_NONFINITE"] = str(n_nonfinite)
        keywords["$COM"] += (f" {n_nonfinite} selected events holding NaN or infinite values were "
                             "left out (FCS cannot store them).")
    if missing_value is not None:
        keywords["BOSCAGE_MISSING"] = repr(float(missing_value))
    try:
        return write_fcs(path, np.hstack(columns), names, keywords=keywords, channel_labels=labels,
                         channel_ranges=ranges, overwrite=overwrite)
    except ExportError:
        raise
    except BoscageError as exc:
        raise ExportError(f"{path}: {exc}") from exc
    except OSError as exc:
        raise ExportError(f"{path}: writing failed ({exc.strerror or exc}); nothing was written") from exc


def _format_column(col: np.ndarray) -> list[str]:
    """Text of each value: integers as integers, floats by ``repr`` (round-trips float64)."""
    if col.dtype == bool or np.issubdtype(col.dtype, np.integer):
        return [str(v) for v in col.astype(np.int64).tolist()]
    return [repr(v) for v in col.astype(np.float64).tolist()]


def export_events_csv(path: str | os.PathLike, channel_names: Sequence[str], values: Any,
                      mask: Any, extra_columns: Mapping[str, Any] | None,
                      overwrite: bool = False, caution: bool = True,
                      source_paths: Sequence[str] = ()) -> str:
    """Write the selected events to a CSV file; return the path.

    ``values``: (n_events, n_channels), raw or transformed as the caller chose;
    ``channel_names``: one header per column; ``mask``: bool (n_events,) or None
    for every event; ``extra_columns``: name -> array (n_events,) appended.
    Layout: when ``caution`` (default), a first line ``# <research-use caution>``;
    then the header row; then one row per selected event.  NaN is written as
    ``nan``.  ``source_paths``: input files the target must not be (refused),
    besides every file read in this process (:mod:`core.write_guard`).
    """
    path = os.fspath(path)
    sources = [os.fspath(p) for p in source_paths]
    _refuse_source(path, sources, overwrite)
    vals = np.asarray(values)
    if vals.ndim != 2:
        raise ExportError(f"{path}: values must be events x channels; got shape {vals.shape}")
    names = [str(c) for c in channel_names]
    if len(names) != vals.shape[1]:
        raise ExportError(f"{path}: {len(names)} column names for {vals.shape[1]} columns of values")
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ExportError(f"{path}: column names repeat ({', '.join(dup)})")
    n_events = vals.shape[0]
    sel = _selection(mask, n_events)
    extras = _extra_arrays(extra_columns, n_events, names)
    idx = np.flatnonzero(sel)
    header = names + [name for name, _ in extras]
    try:
        with atomic_write(path, "w", overwrite=overwrite, encoding="utf-8", sources=sources) as handle:
            if caution:
                handle.write(f"# {RESEARCH_USE_NOTE} Exported by {SOFTWARE_NAME} {__version__}.\n")
            writer = csv.writer(handle, lineterminator="\n")
            writer.writerow(header)
            for start in range(0, idx.size, _CSV_BLOCK):
                rows = idx[start:start + _CSV_BLOCK]
                cols = [_format_column(vals[rows, j]) for j in range(vals.shape[1])]
                cols += [_format_column(np.asarray(arr)[rows]) for _, arr in extras]
                handle.write("".join(",".join(r) + "\n" for r in zip(*cols)))
    except ExportError:
        raise
    except OSError as exc:
        raise ExportError(f"{path}: writing failed ({exc.strerror or exc}); nothing was written") from exc
    return path
