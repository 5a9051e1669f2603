"""Guard against a reference-counting fault of PySide6 6.12.0 on Python < 3.12.

Measured here (PySide6 6.12.0, CPython 3.11.7): every call of a Qt method that
returns nothing hands back ``None`` without taking a reference, and every
Python-side ``signal.emit()`` does the same with ``True``.  Python 3.12 made
these objects immortal, so the fault is harmless there; on 3.11 each call
removes one reference and, after a few thousand calls (pyqtgraph makes many),
the interpreter aborts with "Fatal Python error: none_dealloc" or
"bool_dealloc".

When (and only when) a short probe shows the leak, this module gives
``None``, ``True`` and ``False`` a reference count so large (2**40) that it
cannot reach zero in the life of a process -- what Python 3.12 does for them
by design.  The real fix is a PySide6 release without the fault (or
Python >= 3.12); the probe makes this guard switch itself off then.
"""

from __future__ import annotations

import ctypes
import sys

_RESERVE = 1 << 40
applied = False


def leaks() -> bool:
    """True when Qt calls and signal emits steal references to None / True."""
    # imported here: Qt is probed only on CPython < 3.12
    from PySide6.QtCore import QObject, Signal

    class _Probe(QObject):
        ping = Signal()

    probe = _Probe()
    none0, true0 = sys.getrefcount(None), sys.getrefcount(True)
    for _ in range(64):
        probe.setObjectName("probe")
        probe.ping.emit()
    return sys.getrefcount(None) < none0 - 32 or sys.getrefcount(True) < true0 - 32


def apply() -> bool:
    """Protect None/True/False when the running PySide6 leaks them; returns whether applied."""
    global applied
    if applied:
        return True
    if sys.implementation.name != "cpython" or sys.version_info >= (3, 12):
        return False
    if not leaks():
        return False
    for obj in (None, True, False):
        ctypes.c_ssize_t.from_address(id(obj)).value += _RESERVE
    applied = True
    return True


apply()
