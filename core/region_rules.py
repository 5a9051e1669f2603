"""Region kinds defined by rules (rarity, enriched, population, and/or/not) and
building any region from its stored dict.

See :mod:`core.regions` for the contract of every kind.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any, Mapping

import numpy as np

from .errors import RecipeError, RegionError
from .populations import PopulationDefinition, assign_populations
from .region_geometry import (_KEYS, COMBINATION_KINDS, GEOMETRIC_KINDS, KINDS, IntervalRegion, PolygonRegion,
                              RectangleRegion, Region, _channel_values, _finite_number)

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
