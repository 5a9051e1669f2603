"""Edits of the current tube made through panels and dialogs: scales and
density channels, compensation, plotted pairs, recipes, export and batch.
The session makes each change (:mod:`core.session`); this controller asks
the questions, then redraws."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import QObject, QStandardPaths
from PySide6.QtWidgets import QFileDialog

from core.compensation import read_spillover_csv
from core.recipe import save_recipe
from desktop.dialogs import BatchDialog, ExportDialog, PairsDialog
from desktop.messages import guarded


class EditsController(QObject):
    def __init__(self, window) -> None:
        super().__init__(window)
        self.win = window
        window.channels_panel.changed.connect(self.scales_changed)
        window.channels_panel.pairsRequested.connect(self.choose_pairs)
        window.channels_panel.applyAllRequested.connect(self.apply_scale_to_all)
        window.comp_panel.applyRequested.connect(self.apply_compensation)
        window.comp_panel.loadCsvRequested.connect(self.load_spillover_csv)

    @property
    def session(self):
        return self.win.session

    def _discarded(self, tube, reason: str) -> None:
        """A fit was discarded: clear the tube's fitted mark and say why."""
        if not reason:
            return
        self.win.tubes_list.mark(tube.path, "")
        self.win.fit_panel.show_curve([])
        self.win.fit_panel.ended(reason)
        self.win.statusBar().showMessage(reason, 8000)

    # -- scales ------------------------------------------------------------------
    @guarded("change scales")
    def scales_changed(self) -> None:
        tube = self.session.current
        if tube is None:
            return
        panel = self.win.channels_panel
        reason = self.session.set_scales(panel.specs(), panel.fit_channels())
        if reason:
            self._discarded(tube, reason)
            self.win.map_view.draw_map(tube)

    @guarded("apply scale to all")
    def apply_scale_to_all(self, channel: str) -> None:
        tube = self.session.require()
        reason = self.session.apply_scale_to_all(channel)
        if reason:
            self._discarded(tube, reason)
        self.win.show_tube(tube)

    # -- compensation --------------------------------------------------------------
    @guarded("compensation")
    def apply_compensation(self, source: str, edited) -> None:
        tube = self.session.require()
        reason = self.session.set_compensation(source, edited, csv_path=self.win.comp_panel.csv_path,
                                               matrix_folder=self._matrix_folder())
        if edited is not None:
            self.win.statusBar().showMessage(f"Edited matrix saved as {tube.recipe.compensation.csv_path}", 8000)
        self._discarded(tube, reason)
        self.win.show_tube(tube)

    @staticmethod
    def _matrix_folder() -> str:
        base = QStandardPaths.writableLocation(QStandardPaths.AppDataLocation) or os.path.expanduser("~/.boscage")
        folder = os.path.join(base, "matrices")
        os.makedirs(folder, exist_ok=True)
        return folder

    @guarded("load spillover CSV")
    def load_spillover_csv(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self.win, "Spillover matrix (CSV)",
                                              self.win.settings.value("folders/open", ""),
                                              "CSV files (*.csv *.txt);;All files (*)")
        if path:
            self.win.comp_panel.show_matrix("csv", read_spillover_csv(path), path)

    # -- pairs ---------------------------------------------------------------------
    @guarded("plot pairs")
    def choose_pairs(self) -> None:
        tube = self.session.require()
        dlg = PairsDialog(self.win, tube)
        if dlg.exec():
            self.set_pairs(dlg.pairs())

    def set_pairs(self, pairs) -> None:
        """Show these (x, y) pairs (channel names or labels); contours follow."""
        tube = self.session.current
        self.session.set_pairs(pairs)
        self.win.map_view.draw_map(tube)
        if tube.analysis is not None and self.win.act_contours.isChecked():
            self.win.fitting.start_contours()

    # -- recipes -------------------------------------------------------------------
    @guarded("save recipe")
    def save_recipe(self, path: str | None = None) -> str | None:
        tube = self.session.require()
        if path is None:
            start = os.path.join(self.win.settings.value("folders/recipe", os.path.expanduser("~")),
                                 f"{os.path.splitext(os.path.basename(tube.path))[0]}.recipe.json")
            path, _ = QFileDialog.getSaveFileName(self.win, "Save recipe", start, "Recipes (*.json)")
            if not path:
                return None
        save_recipe(self.win.fitting.recipe_for_fit(tube), path, overwrite=True)  # the dialog asked
        self.win.settings.set_value("folders/recipe", os.path.dirname(path))
        tube.dirty = False
        self.win.statusBar().showMessage(f"Recipe saved: {path}", 6000)
        return path

    @guarded("load recipe")
    def load_recipe(self, path: str | None = None) -> None:
        tube = self.session.require()
        if path is None:
            path, _ = QFileDialog.getOpenFileName(self.win, "Load recipe", self.win.settings.value("folders/recipe", ""),
                                                  "Recipes (*.json);;All files (*)")
            if not path:
                return
        self.session.load_recipe(path)
        self.win.tubes_list.mark(tube.path, "")
        self.win.show_tube(tube)
        self.win.statusBar().showMessage(f"Recipe loaded: {path}; fit the density to apply it.", 6000)

    # -- export and batch --------------------------------------------------------------
    @guarded("export")
    def export(self) -> None:
        tube = self.session.require()
        ExportDialog(self.win, tube, self.win.selections.selected_names(), self.win.settings).exec()

    @guarded("batch")
    def batch(self) -> None:
        tube = self.session.current
        recipe = self.win.fitting.recipe_for_fit(tube) if tube is not None else None
        BatchDialog(self.win, recipe, folder=os.path.dirname(tube.path) if tube is not None else "",
                    control=tube.control_path if tube is not None else None).exec()

