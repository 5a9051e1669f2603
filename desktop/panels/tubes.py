"""The "Tubes" side list (opened files) and the "Tube card" (what is in a file)."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QAbstractItemView, QHeaderView, QLabel, QListWidget, QListWidgetItem, QMenu,
                               QTableWidget, QTableWidgetItem, QTabWidget, QVBoxLayout, QWidget)


class TubesList(QWidget):
    """The opened files, one line each; choosing one shows it on the density map."""

    tubeChosen = Signal(str)  # path
    closeRequested = Signal(str)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(6, 6, 6, 6)
        head = QLabel("Tubes")
        head.setObjectName("Heading")
        lay.addWidget(head)
        self.list = QListWidget()
        self.list.setSelectionMode(QAbstractItemView.SingleSelection)
        self.list.setWordWrap(True)
        self.list.setTextElideMode(Qt.ElideMiddle)
        self.list.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        self.list.setToolTip("Opened FCS files. Drop files or folders on the window to add more.")
        lay.addWidget(self.list, 1)
        hint = QLabel("Drop FCS files or folders here")
        hint.setObjectName("Note")
        hint.setWordWrap(True)
        lay.addWidget(hint)
        self.list.currentItemChanged.connect(self._changed)
        self.list.setContextMenuPolicy(Qt.CustomContextMenu)
        self.list.customContextMenuRequested.connect(self._menu)

    def _menu(self, pos) -> None:
        item = self.list.itemAt(pos)
        if item is None:
            return
        menu = QMenu(self)
        close = menu.addAction("Close tube")
        close.setToolTip("Close this file and free its events (the file itself is not touched)")
        if menu.exec(self.list.viewport().mapToGlobal(pos)) is close:
            self.closeRequested.emit(item.data(Qt.UserRole))

    def _changed(self, current, _previous) -> None:
        if current is not None:
            self.tubeChosen.emit(current.data(Qt.UserRole))

    def _row(self, path: str) -> int:
        """The list row of ``path`` (-1: not listed)."""
        return next((i for i in range(self.list.count()) if self.list.item(i).data(Qt.UserRole) == path), -1)

    def add(self, path: str, n_events: int, n_channels: int) -> None:
        if self._row(path) >= 0:
            return
        item = QListWidgetItem(f"{os.path.basename(path)}\n{n_events:,} events · {n_channels} channels")
        item.setData(Qt.UserRole, path)
        item.setToolTip(path)
        self.list.addItem(item)

    def choose(self, path: str) -> None:
        i = self._row(path)
        if i >= 0:
            self.list.blockSignals(True)
            self.list.setCurrentRow(i)
            self.list.blockSignals(False)

    def mark(self, path: str, suffix: str) -> None:
        i = self._row(path)
        if i >= 0:
            item = self.list.item(i)
            # the mark goes before the name, so a wrapped long name never hides it
            first = item.text().split("\n")[0].lstrip("• ").rstrip(" •")
            rest = item.text().split("\n", 1)[1] if "\n" in item.text() else ""
            item.setText((f"{suffix} " if suffix else "") + first + ("\n" + rest if rest else ""))

    def remove(self, path: str) -> None:
        i = self._row(path)
        if i >= 0:
            self.list.blockSignals(True)
            self.list.takeItem(i)
            self.list.blockSignals(False)

    def paths(self) -> list[str]:
        return [self.list.item(i).data(Qt.UserRole) for i in range(self.list.count())]


class TubeCard(QWidget):
    """Events count, channels (name and label, range) and keywords of one file."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        self.summary = QLabel("No tube open")
        self.summary.setObjectName("Heading")
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        tabs = QTabWidget()
        self.channels = QTableWidget(0, 3)
        self.channels.setHorizontalHeaderLabels(["Name ($PnN)", "Label ($PnS)", "Range ($PnR)"])
        self.keywords = QTableWidget(0, 2)
        self.keywords.setHorizontalHeaderLabels(["Keyword", "Value"])
        for t in (self.channels, self.keywords):
            t.verticalHeader().setVisible(False)
            t.setEditTriggers(QAbstractItemView.NoEditTriggers)
            t.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
            t.horizontalHeader().setStretchLastSection(True)
        tabs.addTab(self.channels, "Channels")
        tabs.addTab(self.keywords, "Keywords")
        lay.addWidget(tabs, 1)

    def clear(self) -> None:
        self.summary.setText("No tube open")
        self.channels.setRowCount(0)
        self.keywords.setRowCount(0)

    def show_file(self, ef) -> None:
        self.summary.setText(f"{os.path.basename(ef.path)} — {ef.n_events:,} events, "
                             f"{ef.n_channels} channels, {ef.version}")
        self.channels.setRowCount(ef.n_channels)
        for i, name in enumerate(ef.channel_names):
            label = ef.channel_labels[i] if i < len(ef.channel_labels) else ""
            rng = f"{float(ef.channel_ranges[i]):g}" if i < len(ef.channel_ranges) else ""
            for col, text in enumerate((name, label, rng)):
                self.channels.setItem(i, col, QTableWidgetItem(text))
        items = sorted(ef.keywords.items(), key=lambda kv: str(kv[0]))
        self.keywords.setRowCount(len(items))
        for row, (k, v) in enumerate(items):
            self.keywords.setItem(row, 0, QTableWidgetItem(str(k)))
            text = str(v)
            item = QTableWidgetItem(text if len(text) < 300 else text[:300] + " ...")
            item.setToolTip(text[:2000])
            self.keywords.setItem(row, 1, item)
