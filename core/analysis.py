"""One file through one recipe: compensation, transforms, cleaning, density, rarity, regions.

:func:`core.file_values.compensate_transform` is the ONE place where a
recipe's compensation and transforms are resolved for an event file (once per
file); the desktop app, the batch and :func:`analyse` all apply it.  The
stages after the fit live in :mod:`core.analysis_stages`.  ``analyse`` takes a
:class:`core.recipe.Recipe` (a stored-form dict is checked once into one).

:func:`analyse` then

1. takes the recipe's density channels and cleans and de-quantises them in
   one pass (:func:`density_input`; rules in :mod:`core.prepare`: reasons judged
   on RAW values, jitter in the units the file stores, seeded), then runs
   the atoms check;
2. fits an :class:`~core.density.AdditiveTreeDensity` with the recipe's engine
   settings (``random_state`` 0 unless the recipe sets it), passing
   ``progress`` through: returning False from it stops the fit cleanly and the
   analysis carries on with the trees fitted so far (``Analysis.cancelled``);
3. scores every kept event (natural-log density in the units of the
   transformed channels), gives each its rarity percentile (share 0-100 of the
   file's kept events with lower density) and the recipe's rare flag
   (:mod:`core.rare`);
4. evaluates the recipe's regions on the transformed values (not jittered:
   what the plots show) with the rarity;
4b. finds the populations (modes of the fitted density, :mod:`core.populations`)
   of the kept events, or counts those of the recipe's stored definition
   (``Analysis.populations``, ``population_labels``);
5. with a ``control`` file, contrasts the file with it (:mod:`core.contrast`:
   conformal p-values, Benjamini-Hochberg q-values, enriched events at the
   recipe's ``comparison`` rate and minimum fold, the whole-sample shift check)
   and counts one set of populations in both (grown and shrunk populations,
   ``Analysis.population_changes``).
   :func:`prepare_control_file` fits the control's part once
   (:class:`core.contrast.PreparedControl`); passing that as ``control``
   contrasts many files with one control without refitting it (the batch
   does so), with the same result as passing the control file.

Removed events stay in every per-event array with their reason
(``reason_code``: int8 codes of :data:`core.prepare.REASON_TEXTS`, one byte per
event; ``reason`` the same as text: "saturated", "ceiling pile", "floor pile",
"non-finite"; "" for kept events), NaN log density and NaN rarity; they are never rare and never
enriched.  ``Analysis.atoms`` names the density channels where one value
still holds more than 0.1 % of the kept events (the atoms check before
fitting; the fit goes on, and the app and the batch say so).

Shapes: per-event arrays have length n_events of the file; ``values`` is
(n_events, n_channels) over ALL the file's channels (transformed where the
recipe has a transform for the channel, otherwise as recorded after
compensation); ``prepared.matrix`` is (n_kept, n_density_channels).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .analysis_stages import (channel_labels, comparison_settings, contrast_stage, inverse_transforms,
                              populations_stage, scores_with_populations, scoring_populations_stage)
from .density import AdditiveTreeDensity
from .errors import Cancelled, EventDataError
from .file_values import (CompensateTransform, compensate_transform, compensated_and_transformed,
                          as_event_file, density_channel_indices, density_input)
from .prepare import CODE_KEPT, atoms as find_atoms, reason_codes, reason_counts, reason_texts
from .prepare_file import ValuesAside
from .progress import stop_relay
from .rare import rare_events, rarity_percentile, share_order
from .recipe import Recipe, validate_recipe
from .regions import RegionSet

# the names this module had before its stages moved out (kept for callers that import them here)
_channel_labels = channel_labels
_inverse_transforms = inverse_transforms
__all__ = ["Analysis", "CompensateTransform", "analyse", "comparison_settings", "compensate_transform",
           "compensated_and_transformed", "density_channel_indices", "density_input", "prepare_control_file"]


def _engine_kwargs(recipe: Recipe) -> dict:
    """The engine's keyword arguments (kept for callers of the old name; see Recipe.engine_arguments)."""
    return recipe.engine_arguments()


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------

@dataclass
class Analysis:
    """Everything :func:`analyse` computed for one file (see the module docstring)."""

    path: str
    channel_names: list           # all channels of the file
    values: np.ndarray            # (n_events, n_channels) transformed, not jittered
    density_channels: list        # the recipe's channels, in the model's column order
    prepared: Any                 # core.prepare.PreparedEvents
    model: Any                    # fitted AdditiveTreeDensity
    log_density: np.ndarray       # (n_events,) natural log; NaN for removed events
    rarity: np.ndarray            # (n_events,) 0-100; NaN for removed events
    rare: np.ndarray              # (n_events,) bool
    rare_level: float             # log-density threshold of the rare rule
    reason_code: np.ndarray       # (n_events,) int8 code of core.prepare.REASON_TEXTS (0 kept); see reason
    region_masks: dict            # name -> bool (n_events,)
    heldout_loglik: float         # held-out mean log-likelihood of the fit (nats per event)
    timing: dict                  # stage -> seconds
    recipe: Any = None
    cancelled: bool = False       # the fit was stopped early through progress
    contrast: Any = None          # core.contrast.ContrastResult over kept events, or None
    enriched: np.ndarray | None = None         # (n_events,) bool when contrasted
    contrast_score: np.ndarray | None = None   # (n_events,) NaN for removed events
    populations: Any = None       # core.populations.Populations over kept events, or None
    population_labels: np.ndarray | None = None   # (n_events,) int, -1 none / removed
    population_changes: list | None = None     # grown/shrunk table with a control (core.populations)
    control_populations: Any = None            # populations counted on the control's events
    contrast_p: np.ndarray | None = None       # (n_events,) conformal p-value; NaN for removed events
    contrast_q: np.ndarray | None = None       # (n_events,) Benjamini-Hochberg q-value; NaN for removed
    contrast_local: np.ndarray | None = None   # (n_events,) local neighbour score (nats); NaN removed / off
    contrast_local_fold: np.ndarray | None = None   # (n_events,) local log fold (nats); NaN removed / off
    info: dict = field(default_factory=dict)
    #: density channel -> share of the kept events on its most frequent value, for the
    #: channels above core.prepare.ATOM_SHARE (the atoms check before fitting)
    atoms: dict = field(default_factory=dict)
    #: indices of the kept events from the lowest log density up, ties by event order
    #: (core.rare.share_order of log_density; None when not computed)
    density_order: np.ndarray | None = None

    def __post_init__(self):
        self.reason_code = reason_codes(self.reason_code)   # texts are accepted too; codes are checked

    @property
    def n_events(self) -> int:
        return int(self.log_density.shape[0])

    @property
    def reason(self) -> np.ndarray:
        """(n_events,) str: "" for kept events, else a ``core.prepare.REASONS`` entry (built from
        ``reason_code`` on each call)."""
        return reason_texts(self.reason_code)

    @property
    def kept(self) -> np.ndarray:
        return self.reason_code == CODE_KEPT

    @property
    def n_kept(self) -> int:
        return int(np.count_nonzero(self.kept))

    @property
    def n_rare(self) -> int:
        return int(np.count_nonzero(self.rare))

    @property
    def set_aside(self) -> dict:
        """Events set aside per reason, every reason of ``core.prepare.REASONS`` (zeros included)."""
        return reason_counts(self.reason_code)

    def cleaning_text(self) -> str:
        """One line for people: kept events, events set aside by reason, atoms left in the density."""
        aside = [f"{v:,} {r}" for r, v in self.set_aside.items() if v]
        text = f"{self.n_kept:,} of {self.n_events:,} events kept"
        if aside:
            text += " (set aside: " + ", ".join(aside) + ")"
        if self.atoms:
            text += "; atoms left: " + ", ".join(f"{c} ({100 * v:.2g} % of the kept events on one value)"
                                                 for c, v in self.atoms.items())
        return text

    def export_columns(self) -> dict:
        """Per-event parameters an FCS/CSV export adds, name -> (n_events,) float64.

        FCS float data should hold no NaN, so removed events carry log density
        0 and rarity percentile -1, and ``cleaning flag`` says why
        (``core.prepare.CLEANING_FLAGS``: 0 kept, 1 saturated, 2 non-finite,
        3 floor pile, 4 ceiling pile).  With a control: ``contrast score``
        (nats; 0 for removed events), ``contrast local`` and ``contrast local
        fold`` (the local neighbour score and its log fold, nats, 0 for removed
        events; only when computed: :mod:`core.contrast_local`),
        ``contrast p`` and ``contrast q`` (1 for removed events) and ``enriched`` (0/1).  ``population``: the
        event's population number as users see it (id + 1; 0 for none or
        removed) when populations were found.
        """
        kept = self.kept
        flag = self.reason_code.astype(np.float64)   # the reason codes are the cleaning flags
        cols = {"log density": np.where(kept, self.log_density, 0.0),
                "rarity percentile": np.where(kept, self.rarity, -1.0),
                "cleaning flag": flag}
        if self.population_labels is not None:
            cols["population"] = self.population_labels.astype(float) + 1.0   # 1, 2, ...; 0 none
        if self.contrast_score is not None:
            cols["contrast score"] = np.where(np.isfinite(self.contrast_score), self.contrast_score, 0.0)
            for name, v in (("contrast local", self.contrast_local), ("contrast local fold", self.contrast_local_fold)):
                if v is not None:
                    cols[name] = np.where(np.isfinite(v), v, 0.0)
            if self.contrast_p is not None:
                cols["contrast p"] = np.where(np.isfinite(self.contrast_p), self.contrast_p, 1.0)
                cols["contrast q"] = np.where(np.isfinite(self.contrast_q), self.contrast_q, 1.0)
            cols["enriched"] = self.enriched.astype(float)
        return cols

    def table(self):
        """One row per event (pandas.DataFrame), removed events included.

        Columns: ``event`` (0-based index in the file), every channel's
        transformed value, ``log density``, ``rarity percentile``, ``rare``,
        ``reason``, ``population`` (id, -1 none), one bool column per region (``region: NAME``) and, when
        contrasted, ``contrast score``, ``contrast local`` and ``contrast local fold`` (when
        computed), ``contrast p``,
        ``contrast q`` and ``enriched``.
        """
        # imported here: pandas adds ~0.4 s to importing core.analysis; only table() needs it
        import pandas as pd

        cols: dict[str, Any] = {"event": np.arange(self.n_events)}
        for j, name in enumerate(self.channel_names):
            cols[name] = self.values[:, j]
        cols["log density"] = self.log_density
        cols["rarity percentile"] = self.rarity
        cols["rare"] = self.rare
        cols["reason"] = self.reason
        if self.population_labels is not None:
            cols["population"] = self.population_labels
        for name, m in self.region_masks.items():
            cols[f"region: {name}"] = m
        if self.contrast_score is not None:
            cols["contrast score"] = self.contrast_score
            if self.contrast_local is not None:
                cols["contrast local"] = self.contrast_local
                cols["contrast local fold"] = self.contrast_local_fold
            if self.contrast_p is not None:
                cols["contrast p"] = self.contrast_p
                cols["contrast q"] = self.contrast_q
            cols["enriched"] = self.enriched
        return pd.DataFrame(cols)


def prepare_control_file(control: Any, recipe: Recipe, progress=None):
    """The control's part of the contrast, computed once for many test files.

    ``control``: an EventFile or a path; validated against ``recipe`` and
    prepared like any analysed file (:func:`density_input`), then
    :func:`core.contrast.prepare_control` with the recipe's engine settings and
    seed.  Returns a :class:`core.contrast.PreparedControl` whose ``source`` is
    the control file's path; pass it to :func:`analyse` as ``control``.
    ``progress(step, total, info)`` goes to the control fit (False: Cancelled).
    """
    # imported here: core.contrast loads scipy.stats (~1.3 s); only a contrast needs it
    from .contrast import prepare_control

    control_file = as_event_file(control)
    recipe = validate_recipe(recipe, control_file)
    c_prepared, _ = density_input(control_file, recipe)
    engine = recipe.engine_arguments()
    return prepare_control(c_prepared.matrix, engine=engine, random_state=engine["random_state"],
                           progress=progress, source=os.fspath(control_file.path))


def analyse(event_file: Any, recipe: Recipe, progress=None, control: Any = None,
            rate: float | None = None, min_fold: float | None = None) -> Analysis:
    """Fit the recipe's density to ``event_file`` and derive rarity, rare events and regions.

    ``event_file``: a :class:`core.fcs.EventFile` (or a path to read).
    ``recipe``: a :class:`core.recipe.Recipe` (or its stored-form dict); validated
    against the file first, and the validated recipe is the one used and kept.
    ``progress(step, total, info) -> bool``: passed to the fit(s); during the
    contrast ``info`` is a dict naming the model being fitted (``"stage"``).
    ``control``: optional control EventFile or path; the file is then contrasted
    with it (:func:`core.contrast.contrast`; ``rate`` the false discovery rate
    and ``min_fold`` the smallest density ratio of an enriched event, default
    the recipe's ``comparison`` section).  ``control`` may also be a
    :class:`core.contrast.PreparedControl` from :func:`prepare_control_file`
    with the same recipe: the control is then not refitted (same result).
    Enriched regions (``core.regions``) are evaluated after the contrast; without
    a control they, and regions built on them, are left out of ``region_masks``
    (named in ``info["regions_without_control"]``).
    """
    timing: dict[str, float] = {}
    t0 = time.perf_counter()
    event_file = as_event_file(event_file)
    recipe = validate_recipe(recipe, event_file)
    prepared, values = density_input(event_file, recipe)   # the file's compensate-and-transform step, once
    n = prepared.kept.shape[0]
    n_kept = int(np.count_nonzero(prepared.kept))
    if n_kept < 50:
        raise EventDataError(f"{os.path.basename(event_file.path)}: only {n_kept} of {n} events are usable "
                             "after cleaning; at least 50 are needed to fit a density")
    atoms = find_atoms(prepared.matrix, list(recipe.channels))
    # the values are not needed until the regions: held without the density matrix's
    # columns through the fit and the populations (the fit's peak memory), rebuilt after
    aside = ValuesAside(values, prepared)
    del values
    timing["prepare"] = time.perf_counter() - t0

    relay, stopped = stop_relay(progress)

    t1 = time.perf_counter()
    engine = recipe.engine_arguments()
    model = AdditiveTreeDensity(**engine)
    model.fit(prepared.matrix, progress=relay)
    timing["fit"] = time.perf_counter() - t1

    populations = population_labels = None
    log_density = np.full(n, np.nan)
    scored = False
    if not stopped and scores_with_populations(recipe, model):
        # a mixture alone: one pass over the kept events scores them and assigns them
        # to the populations (the populations stage's seconds include that pass)
        t_pop = time.perf_counter()
        try:
            populations, population_labels, log_density[prepared.kept] = scoring_populations_stage(
                event_file, recipe, model, prepared, relay)
            scored = True
        except Cancelled:
            pass   # stopped while finding populations: scored below, the rest of the analysis stands
        timing["populations"] = time.perf_counter() - t_pop

    t2 = time.perf_counter()
    if not scored:
        log_density[prepared.kept] = model.score_samples(prepared.matrix)
    order = share_order(log_density)      # one sort serves the rarity, the rare rule and the app's share
    rarity = rarity_percentile(log_density, order)
    rare_res = rare_events(log_density, recipe.rare, model=model, random_state=engine["random_state"],
                           order=order)
    timing["score"] = time.perf_counter() - t2

    if "populations" not in timing:
        t_pop = time.perf_counter()
        if not stopped:
            try:
                populations, population_labels = populations_stage(event_file, recipe, model, prepared,
                                                                   log_density, relay)
            except Cancelled:
                pass   # stopped while finding populations: the rest of the analysis stands
        timing["populations"] = time.perf_counter() - t_pop

    t3 = time.perf_counter()
    values = aside.restore(prepared.matrix)
    del aside
    masks: dict = {}
    regions = by_channel = None
    if recipe.regions:
        regions = recipe.region_set()
        by_channel = {name: values[:, j] for j, name in enumerate(event_file.channel_names)}
        needs_control = regions.depending_on("enriched")
        if not needs_control:
            masks = regions.evaluate(by_channel, rarity, n_events=n)
        elif control is None:  # regions of new events mean nothing without a control: left out
            masks = RegionSet([r for r in regions if r.name not in needs_control]).evaluate(by_channel, rarity,
                                                                                            n_events=n)
        # with a control, regions of new events are evaluated after the contrast
    timing["regions"] = time.perf_counter() - t3

    result = Analysis(path=os.fspath(event_file.path), channel_names=list(event_file.channel_names),
                      values=values, density_channels=list(recipe.channels), prepared=prepared,
                      model=model, log_density=log_density, rarity=rarity, rare=rare_res.mask,
                      rare_level=rare_res.log_level, reason_code=prepared.reason_code,
                      region_masks=masks, heldout_loglik=float(getattr(model, "heldout_loglik_", np.nan)),
                      timing=timing, recipe=recipe, cancelled=bool(stopped), atoms=atoms,
                      populations=populations, population_labels=population_labels, density_order=order)
    if regions is not None and control is None and regions.depending_on("enriched"):
        result.info["regions_without_control"] = regions.depending_on("enriched")
    if control is not None and not stopped:
        contrast_stage(result, event_file, recipe, control, rate, min_fold, engine, progress, regions, by_channel)
    timing["total"] = time.perf_counter() - t0
    return result
