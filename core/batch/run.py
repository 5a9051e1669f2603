"""The batch run: check the folders, plan the files, prepare the control, dispatch, report.

:func:`run_batch` builds a :class:`BatchPlan` (what the run will do, fixed
before any file starts), keeps what happens in a :class:`BatchState` (rows as
files finish, stop requests), hands the tasks to an executor
(:mod:`core.batch.executors`) and writes the reports
(:mod:`core.batch.reports`).  Imports the recipe, the write guard and the
batch's own modules.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from .. import write_guard
from ..atomic import remove_stale_parts
from ..errors import BoscageError, Cancelled, RecipeError
from ..fcs import read_fcs
from ..files import list_fcs_files
from ..progress import keep_going
from ..recipe import Recipe, default_recipe, load_recipe, recipe_digest, save_recipe
from .control import ensure_prepared_control
from .executors import Executor, ProcessExecutor, error_row, make_executor
from .layout import RECIPE_NAME, SUMMARY_NAME, output_folder_names, prepare_out_dir
from .markers import finished_row, inputs_digest
from .reports import (BASE_COLUMNS, TAIL_COLUMNS, summary_columns, write_population_tables, write_readme,
                      write_summary)


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


@dataclass
class ControlStep:
    """The prepared control of the run (see :mod:`core.batch.control`)."""

    folder: str | None = None
    key: dict | None = None
    how: str | None = None      # "reused", "built", "rebuilt: <reason>", "failed"
    seconds: float = 0.0


@dataclass
class BatchPlan:
    """What a run does, fixed before any file starts."""

    out_dir: str
    files: list            # input paths, in summary order
    names: dict            # input basename -> its folder name in OUT_DIR (None: none could be made)
    protected: list        # absolute paths no write may replace (the inputs and the control)
    control: str | None    # absolute path of the control file
    recipe: Any            # core.recipe.Recipe
    recipe_source: str
    digest: str            # the recipe's digest (provenance in every export)
    key_digest: str        # digest + a named spillover CSV's contents (what finished files are checked on)
    force: bool
    csv: bool
    workers: int = 1              # set by :meth:`set_workers` once the files to do are known
    threads: int = 1              # numba threads per worker process
    scheduler: str | None = None  # Dask scheduler address
    task_threads: int | None = None  # numba threads a task sets (None: leave the process's)

    def set_workers(self, workers: int | None, numba_threads: int | None, scheduler: str | None,
                    n_todo: int) -> None:
        """Default: one worker per core, at most one per file; ``cores // workers`` numba threads each."""
        cores = os.cpu_count() or 1
        self.workers = max(1, int(workers if workers is not None else min(cores, n_todo)))
        self.threads = numba_threads or max(1, cores // self.workers)
        self.scheduler = scheduler
        pinned = self.workers > 1 or bool(numba_threads)
        self.task_threads = self.threads if pinned and not scheduler else None

    def task(self, path: str, control: ControlStep) -> dict:
        """The task of one file for :func:`core.batch.task.process_file` (plain values: it travels)."""
        base = os.path.basename(path)
        return {"path": os.path.abspath(path), "out_dir": os.path.abspath(self.out_dir),
                "recipe": self.recipe.to_dict(), "recipe_source": getattr(self.recipe, "source", None),
                "digest": self.digest, "inputs_digest": self.key_digest, "control": self.control,
                "control_prepared": os.path.abspath(control.folder) if control.folder else None,
                "control_key": control.key, "numba_threads": self.task_threads, "csv": bool(self.csv),
                "names": {base: self.names[base]}, "protected": self.protected}


@dataclass
class BatchState:
    """What happens during a run: each file's row as it finishes, and whether to stop."""

    total: int
    progress: Callable | None
    rows: dict = field(default_factory=dict)   # input path -> summary row
    n_skipped: int = 0                          # files finished by an earlier run
    stop: bool = False                          # the caller asked to stop
    interrupted: bool = False                   # stopped (by the caller or Ctrl-C)

    def finished(self, path: str, row: dict) -> None:
        """Record a file's row and tell the caller; a False answer stops the batch."""
        self.rows[path] = row
        if not keep_going(self.progress, len(self.rows), self.total, row):
            self.stop = True


def run_batch(input_dir: str, out_dir: str, recipe: Any = None, control: str | None = None,
              workers: int | None = None, scheduler: str | None = None, force: bool = False,
              progress: Callable | None = None, numba_threads: int | None = None,
              csv: bool = False) -> BatchResult:
    """Run one recipe over every FCS file in ``input_dir``; see :mod:`core.batch`.

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
    t_start = time.perf_counter()
    plan = _plan(os.fspath(input_dir), os.fspath(out_dir), recipe, control, force, csv)
    if isinstance(plan, BatchResult):  # no file could be read: nothing to run
        plan.seconds = time.perf_counter() - t_start
        return plan
    state = BatchState(total=len(plan.files), progress=progress)
    todo = _skip_finished(plan, state)
    plan.set_workers(workers, numba_threads, scheduler, len(todo))
    executor = make_executor(plan.workers, plan.threads, plan.scheduler)
    try:
        if todo and isinstance(executor, ProcessExecutor):
            executor.start()  # warms up while the control is prepared
        _report_start(plan, state)
        step = ControlStep()
        if plan.control is not None and todo and not state.stop:
            step, todo = _prepare_control(plan, state, todo)
        tasks = [plan.task(p, step) for p in todo]
        _dispatch(executor, tasks, todo, state)
    finally:
        executor.close()
    if state.interrupted:
        remove_stale_parts(plan.out_dir)
    rows = [state.rows.get(p) or {"file": os.path.basename(p), "status": "cancelled",
                                  "message": "stopped before this file finished"} for p in plan.files]
    summary_path = os.path.join(plan.out_dir, SUMMARY_NAME)
    write_summary(summary_path, rows, summary_columns(rows, plan.recipe, plan.control is not None))
    write_population_tables(plan.out_dir, rows, plan.control)
    return BatchResult(rows=rows, out_dir=plan.out_dir, summary_path=summary_path, recipe=plan.recipe,
                       n_skipped=state.n_skipped, interrupted=state.interrupted,
                       seconds=time.perf_counter() - t_start,
                       info={"workers": plan.workers, "numba_threads": plan.threads, "scheduler": plan.scheduler,
                             "control_prepared": step.how, "control_seconds": step.seconds,
                             "control_dir": os.path.abspath(step.folder) if step.folder else None})


def _plan(input_dir: str, out_dir: str, recipe: Any, control: str | None, force: bool,
          csv: bool) -> BatchPlan | BatchResult:
    """Check the folders, protect the inputs, prepare OUT_DIR and settle the recipe.

    Raises RecipeError / ExportError for bad arguments; returns a BatchResult
    (every file an error) when no file can be read to make a default recipe.
    """
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
    try:
        recipe_obj, recipe_source = _resolve_recipe(recipe, files)
    except _NoReadableFile as exc:  # nothing to build a default recipe from: every file failed
        rows = [{"file": os.path.basename(p), "status": "error",
                 "message": exc.problems.get(p, "not read")} for p in files]
        summary_path = os.path.join(out_dir, SUMMARY_NAME)
        write_summary(summary_path, rows, BASE_COLUMNS + TAIL_COLUMNS)
        return BatchResult(rows=rows, out_dir=out_dir, summary_path=summary_path, recipe=None)
    digest = recipe_digest(recipe_obj)
    save_recipe(recipe_obj, os.path.join(out_dir, RECIPE_NAME), overwrite=True)
    write_readme(out_dir, recipe_obj, digest, recipe_source, control)
    return BatchPlan(out_dir=out_dir, files=files, names=names, protected=protected, control=control,
                     recipe=recipe_obj, recipe_source=recipe_source, digest=digest,
                     key_digest=inputs_digest(recipe_obj, digest), force=force, csv=csv)


class _NoReadableFile(Exception):
    def __init__(self, problems: dict):
        self.problems = problems


def _resolve_recipe(recipe: Any, files: Sequence[str]) -> tuple[Any, str]:
    """``(Recipe, where it came from)``: the given one, or the default of the first readable file."""
    if recipe is None:
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


def _skip_finished(plan: BatchPlan, state: BatchState) -> list:
    """Rows of files that cannot run or finished earlier go to ``state``; returns the files to do."""
    todo = []
    for p in plan.files:
        if plan.names.get(os.path.basename(p)) is None:
            state.rows[p] = error_row(p, f"{os.path.basename(p)}: no output folder name distinct from the "
                                         "other inputs' can be made; rename the file")
            continue
        done = None if plan.force else finished_row(plan.out_dir, p, plan.key_digest, plan.control,
                                                    plan.names, plan.csv)
        if done is not None:
            state.rows[p] = done
            state.n_skipped += 1
        else:
            todo.append(p)
    return todo


def _report_start(plan: BatchPlan, state: BatchState) -> None:
    """Show the bar before the first file finishes, then the files skipped."""
    if not keep_going(state.progress, 0, state.total, None):
        state.stop = True
    step = 0
    for p in plan.files:
        if p in state.rows:
            step += 1
            row = state.rows[p]
            keep_going(state.progress, step, state.total, dict(row, skipped=row.get("status") == "ok"))


def _prepare_control(plan: BatchPlan, state: BatchState, todo: list) -> tuple[ControlStep, list]:
    """The control's part of the contrast, once for the whole batch before dispatching.

    Returns the step and the files still to do: none when the control could not
    be prepared (each gets an error row naming why) or the caller stopped."""
    t0 = time.perf_counter()
    last = [t0]

    def control_progress(step, tot, info):  # lets the caller stop during the control fit
        now = time.perf_counter()
        if now - last[0] < 5.0:
            return True
        last[0] = now
        return keep_going(state.progress, len(state.rows), state.total, None)

    step, problem, name = ControlStep(), None, os.path.basename(plan.control)
    try:
        step.folder, step.key, step.how = ensure_prepared_control(
            plan.out_dir, plan.control, plan.recipe, plan.key_digest, force=plan.force, progress=control_progress)
    except (KeyboardInterrupt, Cancelled):
        state.interrupted = True
    except BoscageError as exc:
        problem = str(exc)
    except MemoryError:
        problem = f"{name}: not enough memory to prepare the control"
    except Exception as exc:  # an unexpected failure must not crash the batch
        problem = f"{name}: unexpected {type(exc).__name__} preparing the control: {exc}"
    if problem is not None:
        step.how = "failed"
        for p in todo:
            state.finished(p, error_row(p, f"the control could not be prepared: {problem}"))
    step.seconds = round(time.perf_counter() - t0, 3)
    return step, ([] if problem is not None or state.interrupted else todo)


def _dispatch(executor: Executor, tasks: list, todo: list, state: BatchState) -> None:
    """Run the tasks; Ctrl-C or a stop request marks the run interrupted."""
    path_of = {t["path"]: p for t, p in zip(tasks, todo)}
    try:
        if tasks and not state.stop:
            executor.run(tasks, lambda row, t: state.finished(path_of[t["path"]], row), lambda: state.stop)
    except KeyboardInterrupt:
        state.interrupted = True
    if state.stop:
        state.interrupted = True
