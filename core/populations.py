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
   density rises, else it halves).  Up to ``starts_per_component`` (8) climbs
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

import copy
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import EventDataError, RecipeError
from .progress import keep_going

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


# ---------------------------------------------------------------------------
# settings
# ---------------------------------------------------------------------------

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
    for k in ("caution_events", "min_events", "mode_events", "segment_points", "random_state", "starts_per_component"):
        if int(out[k]) != out[k] or out[k] < (3 if k == "segment_points" else 0):
            raise RecipeError(f"{where}populations {k!r} must be a whole number; got {out[k]!r}")
        out[k] = int(out[k])
    return out


# ---------------------------------------------------------------------------
# the stored definition
# ---------------------------------------------------------------------------

@dataclass
class PopulationDefinition:
    """What assigns events to populations, storable in a recipe (JSON).

    ``columns``: indices (into the density channels) the mixture covers;
    ``mixture``: the mixture's arrays (lists); ``groups``: population id per
    mixture component; ``modes``: (n_populations, n_channels) mode locations;
    ``names``: a short name (the marker profile) per population.
    """

    channels: list
    columns: list
    mixture: dict
    groups: list
    modes: list
    names: list
    split: dict = field(default_factory=dict)
    scale: list = field(default_factory=list)
    version: int = DEFINITION_VERSION
    _mix: Any = field(default=None, repr=False, compare=False)

    @property
    def n_populations(self) -> int:
        return len(self.modes)

    def to_dict(self) -> dict:
        """The JSON-able stored form (deep copy)."""
        return {"version": self.version, "channels": list(self.channels), "columns": list(self.columns),
                "mixture": copy.deepcopy(self.mixture), "groups": list(self.groups),
                "modes": copy.deepcopy(self.modes), "names": list(self.names),
                "split": copy.deepcopy(self.split), "scale": list(self.scale)}

    @classmethod
    def from_dict(cls, d: Mapping) -> "PopulationDefinition":
        """Rebuild from :meth:`to_dict`'s form (RecipeError when malformed or newer)."""
        if not isinstance(d, Mapping) or "version" not in d:
            raise RecipeError("a population definition must be an object with a 'version'")
        v = d["version"]
        if not isinstance(v, int) or isinstance(v, bool) or v < 1:
            raise RecipeError(f"population definition version must be a whole number; got {v!r}")
        if v > DEFINITION_VERSION:
            raise RecipeError(f"the population definition has version {v}; this program reads up to "
                              f"{DEFINITION_VERSION}: upgrade to use it")
        need = ("channels", "columns", "mixture", "groups", "modes", "names")
        missing = [k for k in need if k not in d]
        if missing:
            raise RecipeError(f"the population definition lacks {', '.join(missing)}")
        out = cls(channels=list(d["channels"]), columns=[int(c) for c in d["columns"]],
                  mixture=copy.deepcopy(dict(d["mixture"])), groups=[int(g) for g in d["groups"]],
                  modes=copy.deepcopy(list(d["modes"])), names=[str(s) for s in d["names"]],
                  split=copy.deepcopy(dict(d.get("split") or {})), scale=[float(x) for x in d.get("scale") or []],
                  version=v)
        try:
            mix = out.mixture_model()
        except (KeyError, TypeError, ValueError) as exc:
            raise RecipeError(f"the population definition's mixture is invalid: {exc}") from exc
        if len(out.groups) != mix.n_components or (out.groups and not 0 <= min(out.groups)) \
                or (out.groups and max(out.groups) >= len(out.modes)) or len(out.names) != len(out.modes):
            raise RecipeError("the population definition's groups, modes and names do not agree")
        d_ch = len(out.channels)
        for k, sp in out.split.items():
            ok = ((k == "background" or (str(k).isdigit() and int(k) < mix.n_components))
                  and isinstance(sp, Mapping)
                  and len(sp.get("starts", [])) == len(sp.get("populations", [])) > 0
                  and all(len(x) == d_ch for x in sp["starts"])
                  and all(-1 <= int(q) < len(out.modes) for q in sp["populations"]))
            if not ok or len(out.scale) != d_ch:
                raise RecipeError("the population definition's split components are malformed")
        return out

    def mixture_model(self):
        """The stored mixture as a :class:`~core.density.gaussian_base.GaussianMixtureBase` (cached)."""
        if self._mix is None:
            from .density.gaussian_base import GaussianMixtureBase

            m = self.mixture
            self._mix = GaussianMixtureBase(
                np.asarray(m["weights"], float), np.asarray(m["means"], float),
                np.asarray(m["covariances"], float), np.asarray(m["loc"], float),
                np.asarray(m["scale"], float),
                skew=None if m.get("skew") is None else np.asarray(m["skew"], float),
                background=None if m.get("background") is None else np.asarray(m["background"], float))
        return self._mix


def _mixture_dict(mix) -> dict:
    return {"weights": mix.weights.tolist(), "means": mix.means.tolist(),
            "covariances": mix.covariances.tolist(), "loc": mix.loc.tolist(), "scale": mix.scale.tolist(),
            "skew": None if mix.skew is None else mix.skew.tolist(),
            "background": None if mix.background is None else mix.background.tolist()}


# ---------------------------------------------------------------------------
# posteriors and assignment (compiled kernel)
# ---------------------------------------------------------------------------

def component_posteriors(mix, X) -> np.ndarray:
    """Posterior component probabilities (n, K + 1), background first, of events X (n, d)."""
    return mix.posteriors(X)


def _labels_from_posteriors(R: np.ndarray, G: np.ndarray, X: np.ndarray | None = None,
                            split: Mapping | None = None, scale=None) -> np.ndarray:
    P = R[:, 1:] @ G                            # (n, n_pop) population posteriors
    none = R[:, 0].copy()
    for k, sp in (split or {}).items():
        # a split component's share goes to the population of the nearest start (its basin)
        starts = np.asarray(sp["starts"], float) / scale
        Z = X / scale
        d2 = (Z * Z).sum(axis=1)[:, None] - 2.0 * Z @ starts.T + (starts * starts).sum(axis=1)[None, :]
        pop = np.asarray(sp["populations"], int)[np.argmin(d2, axis=1)]
        rows = np.flatnonzero(pop >= 0)
        if k == "background":
            P[rows, pop[rows]] += none[rows]
            none[rows] = 0.0
            continue
        k = int(k)
        P[:, int(np.argmax(G[k]))] -= R[:, k + 1]
        P[rows, pop[rows]] += R[rows, k + 1]
    lab = np.argmax(P, axis=1).astype(np.int64)
    lab[none >= P[np.arange(P.shape[0]), lab]] = -1
    return lab


def _group_matrix(groups: Sequence[int], n_pop: int) -> np.ndarray:
    G = np.zeros((len(groups), n_pop))
    G[np.arange(len(groups)), np.asarray(groups, int)] = 1.0
    return G


def assign_populations(definition: PopulationDefinition | Mapping, values) -> np.ndarray:
    """Population id per event (n_events,) int, -1 for none, of ``values``
    (n_events, n_channels: the definition's channels, transformed as its recipe says).

    Deterministic: the same events give the same labels.  Non-finite rows get -1.
    """
    if isinstance(definition, Mapping):
        definition = PopulationDefinition.from_dict(definition)
    X = np.asarray(values, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != len(definition.channels):
        raise EventDataError(f"population assignment: expected events x {len(definition.channels)} channels "
                             f"({', '.join(definition.channels)}), got shape {X.shape}")
    mix = definition.mixture_model()
    G = _group_matrix(definition.groups, definition.n_populations)
    cols = np.asarray(definition.columns, int)
    out = np.full(X.shape[0], -1, dtype=np.int64)
    ok = np.isfinite(X).all(axis=1)
    for a in range(0, X.shape[0], _CHUNK):
        sel = np.flatnonzero(ok[a:a + _CHUNK]) + a
        if sel.size:
            Xc = X[sel]
            out[sel] = _labels_from_posteriors(component_posteriors(mix, Xc[:, cols]), G, Xc,
                                               definition.split, np.asarray(definition.scale, float))
    return out


# ---------------------------------------------------------------------------
# modes and merging
# ---------------------------------------------------------------------------

def _hill_climb(score, starts: np.ndarray, f0: np.ndarray, step0: np.ndarray, iters: int = 60):
    """Gradient ascent of ``score`` (log density) from each row of ``starts`` (m, d).

    Each round probes x +- h e_j on every channel (2 d points per row, one
    ``score`` call for all rows) with h half the row's current step: central
    differences give the gradient at the scale of the move, so the piecewise
    constant cells of a tree density (zero gradient inside a cell) do not stall
    it.  The row moves one step along the gradient, or to its best probe (a
    compass move) when that is higher; a move is kept only when the log
    density rises, and the step grows by 1.5 after a rise (up to
    :data:`MAX_STEP` of the channel scales, so a climb does not leap over a
    valley) and halves otherwise.  ``step0`` (d,) is a channel's scale; the
    first step is 0.05 of it.  Returns (x (m, d), log density (m,))."""
    x = starts.copy()
    f = f0.copy()
    m, d = x.shape
    step = np.full(m, 0.05)
    rows = np.arange(m)
    for _ in range(iters):
        h = (0.5 * step)[:, None] * step0[None, :]             # (m, d)
        P = np.repeat(x, 2 * d, axis=0).reshape(m, 2 * d, d)
        P[:, np.arange(d), np.arange(d)] += h
        P[:, d + np.arange(d), np.arange(d)] -= h
        s = score(P.reshape(-1, d)).reshape(m, 2 * d)
        g = (s[:, :d] - s[:, d:]) / (2 * h)                     # (m, d)
        gn = np.sqrt(((g * step0) ** 2).sum(axis=1))
        gn[gn == 0] = 1.0
        trial = x + step[:, None] * g * step0 ** 2 / gn[:, None]
        ft = score(trial)
        best = np.argmax(s, axis=1)
        probe_better = s[rows, best] > ft
        trial[probe_better] = P[rows, best][probe_better]
        ft[probe_better] = s[rows, best][probe_better]
        up = ft > f
        x[up], f[up] = trial[up], ft[up]
        step = np.where(up, np.minimum(step * 1.5, MAX_STEP), step * 0.5)
        if (step < 1e-4).all():
            break
    return x, f


def _spread_starts(Z: np.ndarray, f: np.ndarray, m: int, rng) -> list:
    """Up to ``m`` row indices of Z (events of one component, scaled): the
    highest-density one, then farthest-point picks (each the event farthest
    from those picked so far), on a seeded subsample of at most 4,000."""
    n = Z.shape[0]
    pool = np.arange(n) if n <= 4000 else np.sort(rng.choice(n, 4000, replace=False))
    first = int(np.argmax(f))
    if first not in set(pool.tolist()):
        pool = np.r_[first, pool]
    picked = [first]
    d = ((Z[pool] - Z[first]) ** 2).sum(axis=1)
    while len(picked) < min(m, pool.size):
        j = int(np.argmax(d))
        if d[j] <= 0:
            break
        picked.append(int(pool[j]))
        d = np.minimum(d, ((Z[pool] - Z[pool[j]]) ** 2).sum(axis=1))
    return picked


def _same_place(E: np.ndarray, f: np.ndarray, tol: float = 0.05) -> np.ndarray:
    """Node id per climb end (rows of E, scaled units): ends closer than ``tol``
    to a higher end already kept share its node."""
    order = np.lexsort((np.arange(f.size), -f))
    node = np.full(f.size, -1, dtype=np.int64)
    kept = []
    for i in order:
        for q, j in enumerate(kept):
            if np.sqrt(((E[i] - E[j]) ** 2).sum()) < tol:
                node[i] = q
                break
        else:
            node[i] = len(kept)
            kept.append(i)
    return node


def _saddles(score, modes: np.ndarray, n_points: int, scale: np.ndarray, neighbours: int = 12,
             bend_steps: int = 0):
    """Edges (i, j, saddle) between each mode and its ``neighbours`` nearest modes
    (scaled distance; a neighbourhood graph): the lowest log density at
    ``n_points`` points of the straight segment between the two."""
    m, d = modes.shape
    Z = modes / scale
    D = ((Z[:, None, :] - Z[None, :, :]) ** 2).sum(axis=2)
    np.fill_diagonal(D, np.inf)
    near = np.argsort(D, axis=1, kind="stable")[:, :min(neighbours, m - 1)]
    pairs = sorted({(min(i, int(j)), max(i, int(j))) for i in range(m) for j in near[i]})
    if not pairs:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0)
    iu = np.array([p[0] for p in pairs])
    ju = np.array([p[1] for p in pairs])
    t = np.linspace(0.0, 1.0, n_points)[1:-1]

    def lowest(a, b):
        pts = a[:, None, :] * (1 - t)[None, :, None] + b[:, None, :] * t[None, :, None]
        return score(pts.reshape(-1, d)).reshape(a.shape[0], t.size).min(axis=1)

    straight = lowest(modes[iu], modes[ju])
    if bend_steps <= 0:
        return iu, ju, straight
    # a bent path: the segment's midpoint moved up by a short hill climb, then
    # the two segments mode -> moved midpoint -> mode; any path's lowest point is
    # a lower bound of the true saddle, so the higher of the two is kept
    mid = 0.5 * (modes[iu] + modes[ju])
    top, _ = _hill_climb(score, mid, score(mid), scale, iters=bend_steps)
    bent = np.minimum(lowest(modes[iu], top), lowest(top, modes[ju]))
    return iu, ju, np.maximum(straight, bent)


def _merge(peaks: np.ndarray, edges, ratio: float, above=None, min_events: float = 0.0) -> np.ndarray:
    """Group per mode by the persistence and runt-size rules (module docstring);
    ``edges`` (i, j, saddle) from :func:`_saddles`.  ``above(nodes, level)``:
    number of events of the modes ``nodes`` (list) whose log density exceeds
    ``level``; with ``min_events`` > 0, the smaller side of a join holding fewer
    such events merges whatever the depth of the saddle."""
    iu, ju, saddle = edges
    m = peaks.size
    parent = list(range(m))
    top = peaks.astype(float).copy()   # best peak of each root's group
    members = {i: [i] for i in range(m)}

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    s = np.minimum(saddle, np.minimum(peaks[iu], peaks[ju]))
    order = np.lexsort((ju, iu, -s))      # highest saddle first, ties by index (deterministic)
    depth = math.log(1.0 / ratio)
    for e in order:
        a, b = find(int(iu[e])), find(int(ju[e]))
        if a == b:
            continue
        runt = (min_events > 0 and above is not None
                and min(above(members[a], s[e]), above(members[b], s[e])) < min_events)
        if runt or min(top[a], top[b]) - s[e] <= depth:
            lo, hi = (a, b) if top[a] < top[b] or (top[a] == top[b] and a > b) else (b, a)
            parent[lo] = hi
            members[hi] = members[hi] + members.pop(lo)
    roots = [find(i) for i in range(m)]
    return np.unique(roots, return_inverse=True)[1]


def _node_of_events(Z: np.ndarray, hard: np.ndarray, starts: np.ndarray, owner: np.ndarray,
                    node: np.ndarray) -> np.ndarray:
    """Mode (node) per event of the subsample: the node reached from the nearest
    start (scaled units ``Z``) among the starts of the event's own component
    (``hard``, -1 background), as the assignment splits components."""
    out = np.zeros(Z.shape[0], dtype=np.int64)
    for k in np.unique(hard):
        ev = np.flatnonzero(hard == k)
        mine = np.flatnonzero(owner == k)
        if mine.size == 0:      # a component without starts: nearest start of all
            mine = np.arange(owner.size)
        S = Z[starts[mine]]
        for a in range(0, ev.size, 8192):
            E = Z[ev[a:a + 8192]]
            d2 = (E * E).sum(axis=1)[:, None] - 2.0 * E @ S.T + (S * S).sum(axis=1)[None, :]
            out[ev[a:a + 8192]] = node[mine[np.argmin(d2, axis=1)]]
    return out


# ---------------------------------------------------------------------------
# profiles
# ---------------------------------------------------------------------------

def population_stats(values: np.ndarray, labels: np.ndarray, n_populations: int):
    """Per population: counts (P,), channel medians (P, d) and robust standard
    deviations 1.4826 MAD (P, d); NaN rows for empty populations.  One sort of
    the events by label, then contiguous slices."""
    X = np.asarray(values, dtype=np.float64)
    ok = labels >= 0
    counts = np.bincount(labels[ok], minlength=n_populations)
    order = np.argsort(labels[ok], kind="stable")
    Xs = X[ok][order]
    bounds = np.concatenate([[0], np.cumsum(counts)])
    med = np.full((n_populations, X.shape[1]), np.nan)
    sd = np.full((n_populations, X.shape[1]), np.nan)
    for p in range(n_populations):
        if counts[p]:
            block = Xs[bounds[p]:bounds[p + 1]]
            med[p] = np.median(block, axis=0)
            sd[p] = 1.4826 * np.median(np.abs(block - med[p]), axis=0)
    return counts, med, sd


def channel_splits(values: np.ndarray, labels: np.ndarray, n_populations: int, stats=None) -> list[dict]:
    """Per channel the profile rule's split (module docstring): ``threshold`` (None
    when no gap is wide enough), the levels ``neg`` and ``pos``, and ``gap`` in
    units of the two neighbouring populations' summed spread.  ``stats``:
    :func:`population_stats` of the same events when already computed."""
    counts, med, sd = stats if stats is not None else population_stats(values, labels, n_populations)
    pops = np.flatnonzero(counts >= 3)
    out = []
    for j in range(med.shape[1]):
        if pops.size < 2:
            out.append({"threshold": None, "neg": np.nan, "pos": np.nan, "gap": 0.0})
            continue
        meds = med[pops, j]
        spread = sd[pops, j]
        w = counts[pops].astype(float)
        order = np.argsort(meds, kind="stable")
        gaps = np.diff(meds[order])
        k = int(np.argmax(gaps))
        pair = spread[order[k]] + spread[order[k + 1]]
        gap = float(gaps[k] / pair) if pair > 0 else (np.inf if gaps[k] > 0 else 0.0)
        if gap < MIN_GAP:
            out.append({"threshold": None, "neg": np.nan, "pos": np.nan, "gap": gap})
            continue
        neg, pos = order[:k + 1], order[k + 1:]
        out.append({"threshold": float(0.5 * (meds[order[k]] + meds[order[k + 1]])),
                    "neg": float(_weighted_median(meds[neg], w[neg])),
                    "pos": float(_weighted_median(meds[pos], w[pos])), "gap": gap})
    return out


def _weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    o = np.argsort(v)
    c = np.cumsum(w[o])
    return float(v[o][np.searchsorted(c, 0.5 * c[-1])])


def marker_level(median: float, split: Mapping) -> str | None:
    """"-", "dim", "+" or "bright" for a population median on one channel (module
    docstring rule); None when the channel has no split."""
    if split["threshold"] is None or not np.isfinite(median):
        return None
    if median < split["threshold"]:
        return "-"
    span = split["pos"] - split["neg"]
    r = (median - split["neg"]) / span if span > 0 else 1.0
    return "dim" if r < DIM_BELOW else "bright" if r > BRIGHT_ABOVE else "+"


def profile_text(levels: Sequence[str], names: Sequence[str]) -> str:
    """"CD3+ CD4+ CD8−" from per-channel levels (None: channel left out)."""
    parts = []
    for lv, nm in zip(levels, names):
        if lv is None:
            continue
        parts.append(nm + (_MINUS if lv == "-" else lv))
    return " ".join(parts)


# ---------------------------------------------------------------------------
# the result
# ---------------------------------------------------------------------------

@dataclass
class Populations:
    """Result of :func:`find_populations` (or of counting a definition on a file).

    ``labels`` (n_events,) population id (-1 none); ``table`` one dict per
    population in display order (rare first); ``definition`` the stored form's
    object; ``info`` details of the search (components, modes, base).
    """

    labels: np.ndarray
    table: list
    definition: PopulationDefinition
    info: dict = field(default_factory=dict)

    def mask(self, pop_id: int) -> np.ndarray:
        return self.labels == int(pop_id)

    @property
    def rare_ids(self) -> list:
        return [r["id"] for r in self.table if r["rare"]]


def _share_ci(count: int, n: int) -> tuple[float, float]:
    from scipy import stats

    if n <= 0:
        return (float("nan"), float("nan"))
    ci = stats.binomtest(int(count), int(n)).proportion_ci(confidence_level=0.95, method="exact")
    return float(ci.low), float(ci.high)


def population_table(values: np.ndarray, labels: np.ndarray, definition: PopulationDefinition,
                     channel_names: Sequence[str], channel_labels: Sequence[str] | None = None,
                     transforms: Mapping | None = None, settings: Mapping | None = None,
                     splits: list | None = None) -> list:
    """One record per population of ``definition`` counted on ``values``/``labels``
    (see the module docstring for the fields), rare populations first."""
    from .transforms import Transform, make_transform

    st = check_settings(settings)
    X = np.asarray(values, dtype=np.float64)
    n = X.shape[0]
    names = [(lab or "").strip() or nm for nm, lab in
             zip(channel_names, channel_labels or [""] * len(channel_names))]
    stats = population_stats(X, labels, definition.n_populations)
    if splits is None:
        splits = channel_splits(X, labels, definition.n_populations, stats)
    inv = []
    for nm in channel_names:
        spec = (transforms or {}).get(nm)
        if spec is None:
            inv.append(None)
        else:
            inv.append(spec if isinstance(spec, Transform) else make_transform(dict(spec)))
    counts, medians, _ = stats
    rows = []
    for p in range(definition.n_populations):
        c = int(counts[p])
        med = medians[p]
        orig = np.array([float(t.inverse(np.array([v]))[0]) if (t is not None and np.isfinite(v)) else float(v)
                         for v, t in zip(med, inv)])
        levels = [marker_level(float(med[j]), splits[j]) for j in range(X.shape[1])]
        share = c / n if n else float("nan")
        lo, hi = _share_ci(c, n)
        positive = [(lv, nm) for lv, nm in zip(levels, names) if lv not in (None, "-")]
        rows.append({"id": p, "profile": profile_text(levels, names) or f"population {p + 1}",
                     "short_profile": (profile_text([lv for lv, _ in positive], [nm for _, nm in positive])
                                       or ("no marker +" if any(lv == "-" for lv in levels)
                                           else f"population {p + 1}")),
                     "count": c, "share": share, "share_low": lo, "share_high": hi,
                     "rare": bool(c > 0 and share < st["rare_share"]),
                     "caution": bool(c < st["caution_events"]),
                     "mode": [float(v) for v in definition.modes[p]],
                     "median": {nm: float(v) for nm, v in zip(channel_names, med)},
                     "median_original": {nm: float(v) for nm, v in zip(channel_names, orig)},
                     "levels": {nm: lv for nm, lv in zip(names, levels) if lv is not None}})
    rows.sort(key=lambda r: (0, r["share"], r["id"]) if r["rare"] else (1, -r["share"], r["id"]))
    return rows


def count_populations(definition: PopulationDefinition | Mapping, values, channel_names,
                      channel_labels=None, transforms=None, settings=None) -> Populations:
    """Apply a stored definition to other events: labels and table (same population ids)."""
    if isinstance(definition, Mapping):
        definition = PopulationDefinition.from_dict(definition)
    labels = assign_populations(definition, values)
    table = population_table(values, labels, definition, channel_names, channel_labels, transforms, settings)
    return Populations(labels=labels, table=table, definition=definition,
                       info={"matched": True, "settings": check_settings(settings)})


# ---------------------------------------------------------------------------
# finding them
# ---------------------------------------------------------------------------

def _mixture_for(model, X: np.ndarray, seed: int):
    """The model's mixture base and the columns it covers; fitted here when the model has none."""
    from .density.gaussian_base import GaussianMixtureBase

    mix = getattr(model, "_gmm", None)
    frozen = np.asarray(getattr(model, "_frozen", np.zeros(X.shape[1], bool)), bool)
    cols = np.flatnonzero(~frozen)
    if cols.size == 0:
        raise EventDataError("populations: every density channel is constant; there is nothing to cluster")
    if mix is not None:
        return mix, cols, "model"
    Xc = X[:, cols]
    med = np.median(Xc, axis=0)
    q1, q3 = np.percentile(Xc, [25, 75], axis=0)
    scale = np.maximum((q3 - q1) / (2.0 * math.log(3.0)), 1e-12 * np.maximum(1.0, np.abs(med)))
    mix = GaussianMixtureBase.fit(Xc, med, scale, random_state=seed, skew=True, flat_background=True)
    return mix, cols, "fitted here"


def find_populations(model, values, channel_names, channel_labels=None, transforms=None,
                     settings=None, log_density=None, progress=None) -> Populations:
    """Populations of events ``values`` (n_events, n_channels; the model's channels,
    transformed) as the modes of the fitted ``model`` (see the module docstring).

    ``channel_names`` ($PnN) and ``channel_labels`` ($PnS, may hold "") per column;
    ``transforms`` {name: spec or Transform} for medians in original units;
    ``settings`` over :data:`DEFAULT_SETTINGS`; ``log_density`` (n_events,) the
    model's scores of ``values`` when already computed; ``progress(step, total,
    info)`` is called between stages (False stops: :class:`core.errors.Cancelled`).
    Deterministic for ``settings['random_state']``.
    """
    from .errors import Cancelled

    st = check_settings(settings)
    X = np.ascontiguousarray(values, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != len(channel_names):
        raise EventDataError(f"populations: values of shape {X.shape} do not match {len(channel_names)} channels")
    if not np.isfinite(X).all():
        raise EventDataError("populations: some events have missing or infinite values; pass the cleaned events")
    n, d = X.shape
    rng = np.random.default_rng(st["random_state"])
    total = 4

    def going(step, what):
        if not keep_going(progress, step, total, {"stage": what}):
            raise Cancelled("finding populations was stopped")

    going(0, "Populations: mixture components")
    mix, cols, origin = _mixture_for(model, X, st["random_state"])
    K = mix.n_components
    if origin == "model" and MODES_ON == "model":
        score = model.score_samples
    else:
        # a tree density on the per-channel map is piecewise constant: nearly every
        # cell is a local maximum, so modes and saddles are taken on the smooth
        # mixture fitted to the same events (module docstring)
        def score(Z):
            return mix.logpdf(np.ascontiguousarray(Z[:, cols]))
        log_density = None

    # a seeded subsample starts the mode search
    sub = np.arange(n) if n <= st["mode_events"] else np.sort(rng.choice(n, st["mode_events"], replace=False))
    Xs = X[sub]
    ld = np.asarray(log_density, float)[sub] if log_density is not None else score(Xs)
    R = component_posteriors(mix, Xs[:, cols])
    hard = np.argmax(R, axis=1) - 1                     # -1 background
    going(1, "Populations: modes of the density")
    scale = np.maximum(np.percentile(X, 75, axis=0) - np.percentile(X, 25, axis=0), 1e-9)
    starts, owner = [], []
    for k in range(-1, K):          # -1: the events the background holds
        idx = np.flatnonzero(hard == k)
        if idx.size == 0:
            continue
        for i in _spread_starts(Xs[idx] / scale, ld[idx], st["starts_per_component"], rng):
            starts.append(idx[i])
            owner.append(k)
    if not starts:
        raise EventDataError("populations: no event belongs to any mixture component")
    starts = np.asarray(starts)
    owner = np.asarray(owner)
    ends, peaks = _hill_climb(score, Xs[starts], ld[starts], scale)
    # climbs that ended at the same place found the same mode
    node = _same_place(ends / scale, peaks)
    n_nodes = int(node.max()) + 1
    top = np.array([np.flatnonzero(node == q)[np.argmax(peaks[node == q])] for q in range(n_nodes)])
    modes, node_peaks = ends[top], peaks[top]
    going(2, "Populations: saddles between modes")
    edges = _saddles(score, modes, st["segment_points"], scale, bend_steps=BEND_STEPS)
    # runt size: events of each mode's basin, sorted by log density
    ev_node = _node_of_events(Xs / scale, hard, starts, owner, node)
    by_node = [np.sort(ld[ev_node == q]) for q in range(n_nodes)]

    def above(nodes, level):
        return sum(int(by_node[q].size - np.searchsorted(by_node[q], level, side="right")) for q in nodes)

    min_ev = st["min_events"] * Xs.shape[0] / n      # in the subsample's events
    node_group = _merge(node_peaks, edges, st["merge_ratio"], above, min_ev)
    start_pop = node_group[node]
    n_pop = int(node_group.max()) + 1
    # each component goes to the population its starts reached; a component whose
    # starts reached several populations is split into the basins of its starts
    groups = np.full(K, -1, dtype=np.int64)
    split: dict = {}
    comp_pops = set(start_pop[owner >= 0].tolist())
    bg = owner < 0
    bg_only = [int(q) if q not in comp_pops else -1 for q in start_pop[bg]]
    if any(q >= 0 for q in bg_only):
        # hills reached only from the background's events: populations the mixture has no component for
        split["background"] = {"starts": Xs[starts[bg]].tolist(), "populations": bg_only}
    for k in np.unique(owner[owner >= 0]):
        sel = owner == k
        pops_k = np.unique(start_pop[sel])
        groups[k] = np.bincount(start_pop[sel]).argmax()
        if pops_k.size > 1:
            split[str(int(k))] = {"starts": Xs[starts[sel]].tolist(), "populations": start_pop[sel].tolist()}
    if (groups < 0).any():
        # components holding no event join the population of the component they overlap most
        Pk = R[:, 1:]
        has = np.flatnonzero(groups >= 0)
        for k in np.flatnonzero(groups < 0):
            i = int(np.argmax(Pk[:, k]))
            groups[k] = groups[has[np.argmax(Pk[i, has])]]
    pop_modes, pop_peaks = [], []
    for p in range(n_pop):
        members = np.flatnonzero(node_group == p)
        best = members[np.argmax(node_peaks[members])]
        pop_modes.append(modes[best])
        pop_peaks.append(float(node_peaks[best]))
    definition = PopulationDefinition(channels=list(channel_names), columns=[int(c) for c in cols],
                                      mixture=_mixture_dict(mix), groups=[int(g) for g in groups],
                                      modes=[[float(v) for v in m] for m in pop_modes],
                                      names=[""] * n_pop, split=split, scale=[float(v) for v in scale])
    definition._mix = mix
    going(3, "Populations: assigning events")
    labels = assign_populations(definition, X)
    table = population_table(X, labels, definition, channel_names, channel_labels, transforms, st)
    for r in table:
        definition.names[r["id"]] = r["profile"]
    going(4, "Populations: done")
    return Populations(labels=labels, table=table, definition=definition,
                       info={"components": K, "components_with_events": int(np.unique(owner[owner >= 0]).size),
                             "mixture": origin, "starts": int(starts.size), "modes": n_nodes,
                             "mode_events": np.bincount(ev_node, minlength=n_nodes).tolist(),
                             "mode_peaks": node_peaks.tolist(),
                             "split_components": len(split),
                             "peaks": pop_peaks, "settings": st})


# ---------------------------------------------------------------------------
# grown and shrunk populations (a test file against its control)
# ---------------------------------------------------------------------------

def population_changes(control_labels, test_labels, definition: PopulationDefinition,
                       confidence_level: float = 0.95) -> list:
    """Each population's share in control and test, fold change and exact test.

    ``control_labels``, ``test_labels``: population ids (-1 none) of the
    control's and the test's events under ONE ``definition`` (so population p
    is the same cells in both).  Per population (one dict each, by id):
    ``control_count``/``control_share``, ``test_count``/``test_share`` (shares
    of all events of that file), ``fold`` = test share / control share with a
    ``confidence_level`` interval (``fold_low``, ``fold_high``), ``p`` and
    ``q``.

    ``p``: two-sided Fisher exact test of the 2 x 2 table (in / not in the
    population) x (test / control) (``scipy.stats.fisher_exact``).  Fold
    interval: conditional on the population's events in both files
    ``m = c_test + c_control``, ``c_test`` is binomial with probability
    ``theta = n_test R / (n_control + n_test R)`` (R the fold; exact for Poisson
    counts, close for shares well below 1); the Clopper-Pearson interval of
    theta (``scipy.stats.binomtest``) mapped to R.  ``q``: Benjamini-Hochberg
    across the populations (:func:`core.fdr.bh_qvalues`); ``change`` is
    "grown" / "shrunk" when q <= :data:`CHANGE_RATE` (5 %), else "".
    """
    from scipy import stats

    from .fdr import bh_qvalues

    cl = np.asarray(control_labels)
    tl = np.asarray(test_labels)
    n1, n2 = int(cl.size), int(tl.size)
    if n1 == 0 or n2 == 0:
        raise EventDataError("population changes need events in both the control and the test file")
    P = definition.n_populations if isinstance(definition, PopulationDefinition) else int(definition)
    c1 = np.bincount(cl[cl >= 0], minlength=P)
    c2 = np.bincount(tl[tl >= 0], minlength=P)
    rows, ps = [], []
    for p in range(P):
        a, b = int(c1[p]), int(c2[p])
        s1, s2 = a / n1, b / n2
        pval = float(stats.fisher_exact([[b, n2 - b], [a, n1 - a]])[1])
        m = a + b
        if m:
            ci = stats.binomtest(b, m).proportion_ci(confidence_level=confidence_level, method="exact")
            lo_t, hi_t = float(ci.low), float(ci.high)
            lo = lo_t * n1 / ((1 - lo_t) * n2) if lo_t < 1 else np.inf
            hi = hi_t * n1 / ((1 - hi_t) * n2) if hi_t < 1 else np.inf
        else:
            lo, hi = np.nan, np.nan
        fold = s2 / s1 if a else (np.inf if b else np.nan)
        rows.append({"id": p, "control_count": a, "control_share": s1, "test_count": b, "test_share": s2,
                     "fold": float(fold), "fold_low": float(lo), "fold_high": float(hi), "p": pval})
        ps.append(pval)
    q = bh_qvalues(np.array(ps)) if ps else np.array([])
    for r, qq in zip(rows, q):
        r["q"] = float(qq)
        r["change"] = ("grown" if r["fold"] > 1 else "shrunk") if r["q"] <= CHANGE_RATE else ""
    return rows
