"""The "Fit" panel: engine settings, progress, a live held-out learning curve, Cancel."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QDoubleSpinBox, QFormLayout, QHBoxLayout, QLabel, QProgressBar,
                               QPushButton, QSpinBox, QVBoxLayout, QWidget)

from desktop import style


def engine_defaults() -> dict:
    """The engine's own default keyword arguments (core.density), so the panel starts there."""
    from core.density import AdditiveTreeDensity

    return AdditiveTreeDensity().get_params()


class FitPanel(QWidget):
    """Start / cancel a density fit and watch it learn.

    ``fitRequested`` asks the window to start a fit with :meth:`engine_settings`;
    ``cancelRequested`` asks it to stop the running one.
    """

    fitRequested = Signal()
    cancelRequested = Signal()

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        head = QLabel("Density fit")
        head.setObjectName("Heading")
        lay.addWidget(head)
        note = QLabel("An additive tree density is learned from the events by "
                      "unsupervised tree boosting; each tree refines the previous fit.")
        note.setObjectName("Note")
        note.setWordWrap(True)
        lay.addWidget(note)

        form = QFormLayout()
        self._defaults = engine_defaults()
        self.n_trees = QSpinBox()
        self.n_trees.setRange(1, 5000)
        self.n_trees.setValue(int(self._defaults["n_trees"]))
        self.n_trees.setToolTip("Largest number of trees. Fitting stops earlier when the "
                                "held-out events stop gaining likelihood (early stopping).")
        self.learning_rate = QDoubleSpinBox()
        self.learning_rate.setDecimals(3)
        self.learning_rate.setRange(0.001, 1.0)
        self.learning_rate.setSingleStep(0.01)
        self.learning_rate.setValue(float(self._defaults["learning_rate"]))
        self.learning_rate.setToolTip("Shrinkage of each tree toward the uniform: smaller learns "
                                      "more slowly but usually generalises better.")
        self.max_depth = QSpinBox()
        self.max_depth.setRange(1, 40)
        self.max_depth.setValue(int(self._defaults["max_depth"]))
        self.max_depth.setToolTip("Depth of each tree (at most 2^depth leaves). Deeper trees capture "
                                  "finer structure in one step.")
        self.max_events = QSpinBox()
        self.max_events.setRange(1000, 10_000_000)
        self.max_events.setSingleStep(10_000)
        self.max_events.setValue(int(self._defaults["max_fit_events"]))
        self.max_events.setToolTip("Fit on at most this many events (a fixed-seed random subsample); "
                                   "every event is still scored.")
        form.addRow("Trees (most)", self.n_trees)
        form.addRow("Learning rate", self.learning_rate)
        form.addRow("Tree depth", self.max_depth)
        form.addRow("Fit on", self.max_events)
        lay.addLayout(form)

        row = QHBoxLayout()
        self.fit_button = QPushButton("Fit density")
        self.fit_button.setToolTip("Learn the density of the events over the chosen channels (Ctrl+F)")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.cancel_button.setToolTip("Stop the fit; the window returns to its state before the fit (Esc)")
        row.addWidget(self.fit_button)
        row.addWidget(self.cancel_button)
        lay.addLayout(row)
        self.progress = QProgressBar()
        self.progress.setRange(0, 100)
        self.progress.setValue(0)
        lay.addWidget(self.progress)
        self.status = QLabel("Not fitted")
        self.status.setObjectName("Note")
        self.status.setWordWrap(True)
        self.status.setMinimumHeight(48)
        self.status.setAlignment(Qt.AlignTop | Qt.AlignLeft)
        lay.addWidget(self.status)

        self.curve_plot = pg.PlotWidget(background=style.PAPER)
        self.curve_plot.setMinimumHeight(140)
        self.curve_plot.setMenuEnabled(False)
        self.curve_plot.hideButtons()
        self.curve_plot.setLabel("bottom", "trees")
        self.curve_plot.setLabel("left", "held-out log-lik.")
        for ax in ("bottom", "left"):
            self.curve_plot.getAxis(ax).setTextPen(style.INK_SOFT)
            self.curve_plot.getAxis(ax).setPen(style.INK_SOFT)
        self.curve_plot.setToolTip("Mean log-likelihood of held-out events (nats per event) after each "
                                   "tree: it rises while the fit improves and flattens when it is done.")
        self.curve = self.curve_plot.plot([], [], pen=pg.mkPen(style.MOSS, width=2), connect="finite")
        # the kept model's held-out value: layers that did not beat it were rolled back
        self.kept_line = pg.InfiniteLine(angle=0, movable=False,
                                         pen=pg.mkPen(style.INK_SOFT, width=1, style=Qt.DashLine))
        self.kept_line.setVisible(False)
        self.curve_plot.addItem(self.kept_line)
        lay.addWidget(self.curve_plot, 1)
        self._xs: list[int] = []
        self._ys: list[float] = []
        self.fit_button.clicked.connect(self.fitRequested)
        self.cancel_button.clicked.connect(self.cancelRequested)

    def engine_settings(self) -> dict:
        """The engine keyword arguments changed here from the engine's defaults
        (an untouched panel gives {} so the recipe keeps the engine defaults)."""
        chosen = {"n_trees": int(self.n_trees.value()), "learning_rate": float(self.learning_rate.value()),
                  "max_depth": int(self.max_depth.value()), "max_fit_events": int(self.max_events.value())}
        return {k: v for k, v in chosen.items() if v != self._defaults.get(k)}

    def set_engine_settings(self, engine: dict) -> None:
        if "n_trees" in engine:
            self.n_trees.setValue(int(engine["n_trees"]))
        if "learning_rate" in engine:
            self.learning_rate.setValue(float(engine["learning_rate"]))
        if "max_depth" in engine:
            self.max_depth.setValue(int(engine["max_depth"]))
        if "max_fit_events" in engine:
            self.max_events.setValue(int(engine["max_fit_events"]))

    # -- progress -------------------------------------------------------------
    def started(self) -> None:
        self._xs, self._ys = [], []
        self.curve.setData([], [])
        self.kept_line.setVisible(False)
        self.curve_plot.setLabel("bottom", "trees")
        self.progress.setRange(0, 0)
        self.fit_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.status.setText("Fitting...")

    def step(self, step: int, total, info) -> None:
        if total:
            self.progress.setRange(0, int(total))
            self.progress.setValue(min(int(step), int(total)))
        ll = info.get("heldout_loglik") if isinstance(info, dict) else info
        if isinstance(info, dict) and "stage" in info:
            self.status.setText(str(info["stage"]))
        if isinstance(ll, (int, float, np.floating)) and np.isfinite(ll):
            if self._xs and np.isfinite(self._xs[-1]) and int(step) <= self._xs[-1]:
                # a new layer starts again from the kept trees: a separate segment
                self._xs.append(np.nan)
                self._ys.append(np.nan)
            self._xs.append(int(step))
            self._ys.append(float(ll))
            self.curve.setData(np.array(self._xs, float), np.array(self._ys, float))
            self.status.setText(f"Tree {step}" + (f" of at most {total}" if total else "")
                                + f": held-out log-likelihood {ll:.3f} nats per event")

    def ended(self, text: str) -> None:
        self.progress.setRange(0, 100)
        self.progress.setValue(100 if text.startswith("Fitted") else 0)
        self.fit_button.setEnabled(True)
        self.cancel_button.setEnabled(False)
        self.status.setText(text)

    def show_curve(self, curve) -> None:
        """Show a finished fit's learning curve (held-out log-likelihood per tree)."""
        ys = np.asarray(curve if curve is not None else [], dtype=np.float64).ravel()
        xs = np.arange(1, ys.size + 1, dtype=np.float64)
        # a return to the best value so far is a roll-back to the kept trees (the
        # engine appends the kept value): break the line there instead of drawing a jump
        best = np.maximum.accumulate(ys) if ys.size else ys
        back = np.flatnonzero((ys[1:] == best[:-1]) & (ys[:-1] < ys[1:])) + 1 if ys.size > 1 else []
        xs, ys = np.insert(xs, back, np.nan), np.insert(ys, back, np.nan)
        self.curve.setData(xs, ys)
        self.curve_plot.setLabel("bottom", "fit steps")
        if ys.size:
            self.kept_line.setValue(float(ys[-1]))  # the last entry is the kept model's value
            self.kept_line.setVisible(True)
