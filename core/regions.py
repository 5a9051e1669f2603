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
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, replace
from typing import Any, Iterable, Mapping, NamedTuple, Sequence

import numpy as np

from .errors import RegionError

GEOMETRIC_KINDS = ("rectangle", "polygon", "interval")
COMBINATION_KINDS = ("and", "or", "not")
KINDS = GEOMETRIC_KINDS + ("rarity", "enriched") + COMBINATION_KINDS
KINDS = KINDS + ("population",)

_COMMON_KEYS = {"name", "kind", "parent"}
_KEYS = {
    "rectangle": _COMMON_KEYS | {"channels", "x", "y", "transforms"},
    "polygon": _COMMON_KEYS | {"channels", "vertices", "transforms"},
    "interval": _COMMON_KEYS | {"channels", "low", "high", "transforms"},
    "rarity": _COMMON_KEYS | {"percentile"},
    "population": _COMMON_KEYS | {"population", "definition", "transforms"},
    "enriched": _COMMON_KEYS | {"control"},
    "and": _COMMON_KEYS | {"operands"},
    "or": _COMMON_KEYS | {"operands"},
    "not": _COMMON_KEYS | {"operands"},
}


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------

def _finite_number(value: Any, what: str, region: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise RegionError(f"region {region!r}: {what} must be a number; got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise RegionError(f"region {region!r}: {what} must be a finite number; got {value}")
    return value


def _bounds(value: Any, what: str, region: str) -> tuple[float, float]:
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise RegionError(f"region {region!r}: {what} must be a pair [low, high]; got {value!r}")
    low = _finite_number(value[0], f"{what} low", region)
    high = _finite_number(value[1], f"{what} high", region)
    if not low < high:
        raise RegionError(f"region {region!r}: {what} low ({low}) must be below high ({high})")
    return low, high


def _spec_key(spec: Any) -> str:
    """Canonical text of a transform spec (None = untransformed) for comparison."""
    if spec is None:
        return "null"

    def norm(v):
        if isinstance(v, bool) or v is None or isinstance(v, str):
            return v
        if isinstance(v, (int, float, np.integer, np.floating)):
            return float(v)
        if isinstance(v, Mapping):
            return {str(k): norm(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [norm(x) for x in v]
        return str(v)

    return json.dumps(norm(spec), sort_keys=True, separators=(",", ":"))


def _channel_values(values: Mapping[str, np.ndarray], channel: str, region: str, n: int) -> np.ndarray:
    if channel not in values:
        raise RegionError(f"region {region!r} uses channel {channel!r}, which is not among the "
                          f"available channels ({', '.join(map(str, values)) or 'none'})")
    col = np.asarray(values[channel], dtype=np.float64).ravel()
    if col.shape[0] != n:
        raise RegionError(f"region {region!r}: channel {channel!r} has {col.shape[0]} values, "
                          f"expected {n} (one per event)")
    return col


def points_in_polygon(x: np.ndarray, y: np.ndarray, vertices: np.ndarray) -> np.ndarray:
    """Even-odd point-in-polygon test, vectorised over points.

    ``x``, ``y``: float arrays (n,); ``vertices``: (k, 2), the outline closed
    implicitly (last vertex joins the first).  A horizontal ray is cast from
    each point towards +x; the point is inside when it crosses an odd number
    of edges.  NaN coordinates are outside.  Returns bool (n,).
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    y = np.asarray(y, dtype=np.float64).ravel()
    v = np.asarray(vertices, dtype=np.float64)
    inside = np.zeros(x.shape, dtype=bool)
    k = v.shape[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        for i in range(k):
            x1, y1 = v[i]
            x2, y2 = v[(i + 1) % k]
            if y1 == y2:
                continue  # horizontal edges never straddle the ray
            straddles = (y1 > y) != (y2 > y)
            x_cross = x1 + (y - y1) * (x2 - x1) / (y2 - y1)
            inside ^= straddles & (x < x_cross)
    inside &= np.isfinite(x) & np.isfinite(y)
    return inside


# ---------------------------------------------------------------------------
# regions
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Region:
    """One named region; build it with :func:`region_from_dict` or the kind's class.

    ``parent``: name of the region this one is nested under, or None.
    """

    name: str
    parent: str | None = None

    kind = "region"

    def references(self) -> tuple[str, ...]:
        """Names of the regions this one depends on (parent and operands)."""
        return (self.parent,) if self.parent else ()

    def channels_used(self) -> tuple[str, ...]:
        return ()

    def own_mask(self, values: Mapping[str, np.ndarray], rarity: np.ndarray | None,
                 masks: Mapping[str, np.ndarray], n: int) -> np.ndarray:
        raise NotImplementedError

    def _base_dict(self) -> dict:
        return {"name": self.name, "kind": self.kind, "parent": self.parent}

    def to_dict(self) -> dict:
        raise NotImplementedError

    def _check_common(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise RegionError(f"a region name must be a non-empty text; got {self.name!r}")
        if self.parent is not None and (not isinstance(self.parent, str) or not self.parent):
            raise RegionError(f"region {self.name!r}: parent must be a region name or null; got {self.parent!r}")
        if self.parent == self.name:
            raise RegionError(f"region {self.name!r} cannot be its own parent")


@dataclass(frozen=True)
class _GeometricRegion(Region):
    channels: tuple[str, ...] = ()
    transforms: Mapping[str, Any] = field(default_factory=dict)

    n_channels = 2

    def channels_used(self) -> tuple[str, ...]:
        return tuple(self.channels)

    def _check_geometry_common(self) -> None:
        self._check_common()
        chans = self.channels
        if (not isinstance(chans, (list, tuple)) or len(chans) != self.n_channels
                or not all(isinstance(c, str) and c for c in chans)):
            raise RegionError(f"region {self.name!r}: a {self.kind} needs exactly {self.n_channels} "
                              f"channel name(s); got {chans!r}")
        if len(set(chans)) != len(chans):
            raise RegionError(f"region {self.name!r}: the two channels must differ; got {list(chans)}")
        object.__setattr__(self, "channels", tuple(chans))
        if not isinstance(self.transforms, Mapping):
            raise RegionError(f"region {self.name!r}: transforms must map channel -> transform spec")
        missing = [c for c in chans if c not in self.transforms]
        if missing:
            raise RegionError(f"region {self.name!r}: the transform of channel(s) {', '.join(missing)} "
                              "is not recorded; a region must record the scale it was drawn on")
        extra = [c for c in self.transforms if c not in chans]
        if extra:
            raise RegionError(f"region {self.name!r}: transforms given for channel(s) "
                              f"{', '.join(map(str, extra))} the region does not use")
        for c in chans:
            spec = self.transforms[c]
            if spec is not None and not (isinstance(spec, Mapping) and isinstance(spec.get("kind"), str)):
                raise RegionError(f"region {self.name!r}: the transform of {c!r} must be a spec dict "
                                  f"with a 'kind' (or null for untransformed); got {spec!r}")
        object.__setattr__(self, "transforms",
                           {c: (None if self.transforms[c] is None else dict(self.transforms[c]))
                            for c in chans})

    def _base_dict(self) -> dict:
        d = super()._base_dict()
        d["channels"] = list(self.channels)
        d["transforms"] = {c: (None if s is None else dict(s)) for c, s in self.transforms.items()}
        return d


@dataclass(frozen=True)
class RectangleRegion(_GeometricRegion):
    """``x[0] <= values[channels[0]] < x[1]`` and the same for ``y`` on ``channels[1]``."""

    x: tuple[float, float] = (0.0, 1.0)
    y: tuple[float, float] = (0.0, 1.0)

    kind = "rectangle"

    def __post_init__(self):
        self._check_geometry_common()
        object.__setattr__(self, "x", _bounds(self.x, "x", self.name))
        object.__setattr__(self, "y", _bounds(self.y, "y", self.name))

    def own_mask(self, values, rarity, masks, n):
        a = _channel_values(values, self.channels[0], self.name, n)
        b = _channel_values(values, self.channels[1], self.name, n)
        # NaN compares False, so NaN events are outside.
        return (a >= self.x[0]) & (a < self.x[1]) & (b >= self.y[0]) & (b < self.y[1])

    def to_dict(self):
        d = self._base_dict()
        d["x"] = list(self.x)
        d["y"] = list(self.y)
        return d


@dataclass(frozen=True)
class PolygonRegion(_GeometricRegion):
    """Even-odd inside of ``vertices`` ((k, 2), x on ``channels[0]``, y on ``channels[1]``)."""

    vertices: tuple[tuple[float, float], ...] = ()

    kind = "polygon"

    def __post_init__(self):
        self._check_geometry_common()
        try:
            v = np.asarray(self.vertices, dtype=np.float64)
        except (TypeError, ValueError):
            raise RegionError(f"region {self.name!r}: vertices must be a list of [x, y] pairs") from None
        if v.ndim != 2 or v.shape[1] != 2:
            raise RegionError(f"region {self.name!r}: vertices must be a list of [x, y] pairs")
        if not np.all(np.isfinite(v)):
            raise RegionError(f"region {self.name!r}: vertices must be finite numbers")
        if len(np.unique(v, axis=0)) < 3:
            raise RegionError(f"region {self.name!r}: a polygon needs at least 3 distinct vertices; "
                              f"got {len(np.unique(v, axis=0))}")
        # Shoelace area; a zero area outline (all vertices on a line) encloses nothing.
        area = 0.5 * abs(np.dot(v[:, 0], np.roll(v[:, 1], -1)) - np.dot(v[:, 1], np.roll(v[:, 0], -1)))
        if not area > 0.0:
            raise RegionError(f"region {self.name!r}: the polygon's vertices lie on a line; it encloses nothing")
        object.__setattr__(self, "vertices", tuple((float(a), float(b)) for a, b in v))

    def own_mask(self, values, rarity, masks, n):
        a = _channel_values(values, self.channels[0], self.name, n)
        b = _channel_values(values, self.channels[1], self.name, n)
        return points_in_polygon(a, b, np.asarray(self.vertices))

    def to_dict(self):
        d = self._base_dict()
        d["vertices"] = [list(p) for p in self.vertices]
        return d


@dataclass(frozen=True)
class IntervalRegion(_GeometricRegion):
    """``low <= values[channel] < high`` on one channel; None = unbounded on that side."""

    low: float | None = None
    high: float | None = None

    kind = "interval"
    n_channels = 1

    def __post_init__(self):
        self._check_geometry_common()
        low = None if self.low is None else _finite_number(self.low, "low", self.name)
        high = None if self.high is None else _finite_number(self.high, "high", self.name)
        if low is None and high is None:
            raise RegionError(f"region {self.name!r}: an interval needs a low or a high bound (or both)")
        if low is not None and high is not None and not low < high:
            raise RegionError(f"region {self.name!r}: low ({low}) must be below high ({high})")
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)

    def own_mask(self, values, rarity, masks, n):
        a = _channel_values(values, self.channels[0], self.name, n)
        m = ~np.isnan(a)
        if self.low is not None:
            m &= a >= self.low
        if self.high is not None:
            m &= a < self.high
        return m

    def to_dict(self):
        d = self._base_dict()
        d["low"] = self.low
        d["high"] = self.high
        return d


@dataclass(frozen=True)
class RarityRegion(Region):
    """Events whose rarity percentile (0 = rarest, 100 = most typical) is <= ``percentile``."""

    percentile: float = 1.0

    kind = "rarity"

    def __post_init__(self):
        self._check_common()
        p = _finite_number(self.percentile, "percentile", self.name)
        if not 0.0 <= p <= 100.0:
            raise RegionError(f"region {self.name!r}: percentile must be between 0 and 100 "
                              f"(1 = the rarest 1 % of events); got {p}")
        object.__setattr__(self, "percentile", p)

    def own_mask(self, values, rarity, masks, n):
        if rarity is None:
            raise RegionError(f"region {self.name!r} selects rare events, but no density has been "
                              "fitted yet (no rarity percentiles)")
        r = np.asarray(rarity, dtype=np.float64).ravel()
        if r.shape[0] != n:
            raise RegionError(f"region {self.name!r}: {r.shape[0]} rarity values for {n} events")
        with np.errstate(invalid="ignore"):
            return r <= self.percentile  # NaN (removed events) compares False

    def to_dict(self):
        d = self._base_dict()
        d["percentile"] = self.percentile
        return d


@dataclass(frozen=True)
class EnrichedRegion(Region):
    """Events enriched over a control (the contrast's enriched mask); ``control``: the control's file name."""

    control: str | None = None

    kind = "enriched"

    def __post_init__(self):
        self._check_common()
        if self.control is not None and not isinstance(self.control, str):
            raise RegionError(f"region {self.name!r}: control must be a file name or null; got {self.control!r}")

    def select(self, enriched: np.ndarray | None, n: int) -> np.ndarray:
        """The region's own mask from the contrast's ``enriched`` mask (bool, n events)."""
        if enriched is None:
            raise RegionError(f"region {self.name!r} selects events enriched over a control, but no control "
                              "was contrasted with this file; contrast it with a control first")
        m = np.asarray(enriched, dtype=bool).ravel()
        if m.shape[0] != n:
            raise RegionError(f"region {self.name!r}: {m.shape[0]} enriched flags for {n} events")
        return m

    def own_mask(self, values, rarity, masks, n):
        return self.select(None, n)

    def to_dict(self):
        d = self._base_dict()
        d["control"] = self.control
        return d


@dataclass(frozen=True)
class CombinationRegion(Region):
    """``and`` / ``or`` of two or more regions, or ``not`` of one, by name."""

    operator: str = "and"
    operands: tuple[str, ...] = ()

    def __post_init__(self):
        self._check_common()
        if self.operator not in COMBINATION_KINDS:
            raise RegionError(f"region {self.name!r}: unknown combination {self.operator!r}; "
                              f"use one of {', '.join(COMBINATION_KINDS)}")
        ops = self.operands
        if not isinstance(ops, (list, tuple)) or not all(isinstance(o, str) and o for o in ops):
            raise RegionError(f"region {self.name!r}: operands must be a list of region names; got {ops!r}")
        ops = tuple(ops)
        if self.operator == "not" and len(ops) != 1:
            raise RegionError(f"region {self.name!r}: 'not' takes exactly one region; got {len(ops)}")
        if self.operator != "not" and len(ops) < 2:
            raise RegionError(f"region {self.name!r}: {self.operator!r} needs at least two regions; got {len(ops)}")
        if self.name in ops:
            raise RegionError(f"region {self.name!r} cannot refer to itself")
        object.__setattr__(self, "operands", ops)

    @property
    def kind(self) -> str:  # type: ignore[override]
        return self.operator

    def references(self):
        return tuple(self.operands) + super().references()

    def own_mask(self, values, rarity, masks, n):
        parts = [masks[o] for o in self.operands]
        if self.operator == "not":
            return ~parts[0]
        if self.operator == "and":
            return np.logical_and.reduce(parts)
        return np.logical_or.reduce(parts)

    def to_dict(self):
        d = self._base_dict()
        d["operands"] = list(self.operands)
        return d


@dataclass(frozen=True)
class PopulationRegion(Region):
    """The events a stored population definition assigns to population ``population``."""

    population: int = 0
    definition: Mapping[str, Any] = field(default_factory=dict)
    transforms: Mapping[str, Any] = field(default_factory=dict)

    kind = "population"

    def __post_init__(self):
        from .errors import RecipeError
        from .populations import PopulationDefinition

        self._check_common()
        try:
            pd = PopulationDefinition.from_dict(self.definition)
        except RecipeError as exc:
            raise RegionError(f"region {self.name!r}: {exc}") from exc
        p = self.population
        if isinstance(p, bool) or not isinstance(p, (int, np.integer)) or not 0 <= int(p) < pd.n_populations:
            raise RegionError(f"region {self.name!r}: population must be an id from 0 to "
                              f"{pd.n_populations - 1}; got {p!r}")
        if not isinstance(self.transforms, Mapping) or set(self.transforms) != set(pd.channels):
            raise RegionError(f"region {self.name!r}: the transforms of channels {', '.join(pd.channels)} "
                              "must be recorded")
        object.__setattr__(self, "population", int(p))
        object.__setattr__(self, "definition", pd.to_dict())
        object.__setattr__(self, "transforms", {c: (None if s is None else dict(s))
                                                for c, s in self.transforms.items()})
        object.__setattr__(self, "_pd", pd)

    def channels_used(self) -> tuple[str, ...]:
        return tuple(self._pd.channels)

    def own_mask(self, values, rarity, masks, n):
        from .populations import assign_populations

        X = np.column_stack([_channel_values(values, c, self.name, n) for c in self._pd.channels])
        m = assign_populations(self._pd, X) == self.population
        if rarity is not None:
            m &= np.isfinite(np.asarray(rarity, dtype=np.float64).ravel())
        return m

    def to_dict(self):
        d = self._base_dict()
        d["population"] = self.population
        d["transforms"] = {c: (None if s is None else dict(s)) for c, s in self.transforms.items()}
        d["definition"] = self._pd.to_dict()
        return d


def region_from_dict(d: Mapping[str, Any]) -> Region:
    """Build one region from its stored dict (see the module docstring); RegionError if invalid."""
    if not isinstance(d, Mapping):
        raise RegionError(f"a region must be a JSON object; got {type(d).__name__}")
    name = d.get("name")
    kind = d.get("kind")
    label = name if isinstance(name, str) else "(unnamed)"
    if kind not in KINDS:
        raise RegionError(f"region {label!r}: unknown kind {kind!r}; use one of {', '.join(KINDS)}")
    unknown = sorted(set(d) - _KEYS[kind])
    if unknown:
        raise RegionError(f"region {label!r}: unknown key(s) {', '.join(map(str, unknown))} for a {kind}")
    common = {"name": name, "parent": d.get("parent")}
    if kind in GEOMETRIC_KINDS:
        common["channels"] = d.get("channels")
        common["transforms"] = d.get("transforms", {})
    if kind == "rectangle":
        return RectangleRegion(x=d.get("x"), y=d.get("y"), **common)
    if kind == "polygon":
        return PolygonRegion(vertices=d.get("vertices"), **common)
    if kind == "interval":
        return IntervalRegion(low=d.get("low"), high=d.get("high"), **common)
    if kind == "rarity":
        return RarityRegion(percentile=d.get("percentile"), **common)
    if kind == "population":
        return PopulationRegion(population=d.get("population"), definition=d.get("definition") or {},
                                transforms=d.get("transforms") or {}, **common)
    if kind == "enriched":
        return EnrichedRegion(control=d.get("control"), **common)
    return CombinationRegion(operator=kind, operands=d.get("operands"), **common)


def _rename_refs(region: Region, old: str, new: str) -> Region:
    changes: dict[str, Any] = {}
    if region.parent == old:
        changes["parent"] = new
    if isinstance(region, CombinationRegion) and old in region.operands:
        changes["operands"] = tuple(new if o == old else o for o in region.operands)
    return replace(region, **changes) if changes else region


class RegionStatistics(NamedTuple):
    """One row of :meth:`RegionSet.statistics`; percentages are 0-100 (NaN when the base is empty)."""

    name: str
    count: int
    percent_of_parent: float
    percent_of_all: float


class RegionSet:
    """An ordered, named collection of regions whose references are kept consistent.

    Every change is checked: names are unique, every parent / operand exists
    and no region depends on itself through a chain (RegionError otherwise;
    the set is left unchanged).
    """

    def __init__(self, regions: Iterable[Region] = ()):
        self._regions: dict[str, Region] = {}
        for r in regions:
            if r.name in self._regions:
                raise RegionError(f"two regions are named {r.name!r}; region names must be unique")
            self._regions[r.name] = r
        self._check()

    # -- access ------------------------------------------------------------
    def __len__(self) -> int:
        return len(self._regions)

    def __iter__(self):
        return iter(list(self._regions.values()))

    def __contains__(self, name: object) -> bool:
        return name in self._regions

    def __getitem__(self, name: str) -> Region:
        try:
            return self._regions[name]
        except KeyError:
            raise RegionError(f"there is no region named {name!r}") from None

    @property
    def names(self) -> list[str]:
        return list(self._regions)

    # -- changes -----------------------------------------------------------
    def _apply(self, new: dict[str, Region]) -> None:
        old = self._regions
        self._regions = new
        try:
            self._check()
        except RegionError:
            self._regions = old
            raise

    def add(self, region: Region | Mapping[str, Any]) -> Region:
        """Add a region (object or stored dict); its parent and operands must exist already."""
        if not isinstance(region, Region):
            region = region_from_dict(region)
        if region.name in self._regions:
            raise RegionError(f"a region named {region.name!r} exists already; choose another name")
        new = dict(self._regions)
        new[region.name] = region
        self._apply(new)
        return region

    def replace(self, region: Region | Mapping[str, Any]) -> Region:
        """Replace the region of the same name (e.g. after moving its vertices)."""
        if not isinstance(region, Region):
            region = region_from_dict(region)
        self[region.name]
        new = dict(self._regions)
        new[region.name] = region
        self._apply(new)
        return region

    def remove(self, name: str) -> None:
        """Remove a region; refused while other regions refer to it."""
        self[name]
        users = [r.name for r in self._regions.values() if name in r.references()]
        if users:
            raise RegionError(f"region {name!r} is used by {', '.join(map(repr, users))}; "
                              "remove or change those first")
        new = dict(self._regions)
        del new[name]
        self._apply(new)

    def rename(self, old: str, new_name: str) -> None:
        """Rename a region and every reference to it (parents and operands)."""
        self[old]
        if not isinstance(new_name, str) or not new_name.strip():
            raise RegionError(f"a region name must be a non-empty text; got {new_name!r}")
        if new_name == old:
            return
        if new_name in self._regions:
            raise RegionError(f"a region named {new_name!r} exists already; choose another name")
        new: dict[str, Region] = {}
        for name, r in self._regions.items():
            if name == old:
                r = replace(r, name=new_name)
                name = new_name
            new[name] = _rename_refs(r, old, new_name)
        self._apply(new)

    # -- consistency -------------------------------------------------------
    def _check(self) -> None:
        for r in self._regions.values():
            unknown = [x for x in r.references() if x not in self._regions]
            if unknown:
                raise RegionError(f"region {r.name!r} refers to unknown region(s) "
                                  f"{', '.join(map(repr, unknown))}")
        self._order()

    def _order(self) -> list[str]:
        """Names in dependency order (references first); RegionError on a cycle."""
        state: dict[str, int] = {}
        order: list[str] = []
        for start in self._regions:
            if state.get(start) == 2:
                continue
            stack: list[tuple[str, Iterable[str]]] = [(start, iter(self._regions[start].references()))]
            path = [start]
            state[start] = 1
            while stack:
                name, it = stack[-1]
                nxt = next(it, None)
                if nxt is None:
                    stack.pop()
                    path.pop()
                    state[name] = 2
                    order.append(name)
                    continue
                s = state.get(nxt)
                if s == 1:
                    cycle = path[path.index(nxt):] + [nxt]
                    raise RegionError("regions refer to each other in a circle: " + " -> ".join(cycle))
                if s is None:
                    state[nxt] = 1
                    path.append(nxt)
                    stack.append((nxt, iter(self._regions[nxt].references())))
        return order

    def depending_on(self, kind: str) -> list[str]:
        """Names of the regions of ``kind`` and of those referring to one (through parents or operands)."""
        out: list[str] = []
        for name in self._order():  # references first
            r = self._regions[name]
            if r.kind == kind or any(ref in out for ref in r.references()):
                out.append(name)
        return [n for n in self._regions if n in out]

    def channels_used(self) -> list[str]:
        """Channels the geometric regions use, in first-use order."""
        seen: dict[str, None] = {}
        for r in self._regions.values():
            for c in r.channels_used():
                seen.setdefault(c, None)
        return list(seen)

    def check_transforms(self, recipe_transforms: Mapping[str, Any]) -> None:
        """Raise RegionError when a region was drawn on a different scale than ``recipe_transforms``.

        ``recipe_transforms``: channel -> transform spec (a channel absent from
        it is untransformed, matching a recorded None).  Numbers compare by value
        (1 and 1.0 are the same).
        """
        problems = []
        for r in self._regions.values():
            if not isinstance(r, (_GeometricRegion, PopulationRegion)):
                continue
            for c in r.channels_used():
                drawn = r.transforms.get(c)
                now = recipe_transforms.get(c) if recipe_transforms else None
                if _spec_key(drawn) != _spec_key(now):
                    problems.append(f"region {r.name!r} was drawn with channel {c!r} on "
                                    f"{_spec_key(drawn)} but the recipe now uses {_spec_key(now)}")
        if problems:
            raise RegionError("; ".join(problems) + ". Redraw the region(s) or restore the transform.")

    # -- evaluation --------------------------------------------------------
    def evaluate(self, values: Mapping[str, np.ndarray], rarity: np.ndarray | None = None,
                 n_events: int | None = None, enriched: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """Masks of every region: name -> bool (n_events,), nested regions ANDed with their parent.

        ``values``: channel -> transformed values (n_events,); ``rarity``: rarity
        percentile per event (n_events,), NaN for removed events, or None when no
        density is fitted (a rarity region then raises RegionError).
        ``enriched``: bool (n_events,) from a contrast with a control, or None
        (an enriched region then raises RegionError).
        ``n_events`` is taken from the arrays when not given.
        """
        n = self._n_events(values, rarity, n_events)
        masks: dict[str, np.ndarray] = {}
        for name in self._order():
            r = self._regions[name]
            if isinstance(r, EnrichedRegion):
                m = r.select(enriched, n)
            else:
                m = np.asarray(r.own_mask(values, rarity, masks, n), dtype=bool)
            if r.parent is not None:
                m = m & masks[r.parent]
            masks[name] = m
        return {name: masks[name] for name in self._regions}

    @staticmethod
    def _n_events(values, rarity, n_events) -> int:
        if n_events is not None:
            return int(n_events)
        for v in values.values():
            return int(np.asarray(v).shape[0])
        if rarity is not None:
            return int(np.asarray(rarity).shape[0])
        raise RegionError("cannot evaluate regions: no event values were given")

    def statistics(self, values: Mapping[str, np.ndarray], rarity: np.ndarray | None = None,
                   n_events: int | None = None,
                   masks: Mapping[str, np.ndarray] | None = None,
                   enriched: np.ndarray | None = None) -> list[RegionStatistics]:
        """One row per region: (name, count, % of parent, % of all events).

        "% of parent" is relative to the parent's count, or to all events for a
        top-level region; NaN when that base holds no events.  Pass ``masks``
        from :meth:`evaluate` to avoid evaluating twice.
        """
        n = self._n_events(values, rarity, n_events)
        if masks is None:
            masks = self.evaluate(values, rarity, n, enriched=enriched)
        rows = []
        for name, r in self._regions.items():
            count = int(np.count_nonzero(masks[name]))
            base = n if r.parent is None else int(np.count_nonzero(masks[r.parent]))
            rows.append(RegionStatistics(
                name=name, count=count,
                percent_of_parent=100.0 * count / base if base else float("nan"),
                percent_of_all=100.0 * count / n if n else float("nan")))
        return rows

    # -- storage -----------------------------------------------------------
    def to_dict(self) -> list[dict]:
        """The stored form: a JSON-able list of region dicts, in insertion order."""
        return [r.to_dict() for r in self._regions.values()]

    @classmethod
    def from_dict(cls, items: Sequence[Mapping[str, Any]] | None) -> "RegionSet":
        """Inverse of :meth:`to_dict`; references may appear in any order."""
        if items is None:
            return cls()
        if not isinstance(items, (list, tuple)):
            raise RegionError(f"regions must be a list of region objects; got {type(items).__name__}")
        return cls(region_from_dict(d) for d in items)
