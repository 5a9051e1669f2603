"""Settings of the population search and their check (see :mod:`core.populations`)."""

from __future__ import annotations

import math
from typing import Mapping

from ..errors import RecipeError

#: Version of the stored :class:`PopulationDefinition` (``to_dict``).
DEFINITION_VERSION = 1

DEFAULT_SETTINGS = {
    "rare_share": 0.01,       # share below which a population is rare
    "merge_ratio": 0.3,       # merge when f(saddle) >= merge_ratio * f(smaller peak)
    "min_events": 20,         # runt size: a hill needs this many events above its saddle to stay apart
    "caution_events": 20,     # fewer events than this: caution
    "mode_events": 200_000,   # events (seeded subsample) used to start the mode search
    "segment_points": 33,     # points on each segment between two modes
    "starts_per_component": 8,  # hill climbs started from each component's events
    "change_fold": 1.5,       # with a control: grown / shrunk needs a fold beyond this (or its inverse)
    "random_state": 0,
}
#: Profile positions (see the module docstring).
DIM_BELOW = 0.75
BRIGHT_ABOVE = 1.25
MIN_GAP = 1.0
#: Density whose modes and saddles define the populations: "model" (the fitted
#: model's exact log density) or "mixture" (its mixture base alone).
MODES_ON = "model"
#: Hill-climbing rounds that move each segment's midpoint up to bend the saddle
#: path (0: straight segments only).
BEND_STEPS = 8
#: Longest hill-climbing step, in channel inter-quartile ranges.
MAX_STEP = 0.2
#: q-value at or below which a population counts as grown or shrunk (``change``).
CHANGE_RATE = 0.05
_CHUNK = 1 << 16
_MINUS = "\u2212"


def check_settings(settings: Mapping | None, where: str = "") -> dict:
    """``settings`` merged over :data:`DEFAULT_SETTINGS`, checked (RecipeError names ``where``)."""
    out = dict(DEFAULT_SETTINGS)
    if settings is None:
        return out
    if not isinstance(settings, Mapping):
        raise RecipeError(f"{where}'populations' must be an object like {{\"rare_share\": 0.01}}")
    for k, v in settings.items():
        if k == "definition":
            continue
        if k not in DEFAULT_SETTINGS:
            raise RecipeError(f"{where}unknown key {k!r} in 'populations'; the known keys are "
                              f"{', '.join(DEFAULT_SETTINGS)}, definition")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise RecipeError(f"{where}populations {k!r} must be a number; got {v!r}")
        out[k] = v
    if not 0.0 < out["rare_share"] < 1.0:
        raise RecipeError(f"{where}populations 'rare_share' must be a share between 0 and 1 "
                          f"(0.01 = 1 %); got {out['rare_share']!r}")
    if not 0.0 < out["merge_ratio"] < 1.0:
        raise RecipeError(f"{where}populations 'merge_ratio' must lie between 0 and 1; got {out['merge_ratio']!r}")
    if not out["change_fold"] >= 1.0:
        raise RecipeError(f"{where}populations 'change_fold' is the smallest fold (share here / share in the "
                          f"control) called grown, its inverse shrunk: at least 1 (default 1.5); "
                          f"got {out['change_fold']!r}")
    for k in ("caution_events", "min_events", "mode_events", "segment_points", "random_state", "starts_per_component"):
        if int(out[k]) != out[k] or out[k] < (3 if k == "segment_points" else 0):
            raise RecipeError(f"{where}populations {k!r} must be a whole number; got {out[k]!r}")
        out[k] = int(out[k])
    return out
