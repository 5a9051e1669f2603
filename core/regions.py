"""Regions: named selections of events, drawn on plots or defined by rules.

Kinds (``kind`` in the stored dict):

``rectangle``
    two channels, ``x = [low, high]`` and ``y = [low, high]``.
``polygon``
    two channels and ``vertices = [[x, y], ...]`` (at least 3, non-zero area).
    Inside is decided by the even-odd rule: a point is inside when a ray from
    it crosses the outline an odd number of times, so the inner pentagon of a
    self-crossing five-pointed star is *outside*.
``interval``
    one channel, ``low`` and ``high`` (either may be ``None`` = unbounded).
``rarity``
    ``percentile`` p in [0, 100]: the events whose rarity percentile is <= p,
    i.e. the rarest p % (see :func:`core.rare.rarity_percentile`; removed
    events have NaN rarity and are never inside).
``population``
    ``population`` (an id) of a stored population ``definition``
    (:class:`core.populations.PopulationDefinition`, over its density
    channels): the events the definition assigns to that population
    (:func:`core.populations.assign_populations` on the transformed values;
    removed events, NaN rarity, are outside when rarity is given).
    ``transforms`` records each density channel's transform spec.
``enriched``
    the events found enriched over a control (:mod:`core.contrast`: new
    events at the recipe's false discovery rate); optional ``control``
    records the control file's name (informational).  Evaluated only when a
    contrast's enriched mask is given (``RegionSet.evaluate(..., enriched=)``);
    otherwise a RegionError says a control is needed.
``and`` / ``or`` / ``not``
    boolean combinations of other regions, named in ``operands``
    (``not`` takes exactly one).

Every region may name a ``parent``: its mask is then ANDed with the parent's
mask (nesting), and its "% of parent" statistic is relative to the parent.

Bounds of rectangles and intervals are half-open, ``low <= x < high``, the
convention of Gating-ML 2.0 rectangle gates (from memory).  Events with NaN
in a channel a geometric region uses are outside it.

Units: geometric regions are stored in channel units of the *transformed*
scale (what the plots show).  Each geometric region records the transform
spec of every channel it uses (``transforms``: channel -> spec dict, or None
for untransformed values) so :meth:`RegionSet.check_transforms` can refuse a
region drawn on a different scale from the one the recipe now uses.

Shapes: ``values`` maps channel name -> float array (n_events,); every mask is
bool (n_events,).

The code lives in three modules by role, re-exported here (the import path
every caller uses): :mod:`core.region_geometry` (the base record, the
geometric kinds and their checks), :mod:`core.region_rules` (rule kinds and
:func:`region_from_dict`) and :mod:`core.region_set` (:class:`RegionSet`).
"""

from __future__ import annotations

from .region_geometry import (COMBINATION_KINDS, GEOMETRIC_KINDS, KINDS, IntervalRegion,  # noqa: F401
                              PolygonRegion, RectangleRegion, Region, points_in_polygon)
from .region_rules import (CombinationRegion, EnrichedRegion, PopulationRegion, RarityRegion,  # noqa: F401
                           region_from_dict)
from .region_set import RegionSet, RegionStatistics  # noqa: F401

__all__ = ["COMBINATION_KINDS", "GEOMETRIC_KINDS", "KINDS", "CombinationRegion", "EnrichedRegion",
           "IntervalRegion", "PolygonRegion", "PopulationRegion", "RarityRegion", "RectangleRegion",
           "Region", "RegionSet", "RegionStatistics", "points_in_polygon", "region_from_dict"]
