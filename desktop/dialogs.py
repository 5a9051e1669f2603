"""Dialogs: export selected events, run a recipe over a folder, choose plot pairs."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import csv
import os

import numpy as np
from PySide6.QtCore import QStandardPaths, Qt, QUrl, Signal
from PySide6.QtGui import QDesktopServices
from PySide6.QtWidgets import (QComboBox, QDialog, QDialogButtonBox, QFileDialog, QFormLayout, QHBoxLayout,
                               QHeaderView, QLabel, QLineEdit, QProgressBar, QPushButton, QSpinBox,
                               QMessageBox, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget, QCheckBox)

from core import RESEARCH_USE_NOTE
from core.batch import output_folder_names, run_batch
from core.errors import ExportError, RecipeError
from core.files import list_fcs_files
from core.naming import events_file_name, file_part

#: Readable headers for the batch summary's columns (the CSV keeps its names).
SUMMARY_HEADERS = {"file": "File", "status": "Status", "events": "Events", "events_kept": "Events kept",
                   "rare_events": "Rare events", "rare_percent": "Rare %", "heldout_loglik": "Fit score",
                   "seconds": "Seconds", "message": "Message", "enriched": "Enriched events"}


def summary_header(column: str) -> str:
    """What the batch table calls a summary.csv column."""
    if column.startswith("region:"):
        return f"{column.split(':', 1)[1]} (events)"
    return SUMMARY_HEADERS.get(column, column.replace("_", " ").capitalize())


def file_stem(text: str) -> str:
    """A file-name part from free text by the one naming rule of core.naming."""
    return file_part(text, "events")


def default_folder(settings) -> str:
    """The last export folder, else the documents folder, else home (never
    beside the input file)."""
    last = settings.value("folders/export", "") if settings is not None else ""
    if last and os.path.isdir(last):
        return last
    docs = QStandardPaths.writableLocation(QStandardPaths.DocumentsLocation)
    return docs if docs and os.path.isdir(docs) else os.path.expanduser("~")

from desktop.messages import guarded, show_error
from desktop.workers import Job
from core.export import export_events_csv, export_events_fcs
from core.recipe import recipe_digest
from core.contrast import contrast_keywords


def _path_row(parent: QWidget, edit: QLineEdit, choose) -> QWidget:
    w = QWidget(parent)
    lay = QHBoxLayout(w)
    lay.setContentsMargins(0, 0, 0, 0)
    lay.addWidget(edit, 1)
    b = QPushButton("Choose...")
    b.setProperty("flat", True)
    b.clicked.connect(choose)
    lay.addWidget(b)
    return w


class ExportDialog(QDialog):
    """Choose which events (all, rare, enriched, a region) and where to write them."""

    def __init__(self, parent, tube, selected_regions=(), settings=None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Export events")
        self.tube = tube
        self.settings = settings
        lay = QVBoxLayout(self)
        form = QFormLayout()
        self.which = QComboBox()
        self.which.addItem(f"All events ({tube.n_events:,})", "all")
        if tube.rare_mask is not None:
            self.which.addItem(f"Rare events ({int(tube.rare_mask.sum()):,})", "rare")
        a = tube.analysis
        if a is not None and a.enriched is not None:
            self.which.addItem(f"Enriched events ({int(a.enriched.sum()):,})", "enriched")
        for s in tube.stats:
            self.which.addItem(f"{s.name} ({s.count:,})", "region:" + s.name)
        if selected_regions:
            i = self.which.findData("region:" + selected_regions[0])
            if i >= 0:
                self.which.setCurrentIndex(i)
        self.which.setToolTip("Which events to write")
        self.format = QComboBox()
        self.format.addItem("FCS 3.1 (instrument values + added columns)", "fcs")
        self.format.addItem("CSV (transformed values + added columns)", "csv")
        self.format.setToolTip("FCS keeps the recorded (uncompensated) values and the file's spillover "
                               "keyword; CSV holds the values as plotted")
        self.folder = default_folder(settings)
        self.path = QLineEdit()
        self.path.setMinimumWidth(440)  # the proposed name is read whole, not from its middle
        self.which.currentIndexChanged.connect(self._propose_name)
        self._propose_name()
        form.addRow("Events", self.which)
        form.addRow("Format", self.format)
        form.addRow("File", _path_row(self, self.path, self._choose))
        lay.addLayout(form)
        note = QLabel(RESEARCH_USE_NOTE)
        note.setObjectName("Note")
        note.setWordWrap(True)
        lay.addWidget(note)
        buttons = QDialogButtonBox(QDialogButtonBox.Save | QDialogButtonBox.Cancel)
        buttons.accepted.connect(self.export)
        buttons.rejected.connect(self.reject)
        lay.addWidget(buttons)
        self.format.currentIndexChanged.connect(self._format_changed)
        self.written: str | None = None

    def _propose_name(self) -> None:
        """``<input stem>_<what>.<ext>`` (core.naming's rule, as the batch names its files) in the last
        export folder."""
        stem = os.path.splitext(os.path.basename(self.tube.path))[0]
        kind, _, name = str(self.which.currentData()).partition(":")
        part = file_stem(name) if kind == "region" else None
        ext = "csv" if getattr(self, "format", None) is not None and self.format.currentData() == "csv" else "fcs"
        self.path.setText(os.path.join(self.folder, events_file_name(file_stem(stem), kind, part, ext)))

    def _format_changed(self) -> None:
        stem, _ = os.path.splitext(self.path.text())
        self.path.setText(stem + (".fcs" if self.format.currentData() == "fcs" else ".csv"))

    def _choose(self) -> None:
        ext = self.format.currentData()
        path, _ = QFileDialog.getSaveFileName(self, "Export events", self.path.text(),
                                              "FCS files (*.fcs)" if ext == "fcs" else "CSV files (*.csv)")
        if path:
            self.path.setText(path)
            self._overwrite = True  # the system dialog asked before replacing

    def mask(self):
        kind, _, name = str(self.which.currentData()).partition(":")
        t = self.tube
        if kind == "all":
            return np.ones(t.n_events, dtype=bool)
        if kind == "rare":
            return t.rare_mask
        if kind == "enriched":
            return t.analysis.enriched
        return t.masks[name]

    @guarded("export")
    def export(self) -> None:
        path = self.path.text().strip()
        if not path:
            raise ExportError("choose a file to write")
        t = self.tube
        mask = self.mask()
        extra = {} if t.analysis is None else t.analysis.export_columns()
        for name, m in t.masks.items():
            extra[f"region {name}"] = np.asarray(m, dtype=float)
        overwrite = getattr(self, "_overwrite", False)
        if not overwrite and os.path.exists(path):
            answer = QMessageBox.question(self, "Replace file?", f"{os.path.basename(path)} exists already in "
                                          f"{os.path.dirname(path)}. Replace it?",
                                          QMessageBox.Yes | QMessageBox.No, QMessageBox.No)
            if answer != QMessageBox.Yes:
                return
            overwrite = True
        if self.format.currentData() == "fcs":
            digest = recipe_digest(t.recipe_with_regions())
            a = t.analysis
            kw = None
            if a is not None and getattr(a, "contrast", None) is not None:  # name the control and the rate

                kw = contrast_keywords(a.contrast, t.control_path or a.info.get("control"))
            self.written = export_events_fcs(path, t.event_file, mask, extra, digest, overwrite=overwrite,
                                             missing_value=0.0, extra_keywords=kw)
        else:
            self.written = export_events_csv(path, t.names, t.values, mask, extra, overwrite=overwrite,
                                             source_paths=[t.path])
        if self.settings is not None:
            self.settings.set_value("folders/export", os.path.dirname(os.path.abspath(self.written)))
        parent = self.parent()
        if parent is not None and hasattr(parent, "statusBar"):
            parent.statusBar().showMessage(f"Wrote {int(np.count_nonzero(mask)):,} events to {self.written}", 8000)
        self.accept()


class BatchDialog(QDialog):
    """Run the current recipe over every FCS file of a folder, with progress and a summary."""

    ended = Signal(bool)

    def __init__(self, parent, recipe, folder: str = "", control: str | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Run a recipe over a folder")
        self.resize(760, 520)
        self.recipe = recipe
        self.job: Job | None = None
        self.result = None
        lay = QVBoxLayout(self)
        form = QFormLayout()
        self.input = QLineEdit()
        self.output = QLineEdit()
        self.control = QLineEdit()
        self.control.setPlaceholderText("optional: contrast every file with this control tube")
        self.workers = QSpinBox()
        self.workers.setRange(1, max(1, os.cpu_count() or 1))
        self.workers.setValue(max(1, os.cpu_count() or 1))  # the command line's default: every core
        self.workers.setToolTip("Files analysed at the same time (one process each); the command line "
                                "uses every core unless told otherwise")
        self.force = QCheckBox("Redo files already finished in the output folder")
        form.addRow("FCS folder", _path_row(self, self.input, self._choose_input))
        form.addRow("Output folder", _path_row(self, self.output, self._choose_output))
        form.addRow("Control tube", _path_row(self, self.control, self._choose_control))
        form.addRow("Parallel files", self.workers)
        form.addRow("", self.force)
        lay.addLayout(form)
        self.files_label = QLabel("")
        self.files_label.setObjectName("Note")
        self.files_label.setWordWrap(True)
        lay.addWidget(self.files_label)
        self.input.textChanged.connect(self._list_files)
        self.control.textChanged.connect(self._list_files)
        self.recipe_label = QLabel("Recipe: the current tube's recipe (channels, scales, compensation, "
                                   "engine, rarity and regions)" if recipe is not None else
                                   "Recipe: the default recipe of the folder's first file")
        self.recipe_label.setObjectName("Note")
        self.recipe_label.setWordWrap(True)
        lay.addWidget(self.recipe_label)
        self.progress = QProgressBar()
        lay.addWidget(self.progress)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        lay.addWidget(self.status)
        self.table = QTableWidget(0, 0)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.verticalHeader().setVisible(False)
        lay.addWidget(self.table, 1)
        row = QHBoxLayout()
        self.run_button = QPushButton("Run")
        self.stop_button = QPushButton("Stop")
        self.stop_button.setEnabled(False)
        self.open_csv = QPushButton("Open summary CSV")
        self.open_csv.setEnabled(False)
        self.close_button = QPushButton("Close")
        for b in (self.run_button, self.stop_button, self.open_csv):
            row.addWidget(b)
        row.addStretch(1)
        row.addWidget(self.close_button)
        lay.addLayout(row)
        note = QLabel(RESEARCH_USE_NOTE)
        note.setObjectName("Note")
        lay.addWidget(note)
        if folder:
            self.input.setText(folder)
            self.output.setText(os.path.join(os.path.dirname(folder), os.path.basename(folder) + "-boscage"))
        if control:
            self.control.setText(control)
        self.run_button.clicked.connect(self.run)
        self.stop_button.clicked.connect(self.stop)
        self.open_csv.clicked.connect(self.open_summary)
        self.close_button.clicked.connect(self.close)

    def _list_files(self) -> None:
        """Say which files will run, and that the control is the reference, not analysed."""
        folder = self.input.text().strip()
        files = list_fcs_files(folder) if folder and os.path.isdir(folder) else []
        control = os.path.abspath(self.control.text().strip()) if self.control.text().strip() else None
        runs = [f for f in files if f != control]
        text = f"{len(runs)} FCS file(s) will be analysed: " + ", ".join(os.path.basename(f) for f in runs[:8])
        text += " ..." if len(runs) > 8 else ""
        if control and control in files:
            text += (f". The control {os.path.basename(control)} is in this folder: it is the reference every "
                     "file is compared with, so it is not analysed itself.")
        if runs:
            # the batch's own naming rule (core.batch.output_folder_names), not one of ours
            name = output_folder_names(runs).get(os.path.basename(runs[0]))
            if name:
                text += ("" if text.endswith(".") else ".") + (
                    f" Each file gets a folder of results named by the batch, e.g. {name}/ with "
                    f"'{events_file_name(name, 'rare')}' and one file per region.")
        self.files_label.setText(text if files else ("No FCS files in this folder." if folder else ""))
        self._n_files = len(runs)

    def _choose_input(self) -> None:
        d = QFileDialog.getExistingDirectory(self, "Folder of FCS files", self.input.text())
        if d:
            self.input.setText(d)
            if not self.output.text():
                self.output.setText(os.path.join(os.path.dirname(d), os.path.basename(d) + "-boscage"))

    def _choose_output(self) -> None:
        d = QFileDialog.getExistingDirectory(self, "Output folder", self.output.text())
        if d:
            self.output.setText(d)

    def _choose_control(self) -> None:
        p, _ = QFileDialog.getOpenFileName(self, "Control tube", self.input.text(), "FCS files (*.fcs *.FCS)")
        if p:
            self.control.setText(p)

    @guarded("batch")
    def run(self) -> None:
        src, out = self.input.text().strip(), self.output.text().strip()
        if not src or not out:
            raise RecipeError("choose the folder of FCS files and an output folder")
        control = self.control.text().strip() or None
        recipe = self.recipe
        workers = int(self.workers.value())
        force = self.force.isChecked()

        def work(progress):
            return run_batch(src, out, recipe=recipe, control=control, workers=workers, force=force,
                             progress=progress)

        self.job = Job(work, "batch", self)
        self.job.progressed.connect(self._progress)
        self.job.finished.connect(self._done)
        self.job.cancelled.connect(lambda: self._stopped("Stopped."))
        self.job.failed.connect(self._failed)
        self.run_button.setEnabled(False)
        self.stop_button.setEnabled(True)
        self.progress.setRange(0, 0)
        self.status.setText("Starting: reading the recipe and the first file..."
                            if control is None else "Starting: preparing the control (fitting its density)...")
        self.job.start()

    def stop(self) -> None:
        if self.job is not None:
            self.job.cancel()
            self.status.setText("Stopping after the files in progress...")

    def _progress(self, done, total, row) -> None:
        if total:
            self.progress.setRange(0, int(total))
            self.progress.setValue(int(done))
        if isinstance(row, dict):
            self.status.setText(f"{done} of {total} files done; last: {row.get('file', '')} — "
                                f"{'skipped (finished earlier)' if row.get('skipped') else row.get('status', '')}. "
                                + ("Working on the others..." if done < (total or 0) else ""))
        elif self.control.text().strip() and done == 0:
            self.status.setText(f"0 of {total} files done: preparing the control (fitting its density), "
                                "then the files in parallel...")
        else:
            self.status.setText(f"{done} of {total} files done; fitting the densities of the others...")

    def _done(self, result) -> None:
        self.result = result
        self.run_button.setEnabled(True)
        self.stop_button.setEnabled(False)
        self.progress.setRange(0, 1)
        self.progress.setValue(1)
        ok = sum(1 for r in result.rows if r.get("status") == "ok")
        self.status.setText(f"{ok} of {len(result.rows)} files analysed in {result.seconds:.1f} s"
                            + (" (stopped early)" if result.interrupted else "")
                            + f". Summary: {result.summary_path}")
        self.show_summary(result.summary_path)
        self.open_csv.setEnabled(True)
        self.job = None
        self.ended.emit(True)

    def _stopped(self, text: str) -> None:
        self.run_button.setEnabled(True)
        self.stop_button.setEnabled(False)
        self.progress.setRange(0, 1)
        self.status.setText(text)
        self.job = None
        self.ended.emit(False)

    def _failed(self, exc, tb) -> None:
        self._stopped(f"The batch failed: {exc}")
        show_error(self, "batch", exc, tb)

    def show_summary(self, path: str) -> None:
        """Fill the table from the summary CSV the batch wrote."""
        with open(path, newline="", encoding="utf-8") as handle:
            rows = [r for r in csv.reader(handle) if r and not r[0].startswith("#")]
        if not rows:
            return
        header, body = rows[0], rows[1:]
        # status right after the file name, so it is seen without scrolling
        order = list(range(len(header)))
        if "status" in header and "file" in header:
            order.remove(header.index("status"))
            order.insert(header.index("file") + 1, header.index("status"))
        self.table.setColumnCount(len(header))
        self.table.setHorizontalHeaderLabels([summary_header(header[j]) for j in order])
        self.table.setRowCount(len(body))
        for i, r in enumerate(body):
            r = [r[j] if j < len(r) else "" for j in order]
            for j, text in enumerate(r):
                item = QTableWidgetItem(text)
                item.setFlags(Qt.ItemIsSelectable | Qt.ItemIsEnabled)
                self.table.setItem(i, j, item)

    def open_summary(self) -> None:
        if self.result is not None:
            QDesktopServices.openUrl(QUrl.fromLocalFile(self.result.summary_path))

    def closeEvent(self, event) -> None:
        if self.job is not None:
            self.job.cancel()
            self.job.wait(30000)
        event.accept()


class PairsDialog(QDialog):
    """Choose the channel pairs of the density map from lists showing each
    channel's label and name."""

    def __init__(self, parent, tube, limit: int = 9) -> None:
        super().__init__(parent)
        self.setWindowTitle("Plot pairs")
        self.tube = tube
        self.limit = limit
        lay = QVBoxLayout(self)
        note = QLabel(f"Each row is one plot: horizontal and vertical channel (at most {limit}). "
                      "Contours are drawn for every plot once the density is fitted.")
        note.setWordWrap(True)
        note.setObjectName("Note")
        lay.addWidget(note)
        self.rows: list[tuple[QComboBox, QComboBox]] = []
        self.form = QFormLayout()
        lay.addLayout(self.form)
        for ix, iy in tube.pairs:
            self._add_row(ix, iy)
        row = QHBoxLayout()
        self.add_button = QPushButton("Add a plot")
        self.remove_button = QPushButton("Remove the last")
        row.addWidget(self.add_button)
        row.addWidget(self.remove_button)
        row.addStretch(1)
        lay.addLayout(row)
        buttons = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay.addWidget(buttons)
        self.add_button.clicked.connect(lambda: self._add_row(0, min(1, len(tube.names) - 1)))
        self.remove_button.clicked.connect(self._remove_row)

    def _combo(self, index: int) -> QComboBox:
        box = QComboBox()
        for name, label in zip(self.tube.names, self.tube.labels):
            box.addItem(f"{label} ({name})" if label and label != name else name, name)
        box.setCurrentIndex(index)
        return box

    def _add_row(self, ix: int, iy: int) -> None:
        if len(self.rows) >= self.limit:
            return
        x, y = self._combo(ix), self._combo(iy)
        w = QWidget()
        h = QHBoxLayout(w)
        h.setContentsMargins(0, 0, 0, 0)
        h.addWidget(x, 1)
        h.addWidget(QLabel("against"))
        h.addWidget(y, 1)
        self.form.addRow(f"Plot {len(self.rows) + 1}", w)
        self.rows.append((x, y))

    def _remove_row(self) -> None:
        if len(self.rows) > 1:
            self.rows.pop()
            self.form.removeRow(self.form.rowCount() - 1)

    def pairs(self) -> list[tuple[str, str]]:
        """The chosen (x, y) channel names ($PnN), in order."""
        return [(x.currentData(), y.currentData()) for x, y in self.rows]
