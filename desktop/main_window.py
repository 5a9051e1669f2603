"""The Boscage main window: a thin view over a :class:`core.session.Session`.

Arrangement (ours): the "Tubes" list on the left; in the middle the "Rarity"
bar over the "Density map" grid and its legend; on the right a notebook of
side panels (Fit, Regions, Channels, Spillover, Contrast, Tube) with its tabs
down its left edge.  The
research-use note stays in the status bar.  Work is split by concern:
:mod:`desktop.fitting` (background fits and contours), :mod:`desktop.regions_view`
(regions), :mod:`desktop.edits` (scales, compensation, pairs, recipes, export,
batch), :mod:`desktop.actions` (tool bar and menus).  Every action on the
current tube goes through the session, so switching tubes never mixes them.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtWidgets import (QDockWidget, QFileDialog, QLabel, QMainWindow, QMessageBox, QTabWidget,
                               QVBoxLayout, QWidget)

from core import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from core.errors import BoscageError
from core.files import FCS_SUFFIXES
from core.recipe import RareRule
from core.session import Session
from desktop.actions import build_actions
from desktop.edits import EditsController
from desktop.fitting import FitController, fit_text
from desktop.map_view import MapPresenter
from desktop.messages import guarded, icon, show_error
from desktop.panels.channels import ChannelsPanel
from desktop.panels.compensation import CompensationPanel
from desktop.panels.contrast import ContrastPanel
from desktop.panels.fit import FitPanel
from desktop.panels.populations import attach as attach_populations  # the panel wires itself
from desktop.panels.rarity import RarityBar
from desktop.panels.selections import SelectionsPanel
from desktop.panels.tubes import TubeCard, TubesList
from desktop.plots import DensityMap
from desktop.regions_view import RegionsController
from desktop.settings import Settings


#: What the window shows with no tube open (at start and after the last tube is closed).
EMPTY_WINDOW_TITLE = f"{SOFTWARE_NAME} — research use only"
EMPTY_MAP_TITLE = "Open an FCS file or a folder (Ctrl+O), or drop one here"

class MainWindow(QMainWindow):
    """One window, many tubes.  ``fitEnded(ok)`` after every fit (screenshots and tests wait on it)."""

    fitEnded = Signal(bool)
    contoursEnded = Signal(bool)
    batchEnded = Signal(bool)

    def __init__(self, interactive: bool = True) -> None:
        super().__init__()
        self.interactive = interactive
        self.settings = Settings()
        self.session = Session()
        self.discard_changes = False
        self.setWindowTitle(EMPTY_WINDOW_TITLE)
        self.setWindowIcon(icon("boscage"))
        self.setAcceptDrops(True)
        self.setMinimumSize(1024, 640)
        self.resize(1400, 900)

        centre = QWidget()  # the rarity bar over the density map
        cl = QVBoxLayout(centre)
        cl.setContentsMargins(0, 0, 0, 0)
        cl.setSpacing(0)
        self.rarity_bar = RarityBar()
        cl.addWidget(self.rarity_bar)
        self.density_map = DensityMap()
        cl.addWidget(self.density_map, 1)
        self.setCentralWidget(centre)
        self.tubes_list = TubesList()
        self._add_fixed_dock("TubesDock", self.tubes_list, Qt.LeftDockWidgetArea, 175, 240)

        # right: the notebook of side panels.  A panel added by another module
        # needs one line here (add_side_panel) and its signal hooks below.
        # Tabs run down the notebook's left edge: room for eight or more panels at 720 px
        self.notebook = QTabWidget()
        self.notebook.setTabPosition(QTabWidget.West)
        self.notebook.setUsesScrollButtons(True)
        self.notebook.setDocumentMode(True)
        self.fit_panel = self.add_side_panel(FitPanel(), "Fit")
        self.selections = self.add_side_panel(SelectionsPanel(), "Regions")
        self.channels_panel = self.add_side_panel(ChannelsPanel(), "Channels")
        self.comp_panel = self.add_side_panel(CompensationPanel(), "Spillover")
        self.contrast_panel = self.add_side_panel(ContrastPanel(), "Contrast")
        self.card = self.add_side_panel(TubeCard(), "Tube")
        self._add_fixed_dock("PanelsDock", self.notebook, Qt.RightDockWidgetArea, 360, 460)

        self.note_label = QLabel(RESEARCH_USE_NOTE)
        self.note_label.setObjectName("Note")
        self.statusBar().addPermanentWidget(self.note_label)

        self.map_view = MapPresenter(self)
        self.fitting = FitController(self)
        self.regions = RegionsController(self)
        self.edits = EditsController(self)
        build_actions(self)
        self._fill_recent()
        self.fitting.fitEnded.connect(self.fitEnded)
        self.fitting.contoursEnded.connect(self.contoursEnded)
        self.tubes_list.tubeChosen.connect(self.show_tube_by_path)
        self.tubes_list.closeRequested.connect(self.close_tube)
        self.rarity_bar.shareChanged.connect(self.set_share)
        self.rarity_bar.colourChanged.connect(self.map_view.set_colour_mode)
        self.fit_panel.fitRequested.connect(self.start_fit)
        self.fit_panel.cancelRequested.connect(self.cancel_job)
        self.contrast_panel.chooseRequested.connect(self.choose_control)
        self.contrast_panel.showRequested.connect(self.set_highlight_enriched)
        self.contrast_panel.keepRequested.connect(self.regions.keep_enriched)
        self.populations_panel = attach_populations(self)
        self.rarity_bar.set_share(RareRule().share, emit=False)   # the recipe's default rare share
        self.density_map.set_title(EMPTY_MAP_TITLE)
        geometry = self.settings.value("window/geometry")
        if geometry is not None and interactive:
            self.restoreGeometry(geometry)

    def add_side_panel(self, widget: QWidget, title: str) -> QWidget:
        """Add a panel to the right-hand notebook; returns it."""
        self.notebook.addTab(widget, title)
        return widget

    def show_panel(self, widget: QWidget) -> None:
        self.notebook.setCurrentWidget(widget)

    def _add_fixed_dock(self, name: str, widget: QWidget, area, min_width: int, max_width: int) -> None:
        """A side column that cannot be moved, floated or closed (no title bar)."""
        dock = QDockWidget(self)
        dock.setObjectName(name)
        dock.setTitleBarWidget(QWidget())
        dock.setWidget(widget)
        dock.setFeatures(QDockWidget.NoDockWidgetFeatures)
        dock.setMinimumWidth(min_width)
        dock.setMaximumWidth(max_width)
        self.addDockWidget(area, dock)

    # -- the API tests and scripts use ------------------------------------------------
    @property
    def current(self):
        return self.session.current

    @property
    def tubes(self) -> dict:
        return self.session.tubes

    @property
    def job(self):
        return self.fitting.job

    @property
    def last_fit_problem(self) -> str:
        return self.fitting.last_problem

    @property
    def highlight_enriched(self) -> bool:
        return bool(self.current is not None and self.current.highlight_enriched)

    def fit_running(self) -> bool:
        return self.fitting.running()

    @guarded("fit")
    def start_fit(self, control: str | None = None) -> None:
        self.fitting.start_fit(control)

    def cancel_job(self) -> None:
        self.fitting.cancel()
        if self.density_map.draw_mode:
            self.density_map.start_drawing(None)

    def add_region(self, region):
        """Add a region (a core.regions dict) to the current tube; returns the Region."""
        return self.regions.add(region)

    def region_count(self, name: str) -> int:
        """Events in a region of the current tube, as the Selections panel shows."""
        return self.session.require().count(name)

    def rare_count(self) -> int:
        """Number of events highlighted as rare now (the figure shown on the Rarity bar)."""
        t = self.current
        return 0 if t is None or t.rare_mask is None else int(t.rare_mask.sum())

    def export_dialog(self) -> None:
        self.edits.export()

    # -- opening -------------------------------------------------------------------
    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        paths = self.settings.recent_paths()
        for p in paths:
            self.recent_menu.addAction(p).triggered.connect(lambda *_, path=p: self.open_paths([path]))
        if not paths:
            self.recent_menu.addAction("(none yet)").setEnabled(False)

    @guarded("open")
    def open_dialog(self) -> None:
        start = self.settings.value("folders/open", os.path.expanduser("~"))
        pattern = " ".join(f"*{s} *{s.upper()}" for s in FCS_SUFFIXES)
        paths, _ = QFileDialog.getOpenFileNames(self, "Open tubes", start, f"FCS files ({pattern});;All files (*)")
        if paths:
            self.settings.set_value("folders/open", os.path.dirname(paths[0]))
            self.open_paths(paths)

    @guarded("open folder")
    def open_folder_dialog(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Open a folder of tubes",
                                                  self.settings.value("folders/open", os.path.expanduser("~")))
        if folder:
            self.settings.set_value("folders/open", folder)
            self.open_paths([folder])

    def open_paths(self, paths, raise_errors: bool = False) -> list[str]:
        """Open FCS files and folders; each failure is reported and the rest still open."""
        try:
            opened, problems = self.session.open(paths)
        except BoscageError as exc:
            if raise_errors:
                raise
            show_error(self, "open", exc)
            return []
        if problems and raise_errors:
            raise problems[0][1]
        for path, exc in problems:
            show_error(self, "open", exc)
        for path in opened:
            tube = self.session.tubes[path]
            self.tubes_list.add(path, tube.n_events, tube.event_file.n_channels)
            self.settings.add_recent(path)
        self._fill_recent()
        if opened:
            self.show_tube(self.session.tubes[opened[0]])
            self.statusBar().showMessage(f"Opened {len(opened)} tube(s)", 5000)
        return opened

    def dragEnterEvent(self, event) -> None:
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event) -> None:
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if paths:
            event.acceptProposedAction()
            QTimer.singleShot(0, lambda: self.open_paths(paths))

    # -- showing -------------------------------------------------------------------
    def show_tube_by_path(self, path: str) -> None:
        if path in self.session.tubes:
            self.show_tube(self.session.switch(path))

    def show_tube(self, tube) -> None:
        """Show a tube on the map and in every panel (nothing of another tube stays)."""
        if tube is not self.session.current:
            self.session.switch(tube.path)
        self.regions.only = ""
        self.tubes_list.choose(tube.path)
        ef = tube.event_file
        self.card.show_file(ef)
        self.channels_panel.ranges = {n: float(r) for n, r in zip(ef.channel_names, ef.channel_ranges)}
        self.channels_panel.show_channels(ef.channel_names, ef.channel_labels, tube.recipe.transforms,
                                          tube.recipe.channels, tube.compensated)
        self.comp_panel.show_for_tube(tube)
        self.fit_panel.set_engine_settings(tube.recipe.engine)
        self.contrast_panel.show_recipe(tube.recipe)
        self.rarity_bar.set_share(tube.share, emit=False)
        self.map_view.draw_map(tube)
        self.show_fit(tube, redraw=False)
        self.setWindowTitle(f"{os.path.basename(tube.path)} — {SOFTWARE_NAME} (research use only)")

    def show_fit(self, tube, redraw: bool = True) -> None:
        """Show the tube's fit (or its absence) without re-binning the events."""
        if redraw:
            self.map_view.recolour(tube)
            self.map_view.update_highlight()
            self.map_view.draw_contours(tube)
            self.regions.refresh(full=True)
        a = tube.analysis
        self.fit_panel.show_curve(None if a is None else getattr(a.model, "learning_curve_", None))
        self.fit_panel.ended(fit_text(a) if a is not None else (tube.fit_note or "Not fitted: the map shows "
                             "event counts. Press Fit density (Ctrl+F)."))
        self._show_contrast_text(tube)

    # -- rarity, contours, contrast --------------------------------------------------
    def set_share(self, share: float) -> None:
        if self.current is None:
            return
        self.session.set_share(share)
        self.map_view.update_highlight()
        self.regions.refresh()

    @guarded("contours")
    def toggle_contours(self) -> None:
        on = self.act_contours.isChecked()
        self.settings.set_value("view/contours", on)
        tube = self.current
        if on and tube is not None and tube.analysis is not None and tube.contours is None:
            self.fitting.start_contours()
        self.density_map.show_contours(on)
        if tube is not None:
            self.map_view.update_legend(tube)

    def _show_contrast_text(self, tube) -> None:
        p = self.contrast_panel
        p.show_result(tube.analysis, tube.control_path)
        p.show_enriched.blockSignals(True)
        p.show_enriched.setChecked(tube.highlight_enriched)
        p.show_enriched.blockSignals(False)

    @guarded("contrast")
    def choose_control(self, path: str | None = None) -> None:
        tube = self.session.require()
        if path is None:
            path, _ = QFileDialog.getOpenFileName(self, "Control tube", os.path.dirname(tube.path),
                                                  "FCS files (*.fcs *.FCS *.lmd *.LMD);;All files (*)")
        if path:
            self.fitting.start_fit(control=path)

    def set_highlight_enriched(self, on: bool) -> None:
        if self.current is not None:
            self.current.highlight_enriched = bool(on) and self.current.analysis is not None
            self.map_view.update_highlight()

    # -- closing ---------------------------------------------------------------------
    @guarded("about")
    def about(self) -> None:
        QMessageBox.about(self, f"About {SOFTWARE_NAME}",
                          f"<h3>{SOFTWARE_NAME} {__version__}</h3>"
                          "<p>Flow cytometry events seen through an additive tree density, learned by "
                          "unsupervised tree boosting: density maps, rare events, regions, contrast "
                          "with a control, batches over folders.</p>"
                          f"<p><b>{RESEARCH_USE_NOTE}</b></p>")

    def _may_lose_regions(self, tubes) -> bool:
        """True when none of ``tubes`` has regions not saved in a recipe, or the
        analyst agrees to lose them."""
        dirty = [t for t in tubes if t.dirty and len(t.regions)]
        if not dirty or self.discard_changes:
            return True
        names = ", ".join(os.path.basename(t.path) for t in dirty)
        answer = QMessageBox.question(
            self, f"{SOFTWARE_NAME}: unsaved regions",
            f"Regions drawn on {names} are not saved in a recipe. Close anyway and lose them?",
            QMessageBox.Discard | QMessageBox.Cancel, QMessageBox.Cancel)
        return answer == QMessageBox.Discard

    @guarded("close tube")
    def close_tube(self, path: str | None = None) -> bool:
        """Close one tube (the current one by default) and free its events; the
        file is not touched.  Returns whether it was closed."""
        tube = self.session.require() if path is None else self.session.tubes.get(path)
        if tube is None:
            return False
        if self.fitting.running() and self.fitting.job_path == tube.path:
            self.statusBar().showMessage(f"A fit or contour drawing is running on {os.path.basename(tube.path)}: "
                                         "press Stop (Esc) before closing it", 6000)
            return False
        if not self._may_lose_regions([tube]):
            return False
        was_current = tube is self.session.current
        after = self.session.close(tube.path)
        self.tubes_list.remove(tube.path)
        if after is not None:
            self.show_tube(after)
        elif was_current:
            self.show_no_tube()
        self.statusBar().showMessage(f"Closed {os.path.basename(tube.path)}", 4000)
        return True

    def show_no_tube(self) -> None:
        """The window with no tube open: empty panels, no per-event array held."""
        self.regions.only = ""
        self.density_map.clear(EMPTY_MAP_TITLE)
        self.channels_panel.ranges = {}
        self.channels_panel.show_channels([], [], {}, [], None)
        self.card.clear()
        self.comp_panel.show_matrix("none", None)
        self.fit_panel.show_curve(None)
        self.fit_panel.ended("No tube open.")
        self.contrast_panel.show_result(None, None)
        self.selections.show_regions([], [])
        self.rarity_bar.show_count("", False)
        self.populations_panel.refresh()
        self.setWindowTitle(EMPTY_WINDOW_TITLE)

    def closeEvent(self, event) -> None:
        if not self._may_lose_regions(self.session.tubes.values()):
            event.ignore()
            return
        if self.job is not None:
            self.job.cancel()
            self.job.wait(20000)
        if self.interactive:
            self.settings.set_value("window/geometry", self.saveGeometry())
        self.settings.sync()
        # the events go with the window: a closed window whose Python wrapper
        # lives on (signal connections) must not keep every tube's arrays
        for path in list(self.session.tubes):
            self.session.close(path)
        self.show_no_tube()
        event.accept()
