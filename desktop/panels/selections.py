"""The "Selections" panel: the regions of the current tube with live statistics.

Statistics come from :meth:`core.regions.RegionSet.statistics`; the panel only
shows them.  Rename by double-clicking a name; delete; combine two or more
selected regions with and / or, or take the complement (not) of one.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import math

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QAbstractItemView, QHBoxLayout, QHeaderView, QLabel, QPushButton,
                               QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

KIND_WORDS = {"rectangle": "rectangle", "polygon": "polygon", "interval": "interval",
              "rarity": "rarity", "enriched": "new vs control", "and": "all of", "or": "any of", "not": "not"}


class SelectionsPanel(QWidget):
    """Table of regions: name, kind, channels, events, % of parent, % of all."""

    renameRequested = Signal(str, str)   # old, new
    deleteRequested = Signal(list)       # names
    combineRequested = Signal(str, list)  # operator, names
    exportRequested = Signal()
    selectionChanged = Signal(list)

    COLUMNS = ("Name", "Kind", "Channels", "Events", "% of parent", "% of all")

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        head = QLabel("Selections")
        head.setObjectName("Heading")
        lay.addWidget(head)
        note = QLabel("Draw a rectangle (R) or polygon (P) on any plot of the density map. "
                      "Counts update while you drag. Double-click a name to rename it.")
        note.setObjectName("Note")
        note.setWordWrap(True)
        lay.addWidget(note)
        self.table = QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(self.COLUMNS)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.DoubleClicked | QAbstractItemView.EditKeyPressed)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        lay.addWidget(self.table, 1)
        row = QHBoxLayout()
        self.and_button = QPushButton("All of")
        self.and_button.setToolTip("New region: events inside every selected region (and)")
        self.or_button = QPushButton("Any of")
        self.or_button.setToolTip("New region: events inside at least one selected region (or)")
        self.not_button = QPushButton("Not")
        self.not_button.setToolTip("New region: events outside the selected region (not)")
        self.delete_button = QPushButton("Delete")
        self.delete_button.setToolTip("Remove the selected regions (Del)")
        for b in (self.and_button, self.or_button, self.not_button, self.delete_button):
            row.addWidget(b)
        lay.addLayout(row)
        self.export_button = QPushButton("Export selected events...")
        self.export_button.setToolTip("Write the events of a region to FCS or CSV (Ctrl+E)")
        lay.addWidget(self.export_button)
        self._filling = False
        self._names: list[str] = []
        self.and_button.clicked.connect(lambda: self._combine("and"))
        self.or_button.clicked.connect(lambda: self._combine("or"))
        self.not_button.clicked.connect(lambda: self._combine("not"))
        self.delete_button.clicked.connect(lambda: self.deleteRequested.emit(self.selected_names()))
        self.export_button.clicked.connect(self.exportRequested)
        self.table.itemChanged.connect(self._item_changed)
        self.table.itemSelectionChanged.connect(lambda: self.selectionChanged.emit(self.selected_names()))

    def selected_names(self) -> list[str]:
        rows = sorted({i.row() for i in self.table.selectedIndexes()})
        return [self._names[r] for r in rows if r < len(self._names)]

    def select(self, name: str) -> None:
        if name in self._names:
            self.table.selectRow(self._names.index(name))

    def _combine(self, operator: str) -> None:
        self.combineRequested.emit(operator, self.selected_names())

    def _item_changed(self, item: QTableWidgetItem) -> None:
        if self._filling or item.column() != 0:
            return
        row = item.row()
        if row < len(self._names):
            old, new = self._names[row], item.text().strip()
            if new and new != old:
                self.renameRequested.emit(old, new)

    def show_regions(self, regions, stats) -> None:
        """Fill the table from a RegionSet and its statistics rows (same order)."""
        selected = set(self.selected_names())
        by_name = {s.name: s for s in (stats or [])}
        self._filling = True
        try:
            self._names = [r.name for r in regions]
            self.table.setRowCount(len(self._names))
            for row, r in enumerate(regions):
                s = by_name.get(r.name)
                chans = ", ".join(r.channels_used()) or ", ".join(getattr(r, "operands", ()))
                cells = [r.name, KIND_WORDS.get(r.kind, r.kind), chans,
                         "" if s is None else f"{s.count:,}",
                         "" if s is None else _pct(s.percent_of_parent),
                         "" if s is None else _pct(s.percent_of_all)]
                for col, text in enumerate(cells):
                    item = self.table.item(row, col)
                    if item is None:
                        item = QTableWidgetItem()
                        self.table.setItem(row, col, item)
                    item.setText(text)
                    flags = Qt.ItemIsSelectable | Qt.ItemIsEnabled
                    if col == 0:
                        flags |= Qt.ItemIsEditable
                    item.setFlags(flags)
                    if col >= 3:
                        item.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
            for row, name in enumerate(self._names):
                if name in selected:
                    self.table.selectRow(row)
        finally:
            self._filling = False

    def update_counts(self, stats) -> None:
        """Refresh only the numbers (fast path while a region is dragged)."""
        self._filling = True
        try:
            for s in stats:
                if s.name not in self._names:
                    continue
                row = self._names.index(s.name)
                for col, text in ((3, f"{s.count:,}"), (4, _pct(s.percent_of_parent)), (5, _pct(s.percent_of_all))):
                    item = self.table.item(row, col)
                    if item is not None:
                        item.setText(text)
        finally:
            self._filling = False

    def count_text(self, name: str) -> str:
        """The events count shown for ``name`` (tests read it)."""
        row = self._names.index(name)
        return self.table.item(row, 3).text()


def _pct(v: float) -> str:
    return "" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{v:.2f} %"
