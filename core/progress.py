"""The progress and cancellation protocol shared by long work (fitting, batches).

A progress callback has the signature ``progress(step, total, info) -> bool``
where ``step`` counts finished units (int), ``total`` is the planned number
(int, or None when unknown) and ``info`` is a float or dict with details
(for the density fit: held-out mean log-likelihood in nats).  Returning False
asks the work to stop cleanly; None or True means carry on.
"""

from __future__ import annotations

from typing import Any, Callable, Optional

ProgressCallback = Callable[[int, Optional[int], Any], Optional[bool]]


def keep_going(progress: ProgressCallback | None, step: int, total: int | None, info: Any = None) -> bool:
    """Call ``progress`` if given; return False only when it asked to stop."""
    if progress is None:
        return True
    return progress(step, total, info) is not False


def stop_relay(progress: ProgressCallback | None) -> tuple[Callable, list]:
    """A relay that passes every report on to ``progress`` and the list it marks
    (appends True) when ``progress`` asked to stop; for work that must know
    afterwards whether it was stopped."""
    stopped: list[bool] = []

    def relay(step, total, info=None):
        go = keep_going(progress, step, total, info)
        if not go:
            stopped.append(True)
        return go
    return relay, stopped
