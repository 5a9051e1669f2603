"""Where the per-file tasks run: one interface, three ways (this process, worker processes, Dask).

An :class:`Executor` runs :func:`core.batch.task.process_file` over a list of
tasks and hands each file's summary row to ``on_row(row, task)`` as it
finishes; it checks ``should_stop()`` between files.  The three share the one
construction of the row of a file whose task failed outside
:func:`process_file` (:meth:`Executor.outcome`, :func:`error_row`).
Imports the standard library, the task and the worker set-up; Dask only when
its executor runs.
"""

from __future__ import annotations

import multiprocessing
import os
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Callable

from ..errors import RecipeError
from .task import process_file
from .workers import init_worker, warm_up, worker_environment

OnRow = Callable[[dict, dict], None]
ShouldStop = Callable[[], bool]


def error_row(path: str, message: str) -> dict:
    """The summary row of a file that did not finish: status ``error`` and the reason."""
    return {"file": os.path.basename(path), "status": "error", "seconds": "", "message": message}


class Executor:
    """Runs tasks; subclasses implement :meth:`run` and may describe failures (:meth:`failure`)."""

    def start(self) -> None:
        """Get ready before the tasks are known (a process pool starts and warms up)."""

    def run(self, tasks: list, on_row: OnRow, should_stop: ShouldStop) -> None:
        raise NotImplementedError

    def close(self) -> None:
        """Release what :meth:`start` or :meth:`run` took (safe to call twice)."""

    def failure(self, exc: BaseException) -> str:
        """The reason given for a task that failed outside :func:`process_file`."""
        return f"{type(exc).__name__}: {exc}"

    def outcome(self, task: dict, result: Callable[[], dict]) -> dict:
        """``result()`` (the task's row), or the error row saying why there is none."""
        try:
            return result()
        except Exception as exc:
            return error_row(task["path"], f"{os.path.basename(task['path'])}: {self.failure(exc)}")


class SerialExecutor(Executor):
    """Every file in this process, in order (``--workers 1``)."""

    def run(self, tasks: list, on_row: OnRow, should_stop: ShouldStop) -> None:
        for t in tasks:
            if should_stop():
                break
            on_row(self.outcome(t, lambda t=t: process_file(t)), t)


class ProcessExecutor(Executor):
    """``workers`` worker processes, each limited to ``threads`` numba threads.

    Workers fork from a "forkserver" that imported the science once (it never
    runs a parallel kernel, so forking from it is safe), or are spawned where
    the platform has no fork server.  :meth:`start` starts them and loads the
    compiled kernels (:func:`core.batch.workers.warm_up`) at once.  Largest
    files go first: with a few files of unequal size the last to start is a small one.
    """

    def __init__(self, workers: int, threads: int):
        self.workers = workers
        self.threads = threads
        self.pool = None

    def start(self) -> None:
        if self.pool is not None:
            return
        if "forkserver" in multiprocessing.get_all_start_methods():
            ctx = multiprocessing.get_context("forkserver")
            ctx.set_forkserver_preload(["core.batch", "core.analysis", "core.density", "core.transforms"])
        else:
            ctx = multiprocessing.get_context("spawn")
        # the limits must be in the environment the workers (or the fork server)
        # start with: set for the start, then restored
        env = worker_environment(self.threads, spawn=ctx.get_start_method() == "spawn")
        saved = {var: os.environ.get(var) for var in env}
        os.environ.update(env)
        try:
            self.pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=ctx, initializer=init_worker,
                                            initargs=(self.threads, os.getpid()))
            for _ in range(self.workers):
                self.pool.submit(warm_up)
        finally:
            for var, value in saved.items():
                if value is None:
                    os.environ.pop(var, None)
                else:
                    os.environ[var] = value

    def failure(self, exc: BaseException) -> str:
        if isinstance(exc, BrokenProcessPool):
            return "the worker process analysing this file stopped unexpectedly (out of memory?)"
        return super().failure(exc)

    def run(self, tasks: list, on_row: OnRow, should_stop: ShouldStop) -> None:
        self.start()
        order = sorted(tasks, key=lambda t: -_file_size(t["path"]))
        futures = {self.pool.submit(process_file, t): t for t in order}
        pending = set(futures)
        try:
            while pending and not should_stop():
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    on_row(self.outcome(futures[fut], fut.result), futures[fut])
        except KeyboardInterrupt:
            self.close()
            raise
        if pending:
            self.close()
        else:
            self.pool.shutdown(wait=True)
            self.pool = None

    def close(self) -> None:
        """Cancel queued files and end the worker processes now (their writes are atomic)."""
        pool, self.pool = self.pool, None
        if pool is None:
            return
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


class DaskExecutor(Executor):
    """The same task function on an existing Dask distributed cluster (``--scheduler ADDRESS``).

    The workers must see the same file paths (inputs, control and the output
    folder, where the prepared control is read from).
    """

    def __init__(self, scheduler: str):
        self.scheduler = scheduler

    def failure(self, exc: BaseException) -> str:
        return f"the cluster failed on this file ({type(exc).__name__}: {exc})"

    def run(self, tasks: list, on_row: OnRow, should_stop: ShouldStop) -> None:
        try:
            # optional and heavy (the "cluster" extra): imported only when a cluster is used
            from distributed import Client, as_completed
        except ImportError as exc:
            raise RecipeError("--scheduler needs Dask distributed, which is not installed; install it with "
                              "pip install \"boscage[cluster]\"") from exc
        try:
            client = Client(self.scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise RecipeError(f"cannot reach the Dask scheduler at {self.scheduler} ({exc})") from exc
        try:
            futures = client.map(process_file, tasks, pure=False)
            task_of = {f.key: t for f, t in zip(futures, tasks)}
            try:
                for fut in as_completed(futures):
                    on_row(self.outcome(task_of[fut.key], fut.result), task_of[fut.key])
                    if should_stop():
                        break
            finally:
                client.cancel(futures)
        finally:
            client.close()


def make_executor(workers: int, threads: int, scheduler: str | None) -> Executor:
    """Dask with a scheduler address, else processes for ``workers`` > 1, else this process."""
    if scheduler:
        return DaskExecutor(scheduler)
    if workers > 1:
        return ProcessExecutor(workers, threads)
    return SerialExecutor()


def _file_size(path: str) -> int:
    try:
        return os.path.getsize(path)
    except OSError:
        return 0
