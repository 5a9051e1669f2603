"""The "Contrast" panel: compare the current tube with a control tube.

Shows, in the panel itself, the progress of the run with the model being
fitted (this tube's density, then the control's and the test's part models of
the cross-fitting), then the result from :mod:`core.contrast`: the events new
against the control at the chosen false discovery rate, their count with its
95 % interval, the expected number of false discoveries and, beside them, the
whole-sample shift warning.  The numbers all come from core; this panel only
shows them.

Two settings sit above the button: the false discovery rate and the minimum
fold (density ratio) of a new event.  Their defaults are the recipe's
(:func:`core.analysis.comparison_settings` of a default recipe); their ranges
are the ones :func:`core.contrast.check_settings` accepts; the window writes
them into the recipe of the next contrast (and of a saved recipe).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import Signal
from PySide6.QtWidgets import QDoubleSpinBox, QFormLayout, QLabel, QProgressBar, QPushButton, QVBoxLayout, QWidget

from core.analysis import comparison_settings
from core.contrast import MAX_MIN_FOLD, MAX_RATE, MIN_RATE
from core.recipe import Recipe


def recipe_defaults() -> dict:
    """``{"rate", "min_fold"}`` of a recipe nobody changed: the one place the defaults live."""
    return comparison_settings(Recipe())


class ContrastPanel(QWidget):
    """Contrast with a control file: events new in this tube, at a false discovery rate."""

    chooseRequested = Signal()
    showRequested = Signal(bool)
    keepRequested = Signal()

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        lay = QVBoxLayout(self)
        head = QLabel("Contrast with a control")
        head.setObjectName("Heading")
        lay.addWidget(head)
        self.note = QLabel("Fits densities to this tube and to a control tube and marks the events that are "
                           "new here: at least the minimum fold denser than in the control, at the false "
                           "discovery rate set below (at 5 %, about 5 % of the marked events may be "
                           "control-like). "
                           "Populations that only grew are not the question here.")
        self.note.setObjectName("Note")
        self.note.setWordWrap(True)
        lay.addWidget(self.note)
        form = QFormLayout()
        self.rate = QDoubleSpinBox()
        self.rate.setDecimals(2)
        self.rate.setRange(100 * MIN_RATE, 100 * MAX_RATE)
        self.rate.setSingleStep(1.0)
        self.rate.setSuffix(" %")
        self.rate.setToolTip("False discovery rate: about this share of the events marked as new may in fact be "
                             "control-like. Lower it to mark fewer, surer events.")
        form.addRow("False discovery rate", self.rate)
        self.min_fold = QDoubleSpinBox()
        self.min_fold.setDecimals(1)
        self.min_fold.setRange(1.0, MAX_MIN_FOLD)
        self.min_fold.setSingleStep(0.5)
        self.min_fold.setSuffix(" x")
        self.min_fold.setToolTip("Minimum fold: an event is marked as new only where this tube is at least this "
                                 "many times denser than the control. 1 keeps every significant difference, "
                                 "however small.")
        form.addRow("Minimum fold", self.min_fold)
        lay.addLayout(form)
        self.set_comparison(recipe_defaults())
        self.choose = QPushButton("Choose control tube and contrast...")
        self.choose.setToolTip("Pick the control FCS file; the fits and the contrast run in the background (Ctrl+K)")
        lay.addWidget(self.choose)
        self.progress = QProgressBar()
        self.progress.setVisible(False)
        lay.addWidget(self.progress)
        self.stage = QLabel("")
        self.stage.setWordWrap(True)
        self.stage.setVisible(False)
        lay.addWidget(self.stage)
        self.result = QLabel("No control chosen")
        self.result.setWordWrap(True)
        lay.addWidget(self.result)
        self.warning = QLabel("")
        self.warning.setObjectName("Warning")
        self.warning.setWordWrap(True)
        self.warning.setStyleSheet("QLabel#Warning { color: #8a4b00; }")
        self.warning.setVisible(False)
        lay.addWidget(self.warning)
        self.show_enriched = QPushButton("Highlight the new events instead of rare ones")
        self.show_enriched.setCheckable(True)
        self.show_enriched.setEnabled(False)
        lay.addWidget(self.show_enriched)
        self.keep_button = QPushButton("Keep the new events as a region")
        self.keep_button.setToolTip("New region (kind: enriched) holding the events marked as new against the "
                                    "control, to count, combine and export them like any region")
        self.keep_button.setEnabled(False)
        lay.addWidget(self.keep_button)
        lay.addStretch(1)
        self.choose.clicked.connect(self.chooseRequested)
        self.show_enriched.toggled.connect(self.showRequested)
        self.keep_button.clicked.connect(self.keepRequested)

    # -- settings ----------------------------------------------------------
    def comparison_settings(self) -> dict:
        """``{"rate": fraction, "min_fold": ratio, "smallest_population": events}`` as set here (the
        recipe's ``comparison`` section; the smallest population is the recipe's, kept as shown)."""
        return {"rate": round(self.rate.value() / 100.0, 6), "min_fold": float(self.min_fold.value()),
                "smallest_population": self._smallest}

    def set_comparison(self, settings: dict) -> None:
        """Show a recipe's ``comparison`` settings (``{"rate", "min_fold"[, "smallest_population"]}``)."""
        self.rate.setValue(100.0 * float(settings["rate"]))
        self.min_fold.setValue(float(settings["min_fold"]))
        self._smallest = float(settings.get("smallest_population", recipe_defaults()["smallest_population"]))

    def show_recipe(self, recipe) -> None:
        """Show ``recipe``'s comparison settings (its defaults where it has none)."""
        self.set_comparison(comparison_settings(recipe))

    # -- a run -------------------------------------------------------------
    def started(self, control_path: str) -> None:
        """A contrast with ``control_path`` has started."""
        self.progress.setRange(0, 0)
        self.progress.setVisible(True)
        self.stage.setVisible(True)
        self.stage.setText("Fitting this tube's density...")
        self.result.setText(f"Contrasting with {os.path.basename(control_path)}...")
        self.warning.setVisible(False)
        self.choose.setEnabled(False)
        self.rate.setEnabled(False)
        self.min_fold.setEnabled(False)
        self.show_enriched.setEnabled(False)
        self.keep_button.setEnabled(False)

    def step(self, step: int, total, info) -> None:
        """Progress of the running fit; ``info["stage"]`` names the model (core.contrast)."""
        if total:
            self.progress.setRange(0, int(total))
            self.progress.setValue(min(int(step), int(total)))
        stage = str(info.get("stage") or "") if isinstance(info, dict) else ""
        if "part" not in stage:  # the tube's own density, fitted before the contrast's models
            stage = "This tube's density" + (f" -- {stage}" if stage else "")
        self.stage.setText(f"{stage}: step {step}" + (f" of at most {total}" if total else ""))

    def ended(self, text: str) -> None:
        """The run ended without a result (cancelled or failed)."""
        self.progress.setVisible(False)
        self.stage.setVisible(False)
        self.choose.setEnabled(True)
        self.rate.setEnabled(True)
        self.min_fold.setEnabled(True)
        self.result.setText(text)

    # -- results -----------------------------------------------------------
    def show_result(self, analysis, control_path: str | None) -> None:
        """Show the contrast of ``analysis`` (core.analysis.Analysis), or the state without one."""
        self.progress.setVisible(False)
        self.stage.setVisible(False)
        self.choose.setEnabled(True)
        self.rate.setEnabled(True)
        self.min_fold.setEnabled(True)
        c = None if analysis is None else analysis.contrast
        if c is None:
            self.result.setText("No control chosen" if not control_path else "Fit again to contrast")
            self.warning.setVisible(False)
            self.show_enriched.setEnabled(False)
            self.keep_button.setEnabled(False)
            return
        name = os.path.basename(control_path or analysis.info.get("control", "") or "")
        self.result.setText(
            f"Control: {name}\n"
            f"{c.count:,} new events ({100 * c.share:.3f} % of {c.info.get('n_test', 0):,}; 95 % interval "
            f"{100 * c.share_ci[0]:.3f}–{100 * c.share_ci[1]:.3f} %) at a false discovery rate of "
            f"{100 * c.rate:g} % and at least {c.min_fold:g}-fold denser than in the control; about "
            f"{c.expected_false:.1f} of them expected to be control-like.")
        shift = c.shift
        self.warning.setVisible(bool(shift is not None and shift.warn))
        self.warning.setText(f"Whole-sample shift? {shift.text}" if shift is not None and shift.warn else "")
        self.show_enriched.setEnabled(True)
        self.keep_button.setEnabled(c.count > 0)
