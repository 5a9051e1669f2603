"""An ordered, named collection of regions (:class:`RegionSet`): consistent
references, evaluation to masks and per-region statistics.

See :mod:`core.regions` for the contract of every kind.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any, Iterable, Mapping, NamedTuple, Sequence

import numpy as np

from .errors import RegionError
from .region_geometry import Region, _GeometricRegion, _spec_key
from .region_rules import EnrichedRegion, PopulationRegion, _rename_refs, region_from_dict

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
