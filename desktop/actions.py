"""The window's actions, tool bar and menus (our own names and order)."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

from PySide6.QtCore import QSize, Qt
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QToolBar

from core import SOFTWARE_NAME

from desktop.messages import icon


def _action(win, text, slot, shortcut=None, icon_name=None, tip="", checkable=False) -> QAction:
    a = QAction(text, win)
    if icon_name:
        a.setIcon(icon(icon_name))
    if shortcut:
        a.setShortcut(QKeySequence(shortcut))
    if tip:
        a.setToolTip(f"{tip} ({QKeySequence(shortcut).toString()})" if shortcut else tip)
        a.setStatusTip(tip)
    a.setCheckable(checkable)
    a.triggered.connect(lambda *_: slot())
    win.addAction(a)
    return a


def build_actions(win) -> None:
    """Create ``win.act_*``, the tool bar and the menu bar."""
    A = _action
    regions, edits = win.regions, win.edits
    win.act_open = A(win, "Open tubes...", win.open_dialog, "Ctrl+O", "open", "Open FCS files")
    win.act_open_folder = A(win, "Open folder...", win.open_folder_dialog, "Ctrl+Shift+O", "open",
                            "Open every FCS file of a folder")
    win.act_close_tube = A(win, "Close tube", win.close_tube, "Ctrl+W", None,
                           "Close the current tube and free its events (the file is not touched)")
    win.act_fit = A(win, "Fit density", win.start_fit, "Ctrl+F", "fit", "Learn the density of the current tube")
    win.act_cancel = A(win, "Stop", win.cancel_job, "Esc", "stop", "Stop the running fit or drawing tool")
    win.act_cancel.setEnabled(False)
    win.act_rect = A(win, "Box", lambda: regions.arm("rectangle"), "R", "rectangle",
                     "Draw a box region: press and drag on a plot")
    win.act_interval = A(win, "Band", lambda: regions.arm("interval"), "B", "rectangle",
                         "Draw a band region on one channel: press and drag across a plot")
    win.act_poly = A(win, "Outline", lambda: regions.arm("polygon"), "P", "polygon",
                     "Draw an outline region: click its corners, double-click to close")
    win.act_contours = A(win, "Contours", win.toggle_contours, "C", "fit",
                         "Lines enclosing 50 / 90 / 99 % of events, from a 2-D fit of each pair", checkable=True)
    win.act_contours.setChecked(win.settings.value("view/contours", True, bool))
    win.act_export = A(win, "Export events...", win.export_dialog, "Ctrl+E", "export",
                       "Write selected events to FCS or CSV")
    win.act_save_recipe = A(win, "Save recipe...", edits.save_recipe, "Ctrl+S", "recipe",
                            "Save channels, scales, compensation, engine and regions as a recipe")
    win.act_load_recipe = A(win, "Load recipe...", edits.load_recipe, "Ctrl+L", "recipe",
                            "Apply a saved recipe to the current tube")
    win.act_batch = A(win, "Run over a folder...", edits.batch, "Ctrl+B", "batch",
                      "Run the current recipe over every FCS file of a folder")
    win.act_contrast = A(win, "Contrast...", win.choose_control, "Ctrl+K", "contrast",
                         "Contrast the current tube with a control tube")
    win.act_pairs = A(win, "Plot pairs...", edits.choose_pairs, "Ctrl+G", None, "Choose the channel pairs to plot")
    win.act_rarer = A(win, "Fewer rare events", lambda: win.rarity_bar.step(-1), "[")
    win.act_more = A(win, "More rare events", lambda: win.rarity_bar.step(+1), "]")
    win.act_delete = A(win, "Delete region", lambda: regions.delete(win.selections.selected_names()), "Del")
    # Del only acts in the Selections panel, never on a value being edited elsewhere
    win.removeAction(win.act_delete)
    win.act_delete.setShortcutContext(Qt.WidgetWithChildrenShortcut)
    win.selections.addAction(win.act_delete)
    win.act_about = A(win, f"About {SOFTWARE_NAME}", win.about)
    win.act_quit = A(win, "Quit", win.close, "Ctrl+Q")

    bar = QToolBar("Main")
    bar.setObjectName("MainBar")
    bar.setMovable(False)
    bar.setIconSize(QSize(18, 18))
    bar.setToolButtonStyle(Qt.ToolButtonTextBesideIcon)
    for a in (win.act_open, win.act_fit, win.act_cancel, None, win.act_rect, win.act_interval, win.act_poly,
              win.act_contours, None, win.act_export, win.act_contrast, win.act_batch):
        if a is None:
            bar.addSeparator()
        else:
            bar.addAction(a)
    win.addToolBar(Qt.TopToolBarArea, bar)

    mb = win.menuBar()
    m = mb.addMenu("&Tubes")
    for a in (win.act_open, win.act_open_folder, win.act_close_tube):
        m.addAction(a)
    win.recent_menu = m.addMenu("Recent")
    m.addSeparator()
    m.addAction(win.act_export)
    m.addSeparator()
    m.addAction(win.act_quit)
    m = mb.addMenu("&Density")
    for a in (win.act_fit, win.act_cancel, win.act_contours, win.act_pairs, win.act_rarer, win.act_more,
              win.act_contrast):
        m.addAction(a)
    m = mb.addMenu("&Selections")
    for a in (win.act_rect, win.act_interval, win.act_poly, win.act_delete):
        m.addAction(a)
    m = mb.addMenu("&Recipe")
    for a in (win.act_save_recipe, win.act_load_recipe, win.act_batch):
        m.addAction(a)
    mb.addMenu("&Help").addAction(win.act_about)
