"""A starting recipe for an event file."""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from ..channel_kinds import FLUORESCENCE, SCATTER, channel_kind, one_measure_per_detector
from ..compensation import compensate, spillover_from_keywords
from ..errors import CompensationError, RecipeError
from ..prepare import pile_masks
from ..transforms import default_transform_spec
from .keyed import Engine
from .model import Recipe
from .records import Compensation

#: default_recipe leaves out a channel whose floor or ceiling pile holds more than this share.
MAX_PILE_SHARE = 0.25


def default_recipe(event_file: Any) -> Recipe:
    """A starting recipe for ``event_file`` (a :class:`core.fcs.EventFile`).

    * channels: the fluorescence channels (:mod:`core.channel_kinds`); when
      there is none, the scatter channels; one pulse measure per detector (its
      area, else height, else width: the width is computed from the other two,
      see :func:`core.channel_kinds.one_measure_per_detector`).  A channel whose lowest or highest
      value holds more than :data:`MAX_PILE_SHARE` of the events (mostly below
      detection, or clipped) is left out and ``notes`` says so: its piles would
      be set aside from the fit (core.prepare) and take most events with them.
    * compensation: "file" when the file carries a usable spillover matrix,
      else "none" (an unusable one is explained in ``notes``).
    * transforms: :func:`core.transforms.default_transform_spec` for every
      channel, from its kind, the (compensated, when compensating) values and $PnR.
    * cleaning, rare rule: the defaults; engine: ``{"random_state": 0}``; no regions.
    """
    path = str(getattr(event_file, "path", "") or "")
    fname = os.path.basename(path) or "the event file"
    names = [str(c) for c in event_file.channel_names]
    labels = list(getattr(event_file, "channel_labels", None) or [""] * len(names))
    kinds = [channel_kind(c, lab) for c, lab in zip(names, labels)]
    channels = [c for c, k in zip(names, kinds) if k == FLUORESCENCE]
    if not channels:
        channels = [c for c, k in zip(names, kinds) if k == SCATTER]
    if not channels:
        raise RecipeError(f"{fname}: no fluorescence or scatter channel to analyse; "
                          f"its channels are: {', '.join(names)}")

    notes = [f"Default recipe made from {fname}."]

    raw = np.asarray(event_file.data)   # float32 files stay float32: pile_masks converts one column
    piled = {}
    for c in channels:
        j = names.index(c)
        n_finite = max(1, int(np.isfinite(raw[:, j]).sum()))
        share = max(int(m.sum()) for m in pile_masks(raw[:, j])) / n_finite
        if share > MAX_PILE_SHARE:
            piled[c] = share
    if piled and len(piled) < len(channels):
        channels = [c for c in channels if c not in piled]
        notes.append("Left out of the density: " + ", ".join(f"{c} ({100 * v:.0f} % of the events on its "
                                                             "lowest or highest value)" for c, v in piled.items())
                     + ".")
    single = one_measure_per_detector(channels)
    if len(single) < len(channels):
        notes.append("One pulse measure per detector (area, else height, else width): left out "
                     + ", ".join(c for c in channels if c not in single) + ".")
        channels = single

    data = np.asarray(event_file.data)  # compensate returns float64; transforms read float32 as is
    comp = "none"
    try:
        S = spillover_from_keywords(dict(event_file.keywords), source=fname)
        if S is not None:
            data = compensate(data, names, S, source=fname)
            comp = "file"
    except CompensationError as exc:
        notes.append(f"The file's spillover matrix was not used: {exc}")

    ranges = getattr(event_file, "channel_ranges", None)
    transforms = {}
    for i, c in enumerate(names):
        rng = None if ranges is None else float(np.asarray(ranges, dtype=np.float64)[i])
        transforms[c] = dict(default_transform_spec(c, data[:, i], rng, labels[i]))

    return Recipe(channels=channels, compensation=Compensation(source=comp), transforms=transforms,
                  engine=Engine({"random_state": Engine.DEFAULT_RANDOM_STATE}),
                  name=os.path.splitext(fname)[0], notes=" ".join(notes))
