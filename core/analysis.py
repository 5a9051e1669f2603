"""One file through one recipe: compensation, transforms, cleaning, density, rarity, regions.

:func:`compensated_and_transformed` is the ONE place where a recipe's
compensation and transforms are applied to an event file; the desktop app,
the batch and :func:`analyse` all call it.

:func:`analyse` then

1. takes the recipe's density channels, de-quantises their raw values
   (jitter within each channel's recording step, seeded; see :mod:`core.prepare`),
   compensates and transforms them the same way, and cleans them
   (:func:`core.prepare.prepare_events`: saturation judged on RAW values,
   non-finite values always removed);
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
5. with a ``control`` file, contrasts the file with it (:mod:`core.contrast`)
   and counts one set of populations in both (grown and shrunk populations,
   ``Analysis.population_changes``).
   :func:`prepare_control_file` fits the control's part once
   (:class:`core.contrast.PreparedControl`); passing that as ``control``
   contrasts many files with one control without refitting it (the batch
   does so), with the same result as passing the control file.

Removed events stay in every per-event array with their ``reason``
("saturated" / "non-finite"; "" for kept events), NaN log density and NaN
rarity; they are never rare and never enriched.

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
    from .compensation import compensate
    from .transforms import make_transform

    names = list(event_file.channel_names)
    data = np.asarray(event_file.data if raw is None else raw, dtype=np.float64)
    if data.ndim != 2 or data.shape[1] != len(names):
        raise EventDataError(f"{os.path.basename(event_file.path)}: event values of shape {data.shape} do not "
                             f"match {len(names)} channels")
    S = _spillover(event_file, recipe)
    values = compensate(data, names, S, source=os.path.basename(event_file.path)) if S is not None else data.copy()
    transforms = _get(recipe, "transforms", None) or {}
    for ch, spec in transforms.items():
        if spec is None:
            continue
        if ch not in names:
            raise ChannelError(f"{os.path.basename(event_file.path)}: the recipe transforms channel {ch!r} "
                               f"which the file lacks; the file's channels are {', '.join(names)}")
        j = names.index(ch)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            values[:, j] = make_transform(spec).forward(values[:, j])
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
    channels without jitter (for plots and regions).  Jitter goes on the raw
    values, then compensation and transforms (``core.prepare``'s pipeline
    form).  Saturation is judged on the raw values of the density channels and,
    when compensating, of the spillover matrix's detectors (they feed the
    compensated density channels); an event with a non-finite raw value in any
    channel is removed as "non-finite".
    """
    from .prepare import prepare_events

    cleaning = dict(_get(recipe, "cleaning", None) or {})
    seed = _engine_kwargs(recipe)["random_state"]
    idx = density_channel_indices(event_file, recipe)
    names, values = compensated_and_transformed(event_file, recipe)
    raw = np.asarray(event_file.data, dtype=np.float64)
    ranges = np.full(len(names), np.nan)
    file_ranges = np.asarray(event_file.channel_ranges, dtype=np.float64)
    judged = set(idx)
    S = _spillover(event_file, recipe)
    if S is not None:
        judged.update(names.index(d) for d in S.detectors if d in names)
    for j in judged:
        ranges[j] = file_ranges[j]

    def pipeline(raw_values: np.ndarray) -> np.ndarray:
        return compensated_and_transformed(event_file, recipe, raw=raw_values)[1][:, idx]

    prepared = prepare_events(None, channel_ranges=ranges,
                              drop_saturated=bool(cleaning.get("drop_saturated", True)),
                              dequantise=bool(cleaning.get("dequantise", True)), random_state=seed,
                              raw_data=raw, pipeline=pipeline)
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
    reason: np.ndarray            # (n_events,) "" / "saturated" / "non-finite"
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
    info: dict = field(default_factory=dict)

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

    def export_columns(self) -> dict:
        """Per-event parameters an FCS/CSV export adds, name -> (n_events,) float64.

        FCS float data should hold no NaN, so removed events carry log density
        0 and rarity percentile -1, and ``cleaning flag`` says why (0 kept,
        1 saturated, 2 non-finite).  ``population``: the event's population
        number as users see it (id + 1; 0 for none or removed) when populations
        were found.  With a control: ``contrast score`` and
        ``enriched`` (0/1).
        """
        kept = self.kept
        flag = np.where(kept, 0.0, np.where(self.reason == "saturated", 1.0, 2.0))
        cols = {"log density": np.where(kept, self.log_density, 0.0),
                "rarity percentile": np.where(kept, self.rarity, -1.0),
                "cleaning flag": flag}
        if self.population_labels is not None:
            cols["population"] = self.population_labels.astype(float) + 1.0   # 1, 2, ...; 0 none
        if self.contrast_score is not None:
            cols["contrast score"] = np.where(np.isfinite(self.contrast_score), self.contrast_score, 0.0)
            cols["enriched"] = self.enriched.astype(float)
        return cols

    def table(self):
        """One row per event (pandas.DataFrame), removed events included.

        Columns: ``event`` (0-based index in the file), every channel's
        transformed value, ``log density``, ``rarity percentile``, ``rare``,
        ``reason``, ``population`` (id, -1 none), one bool column per region (``region: NAME``) and, when
        contrasted, ``contrast score`` and ``enriched``.
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
    control's prepared matrix or a PreparedControl (its held-out events are
    then the control's counted events; the definition found is kept on it as
    ``populations_definition`` for the next file)."""
    from .populations import (PopulationDefinition, assign_populations, count_populations,
                              find_populations, population_changes)

    settings = dict(_get(recipe, "populations", None) or {})
    chans = list(_get(recipe, "channels"))
    labels = _channel_labels(event_file, chans)
    transforms = _get(recipe, "transforms", None) or {}
    stored = settings.pop("definition", None)
    c_events = control if isinstance(control, np.ndarray) else getattr(control, "heldout", None)
    c_model = getattr(control, "model", None) if not isinstance(control, np.ndarray) else None
    if c_model is None:
        c_model = getattr(res, "control_model", None)
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


def analyse(event_file: Any, recipe: Any, progress=None, control: Any = None,
            alpha: float | None = None) -> Analysis:
    """Fit the recipe's density to ``event_file`` and derive rarity, rare events and regions.

    ``event_file``: a :class:`core.fcs.EventFile` (or a path to read).
    ``recipe``: a :class:`core.recipe.Recipe`; validated against the file first.
    ``progress(step, total, heldout_loglik) -> bool``: passed to the fit(s).
    ``control``: optional control EventFile or path; the file is then contrasted
    with it (``alpha`` the share of held-out control events allowed to pass,
    default 0.1 %).  ``control`` may also be a :class:`core.contrast.PreparedControl`
    from :func:`prepare_control_file` with the same recipe: the control is then
    not refitted (same result).
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
    if region_dicts:
        regions = recipe.region_set() if hasattr(recipe, "region_set") else RegionSet.from_dict(region_dicts)
        by_channel = {name: values[:, j] for j, name in enumerate(event_file.channel_names)}
        masks = regions.evaluate(by_channel, rarity, n_events=n)
    timing["regions"] = time.perf_counter() - t3

    result = Analysis(path=os.fspath(event_file.path), channel_names=list(event_file.channel_names),
                      values=values, density_channels=list(_get(recipe, "channels")), prepared=prepared,
                      model=model, log_density=log_density, rarity=rarity, rare=rare_res.mask,
                      rare_level=rare_res.log_level, reason=np.asarray(prepared.reason).astype(str),
                      region_masks=masks, heldout_loglik=float(getattr(model, "heldout_loglik_", np.nan)),
                      timing=timing, recipe=recipe, cancelled=bool(stopped),
                      populations=populations, population_labels=population_labels)

    if control is not None and not stopped:
        t4 = time.perf_counter()
        from .contrast import DEFAULT_ALPHA, PreparedControl, contrast

        if isinstance(control, PreparedControl):
            pc, c_matrix, control_path = control, None, control.source
        else:
            control_file = _as_event_file(control)
            validate_recipe(recipe, control_file)
            c_matrix = density_input(control_file, recipe)[0].matrix
            pc, control_path = None, os.fspath(control_file.path)
        res = contrast(prepared.matrix, c_matrix, alpha=DEFAULT_ALPHA if alpha is None else alpha,
                       engine=engine, random_state=engine["random_state"], progress=progress,
                       test_model=model, prepared_control=pc)
        result.contrast = res
        result.contrast_score = np.full(n, np.nan)
        result.contrast_score[prepared.kept] = res.score
        result.enriched = np.zeros(n, dtype=bool)
        result.enriched[prepared.kept] = res.enriched
        result.info["control"] = control_path
        timing["contrast"] = time.perf_counter() - t4
        t5 = time.perf_counter()
        _population_change_stage(result, event_file, recipe, res, pc if pc is not None else c_matrix)
        timing["population changes"] = time.perf_counter() - t5
    timing["total"] = time.perf_counter() - t0
    return result
