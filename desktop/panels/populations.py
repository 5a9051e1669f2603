"""The "Populations" panel: the hills of the fitted density as a list, and their changes against a control.

Everything shown comes from :mod:`core.populations` through the tube's
analysis (``Analysis.populations``, ``population_changes``); the panel only
shows it.  Choosing a row lights that population's events on every plot of
the density map; "Keep as region" adds a region of kind ``population`` (it
stores the population definition, so it is saved with the recipe and counted
on other files), which the Selections panel and the export then treat like
any other region.

:func:`attach` builds the panel, adds it to a window's notebook and wires it
(the window keeps only one line for it).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import numpy as np
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QAbstractItemView, QHBoxLayout, QHeaderView, QLabel, QPushButton,
                               QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from core.populations import CHANGE_RATE, DEFAULT_SETTINGS, check_settings, reading_order
from desktop import style

#: Rows of rare populations get this background (a pale tint of the rare colour).
RARE_TINT = "#ffe3da"

#: The default fold a grown / shrunk label needs (core.populations DEFAULT_SETTINGS["change_fold"]).
CHANGE_FOLD = DEFAULT_SETTINGS["change_fold"]


def _pct(share: float) -> str:
    return f"{100.0 * share:.2f}" if share >= 0.0001 else f"{100.0 * share:.3f}"


def _fold(v: float) -> str:
    return "∞" if not np.isfinite(v) else f"{v:.2f}"


class PopulationsPanel(QWidget):
    """Populations of the current tube: profile, events, share (95 % interval); rare first."""

    populationChosen = Signal(object)   # population id or None
    keepRequested = Signal(int)          # population id
    storeRequested = Signal()            # keep these populations in the recipe
    exportRequested = Signal()

    COLUMNS = ("#", "Markers", "Events", "% of kept (95 % interval)")
    CHANGE_COLUMNS = ("Markers", "Change", "Fold (95 %)", "q", "Control %", "This tube %")

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        head = QLabel("Populations")
        head.setObjectName("Heading")
        lay.addWidget(head)
        self.note = QLabel()
        self.note.setObjectName("Note")
        self.note.setWordWrap(True)
        lay.addWidget(self.note)
        self.table = QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(self.COLUMNS)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.setWordWrap(True)
        hh = self.table.horizontalHeader()
        hh.setSectionResizeMode(QHeaderView.ResizeToContents)
        hh.setSectionResizeMode(1, QHeaderView.Stretch)
        lay.addWidget(self.table, 3)
        row = QHBoxLayout()
        self.keep_button = QPushButton("Keep as region")
        self.keep_button.setToolTip("New region holding this population's events; it is saved with the "
                                    "recipe and counted the same way on other files")
        self.export_button = QPushButton("Export...")
        self.export_button.setToolTip("Write the events of a region (keep the population first) to FCS or CSV")
        self.clear_button = QPushButton("Show rare events")
        self.clear_button.setProperty("flat", True)
        self.clear_button.setToolTip("Back to the rare events of the Rarity bar")
        for b in (self.keep_button, self.export_button, self.clear_button):
            row.addWidget(b)
        lay.addLayout(row)
        self.store_button = QPushButton("Count these populations in every file")
        self.store_button.setProperty("flat", True)
        self.store_button.setToolTip("Save these populations with the recipe: other files and the batch are then "
                                     "counted with the same populations instead of finding their own")
        lay.addWidget(self.store_button)
        self.change_head = QLabel("Grown and shrunk against the control")
        self.change_head.setObjectName("Heading")
        lay.addWidget(self.change_head)
        self.changes = QTableWidget(0, len(self.CHANGE_COLUMNS))
        self.changes.setHorizontalHeaderLabels(self.CHANGE_COLUMNS)
        self.changes.verticalHeader().setVisible(False)
        self.changes.setEditTriggers(QAbstractItemView.NoEditTriggers)
        ch = self.changes.horizontalHeader()
        ch.setSectionResizeMode(QHeaderView.ResizeToContents)
        ch.setSectionResizeMode(0, QHeaderView.Stretch)
        lay.addWidget(self.changes, 2)
        self.change_note = QLabel("Populations found on the control, counted in both tubes; fold = share here / "
                                  "share in the control; q: Benjamini-Hochberg over the populations "
                                  "(Fisher's exact test); grown or shrunk: q at most "
                                  f"{100 * CHANGE_RATE:g} % and a fold beyond the recipe's change fold (default "
                                  f"{CHANGE_FOLD:g}, or 1/{CHANGE_FOLD:g} for shrunk). Largest changes first. "
                                  "Research use only.")
        self.change_note.setObjectName("Note")
        self.change_note.setWordWrap(True)
        lay.addWidget(self.change_note)
        self._ids: list[int] = []
        self.keep_button.clicked.connect(self._keep)
        self.export_button.clicked.connect(self.exportRequested)
        self.store_button.clicked.connect(self.storeRequested)
        self.clear_button.clicked.connect(self.clear_choice)
        self.table.itemSelectionChanged.connect(self._chosen)
        self.show_populations(None)

    # ------------------------------------------------------------------ showing
    def show_populations(self, populations, changes=None) -> None:
        """Fill the list from a core.populations.Populations (None: not fitted yet)."""
        self.table.blockSignals(True)
        self.table.setRowCount(0)
        self._ids = []
        rows = [] if populations is None else populations.table
        for r in rows:
            i = self.table.rowCount()
            self.table.insertRow(i)
            mark = f"{r['id'] + 1}" + (" !" if r["caution"] else "")
            cells = [mark, r.get("short_profile", r["profile"]), f"{r['count']:,}",
                     f"{_pct(r['share'])} ({_pct(r['share_low'])}–{_pct(r['share_high'])})"]
            for col, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if col >= 2:
                    item.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if r["rare"]:
                    item.setBackground(QColor(RARE_TINT))
                tip = f"Population {r['id'] + 1}" + (" (rare)" if r["rare"] else "") + f": {r['profile']}"
                if r["caution"]:
                    tip += "\nFewer than about 20 events: share and profile rest on few cells"
                item.setToolTip(tip)
                self.table.setItem(i, col, item)
            self._ids.append(int(r["id"]))
        self.table.resizeRowsToContents()
        self.table.blockSignals(False)
        n_rare = sum(1 for r in rows if r["rare"])
        if populations is None:
            self.note.setText("Fit the density (Ctrl+F): each hill of the fitted density becomes a population.")
        else:
            self.note.setText(f"{len(rows)} populations, {n_rare} rare (below "
                              f"{100 * _rare_share(populations):g} % of kept events: tinted, listed first; "
                              "! marks fewer than about 20 events). Choose one to light its events on "
                              "every plot.")
        self.keep_button.setEnabled(False)
        self.store_button.setEnabled(populations is not None)
        if populations is not None and populations.info.get("matched"):
            self.note.setText(self.note.text() + " Counted with the populations kept in the recipe.")
        self._show_changes(changes)

    def _show_changes(self, changes) -> None:
        shown = bool(changes)
        for w in (self.change_head, self.changes, self.change_note):
            w.setVisible(shown)
        self.changes.setRowCount(0)
        for c in reading_order(changes or []):
            i = self.changes.rowCount()
            self.changes.insertRow(i)
            cells = [c.get("short_profile", c.get("profile", "")), c["change"],
                     f"{_fold(c['fold'])} ({_fold(c['fold_low'])}–{_fold(c['fold_high'])})",
                     f"{c['q']:.2g}", _pct(c["control_share"]), _pct(c["test_share"])]
            for col, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if col in (2, 3, 4, 5):
                    item.setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
                if c["change"] == "grown":
                    item.setForeground(QColor(style.MOSS))
                elif c["change"] == "shrunk":
                    item.setForeground(QColor("#a23b24"))
                self.changes.setItem(i, col, item)

    # ------------------------------------------------------------------ choosing
    def chosen_id(self) -> int | None:
        rows = sorted({i.row() for i in self.table.selectedIndexes()})
        return self._ids[rows[0]] if rows and rows[0] < len(self._ids) else None

    def choose(self, pop_id: int) -> None:
        """Select the row of population ``pop_id`` (as a click would)."""
        self.table.selectRow(self._ids.index(int(pop_id)))

    def clear_choice(self) -> None:
        self.table.clearSelection()

    def _chosen(self) -> None:
        pid = self.chosen_id()
        self.keep_button.setEnabled(pid is not None)
        self.populationChosen.emit(pid)

    def _keep(self) -> None:
        pid = self.chosen_id()
        if pid is not None:
            self.keepRequested.emit(pid)


def _rare_share(populations) -> float:
    return float(check_settings(populations.info.get("settings")).get("rare_share"))


# ---------------------------------------------------------------------------
# wiring into the main window
# ---------------------------------------------------------------------------

def population_region(tube, pop_id: int, name: str) -> dict:
    """A region dict (core.regions, kind ``population``) for population ``pop_id`` of the tube's analysis."""
    a = tube.analysis
    definition = a.populations.definition
    transforms = {c: tube.recipe.transforms.get(c) for c in definition.channels}
    return {"name": name, "kind": "population", "population": int(pop_id),
            "definition": definition.to_dict(), "transforms": transforms}


def attach(window) -> PopulationsPanel:
    """Add the panel to ``window``'s notebook (after "Selections") and connect it."""
    panel = PopulationsPanel()
    window.notebook.insertTab(2, panel, "Populations")

    def refresh(*_args) -> None:
        tube = window.current
        a = None if tube is None else tube.analysis
        panel.show_populations(getattr(a, "populations", None), getattr(a, "population_changes", None))

    def chosen(pid) -> None:
        tube = window.current
        a = None if tube is None else tube.analysis
        if pid is None or a is None or a.population_labels is None:
            window.map_view.update_highlight()
            return
        mask = a.population_labels == pid
        row = next(r for r in a.populations.table if r["id"] == pid)
        window.density_map.set_highlight(mask)
        window.rarity_bar.count.setText(f"{int(mask.sum()):,} events of population {pid + 1} "
                                        f"({row.get('short_profile', row['profile'])})")

    def keep(pid: int) -> None:
        tube = window.current
        if tube is None or tube.analysis is None or tube.analysis.populations is None:
            return
        row = next(r for r in tube.analysis.populations.table if r["id"] == pid)
        name = base = ("Rare population " if row["rare"] else "Population ") + str(pid + 1)
        k = 2
        while name in tube.regions:
            name, k = f"{base} ({k})", k + 1
        window.add_region(population_region(tube, pid, name))
        window.notebook.setCurrentWidget(window.selections)

    def store() -> None:
        tube = window.current
        if tube is None or tube.analysis is None or tube.analysis.populations is None:
            return
        tube.recipe.populations = tube.recipe.populations.with_definition(
            tube.analysis.populations.definition.to_dict())
        tube.dirty = True
        window.statusBar().showMessage("The populations are kept in the recipe: save it to count them in "
                                       "other files and in a batch", 8000)

    panel.storeRequested.connect(store)
    panel.populationChosen.connect(chosen)
    panel.keepRequested.connect(keep)
    panel.exportRequested.connect(window.export_dialog)
    window.fitEnded.connect(refresh)
    window.notebook.currentChanged.connect(lambda _i: refresh() if window.notebook.currentWidget() is panel
                                           else None)
    shown = window.show_tube

    def show_tube(tube) -> None:   # every way of showing a tube refreshes the list
        shown(tube)
        refresh()

    window.show_tube = show_tube
    panel.refresh = refresh
    return panel
