"""Worker process set-up: thread limits, Ctrl-C, ending with the batch, warm-up.

Runs in each worker of the process pool (:mod:`core.batch.executors`) and in
the task itself (the numba thread limit).  Imports the standard library, the
write guard and, for the warm-up, the density engine.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
import time

import numba
import numpy as np

from .. import write_guard
from ..density import AdditiveTreeDensity
from ..transforms import logicle

#: Environment variables that size the BLAS / OpenMP thread pools at numpy's import.
BLAS_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def limit_numba_threads(threads: int) -> None:
    """Let numba's parallel kernels use at most ``threads`` threads in this process."""
    try:
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
    except Exception:  # the threading layer refuses: leave the default
        pass


def parent_alive(pid: int) -> bool:
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


def die_with_parent(parent_pid: int) -> None:
    """Make this worker end when the batch's process ``parent_pid`` ends, even by ``kill -9``.

    On Linux the kernel sends SIGKILL when the worker's parent (the fork server)
    exits (``prctl(PR_SET_PDEATHSIG)``); on every POSIX system a watchdog thread checks the
    batch process every 0.2 s and ends the worker, and the write guard checks it
    before every rename, so an orphaned worker never writes.
    """
    if os.name != "posix":
        return  # os.kill(pid, 0) would end the process on Windows; spawned workers are not orphaned there
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(1, signal.SIGKILL, 0, 0, 0)  # PR_SET_PDEATHSIG = 1
        except Exception:  # no libc prctl: the watchdog below still works
            pass

    def check() -> None:
        if not parent_alive(parent_pid):
            os._exit(70)

    def watch() -> None:
        while True:
            time.sleep(0.2)
            check()

    write_guard.set_abort_check(check)
    threading.Thread(target=watch, name="boscage-parent-watch", daemon=True).start()
    check()


def init_worker(threads: int, parent_pid: int | None = None) -> None:
    """Worker start-up: ignore Ctrl-C (the parent stops the batch), end with the batch's
    process ``parent_pid`` (:func:`die_with_parent`) and limit numba threads."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if parent_pid:
        die_with_parent(int(parent_pid))
    # numba's and BLAS's pools are sized when they are imported, before this runs:
    # the process executor puts the limits in the environment the workers (or
    # their fork server) start with (worker_environment); here only the number
    # of numba threads in use is limited
    limit_numba_threads(threads)


def worker_environment(threads: int, spawn: bool) -> dict:
    """Environment variables a worker process must start with to use ``threads`` threads.

    BLAS pools are sized when numpy is imported (two workers with two BLAS
    threads each oversubscribe the cores).  A spawned worker imports numba
    afresh, so its pool is sized too; a worker forked from the fork server has
    numba loaded already, and changing the variable then makes numba refuse to
    compile ("Cannot set NUMBA_NUM_THREADS to a different value once the
    threads have been launched").
    """
    env = {var: str(threads) for var in BLAS_THREAD_VARS}
    if spawn:
        env["NUMBA_NUM_THREADS"] = str(threads)
    return env


def warm_up() -> None:
    """Load the compiled kernels a file's analysis uses (a tiny seeded fit, scored
    and mapped), so the first file does not pay for it."""
    X = np.random.default_rng(0).normal(size=(600, 3))
    model = AdditiveTreeDensity(random_state=0, n_trees=2, patience=1).fit(X)
    model.score_samples(X)
    model.transform(X[:10])
    logicle(np.linspace(-100.0, 1e5, 64), 262144.0, 0.5)
