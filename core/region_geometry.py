"""Region records and the geometric kinds (rectangle, polygon, interval).

The kinds, the stored keys of each, the checks shared by every kind, the
even-odd point-in-polygon test and the base :class:`Region`; the rule kinds
are in :mod:`core.region_rules`, the collection in :mod:`core.region_set`,
and the whole contract (units, shapes, bounds) in :mod:`core.regions`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

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
