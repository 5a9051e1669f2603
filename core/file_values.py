"""One file's values through a recipe: the compensate-and-transform step and the density's input.

:func:`compensate_transform` is the ONE place where a recipe's compensation
and transforms are resolved for an event file (the spillover matrix looked
up, each channel's transform built), once per file: it returns a
:class:`CompensateTransform` that the desktop app, the batch and
:func:`core.analysis.analyse` apply.  :func:`density_input` cleans and
de-quantises the density channels (rules in :mod:`core.prepare`).

Shapes: ``values`` is (n_events, n_channels) over ALL the file's channels;
``prepared.matrix`` is (n_kept, n_density_channels).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from .errors import ChannelError, EventDataError, RecipeError
from .recipe import Recipe, as_recipe


@dataclass(frozen=True)
class CompensateTransform:
    """A file's compensate-and-transform step under one recipe.

    ``names``: the file's channel names ($PnN) in column order; ``spillover``:
    the :class:`core.compensation.SpilloverMatrix` the recipe asks for, or None;
    ``transforms``: column index -> forward function of that channel's
    transform (channels without one keep their compensated values);
    ``source``: the file's name for messages.
    """

    names: tuple
    spillover: Any
    transforms: dict
    source: str

    @property
    def detectors(self) -> list:
        """Column indices of the spillover matrix's detectors (empty without compensation)."""
        if self.spillover is None:
            return []
        return [self.names.index(d) for d in self.spillover.detectors if d in self.names]

    def compensated(self, data: np.ndarray) -> np.ndarray:
        """``data`` (n_events, n_channels) compensated (a new float64 array; a copy without compensation)."""
        from .compensation import compensate

        data = np.asarray(data, dtype=np.float64)
        if data.ndim != 2 or data.shape[1] != len(self.names):
            raise EventDataError(f"{self.source}: event values of shape {data.shape} do not match "
                                 f"{len(self.names)} channels")
        if self.spillover is None:
            return data.copy()
        return compensate(data, list(self.names), self.spillover, source=self.source)

    def compensated_detectors(self, columns: np.ndarray) -> np.ndarray:
        """The detectors' columns (n, k; in :attr:`detectors` order) compensated."""
        from .compensation import compensate

        return compensate(columns, [self.names[d] for d in self.detectors], self.spillover, source=self.source)

    def forward(self, j: int, column: np.ndarray) -> np.ndarray:
        """Channel ``j``'s transform applied to ``column`` (returned as is when untransformed)."""
        f = self.transforms.get(j)
        if f is None:
            return column
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return f(column)

    def apply(self, data: np.ndarray) -> np.ndarray:
        """``data`` (n_events, n_channels) compensated, then each channel transformed."""
        values = self.compensated(data)
        for j in self.transforms:
            values[:, j] = self.forward(j, values[:, j])
        return values


def _spillover(event_file: Any, recipe: Recipe):
    """The spillover matrix the recipe asks for, or None."""
    from . import compensation

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
    from .transforms import make_transform

    recipe = as_recipe(recipe)
    names = tuple(str(c) for c in event_file.channel_names)
    fname = os.path.basename(event_file.path)
    transforms: dict[int, Callable] = {}
    for ch, spec in recipe.transforms.items():
        if spec is None:
            continue
        if ch not in names:
            raise ChannelError(f"{fname}: the recipe transforms channel {ch!r} which the file lacks; "
                               f"the file's channels are {', '.join(names)}")
        transforms[names.index(ch)] = make_transform(spec).forward
    return CompensateTransform(names=names, spillover=_spillover(event_file, recipe), transforms=transforms,
                               source=fname)


def compensated_and_transformed(event_file: Any, recipe: Recipe, raw: np.ndarray | None = None,
                                step: CompensateTransform | None = None) -> tuple[list[str], np.ndarray]:
    """All channels of ``event_file`` compensated and transformed as ``recipe`` says.

    Returns ``(channel_names, values)`` with values (n_events, n_channels)
    float64: compensated by the recipe's spillover matrix (only its detectors
    change), then each channel with an entry in ``recipe.transforms`` mapped by
    that transform's ``forward``; channels without one keep their compensated
    values.  ``raw`` replaces ``event_file.data`` (same shape), e.g. de-quantised
    raw values; the file's data are never modified.  ``step``: the file's
    :func:`compensate_transform` when already built.
    """
    step = step or compensate_transform(event_file, recipe)
    return list(step.names), step.apply(event_file.data if raw is None else raw)


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
    from .prepare import (MAX_UNIQUE_FRACTION, PreparedEvents, REASON_KEPT, REASON_NON_FINITE,
                          clean_events, jittered_column, plan_jitter)

    recipe = as_recipe(recipe)
    cleaning = recipe.cleaning
    drop_piles = cleaning.drop_piles
    seed = recipe.engine.random_state
    idx = density_channel_indices(event_file, recipe)
    step = step or compensate_transform(event_file, recipe)
    names, values = compensated_and_transformed(event_file, recipe, step=step)
    raw = np.asarray(event_file.data, dtype=np.float64)
    n, k = raw.shape
    S = step.spillover
    detectors = step.detectors
    # raw channels that feed the density: a compensated density channel mixes every detector
    mixes = S is not None and any(j in detectors for j in idx)
    feeders = sorted(set(idx) | (set(detectors) if mixes else set()))
    reason, saturated, sat_cells, floor_cells, ceiling_cells = clean_events(
        raw, feeders, event_file.channel_ranges, drop_saturated=cleaning.drop_saturated,
        drop_piles=drop_piles)
    kept = reason == REASON_KEPT
    decoding = getattr(event_file, "decoding", None)
    plans = {}
    if cleaning.dequantise:
        for j in feeders:
            plan = plan_jitter(raw[:, j] if kept.all() else raw[kept, j], None if decoding is None else decoding[j],
                               MAX_UNIQUE_FRACTION)
            if plan is not None:
                plans[j] = plan
    spread = set() if drop_piles else {j for j in feeders
                                       if floor_cells[j][kept].any() or ceiling_cells[j][kept].any()}
    changed = set(plans) | spread

    all_kept = bool(kept.all())

    def column(j: int) -> np.ndarray:
        """Raw channel j over the kept events, jittered / piles spread as planned."""
        if j not in changed:
            return raw[:, j] if all_kept else raw[kept, j]
        fl = floor_cells.get(j)
        ce = ceiling_cells.get(j)
        # uniforms are drawn for every event of the file, then the kept ones taken
        full = raw[:, j].copy()
        if not all_kept:
            full[~kept] = 0.0
        out = jittered_column(full, j, plans.get(j), seed, None if fl is None else fl & kept,
                              None if ce is None else ce & kept, spread_piles=j in spread)
        return out if all_kept else out[kept]

    matrix = np.empty((int(kept.sum()), len(idx)))
    redo = [c for c, j in enumerate(idx) if (j in changed) or (mixes and j in detectors and changed & set(detectors))]
    compensated = None
    if mixes and any(idx[c] in detectors for c in redo):
        sub = np.column_stack([column(d) for d in detectors])
        compensated = step.compensated_detectors(sub)
    for c, j in enumerate(idx):
        if c not in redo:
            matrix[:, c] = values[:, j] if all_kept else values[kept, j]
            continue
        col = compensated[:, detectors.index(j)] if (compensated is not None and j in detectors) else column(j)
        matrix[:, c] = step.forward(j, col)
    bad = ~np.isfinite(matrix).all(axis=1)
    if bad.any():
        rows = np.flatnonzero(kept)[bad]
        reason = reason.astype(object)
        reason[rows] = REASON_NON_FINITE
        reason = reason.astype(str)
        kept = reason == REASON_KEPT
        matrix = matrix[~bad]
    steps = np.zeros(k)
    grids = [""] * k
    for j, plan in plans.items():
        steps[j], grids[j] = plan.step, plan.grid
    finite_rows = reason != REASON_NON_FINITE

    def per_channel(cells, rows=None):
        out = np.zeros(k, dtype=np.int64)
        for j, m in cells.items():
            out[j] = int(np.count_nonzero(m if rows is None else m & rows))
        return out

    prepared = PreparedEvents(matrix=matrix, kept=kept, reason=reason, steps=steps,
                              saturated=saturated & finite_rows,
                              saturated_per_channel=per_channel(sat_cells, finite_rows), grids=grids,
                              floor_per_channel=per_channel(floor_cells),
                              ceiling_per_channel=per_channel(ceiling_cells))
    return prepared, values
