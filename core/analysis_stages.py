"""The stages of :func:`core.analysis.analyse` after the fit: populations, the
contrast with a control, grown and shrunk populations."""

from __future__ import annotations

import os
import time
from typing import Any

import numpy as np

from .file_values import as_event_file, density_input
from .populations import (PopulationDefinition, assign_populations, count_populations, find_populations,
                          check_settings, find_populations_and_score, population_changes)
from .recipe import Recipe, as_recipe, validate_recipe
from .transforms import make_transform


def channel_labels(event_file: Any, channels: list) -> list:
    names = list(event_file.channel_names)
    labels = list(getattr(event_file, "channel_labels", None) or [""] * len(names))
    return [labels[names.index(c)] for c in channels]


def populations_stage(event_file, recipe, model, prepared, log_density, progress):
    """Populations of the kept events (:mod:`core.populations`): counted with the
    recipe's stored definition when it has one, else found on the fitted model.
    Returns (Populations, labels (n_events,) with -1 for removed events)."""
    settings = recipe.populations.settings
    chans = list(recipe.channels)
    labels = channel_labels(event_file, chans)
    transforms = recipe.transforms
    stored = recipe.populations.definition
    if stored is not None:
        pops = count_populations(stored, prepared.matrix, chans, labels, transforms, settings)
    else:
        pops = find_populations(model, prepared.matrix, chans, labels, transforms, settings,
                                log_density=log_density[prepared.kept], progress=progress)
    full = np.full(prepared.kept.shape[0], -1, dtype=np.int64)
    full[prepared.kept] = pops.labels
    return pops, full


def scores_with_populations(recipe, model) -> bool:
    """True when :func:`scoring_populations_stage` saves a pass: the populations are
    to be found (no stored definition) on a model that is a skewed mixture alone."""
    return recipe.populations.definition is None and bool(getattr(model, "scores_with_posteriors", False))


def scoring_populations_stage(event_file, recipe, model, prepared, progress):
    """:func:`populations_stage` and the model's log density of the kept events in
    one pass over them (:func:`core.populations.find_populations_and_score`).
    Returns (Populations, labels (n_events,) -1 for removed events, log density
    of the kept events (n_kept,)); the same as scoring, then :func:`populations_stage`."""
    chans = list(recipe.channels)
    pops, scores = find_populations_and_score(model, prepared.matrix, chans, channel_labels(event_file, chans),
                                              recipe.transforms, recipe.populations.settings, progress=progress)
    full = np.full(prepared.kept.shape[0], -1, dtype=np.int64)
    full[prepared.kept] = pops.labels
    return pops, full, scores


def population_change_stage(result, event_file, recipe, res, control) -> None:
    """Grown and shrunk populations: ONE definition (the recipe's stored one, else
    found on the control's model and events) counted in the control and in the
    test file; :func:`core.populations.population_changes`.  ``control`` is the
    control's prepared matrix or a PreparedControl (its ``events``; the
    definition found is kept on it as ``populations_definition`` for the next
    file).  The control's model is its first part model (the contrast fits K
    part models of the control, each without one part of its events)."""
    settings = recipe.populations.settings
    chans = list(recipe.channels)
    labels = channel_labels(event_file, chans)
    transforms = recipe.transforms
    stored = recipe.populations.definition
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
    result.population_changes = population_changes(result.control_populations.labels, test_labels, definition,
                                                   min_fold=float(check_settings(settings)["change_fold"]))
    short = {r["id"]: r["short_profile"] for r in result.control_populations.table}
    for row in result.population_changes:
        row["profile"] = definition.names[row["id"]]
        row["short_profile"] = short[row["id"]]


def comparison_settings(recipe: Recipe, rate: float | None = None, min_fold: float | None = None) -> dict:
    """``{"rate", "min_fold", "smallest_population"}`` of a contrast: the given values, else the
    recipe's ``comparison`` section (whose defaults are :class:`core.recipe.Comparison`'s)."""
    cmp = as_recipe(recipe).comparison
    return {"rate": float(cmp.rate if rate is None else rate),
            "min_fold": float(cmp.min_fold if min_fold is None else min_fold),
            "smallest_population": float(cmp.smallest_population)}


def inverse_transforms(recipe: Recipe, channels: list) -> list:
    """Per density channel, the inverse of its transform (None when untransformed): instrument units."""
    specs = recipe.transforms
    out = []
    for c in channels:
        spec = specs.get(c)
        try:
            out.append(None if spec is None else make_transform(spec).inverse)
        except Exception:  # a transform without an inverse: report medians in plotted units
            out.append(None)
    return out


def contrast_stage(result, event_file, recipe: Recipe, control, rate, min_fold, engine: dict, progress,
                   regions, by_channel) -> None:
    """Contrast ``result`` (an :class:`core.analysis.Analysis`) with ``control`` (an
    EventFile, a path or a PreparedControl; :func:`core.contrast.contrast`), fill its
    contrast arrays, evaluate regions of new events and the grown and shrunk populations."""
    # imported here: core.contrast loads scipy.stats (~1.3 s); only a contrast needs it
    from .contrast import PreparedControl, contrast

    t4 = time.perf_counter()
    prepared, n = result.prepared, result.n_events
    if isinstance(control, PreparedControl):
        pc, c_matrix, control_path = control, None, control.source
    else:
        control_file = as_event_file(control)
        validate_recipe(recipe, control_file)
        c_matrix = density_input(control_file, recipe)[0].matrix
        pc, control_path = None, os.fspath(control_file.path)
    settings = comparison_settings(recipe, rate, min_fold)
    chans = list(recipe.channels)
    res = contrast(prepared.matrix, c_matrix, rate=settings["rate"], min_fold=settings["min_fold"],
                   smallest=settings["smallest_population"], engine=engine, random_state=engine["random_state"], progress=progress,
                   prepared_control=pc, channel_names=chans, to_units=inverse_transforms(recipe, chans))
    result.contrast = res
    for name, per_kept in (("contrast_score", res.score), ("contrast_p", res.pvalue), ("contrast_q", res.qvalue),
                           ("contrast_local", res.local_score), ("contrast_local_fold", res.local_fold)):
        if per_kept is None:
            continue
        full = np.full(n, np.nan)
        full[prepared.kept] = per_kept
        setattr(result, name, full)
    result.enriched = np.zeros(n, dtype=bool)
    result.enriched[prepared.kept] = res.enriched
    result.info["control"] = control_path
    if regions is not None and regions.depending_on("enriched"):
        result.region_masks = regions.evaluate(by_channel, result.rarity, n_events=n, enriched=result.enriched)
    result.timing["contrast"] = time.perf_counter() - t4
    t5 = time.perf_counter()
    population_change_stage(result, event_file, recipe, res, pc if pc is not None else c_matrix)
    result.timing["population changes"] = time.perf_counter() - t5
