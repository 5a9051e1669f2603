"""Message boxes for failed actions, and the icons of the window.

Every exception raised by a user action ends in a message box written as a
sentence (never a traceback: that goes to standard error for developers) and
the application carries on.  Slots are wrapped with :func:`guarded`.  This
module imports no other desktop module, so windows, panels and dialogs can all
use it without an import circle.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import functools
import os
import sys
import traceback

from PySide6.QtGui import QIcon
from PySide6.QtWidgets import QMessageBox, QWidget

from core import SOFTWARE_NAME
from core.errors import BoscageError

ICON_DIR = os.path.join(os.path.dirname(__file__), "icons")


def icon(name: str) -> QIcon:
    """An icon from ``desktop/icons/NAME.svg``."""
    return QIcon(os.path.join(ICON_DIR, f"{name}.svg"))


def error_text(exc: BaseException) -> str:
    """What the analyst reads: our own errors verbatim, anything else as a sentence."""
    if isinstance(exc, BoscageError):
        text = str(exc)
    elif isinstance(exc, MemoryError):
        return "Not enough memory for this step. Try fewer events or fewer channels."
    elif isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"The system refused a file operation{where}: {exc.strerror or exc}."
    elif isinstance(exc, ValueError) and str(exc):
        text = f"A setting or value was not accepted: {exc}"
    else:
        text = (f"Something unexpected stopped this step ({type(exc).__name__}: {exc}). "
                "The window carries on; the details are in the terminal.")
    text = text.strip()
    if text and text[0].islower():
        text = text[0].upper() + text[1:]
    return text if text.endswith((".", "?", "!", ")")) else text + "."


def show_error(parent: QWidget | None, title: str, exc_or_text, details: str | None = None) -> None:
    """Show a message box for a failed action; ``details`` (a traceback) go to
    standard error only."""
    text = exc_or_text if isinstance(exc_or_text, str) else error_text(exc_or_text)
    if details and not isinstance(exc_or_text, (str, BoscageError)):
        sys.stderr.write(details)
    QMessageBox.critical(parent, f"{SOFTWARE_NAME}: {title}", text)


def guarded(title: str):
    """Decorator for slots: an exception becomes a message box, not a crash."""

    def wrap(fn):
        @functools.wraps(fn)
        def inner(self, *args, **kwargs):
            try:
                return fn(self, *args, **kwargs)
            except Exception as exc:  # noqa: BLE001 - every failure is shown to the analyst
                parent = self if isinstance(self, QWidget) else getattr(self, "window", None)
                show_error(parent if isinstance(parent, QWidget) else None, title, exc, traceback.format_exc())
                return None

        return inner

    return wrap
