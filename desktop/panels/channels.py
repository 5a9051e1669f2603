"""The "Channels" panel: which channels the density uses, each channel's scale
(transform and parameters) and a live histogram of the transformed values.

Transforms are built by :func:`core.transforms.make_transform` from a spec dict;
this panel only edits specs and shows their effect.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtGui import QValidator
from PySide6.QtWidgets import (QAbstractItemView, QComboBox, QDoubleSpinBox, QFormLayout, QHBoxLayout,
                               QHeaderView, QLabel, QPushButton, QTableWidget, QTableWidgetItem,
                               QVBoxLayout, QWidget)

from core.transforms import DEFAULT_M, TRANSFORM_KINDS, logicle_auto_w, make_transform
from desktop import style


def parameters(kind: str) -> list:
    """Editable parameters of a transform kind, from core's registry (core.transforms.TRANSFORM_KINDS)."""
    return list(TRANSFORM_KINDS[kind].parameters) if kind in TRANSFORM_KINDS else []


class NumberBox(QDoubleSpinBox):
    """A spin box that shows and accepts numbers in any magnitude (6 significant
    digits, scientific notation when needed), so a scale such as 3.8e-06 is
    neither shown nor stored as 0."""

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setDecimals(15)

    def textFromValue(self, value: float) -> str:  # noqa: N802 (Qt name)
        return f"{value:.6g}"

    def valueFromText(self, text: str) -> float:  # noqa: N802 (Qt name)
        try:
            return float(text.strip())
        except ValueError:
            return self.value()

    def validate(self, text: str, pos: int):
        t = text.strip()
        try:
            v = float(t)
        except ValueError:
            ok = t in ("", "-", "+", ".", "-.", "+.") or t[-1:] in ("e", "E", "-", "+")
            return (QValidator.Intermediate if ok else QValidator.Invalid), text, pos
        return (QValidator.Acceptable if self.minimum() <= v <= self.maximum()
                else QValidator.Intermediate), text, pos

    def stepBy(self, steps: int) -> None:  # noqa: N802 (Qt name)
        # step by a tenth of the value's own magnitude, not by a fixed amount
        v = self.value()
        mag = 10.0 ** np.floor(np.log10(abs(v))) if v != 0 else 1.0
        self.setValue(v + steps * mag / 10.0)


KIND_LABELS = {name: kind.label for name, kind in TRANSFORM_KINDS.items()}


class ChannelsPanel(QWidget):
    """Channels table (use in fit, name, label, scale) plus an editor for one channel.

    ``changed`` is emitted (debounced) after the analyst changes a scale or the
    set of fitted channels; read :meth:`specs` and :meth:`fit_channels`.
    """

    changed = Signal()
    pairsRequested = Signal()
    applyAllRequested = Signal(str)  # channel whose scale goes to every fluorescence channel

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._names: list[str] = []
        self._labels: list[str] = []
        self._specs: dict[str, dict] = {}
        self._values = None  # callable channel -> compensated values (n_events,)
        self.ranges: dict[str, float] = {}  # channel -> $PnR, the logicle default top
        self._filling = False
        lay = QVBoxLayout(self)
        head = QLabel("Channels and scales")
        head.setObjectName("Heading")
        lay.addWidget(head)
        self.table = QTableWidget(0, 4)
        self.table.setHorizontalHeaderLabels(["Fit", "Channel", "Label", "Scale"])
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setToolTip("Tick the channels the density is fitted on. Scatter and time "
                              "channels are usually left out (common practice).")
        lay.addWidget(self.table, 2)

        editor = QWidget()
        ed = QVBoxLayout(editor)
        ed.setContentsMargins(0, 0, 0, 0)
        self.editing = QLabel("")
        self.editing.setObjectName("Note")
        ed.addWidget(self.editing)
        self.kind = QComboBox()
        for k, text in KIND_LABELS.items():
            self.kind.addItem(text, k)
        self.kind.setToolTip("How the channel's values are displayed and fitted: linear for scatter, "
                             "arcsinh or logicle for fluorescence (they show negative compensated values).")
        self.form = QFormLayout()
        self.form.addRow("Scale", self.kind)
        self._param_boxes: dict[str, QDoubleSpinBox] = {}
        ed.addLayout(self.form)
        row = QHBoxLayout()
        self.pairs_button = QPushButton("Plot pairs...")
        self.pairs_button.setToolTip("Choose which channel pairs the density map shows")
        row.addWidget(self.pairs_button)
        self.apply_all_button = QPushButton("Apply to all fluorescence")
        self.apply_all_button.setToolTip("Give every fluorescence channel (not scatter, not time) the scale "
                                         "of the selected channel")
        row.addWidget(self.apply_all_button)
        row.addStretch(1)
        ed.addLayout(row)
        lay.addWidget(editor)

        from desktop.axes import TransformAxis  # histogram axis in original units

        self.hist = pg.PlotWidget(background=style.PAPER, axisItems={"bottom": TransformAxis("bottom")})
        self.hist.setMinimumHeight(130)
        self.hist.setMenuEnabled(False)
        self.hist.hideButtons()
        self.hist.setLabel("left", "events")
        for ax in ("bottom", "left"):
            self.hist.getAxis(ax).setTextPen(style.INK_SOFT)
            self.hist.getAxis(ax).setPen(style.INK_SOFT)
            self.hist.getAxis(ax).enableAutoSIPrefix(False)
        self.hist_curve = self.hist.plot([0, 1], [0], stepMode="center", fillLevel=0,
                                         brush=pg.mkBrush(style.MOSS_LIGHT), pen=pg.mkPen(style.MOSS))
        self.hist.setToolTip("Histogram of the channel on the chosen scale (updates as you edit)")
        lay.addWidget(self.hist, 1)

        self._debounce = QTimer(self)
        self._debounce.setSingleShot(True)
        self._debounce.setInterval(250)
        self._debounce.timeout.connect(self.changed)
        self.table.itemChanged.connect(self._item_changed)
        self.table.itemSelectionChanged.connect(self._row_chosen)
        self.kind.currentIndexChanged.connect(self._kind_changed)
        self.pairs_button.clicked.connect(self.pairsRequested)
        self.apply_all_button.clicked.connect(
            lambda: self.current_channel() and self.applyAllRequested.emit(self.current_channel()))

    # -- content ------------------------------------------------------------
    def show_channels(self, names, labels, specs: dict, fit_channels, values) -> None:
        """Fill from a file's channels, the recipe's specs and fitted channels.

        ``values(channel) -> ndarray`` gives compensated (untransformed) values."""
        self._filling = True
        try:
            self._names = list(names)
            self._labels = list(labels)
            self._specs = {k: dict(v) for k, v in specs.items() if v is not None}
            self._values = values
            fit = set(fit_channels)
            self.table.setRowCount(len(self._names))
            for row, name in enumerate(self._names):
                check = QTableWidgetItem()
                check.setFlags(Qt.ItemIsUserCheckable | Qt.ItemIsEnabled | Qt.ItemIsSelectable)
                check.setCheckState(Qt.Checked if name in fit else Qt.Unchecked)
                self.table.setItem(row, 0, check)
                self.table.setItem(row, 1, QTableWidgetItem(name))
                self.table.setItem(row, 2, QTableWidgetItem(self._labels[row] if row < len(self._labels) else ""))
                self.table.setItem(row, 3, QTableWidgetItem(describe(self._specs.get(name))))
        finally:
            self._filling = False
        if self._names:
            self.table.selectRow(0)

    def specs(self) -> dict[str, dict]:
        return {k: dict(v) for k, v in self._specs.items()}

    def fit_channels(self) -> list[str]:
        return [self._names[r] for r in range(self.table.rowCount())
                if self.table.item(r, 0) is not None and self.table.item(r, 0).checkState() == Qt.Checked]

    def current_channel(self) -> str | None:
        rows = {i.row() for i in self.table.selectedIndexes()}
        return self._names[min(rows)] if rows else None

    # -- editing ----------------------------------------------------------
    def _item_changed(self, item) -> None:
        if not self._filling and item.column() == 0:
            self._debounce.start()

    def _row_chosen(self) -> None:
        name = self.current_channel()
        if name is None:
            return
        spec = self._specs.get(name) or {"kind": "linear", "scale": 1.0, "offset": 0.0}
        self.editing.setText(f"Scale of {name}")
        self.kind.blockSignals(True)
        self.kind.setCurrentIndex(max(0, self.kind.findData(spec.get("kind", "linear"))))
        self.kind.blockSignals(False)
        self._build_params(spec)
        self._preview()

    def _build_params(self, spec: dict) -> None:
        while self.form.rowCount() > 1:
            self.form.removeRow(1)
        self._param_boxes = {}
        for p in parameters(spec.get("kind", "linear")):
            if p.optional and spec.get(p.key) is None:
                continue   # an optional parameter left out stays out (e.g. log's decades)
            box = NumberBox()
            box.setRange(p.low, p.high)
            box.setValue(float(spec.get(p.key, p.default if p.default is not None else p.low)))
            box.setToolTip(p.help)
            box.setKeyboardTracking(False)
            box.valueChanged.connect(self._param_changed)
            self.form.addRow(p.label, box)
            self._param_boxes[p.key] = box

    def _kind_changed(self) -> None:
        name = self.current_channel()
        if name is None:
            return
        kind = self.kind.currentData()
        spec = {"kind": kind}
        row = self._names.index(name)
        for p in parameters(kind):
            if p.key == "T":   # the top of scale defaults to the channel's range ($PnR)
                spec["T"] = float(self._range_of(row) or 262144.0)
            elif p.key == "W":  # logicle's linear width from the channel's negative values

                values = self._values(name) if self._values is not None else None
                spec["W"] = logicle_auto_w(values, spec["T"], DEFAULT_M) if values is not None else 0.0
            elif p.default is not None:
                spec[p.key] = p.default
        self._specs[name] = spec
        self._build_params(spec)
        self._spec_edited(name)

    def _range_of(self, row: int):
        return self.ranges.get(self._names[row])

    def _param_changed(self) -> None:
        name = self.current_channel()
        if name is None:
            return
        spec = {"kind": self.kind.currentData()}
        for key, box in self._param_boxes.items():
            spec[key] = float(box.value())
        self._specs[name] = spec
        self._spec_edited(name)

    def set_spec(self, name: str, spec: dict) -> None:
        """Set one channel's scale (as if edited)."""
        self._specs[name] = dict(spec)
        if self.current_channel() == name:
            self._row_chosen()
        self._spec_edited(name)

    def _spec_edited(self, name: str) -> None:
        row = self._names.index(name)
        self._filling = True
        self.table.item(row, 3).setText(describe(self._specs.get(name)))
        self._filling = False
        self._preview()
        self._debounce.start()

    def _preview(self) -> None:
        name = self.current_channel()
        if name is None or self._values is None:
            return

        raw = np.asarray(self._values(name), dtype=np.float64)
        spec = self._specs.get(name)
        try:
            shown = make_transform(spec).forward(raw) if spec else raw
        except Exception as exc:  # noqa: BLE001 - show the problem in place of the preview
            self.editing.setText(f"Scale of {name}: {exc}")
            return
        shown = shown[np.isfinite(shown)]
        if shown.size == 0:
            self.hist_curve.setData([0, 1], [0])
            return
        lo, hi = np.percentile(shown, [0.05, 99.95])
        if not hi > lo:
            lo, hi = lo - 0.5, hi + 0.5
        counts, edges = np.histogram(shown, bins=120, range=(lo, hi))
        self.hist_curve.setData(edges, counts)
        self.hist.getAxis("bottom").set_spec(spec)
        self.hist.setLabel("bottom", f"{name} ({describe(spec)})")


def describe(spec: dict | None) -> str:
    """Short text of a transform spec, e.g. ``arcsinh (cofactor 150)`` (core's label)."""
    if not spec:
        return "linear"

    try:
        return make_transform(spec).label
    except Exception:  # noqa: BLE001 - an invalid spec is shown as written
        return str(spec.get("kind", "?"))
