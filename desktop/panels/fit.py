"""The "Fit" panel: the settings that change the fit, its stages and progress,
the held-out learning curve, Cancel.

Ranges are the engine's own (:class:`core.density.AdditiveTreeDensity`
refuses values outside them); settings whose effect is small sit under an
"Advanced" fold.  Progress moves through the three stages the engine reports
(mixture search, skewed components, trees), each named, and Cancel stops any.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (QComboBox, QDoubleSpinBox, QFormLayout, QHBoxLayout, QLabel, QProgressBar,
                               QPushButton, QSpinBox, QToolButton, QVBoxLayout, QWidget)

from core.density import AdditiveTreeDensity, kernels
from core.density.model import tried_steps
from desktop import style

#: Engine keywords this panel owns (the rest of a recipe's engine is kept as is).
PANEL_KEYS = ("max_fit_events", "base", "n_trees", "learning_rate", "max_depth", "random_state")
#: How the panel names the engine's first maps (``base`` / ``base_``).
BASE_WORDS = {"auto": ("Automatic", "a mixture of skewed groups, or per channel when it explains held-out "
                                     "events better (channels with piles of equal values)"),
              "skewed": ("Skewed groups", "a mixture of groups that may lean to one side"),
              "gmm": ("Gaussian groups", "a mixture of symmetric (Gaussian) groups"),
              "logistic": ("Per channel", "each channel on its own, then trees for what they share")}
#: Share of the progress bar given to each stage (mixture search, skew, trees).
STAGE_SPANS = {"mixture": (0, 30), "skew": (30, 45), "trees": (45, 100)}


def engine_defaults() -> dict:
    """The engine's own default keyword arguments (core.density), so the panel starts there."""
    return AdditiveTreeDensity().get_params()


def engine_limits() -> dict:
    """Ranges the engine accepts (its parameter checks): learning rate in the
    open interval (0, 1), depth 1 .. half the compiled path length."""
    return {"learning_rate": (0.01, 0.99), "max_depth": (1, int(kernels.MAX_PATH) // 2),
            "n_trees": (0, 5000), "max_fit_events": (1000, 10_000_000)}


def fit_stage(info) -> tuple[str, str]:
    """(stage key, words) for one progress report of the engine: "mixture",
    "skew", "second" (the per-channel start fitted as well), "trees"."""
    if isinstance(info, dict) and "stage" in info:
        text = str(info["stage"])
        low = text.lower()
        if "skew" in low:
            return "skew", "Stage 2 of 3: shaping skewed groups"
        if "component" in low or "mixture" in low:
            n = "".join(ch for ch in text.split(":")[-1] if ch.isdigit())
            return "mixture", f"Stage 1 of 3: searching the mixture of groups{f' ({n} groups)' if n else ''}"
        if "logistic" in low or "as well" in low:
            return "second", "Piles of equal values found: fitting a per-channel start as well"
        return "other", text
    return "trees", "Stage 3 of 3: boosting trees"



class StepAxis(pg.AxisItem):
    """An axis of fit steps: ticks only at whole steps (no 1.5 between step 1 and 2)."""

    def tickSpacing(self, minVal, maxVal, size):
        return [(max(1.0, float(spacing)), offset) for spacing, offset in super().tickSpacing(minVal, maxVal, size)]


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
        note = QLabel("Learns how dense the events are over the chosen channels: first groups of events "
                      "(a mixture), then trees that correct it where it is wrong.")
        note.setObjectName("Note")
        note.setWordWrap(True)
        lay.addWidget(note)

        self._defaults = engine_defaults()
        lim = engine_limits()
        form = QFormLayout()
        self.max_events = QSpinBox()
        self.max_events.setRange(*lim["max_fit_events"])
        self.max_events.setSingleStep(10_000)
        self.max_events.setGroupSeparatorShown(True)
        self.max_events.setValue(int(self._defaults["max_fit_events"]))
        self.max_events.setToolTip("Learn from at most this many events (a fixed random pick); every event "
                                   "is still scored. More events: finer detail, longer fit.")
        self.base = QComboBox()
        for key, (label, words) in BASE_WORDS.items():
            self.base.addItem(label, key)
            self.base.setItemData(self.base.count() - 1, words, Qt.ToolTipRole)
        self.base.setToolTip("How the fit starts: " + "; ".join(f"{label.lower()}: {words}" for label, words
                                                                  in BASE_WORDS.values()) + ".")
        form.addRow("Learn from", self.max_events)
        form.addRow("Start", self.base)
        lay.addLayout(form)

        self.advanced_button = QToolButton()
        self.advanced_button.setText("Advanced")
        self.advanced_button.setCheckable(True)
        self.advanced_button.setArrowType(Qt.RightArrow)
        self.advanced_button.setToolButtonStyle(Qt.ToolButtonTextBesideIcon)
        lay.addWidget(self.advanced_button)
        self.advanced = QWidget()
        adv = QFormLayout(self.advanced)
        adv.setContentsMargins(12, 0, 0, 0)
        self.n_trees = QSpinBox()
        self.n_trees.setRange(*lim["n_trees"])
        self.n_trees.setValue(int(self._defaults["n_trees"]))
        self.n_trees.setToolTip("Most trees. The fit stops by itself when trees stop helping on events "
                                "it did not learn from, so this rarely matters.")
        self.learning_rate = QDoubleSpinBox()
        self.learning_rate.setDecimals(2)
        self.learning_rate.setRange(*lim["learning_rate"])
        self.learning_rate.setSingleStep(0.05)
        self.learning_rate.setValue(float(self._defaults["learning_rate"]))
        self.learning_rate.setToolTip("How far each tree moves the fit (between 0 and 1): smaller steps "
                                      "need more trees.")
        self.max_depth = QSpinBox()
        self.max_depth.setRange(*lim["max_depth"])
        self.max_depth.setValue(int(self._defaults["max_depth"]))
        self.max_depth.setToolTip("How many cuts one tree may chain: deeper trees follow smaller details.")
        self.seed = QSpinBox()
        self.seed.setRange(0, 2 ** 31 - 1)
        self.seed.setValue(0)
        self.seed.setToolTip("Seed of the random picks: the same seed gives the same fit.")
        adv.addRow("Most trees", self.n_trees)
        adv.addRow("Step size", self.learning_rate)
        adv.addRow("Tree depth", self.max_depth)
        adv.addRow("Seed", self.seed)
        self.advanced.setVisible(False)
        lay.addWidget(self.advanced)
        self.advanced_button.toggled.connect(self._fold)

        row = QHBoxLayout()
        self.fit_button = QPushButton("Fit density")
        self.fit_button.setToolTip("Learn the density of the events over the chosen channels (Ctrl+F)")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setEnabled(False)
        self.cancel_button.setToolTip("Stop the fit at any stage; the tube keeps its state before the fit (Esc)")
        row.addWidget(self.fit_button)
        row.addWidget(self.cancel_button)
        lay.addLayout(row)
        self.stage = QLabel("")
        self.stage.setObjectName("Heading")
        self.stage.setWordWrap(True)
        lay.addWidget(self.stage)
        self.progress = QProgressBar()
        self.progress.setRange(0, 100)
        self.progress.setValue(0)
        lay.addWidget(self.progress)
        self.status = QLabel("Not fitted")
        self.status.setObjectName("Note")
        self.status.setWordWrap(True)
        self.status.setAlignment(Qt.AlignTop | Qt.AlignLeft)
        lay.addWidget(self.status)

        self.curve_plot = pg.PlotWidget(background=style.PAPER, axisItems={"bottom": StepAxis("bottom")})
        self.curve_plot.setMinimumHeight(120)
        self.curve_plot.setMenuEnabled(False)
        self.curve_plot.hideButtons()
        self.curve_plot.setLabel("bottom", "fit step (per-channel shaping, then trees)")
        self.curve_plot.setLabel("left", "fit score")
        for ax in ("bottom", "left"):
            self.curve_plot.getAxis(ax).setTextPen(style.INK_SOFT)
            self.curve_plot.getAxis(ax).setPen(style.INK_SOFT)
        self.curve_plot.setToolTip("How well the fit explains events it did not learn from (mean log-likelihood "
                                   "of held-out events, nats per event; higher is better), after each step. "
                                   "The dashed line is the kept fit: steps that did not beat it were undone.")
        self.curve = self.curve_plot.plot([], [], pen=pg.mkPen(style.MOSS, width=2), connect="finite",
                                          symbol="o", symbolSize=5, symbolBrush=style.MOSS, symbolPen=None)
        self.kept_line = pg.InfiniteLine(angle=0, movable=False, label="kept fit",
                                         labelOpts={"position": 0.12, "color": style.INK_SOFT},
                                         pen=pg.mkPen(style.INK_SOFT, width=1, style=Qt.DashLine))
        self.kept_line.setVisible(False)
        self.curve_plot.addItem(self.kept_line)
        self.curve_caption = QLabel("Held-out fit score per step (higher is better); dashed: the kept fit.")
        self.curve_caption.setObjectName("Note")
        self.curve_caption.setWordWrap(True)
        lay.addWidget(self.curve_plot, 1)
        lay.addWidget(self.curve_caption)
        self._xs: list[float] = []
        self._ys: list[float] = []
        self._calls = 0
        self._stage = ""
        self.fit_button.clicked.connect(self.fitRequested)
        self.cancel_button.clicked.connect(self.cancelRequested)

    def _fold(self, on: bool) -> None:
        self.advanced.setVisible(on)
        self.advanced_button.setArrowType(Qt.DownArrow if on else Qt.RightArrow)

    # -- settings -------------------------------------------------------------
    def engine_settings(self) -> dict:
        """The engine keyword arguments changed here from the engine's defaults
        (an untouched panel gives {} so the recipe keeps the engine defaults)."""
        chosen = {"n_trees": int(self.n_trees.value()), "learning_rate": round(float(self.learning_rate.value()), 4),
                  "max_depth": int(self.max_depth.value()), "max_fit_events": int(self.max_events.value()),
                  "base": str(self.base.currentData())}
        out = {k: v for k, v in chosen.items() if v != self._defaults.get(k)}
        if int(self.seed.value()) != 0:
            out["random_state"] = int(self.seed.value())
        return out

    def set_engine_settings(self, engine: dict) -> None:
        if "n_trees" in engine:
            self.n_trees.setValue(int(engine["n_trees"]))
        if "learning_rate" in engine:
            self.learning_rate.setValue(float(engine["learning_rate"]))
        if "max_depth" in engine:
            self.max_depth.setValue(int(engine["max_depth"]))
        if "max_fit_events" in engine:
            self.max_events.setValue(int(engine["max_fit_events"]))
        if "base" in engine:
            i = self.base.findData(str(engine["base"]))
            if i >= 0:
                self.base.setCurrentIndex(i)
        if engine.get("random_state") is not None:
            self.seed.setValue(int(engine["random_state"]))

    # -- progress -------------------------------------------------------------
    def started(self) -> None:
        self._xs, self._ys = [], []
        self._calls = 0
        self._stage = ""
        self.curve.setData([], [])
        self.kept_line.setVisible(False)
        self.progress.setRange(0, 100)
        self.progress.setValue(0)
        self.fit_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.stage.setText("Preparing the events...")
        self.status.setText("Fitting...")

    def step(self, step: int, total, info) -> None:
        """One progress report of the engine (core.progress protocol)."""
        key, words = fit_stage(info)
        if key != self._stage:
            self._calls = 0
            self._stage = key
        self._calls += 1
        self.stage.setText(words)
        if key in ("mixture", "skew"):
            lo, hi = STAGE_SPANS[key]
            # the engine does not know how many iterations remain: move towards
            # the stage's end without reaching it
            self.progress.setValue(int(lo + (hi - lo) * (1.0 - math.exp(-self._calls / 40.0))))
            return
        if key != "trees":
            return
        lo, hi = STAGE_SPANS["trees"]
        if total:
            self.progress.setValue(int(lo + (hi - lo) * min(int(step), int(total)) / int(total)))
        ll = info.get("heldout_loglik") if isinstance(info, dict) else info
        if isinstance(ll, (int, float, np.floating)) and np.isfinite(ll):
            if self._xs and np.isfinite(self._xs[-1]) and int(step) <= self._xs[-1]:
                # a new layer starts again from the kept trees: a separate segment
                self._xs.append(np.nan)
                self._ys.append(np.nan)
            self._xs.append(int(step))
            self._ys.append(float(ll))
            self.curve.setData(np.array(self._xs, float), np.array(self._ys, float))
            self.status.setText(f"Tree {step}" + (f" of at most {total}" if total else "")
                                + f": held-out score {ll:.3f} nats per event")

    def ended(self, text: str) -> None:
        self.progress.setRange(0, 100)
        self.progress.setValue(100 if text.startswith("Fitted") else 0)
        self.fit_button.setEnabled(True)
        self.cancel_button.setEnabled(False)
        self.stage.setText("")
        self.status.setText(text)

    def show_curve(self, curve) -> None:
        """Show a finished fit's learning curve (held-out score per fit step)."""
        raw = np.asarray(curve if curve is not None else [], dtype=np.float64).ravel()
        ys = tried_steps(raw)  # the kept-value entries appended after a roll-back are not steps
        xs = np.arange(1, ys.size + 1, dtype=np.float64)
        self.curve.setData(xs, ys)
        if ys.size:
            self.kept_line.setValue(float(raw[-1]))  # the curve's last entry is the kept model's value
            self.kept_line.setVisible(True)
        else:
            self.kept_line.setVisible(False)
