"""Application start-up and the headless screenshot mode.

A global ``sys.excepthook`` turns whatever escapes into the Qt event loop into
a message box (:mod:`desktop.messages`); slots use its ``guarded``.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os
import sys
import time
import traceback

from PySide6.QtCore import QEventLoop, QTimer
from PySide6.QtWidgets import QApplication

from core import RESEARCH_USE_NOTE, SOFTWARE_NAME
from core.errors import ExportError
from core.write_guard import check_target
from desktop import style
from desktop.main_window import MainWindow
from desktop.messages import error_text, icon, show_error

def _excepthook(exc_type, exc, tb) -> None:
    if issubclass(exc_type, KeyboardInterrupt):
        sys.__excepthook__(exc_type, exc, tb)
        return
    details = "".join(traceback.format_exception(exc_type, exc, tb))
    sys.stderr.write(details)
    try:
        show_error(QApplication.activeWindow(), "problem", exc)
    except Exception:  # noqa: BLE001 - never let the hook itself abort
        pass


def install_excepthook() -> None:
    sys.excepthook = _excepthook


def make_app(argv: list[str] | None = None) -> QApplication:
    """The QApplication with our name, icon and look (created once)."""
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
    # contours are drawn after the fit, and a re-layout may start more of them: the
    # picture is taken only when no background job runs (grabbing the window while a
    # worker thread still computes contours crashed the process in garbage collection)
    deadline = time.monotonic() + timeout_s
    win.resize(*size)
    app.processEvents()
    while win.fit_running() and time.monotonic() < deadline:
        pause = QEventLoop()
        QTimer.singleShot(50, pause.quit)
        pause.exec()
    app.processEvents()
    pixmap = win.grab()

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
