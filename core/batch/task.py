"""The per-file task: analyse one file and write its outputs (runs in workers and on Dask).

:func:`process_file` is a top-level function of plain arguments (a dict of
paths and the recipe as a dict), so a worker process or a Dask worker can run
it; files travel as paths, never as arrays.  Imports the analysis and the
exports.
"""

from __future__ import annotations

import os
import time
from typing import Any

from .. import write_guard
from ..analysis import analyse
from ..contrast import contrast_keywords
from ..errors import BoscageError
from ..export import export_events_csv, export_events_fcs
from ..fcs import read_fcs
from ..naming import events_file_name
from ..recipe import Recipe
from .control import load_prepared_control
from .layout import events_path, file_out_dir, make_folder, region_file_names
from .markers import write_done
from .reports import analysis_summary, population_rows
from .workers import limit_numba_threads


def process_file(task: dict) -> dict:
    """Analyse and export one file; never raises for problems with the file.

    ``task``: ``path``, ``out_dir`` (the batch folder), ``recipe`` (dict),
    ``digest``, optional ``control`` (path), ``control_prepared`` (folder of
    the prepared control, see :func:`core.batch.control.save_prepared_control`)
    with ``control_key``, ``numba_threads``, ``names`` (the file's folder name,
    :func:`core.batch.layout.output_folder_names`), ``protected`` (the run's
    inputs) and ``csv``.  With ``control_prepared`` the control is loaded from
    there, not refitted; with only ``control`` it is fitted in this task.
    Returns the summary row (dict); problems give ``status`` "error" with the reason.
    """
    t0 = time.perf_counter()
    path = task["path"]
    row: dict[str, Any] = {"file": os.path.basename(path), "status": "error", "message": ""}
    try:
        if task.get("numba_threads"):
            limit_numba_threads(int(task["numba_threads"]))
        write_guard.protect(task.get("protected") or [])
        folder = file_out_dir(task["out_dir"], path, task.get("names"))
        recipe = Recipe.from_dict(task["recipe"], source=task.get("recipe_source"))
        ef = read_fcs(path)
        control = task.get("control")
        used = None
        if control is not None and task.get("control_prepared"):
            control = load_prepared_control(task["control_prepared"], task.get("control_key"))
            used = control.info
        an = analyse(ef, recipe, control=control)
        make_folder(folder)
        export_analysis(folder, ef, an, task["digest"], csv=bool(task.get("csv")), where=row["file"])
        row.update(analysis_summary(an))
        row.update(population_rows(an))
        row["status"] = "ok"
        row["seconds"] = round(time.perf_counter() - t0, 3)
        write_done(folder, task, row, used)
    except KeyboardInterrupt:
        raise
    except BoscageError as exc:
        row["message"] = str(exc)
    except OSError as exc:
        row["message"] = f"{row['file']}: cannot write its outputs ({exc.strerror or exc})"
    except MemoryError:
        row["message"] = f"{row['file']}: not enough memory to analyse this file"
    except Exception as exc:  # an unexpected failure must not stop the batch
        row["message"] = f"{row['file']}: unexpected {type(exc).__name__}: {exc}"
    row.setdefault("seconds", round(time.perf_counter() - t0, 3))
    return row


def export_analysis(folder: str, event_file: Any, an: Any, digest: str, csv: bool = False,
                    where: str = "") -> list:
    """Write one file's events exports in ``folder`` (named by :mod:`core.naming`; returns the paths).

    ``<stem>_rare.fcs``, ``<stem>_region_<name>.fcs`` per region,
    ``<stem>_rare_population_<N>.fcs`` per rare population (with the
    ``population`` column) and, after a contrast, :func:`export_enriched`'s
    files: the ORIGINAL raw values plus :meth:`~core.analysis.Analysis.export_columns`.
    """
    extra = an.export_columns()
    paths = [export_events_fcs(events_path(folder, "rare"), event_file, an.rare, extra, digest, overwrite=True)]
    if an.contrast is not None:
        paths += export_enriched(folder, os.path.basename(folder), event_file, an, digest, csv=csv)
    parts = region_file_names(list(an.region_masks), where or os.path.basename(folder))
    for name, mask in an.region_masks.items():
        paths.append(export_events_fcs(events_path(folder, "region", parts[name]), event_file, mask, extra,
                                       digest, overwrite=True))
    pops = getattr(an, "populations", None)
    for r in (pops.table if pops is not None else []):
        if r["rare"] and r["count"]:
            paths.append(export_events_fcs(events_path(folder, "rare_population", r["id"] + 1), event_file,
                                           an.population_labels == r["id"], extra, digest, overwrite=True))
    return paths


def export_enriched(folder: str, stem: str, event_file: Any, an: Any, digest: str, csv: bool = False) -> list:
    """Write ``<stem>_enriched.fcs`` (and ``<stem>_enriched.csv`` when ``csv``) in ``folder``.

    The enriched events of ``an`` (a contrasted :class:`core.analysis.Analysis`)
    with the added columns of :meth:`~core.analysis.Analysis.export_columns`
    (``contrast score``, ``contrast p``, ``contrast q`` among them); the FCS
    file carries :func:`core.contrast.contrast_keywords`.  The CSV holds the transformed
    values as the analysis saw them.  Returns the paths written.
    """
    extra = an.export_columns()
    kw = contrast_keywords(an.contrast, an.info.get("control"))
    fcs_path = os.path.join(folder, events_file_name(stem, "enriched"))
    paths = [export_events_fcs(fcs_path, event_file, an.enriched, extra, digest, overwrite=True, extra_keywords=kw)]
    if csv:
        csv_path = os.path.join(folder, events_file_name(stem, "enriched", ext="csv"))
        paths.append(export_events_csv(csv_path, an.channel_names, an.values,
                                       an.enriched, extra, overwrite=True, source_paths=[an.path]))
    return paths
