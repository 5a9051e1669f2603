"""The typed sections of a recipe, each checking itself; dicts only in ``from_dict`` / ``to_dict``.

Every default of a recipe is a field default of its record, here or in
:mod:`core.recipe.keyed`; other modules read them from there
(``Cleaning().drop_piles``, ``RareRule().share``, ``Comparison().rate``,
``Engine.DEFAULT_RANDOM_STATE``).

* :class:`Compensation`: where the spillover matrix comes from.
* :class:`Cleaning`: which events :mod:`core.prepare` sets aside or jitters.
* :class:`RareRule`: which events are rare (:mod:`core.rare`).
* :class:`Comparison`: false discovery rate and minimum fold of a contrast.

The sections whose keys another module owns (``TransformSpec``, ``Engine``,
``Populations``) are in :mod:`core.recipe.keyed`; regions are
:class:`core.regions.Region` records (see :class:`core.recipe.Recipe`).

Building a record with a bad value raises :class:`RecipeError`; ``from_dict``
also checks the stored form (keys, types) and names the recipe file
(``where``, e.g. ``"recipe panel.json: "``).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, fields
from typing import Any, Mapping

from ..errors import RecipeError

COMPENSATION_SOURCES = ("file", "csv", "none")
RARE_RULES = ("share", "mass")
NOWHERE = "recipe: "


class _Bad(RecipeError):
    """A record's bad value; ``detail`` is the message without the recipe's name."""

    def __init__(self, detail: str):
        super().__init__(NOWHERE + detail)
        self.detail = detail


def build(cls, where: str, *args, **kwargs):
    """``cls(*args, **kwargs)`` with a bad value reported for the recipe ``where``."""
    try:
        return cls(*args, **kwargs)
    except _Bad as exc:
        raise RecipeError(where + exc.detail) from None


def typename(v: Any) -> str:
    """What a JSON value is called for people (text, number, object...)."""
    return "null" if v is None else {"str": "text", "dict": "object", "list": "list", "bool": "true/false",
                                     "int": "number", "float": "number"}.get(type(v).__name__, type(v).__name__)


def is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def check_keys(d: Mapping, known, what: str, where: str) -> None:
    unknown = [k for k in d if k not in known]
    if unknown:
        raise RecipeError(f"{where}unknown key(s) {', '.join(repr(k) for k in unknown)} in {what}; "
                          f"the known keys are {', '.join(known)}")


def _object(d: Any, what: str, example: str, where: str) -> Mapping:
    if not isinstance(d, Mapping):
        raise RecipeError(f"{where}'{what}' must be an object like {example}; got {typename(d)}")
    return d


# ---------------------------------------------------------------------------
# compensation
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Compensation:
    """``source``: "file" (the FCS file's own spillover matrix), "csv" (``csv_path``,
    relative to the recipe file's folder) or "none" (values as recorded)."""

    source: str = "none"
    csv_path: str | None = None

    def __post_init__(self):
        if self.source not in COMPENSATION_SOURCES:
            raise _Bad(f"compensation source {self.source!r} is unknown; use one of "
                       f"{', '.join(COMPENSATION_SOURCES)}")
        if self.csv_path is not None and not isinstance(self.csv_path, str):
            raise _Bad(f"compensation 'csv_path' must be text or null; got {typename(self.csv_path)}")
        if self.source == "csv" and not (self.csv_path and self.csv_path.strip()):
            raise _Bad("compensation source 'csv' needs 'csv_path', the spillover CSV file")
        if self.source != "csv":
            object.__setattr__(self, "csv_path", None)

    def to_dict(self) -> dict:
        return {"source": self.source, "csv_path": self.csv_path}

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Compensation":
        d = _object(d, "compensation", '{"source": "file", "csv_path": null}', where)
        check_keys(d, ("source", "csv_path"), "'compensation'", where)
        return build(cls, where, d.get("source", cls.source), d.get("csv_path"))


# ---------------------------------------------------------------------------
# cleaning
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Cleaning:
    """How :mod:`core.prepare` cleans the events before the fit (events with
    NaN/inf are always set aside).

    ``drop_saturated``: set aside events at a channel's $PnR ceiling;
    ``drop_piles``: set aside piles on a density channel's lowest or highest
    stored value (false: keep them, spread across their bin); ``dequantise``:
    jitter values stored on a grid.
    """

    drop_saturated: bool = True
    drop_piles: bool = True
    dequantise: bool = True

    def __post_init__(self):
        for f in fields(self):
            v = getattr(self, f.name)
            if not isinstance(v, bool):
                raise _Bad(f"cleaning '{f.name}' must be true or false; got {v!r}")

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Cleaning":
        if not isinstance(d, Mapping):
            raise RecipeError(f"{where}'cleaning' must be an object; got {typename(d)}")
        check_keys(d, [f.name for f in fields(cls)], "'cleaning'", where)
        return build(cls, where, **d)


# ---------------------------------------------------------------------------
# rare rule
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class RareRule:
    """Which events are rare (:mod:`core.rare`).

    ``rule`` "share": the lowest ``share`` of events by density (0.005 = 0.5 %);
    "mass": events outside the highest-density region holding probability
    ``mass`` (0.995 = 99.5 %).  The value of the rule not chosen keeps its default.
    """

    rule: str = "share"
    share: float = 0.005
    mass: float = 0.995

    def __post_init__(self):
        if self.rule not in RARE_RULES:
            raise _Bad(f"unknown rare rule {self.rule!r}; use 'share' (lowest share of events by density) "
                       "or 'mass' (outside the highest-density region)")
        val = getattr(self, self.rule)
        if not is_number(val) or not math.isfinite(val):
            raise _Bad(f"rare '{self.rule}' must be a number; got {val!r}")
        if self.rule == "share" and not 0.0 <= val <= 1.0:
            raise _Bad(f"rare 'share' is a fraction between 0 and 1 (0.005 = 0.5 % of events); got {val}")
        if self.rule == "mass" and not 0.0 < val < 1.0:
            raise _Bad(f"rare 'mass' is a probability strictly between 0 and 1 (0.995 = 99.5 %); got {val}")
        other = "mass" if self.rule == "share" else "share"
        object.__setattr__(self, self.rule, float(val))
        object.__setattr__(self, other, getattr(type(self), other))

    @property
    def value(self) -> float:
        """The chosen rule's value (its share or its mass)."""
        return getattr(self, self.rule)

    def to_dict(self) -> dict:
        return {"rule": self.rule, self.rule: self.value}

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "RareRule":
        d = _object(d, "rare", json.dumps(cls().to_dict()), where)
        rule = d.get("rule")
        if rule not in RARE_RULES:
            build(cls, where, rule)   # raises: unknown rule
        check_keys(d, ("rule", rule), f"'rare' (rule {rule!r})", where)
        if rule not in d:
            raise RecipeError(f"{where}rare rule {rule!r} needs the value '{rule}'")
        return build(cls, where, rule, **{rule: d[rule]})


# ---------------------------------------------------------------------------
# comparison
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Comparison:
    """How a file is contrasted with a control (:mod:`core.contrast`): ``rate`` the false
    discovery rate of the enriched events (0.05 = 5 %), ``min_fold`` the smallest density
    ratio test / control of an enriched event (2: a ratio below 2 is within the
    uncertainty of the density estimates), ``smallest_population`` the size (events)
    of the smallest new population the local score is sized for
    (:mod:`core.contrast_local`; 0 turns the local score off)."""

    rate: float = 0.05
    min_fold: float = 2.0
    smallest_population: float = 30.0

    def __post_init__(self):
        for f in fields(self):
            v = getattr(self, f.name)
            if not is_number(v) or not math.isfinite(v):
                raise _Bad(f"comparison '{f.name}' must be a number; got {v!r}")
            object.__setattr__(self, f.name, float(v))
        if not 0.0 < self.rate < 1.0:
            raise _Bad(f"comparison 'rate' is the false discovery rate, a fraction strictly between 0 and 1 "
                       f"(0.05 = 5 %); got {self.rate}")
        if self.min_fold < 1.0:
            raise _Bad(f"comparison 'min_fold' is the smallest density ratio test / control of an enriched "
                       f"event, at least 1 (default 2); got {self.min_fold}")
        if self.smallest_population != 0 and not 10 <= self.smallest_population <= 1000:
            raise _Bad(f"comparison 'smallest_population' is the size in events of the smallest new population "
                       f"to look for, 10 to 1000 (default 30; 0 turns the local score off); got "
                       f"{self.smallest_population}")

    def to_dict(self) -> dict:
        """The stored form; ``smallest_population`` only when not its default, so recipes stored
        before the setting existed keep their form and digest."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        if d["smallest_population"] == Comparison.__dataclass_fields__["smallest_population"].default:
            del d["smallest_population"]
        return d

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Comparison":
        d = _object(d, "comparison", json.dumps(cls().to_dict()), where)
        check_keys(d, [f.name for f in fields(cls)], "'comparison'", where)
        return build(cls, where, **d)
