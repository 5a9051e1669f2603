"""Recipes: a versioned JSON file that fully describes an analysis.

A recipe lets an analysis be repeated on another file, in a batch, or by a
colleague.  Stored form (schema version 1)::

    {
      "schema_version": 1,
      "name": "CD4 rare events",
      "notes": "free text",
      "channels": ["FL1-A", "FL2-A"],                  # $PnN names the density uses
      "compensation": {"source": "file", "csv_path": null},   # "file" | "csv" | "none"
      "transforms": {"FL1-A": {"kind": "arcsinh", "cofactor": 150.0}, ...},
      "cleaning": {"drop_saturated": true, "drop_piles": true, "dequantise": true},
      "engine": {"random_state": 0},                   # AdditiveTreeDensity keyword arguments
      "rare": {"rule": "share", "share": 0.005},       # or {"rule": "mass", "mass": 0.995}
      "regions": [ ...region dicts, see core.regions... ],
      "populations": {"rare_share": 0.01, "definition": {...}},   # optional, see core.populations
      "comparison": {"rate": 0.05, "min_fold": 2.0,     # contrast with a control (core.contrast)
                     "smallest_population": 30},
      "software": "Boscage 0.1.0"                      # written on save, informational
    }

Meaning of the entries:

* ``compensation``: "file" uses the spillover matrix stored in the FCS file
  ($SPILLOVER, or SPILL / $SPILL), "csv" reads ``csv_path`` (a relative path
  is taken relative to the recipe file's folder), "none" analyses the values
  as recorded.
* ``transforms``: per channel, a transform spec for :func:`core.transforms.make_transform`
  (the kinds of ``core.transforms.TRANSFORM_KINDS``: linear, log, arcsinh,
  logicle, fasinh).  A channel without an entry is used untransformed.
* ``cleaning`` (see :mod:`core.prepare`): events with NaN/inf are always set
  aside; ``drop_saturated`` sets aside events at a channel's $PnR ceiling;
  ``drop_piles`` sets aside piles of events on a density channel's lowest or
  highest stored value (false: keep them, spread across their bin);
  ``dequantise`` jitters values stored on a grid (integers in stored units,
  before $PnE/$PnG decoding; float grids by half their step).
* ``engine``: keyword arguments of the additive tree density; ``{}`` means the
  engine's defaults, with ``random_state`` 0 unless given (see
  :meth:`Recipe.engine_arguments`).  For example ``max_em_events``: most
  events the mixture's EM runs on; default ``"refit_by_channels"`` (50,000 up
  to 12 density channels, above that the chosen mixture refitted on more
  events); ``50000`` pins the fixed cap of earlier versions (see
  :class:`core.density.AdditiveTreeDensity`).
* ``rare``: ``share`` is a fraction (0.005 = the lowest 0.5 % of events by
  density); ``mass`` is the probability mass of the highest-density region
  whose outside counts as rare (0.995 = 99.5 %).
* ``regions``: regions in transformed channel units with the transform of
  each channel recorded (see :mod:`core.regions`).
* ``populations``: settings of the population search (:mod:`core.populations`:
  ``rare_share``, ``merge_ratio``, ...) and, once kept, the ``definition`` of
  the populations found, so every file of the recipe is counted with the same
  populations.
* ``comparison``: how a file is contrasted with a control (:mod:`core.contrast`):
  ``rate`` is the false discovery rate of the enriched events (0.05 = 5 %,
  strictly between 0 and 1), ``min_fold`` the smallest density ratio
  test / control of an enriched event (at least 1; default 2),
  ``smallest_population`` the smallest new population (events) the local
  neighbour score is sized for (10-1000, default 30; 0 turns it off:
  :mod:`core.contrast_local`; stored only when not 30, so older recipes keep
  their digest).

In code the sections are typed records (:mod:`core.recipe.records`:
``Compensation``, ``TransformSpec`` per channel, ``Cleaning``, ``Engine``,
``RareRule``, ``Populations``, ``Comparison``; regions are
:class:`core.regions.Region` records); dicts exist only in the stored form
(:meth:`Recipe.from_dict` / :meth:`Recipe.to_dict`, :func:`load_recipe` /
:func:`save_recipe`).  Every default is a field default of its record.

Modules: :mod:`.records` and :mod:`.keyed` (the sections), :mod:`.model` (:class:`Recipe`),
:mod:`.files` (checking against an event file, JSON file, digest),
:mod:`.defaults` (:func:`default_recipe`).

The default choice of channels (:func:`default_recipe`) takes the
fluorescence channels of :mod:`core.channel_kinds` (the one place where the
kind of a channel is decided from its name).
"""

from __future__ import annotations

from ..channel_kinds import is_fluorescence
from .defaults import MAX_PILE_SHARE, default_recipe
from .files import as_recipe, load_recipe, recipe_digest, save_recipe, validate_recipe
from .model import SCHEMA_VERSION, Recipe
from .keyed import Engine, Populations, TransformSpec
from .records import COMPENSATION_SOURCES, RARE_RULES, Cleaning, Comparison, Compensation, RareRule


def is_fluorescence_channel(name: str, label: str | None = None) -> bool:
    """True when :func:`core.channel_kinds.channel_kind` says fluorescence."""
    return is_fluorescence(name, label)


__all__ = ["COMPENSATION_SOURCES", "Cleaning", "Comparison", "Compensation", "Engine", "MAX_PILE_SHARE",
           "Populations", "RARE_RULES", "RareRule", "Recipe", "SCHEMA_VERSION", "TransformSpec", "as_recipe", "default_recipe",
           "is_fluorescence_channel", "load_recipe", "recipe_digest", "save_recipe", "validate_recipe"]
