"""The "Rarity" bar above the density map: the share of events highlighted as
rare (slider on a log scale and a percent box), their count, and "Keep as region"
(enabled only once a fit has ranked the events)."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import numpy as np
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QComboBox, QDoubleSpinBox, QHBoxLayout, QLabel, QPushButton, QSizePolicy, QSlider, QWidget

from core.recipe import RareRule
from desktop.plots import COLOUR_MODES

#: The rarity slider runs over shares from 0.01 % to 20 % on a log scale.
SHARE_MIN, SHARE_MAX, SLIDER_STEPS = 1e-4, 0.2, 1000


def share_to_slider(share: float) -> int:
    s = min(max(share, SHARE_MIN), SHARE_MAX)
    return int(round(SLIDER_STEPS * np.log(s / SHARE_MIN) / np.log(SHARE_MAX / SHARE_MIN)))


def slider_to_share(pos: int) -> float:
    return float(SHARE_MIN * (SHARE_MAX / SHARE_MIN) ** (pos / SLIDER_STEPS))


class RarityBar(QWidget):
    """The "Rarity" control: share of events to highlight as rare, and their count."""

    shareChanged = Signal(float)
    keepRequested = Signal(float)  # share: keep the highlighted rare events as a region
    colourChanged = Signal(str)    # a key of desktop.plots.COLOUR_MODES

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
        self.slider.setMinimumWidth(110)
        self.count = QLabel("Fit the density to rank events")
        self.count.setObjectName("RareCount")
        self.count.setMinimumWidth(150)
        self.count.setWordWrap(True)
        self.count.setSizePolicy(QSizePolicy.Preferred, QSizePolicy.Preferred)
        self.keep_button = QPushButton("Keep as region")
        self.keep_button.setEnabled(False)  # enabled once a fit has ranked the events
        self.keep_button.setToolTip("New region holding the events highlighted as rare now, so they can "
                                    "be counted, combined with other regions and exported")
        self.colour = QComboBox()
        self.colour.addItem("Colour: rank", "rank")
        self.colour.addItem("Colour: log density", "log")
        self.colour.setToolTip("Density rank: for each bin, the share of all events that are less dense "
                               "(0 % = rarest, 100 % = most common). Log density: the fitted density itself "
                               f"({COLOUR_MODES['log']}).")
        lay.addWidget(self.slider, 2)
        lay.addWidget(self.spin)
        lay.addWidget(self.count, 2)
        lay.addWidget(self.keep_button)
        lay.addWidget(self.colour)
        self.colour.currentIndexChanged.connect(lambda _i: self.colourChanged.emit(self.colour.currentData()))
        self.keep_button.clicked.connect(lambda: self.keepRequested.emit(self._share))
        self._share = RareRule().share   # the recipe's default rare share
        self.slider.valueChanged.connect(self._slid)
        self.spin.valueChanged.connect(self._typed)

    def show_count(self, text: str, fitted: bool) -> None:
        """The count line, and whether "Keep as region" can act (only after a fit)."""
        self.count.setText(text)
        self.keep_button.setEnabled(bool(fitted))

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


