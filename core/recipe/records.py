"""The typed sections of a recipe, each checking itself; dicts only in ``from_dict`` / ``to_dict``.

Every default of a recipe lives here, as the field defaults of these
records; other modules read them from here (``Cleaning().drop_piles``,
``RareRule().share``, ``Comparison().rate``, ``Engine.DEFAULT_RANDOM_STATE``).

* :class:`Compensation`: where the spillover matrix comes from.
* :class:`TransformSpec`: one channel's transform (a read-only dict, the
  spec :func:`core.transforms.make_transform` takes).
* :class:`Cleaning`: which events :mod:`core.prepare` sets aside or jitters.
* :class:`Engine`: keyword arguments of the additive tree density (read-only
  mapping of the parameters given; the engine owns their defaults).
* :class:`RareRule`: which events are rare (:mod:`core.rare`).
* :class:`Populations`: settings of :mod:`core.populations` given in the
  recipe (that module owns their defaults) and the stored ``definition``.
* :class:`Comparison`: false discovery rate and minimum fold of a contrast.

Regions are :class:`core.regions.Region` records (see :class:`core.recipe.Recipe`).

Building a record with a bad value raises :class:`RecipeError`; ``from_dict``
also checks the stored form (keys, types) and names the recipe file
(``where``, e.g. ``"recipe panel.json: "``).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, fields
from typing import Any, Iterator, Mapping

from ..errors import BoscageError, RecipeError
from ..transforms import TRANSFORM_KINDS

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
# transforms
# ---------------------------------------------------------------------------

class TransformSpec(dict):
    """One channel's transform: ``{"kind": ..., parameters...}`` as stored, checked by
    :func:`core.transforms.make_transform` and read-only.

    A dict so that every reader of transform specs (``make_transform``, the
    regions' recorded scales, the app's scale controls) takes it as it is;
    ``kind`` and ``params`` name its parts.
    """

    def __init__(self, spec: Any, channel: str = "?"):
        if not isinstance(spec, Mapping):
            raise _Bad(f"the transform of channel {channel!r} must be an object like "
                       f'{{"kind": "arcsinh", "cofactor": 150.0}}; got {typename(spec)}')
        kind = spec.get("kind")
        if kind not in TRANSFORM_KINDS:
            raise _Bad(f"the transform of channel {channel!r} has unknown kind {kind!r}; "
                       f"use one of {', '.join(TRANSFORM_KINDS)}")
        from ..transforms import make_transform

        try:
            make_transform(dict(spec))
        except BoscageError as exc:
            raise _Bad(f"the transform of channel {channel!r} is invalid: {exc}") from exc
        except (TypeError, ValueError, KeyError) as exc:
            raise _Bad(f"the transform of channel {channel!r} has a bad parameter: {exc}") from exc
        super().__init__(spec)

    @property
    def kind(self) -> str:
        return self["kind"]

    @property
    def params(self) -> dict:
        """The parameters as written (without ``kind``)."""
        return {k: v for k, v in self.items() if k != "kind"}

    def to_dict(self) -> dict:
        return dict(self)

    def _read_only(self, *args, **kwargs):
        raise TypeError("a recipe's transform spec is read-only; build a new one")

    __setitem__ = __delitem__ = update = pop = popitem = clear = setdefault = _read_only  # type: ignore[assignment]

    def __reduce__(self):
        return (self.__class__, (dict(self),))

    def __copy__(self):
        return self

    def __deepcopy__(self, memo):
        return self


def transforms_from_dict(d: Any, where: str = NOWHERE) -> dict:
    """channel -> :class:`TransformSpec` from the stored ``transforms`` object."""
    if not isinstance(d, Mapping):
        raise RecipeError(f"{where}'transforms' must be an object mapping channel -> transform; "
                          f"got {typename(d)}")
    return {str(c): (s if isinstance(s, TransformSpec) else build(TransformSpec, where, s, str(c)))
            for c, s in d.items()}


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
# engine
# ---------------------------------------------------------------------------

def _engine_parameters() -> list | None:
    """The additive tree density's parameter names, or None when they cannot be read."""
    import inspect

    try:
        from ..density import AdditiveTreeDensity  # type: ignore[attr-defined]
        params = inspect.signature(AdditiveTreeDensity.__init__).parameters
    except (ImportError, TypeError, ValueError):
        return None
    if any(p.kind == inspect.Parameter.VAR_KEYWORD for p in params.values()):
        return None
    return [n for n in params if n != "self"]


class Engine(Mapping):
    """Keyword arguments of the additive tree density given in the recipe (read-only).

    Only the parameters given are kept (the engine owns the defaults of the
    others), so the stored form is unchanged; ``random_state`` defaults to
    :data:`DEFAULT_RANDOM_STATE` (see :meth:`arguments`).
    """

    DEFAULT_RANDOM_STATE = 0

    def __init__(self, settings: Mapping | None = None):
        settings = {} if settings is None else settings
        if not isinstance(settings, Mapping):
            raise _Bad(f"'engine' must be an object of density engine parameters; got {typename(settings)}")
        for k, v in settings.items():
            if not isinstance(k, str):
                raise _Bad(f"engine parameter names must be text; got {k!r}")
            if isinstance(v, float) and not math.isfinite(v):
                raise _Bad(f"engine parameter {k!r} must be a finite number; got {v}")
            if not (v is None or isinstance(v, (bool, int, float, str))):
                raise _Bad(f"engine parameter {k!r} must be a number, text, true/false or null; got {typename(v)}")
        rs = settings.get("random_state", self.DEFAULT_RANDOM_STATE)
        if not isinstance(rs, int) or isinstance(rs, bool) or rs < 0:
            raise _Bad(f"engine 'random_state' must be a whole number >= 0 (a fixed seed makes the analysis "
                       f"repeatable); got {rs!r}")
        accepted = _engine_parameters()
        unknown = [] if accepted is None else [k for k in settings if k not in accepted]
        if unknown:
            raise _Bad(f"engine parameter(s) {', '.join(repr(k) for k in unknown)} are not parameters of the "
                       f"additive tree density; accepted: {', '.join(accepted)}")
        self._settings = dict(settings)

    def __getitem__(self, key: str):
        return self._settings[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._settings)

    def __len__(self) -> int:
        return len(self._settings)

    def __repr__(self) -> str:
        return f"Engine({self._settings!r})"

    def __reduce__(self):
        return (self.__class__, (self._settings,))

    @property
    def random_state(self) -> int:
        return int(self._settings.get("random_state", self.DEFAULT_RANDOM_STATE))

    def arguments(self) -> dict:
        """Keyword arguments for the engine: those given, ``random_state`` filled in."""
        return {"random_state": self.DEFAULT_RANDOM_STATE, **self._settings}

    def replaced(self, **changes) -> "Engine":
        """A copy with some parameters changed (a value None removes the parameter)."""
        new = {**self._settings, **changes}
        return Engine({k: v for k, v in new.items() if not (k in changes and changes[k] is None)})

    def to_dict(self) -> dict:
        return dict(self._settings)

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Engine":
        return build(cls, where, d)


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
# populations
# ---------------------------------------------------------------------------

class Populations(Mapping):
    """The recipe's ``populations`` entry (read-only): the settings of
    :mod:`core.populations` given in the recipe (that module's
    ``DEFAULT_SETTINGS`` holds the others) and, once kept, the stored
    ``definition`` (its stored dict) so every file is counted with the same
    populations."""

    def __init__(self, entry: Mapping | None = None):
        from ..populations import PopulationDefinition, check_settings

        entry = {} if entry is None else entry
        if not isinstance(entry, Mapping):
            raise _Bad(f"'populations' must be an object like {{\"rare_share\": 0.01}}; got {typename(entry)}")
        try:
            check_settings(entry, "")
            definition = entry.get("definition")
            if definition is not None:
                definition = PopulationDefinition.from_dict(definition).to_dict()
        except RecipeError as exc:
            raise _Bad(str(exc)) from exc
        self._entry = {k: v for k, v in entry.items() if k != "definition"}
        if definition is not None:
            self._entry["definition"] = definition

    def __getitem__(self, key: str):
        return self._entry[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._entry)

    def __len__(self) -> int:
        return len(self._entry)

    def __repr__(self) -> str:
        return f"Populations({self._entry!r})"

    def __reduce__(self):
        return (self.__class__, (self._entry,))

    @property
    def definition(self) -> dict | None:
        """The stored definition (dict of :class:`core.populations.PopulationDefinition`), or None."""
        return self._entry.get("definition")

    @property
    def settings(self) -> dict:
        """The settings given (without the definition)."""
        return {k: v for k, v in self._entry.items() if k != "definition"}

    def with_definition(self, definition: Mapping | None) -> "Populations":
        return Populations({**self.settings, **({} if definition is None else {"definition": definition})})

    def to_dict(self) -> dict:
        import copy

        return copy.deepcopy(self._entry)

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Populations":
        return build(cls, where, d)


# ---------------------------------------------------------------------------
# comparison
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Comparison:
    """How a file is contrasted with a control (:mod:`core.contrast`): ``rate`` the false
    discovery rate of the enriched events (0.05 = 5 %), ``min_fold`` the smallest density
    ratio test / control of an enriched event (2: a ratio below 2 is within the
    uncertainty of the density estimates)."""

    rate: float = 0.05
    min_fold: float = 2.0

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

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Comparison":
        d = _object(d, "comparison", json.dumps(cls().to_dict()), where)
        check_keys(d, [f.name for f in fields(cls)], "'comparison'", where)
        return build(cls, where, **d)
