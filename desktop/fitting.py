"""Background work of the window: density fits (with or without a control)
and the contour lines drawn after them.

One :class:`Job` at a time.  The fitted result is stored on the tube it was
started for through :meth:`core.session.Session.fit_finished`, even when the
analyst has switched to another tube meanwhile; only the current tube is drawn.
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import numpy as np
from PySide6.QtCore import QObject, Signal

from core.analysis import analyse
from core.contours import pair_density
from core.progress import keep_going
from core.recipe import Engine, validate_recipe
from desktop.messages import error_text, show_error
from desktop.panels.fit import PANEL_KEYS
from desktop.plot_items import contour_lines
from desktop.workers import Job

#: Settings of the small 2-D densities behind the contour lines (per pair).
CONTOUR_ENGINE = {"n_trees": 25, "max_fit_events": 5_000, "patience": 5}
CONTOUR_EVENTS = 5_000
CONTOUR_LEVEL_SAMPLES = 5_000
#: How the fit text names each first map of the engine (``base_``).
BASE_NAMES = {"skewed": "mixture of skewed groups", "gmm": "mixture of Gaussian groups",
              "logistic": "per-channel start"}


def fit_text(a) -> str:
    """One paragraph on a finished fit, in the analyst's words."""
    n_trees = getattr(a.model, "n_trees_", None)
    start = BASE_NAMES.get(getattr(a.model, "base_", ""), "")
    secs = a.timing.get("total", float("nan")) if isinstance(a.timing, dict) else float("nan")
    if n_trees == 0:
        how = f"{start or 'the start'} alone (trees brought no gain on held-out events)"
    else:
        how = f"{start + ' + ' if start else ''}{n_trees if n_trees is not None else '?'} trees"
    return (f"Fitted: {how}. Held-out score {a.heldout_loglik:.3f} nats per event; "
            f"{a.cleaning_text()}; {secs:.1f} s.")


def compute_contours(analysis, pairs, extents, progress=None) -> list:
    """Highest-density-region contour lines (50/90/99 %) for each plotted pair.

    Each pair gets a small 2-D additive tree density fitted by
    :func:`core.contours.pair_density` to at most ``CONTOUR_EVENTS`` kept
    events (fixed seed).  Returns [((ix, iy), lines)]."""
    kept = np.flatnonzero(analysis.kept)
    if kept.size > CONTOUR_EVENTS:
        kept = np.sort(np.random.default_rng(0).choice(kept, CONTOUR_EVENTS, replace=False))
    out = []
    for k, (ix, iy) in enumerate(pairs):
        if not keep_going(progress, k, len(pairs), {"stage": f"Contours {k + 1} of {len(pairs)}"}):
            break
        xy = analysis.values[kept][:, [ix, iy]]
        ext = extents.get((ix, iy))
        kw = {} if ext is None else {"x_range": ext[:2], "y_range": ext[2:]}
        pd = pair_density(xy, grid_size=64, engine=CONTOUR_ENGINE, n_level_samples=CONTOUR_LEVEL_SAMPLES, **kw)
        levels = [pd.levels[m] for m in sorted(pd.levels)]
        out.append(((ix, iy), contour_lines(pd.log_density, pd.x_centres, pd.y_centres, levels)))
    return out


class FitController(QObject):
    """Starts, follows and ends the window's background jobs."""

    fitEnded = Signal(bool)
    contoursEnded = Signal(bool)

    def __init__(self, window) -> None:
        super().__init__(window)
        self.win = window
        self.job: Job | None = None
        self.job_path: str | None = None  # the tube the running job works on
        self.kind = ""
        self.last_problem = ""

    def running(self) -> bool:
        return self.job is not None and self.job.running

    def recipe_for_fit(self, tube):
        """The tube's recipe with its regions, the Fit panel's engine settings and the Contrast panel's
        false discovery rate and minimum fold."""
        recipe = tube.recipe_with_regions()
        engine = {k: v for k, v in recipe.engine.items() if k not in PANEL_KEYS}
        engine.update(self.win.fit_panel.engine_settings())
        recipe.engine = Engine(engine)
        recipe.comparison = self.win.contrast_panel.comparison_settings()
        return recipe

    def start_fit(self, control: str | None = None) -> bool:
        tube = self.win.session.require()
        if self.running():
            self.win.statusBar().showMessage("A fit is already running: wait for it or press Stop", 4000)
            return False
        recipe = self.recipe_for_fit(tube)
        validate_recipe(recipe, tube.event_file)
        ef = tube.event_file

        def work(progress):
            return analyse(ef, recipe, progress=progress, control=control)

        self._start("contrast" if control else "fit", tube.path, work,
                    lambda result: self._fit_done(tube, recipe, result, control), self._fit_stopped)
        self.win.fit_panel.started()
        if control:  # a contrast shows its progress where the analyst is looking: the Contrast panel
            self.win.contrast_panel.started(control)
            self.win.fit_panel.status.setText("Contrasting with a control: progress in the Contrast panel")
            self.win.show_panel(self.win.contrast_panel)
        return True

    def start_contours(self) -> bool:
        """Compute the contour lines of every plotted pair in the background."""
        tube = self.win.session.current
        if tube is None or tube.analysis is None or self.running():
            return False
        pairs = list(tube.pairs)
        extents = {p: self.win.map_view.pair_extent(p) for p in pairs}
        analysis = tube.analysis

        def done(contours):
            self._ended()
            tube.contours = contours
            if tube is self.win.session.current:
                self.win.map_view.draw_contours(tube)
            self.win.fit_panel.ended(fit_text(analysis))
            self.contoursEnded.emit(True)

        def stopped():
            self._ended()
            self.win.fit_panel.ended(fit_text(analysis))
            self.contoursEnded.emit(False)

        self._start("contours", tube.path, lambda progress: compute_contours(analysis, pairs, extents, progress),
                    done, stopped)
        self.win.fit_panel.status.setText("Drawing contours...")
        return True

    def cancel(self) -> None:
        if self.job is not None:
            self.job.cancel()
            self.win.statusBar().showMessage("Stopping...", 3000)

    # -- internals ---------------------------------------------------------------
    def _start(self, kind, path, work, on_done, on_stop) -> None:
        job = Job(work, kind, self)
        job.progressed.connect(self._progress)
        job.finished.connect(on_done)
        job.cancelled.connect(on_stop)
        job.failed.connect(self._failed)
        self.job, self.kind, self.job_path = job, kind, path
        self.win.act_cancel.setEnabled(True)
        self.win.act_fit.setEnabled(False)
        job.start()

    def _progress(self, step, total, info) -> None:
        if self.kind == "contrast":
            self.win.contrast_panel.step(step, total, info)
        elif self.kind == "fit":
            self.win.fit_panel.step(step, total, info)
        elif self.kind == "contours" and isinstance(info, dict):
            self.win.fit_panel.status.setText(str(info.get("stage", "")))

    def _ended(self) -> None:
        self.win.act_cancel.setEnabled(False)
        self.win.act_fit.setEnabled(True)
        self.job = None
        self.job_path = None

    def _fit_done(self, tube, recipe, result, control) -> None:
        self._ended()
        problem = self.win.session.fit_finished(tube, recipe, result, control)
        if problem:
            self.last_problem = problem
            self.win.fit_panel.ended(f"Not used: {problem}.")
            self.fitEnded.emit(False)
            return
        self.win.tubes_list.mark(tube.path, "•")
        if tube is self.win.session.current:
            self.win.show_fit(tube)
        self.fitEnded.emit(True)
        if self.win.act_contours.isChecked() and tube is self.win.session.current:
            self.start_contours()

    def _fit_stopped(self) -> None:
        self._ended()
        self.last_problem = "cancelled"
        tube = self.win.session.current
        self.win.fit_panel.ended("Cancelled: the previous state is kept." if tube and tube.analysis is not None
                                 else "Cancelled: not fitted.")
        if self.kind == "contrast":
            self.win.contrast_panel.ended("Contrast cancelled.")
        self.fitEnded.emit(False)

    def _failed(self, exc, tb) -> None:
        kind = self.kind
        self._ended()
        self.last_problem = error_text(exc)
        if kind in ("fit", "contrast"):
            self.win.fit_panel.ended(f"The fit stopped: {self.last_problem}")
            if kind == "contrast":
                self.win.contrast_panel.ended(f"The contrast stopped: {self.last_problem}")
            show_error(self.win, "fit", exc, tb)
            self.fitEnded.emit(False)
        elif kind == "contours":
            self.win.fit_panel.status.setText(f"Contours were not drawn: {self.last_problem}")
            show_error(self.win, "contours", exc, tb)
            self.contoursEnded.emit(False)
        else:
            show_error(self.win, kind, exc, tb)
