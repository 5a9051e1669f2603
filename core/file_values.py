"""One file's values through a recipe: the compensate-and-transform step and the density's input.

:func:`compensate_transform` is the ONE place where a recipe's compensation
and transforms are resolved for an event file (the spillover matrix looked
up, each channel's transform built), once per file: it returns a
:class:`CompensateTransform` that the desktop app, the batch and
:func:`core.analysis.analyse` apply.  :func:`density_input` cleans and
de-quantises the density channels (one pass in :mod:`core.prepare_file`,
rules in :mod:`core.prepare`).

Shapes: ``values`` is (n_events, n_channels) over ALL the file's channels;
``prepared.matrix`` is (n_kept, n_density_channels).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import compensation
from .errors import ChannelError, RecipeError
from .fcs import read_fcs
from .prepare_file import check_transform_channels, prepare_file_events, transformed_values
from .recipe import Recipe, as_recipe


@dataclass(frozen=True)
class CompensateTransform:
    """A file's compensate-and-transform step under one recipe.

    ``names``: the file's channel names ($PnN) in column order; ``spillover``:
    the :class:`core.compensation.SpilloverMatrix` the recipe asks for, or None;
    ``transforms``: channel -> the recipe's :class:`core.recipe.TransformSpec`
    (channels without one keep their compensated values); ``source``: the
    file's name for messages.  Applied by :mod:`core.prepare_file` (one pass,
    in blocks, float32 files not copied whole).
    """

    names: tuple
    spillover: Any
    transforms: dict
    source: str

    def apply(self, data: np.ndarray, order: str = "C") -> np.ndarray:
        """``data`` (n_events, n_channels) compensated, then each channel transformed (new float64
        array; ``order`` "F" lays it out column by column, see core.prepare_file.transformed_values)."""
        return transformed_values(data, self.names, self.spillover, self.transforms, self.source, order=order)

    def compensated(self, data: np.ndarray) -> np.ndarray:
        """``data`` (n_events, n_channels) compensated only (new float64 array)."""
        return transformed_values(data, self.names, self.spillover, {}, self.source)


def _spillover(event_file: Any, recipe: Recipe):
    """The spillover matrix the recipe asks for, or None."""
    source = recipe.compensation.source
    fname = os.path.basename(event_file.path)
    if source == "file":
        S = compensation.spillover_from_keywords(event_file.keywords, source=fname)
        if S is None:
            raise RecipeError(f"{fname}: the recipe asks for the file's spillover matrix but the file has none "
                              "($SPILLOVER/SPILL); set compensation to 'none' or give a CSV matrix")
        return S
    if source == "csv":
        return compensation.read_spillover_csv(recipe.csv_path_resolved())
    return None


def compensate_transform(event_file: Any, recipe: Recipe) -> CompensateTransform:
    """Resolve ``recipe``'s compensation and transforms for ``event_file`` (once per file).

    ChannelError when the recipe transforms a channel the file lacks;
    RecipeError when the file cannot supply the spillover matrix asked for.
    """
    recipe = as_recipe(recipe)
    names = tuple(str(c) for c in event_file.channel_names)
    fname = os.path.basename(event_file.path)
    check_transform_channels(names, recipe.transforms, fname)
    return CompensateTransform(names=names, spillover=_spillover(event_file, recipe),
                               transforms=dict(recipe.transforms), source=fname)


def compensated_and_transformed(event_file: Any, recipe: Recipe, raw: np.ndarray | None = None,
                                step: CompensateTransform | None = None,
                                order: str = "C") -> tuple[list[str], np.ndarray]:
    """All channels of ``event_file`` compensated and transformed as ``recipe`` says.

    Returns ``(channel_names, values)`` with values (n_events, n_channels)
    float64: compensated by the recipe's spillover matrix (only its detectors
    change), then each channel with an entry in ``recipe.transforms`` mapped by
    that transform's ``forward``; channels without one keep their compensated
    values.  ``raw`` replaces ``event_file.data`` (same shape), e.g. de-quantised
    raw values; the file's data are never modified.  ``step``: the file's
    :func:`compensate_transform` when already built; ``order`` "F": values laid out
    column by column (the app's layout; no copy to get there).
    """
    step = step or compensate_transform(event_file, recipe)
    return list(step.names), step.apply(event_file.data if raw is None else raw, order=order)


def density_channel_indices(event_file: Any, recipe: Recipe) -> list[int]:
    """Column indices of the recipe's density channels in ``event_file`` (ChannelError if missing)."""
    names = list(event_file.channel_names)
    chans = list(as_recipe(recipe).channels)
    if not chans:
        raise RecipeError("the recipe names no channels for the density")
    missing = [c for c in chans if c not in names]
    if missing:
        raise ChannelError(f"{os.path.basename(event_file.path)}: the recipe's channel(s) {', '.join(missing)} "
                           f"are not in the file; its channels are {', '.join(names)}")
    return [names.index(c) for c in chans]


def density_input(event_file: Any, recipe: Recipe, step: CompensateTransform | None = None):
    """The cleaned, de-quantised, compensated, transformed matrix the density sees.

    Returns ``(prepared, values)``: ``prepared`` a :class:`core.prepare.PreparedEvents`
    over the recipe's density channels (``matrix`` n_kept x d, ``kept``,
    ``reason`` per event) and ``values`` the transformed values of all
    channels without jitter (for plots and regions).  ``step``: the file's
    :func:`compensate_transform` when already built (else built here, once).

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
    recipe = as_recipe(recipe)
    step = step or compensate_transform(event_file, recipe)
    idx = density_channel_indices(event_file, recipe)
    names, values = compensated_and_transformed(event_file, recipe, step=step)
    c = recipe.cleaning
    prepared = prepare_file_events(event_file, idx, step.spillover, step.transforms, values,
                                   drop_saturated=c.drop_saturated, drop_piles=c.drop_piles, dequantise=c.dequantise,
                                   random_state=recipe.engine.random_state, where=step.source)
    return prepared, values


def as_event_file(obj: Any):
    """``obj`` as an EventFile: a path (str or os.PathLike) is read with
    :func:`core.fcs.read_fcs`; anything else is returned as it is."""
    if isinstance(obj, (str, os.PathLike)):
        return read_fcs(obj)
    return obj
