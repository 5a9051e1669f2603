"""The look of the Boscage window: our own calm palette, fonts and plot colours.

Chrome is warm paper with moss-green accents; the density plots sit on a
dark slate ground so a perceptually uniform colour map (viridis) reads well,
and rare events are drawn in a coral that viridis never uses.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import pyqtgraph as pg

#: Window colours (hex RGB).
PAPER = "#f4f1ea"
PAPER_DARK = "#e6e1d5"
INK = "#26302b"
INK_SOFT = "#5b655f"
MOSS = "#3d6b4f"
MOSS_LIGHT = "#cfe0d2"
SLATE = "#1d2326"
GRID_LINE = "#3a4449"

#: Colour of highlighted rare (or enriched) events on the density map.
RARE = "#ff7a59"
#: Colour of drawn regions and of contour lines.
REGION = "#f5d76e"
CONTOUR = ("#ffffff", "#d9d9d9", "#a6a6a6")  # 50 %, 90 %, 99 % highest-density regions

#: Perceptually uniform colour maps shipped with pyqtgraph.
DENSITY_COLOURMAP = "viridis"
COUNT_COLOURMAP = "cividis"

STYLESHEET = f"""
QMainWindow, QDialog {{ background: {PAPER}; color: {INK}; }}
QWidget {{ font-size: 10pt; }}
QDockWidget::title {{ background: {PAPER_DARK}; padding: 4px 8px; color: {INK}; font-weight: 600; }}
QToolBar {{ background: {PAPER}; border: none; border-bottom: 1px solid {PAPER_DARK}; spacing: 4px; padding: 3px; }}
QToolButton {{ color: {INK}; padding: 4px 8px; border-radius: 4px; }}
QToolButton:hover {{ background: {MOSS_LIGHT}; }}
QToolButton:checked {{ background: {MOSS}; color: white; }}
QPushButton {{ background: {MOSS}; color: white; border: none; border-radius: 4px; padding: 5px 12px; }}
QPushButton:hover {{ background: #4d7f60; }}
QPushButton:disabled {{ background: #a9b5ad; color: #eef0ee; }}
QPushButton[flat="true"] {{ background: transparent; color: {MOSS}; }}
QListWidget, QTableWidget, QTableView, QTreeWidget, QPlainTextEdit, QLineEdit {{
    background: white; border: 1px solid {PAPER_DARK}; border-radius: 3px; selection-background-color: {MOSS}; selection-color: white; }}
QHeaderView::section {{ background: {PAPER_DARK}; border: none; padding: 3px 6px; color: {INK}; }}
QTabWidget::pane {{ border: 1px solid {PAPER_DARK}; background: {PAPER}; }}
QTabBar::tab {{ background: {PAPER_DARK}; color: {INK_SOFT}; padding: 5px 7px; border-top-left-radius: 4px; border-top-right-radius: 4px; margin-right: 2px; }}
QTabBar::tab:selected {{ background: {PAPER}; color: {INK}; font-weight: 600; }}
QTabBar::tab:left {{ padding: 9px 4px; margin-right: 0; margin-bottom: 2px; border-top-right-radius: 0; border-bottom-left-radius: 4px; }}
QProgressBar {{ border: 1px solid {PAPER_DARK}; border-radius: 3px; background: white; text-align: center; height: 14px; }}
QProgressBar::chunk {{ background: {MOSS}; }}
QStatusBar {{ background: {PAPER_DARK}; color: {INK_SOFT}; }}
QLabel#Heading {{ font-size: 11pt; font-weight: 600; color: {MOSS}; }}
QLabel#Note {{ color: {INK_SOFT}; }}
QLabel#RareCount {{ color: #c4492b; font-weight: 600; }}
QSlider::groove:horizontal {{ height: 6px; background: {PAPER_DARK}; border-radius: 3px; }}
QSlider::sub-page:horizontal {{ background: {RARE}; border-radius: 3px; }}
QSlider::handle:horizontal {{ background: {MOSS}; width: 14px; margin: -5px 0; border-radius: 7px; }}
"""


def apply(app) -> None:
    """Apply the Boscage palette to a QApplication and pyqtgraph defaults."""
    # once per application: setting them again re-polishes every live widget (seconds when many)
    if app.property("boscage_style") != STYLESHEET:
        app.setStyle("Fusion")
        app.setStyleSheet(STYLESHEET)
        app.setProperty("boscage_style", STYLESHEET)
    pg.setConfigOptions(antialias=True, background=SLATE, foreground="#c9d1cc")
