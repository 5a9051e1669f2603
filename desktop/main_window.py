"""The Boscage main window.

Arrangement (ours): the "Tubes" list on the left; in the middle the "Rarity"
bar over the "Density map" grid; on the right a notebook of panels (Tube card,
Channels, Spillover, Fit, Selections, Contrast).  The research-use note stays
in the status bar.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import copy
import glob
import os
import time

import numpy as np
from PySide6.QtCore import QSize, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QDockWidget, QFileDialog, QHBoxLayout, QInputDialog, QLabel, QMainWindow,
                               QMessageBox, QSlider, QDoubleSpinBox, QTabWidget, QToolBar, QVBoxLayout,
                               QWidget, QPushButton)

from core import RESEARCH_USE_NOTE, SOFTWARE_NAME, __version__
from core.errors import BoscageError, RegionError

from desktop.app import guarded, icon, show_error
from desktop.panels.channels import ChannelsPanel
from desktop.panels.compensation import CompensationPanel, save_matrix_csv
from desktop.panels.contrast import ContrastPanel
from desktop.panels.fit import FitPanel
from desktop.panels.selections import SelectionsPanel
from desktop.panels.tubes import TubeCard, TubesList
from desktop.plots import DensityMap, contour_lines
from desktop.settings import Settings
from desktop.tube import Tube, default_pairs
from desktop.workers import Job

#: The rarity slider runs over shares from 0.01 % to 20 % on a log scale.
SHARE_MIN, SHARE_MAX, SLIDER_STEPS = 1e-4, 0.2, 1000
#: Settings of the small 2-D densities behind the contour lines (per pair).
CONTOUR_ENGINE = {"n_trees": 25, "max_fit_events": 5_000, "patience": 5}
CONTOUR_EVENTS = 5_000
CONTOUR_LEVEL_SAMPLES = 5_000
FCS_PATTERNS = ("*.fcs", "*.FCS", "*.lmd", "*.LMD")


def expand_paths(paths) -> list[str]:
    """FCS files named in ``paths``; folders are searched (not recursively)."""
    out: list[str] = []
    for p in paths:
        p = os.fspath(p)
        if os.path.isdir(p):
            found = set()
            for pat in FCS_PATTERNS:
                found.update(glob.glob(os.path.join(p, pat)))
            out.extend(sorted(found))
        else:
            out.append(p)
    seen, unique = set(), []
    for p in out:
        a = os.path.abspath(p)
        if a not in seen:
            seen.add(a)
            unique.append(a)
    return unique


def share_to_slider(share: float) -> int:
    s = min(max(share, SHARE_MIN), SHARE_MAX)
    return int(round(SLIDER_STEPS * np.log(s / SHARE_MIN) / np.log(SHARE_MAX / SHARE_MIN)))


def slider_to_share(pos: int) -> float:
    return float(SHARE_MIN * (SHARE_MAX / SHARE_MIN) ** (pos / SLIDER_STEPS))


class RarityBar(QWidget):
    """The "Rarity" control: share of events to highlight as rare, and their count."""

    shareChanged = Signal(float)
    keepRequested = Signal(float)  # share: keep the highlighted rare events as a region

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        lay = QHBoxLayout(self)
        lay.setContentsMargins(8, 4, 8, 4)
        title = QLabel("Rarity")
        title.setObjectName("Heading")
        lay.addWidget(title)
        self.slider = QSlider(Qt.Horizontal)
        self.slider.setRange(0, SLIDER_STEPS)
        self.slider.setToolTip("Share of events, counted from the lowest fitted density up, to highlight "
                               "as rare on every plot. Keys [ and ] step it.")
        self.spin = QDoubleSpinBox()
        self.spin.setDecimals(3)
        self.spin.setRange(SHARE_MIN * 100, SHARE_MAX * 100)
        self.spin.setSuffix(" %")
        self.spin.setKeyboardTracking(False)
        self.spin.setToolTip("Share of events highlighted as rare (percent of the kept events)")
        self.count = QLabel("Fit the density to rank events")
        self.count.setObjectName("RareCount")
        self.count.setMinimumWidth(260)
        self.keep_button = QPushButton("Keep as region")
        self.keep_button.setToolTip("New region holding the events highlighted as rare now, so they can "
                                    "be counted, combined with other regions and exported")
        lay.addWidget(self.slider, 1)
        lay.addWidget(self.spin)
        lay.addWidget(self.count)
        lay.addWidget(self.keep_button)
        self.keep_button.clicked.connect(lambda: self.keepRequested.emit(self._share))
        self._share = 0.005
        self.slider.valueChanged.connect(self._slid)
        self.spin.valueChanged.connect(self._typed)

    def share(self) -> float:
        return self._share

    def set_share(self, share: float, emit: bool = True) -> None:
        self._share = float(min(max(share, SHARE_MIN), SHARE_MAX))
        self.slider.blockSignals(True)
        self.spin.blockSignals(True)
        self.slider.setValue(share_to_slider(self._share))
        self.spin.setValue(self._share * 100)
        self.slider.blockSignals(False)
        self.spin.blockSignals(False)
        if emit:
            self.shareChanged.emit(self._share)

    def _slid(self, pos: int) -> None:
        self._share = slider_to_share(pos)
        self.spin.blockSignals(True)
        self.spin.setValue(self._share * 100)
        self.spin.blockSignals(False)
        self.shareChanged.emit(self._share)

    def _typed(self, pct: float) -> None:
        self.set_share(pct / 100.0)

    def step(self, direction: int) -> None:
        self.slider.setValue(self.slider.value() + direction * SLIDER_STEPS // 40)


class MainWindow(QMainWindow):
    """One window, many tubes.  ``fitEnded(ok)`` after every fit (screenshots and tests wait on it)."""

    fitEnded = Signal(bool)
    contoursEnded = Signal(bool)
    batchEnded = Signal(bool)

    def __init__(self, interactive: bool = True) -> None:
        super().__init__()
        self.interactive = interactive
        self.settings = Settings()
        self.tubes: dict[str, Tube] = {}
        self.current: Tube | None = None
        self.job: Job | None = None
        self.job_kind = ""
        self.last_fit_problem = ""
        self.discard_changes = False
        self.highlight_enriched = False
        self._region_counter = 0
        self.setWindowTitle(f"{SOFTWARE_NAME} — research use only")
        self.setWindowIcon(icon("boscage"))
        self.setAcceptDrops(True)
        self.resize(1400, 900)

        # centre: rarity bar over the density map
        centre = QWidget()
        cl = QVBoxLayout(centre)
        cl.setContentsMargins(0, 0, 0, 0)
        cl.setSpacing(0)
        self.rarity_bar = RarityBar()
        cl.addWidget(self.rarity_bar)
        self.density_map = DensityMap()
        cl.addWidget(self.density_map, 1)
        self.setCentralWidget(centre)

        # left: tubes
        self.tubes_list = TubesList()
        self._add_fixed_dock("TubesDock", self.tubes_list, Qt.LeftDockWidgetArea, 190, 260)

        # right: the notebook of panels
        self.card = TubeCard()
        self.channels_panel = ChannelsPanel()
        self.comp_panel = CompensationPanel()
        self.fit_panel = FitPanel()
        self.selections = SelectionsPanel()
        self.contrast_panel = ContrastPanel()
        self.notebook = QTabWidget()
        self.notebook.addTab(self.fit_panel, "Fit")
        self.notebook.addTab(self.selections, "Selections")
        self.notebook.addTab(self.channels_panel, "Channels")
        self.notebook.addTab(self.comp_panel, "Spillover")
        self.notebook.addTab(self.contrast_panel, "Contrast")
        self.notebook.addTab(self.card, "Tube")
        self._add_fixed_dock("PanelsDock", self.notebook, Qt.RightDockWidgetArea, 360, 430)

        self.note_label = QLabel(RESEARCH_USE_NOTE)
        self.note_label.setObjectName("Note")
        self.statusBar().addPermanentWidget(self.note_label)

        self._make_actions()
        self._connect()
        from desktop.panels.populations import attach as attach_populations
        self.populations_panel = attach_populations(self)
        self.rarity_bar.set_share(0.005, emit=False)
        self._drag_timer = QTimer(self)
        self._drag_timer.setSingleShot(True)
        self._drag_timer.setInterval(30)
        self._drag_timer.timeout.connect(self._apply_pending_roi)
        self._pending_roi: tuple | None = None
        self.density_map.set_title("Open an FCS file or a folder (Ctrl+O), or drop one here")
        geometry = self.settings.value("window/geometry")
        if geometry is not None and interactive:
            self.restoreGeometry(geometry)

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

    # ------------------------------------------------------------------ actions

    def _action(self, text, slot, shortcut=None, icon_name=None, tip="", checkable=False):
        a = QAction(text, self)
        if icon_name:
            a.setIcon(icon(icon_name))
        if shortcut:
            a.setShortcut(QKeySequence(shortcut))
        if tip:
            a.setToolTip(f"{tip} ({QKeySequence(shortcut).toString()})" if shortcut else tip)
            a.setStatusTip(tip)
        a.setCheckable(checkable)
        a.triggered.connect(lambda *_: slot())
        self.addAction(a)
        return a

    def _make_actions(self) -> None:
        self.act_open = self._action("Open tubes...", self.open_dialog, "Ctrl+O", "open", "Open FCS files")
        self.act_open_folder = self._action("Open folder...", self.open_folder_dialog, "Ctrl+Shift+O", "open",
                                            "Open every FCS file of a folder")
        self.act_fit = self._action("Fit density", self.start_fit, "Ctrl+F", "fit",
                                    "Learn the additive tree density of the current tube")
        self.act_cancel = self._action("Stop", self.cancel_job, "Esc", "stop", "Stop the running fit or batch")
        self.act_cancel.setEnabled(False)
        self.act_rect = self._action("Rectangle", lambda: self.arm_drawing("rectangle"), "R", "rectangle",
                                     "Draw a rectangular region: click a plot, then drag the corners")
        self.act_poly = self._action("Polygon", lambda: self.arm_drawing("polygon"), "P", "polygon",
                                     "Draw a polygon region: click its corners, double-click to close")
        self.act_contours = self._action("Contours", self.toggle_contours, "C", "fit",
                                         "Show the 50 / 90 / 99 % highest-density-region contours", checkable=True)
        self.act_contours.setChecked(self.settings.value("view/contours", True, bool))
        self.act_export = self._action("Export events...", self.export_dialog, "Ctrl+E", "export",
                                       "Write selected events to FCS or CSV")
        self.act_save_recipe = self._action("Save recipe...", self.save_recipe_dialog, "Ctrl+S", "recipe",
                                            "Save channels, scales, compensation, engine and regions as a recipe")
        self.act_load_recipe = self._action("Load recipe...", self.load_recipe_dialog, "Ctrl+L", "recipe",
                                            "Apply a saved recipe to the current tube")
        self.act_batch = self._action("Run over a folder...", self.batch_dialog, "Ctrl+B", "batch",
                                      "Run the current recipe over every FCS file of a folder")
        self.act_contrast = self._action("Contrast...", self.choose_control, "Ctrl+K", "contrast",
                                         "Contrast the current tube with a control tube")
        self.act_rarer = self._action("Fewer rare events", lambda: self.rarity_bar.step(-1), "[")
        self.act_more = self._action("More rare events", lambda: self.rarity_bar.step(+1), "]")
        self.act_delete = self._action("Delete region", self.delete_selected_regions, "Del")
        # Del only acts in the Selections panel, never on a value being edited elsewhere
        self.removeAction(self.act_delete)
        self.act_delete.setShortcutContext(Qt.WidgetWithChildrenShortcut)
        self.selections.addAction(self.act_delete)
        self.act_about = self._action(f"About {SOFTWARE_NAME}", self.about)
        self.act_quit = self._action("Quit", self.close, "Ctrl+Q")

        bar = QToolBar("Main")
        bar.setObjectName("MainBar")
        bar.setMovable(False)
        bar.setIconSize(QSize(20, 20))
        bar.setToolButtonStyle(Qt.ToolButtonTextBesideIcon)
        for a in (self.act_open, self.act_fit, self.act_cancel, None, self.act_rect, self.act_poly,
                  self.act_contours, None, self.act_export, self.act_contrast, self.act_batch):
            if a is None:
                bar.addSeparator()
            else:
                bar.addAction(a)
        self.addToolBar(Qt.TopToolBarArea, bar)

        mb = self.menuBar()
        m = mb.addMenu("&Tubes")
        m.addAction(self.act_open)
        m.addAction(self.act_open_folder)
        self.recent_menu = m.addMenu("Recent")
        self._fill_recent()
        m.addSeparator()
        m.addAction(self.act_export)
        m.addSeparator()
        m.addAction(self.act_quit)
        m = mb.addMenu("&Density")
        for a in (self.act_fit, self.act_cancel, self.act_contours, self.act_rarer, self.act_more, self.act_contrast):
            m.addAction(a)
        m = mb.addMenu("&Selections")
        for a in (self.act_rect, self.act_poly, self.act_delete):
            m.addAction(a)
        m = mb.addMenu("&Recipe")
        for a in (self.act_save_recipe, self.act_load_recipe, self.act_batch):
            m.addAction(a)
        m = mb.addMenu("&Help")
        m.addAction(self.act_about)

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        paths = self.settings.recent_paths()
        for p in paths:
            a = self.recent_menu.addAction(p)
            a.triggered.connect(lambda *_, path=p: self.open_paths([path]))
        if not paths:
            a = self.recent_menu.addAction("(none yet)")
            a.setEnabled(False)

    def _connect(self) -> None:
        self.tubes_list.tubeChosen.connect(self.show_tube_by_path)
        self.rarity_bar.shareChanged.connect(self.set_share)
        self.fit_panel.fitRequested.connect(self.start_fit)
        self.fit_panel.cancelRequested.connect(self.cancel_job)
        self.density_map.roiDrawn.connect(self._roi_drawn)
        self.density_map.roiChanged.connect(self._roi_moving)
        self.density_map.roiFinished.connect(self._roi_moved)
        self.selections.renameRequested.connect(self.rename_region)
        self.selections.deleteRequested.connect(self.delete_regions)
        self.selections.combineRequested.connect(self.combine_regions)
        self.rarity_bar.keepRequested.connect(self.keep_rare_region)
        self.selections.exportRequested.connect(self.export_dialog)
        self.channels_panel.changed.connect(self.scales_changed)
        self.channels_panel.pairsRequested.connect(self.choose_pairs)
        self.comp_panel.applyRequested.connect(self.apply_compensation)
        self.comp_panel.loadCsvRequested.connect(self.load_spillover_csv)
        self.contrast_panel.chooseRequested.connect(self.choose_control)
        self.contrast_panel.showRequested.connect(self.set_highlight_enriched)
        self.contrast_panel.keepRequested.connect(self.keep_enriched_region)

    # ------------------------------------------------------------------ opening
    @guarded("open")
    def open_dialog(self) -> None:
        start = self.settings.value("folders/open", os.path.expanduser("~"))
        paths, _ = QFileDialog.getOpenFileNames(self, "Open tubes", start, "FCS files (*.fcs *.FCS *.lmd);;All files (*)")
        if paths:
            self.settings.set_value("folders/open", os.path.dirname(paths[0]))
            self.open_paths(paths)

    @guarded("open folder")
    def open_folder_dialog(self) -> None:
        start = self.settings.value("folders/open", os.path.expanduser("~"))
        folder = QFileDialog.getExistingDirectory(self, "Open a folder of tubes", start)
        if folder:
            self.settings.set_value("folders/open", folder)
            self.open_paths([folder])

    def open_paths(self, paths, raise_errors: bool = False) -> list[str]:
        """Open FCS files and folders; each failure is reported and the rest still open."""
        opened = []
        files = expand_paths(paths)
        if not files:
            problem = BoscageError(f"no FCS files found in: {', '.join(map(str, paths))}")
            if raise_errors:
                raise problem
            show_error(self, "open", problem)
            return opened
        for path in files:
            try:
                tube = self.tubes.get(path) or Tube.open(path)
            except Exception as exc:  # noqa: BLE001 - reported per file
                if raise_errors:
                    raise
                import traceback

                show_error(self, "open", exc, traceback.format_exc())
                continue
            self.tubes[path] = tube
            self.tubes_list.add(path, tube.n_events, tube.event_file.n_channels)
            self.settings.add_recent(path)
            opened.append(path)
        self._fill_recent()
        if opened:
            self.show_tube(self.tubes[opened[0]])
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

    # ------------------------------------------------------------------ showing
    def show_tube_by_path(self, path: str) -> None:
        if path in self.tubes:
            self.show_tube(self.tubes[path])

    def show_tube(self, tube: Tube) -> None:
        """Show a tube on the map and in every panel."""
        self.current = tube
        self.tubes_list.choose(tube.path)
        ef = tube.event_file
        self.card.show_file(ef)
        self.channels_panel.ranges = {n: float(r) for n, r in zip(ef.channel_names, ef.channel_ranges)}
        self.channels_panel.show_channels(ef.channel_names, ef.channel_labels, tube.recipe.transforms,
                                          tube.recipe.channels, tube.compensated)
        self._show_compensation(tube)
        self.fit_panel.set_engine_settings(tube.recipe.engine or {})
        self.rarity_bar.set_share(tube.share, emit=False)
        self._draw_map(tube)
        a = tube.analysis
        if a is not None:
            self.fit_panel.show_curve(getattr(a.model, "learning_curve_", None))
            self.fit_panel.ended(self._fit_text(a))
        else:
            self.fit_panel.show_curve([])
            self.fit_panel.ended("Not fitted: the map shows event counts. Press Fit density (Ctrl+F).")
        self._show_contrast_text(tube)
        self.setWindowTitle(f"{os.path.basename(tube.path)} — {SOFTWARE_NAME} (research use only)")

    def _show_compensation(self, tube: Tube) -> None:
        from core.compensation import read_spillover_csv, spillover_from_keywords

        comp = tube.recipe.compensation or {"source": "none"}
        source = comp.get("source", "none")
        S = None
        try:
            if source == "file":
                S = spillover_from_keywords(tube.event_file.keywords, source=os.path.basename(tube.path))
            elif source == "csv" and comp.get("csv_path"):
                S = read_spillover_csv(tube.recipe.csv_path_resolved())
            elif source == "none":
                S = spillover_from_keywords(tube.event_file.keywords, source=os.path.basename(tube.path))
        except BoscageError:
            S = None
        self.comp_panel.show_matrix(source, S, comp.get("csv_path"))
        if source == "none" and S is not None:
            self.comp_panel.info.setText("The file carries this matrix but it is not applied; "
                                         "choose the file's keyword and Apply to use it.")

    def _draw_map(self, tube: Tube) -> None:
        dm = self.density_map
        a = tube.analysis
        dm.set_events(tube.values, tube.names, tube.pairs, tube.event_file.channel_labels,
                      colour_values=None if a is None else a.log_density,
                      colour_label="" if a is None else "mean log density (nats)")
        for region in tube.regions:
            self._show_roi(region)
        self._update_highlight()
        self._draw_contours(tube)
        self._refresh_regions(full=True)

    def _recolour(self, tube: Tube) -> None:
        if tube.analysis is not None:
            self.density_map.set_colouring(tube.analysis.log_density, "mean log density (nats)")
        else:
            self.density_map.set_colouring(None)

    def _draw_contours(self, tube: Tube) -> None:
        if tube.contours is None or tube.analysis is None:
            self.density_map.set_contours(None)
            return
        by_pair = dict(tube.contours)
        self.density_map.set_contours([by_pair.get(p, []) for p in tube.pairs])
        self.density_map.show_contours(self.act_contours.isChecked())

    def _update_highlight(self) -> None:
        tube = self.current
        if tube is None:
            return
        a = tube.analysis
        if a is None:
            self.density_map.set_highlight(None)
            self.rarity_bar.count.setText("Fit the density to rank events")
            self._set_title(tube)
            return
        showing_enriched = self.highlight_enriched and a.enriched is not None
        self._rarity_controls_active(not showing_enriched)
        if showing_enriched:
            mask = a.enriched
            self.rarity_bar.count.setText(f"{int(mask.sum()):,} new events (vs control) highlighted")
        else:
            mask = tube.rare_mask
            n = int(mask.sum()) if mask is not None else 0
            self.rarity_bar.count.setText(f"{n:,} rare events ({100.0 * n / max(a.n_kept, 1):.2f} % of "
                                          f"{a.n_kept:,} kept)")
        self.density_map.set_highlight(mask)
        self._set_title(tube)

    def _rarity_controls_active(self, on: bool) -> None:
        """The Rarity share means nothing while the new events of a contrast are shown: grey it out."""
        bar = self.rarity_bar
        for w in (bar.slider, bar.spin, bar.keep_button):
            w.setEnabled(on)
        bar.slider.setToolTip("Share of events, counted from the lowest fitted density up, to highlight as rare "
                              "on every plot. Keys [ and ] step it." if on else
                              "Not in use: the plots show the new events of the contrast. Switch off "
                              "'Highlight the new events' in the Contrast panel to rank by rarity again.")
        self.act_rarer.setEnabled(on)
        self.act_more.setEnabled(on)

    def _set_title(self, tube: Tube) -> None:
        state = "fitted" if tube.analysis is not None else "not fitted — colour shows event counts"
        self.density_map.set_title(f"<b>{os.path.basename(tube.path)}</b> · {tube.n_events:,} events · {state}")

    def rare_count(self) -> int:
        """Number of events highlighted as rare now (the figure shown on the Rarity bar)."""
        t = self.current
        return 0 if t is None or t.rare_mask is None else int(t.rare_mask.sum())

    # ------------------------------------------------------------------ rarity
    def set_share(self, share: float) -> None:
        tube = self.current
        if tube is None:
            return
        tube.share = float(share)
        tube.update_rare()
        self._update_highlight()
        if any(r.kind == "rarity" for r in tube.regions):
            self._refresh_regions()

    # ------------------------------------------------------------------ scales, compensation
    @guarded("change scales")
    def scales_changed(self) -> None:
        tube = self.current
        if tube is None:
            return
        new_specs = self.channels_panel.specs()
        new_channels = self.channels_panel.fit_channels()
        old_specs = dict(tube.recipe.transforms)
        changed = [c for c in set(old_specs) | set(new_specs) if old_specs.get(c) != new_specs.get(c)]
        if not changed and list(new_channels) == list(tube.recipe.channels):
            return
        tube.recipe.transforms = new_specs
        tube.recipe.channels = list(new_channels)
        if changed:
            self._move_regions_to_new_scales(tube, old_specs, new_specs, changed)
            tube.recompute_values()
        self._invalidate_fit(tube, "Scales or channels changed: fit the density again.")
        self._draw_map(tube)

    def _move_regions_to_new_scales(self, tube, old_specs, new_specs, changed) -> None:
        """Carry drawn regions over to new scales: vertices go back to instrument
        units through the old transform and forward through the new one."""
        from core.regions import region_from_dict
        from core.transforms import make_transform

        def mapper(c):
            old, new = old_specs.get(c), new_specs.get(c)
            inv = (lambda v: v) if old is None else make_transform(old).inverse
            fwd = (lambda v: v) if new is None else make_transform(new).forward
            return lambda v: np.asarray(fwd(inv(np.asarray(v, dtype=np.float64))), dtype=np.float64)

        for r in list(tube.regions):
            chans = r.channels_used()
            if not chans or not any(c in changed for c in chans):
                continue
            d = r.to_dict()
            if d["kind"] == "rectangle":
                d["x"] = sorted(mapper(chans[0])(d["x"]).tolist())
                d["y"] = sorted(mapper(chans[1])(d["y"]).tolist())
            elif d["kind"] == "polygon":
                v = np.asarray(d["vertices"], dtype=np.float64)
                d["vertices"] = np.column_stack([mapper(chans[0])(v[:, 0]), mapper(chans[1])(v[:, 1])]).tolist()
            elif d["kind"] == "interval":
                f = mapper(chans[0])
                d["low"] = None if d["low"] is None else float(f([d["low"]])[0])
                d["high"] = None if d["high"] is None else float(f([d["high"]])[0])
            d["transforms"] = {c: new_specs.get(c) for c in chans}
            tube.regions.replace(region_from_dict(d))

    @guarded("compensation")
    def apply_compensation(self, source: str, edited) -> None:
        tube = self.current
        if tube is None:
            return
        comp = {"source": source, "csv_path": None}
        if edited is not None:
            folder = self._matrix_folder()
            stem = os.path.splitext(os.path.basename(tube.path))[0]
            from core.atomic import unique_path

            path = unique_path(os.path.join(folder, f"{stem}-spillover-edited.csv"))
            save_matrix_csv(path, edited)
            comp = {"source": "csv", "csv_path": path}
            self.statusBar().showMessage(f"Edited matrix saved as {path}", 8000)
        elif source == "csv":
            comp["csv_path"] = self.comp_panel.csv_path or (tube.recipe.compensation or {}).get("csv_path")
            if not comp["csv_path"]:
                raise BoscageError("choose a spillover CSV file first (Load CSV...)")
        old = copy.deepcopy(tube.recipe.compensation)
        tube.recipe.compensation = comp
        try:
            tube.recompute_values()
        except Exception:
            tube.recipe.compensation = old
            tube.recompute_values()
            raise
        self._invalidate_fit(tube, "Compensation changed: fit the density again.")
        self.show_tube(tube)

    def _matrix_folder(self) -> str:
        from PySide6.QtCore import QStandardPaths

        base = QStandardPaths.writableLocation(QStandardPaths.AppDataLocation) or os.path.expanduser("~/.boscage")
        folder = os.path.join(base, "matrices")
        os.makedirs(folder, exist_ok=True)
        return folder

    @guarded("load spillover CSV")
    def load_spillover_csv(self) -> None:
        from core.compensation import read_spillover_csv

        path, _ = QFileDialog.getOpenFileName(self, "Spillover matrix (CSV)", self.settings.value("folders/open", ""),
                                              "CSV files (*.csv *.txt);;All files (*)")
        if not path:
            return
        S = read_spillover_csv(path)
        self.comp_panel.show_matrix("csv", S, path)

    def _invalidate_fit(self, tube: Tube, text: str) -> None:
        tube.analysis = None
        tube.rare_mask = None
        tube.contours = None
        self.fit_panel.ended(text)

    @guarded("plot pairs")
    def choose_pairs(self) -> None:
        tube = self.current
        if tube is None:
            return
        current = ", ".join(f"{tube.names[i]} : {tube.names[j]}" for i, j in tube.pairs)
        text, ok = QInputDialog.getText(self, "Plot pairs", "Channel pairs as x : y, separated by commas "
                                        "(at most 9):", text=current)
        if not ok:
            return
        self.set_pairs([tuple(s.strip() for s in part.split(":")) for part in text.split(",") if part.strip()])

    def set_pairs(self, pairs) -> None:
        """Show these (x channel, y channel) name pairs on the density map."""
        from core.errors import ChannelError

        tube = self.current
        idx = []
        for p in pairs:
            if len(p) != 2 or p[0] not in tube.names or p[1] not in tube.names:
                raise ChannelError(f"unknown channel pair {' : '.join(p)}; the channels are {', '.join(tube.names)}")
            idx.append((tube.names.index(p[0]), tube.names.index(p[1])))
        tube.pairs = idx[:9]
        tube.contours = None if tube.contours is None else [c for c in tube.contours if c[0] in tube.pairs]
        self._draw_map(tube)

    # ------------------------------------------------------------------ fitting
    def fit_running(self) -> bool:
        return self.job is not None and self.job.running

    def _current_recipe(self, tube: Tube):
        recipe = tube.recipe_with_regions()
        # the panel owns these four settings; it returns only those changed from the defaults
        engine = {k: v for k, v in (recipe.engine or {}).items()
                  if k not in ("n_trees", "learning_rate", "max_depth", "max_fit_events")}
        engine.update(self.fit_panel.engine_settings())
        recipe.engine = engine
        return recipe

    @guarded("fit")
    def start_fit(self, control: str | None = None) -> None:
        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if self.fit_running():
            self.statusBar().showMessage("A fit or batch is already running", 4000)
            return
        recipe = self._current_recipe(tube)
        from core.recipe import validate_recipe

        validate_recipe(recipe, tube.event_file)
        ef = tube.event_file

        def work(progress):
            from core.analysis import analyse

            return analyse(ef, recipe, progress=progress, control=control)

        self.job_kind = "contrast" if control else "fit"
        self._start_job(work, lambda result: self._fit_done(tube, recipe, result, control), self._fit_stopped)
        self.fit_panel.started()
        if control:
            self.contrast_panel.started(control)
            self.fit_panel.status.setText("Contrasting with a control: progress in the Contrast panel")
            self.notebook.setCurrentWidget(self.contrast_panel)
        self._fit_t0 = time.perf_counter()

    def _extent(self, pair):
        cell = self.density_map.cell_for(self.current.names[pair[0]], self.current.names[pair[1]])
        return None if cell is None else cell.extent

    def _start_job(self, work, on_done, on_stop) -> None:
        job = Job(work, self.job_kind, self)
        job.progressed.connect(self._job_progress)
        job.finished.connect(on_done)
        job.cancelled.connect(on_stop)
        job.failed.connect(self._job_failed)
        self.job = job
        self.act_cancel.setEnabled(True)
        self.act_fit.setEnabled(False)
        job.start()

    def _job_progress(self, step, total, info) -> None:
        if self.job_kind == "contrast":
            self.contrast_panel.step(step, total, info)
        elif self.job_kind == "fit":
            self.fit_panel.step(step, total, info)
        elif self.job_kind == "contours" and isinstance(info, dict):
            self.fit_panel.status.setText(str(info.get("stage", "")))

    def _job_ended(self) -> None:
        self.act_cancel.setEnabled(False)
        self.act_fit.setEnabled(True)
        self.job = None

    def cancel_job(self) -> None:
        if self.job is not None:
            self.job.cancel()
            self.statusBar().showMessage("Stopping...", 3000)
        if self.density_map.draw_mode:
            self.density_map.start_drawing(None)

    def _fit_done(self, tube: Tube, recipe, result, control) -> None:
        self._job_ended()
        if (tube.recipe.transforms != recipe.transforms or tube.recipe.compensation != recipe.compensation
                or list(tube.recipe.channels) != list(recipe.channels)):
            self.last_fit_problem = "the scales, channels or compensation changed during the fit"
            self.fit_panel.ended("Not used: the scales, channels or compensation changed during the fit. "
                                 "Fit again.")
            self.fitEnded.emit(False)
            return
        try:
            analysis = result
            tube.analysis = analysis
            tube.recipe.engine = dict(recipe.engine)
            tube.contours = None
            tube.control_path = control
            tube.update_rare()
            self.fit_panel.show_curve(getattr(analysis.model, "learning_curve_", None))
            self.fit_panel.ended(self._fit_text(analysis))
            if control:
                self.highlight_enriched = True
                self.contrast_panel.show_enriched.setEnabled(True)
                self.contrast_panel.show_enriched.setChecked(True)
            elif self.highlight_enriched:  # a plain fit has no new events to show
                self.contrast_panel.show_enriched.setChecked(False)
            if tube is self.current:
                self._recolour(tube)
                self._update_highlight()
                self._draw_contours(tube)
                self._refresh_regions(full=True)
                self._show_contrast_text(tube)
            self.tubes_list.mark(tube.path, "•")
        except Exception as exc:  # noqa: BLE001
            self.last_fit_problem = str(exc)
            show_error(self, "fit", exc)
            self.fitEnded.emit(False)
            return
        self.fitEnded.emit(True)
        if self.act_contours.isChecked() and tube is self.current:
            self.start_contours()

    #: How the fit panel names each first map of the engine (``base_``).
    BASE_NAMES = {"skewed": "skewed-mixture start", "gmm": "Gaussian-mixture start",
                  "logistic": "per-channel start"}

    def _fit_text(self, a) -> str:
        n_trees = getattr(a.model, "n_trees_", "?")
        start = self.BASE_NAMES.get(getattr(a.model, "base_", ""), "")
        secs = a.timing.get("total", float("nan")) if isinstance(a.timing, dict) else float("nan")
        return (f"Fitted: {start + ' + ' if start else ''}{n_trees} trees, held-out log-likelihood "
                f"{a.heldout_loglik:.3f} nats per event, "
                f"{a.cleaning_text()}, {secs:.1f} s.")

    def _fit_stopped(self) -> None:
        self._job_ended()
        self.last_fit_problem = "cancelled"
        tube = self.current
        self.fit_panel.ended("Cancelled: the previous state is kept." if tube and tube.analysis is not None
                             else "Cancelled: not fitted.")
        self.contrast_panel.ended("Contrast cancelled.")
        self.fitEnded.emit(False)

    def _job_failed(self, exc, tb) -> None:
        kind = self.job_kind
        self._job_ended()
        self.last_fit_problem = str(exc)
        if kind in ("fit", "contrast"):
            self.fit_panel.ended(f"The fit failed: {exc}")
            if kind == "contrast":
                self.contrast_panel.ended(f"The contrast failed: {exc}")
            show_error(self, "fit", exc, tb)
            self.fitEnded.emit(False)
        elif kind == "contours":
            self.fit_panel.status.setText(f"Contours failed: {exc}")
            show_error(self, "contours", exc, tb)
            self.contoursEnded.emit(False)
        else:
            show_error(self, kind, exc, tb)

    @guarded("contours")
    def toggle_contours(self) -> None:
        on = self.act_contours.isChecked()
        self.settings.set_value("view/contours", on)
        tube = self.current
        if on and tube is not None and tube.analysis is not None and tube.contours is None:
            self.start_contours()
        self.density_map.show_contours(on)

    def start_contours(self) -> bool:
        """Compute the contour lines of the plotted pairs in the background."""
        tube = self.current
        if tube is None or tube.analysis is None or self.fit_running():
            return False
        pairs = list(tube.pairs)
        extents = {p: self._extent(p) for p in pairs}
        analysis = tube.analysis

        def work(progress):
            return compute_contours(analysis, pairs, extents, progress)

        def done(contours):
            self._job_ended()
            tube.contours = contours
            if tube is self.current:
                self._draw_contours(tube)
            self.fit_panel.ended(self._fit_text(analysis))
            self.contoursEnded.emit(True)

        def stopped():
            self._job_ended()
            self.fit_panel.ended(self._fit_text(analysis))
            self.contoursEnded.emit(False)

        self.job_kind = "contours"
        self._start_job(work, done, stopped)
        self.fit_panel.status.setText("Drawing contours...")
        return True

    def _show_contrast_text(self, tube: Tube) -> None:
        self.contrast_panel.show_result(tube.analysis, tube.control_path)

    @guarded("contrast")
    def choose_control(self, path: str | None = None) -> None:
        if self.current is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if path is None:
            path, _ = QFileDialog.getOpenFileName(self, "Control tube", os.path.dirname(self.current.path),
                                                  "FCS files (*.fcs *.FCS);;All files (*)")
        if path:
            self.start_fit(control=path)

    def set_highlight_enriched(self, on: bool) -> None:
        self.highlight_enriched = bool(on)
        self._update_highlight()

    # ------------------------------------------------------------------ regions
    def arm_drawing(self, kind: str) -> None:
        if self.current is None:
            return
        self.density_map.start_drawing(kind)
        self.statusBar().showMessage("Click a plot to place the rectangle" if kind == "rectangle"
                                     else "Click the polygon's corners; double-click to close it", 6000)

    def _next_region_name(self, tube: Tube, stem: str = "Region") -> str:
        k = len(tube.regions) + 1
        while f"{stem} {k}" in tube.regions:
            k += 1
        return f"{stem} {k}"

    def _spec(self, tube: Tube, channel: str):
        return (tube.recipe.transforms or {}).get(channel)

    @guarded("add region")
    def _roi_drawn(self, kind: str, x_name: str, y_name: str, vertices) -> None:
        tube = self.current
        name = self._next_region_name(tube)
        self.add_region(self._geometry_dict(tube, name, kind, x_name, y_name, vertices))
        self.selections.select(name)
        self.notebook.setCurrentWidget(self.selections)

    def _geometry_dict(self, tube, name, kind, x_name, y_name, vertices) -> dict:
        d = {"name": name, "kind": kind, "channels": [x_name, y_name],
             "transforms": {x_name: self._spec(tube, x_name), y_name: self._spec(tube, y_name)}}
        v = np.asarray(vertices, dtype=np.float64)
        if kind == "rectangle":
            d["x"] = [float(v[:, 0].min()), float(v[:, 0].max())]
            d["y"] = [float(v[:, 1].min()), float(v[:, 1].max())]
        else:
            d["vertices"] = v.tolist()
        return d

    def add_region(self, region: dict):
        """Add a region (a core.regions dict) to the current tube; returns the Region."""
        from core.regions import region_from_dict

        tube = self.current
        r = region_from_dict(region)
        tube.regions.add(r)
        tube.dirty = True
        self._show_roi(r)
        self._refresh_regions(full=True)
        return r

    def _show_roi(self, r) -> None:
        if r.kind == "rectangle":
            verts = [(r.x[0], r.y[0]), (r.x[1], r.y[1])]
        elif r.kind == "polygon":
            verts = list(r.vertices)
        else:
            return
        self.density_map.add_roi(r.name, r.kind, r.channels[0], r.channels[1], verts, r.name)

    def _roi_moving(self, name: str, vertices) -> None:
        self._pending_roi = (name, vertices)
        if not self._drag_timer.isActive():
            self._drag_timer.start()

    def _roi_moved(self, name: str, vertices) -> None:
        self._pending_roi = (name, vertices)
        self._apply_pending_roi(final=True)

    def _apply_pending_roi(self, final: bool = False) -> None:
        if self._pending_roi is None or self.current is None:
            return
        name, vertices = self._pending_roi
        self._pending_roi = None
        tube = self.current
        if name not in tube.regions:
            return
        r = tube.regions[name]
        try:
            d = self._geometry_dict(tube, name, r.kind, r.channels[0], r.channels[1], vertices)
            d["parent"] = r.parent
            d["transforms"] = dict(r.transforms)
            from core.regions import region_from_dict

            tube.regions.replace(region_from_dict(d))
        except RegionError as exc:  # e.g. a polygon squashed flat while dragging: keep the last good one
            self.statusBar().showMessage(str(exc), 4000)
            return
        tube.dirty = True
        if not final and tube.update_region(name):
            self.selections.update_counts(tube.stats)  # dependants follow when the drag ends
        else:
            self._refresh_regions()

    def _refresh_regions(self, full: bool = False) -> None:
        tube = self.current
        if tube is None:
            return
        tube.update_regions()
        if full:
            self.selections.show_regions(list(tube.regions), tube.stats)
        else:
            self.selections.update_counts(tube.stats)

    @guarded("rename region")
    def rename_region(self, old: str, new: str) -> None:
        tube = self.current
        try:
            tube.regions.rename(old, new)
        except RegionError:
            self._refresh_regions(full=True)  # put the old name back in the table
            raise
        self.density_map.remove_roi(old)
        self._show_roi(tube.regions[new])
        tube.dirty = True
        self._refresh_regions(full=True)

    def delete_selected_regions(self) -> None:
        self.delete_regions(self.selections.selected_names())

    @guarded("delete region")
    def delete_regions(self, names) -> None:
        tube = self.current
        if tube is None or not names:
            return
        # remove dependants last-first so references stay valid
        for name in sorted(names, key=lambda n: -tube.regions.names.index(n)):
            tube.regions.remove(name)
            self.density_map.remove_roi(name)
        tube.dirty = True
        self._refresh_regions(full=True)

    @guarded("combine regions")
    def combine_regions(self, operator: str, names) -> None:
        tube = self.current
        if tube is None:
            return
        if operator == "not" and len(names) != 1:
            raise RegionError("choose exactly one region to take its complement (not)")
        if operator != "not" and len(names) < 2:
            raise RegionError("choose two or more regions to combine (hold Ctrl to select several)")
        word = {"and": " and ", "or": " or "}.get(operator, "")
        name = ("not " + names[0]) if operator == "not" else word.join(names)
        if name in tube.regions:
            name = self._next_region_name(tube, name)
        self.add_region({"name": name, "kind": operator, "operands": list(names)})

    @guarded("keep rare events")
    def keep_rare_region(self, share: float) -> None:
        """A rarity region holding the events highlighted as rare (the share on the Rarity bar)."""
        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if tube.analysis is None:
            raise BoscageError("fit the density first (Ctrl+F): rare events are ranked by it")
        rare = tube.rare_mask
        if rare is None or not rare.any():
            raise BoscageError("no events are highlighted as rare at this share; raise it first")
        # the rarity percentile of the densest highlighted event: the region then holds
        # exactly the highlighted events (percentile <= share x 100 can hold one more)
        percentile = float(np.nanmax(tube.analysis.rarity[rare]))
        name = f"rarest {share * 100:.3g} %"
        if name in tube.regions:
            name = self._next_region_name(tube, name)
        self.add_region({"name": name, "kind": "rarity", "percentile": percentile})
        self.selections.select(name)

    @guarded("keep new events")
    def keep_enriched_region(self) -> None:
        """An "enriched" region holding the events new against the control (the contrast's enriched mask)."""
        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        a = tube.analysis
        if a is None or a.enriched is None:
            raise BoscageError("contrast the tube with a control first (Ctrl+K)")
        control = os.path.basename(tube.control_path or a.info.get("control", "") or "") or None
        stem = os.path.splitext(control)[0] if control else "control"
        name = f"new vs {stem}"
        if name in tube.regions:
            name = self._next_region_name(tube, name)
        self.add_region({"name": name, "kind": "enriched", "control": control})
        self.selections.select(name)
        self.notebook.setCurrentWidget(self.selections)

    def region_count(self, name: str) -> int:
        """Events in a region of the current tube, as the Selections panel shows."""
        for s in self.current.stats:
            if s.name == name:
                return int(s.count)
        raise RegionError(f"there is no region named {name!r}")

    # ------------------------------------------------------------------ export, recipes, batch
    @guarded("export")
    def export_dialog(self) -> None:
        from desktop.dialogs import ExportDialog

        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        dlg = ExportDialog(self, tube, self.selections.selected_names())
        dlg.exec()

    @guarded("save recipe")
    def save_recipe_dialog(self, path: str | None = None) -> str | None:
        from core.recipe import save_recipe

        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if path is None:
            start = os.path.join(self.settings.value("folders/recipe", os.path.dirname(tube.path)),
                                 f"{os.path.splitext(os.path.basename(tube.path))[0]}.recipe.json")
            path, _ = QFileDialog.getSaveFileName(self, "Save recipe", start, "Recipes (*.json)")
            if not path:
                return None
        recipe = self._current_recipe(tube)
        save_recipe(recipe, path, overwrite=True)  # the dialog asked before replacing
        self.settings.set_value("folders/recipe", os.path.dirname(path))
        for t in self.tubes.values():
            if t is tube:
                t.dirty = False
        self.statusBar().showMessage(f"Recipe saved: {path}", 6000)
        return path

    @guarded("load recipe")
    def load_recipe_dialog(self, path: str | None = None) -> None:
        from core.recipe import load_recipe, validate_recipe

        tube = self.current
        if tube is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if path is None:
            path, _ = QFileDialog.getOpenFileName(self, "Load recipe", self.settings.value("folders/recipe", ""),
                                                  "Recipes (*.json);;All files (*)")
            if not path:
                return
        recipe = load_recipe(path)
        validate_recipe(recipe, tube.event_file)
        for name in list(tube.regions.names)[::-1]:
            self.density_map.remove_roi(name)
        tube.recipe = recipe
        tube.regions = recipe.region_set()
        if (recipe.rare or {}).get("rule") == "share":
            tube.share = float(recipe.rare["share"])
        tube.recompute_values()
        tube.pairs = default_pairs(tube.names, recipe.channels)
        tube.dirty = False
        self._invalidate_fit(tube, "Recipe loaded: fit the density to apply it.")
        self.show_tube(tube)
        self.statusBar().showMessage(f"Recipe loaded: {path}", 6000)

    @guarded("batch")
    def batch_dialog(self) -> None:
        from desktop.dialogs import BatchDialog

        recipe = self._current_recipe(self.current) if self.current is not None else None
        dlg = BatchDialog(self, recipe)
        dlg.exec()

    @guarded("about")
    def about(self) -> None:
        QMessageBox.about(self, f"About {SOFTWARE_NAME}",
                          f"<h3>{SOFTWARE_NAME} {__version__}</h3>"
                          "<p>Flow cytometry events seen through an additive tree density, learned by "
                          "unsupervised tree boosting: density maps, rare events, regions, contrast "
                          "with a control, batches over folders.</p>"
                          f"<p><b>{RESEARCH_USE_NOTE}</b></p>")

    # ------------------------------------------------------------------ closing
    def closeEvent(self, event) -> None:
        dirty = [t for t in self.tubes.values() if t.dirty and len(t.regions)]
        if dirty and not self.discard_changes:
            names = ", ".join(os.path.basename(t.path) for t in dirty)
            answer = QMessageBox.question(
                self, f"{SOFTWARE_NAME}: unsaved regions",
                f"Regions drawn on {names} are not saved in a recipe. Close anyway and lose them?",
                QMessageBox.Discard | QMessageBox.Cancel, QMessageBox.Cancel)
            if answer != QMessageBox.Discard:
                event.ignore()
                return
        if self.job is not None:
            self.job.cancel()
            self.job.wait(20000)
        if self.interactive:
            self.settings.set_value("window/geometry", self.saveGeometry())
        self.settings.sync()
        event.accept()


def compute_contours(analysis, pairs, extents, progress=None) -> list:
    """Highest-density-region contour lines (50/90/99 %) for each plotted pair.

    Each pair gets a small 2-D additive tree density fitted by
    :func:`core.contours.pair_density` to at most ``CONTOUR_EVENTS`` kept
    events (fixed seed).  Returns [((ix, iy), lines)]."""
    from core.contours import pair_density
    from core.progress import keep_going

    kept = np.flatnonzero(analysis.reason == "")
    if kept.size > CONTOUR_EVENTS:
        kept = np.sort(np.random.default_rng(0).choice(kept, CONTOUR_EVENTS, replace=False))
    out = []
    for k, (ix, iy) in enumerate(pairs):
        if not keep_going(progress, k, len(pairs), {"stage": f"Contours {k + 1} of {len(pairs)}"}):
            break
        xy = analysis.values[kept][:, [ix, iy]]
        ext = extents.get((ix, iy))
        kw = {} if ext is None else {"x_range": ext[:2], "y_range": ext[2:]}
        pd = pair_density(xy, grid_size=64, engine=CONTOUR_ENGINE, n_level_samples=CONTOUR_LEVEL_SAMPLES, **kw)
        levels = [pd.levels[m] for m in sorted(pd.levels)]
        out.append(((ix, iy), contour_lines(pd.log_density, pd.x_centres, pd.y_centres, levels)))
    return out
