"""The recipe sections whose keys another module owns, as read-only records.

* :class:`TransformSpec`: one channel's transform; its kinds and parameters
  are :mod:`core.transforms`'s.
* :class:`Engine`: keyword arguments of the additive tree density
  (:mod:`core.density` owns the parameter names and their defaults).
* :class:`Populations`: settings of :mod:`core.populations` (that module's
  ``DEFAULT_SETTINGS``) and the stored definition.

Only what the recipe gives is kept, so the stored form is unchanged.
"""

from __future__ import annotations

import copy
import math
from typing import Any, Iterator, Mapping

from ..errors import BoscageError, RecipeError
from ..populations import PopulationDefinition, check_settings
from ..transforms import TRANSFORM_KINDS, make_transform
from .records import NOWHERE, _Bad, build, typename


class _ReadOnlyMapping(Mapping):
    """A read-only mapping over ``self._data`` (a dict set once in ``__init__``)."""

    _data: dict

    def __getitem__(self, key: str):
        return self._data[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data)

    def __len__(self) -> int:
        return len(self._data)

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self._data!r})"

    def __reduce__(self):
        return (self.__class__, (self._data,))


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
# engine
# ---------------------------------------------------------------------------

def _engine_parameters() -> tuple | None:
    """The additive tree density's parameter names (its one list), or None when the engine cannot be imported."""
    try:
        # imported here: a recipe must load even when the density engine cannot be imported
        from ..density import AdditiveTreeDensity  # type: ignore[attr-defined]
    except ImportError:
        return None
    return AdditiveTreeDensity.param_names()


class Engine(_ReadOnlyMapping):
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
        accepted = _engine_parameters() if settings else None   # nothing to compare: no engine import
        unknown = [] if accepted is None else [k for k in settings if k not in accepted]
        if unknown:
            raise _Bad(f"engine parameter(s) {', '.join(repr(k) for k in unknown)} are not parameters of the "
                       f"additive tree density; accepted: {', '.join(accepted)}")
        self._data = dict(settings)

    @property
    def random_state(self) -> int:
        return int(self._data.get("random_state", self.DEFAULT_RANDOM_STATE))

    def arguments(self) -> dict:
        """Keyword arguments for the engine: those given, ``random_state`` filled in."""
        return {"random_state": self.DEFAULT_RANDOM_STATE, **self._data}

    def to_dict(self) -> dict:
        return dict(self._data)

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Engine":
        return build(cls, where, d)


# ---------------------------------------------------------------------------
# populations
# ---------------------------------------------------------------------------

class Populations(_ReadOnlyMapping):
    """The recipe's ``populations`` entry (read-only): the settings of
    :mod:`core.populations` given in the recipe (that module's
    ``DEFAULT_SETTINGS`` holds the others) and, once kept, the stored
    ``definition`` (its stored dict) so every file is counted with the same
    populations."""

    def __init__(self, entry: Mapping | None = None):
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
        self._data = {k: v for k, v in entry.items() if k != "definition"}
        if definition is not None:
            self._data["definition"] = definition

    @property
    def definition(self) -> dict | None:
        """The stored definition (dict of :class:`core.populations.PopulationDefinition`), or None."""
        return self._data.get("definition")

    @property
    def settings(self) -> dict:
        """The settings given (without the definition)."""
        return {k: v for k, v in self._data.items() if k != "definition"}

    def with_definition(self, definition: Mapping | None) -> "Populations":
        return Populations({**self.settings, **({} if definition is None else {"definition": definition})})

    def to_dict(self) -> dict:
        return copy.deepcopy(self._data)

    @classmethod
    def from_dict(cls, d: Any, where: str = NOWHERE) -> "Populations":
        return build(cls, where, d)
