"""One recipe over a folder of FCS files: ``boscage batch``.

Command line (:mod:`core.batch.cli`; the ``boscage`` launcher delegates ``batch`` here without Qt)::

    boscage batch INPUT_DIR --out OUT_DIR [--recipe R.json] [--control FILE] [--csv]
                  [--workers N] [--scheduler ADDRESS] [--force]

Every FCS file directly in INPUT_DIR (:func:`core.files.list_fcs_files`, sorted
by name) goes through the same recipe -- the given one, or the default recipe
of the first readable file (:func:`core.recipe.default_recipe`).  For each file
:func:`core.analysis.analyse` fits the density, flags rare events and evaluates
the recipe's regions; then, in ``OUT_DIR/<stem>/`` (names by the one rule of
:mod:`core.naming`: no spaces, ``%`` as ``pct``, ``_<8 hex>`` where a character
was replaced, a name is too long or two would meet):

* ``<stem>_rare.fcs`` -- the rare events, and ``<stem>_region_<name>.fcs`` per
  region: the ORIGINAL raw values plus added parameters ``log density``,
  ``rarity percentile``, ``cleaning flag`` (0 kept, 1 saturated, 2 non-finite,
  3 floor pile, 4 ceiling pile; removed events carry log density 0 and rarity
  -1 since FCS float data should hold no NaN), and with a control ``contrast
  score``/``enriched`` (:func:`core.export.export_events_fcs`, with provenance
  keywords); with ``--control`` every file is contrasted with the control
  (:mod:`core.contrast`) and ``<stem>_enriched.fcs`` holds the events new
  against it (columns ``contrast score``, ``contrast p``, ``contrast q``;
  keywords naming the control, the false discovery rate and any shift
  warning), with ``--csv`` also as CSV;
* ``<stem>_rare_population_<number>.fcs`` -- the events of each rare population
  (:mod:`core.populations`), with the added ``population`` column (numbers as
  the app shows them: id + 1; 0 for none);
* ``done.json`` -- the finished-file marker (:mod:`core.batch.markers`): a
  re-run skips files whose marker matches (unless ``--force``); changed
  inputs, recipes, spillover CSVs or controls are redone.

With ``--control`` the control's part of the contrast is computed ONCE per
batch, in this process before the files are dispatched, and saved in
``OUT_DIR/.prepared-control/`` (:mod:`core.batch.control`); every file's task
loads it by path and fits only its own densities (about three full-size fits
per file instead of five, with the same results as analysing each file with the
control file).  A caller's ``progress`` is called at most every 5 s meanwhile
and may stop it.  A re-run reuses the prepared control when recipe digest,
control file and software version match; otherwise, with ``--force``, or when
the folder is damaged, it is rebuilt.  If the control cannot be prepared every
file to do gets status ``error`` with the reason.

``OUT_DIR`` also gets ``summary.csv``, ``populations.csv``, with a control
``population_changes.csv`` (:mod:`core.batch.reports`), ``recipe.json`` and a
``README.txt`` with the research-use caution.

A broken file gets status ``error`` and the reason; the others carry on.
Exit code: 0 when every file succeeded, 1 when any failed, 2 for bad
arguments (an output folder that cannot be created, that is or contains an
input folder, or that no batch wrote and that holds names the batch writes,
included), 130 when stopped with Ctrl-C (finished files are kept; the summary
lists the rest as ``cancelled``).

Safety (:mod:`core.write_guard`): inputs and the control are registered so no
write replaces them; per-file folder names come from
:func:`core.batch.layout.output_folder_names`; the temporary files of an
earlier, killed run are removed at the start; worker processes end with the
batch process and never write after it (:mod:`core.batch.workers`).

Parallelism (:mod:`core.batch.executors`): ``--workers N`` worker processes
(default: the number of CPU cores, at most the number of files), forked from a
clean "forkserver" where the platform has one, else spawned; they start, and
load the compiled kernels, while this process prepares a control, and each
limits numba to ``cores // workers`` threads.  ``--workers 1`` runs in this
process.  ``--scheduler ADDRESS`` runs the same task function on an existing
Dask distributed cluster (``pip install "boscage[cluster]"``); the workers must
see the same file paths, since files travel as paths, not arrays.

Modules: :mod:`~core.batch.layout` (names in OUT_DIR and its checks),
:mod:`~core.batch.markers` (skip markers), :mod:`~core.batch.reports`,
:mod:`~core.batch.control` (prepared control), :mod:`~core.batch.workers`
(worker set-up), :mod:`~core.batch.task` (the per-file task),
:mod:`~core.batch.executors`, :mod:`~core.batch.run` (:func:`run_batch`) and
:mod:`~core.batch.cli`.  The names below are the package's public interface.
"""

from ..files import list_fcs_files
from .cli import TerminalProgress, build_parser, main
from .control import (CONTROL_ARRAYS, CONTROL_FORMAT, CONTROL_META, CONTROL_MODEL, control_key,
                      ensure_prepared_control, load_prepared_control, save_prepared_control)
from .executors import DaskExecutor, Executor, ProcessExecutor, SerialExecutor, error_row, make_executor
from .layout import (CONTROL_DIR, DONE_NAME, OUT_MARK, POPULATION_CHANGES_NAME, POPULATIONS_NAME, README_NAME,
                     RECIPE_NAME, RESERVED_NAMES, SUMMARY_NAME, file_out_dir, output_folder_names,
                     prepare_out_dir)
from .markers import inputs_digest
from .reports import (BASE_COLUMNS, CHANGE_COLUMNS, CLEANING_COLUMNS, ENRICHED_COLUMNS, POPULATION_COLUMNS,
                      TAIL_COLUMNS, enriched_summary, write_population_tables, write_summary)
from .run import BatchResult, run_batch
from .task import export_enriched, process_file

__all__ = [
    "BASE_COLUMNS", "CHANGE_COLUMNS", "CLEANING_COLUMNS", "CONTROL_ARRAYS", "CONTROL_DIR", "CONTROL_FORMAT",
    "CONTROL_META", "CONTROL_MODEL", "DONE_NAME", "ENRICHED_COLUMNS", "OUT_MARK", "POPULATION_CHANGES_NAME",
    "POPULATION_COLUMNS", "POPULATIONS_NAME", "README_NAME", "RECIPE_NAME", "RESERVED_NAMES", "SUMMARY_NAME",
    "TAIL_COLUMNS", "BatchResult", "DaskExecutor", "Executor", "ProcessExecutor", "SerialExecutor",
    "TerminalProgress", "build_parser", "control_key", "enriched_summary", "ensure_prepared_control",
    "error_row", "export_enriched", "file_out_dir", "inputs_digest", "list_fcs_files", "load_prepared_control",
    "main", "make_executor", "output_folder_names", "prepare_out_dir", "process_file", "run_batch",
    "save_prepared_control", "write_population_tables", "write_summary",
]
