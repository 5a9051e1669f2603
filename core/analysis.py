"""One file through one recipe: compensation, transforms, cleaning, density, rarity, regions.

:func:`compensated_and_transformed` is the ONE place where a recipe's
compensation and transforms are applied to an event file; the desktop app,
the batch and :func:`analyse` all call it.

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

Removed events stay in every per-event array with their ``reason``
("saturated", "ceiling pile", "floor pile", "non-finite"; "" for kept
events), NaN log density and NaN rarity; they are never rare and never
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
from typing import Any, Mapping

import numpy as np

from .errors import ChannelError, EventDataError, RecipeError
from .progress import stop_relay


# ---------------------------------------------------------------------------
# recipe access helpers (the recipe is a dataclass; accept plain dicts too)
# ---------------------------------------------------------------------------

def _get(recipe: Any, key: str, default: Any = None) -> Any:
    if isinstance(recipe, Mapping):
        return recipe.get(key, default)
    return getattr(recipe, key, default)


def _engine_kwargs(recipe: Any) -> dict:
    if hasattr(recipe, "engine_arguments"):
        return recipe.engine_arguments()
    engine = dict(_get(recipe, "engine", None) or {})
    engine.setdefault("random_state", 0)
    return engine


def _spillover(event_file: Any, recipe: Any):
    """The spillover matrix the recipe asks for, or None."""
    from . import compensation

    comp = _get(recipe, "compensation", None) or {"source": "none"}
    source = comp.get("source", "none")
    if source == "none":
        return None
    if source == "file":
        S = compensation.spillover_from_keywords(event_file.keywords, source=os.path.basename(event_file.path))
        if S is None:
            raise RecipeError(f"{os.path.basename(event_file.path)}: the recipe asks for the file's spillover "
                              "matrix but the file has none ($SPILLOVER/SPILL); set compensation to 'none' "
                              "or give a CSV matrix")
        return S
    if source == "csv":
        path = recipe.csv_path_resolved() if hasattr(recipe, "csv_path_resolved") else comp.get("csv_path")
        if not path:
            raise RecipeError("the recipe's compensation source is 'csv' but no csv_path is given")
        return compensation.read_spillover_csv(path)
    raise RecipeError(f"unknown compensation source {source!r}; use 'file', 'csv' or 'none'")


def compensated_and_transformed(event_file: Any, recipe: Any, raw: np.ndarray | None = None
                                ) -> tuple[list[str], np.ndarray]:
    """All channels of ``event_file`` compensated and transformed as ``recipe`` says.

    Returns ``(channel_names, values)`` with values (n_events, n_channels)
    float64: compensated by the recipe's spillover matrix (only its detectors
    change), then each channel with an entry in ``recipe.transforms`` mapped by
    that transform's ``forward``; channels without one keep their compensated
    values.  ``raw`` replaces ``event_file.data`` (same shape), e.g. de-quantised
    raw values; the file's data are never modified.
    """
    from .prepare_file import transformed_values

    names = list(event_file.channel_names)
    values = transformed_values(event_file.data if raw is None else raw, names, _spillover(event_file, recipe),
                                _get(recipe, "transforms", None) or {}, os.path.basename(event_file.path))
    return names, values


def density_channel_indices(event_file: Any, recipe: Any) -> list[int]:
    """Column indices of the recipe's density channels in ``event_file`` (ChannelError if missing)."""
    names = list(event_file.channel_names)
    chans = list(_get(recipe, "channels", None) or [])
    if not chans:
        raise RecipeError("the recipe names no channels for the density")
    missing = [c for c in chans if c not in names]
    if missing:
        raise ChannelError(f"{os.path.basename(event_file.path)}: the recipe's channel(s) {', '.join(missing)} "
                           f"are not in the file; its channels are {', '.join(names)}")
    return [names.index(c) for c in chans]


def density_input(event_file: Any, recipe: Any):
    """The cleaned, de-quantised, compensated, transformed matrix the density sees.

    Returns ``(prepared, values)``: ``prepared`` a :class:`core.prepare.PreparedEvents`
    over the recipe's density channels (``matrix`` n_kept x d, ``kept``,
    ``reason`` per event) and ``values`` the transformed values of all
    channels without jitter (for plots and regions).

    One pass (see :mod:`core.prepare` for each rule):

    1. ``values``: every channel compensated and transformed once
       (:func:`compensated_and_transformed`; the one full-size copy).
    2. Reasons from the raw values: non-finite in any channel; saturation and
       floor/ceiling piles of the density channels and, when compensating, of
       the spillover detectors that feed them (recipe ``cleaning``).
    3. Only the raw channels that feed the density and sit on a grid are
       jittered (integers in stored units before $PnE/$PnG decoding, float
       grids by half their step), on the kept events only; their density
       columns are compensated (when compensating) and transformed again.
       Every other density column is taken from ``values``.
    """
    from .prepare_file import prepare_file_events

    cleaning = dict(_get(recipe, "cleaning", None) or {})
    idx = density_channel_indices(event_file, recipe)
    names, values = compensated_and_transformed(event_file, recipe)
    prepared = prepare_file_events(
        event_file, idx, _spillover(event_file, recipe), _get(recipe, "transforms", None) or {}, values,
        drop_saturated=bool(cleaning.get("drop_saturated", True)), drop_piles=bool(cleaning.get("drop_piles", True)),
        dequantise=bool(cleaning.get("dequantise", True)), random_state=_engine_kwargs(recipe)["random_state"],
        where=os.path.basename(event_file.path))
    return prepared, values


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
    reason: np.ndarray            # (n_events,) "" or a core.prepare.REASONS entry
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
    info: dict = field(default_factory=dict)
    #: density channel -> share of the kept events on its most frequent value, for the
    #: channels above core.prepare.ATOM_SHARE (the atoms check before fitting)
    atoms: dict = field(default_factory=dict)

    @property
    def n_events(self) -> int:
        return int(self.log_density.shape[0])

    @property
    def kept(self) -> np.ndarray:
        return self.reason == ""

    @property
    def n_kept(self) -> int:
        return int(np.count_nonzero(self.kept))

    @property
    def n_rare(self) -> int:
        return int(np.count_nonzero(self.rare))

    @property
    def set_aside(self) -> dict:
        """Events set aside per reason, every reason of ``core.prepare.REASONS`` (zeros included)."""
        from .prepare import REASONS

        return {r: int(np.count_nonzero(self.reason == r)) for r in REASONS}

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
        (nats; 0 for removed events), ``contrast p`` and ``contrast q``
        (1 for removed events) and ``enriched`` (0/1).  ``population``: the
        event's population number as users see it (id + 1; 0 for none or
        removed) when populations were found.
        """
        from .prepare import CLEANING_FLAGS

        kept = self.kept
        flag = np.zeros(self.n_events)
        for r, f in CLEANING_FLAGS.items():
            if f:
                flag[self.reason == r] = float(f)
        cols = {"log density": np.where(kept, self.log_density, 0.0),
                "rarity percentile": np.where(kept, self.rarity, -1.0),
                "cleaning flag": flag}
        if self.population_labels is not None:
            cols["population"] = self.population_labels.astype(float) + 1.0   # 1, 2, ...; 0 none
        if self.contrast_score is not None:
            cols["contrast score"] = np.where(np.isfinite(self.contrast_score), self.contrast_score, 0.0)
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
        contrasted, ``contrast score``, ``contrast p``, ``contrast q`` and ``enriched``.
        """
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
            if self.contrast_p is not None:
                cols["contrast p"] = self.contrast_p
                cols["contrast q"] = self.contrast_q
            cols["enriched"] = self.enriched
        return pd.DataFrame(cols)


def _channel_labels(event_file: Any, channels: list) -> list:
    names = list(event_file.channel_names)
    labels = list(getattr(event_file, "channel_labels", None) or [""] * len(names))
    return [labels[names.index(c)] for c in channels]


def _populations_stage(event_file, recipe, model, prepared, log_density, progress):
    """Populations of the kept events (:mod:`core.populations`): counted with the
    recipe's stored definition when it has one, else found on the fitted model.
    Returns (Populations, labels (n_events,) with -1 for removed events)."""
    from .populations import count_populations, find_populations

    settings = dict(_get(recipe, "populations", None) or {})
    chans = list(_get(recipe, "channels"))
    labels = _channel_labels(event_file, chans)
    transforms = _get(recipe, "transforms", None) or {}
    stored = settings.pop("definition", None)
    if stored is not None:
        pops = count_populations(stored, prepared.matrix, chans, labels, transforms, settings)
    else:
        pops = find_populations(model, prepared.matrix, chans, labels, transforms, settings,
                                log_density=log_density[prepared.kept], progress=progress)
    full = np.full(prepared.kept.shape[0], -1, dtype=np.int64)
    full[prepared.kept] = pops.labels
    return pops, full


def _population_change_stage(result, event_file, recipe, res, control) -> None:
    """Grown and shrunk populations: ONE definition (the recipe's stored one, else
    found on the control's model and events) counted in the control and in the
    test file; :func:`core.populations.population_changes`.  ``control`` is the
    control's prepared matrix or a PreparedControl (its ``events``; the
    definition found is kept on it as ``populations_definition`` for the next
    file).  The control's model is its first part model (the contrast fits K
    part models of the control, each without one part of its events)."""
    from .populations import (PopulationDefinition, assign_populations, count_populations,
                              find_populations, population_changes)

    settings = dict(_get(recipe, "populations", None) or {})
    chans = list(_get(recipe, "channels"))
    labels = _channel_labels(event_file, chans)
    transforms = _get(recipe, "transforms", None) or {}
    stored = settings.pop("definition", None)
    c_events = control if isinstance(control, np.ndarray) else getattr(control, "events", None)
    c_model = getattr(control, "models", None) if not isinstance(control, np.ndarray) else None
    if c_model is None:
        c_model = getattr(res, "control_model", None)
    if isinstance(c_model, (list, tuple)):
        c_model = c_model[0] if c_model else None
    if c_events is None or (stored is None and c_model is None):
        return
    cached = None if isinstance(control, np.ndarray) else getattr(control, "populations_definition", None)
    if stored is not None:
        definition = PopulationDefinition.from_dict(stored)
    elif cached is not None:
        definition = cached
    else:
        definition = find_populations(c_model, c_events, chans, labels, transforms, settings).definition
        if not isinstance(control, np.ndarray):
            try:   # found once per prepared control, reused for every file contrasted with it
                control.populations_definition = definition
            except AttributeError:
                pass
    result.control_populations = count_populations(definition, c_events, chans, labels, transforms, settings)
    test_labels = assign_populations(definition, result.prepared.matrix)
    result.population_changes = population_changes(result.control_populations.labels, test_labels, definition)
    short = {r["id"]: r["short_profile"] for r in result.control_populations.table}
    for row in result.population_changes:
        row["profile"] = definition.names[row["id"]]
        row["short_profile"] = short[row["id"]]


def _as_event_file(obj: Any):
    if isinstance(obj, (str, os.PathLike)):
        from .fcs import read_fcs

        return read_fcs(obj)
    return obj


def prepare_control_file(control: Any, recipe: Any, progress=None):
    """The control's part of the contrast, computed once for many test files.

    ``control``: an EventFile or a path; validated against ``recipe`` and
    prepared like any analysed file (:func:`density_input`), then
    :func:`core.contrast.prepare_control` with the recipe's engine settings and
    seed.  Returns a :class:`core.contrast.PreparedControl` whose ``source`` is
    the control file's path; pass it to :func:`analyse` as ``control``.
    ``progress(step, total, info)`` goes to the control fit (False: Cancelled).
    """
    from .contrast import prepare_control
    from .recipe import validate_recipe

    control_file = _as_event_file(control)
    validate_recipe(recipe, control_file)
    c_prepared, _ = density_input(control_file, recipe)
    engine = _engine_kwargs(recipe)
    return prepare_control(c_prepared.matrix, engine=engine, random_state=engine["random_state"],
                           progress=progress, source=os.fspath(control_file.path))


def comparison_settings(recipe: Any, rate: float | None = None, min_fold: float | None = None) -> dict:
    """``{"rate", "min_fold"}`` of a contrast: the given values, else the recipe's ``comparison`` section,
    else the defaults of :mod:`core.contrast`."""
    from .contrast import DEFAULT_MIN_FOLD, DEFAULT_RATE

    cmp = dict(_get(recipe, "comparison", None) or {})
    return {"rate": float(rate if rate is not None else cmp.get("rate", DEFAULT_RATE)),
            "min_fold": float(min_fold if min_fold is not None else cmp.get("min_fold", DEFAULT_MIN_FOLD))}


def _inverse_transforms(recipe: Any, channels: list) -> list:
    """Per density channel, the inverse of its transform (None when untransformed): instrument units."""
    from .transforms import make_transform

    specs = _get(recipe, "transforms", None) or {}
    out = []
    for c in channels:
        spec = specs.get(c)
        try:
            out.append(None if spec is None else make_transform(spec).inverse)
        except Exception:  # a transform without an inverse: report medians in plotted units
            out.append(None)
    return out


def analyse(event_file: Any, recipe: Any, progress=None, control: Any = None,
            rate: float | None = None, min_fold: float | None = None) -> Analysis:
    """Fit the recipe's density to ``event_file`` and derive rarity, rare events and regions.

    ``event_file``: a :class:`core.fcs.EventFile` (or a path to read).
    ``recipe``: a :class:`core.recipe.Recipe`; validated against the file first.
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
    from .density import AdditiveTreeDensity
    from .rare import rare_events, rarity_percentile
    from .recipe import validate_recipe
    from .regions import RegionSet

    timing: dict[str, float] = {}
    t0 = time.perf_counter()
    event_file = _as_event_file(event_file)
    validate_recipe(recipe, event_file)
    prepared, values = density_input(event_file, recipe)
    n = values.shape[0]
    n_kept = int(np.count_nonzero(prepared.kept))
    if n_kept < 50:
        raise EventDataError(f"{os.path.basename(event_file.path)}: only {n_kept} of {n} events are usable "
                             "after cleaning; at least 50 are needed to fit a density")
    from .prepare import atoms as find_atoms

    atoms = find_atoms(prepared.matrix, list(_get(recipe, "channels")))
    timing["prepare"] = time.perf_counter() - t0

    relay, stopped = stop_relay(progress)

    t1 = time.perf_counter()
    engine = _engine_kwargs(recipe)
    model = AdditiveTreeDensity(**engine)
    model.fit(prepared.matrix, progress=relay)
    timing["fit"] = time.perf_counter() - t1

    t2 = time.perf_counter()
    log_density = np.full(n, np.nan)
    log_density[prepared.kept] = model.score_samples(prepared.matrix)
    rarity = rarity_percentile(log_density)
    rare_res = rare_events(log_density, _get(recipe, "rare", None), model=model,
                           random_state=engine["random_state"])
    timing["score"] = time.perf_counter() - t2

    t_pop = time.perf_counter()
    populations = population_labels = None
    if not stopped:
        from .errors import Cancelled

        try:
            populations, population_labels = _populations_stage(event_file, recipe, model, prepared,
                                                                log_density, relay)
        except Cancelled:
            pass   # stopped while finding populations: the rest of the analysis stands
    timing["populations"] = time.perf_counter() - t_pop

    t3 = time.perf_counter()
    region_dicts = _get(recipe, "regions", None) or []
    masks: dict = {}
    regions = None
    if region_dicts:
        regions = recipe.region_set() if hasattr(recipe, "region_set") else RegionSet.from_dict(region_dicts)
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
                      values=values, density_channels=list(_get(recipe, "channels")), prepared=prepared,
                      model=model, log_density=log_density, rarity=rarity, rare=rare_res.mask,
                      rare_level=rare_res.log_level, reason=np.asarray(prepared.reason).astype(str),
                      region_masks=masks, heldout_loglik=float(getattr(model, "heldout_loglik_", np.nan)),
                      timing=timing, recipe=recipe, cancelled=bool(stopped), atoms=atoms,
                      populations=populations, population_labels=population_labels)
    if regions is not None and control is None and regions.depending_on("enriched"):
        result.info["regions_without_control"] = regions.depending_on("enriched")

    if control is not None and not stopped:
        t4 = time.perf_counter()
        from .contrast import PreparedControl, contrast

        if isinstance(control, PreparedControl):
            pc, c_matrix, control_path = control, None, control.source
        else:
            control_file = _as_event_file(control)
            validate_recipe(recipe, control_file)
            c_matrix = density_input(control_file, recipe)[0].matrix
            pc, control_path = None, os.fspath(control_file.path)
        settings = comparison_settings(recipe, rate, min_fold)
        chans = list(_get(recipe, "channels"))
        res = contrast(prepared.matrix, c_matrix, rate=settings["rate"], min_fold=settings["min_fold"],
                       engine=engine, random_state=engine["random_state"], progress=progress,
                       prepared_control=pc, channel_names=chans, to_units=_inverse_transforms(recipe, chans))
        result.contrast = res
        result.contrast_score = np.full(n, np.nan)
        result.contrast_score[prepared.kept] = res.score
        result.contrast_p = np.full(n, np.nan)
        result.contrast_p[prepared.kept] = res.pvalue
        result.contrast_q = np.full(n, np.nan)
        result.contrast_q[prepared.kept] = res.qvalue
        result.enriched = np.zeros(n, dtype=bool)
        result.enriched[prepared.kept] = res.enriched
        result.info["control"] = control_path
        if regions is not None and regions.depending_on("enriched"):
            result.region_masks = regions.evaluate(by_channel, rarity, n_events=n, enriched=result.enriched)
        timing["contrast"] = time.perf_counter() - t4
        t5 = time.perf_counter()
        _population_change_stage(result, event_file, recipe, res, pc if pc is not None else c_matrix)
        timing["population changes"] = time.perf_counter() - t5
    timing["total"] = time.perf_counter() - t0
    return result
