"""Long work off the GUI thread: a generic QThread worker with progress and cancel.

A :class:`Job` wraps a callable ``fn(progress)`` where ``progress(step, total,
info) -> bool`` is the core progress protocol (:mod:`core.progress`).  The job
runs in its own QThread; progress is delivered to the GUI thread by a queued
signal; :meth:`Job.cancel` makes the next progress call return False, which
asks core to stop cleanly.  Exactly one of ``finished(result)``,
``failed(exception)`` or ``cancelled()`` is emitted at the end.

Python's cyclic garbage collector is paused while any job's thread runs and
resumed (with one collection, on the GUI thread) when the last one ends: a
collection that ran while a worker thread computed contour lines crashed the
process (segmentation fault, seen twice in CI in the screenshot test), and
cycles holding Qt wrappers are then freed only when no worker thread runs.
Reference counting frees everything else as usual meanwhile.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import gc
import threading
import traceback
from typing import Any, Callable

from PySide6.QtCore import QObject, QThread, Signal, Slot

from core.errors import Cancelled


_running_jobs = 0
_gc_was_enabled = True


def _job_started() -> None:
    global _running_jobs, _gc_was_enabled
    if _running_jobs == 0:
        _gc_was_enabled = gc.isenabled()
        gc.disable()
    _running_jobs += 1


def _job_ended() -> None:
    global _running_jobs
    _running_jobs = max(_running_jobs - 1, 0)
    if _running_jobs == 0 and _gc_was_enabled:
        gc.enable()
        gc.collect()


class _Runner(QObject):
    progressed = Signal(int, object, object)
    done = Signal(object)
    error = Signal(object, str)
    stopped = Signal()

    def __init__(self, fn: Callable, stop: threading.Event) -> None:
        super().__init__()
        self._fn = fn
        self._stop = stop

    def _progress(self, step, total, info=None) -> bool:
        self.progressed.emit(int(step), total, info)
        return not self._stop.is_set()

    @Slot()
    def run(self) -> None:
        try:
            result = self._fn(self._progress)
        except Cancelled:
            self.stopped.emit()
            return
        except BaseException as exc:  # delivered to the GUI as a message
            self.error.emit(exc, traceback.format_exc())
            return
        if self._stop.is_set():
            self.stopped.emit()
        else:
            self.done.emit(result)


class Job(QObject):
    """Run ``fn(progress)`` in a QThread.  Keep a reference until it ends; it
    deletes itself after its end signals (hold none after ``ended``)."""

    progressed = Signal(int, object, object)  # step, total, info
    finished = Signal(object)
    failed = Signal(object, str)  # exception, formatted traceback
    cancelled = Signal()
    ended = Signal()

    def __init__(self, fn: Callable[[Callable], Any], name: str = "job", parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.name = name
        self._stop = threading.Event()
        self._thread = QThread()
        self._thread.setObjectName(f"boscage-{name}")
        self._runner = _Runner(fn, self._stop)
        self._runner.moveToThread(self._thread)
        self._thread.started.connect(self._runner.run)
        self._runner.progressed.connect(self.progressed)
        self._runner.done.connect(self._on_done)
        self._runner.error.connect(self._on_error)
        self._runner.stopped.connect(self._on_stopped)
        self.running = False

    def start(self) -> None:
        self.running = True
        _job_started()
        self._thread.start()

    def cancel(self) -> None:
        """Ask the work to stop at its next progress report."""
        self._stop.set()

    @property
    def cancel_requested(self) -> bool:
        return self._stop.is_set()

    def _finish(self) -> None:
        self._thread.quit()
        self._thread.wait()
        if self.running:
            _job_ended()
        self.running = False

    def _on_done(self, result) -> None:
        self._finish()
        self.finished.emit(result)
        self.ended.emit()
        self._release()

    def _on_error(self, exc, tb) -> None:
        self._finish()
        self.failed.emit(exc, tb)
        self.ended.emit()
        self._release()

    def _on_stopped(self) -> None:
        self._finish()
        self.cancelled.emit()
        self.ended.emit()
        self._release()

    def _release(self) -> None:
        """After the end: drop the work (its closure holds a tube's events) and
        delete this job with its connections (their slots hold the tube too)
        once control is back in the event loop; the owner has let go of it."""
        self._runner._fn = None
        self.deleteLater()

    def wait(self, ms: int = 30000) -> bool:
        """Block until the thread ends (used when closing the window)."""
        return self._thread.wait(ms)
