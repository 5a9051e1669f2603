"""The "Spillover" panel: view, load (CSV) and edit the compensation matrix.

The matrix itself and its application are :mod:`core.compensation`'s; this
panel edits numbers and tells the window which matrix the recipe should use.
An edited matrix is saved as a CSV file (the recipe refers to matrices by
source: the file's keyword, a CSV file, or none).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

import numpy as np
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QAbstractItemView, QComboBox, QHBoxLayout, QHeaderView, QLabel, QPushButton,
                               QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from core.compensation import SpilloverMatrix, read_spillover_csv, spillover_from_keywords
from core.errors import BoscageError, CompensationError

SOURCES = [("none", "No compensation"), ("file", "The file's spillover keyword"), ("csv", "A CSV file")]


class CompensationPanel(QWidget):
    """Matrix table with a source chooser; ``applyRequested(source, matrix_or_None)``."""

    applyRequested = Signal(str, object)
    loadCsvRequested = Signal()

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        head = QLabel("Spillover and compensation")
        head.setObjectName("Heading")
        lay.addWidget(head)
        note = QLabel("Row = fluorochrome, column = detector: the share of each fluorochrome's light "
                      "each detector sees (1 on the diagonal). Compensated = observed × inverse(matrix).")
        note.setObjectName("Note")
        note.setWordWrap(True)
        lay.addWidget(note)
        row = QHBoxLayout()
        self.source = QComboBox()
        for key, text in SOURCES:
            self.source.addItem(text, key)
        self.source.setToolTip("Where the spillover matrix comes from")
        self.load_button = QPushButton("Load CSV...")
        self.load_button.setToolTip("Read a spillover matrix from a CSV file: a header of detector "
                                    "names, then one row per fluorochrome")
        row.addWidget(self.source, 1)
        row.addWidget(self.load_button)
        lay.addLayout(row)
        self.table = QTableWidget(0, 0)
        self.table.setEditTriggers(QAbstractItemView.DoubleClicked | QAbstractItemView.EditKeyPressed
                                   | QAbstractItemView.AnyKeyPressed)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.setToolTip("Double-click a value to edit it; Apply recomputes the plots")
        lay.addWidget(self.table, 1)
        self.info = QLabel("")
        self.info.setObjectName("Note")
        self.info.setWordWrap(True)
        lay.addWidget(self.info)
        self.apply_button = QPushButton("Apply compensation")
        self.apply_button.setToolTip("Use this matrix for the tube: the density map and regions update "
                                     "(the density must be fitted again)")
        lay.addWidget(self.apply_button)
        self._detectors: list[str] = []
        self._edited = False
        self._filling = False
        self.csv_path: str | None = None
        self.table.itemChanged.connect(self._edited_cell)
        self.load_button.clicked.connect(self.loadCsvRequested)
        self.apply_button.clicked.connect(self._apply)

    def show_matrix(self, source: str, S, csv_path: str | None = None) -> None:
        """Show the matrix in use (``S`` a SpilloverMatrix or None)."""
        self._filling = True
        try:
            self.source.setCurrentIndex(max(0, self.source.findData(source)))
            self.csv_path = csv_path
            if S is None:
                self._detectors = []
                self.table.setRowCount(0)
                self.table.setColumnCount(0)
                self.info.setText("No spillover matrix in use." if source == "none"
                                  else "The file carries no spillover matrix.")
            else:
                self._detectors = list(S.detectors)
                k = len(self._detectors)
                self.table.setRowCount(k)
                self.table.setColumnCount(k)
                self.table.setHorizontalHeaderLabels(self._detectors)
                self.table.setVerticalHeaderLabels(self._detectors)
                m = np.asarray(S.matrix, dtype=np.float64)
                for i in range(k):
                    for j in range(k):
                        item = QTableWidgetItem(f"{m[i, j]:.4f}")
                        item.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                        if i == j:
                            item.setBackground(QColor("#e6e1d5"))
                        self.table.setItem(i, j, item)
                cond = S.condition_number()
                where = f" from {os.path.basename(csv_path)}" if csv_path else ""
                self.info.setText(f"{k} detectors{where}; condition number {cond:.3g} "
                                  "(large values amplify noise when compensating).")
            self._edited = False
        finally:
            self._filling = False

    def _edited_cell(self, item) -> None:
        if not self._filling:
            self._edited = True
            self.info.setText("Edited: press Apply compensation to use the new values.")

    @property
    def edited(self) -> bool:
        return self._edited

    def matrix(self):
        """The SpilloverMatrix in the table (CompensationError if a value is not a number)."""
        k = len(self._detectors)
        m = np.zeros((k, k))
        for i in range(k):
            for j in range(k):
                text = self.table.item(i, j).text().strip() if self.table.item(i, j) else ""
                try:
                    m[i, j] = float(text)
                except ValueError:
                    raise CompensationError(f"spillover value at row {self._detectors[i]!r}, column "
                                            f"{self._detectors[j]!r} is not a number: {text!r}") from None
        return SpilloverMatrix(self._detectors, m, source="edited matrix")

    def set_value(self, i: int, j: int, value: float) -> None:
        """Set one matrix entry as if typed."""
        self.table.item(i, j).setText(f"{value:.4f}")

    def _apply(self) -> None:
        source = self.source.currentData()
        self.applyRequested.emit(source, self.matrix() if (self._edited and self._detectors) else None)

    def show_for_tube(self, tube) -> None:
        """Show the matrix the tube's recipe uses (or the file's, not applied)."""
        comp = tube.recipe.compensation
        source = comp.source
        try:
            S = (read_spillover_csv(tube.recipe.csv_path_resolved()) if source == "csv"
                 else spillover_from_keywords(tube.event_file.keywords, source=os.path.basename(tube.path))
                 if source in ("file", "none") else None)
        except BoscageError:
            S = None
        self.show_matrix(source, S, comp.csv_path)
        if source == "none" and S is not None:
            self.info.setText("The file carries this matrix but it is not applied; "
                              "choose the file's keyword and Apply to use it.")
