"""One recipe over a folder of FCS files: ``boscage batch``.

Command line (the ``boscage`` launcher delegates ``batch`` here without Qt)::

    boscage batch INPUT_DIR --out OUT_DIR [--recipe R.json] [--control FILE] [--csv]
                  [--workers N] [--scheduler ADDRESS] [--force]

Every ``*.fcs`` file directly in INPUT_DIR (sorted by name, case-insensitive
extension) goes through the same recipe -- the given one, or the default recipe
of the first readable file (:func:`core.recipe.default_recipe`).  For each file
:func:`core.analysis.analyse` fits the density, flags rare events and evaluates
the recipe's regions; then, in ``OUT_DIR/<file stem>/`` (see :func:`output_folder_names`):

* ``<stem> rare.fcs`` -- the rare events, and ``<stem> region <name>.fcs`` per
  region: the ORIGINAL raw values plus added parameters ``log density``,
  ``rarity percentile``, ``cleaning flag`` (0 kept, 1 saturated, 2 non-finite, 3 floor pile, 4 ceiling pile;
  removed events carry log density 0 and rarity -1 since FCS float data should
  hold no NaN), and with a control ``contrast score``/``enriched``
  (:func:`core.export.export_events_fcs`, with provenance keywords);
  with ``--control`` every file is contrasted with the control
  (:mod:`core.contrast`) and ``<stem> enriched.fcs`` holds the events new
  against it (columns ``contrast score``, ``contrast p``, ``contrast q``;
  keywords naming the control, the false discovery rate and any shift
  warning: :func:`export_enriched`), with ``--csv`` also as CSV;
* ``<stem> rare population <number>.fcs`` -- the events of each rare population
  (:mod:`core.populations`), with the added ``population`` column (population
  numbers as the app shows them: id + 1; 0 for none);
* ``done.json`` -- the file's summary row, the recipe digest (extended by the
  contents of a spillover CSV the recipe names: :func:`inputs_digest`) and the
  input file's size and modification time (and the control file's path, size
  and modification time): a re-run skips files whose marker matches (unless
  ``--force``); changed inputs, recipes, spillover CSVs or controls are redone.

With ``--control`` the control's part of the contrast (its K part densities,
its events and their log density under the part model that did not see them) is
computed ONCE per batch, in this process before the files are dispatched,
and saved in ``OUT_DIR/.prepared-control/``: ``model-<k>.npz`` (the engine's own
``save()``), ``events.npz`` (plain arrays, read with ``allow_pickle=False``)
and ``control.json`` (written last: recipe digest, control path, size and
modification time, software version, split settings and SHA-256 of the
model and arrays files).  Every file's task loads it by path (worker processes and Dask
workers alike) and fits only its own densities: the file's model and the
three cross-fitted test densities (on 2/3 of its events each), about three
full-size fits per file instead of five, with the same results as analysing
each file with the control file.  The control's fit runs before any file
starts (``BatchResult.info["control_seconds"]``); a caller's ``progress``
is called at most every 5 s meanwhile and may stop it.  A
re-run reuses the prepared control when recipe digest, control file and
software version match; otherwise, with ``--force``, or when the folder is
damaged, it is rebuilt.  If the control cannot be prepared (unreadable,
missing channels) every file to do gets status ``error`` with the reason.

``OUT_DIR`` also gets ``populations.csv`` (one row per input file and
population, :func:`write_population_tables`), with a control ``population
changes.csv`` (grown and shrunk populations), and ``summary.csv`` (one row per input file: file, events,
events_kept, set_aside_<reason> per cleaning reason, atoms, rare_events, rare_percent, rare_populations, ``region:<name>``
counts, with a control the :data:`ENRICHED_COLUMNS` (enriched count, percent and 95 % interval,
expected false discoveries, rate, minimum fold, shift warning), heldout_loglik, seconds, status
``ok``/``error``/``cancelled``,
message), ``recipe.json`` and a ``README.txt`` with the research-use caution.

A broken file gets status ``error`` and the reason; the others carry on.
Exit code: 0 when every file succeeded, 1 when any failed, 2 for bad
arguments (an output folder that cannot be created, that is or contains an
input folder, or that no batch wrote and that holds names the batch writes,
included), 130 when stopped with Ctrl-C (finished files are kept; the summary
lists the rest as ``cancelled``).

Safety (:mod:`core.write_guard`): inputs and the control are registered so no
write replaces them; per-file folder names come from
:func:`output_folder_names` (safe, stable, distinct; ``<stem> #<hash>`` when a
stem is changed by cleaning, collides ignoring case or is a name the batch
writes); the temporary files of an earlier, killed run are removed at the start;
worker processes end with the batch process and never write after it
(:func:`_die_with_parent`).

Parallelism: ``--workers N`` worker processes (``concurrent.futures``; the
"forkserver" start method where the platform has it -- workers fork from a
clean server that imported the science once and never ran a parallel kernel --
else "spawn"; default: the number of CPU cores, at most the number of files).
The workers start, and load the compiled kernels, while this process
prepares a control.  Each worker limits numba to ``cores // workers`` threads (at least 1)
so processes x threads do not oversubscribe the machine.  ``--workers 1``
runs in this process.  ``--scheduler ADDRESS`` runs the same task function on
an existing Dask distributed cluster (``pip install "boscage[cluster]"``); the
workers must see the same file paths (inputs, control and the output folder,
where the prepared control is read from), since files travel as paths, not
arrays.
"""

from __future__ import annotations

import argparse
import csv
import glob
import io
import json
import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from . import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from . import write_guard
from .atomic import atomic_write, remove_stale_parts
from .errors import BoscageError, Cancelled, ExportError, ModelFileError, RecipeError
from .progress import keep_going

SUMMARY_NAME = "summary.csv"
DONE_NAME = "done.json"
#: Events set aside by cleaning, one column per reason (core.prepare.REASONS), and the atoms check.
CLEANING_COLUMNS = ["set_aside_saturated", "set_aside_ceiling_pile", "set_aside_floor_pile",
                    "set_aside_non_finite", "atoms"]
BASE_COLUMNS = ["file", "events", "events_kept"] + CLEANING_COLUMNS + ["rare_events", "rare_percent"]
TAIL_COLUMNS = ["heldout_loglik", "seconds", "status", "message"]


# ---------------------------------------------------------------------------
# the task function (top level: runs in worker processes and on Dask workers)
# ---------------------------------------------------------------------------

def _safe_name(text: str) -> str:
    return write_guard.clean_name(text, "region")


#: Marks OUT_DIR as a batch output folder (its summary, README and recipe may be replaced).
OUT_MARK = ".boscage-batch"
#: Names the batch writes directly in OUT_DIR: no input's folder may take one.
RESERVED_NAMES = (SUMMARY_NAME, "README.txt", "recipe.json", DONE_NAME, ".prepared-control", OUT_MARK)
#: The population tables (:func:`write_population_tables`), written beside the summary.
POPULATIONS_NAME = "populations.csv"
POPULATION_CHANGES_NAME = "population changes.csv"
RESERVED_NAMES = RESERVED_NAMES + (POPULATIONS_NAME, POPULATION_CHANGES_NAME)


def output_folder_names(paths: Sequence[str]) -> dict:
    """Folder name (inside OUT_DIR) of each input file: ``{basename: name or None}``.

    The file's stem when it is safe as it is and no other input's stem equals it
    ignoring case; otherwise the cleaned stem plus ``#`` and 8 hex digits of the
    file name (:func:`core.write_guard.safe_unique_names`).  The same input gets
    the same folder on every run, and two inputs never share one (``x.fcs`` /
    ``x.FCS``, ``a:b.fcs`` / ``a_b.fcs``, ``summary.csv.fcs`` / the summary).
    None: no distinct name could be made (the file is reported with status error).
    """
    bases = [os.path.basename(os.fspath(p)) for p in paths]
    return write_guard.safe_unique_names(bases, RESERVED_NAMES, "file",
                                         bases=[os.path.splitext(b)[0] for b in bases])


def file_out_dir(out_dir: str, path: str, names: dict | None = None) -> str:
    """The output folder of one input file: ``OUT_DIR/<name>`` (see :func:`output_folder_names`;
    ``names`` is its result for all files of the run, default: this file alone)."""
    base = os.path.basename(os.fspath(path))
    name = (names if names is not None else output_folder_names([path])).get(base)
    if name is None:
        raise ExportError(f"{base}: no output folder name distinct from the other inputs' can be made; "
                          "rename the file")
    return os.path.join(out_dir, name)


def _region_file_names(names: Sequence[str], where: str) -> dict:
    """File-name part of each region: safe, stable, distinct (``a/b`` and ``a_b`` never share a file)."""
    out = write_guard.safe_unique_names(list(names), (), "region")
    for name, part in out.items():
        if part is None:
            raise ExportError(f"{where}: region {name!r} cannot be given a file name distinct from the other "
                              "regions'; rename it")
    return out


def _source_stamp(path: str) -> dict:
    st = os.stat(path)
    return {"size": int(st.st_size), "mtime_ns": int(st.st_mtime_ns)}


def process_file(task: dict) -> dict:
    """Analyse and export one file; never raises for problems with the file.

    ``task``: ``path``, ``out_dir`` (the batch folder), ``recipe`` (dict),
    ``digest``, optional ``control`` (path), ``control_prepared`` (folder of
    the prepared control, see :func:`save_prepared_control`) with
    ``control_key``, and ``numba_threads``.  With ``control_prepared`` the
    control is loaded from there, not refitted; with only ``control`` it is
    fitted in this task.  Returns the summary row (dict); problems give
    ``status`` "error" with the reason.
    """
    t0 = time.perf_counter()
    path = task["path"]
    row: dict[str, Any] = {"file": os.path.basename(path), "status": "error", "message": ""}
    try:
        threads = task.get("numba_threads")
        if threads:
            _limit_numba_threads(int(threads))
        from .analysis import analyse
        from .export import export_events_fcs
        from .fcs import read_fcs
        from .recipe import Recipe

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
        _make_folder(folder)
        stem = os.path.basename(folder)
        extra = an.export_columns()
        region_files = _region_file_names(list(an.region_masks), row["file"])
        export_events_fcs(os.path.join(folder, f"{stem} rare.fcs"), ef, an.rare, extra, task["digest"],
                          overwrite=True)
        if an.contrast is not None:
            export_enriched(folder, stem, ef, an, task["digest"], csv=bool(task.get("csv")))
        for name, mask in an.region_masks.items():
            export_events_fcs(os.path.join(folder, f"{stem} region {region_files[name]}.fcs"), ef, mask, extra,
                              task["digest"], overwrite=True)
        row.update({"events": an.n_events, "events_kept": an.n_kept, "rare_events": an.n_rare,
                    "rare_percent": round(100.0 * an.n_rare / an.n_kept, 4) if an.n_kept else 0.0,
                    "heldout_loglik": round(an.heldout_loglik, 6)})
        for reason, count in an.set_aside.items():
            row["set_aside_" + reason.replace(" ", "_").replace("-", "_")] = count
        row["atoms"] = "; ".join(f"{c} {100 * v:.3g} %" for c, v in an.atoms.items())
        for name, mask in an.region_masks.items():
            row[f"region:{name}"] = int(mask.sum())
        if an.contrast is not None:
            row.update(enriched_summary(an.contrast))
        _population_outputs(an, ef, folder, stem, extra, task["digest"], row)
        row["status"] = "ok"
        row["seconds"] = round(time.perf_counter() - t0, 3)
        with atomic_write(os.path.join(folder, DONE_NAME), "w", overwrite=True, encoding="utf-8") as fh:
            json.dump({"row": row, "recipe_digest": task["digest"],
                       "inputs_digest": task.get("inputs_digest", task["digest"]), "control": task.get("control"),
                       "control_source": _source_stamp(task["control"]) if task.get("control") else None,
                       "control_prepared": used, "source": _source_stamp(path),
                       "csv": bool(task.get("csv"))}, fh, indent=1)
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


POPULATION_COLUMNS = ["file", "population", "profile", "count", "share_percent", "share_low_percent",
                      "share_high_percent", "rare", "caution", "matched"]
CHANGE_COLUMNS = ["file", "control", "population", "profile", "control_count", "control_percent",
                  "test_count", "test_percent", "fold", "fold_low", "fold_high", "p", "q", "change"]


def _population_outputs(an: Any, ef: Any, folder: str, stem: str, extra: dict, digest: str, row: dict) -> None:
    """Per-population rows into ``row`` (for populations.csv and, with a control,
    the population changes table) and one FCS file per rare population, holding
    its events with the ``population`` column."""
    from .export import export_events_fcs

    pops = getattr(an, "populations", None)
    if pops is None:
        return
    matched = "yes" if pops.info.get("matched") else "no"
    row["populations"] = [{"population": r["id"] + 1, "profile": r["profile"], "count": r["count"],
                           "share_percent": round(100 * r["share"], 4),
                           "share_low_percent": round(100 * r["share_low"], 4),
                           "share_high_percent": round(100 * r["share_high"], 4),
                           "rare": "yes" if r["rare"] else "", "caution": "few events" if r["caution"] else "",
                           "matched": matched} for r in pops.table]
    row["rare_populations"] = sum(1 for r in pops.table if r["rare"])
    for r in pops.table:
        if r["rare"] and r["count"]:
            export_events_fcs(os.path.join(folder, f"{stem} rare population {r['id'] + 1}.fcs"), ef,
                              an.population_labels == r["id"], extra, digest, overwrite=True)
    if getattr(an, "population_changes", None):
        row["population_changes"] = [
            {"population": c["id"] + 1, "profile": c.get("profile", ""), "control_count": c["control_count"],
             "control_percent": round(100 * c["control_share"], 4), "test_count": c["test_count"],
             "test_percent": round(100 * c["test_share"], 4), "fold": round(c["fold"], 4),
             "fold_low": round(c["fold_low"], 4), "fold_high": round(c["fold_high"], 4),
             "p": float(f"{c['p']:.4g}"), "q": float(f"{c['q']:.4g}"), "change": c["change"]}
            for c in an.population_changes]


def write_population_tables(out_dir: str, rows: list, control: str | None) -> list[str]:
    """``populations.csv`` (one row per file and population) and, with a control,
    ``population changes.csv`` (one row per file and control population); atomic."""
    written = []
    tables = [(POPULATIONS_NAME, POPULATION_COLUMNS, "populations", {})]
    if control:
        tables.append((POPULATION_CHANGES_NAME, CHANGE_COLUMNS, "population_changes",
                       {"control": os.path.basename(control)}))
    for name, columns, key, fixed in tables:
        lines = [dict(r, file=row["file"], **fixed) for row in rows for r in (row.get(key) or [])]
        path = os.path.join(out_dir, name)
        write_summary(path, lines, columns)
        written.append(path)
    return written
#: summary.csv columns of a batch with a control (see :func:`enriched_summary`).
ENRICHED_COLUMNS = ["enriched", "enriched_percent", "enriched_ci_low_percent", "enriched_ci_high_percent",
                    "expected_false", "false_discovery_rate", "min_fold", "shift_warning"]


def enriched_summary(res: Any) -> dict:
    """The summary row's comparison entries from a :class:`core.contrast.ContrastResult`."""
    return {"enriched": res.count, "enriched_percent": round(100.0 * res.share, 4),
            "enriched_ci_low_percent": round(100.0 * res.share_ci[0], 4),
            "enriched_ci_high_percent": round(100.0 * res.share_ci[1], 4),
            "expected_false": round(res.expected_false, 2), "false_discovery_rate": res.rate,
            "min_fold": res.min_fold, "shift_warning": res.shift.text if res.shift is not None else ""}


def export_enriched(folder: str, stem: str, event_file: Any, an: Any, digest: str, csv: bool = False) -> list:
    """Write ``<stem> enriched.fcs`` (and ``<stem> enriched.csv`` when ``csv``) in ``folder``.

    The enriched events of ``an`` (a contrasted :class:`core.analysis.Analysis`)
    with the added columns of :meth:`~core.analysis.Analysis.export_columns`
    (``contrast score``, ``contrast p``, ``contrast q`` among them); the FCS
    file carries :func:`core.contrast.contrast_keywords`.  The CSV holds the transformed
    values as the analysis saw them.  Returns the paths written.
    """
    from .contrast import contrast_keywords
    from .export import export_events_csv, export_events_fcs

    extra = an.export_columns()
    kw = contrast_keywords(an.contrast, an.info.get("control"))
    paths = [export_events_fcs(os.path.join(folder, f"{stem} enriched.fcs"), event_file, an.enriched, extra,
                               digest, overwrite=True, extra_keywords=kw)]
    if csv:
        paths.append(export_events_csv(os.path.join(folder, f"{stem} enriched.csv"), an.channel_names, an.values,
                                       an.enriched, extra, overwrite=True, source_paths=[an.path]))
    return paths


# ---------------------------------------------------------------------------
# the control's part of the contrast, prepared once per batch
# ---------------------------------------------------------------------------

CONTROL_DIR = ".prepared-control"
CONTROL_META = "control.json"
CONTROL_MODEL = "model-{k}.npz"
CONTROL_ARRAYS = "events.npz"
CONTROL_FORMAT = "boscage-batch-prepared-control"
CONTROL_FORMAT_VERSION = 2


def control_key(control: str, digest: str) -> dict:
    """What a prepared control depends on: recipe digest, the control file (path, size, mtime), software."""
    control = os.path.abspath(os.fspath(control))
    return {"format": CONTROL_FORMAT, "format_version": CONTROL_FORMAT_VERSION,
            "software_version": __version__, "recipe_digest": digest, "control": control,
            "source": _source_stamp(control)}


def _sha256(path: str) -> str:
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def save_prepared_control(prepared: Any, folder: str, key: dict) -> None:
    """Write a :class:`core.contrast.PreparedControl` to ``folder`` (created if missing).

    Each part model goes through the engine's own ``save()`` (``model-<k>.npz``);
    the control events, their parts and log densities through ``np.savez``
    (``events.npz``); ``control.json`` (``key``, split settings, checksums) is
    written last, every file atomically, so a folder whose writing was
    interrupted is never taken as valid.
    """
    import numpy as np

    os.makedirs(folder, exist_ok=True)
    meta_path = os.path.join(folder, CONTROL_META)
    if os.path.exists(meta_path):  # what follows replaces the files it describes
        os.unlink(meta_path)
    names = [CONTROL_MODEL.format(k=k) for k in range(len(prepared.models))]
    for name, model in zip(names, prepared.models):
        model.save(os.path.join(folder, name))
    arrays_path = os.path.join(folder, CONTROL_ARRAYS)
    with atomic_write(arrays_path, "wb", overwrite=True) as fh:
        np.savez(fh, events=np.asarray(prepared.events, dtype=np.float64),
                 part=np.asarray(prepared.part, dtype=np.int64),
                 log_control=np.asarray(prepared.log_control, dtype=np.float64))
    meta = dict(key, n_events=int(prepared.events.shape[0]), n_channels=int(prepared.events.shape[1]),
                folds=int(prepared.folds), random_state=int(prepared.random_state), note=RESEARCH_USE_NOTE,
                sha256={name: _sha256(os.path.join(folder, name)) for name in names + [CONTROL_ARRAYS]})
    with atomic_write(meta_path, "w", overwrite=True, encoding="utf-8") as fh:
        json.dump(meta, fh, indent=1)


def load_prepared_control(folder: str, key: dict | None = None):
    """Read a prepared control written by :func:`save_prepared_control`.

    With ``key`` (see :func:`control_key`), a control prepared for another
    recipe, control file or software version is refused.  Every problem --
    missing, stale, damaged or hand-edited files -- raises
    :class:`ModelFileError` naming the folder; nothing is unpickled.
    """
    import zipfile

    import numpy as np

    from .contrast import PreparedControl
    from .density import AdditiveTreeDensity

    folder = os.fspath(folder)

    def fail(problem: str) -> ModelFileError:
        return ModelFileError(f"prepared control in {folder}: {problem}; run the batch again to rebuild it")

    try:
        with open(os.path.join(folder, CONTROL_META), encoding="utf-8") as fh:
            meta = json.load(fh)
    except FileNotFoundError:
        raise fail("no control.json (not prepared, or its writing was interrupted)") from None
    except (OSError, ValueError) as exc:
        raise fail(f"control.json is damaged or unreadable ({exc})") from exc
    if not isinstance(meta, dict) or meta.get("format") != CONTROL_FORMAT:
        raise fail("control.json is not a prepared control of this program")
    if key is not None:
        changed = [k for k in key if meta.get(k) != key[k]]
        if changed:
            raise fail(f"it was prepared for another {', '.join(changed)}")
    try:
        folds = int(meta["folds"])
        seed = int(meta["random_state"])
    except (KeyError, TypeError, ValueError) as exc:
        raise fail(f"control.json lacks the split settings ({type(exc).__name__}: {exc})") from exc
    if not 2 <= folds <= 100:
        raise fail(f"control.json gives {folds} parts")
    names = [CONTROL_MODEL.format(k=k) for k in range(folds)]
    sums = meta.get("sha256")
    for name in names + [CONTROL_ARRAYS]:
        path = os.path.join(folder, name)
        try:
            digest = _sha256(path)
        except OSError as exc:
            raise fail(f"{name} cannot be read ({exc.strerror or exc})") from exc
        if not isinstance(sums, dict) or sums.get(name) != digest:
            raise fail(f"{name} does not match its checksum in control.json (damaged or replaced)")
    models = [AdditiveTreeDensity.load(os.path.join(folder, name)) for name in names]
    try:
        with np.load(os.path.join(folder, CONTROL_ARRAYS), allow_pickle=False) as z:
            events = np.asarray(z["events"])
            part = np.asarray(z["part"])
            log_control = np.asarray(z["log_control"])
    except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile) as exc:
        raise fail(f"{CONTROL_ARRAYS} is damaged ({type(exc).__name__}: {exc})") from exc
    n = events.shape[0] if events.ndim == 2 else -1
    if (n <= 0 or events.dtype.kind != "f" or part.shape != (n,) or part.dtype.kind not in "iu"
            or log_control.shape != (n,) or not np.all(np.isfinite(events))
            or np.any((part < 0) | (part >= folds))
            or any(events.shape[1] != int(m.n_features_in_) for m in models)):
        raise fail(f"{CONTROL_ARRAYS} does not hold the control events the models expect "
                   f"(shapes {events.shape}, {part.shape}, {log_control.shape}; {folds} parts)")
    return PreparedControl(models=models, events=events.astype(np.float64), part=part.astype(np.int64),
                           log_control=log_control.astype(np.float64), folds=folds, random_state=seed,
                           source=str(meta.get("control", "")),
                           info={"folder": os.path.abspath(folder), "sha256": dict(sums)})


def ensure_prepared_control(out_dir: str, control: str, recipe: Any, digest: str,
                            force: bool = False, progress: Callable | None = None) -> tuple[str, dict, str]:
    """The batch's prepared control folder, reused when valid, otherwise (re)built.

    Returns ``(folder, key, how)`` with ``how`` "reused", "built" or
    "rebuilt: <reason>".  Raises what preparing the control raises
    (:class:`BoscageError` for an unreadable control or one without the
    recipe's channels).  ``progress(step, total, info)`` goes to the control
    fit; returning False raises :class:`Cancelled`.
    """
    from .analysis import prepare_control_file

    folder = os.path.join(out_dir, CONTROL_DIR)
    key = control_key(control, digest)
    how = "built"
    if os.path.exists(os.path.join(folder, CONTROL_META)):
        if force:
            how = "rebuilt: --force"
        else:
            try:
                load_prepared_control(folder, key)
                return folder, key, "reused"
            except ModelFileError as exc:
                how = f"rebuilt: {exc}"
    prepared = prepare_control_file(control, recipe, progress=progress)
    save_prepared_control(prepared, folder, key)
    return folder, key, how


#: Environment variables that size the BLAS / OpenMP thread pools at numpy's import.
_BLAS_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _limit_numba_threads(threads: int) -> None:
    try:
        import numba

        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    except Exception:  # numba missing or threading layer refuses: leave the default
        pass


def _parent_alive(pid: int) -> bool:
    """True while process ``pid`` runs (a zombie, killed but not yet reaped, counts as gone)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True  # exists, owned by someone else
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] not in ("Z", "X")
    except (OSError, IndexError):
        return True


def _die_with_parent(parent_pid: int) -> None:
    """Make this worker end when the batch's process ``parent_pid`` ends, even by ``kill -9``.

    On Linux the kernel sends SIGKILL when the worker's parent (the fork server)
    exits (``prctl(PR_SET_PDEATHSIG)``); on every POSIX system a watchdog thread checks the
    batch process every 0.2 s and ends the worker, and the write guard checks it
    before every rename, so an orphaned worker never writes.
    """
    import signal
    import threading

    if os.name != "posix":
        return  # os.kill(pid, 0) would end the process on Windows; spawned workers are not orphaned there
    if sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, signal.SIGKILL, 0, 0, 0)  # PR_SET_PDEATHSIG = 1
        except Exception:  # no libc prctl: the watchdog below still works
            pass

    def orphaned() -> bool:
        return not _parent_alive(parent_pid)

    def check() -> None:
        if orphaned():
            os._exit(70)

    def watch() -> None:
        while True:
            time.sleep(0.2)
            check()

    write_guard.set_abort_check(check)
    threading.Thread(target=watch, name="boscage-parent-watch", daemon=True).start()
    check()


def _init_worker(threads: int, parent_pid: int | None = None) -> None:
    """Worker start-up: ignore Ctrl-C (the parent stops the batch), end with the batch's
    process ``parent_pid`` (:func:`_die_with_parent`) and limit numba threads."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if parent_pid:
        _die_with_parent(int(parent_pid))
    if "numba" not in sys.modules:
        # a spawned worker: size numba's pool before numba is imported.  A worker
        # forked from the fork server has numba loaded already; changing the
        # variable then makes numba refuse to compile ("Cannot set
        # NUMBA_NUM_THREADS to a different value once the threads have been
        # launched"), so only the number of threads in use is limited below.
        os.environ["NUMBA_NUM_THREADS"] = str(threads)
    # BLAS pools are sized when numpy is imported, before this runs: _start_pool
    # puts the limit in the environment the workers (or their fork server) start with
    _limit_numba_threads(threads)


# ---------------------------------------------------------------------------
# the batch
# ---------------------------------------------------------------------------

@dataclass
class BatchResult:
    """Outcome of :func:`run_batch`: one summary row per input file."""

    rows: list
    out_dir: str
    summary_path: str
    recipe: Any
    n_skipped: int = 0
    interrupted: bool = False
    seconds: float = 0.0
    info: dict = field(default_factory=dict)

    @property
    def n_ok(self) -> int:
        return sum(r.get("status") == "ok" for r in self.rows)

    @property
    def n_failed(self) -> int:
        return sum(r.get("status") == "error" for r in self.rows)

    @property
    def exit_code(self) -> int:
        if self.interrupted:
            return 130
        return 0 if self.n_failed == 0 and self.n_ok == len(self.rows) else 1


def list_fcs_files(input_dir: str) -> list[str]:
    """FCS data files directly in ``input_dir``: the rule of :mod:`core.files`,
    the same for the window and the batch."""
    from .files import list_fcs_files as listed

    return listed(input_dir)


class _NoReadableFile(Exception):
    def __init__(self, problems: dict):
        self.problems = problems


def _resolve_recipe(recipe: Any, files: Sequence[str]):
    from .recipe import Recipe, default_recipe, load_recipe

    if recipe is None:
        from .fcs import read_fcs

        problems = {}
        for p in files:
            try:
                return default_recipe(read_fcs(p)), f"default recipe of {os.path.basename(p)}"
            except BoscageError as exc:
                problems[p] = str(exc)
        raise _NoReadableFile(problems)
    if isinstance(recipe, (str, os.PathLike)):
        return load_recipe(recipe), os.fspath(recipe)
    if isinstance(recipe, dict):
        return Recipe.from_dict(recipe), "given"
    return recipe, "given"


def inputs_digest(recipe: Any, digest: str) -> str:
    """The recipe digest extended by the contents of the spillover CSV the recipe
    names (compensation source "csv"): a changed matrix at the same path must redo
    finished files and the prepared control.  ``digest`` itself stays the recipe's
    (it is what exports record as provenance)."""
    if recipe.compensation.source != "csv":
        return digest
    path = recipe.csv_path_resolved()
    if not path or not os.path.isfile(path):
        return digest  # the analysis reports the missing file itself
    import hashlib

    return hashlib.sha256(f"{digest}:{_sha256(path)}".encode("ascii")).hexdigest()[:16]


def _finished_row(out_dir: str, path: str, key: str, control: str | None,
                  names: dict | None = None, csv: bool = False) -> dict | None:
    try:
        marker = os.path.join(file_out_dir(out_dir, path, names), DONE_NAME)
        with open(marker, encoding="utf-8") as fh:
            done = json.load(fh)
        if (done.get("inputs_digest") == key and done.get("control") == control
                and done.get("control_source") == (_source_stamp(control) if control else None)
                and done.get("source") == _source_stamp(path) and done["row"].get("status") == "ok"
                and (not csv or not control or done.get("csv"))):
            return dict(done["row"])
    except (OSError, ValueError, KeyError, TypeError, AttributeError, RecursionError, ExportError):
        pass
    return None


def _make_folder(folder: str) -> None:
    """Create ``folder`` (and parents); ExportError with a sentence when it cannot be."""
    if os.path.lexists(folder) and not os.path.isdir(folder):
        raise ExportError(f"{folder}: a file of that name exists, so the output folder cannot be created "
                          "there; choose another output folder")
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError as exc:
        raise ExportError(f"{folder}: the output folder cannot be created ({exc.strerror or exc}); choose "
                          "a folder you can write in") from None


def _is_batch_folder(out_dir: str) -> bool:
    """True when ``out_dir`` was written by a batch (its mark, or the README of earlier versions)."""
    if os.path.isfile(os.path.join(out_dir, OUT_MARK)):
        return True
    try:
        with open(os.path.join(out_dir, "README.txt"), encoding="utf-8") as fh:
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
    if os.path.isdir(out_dir) and not _is_batch_folder(out_dir):
        ours = {n.casefold() for n in list(RESERVED_NAMES) + [n for n in folder_names if n]}
        try:
            clash = sorted(n for n in os.listdir(out_dir) if n.casefold() in ours)
        except OSError as exc:
            raise ExportError(f"{out_dir}: the output folder cannot be read ({exc.strerror or exc})") from None
        if clash:
            raise ExportError(f"{out_dir}: this folder was not written by a batch and holds "
                              f"{', '.join(clash[:5])}, which the batch would replace; choose a new or "
                              "empty output folder")
    _make_folder(out_dir)
    mark = os.path.join(out_dir, OUT_MARK)
    if not os.path.isfile(mark):
        with atomic_write(mark, "w", overwrite=True, encoding="utf-8") as fh:
            fh.write(f"{SOFTWARE_NAME} {__version__} batch output folder\n")
    remove_stale_parts(out_dir)


def _cleanup_partial(out_dir: str) -> None:
    """Remove temporary files of writes that were killed mid-way (atomic_write's prefix)."""
    pattern = os.path.join(glob.escape(out_dir), "**", ".boscage-*.part")
    hidden = os.path.join(glob.escape(out_dir), CONTROL_DIR, ".boscage-*.part")  # '**' skips dot folders
    for p in glob.glob(pattern, recursive=True) + glob.glob(hidden):
        try:
            os.unlink(p)
        except OSError:
            pass


def _summary_columns(rows: list, recipe: Any, control: bool) -> list[str]:
    regions = [f"region:{r.name}" for r in recipe.regions]
    extra = [k for row in rows for k in row if k.startswith("region:") and k not in regions]
    cols = BASE_COLUMNS + ["rare_populations"] + regions + sorted(set(extra))
    if control:
        cols += ENRICHED_COLUMNS
    return cols + TAIL_COLUMNS


def write_summary(path: str, rows: list, columns: list[str]) -> None:
    """``summary.csv`` (atomic, replaces the previous one)."""
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({c: row.get(c, "") for c in columns})
    with atomic_write(path, "w", overwrite=True, encoding="utf-8") as fh:
        fh.write(buf.getvalue())


def _write_readme(out_dir: str, recipe: Any, digest: str, recipe_source: str, control: str | None) -> None:
    text = f"""{SOFTWARE_NAME} {__version__} batch output

{RESEARCH_USE_NOTE}

Recipe: recipe.json (digest {digest}; source: {recipe_source})
Control file: {control or "none"}
Written: {time.strftime("%Y-%m-%d %H:%M:%S %Z")}

summary.csv     one row per input file: events, events kept after cleaning,
                events set aside per reason (saturated, ceiling pile, floor
                pile, non-finite), atoms (density channels where one value
                still holds more than 0.1 % of the kept events), rare events and their percentage of kept events, events in
                each region, with a control the enriched (new) events:
                count, percent of kept events with its 95 % interval, the
                expected number of false discoveries, the false discovery
                rate, the minimum fold and the whole-sample shift warning
                (empty when none); held-out
                log-likelihood of the density fit (nats per event), seconds,
                status (ok / error / cancelled) and the reason of an error.
populations.csv one row per input file and population (modes of the fitted
                density): profile, count, share with its 95 % interval, rare
                (share below the recipe's rare_share), caution (few events),
                matched (counted with the recipe's stored populations).
population changes.csv  with a control: one row per file and population of
                the control, counted in both: shares, fold with its 95 %
                interval, exact test p, Benjamini-Hochberg q, grown/shrunk.
<stem>/         per input file: '<stem> rare population <number>.fcs' per rare
                population (with a 'population' column), '<stem> rare.fcs' (the rare events) and
                '<stem> region <name>.fcs' per region, with the ORIGINAL raw
                values plus the parameters 'log density', 'rarity percentile'
                and 'cleaning flag' (0 kept, 1 saturated, 2 non-finite,
                3 floor pile, 4 ceiling pile;
                removed events have log density 0 and rarity -1), and
                'done.json' (lets a re-run skip the file).  With a control
                also '<stem> enriched.fcs' (and '.csv' with --csv): the
                events new against the control, with 'contrast score'
                (log density ratio, nats), 'contrast p' (conformal p-value)
                and 'contrast q' (Benjamini-Hochberg q-value); keywords
                BOSCAGE_CONTROL, BOSCAGE_FDR, BOSCAGE_MIN_FOLD and, when
                raised, BOSCAGE_SHIFT_WARNING.
.prepared-control/  with a control: the control's part densities and
                its events, fitted once for all files; rebuilt when the
                recipe or the control file changes.

Recipe used:
{json.dumps(recipe.to_dict(), indent=2, sort_keys=True)}
"""
    with atomic_write(os.path.join(out_dir, "README.txt"), "w", overwrite=True, encoding="utf-8") as fh:
        fh.write(text)


def run_batch(input_dir: str, out_dir: str, recipe: Any = None, control: str | None = None,
              workers: int | None = None, scheduler: str | None = None, force: bool = False,
              progress: Callable | None = None, numba_threads: int | None = None,
              csv: bool = False) -> BatchResult:
    """Run one recipe over every ``*.fcs`` in ``input_dir``; see the module docstring.

    ``recipe``: a Recipe, a recipe dict, a path to a recipe JSON, or None
    (default recipe of the first readable file).  ``progress(done, total,
    row)`` is called after each file (``row`` the file's summary row);
    returning False stops the batch like Ctrl-C.  ``numba_threads``: numba
    threads per worker process (default cores // workers, at least 1).
    ``csv``: with a control, also write each file's enriched events as CSV.

    Worker processes are started (and load the compiled kernels) as soon as the
    files to do are known, while this process reports the skipped ones and
    prepares a control; a pool that is not used after all is shut down before
    returning.
    """
    box: dict = {"pool": None}
    try:
        return _run_batch(input_dir, out_dir, recipe, control, workers, scheduler, force, progress,
                          numba_threads, box, csv=csv)
    finally:
        if box["pool"] is not None:
            _stop_pool(box["pool"])


def _run_batch(input_dir, out_dir, recipe, control, workers, scheduler, force, progress, numba_threads,
               box, csv=False) -> BatchResult:
    """The body of :func:`run_batch`; ``box["pool"]`` holds an early-started worker pool."""
    from .recipe import recipe_digest, save_recipe

    t_start = time.perf_counter()
    input_dir = os.fspath(input_dir)
    out_dir = os.fspath(out_dir)
    if not os.path.isdir(input_dir):
        raise RecipeError(f"{input_dir}: no such folder of FCS files")
    files = list_fcs_files(input_dir)
    if control is not None:
        control = os.path.abspath(os.fspath(control))
        if not os.path.isfile(control):
            raise RecipeError(f"{control}: the control file does not exist")
        files = [p for p in files if os.path.abspath(p) != control]
    # outputs never go among the inputs (links resolved, case ignored): core.write_guard
    write_guard.check_output_folder(out_dir, [input_dir] + ([os.path.dirname(control)] if control else []))
    if not files:
        raise RecipeError(f"{input_dir}: the folder holds no *.fcs files")
    protected = [os.path.abspath(p) for p in files] + ([control] if control else [])
    write_guard.protect(protected)
    names = output_folder_names(files)
    prepare_out_dir(out_dir, list(names.values()))
    cores = os.cpu_count() or 1
    try:
        recipe_obj, recipe_source = _resolve_recipe(recipe, files)
    except _NoReadableFile as exc:  # nothing to build a default recipe from: every file failed
        rows = [{"file": os.path.basename(p), "status": "error",
                 "message": exc.problems.get(p, "not read")} for p in files]
        summary_path = os.path.join(out_dir, SUMMARY_NAME)
        write_summary(summary_path, rows, BASE_COLUMNS + TAIL_COLUMNS)
        return BatchResult(rows=rows, out_dir=out_dir, summary_path=summary_path, recipe=None,
                           seconds=time.perf_counter() - t_start)
    digest = recipe_digest(recipe_obj)
    key_digest = inputs_digest(recipe_obj, digest)
    save_recipe(recipe_obj, os.path.join(out_dir, "recipe.json"), overwrite=True)
    _write_readme(out_dir, recipe_obj, digest, recipe_source, control)

    rows: dict[str, dict] = {}
    todo: list[str] = []
    for p in files:
        if names.get(os.path.basename(p)) is None:
            rows[p] = {"file": os.path.basename(p), "status": "error", "seconds": "",
                       "message": f"{os.path.basename(p)}: no output folder name distinct from the other "
                                  "inputs' can be made; rename the file"}
            continue
        done = None if force else _finished_row(out_dir, p, key_digest, control, names, csv)
        if done is not None:
            rows[p] = done
        else:
            todo.append(p)
    n_skipped = sum(1 for r in rows.values() if r.get("status") == "ok")
    total = len(files)
    if workers is None:
        workers = max(1, min(cores, len(todo)))
    workers = max(1, int(workers))
    threads = numba_threads or max(1, cores // workers)
    if todo and workers > 1 and scheduler is None:
        box["pool"] = _start_pool(workers, threads)  # warms up while the control is prepared

    stop = False
    interrupted = False

    def finished(row: dict, path: str) -> None:
        nonlocal stop
        rows[path] = row
        if not keep_going(progress, len(rows), total, row):
            stop = True

    if not keep_going(progress, 0, total, None):  # shows the bar before the first file finishes
        stop = True
    step = 0
    for p in files:  # report the skipped ones first
        if p in rows:
            step += 1
            keep_going(progress, step, total, dict(rows[p], skipped=rows[p].get("status") == "ok"))

    # the control's part of the contrast: once for the whole batch, before dispatching
    control_dir = key = None
    control_how = None
    if control is not None and todo and not stop:
        problem = None
        t_control = time.perf_counter()
        last = [t_control]

        def control_progress(step, tot, info):  # lets the caller stop during the control fit
            now = time.perf_counter()
            if now - last[0] < 5.0:
                return True
            last[0] = now
            return keep_going(progress, len(rows), total, None)

        try:
            control_dir, key, control_how = ensure_prepared_control(out_dir, control, recipe_obj, key_digest,
                                                                     force=force, progress=control_progress)
        except (KeyboardInterrupt, Cancelled):
            interrupted = True
        except BoscageError as exc:
            problem = str(exc)
        except MemoryError:
            problem = f"{os.path.basename(control)}: not enough memory to prepare the control"
        except Exception as exc:  # an unexpected failure must not crash the batch
            problem = f"{os.path.basename(control)}: unexpected {type(exc).__name__} preparing the control: {exc}"
        if problem is not None:
            control_how = "failed"
            for p in todo:
                finished({"file": os.path.basename(p), "status": "error", "seconds": "",
                          "message": f"the control could not be prepared: {problem}"}, p)
        if problem is not None or interrupted:
            todo = []
        control_seconds = round(time.perf_counter() - t_control, 3)
    else:
        control_seconds = 0.0
    tasks = [{"path": os.path.abspath(p), "out_dir": os.path.abspath(out_dir), "recipe": recipe_obj.to_dict(),
              "recipe_source": getattr(recipe_obj, "source", None), "digest": digest,
              "inputs_digest": key_digest, "control": control,
              "control_prepared": os.path.abspath(control_dir) if control_dir else None, "control_key": key,
              "numba_threads": threads if (workers > 1 or numba_threads) and not scheduler else None,
              "csv": bool(csv)}
             for p in todo]
    by_path = {t["path"]: p for t, p in zip(tasks, todo)}
    for t, p in zip(tasks, todo):  # the file's output folder name and the run's inputs (never written)
        t.update(names={os.path.basename(p): names[os.path.basename(p)]}, protected=protected)

    try:
        if not tasks or stop:
            pass
        elif scheduler:
            _run_dask(tasks, scheduler, lambda row, t: finished(row, by_path[t["path"]]), lambda: stop)
        elif workers == 1:
            for t in tasks:
                if stop:
                    break
                finished(process_file(t), by_path[t["path"]])
        else:
            pool, box["pool"] = box["pool"], None  # _run_processes owns it now
            _run_processes(tasks, workers, threads, lambda row, t: finished(row, by_path[t["path"]]),
                           lambda: stop, pool=pool)
    except KeyboardInterrupt:
        interrupted = True
    if stop:
        interrupted = True
    if interrupted:
        _cleanup_partial(out_dir)
    ordered = []
    for p in files:
        ordered.append(rows.get(p) or {"file": os.path.basename(p), "status": "cancelled",
                                       "message": "stopped before this file finished"})
    summary_path = os.path.join(out_dir, SUMMARY_NAME)
    write_summary(summary_path, ordered, _summary_columns(ordered, recipe_obj, control is not None))
    write_population_tables(out_dir, ordered, control)
    return BatchResult(rows=ordered, out_dir=out_dir, summary_path=summary_path, recipe=recipe_obj,
                       n_skipped=n_skipped, interrupted=interrupted, seconds=time.perf_counter() - t_start,
                       info={"workers": workers, "numba_threads": threads, "scheduler": scheduler,
                             "control_prepared": control_how, "control_seconds": control_seconds,
                             "control_dir": os.path.abspath(control_dir) if control_dir else None})


def _start_pool(workers: int, threads: int):
    """A pool of ``workers`` processes, each limited to ``threads`` numba
    threads and warmed up (imports and compiled kernels loaded) at once."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    if "forkserver" in multiprocessing.get_all_start_methods():
        # workers fork from a clean server process that has imported the science
        # once (it never runs a parallel kernel, so forking from it is safe)
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(["core.batch", "core.analysis", "core.density", "core.transforms"])
    else:
        ctx = multiprocessing.get_context("spawn")
    # the fork server imports numpy before any worker starts, so the BLAS thread
    # limit must be in the environment it is started with (set for the start,
    # then restored): two workers with two BLAS threads each oversubscribe the cores
    saved = {var: os.environ.get(var) for var in _BLAS_THREAD_VARS}
    os.environ.update({var: str(threads) for var in _BLAS_THREAD_VARS})
    try:
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker,
                                   initargs=(threads, os.getpid()))
        for _ in range(workers):
            pool.submit(_warm_up)
    finally:
        for var, value in saved.items():
            if value is None:
                os.environ.pop(var, None)
            else:
                os.environ[var] = value
    return pool


def _warm_up() -> None:
    """Load the compiled kernels a file's analysis uses (a tiny seeded fit, scored
    and mapped), so the first file does not pay for it."""
    import numpy as np

    from .density import AdditiveTreeDensity
    from .transforms import logicle

    X = np.random.default_rng(0).normal(size=(600, 3))
    model = AdditiveTreeDensity(random_state=0, n_trees=2, patience=1).fit(X)
    model.score_samples(X)
    model.transform(X[:10])
    logicle(np.linspace(-100.0, 1e5, 64), 262144.0, 0.5)


def _run_processes(tasks: list, workers: int, threads: int, on_row: Callable, should_stop: Callable,
                   pool=None) -> None:
    """Run ``tasks`` on worker processes (``pool`` if given, else a new one), largest file first."""
    from concurrent.futures import FIRST_COMPLETED, wait
    from concurrent.futures.process import BrokenProcessPool

    if pool is None:
        pool = _start_pool(workers, threads)
    # largest files first: with a few files of unequal size this shortens the batch
    # (the last file to start is a small one)
    order = sorted(tasks, key=lambda t: -_file_size(t["path"]))
    futures = {pool.submit(process_file, t): t for t in order}
    pending = set(futures)
    try:
        while pending and not should_stop():
            done, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in done:
                t = futures[fut]
                try:
                    row = fut.result()
                except BrokenProcessPool:
                    row = {"file": os.path.basename(t["path"]), "status": "error", "seconds": "",
                           "message": f"{os.path.basename(t['path'])}: the worker process analysing this "
                                      "file stopped unexpectedly (out of memory?)"}
                except Exception as exc:
                    row = {"file": os.path.basename(t["path"]), "status": "error", "seconds": "",
                           "message": f"{os.path.basename(t['path'])}: {type(exc).__name__}: {exc}"}
                on_row(row, t)
    except KeyboardInterrupt:
        _stop_pool(pool)
        raise
    if pending:
        _stop_pool(pool)
    else:
        pool.shutdown(wait=True)


def _file_size(path: str) -> int:
    try:
        return os.path.getsize(path)
    except OSError:
        return 0


def _stop_pool(pool) -> None:
    """Cancel queued files and end the worker processes now (their writes are atomic)."""
    procs = list(getattr(pool, "_processes", {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in procs:
        try:
            proc.terminate()
        except Exception:
            pass
    for proc in procs:
        try:
            proc.join(timeout=5)
        except Exception:
            pass


def _run_dask(tasks: list, scheduler: str, on_row: Callable, should_stop: Callable) -> None:
    try:
        from distributed import Client, as_completed
    except ImportError as exc:
        raise RecipeError("--scheduler needs Dask distributed, which is not installed; install it with "
                          "pip install \"boscage[cluster]\"") from exc
    try:
        client = Client(scheduler, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise RecipeError(f"cannot reach the Dask scheduler at {scheduler} ({exc})") from exc
    try:
        futures = client.map(process_file, tasks, pure=False)
        task_of = {f.key: t for f, t in zip(futures, tasks)}
        try:
            for fut in as_completed(futures):
                t = task_of[fut.key]
                try:
                    row = fut.result()
                except Exception as exc:
                    row = {"file": os.path.basename(t["path"]), "status": "error", "seconds": "",
                           "message": f"{os.path.basename(t['path'])}: the cluster failed on this file "
                                      f"({type(exc).__name__}: {exc})"}
                on_row(row, t)
                if should_stop():
                    break
        finally:
            client.cancel(futures)
    finally:
        client.close()


# ---------------------------------------------------------------------------
# terminal progress and the command line
# ---------------------------------------------------------------------------

def _fmt_seconds(s: float) -> str:
    s = int(round(s))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"


class TerminalProgress:
    """A plain-text progress bar with ETA on a stream (stderr); one line per file when not a terminal.

    Files finished in an earlier run (rows marked ``skipped``) do not count
    towards the speed the ETA is computed from.
    """

    def __init__(self, stream=None, width: int = 30):
        self.stream = stream or sys.stderr
        self.width = width
        self.t0 = time.perf_counter()
        self.t_base = self.t0      # when the files that count for the ETA started
        self.base_step = 0         # files done before that (skipped ones)
        self.failed = 0
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())

    def __call__(self, step: int, total: int | None, row: Any = None) -> bool:
        skipped = isinstance(row, dict) and bool(row.get("skipped"))
        now = time.perf_counter()
        if row is None or skipped:
            self.base_step, self.t_base = step, now
        elif row.get("status") == "error":
            self.failed += 1
        total = total or 0
        new = step - self.base_step
        eta = "--:--"
        if total and step >= total:
            eta = "0:00"
        elif total and new > 0:
            eta = _fmt_seconds((now - self.t_base) / new * (total - step))
        filled = int(self.width * step / total) if total else 0
        bar = "#" * filled + "-" * (self.width - filled)
        name = row.get("file", "") if isinstance(row, dict) else ""
        status = ("done earlier" if skipped else row.get("status", "")) if isinstance(row, dict) else ""
        text = (f"[{bar}] {step}/{total} files, {self.failed} failed, elapsed {_fmt_seconds(now - self.t0)}, "
                f"ETA {eta}  {name} {status}").rstrip()
        if self.tty:
            self.stream.write("\r" + text[:160].ljust(120))
            if total and step >= total:
                self.stream.write("\n")
        else:
            self.stream.write(text + "\n")
        self.stream.flush()
        return True


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="boscage batch",
        description=f"Run one recipe over every FCS file in a folder. {RESEARCH_USE_NOTE}")
    p.add_argument("input_dir", metavar="INPUT_DIR", help="folder holding the *.fcs files")
    p.add_argument("--out", required=True, metavar="OUT_DIR", help="output folder (created if missing)")
    p.add_argument("--recipe", metavar="R.json", help="recipe file (default: the default recipe of the first file)")
    p.add_argument("--control", metavar="FILE", help="control FCS file to contrast every file with")
    p.add_argument("--workers", type=int, metavar="N", help="worker processes (default: CPU cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a Dask distributed scheduler")
    p.add_argument("--force", action="store_true", help="redo files already finished in an earlier run")
    p.add_argument("--csv", action="store_true",
                   help="with --control, also write each file's enriched events as CSV (transformed values)")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """``boscage batch ...``; returns the exit code (0 ok, 1 a file failed, 2 bad arguments, 130 Ctrl-C)."""
    parser = build_parser()
    try:
        args = parser.parse_args(list(sys.argv[1:] if argv is None else argv))
    except SystemExit as exc:  # argparse printed the problem already
        return 0 if exc.code == 0 else 2
    if args.workers is not None and args.workers < 1:
        print("boscage batch: --workers must be at least 1", file=sys.stderr)
        return 2
    bar = TerminalProgress(sys.stderr)
    try:
        result = run_batch(args.input_dir, args.out, recipe=args.recipe, control=args.control,
                           workers=args.workers, scheduler=args.scheduler, force=args.force, progress=bar,
                           csv=args.csv)
    except KeyboardInterrupt:
        print("\nboscage batch: stopped; finished files are kept", file=sys.stderr)
        return 130
    except BoscageError as exc:
        print(f"boscage batch: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # a failing disk or folder mid-run: a sentence, not a traceback
        print(f"boscage batch: {exc.filename or args.out}: {exc.strerror or exc}; finished files are kept "
              "and a re-run completes the rest", file=sys.stderr)
        return 1
    print(f"\n{result.n_ok} of {len(result.rows)} files ok, {result.n_failed} failed"
          + (f", {result.n_skipped} finished earlier and skipped" if result.n_skipped else "")
          + (" (stopped by the user)" if result.interrupted else "")
          + f"; summary: {result.summary_path}", file=sys.stderr)
    print(RESEARCH_USE_NOTE, file=sys.stderr)
    return result.exit_code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
