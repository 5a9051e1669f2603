"""Application start-up, error reporting and the headless screenshot mode.

Every exception raised by a user action ends in a message box and the
application carries on: slots are wrapped with :func:`guarded`, and a global
``sys.excepthook`` catches whatever escapes into the Qt event loop.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import functools
import os
import sys
import traceback

from PySide6.QtCore import QEventLoop, QTimer
from PySide6.QtGui import QIcon
from PySide6.QtWidgets import QApplication, QMessageBox, QWidget

from core import RESEARCH_USE_NOTE, SOFTWARE_NAME
from core.errors import BoscageError

ICON_DIR = os.path.join(os.path.dirname(__file__), "icons")


def icon(name: str) -> QIcon:
    """An icon from ``desktop/icons/NAME.svg``."""
    return QIcon(os.path.join(ICON_DIR, f"{name}.svg"))


def error_text(exc: BaseException) -> str:
    """What the analyst reads: our own errors verbatim, anything else with its type."""
    if isinstance(exc, BoscageError):
        return str(exc)
    if isinstance(exc, MemoryError):
        return "Not enough memory for this step. Try fewer events or fewer channels."
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"The system refused a file operation{where}: {exc.strerror or exc}"
    return f"Unexpected problem ({type(exc).__name__}): {exc}"


def show_error(parent: QWidget | None, title: str, exc_or_text, details: str | None = None) -> None:
    """Show a message box for a failed action (the application carries on)."""
    text = exc_or_text if isinstance(exc_or_text, str) else error_text(exc_or_text)
    if details and not isinstance(exc_or_text, BoscageError):
        # keep the box short: the last lines of the traceback tell a developer enough
        tail = "\n".join(details.strip().splitlines()[-4:])
        text = f"{text}\n\n{tail}"
    QMessageBox.critical(parent, f"{SOFTWARE_NAME}: {title}", text)


def guarded(title: str):
    """Decorator for slots: an exception becomes a message box, not a crash."""

    def wrap(fn):
        @functools.wraps(fn)
        def inner(self, *args, **kwargs):
            try:
                return fn(self, *args, **kwargs)
            except Exception as exc:  # noqa: BLE001 - every failure is shown to the analyst
                parent = self if isinstance(self, QWidget) else None
                show_error(parent, title, exc, traceback.format_exc())
                return None

        return inner

    return wrap


def _excepthook(exc_type, exc, tb) -> None:
    if issubclass(exc_type, KeyboardInterrupt):
        sys.__excepthook__(exc_type, exc, tb)
        return
    details = "".join(traceback.format_exception(exc_type, exc, tb))
    sys.stderr.write(details)
    try:
        show_error(QApplication.activeWindow(), "problem", exc, details)
    except Exception:  # noqa: BLE001 - never let the hook itself abort
        pass


def install_excepthook() -> None:
    sys.excepthook = _excepthook


def make_app(argv: list[str] | None = None) -> QApplication:
    """The QApplication with our name, icon and look (created once)."""
    from desktop import style

    app = QApplication.instance()
    if app is None:
        app = QApplication(list(argv or [sys.argv[0] if sys.argv else "boscage"]))
    app.setApplicationName(SOFTWARE_NAME)
    app.setOrganizationName(SOFTWARE_NAME)
    app.setWindowIcon(icon("boscage"))
    style.apply(app)
    install_excepthook()
    return app


def run_gui(paths: list[str]) -> int:
    """Open the main window with ``paths`` and run the event loop."""
    app = make_app()
    from desktop.main_window import MainWindow

    win = MainWindow()
    win.show()
    if paths:
        QTimer.singleShot(0, lambda: win.open_paths(paths))
    return int(app.exec())


def run_screenshot(out_path: str, paths: list[str], size=(1400, 900), timeout_s: float = 600.0,
                   engine: dict | None = None) -> int:
    """Open ``paths``, fit with the default recipe, save the window as a PNG, exit.

    Works without a display (the offscreen platform is chosen when none is set).
    Returns 0 on success, 1 when opening or fitting failed (the message is printed).
    ``engine`` overrides density engine settings (tests use few trees).
    """
    if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    app = make_app()
    from desktop.main_window import MainWindow

    win = MainWindow(interactive=False)
    win.resize(*size)
    win.show()
    app.processEvents()
    try:
        win.open_paths(paths, raise_errors=True)
    except Exception as exc:  # noqa: BLE001
        print(f"boscage: {error_text(exc)}", file=sys.stderr)
        return 1
    if engine:
        win.fit_panel.set_engine_settings(engine)
    loop = QEventLoop()
    outcome = {}
    win.fitEnded.connect(lambda ok: (outcome.setdefault("ok", ok), loop.quit()))
    QTimer.singleShot(int(timeout_s * 1000), loop.quit)
    win.start_fit()
    if win.fit_running():
        loop.exec()
    if not outcome.get("ok", False):
        print(f"boscage: the fit did not finish: {win.last_fit_problem or 'timed out'}", file=sys.stderr)
        return 1
    if win.fit_running():  # contours are drawn after the fit
        loop2 = QEventLoop()
        win.contoursEnded.connect(lambda _ok: loop2.quit())
        QTimer.singleShot(int(timeout_s * 1000), loop2.quit)
        if win.fit_running():
            loop2.exec()
    app.processEvents()
    win.resize(*size)
    app.processEvents()
    pixmap = win.grab()
    from core.errors import ExportError
    from core.write_guard import check_target

    try:  # the one write guard: never over an input or an acquisition
        check_target(out_path, overwrite=True)
    except ExportError as exc:
        print(f"boscage: {exc}", file=sys.stderr)
        return 1
    if not pixmap.save(out_path, "PNG"):
        print(f"boscage: cannot write the picture {out_path}", file=sys.stderr)
        return 1
    print(f"boscage: wrote {out_path} ({pixmap.width()} x {pixmap.height()}). {RESEARCH_USE_NOTE}")
    win.discard_changes = True
    win.close()
    return 0
