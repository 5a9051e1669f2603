"""Populations: the modes (hills) of the fitted density, their events, shares and marker profiles.

Method (mode clustering on the fitted density; the choice is argued in DEVELOPERS.md)
---------------------------------------------------------------------------------------
1. **Components.**  The density model's mixture base (Gaussian or skewed
   components plus a background, :mod:`core.density.gaussian_base`) is taken
   as it is.  When the model has no mixture (the logistic base, which the
   engine keeps for channels with atoms), the same mixture fitter is run here
   on the events (seeded), and modes and saddles below are taken on that
   mixture's density: the model's density is then a tree density on the
   per-channel map, piecewise constant on cells, with a local maximum in
   nearly every cell (measured on a real 7-channel file with atoms: 264
   climbs, 264 different ends, 249 "populations" on the model's density).
2. **Modes.**  Modes are found on the model's own fitted log density
   (``model.score_samples``: base, marginals and trees) by hill climbing
   (finite-difference gradient ascent; a step is kept only when the log
   density rises, else it halves; on a skewed mixture alone the 2 d probes of a
   row are scored in one compiled pass, ``AdditiveTreeDensity.score_probes``).
   Up to ``starts_per_component`` (8) climbs
   start from the events each component holds (hard assignment, in a seeded
   subsample of at most ``mode_events``): its highest-density event, then
   farthest-point picks among its events, so a component that spans two hills
   finds both.
3. **Merging by the level-set (cluster-tree) criterion.**  Climbs that end
   within 0.05 (channel inter-quartile ranges) of a higher end found the same
   mode.  Each mode is joined to its 12 nearest modes (a neighbourhood graph);
   along each join, the fitted log density is evaluated at ``segment_points``
   evenly spaced points of the straight segment between the two modes; its
   minimum is the join's *saddle*.  Pairs are visited from the highest saddle
   down (Kruskal order, a maximum spanning tree of the saddles) and two groups
   merge when the saddle lies less than ``log(1 / merge_ratio)`` below the
   *smaller* of the two groups' peaks, i.e. when
   ``f(saddle) >= merge_ratio * min(f(peak_a), f(peak_b))``: hills joined
   without a deep dip are one population, and a dip deeper than that
   separates them (persistence-based merging of a cluster tree).  Because
   groups merge through chains of pairs, a curved or skewed population made
   of several components merges even where the straight segment between its
   two far ends dips.  The saddle is the higher of the straight segment's
   lowest point and that of a bent path (mode -> the segment's midpoint moved
   up by :data:`BEND_STEPS` hill-climbing rounds -> mode): the lowest point of
   any path is a lower bound of the true saddle.
   **Runt size** (runt pruning of the cluster tree, an excess-mass rule): at
   each join, the events of each side (a mode's events: the subsample's events
   of its basin, i.e. nearest start of the event's own component, as in step
   4) whose log density lies above the saddle are counted; when the smaller
   side has fewer than ``min_events`` (20, the recipe's
   ``populations.min_events``; scaled to the subsample when it is one), it
   merges whatever the saddle's depth: a hill holding fewer events above its
   saddle than that is not supported by the data.  Measured on real
   15-17-channel files (about 10,000 events): 212-228 hill-climbed modes,
   median 10 events each; the depth rule alone left 212-218 populations.
4. **Assignment.**  Each event goes to the population with the largest sum of
   its components' posterior probabilities under the mixture (a compiled
   kernel, :func:`core.density.kernels.skew_logpdf`); an event whose largest
   posterior is the background component's gets -1 (no population).  This is
   also how :func:`assign_populations` assigns another file's events with a
   stored :class:`PopulationDefinition`, so equal events get equal labels.
   A component whose climbs reached different populations is split: its
   share of an event goes to the population reached from the nearest of its
   starts (channel-scaled distance), i.e. the starts' basins.  Climbs also
   start from the events the background component holds; a hill reached
   only from there (a cluster the mixture gave no component) becomes a
   population, and the background's share of an event nearest such a start
   goes to it (other background events stay -1).

Per population (:class:`Populations.table`, one dict per population):
count, share of all the events passed (events with label -1 count in the
denominator) with a 95 % Clopper-Pearson
interval (``scipy.stats.binomtest``), the mode (transformed units), the median
of every channel in transformed and original units (the transforms'
inverses), a marker profile, and ``rare``/``caution`` flags.

Marker profile (data-driven rule, documented in README and DEVELOPERS.md):
per channel, the populations' medians (transformed units) are sorted and
split at the widest gap between neighbours, provided that gap is at least
``MIN_GAP`` (1) times the sum of the two neighbours' robust standard
deviations (1.4826 MAD), i.e. their one-sd ranges do not overlap; otherwise no
population differs enough on the channel and it is left out of every
profile.  Populations below the gap are ``-``.  ``N`` and ``P`` are the
count-weighted medians of the negative and of the positive populations'
medians; a positive population at ``r = (m - N) / (P - N)`` is ``dim`` when
``r < DIM_BELOW`` (0.75), ``bright`` when ``r > BRIGHT_ABOVE`` (1.25), else
``+``.  (A split of all events' values, e.g. Otsu's, follows the big
populations' autofluorescence and misses a rare positive population.)
Names come from the channel labels ($PnS) when given, else the channel names.

Each record also has ``short_profile``: the positive (+, dim, bright)
markers only, or "no marker +" when every reported channel is negative.

Rare populations: share below ``rare_share`` (default 1 %, the recipe's
``populations.rare_share``); each is a population of its own by construction
(it survived step 3).  They are listed first (smallest first), then the
others by decreasing share.  A population under ``caution_events`` (20)
events carries a caution: its share and profile rest on few events.

Shapes: ``values`` is (n_events, n_channels) in the density channels' order
and transformed units; labels (n_events,) int.
"""

from __future__ import annotations

# The package's modules by role (each re-exported here, so ``core.populations.X`` keeps working):
# settings (defaults and their check), definition (stored form and assignment), modes (hill
# climbing, saddles, merging), profiles (marker levels and names), table (the result and its
# table), search (find_populations; find_populations_and_score scores and assigns in one
# pass), changes (grown and shrunk populations).
from .changes import population_changes, reading_order
from .definition import (PopulationDefinition, _group_matrix, _labels_from_posteriors, _mixture_dict,
                         assign_populations, component_posteriors)
from .modes import _hill_climb, _merge, _node_of_events, _saddles, _same_place, _spread_starts
from .profiles import _weighted_median, channel_splits, marker_level, population_stats, profile_text
from .search import _mixture_for, find_populations, find_populations_and_score, score_and_assign
from .settings import (_CHUNK, _MINUS, BEND_STEPS, BRIGHT_ABOVE, CHANGE_RATE, DEFAULT_SETTINGS, DEFINITION_VERSION,
                       DIM_BELOW, MAX_STEP, MIN_GAP, MODES_ON, check_settings)
from .table import Populations, _share_ci, count_populations, population_table

__all__ = ["BEND_STEPS", "BRIGHT_ABOVE", "CHANGE_RATE", "DEFAULT_SETTINGS", "DEFINITION_VERSION", "DIM_BELOW",
           "MAX_STEP", "MIN_GAP", "MODES_ON", "PopulationDefinition", "Populations", "assign_populations",
           "channel_splits", "check_settings", "component_posteriors", "count_populations", "find_populations",
           "find_populations_and_score",
           "marker_level", "population_changes", "reading_order", "population_stats", "population_table", "profile_text",
           "score_and_assign"]
