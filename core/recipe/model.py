"""The :class:`Recipe` record: channels plus the typed sections of :mod:`core.recipe.records`."""

from __future__ import annotations

import copy
import os
from dataclasses import dataclass, field
from typing import Any, Mapping

from .. import SOFTWARE_NAME, __version__
from ..errors import RecipeError, RegionError
from ..regions import Region, RegionSet
from .keyed import Engine, Populations, TransformSpec, transforms_from_dict
from .records import NOWHERE, Cleaning, Comparison, Compensation, RareRule, check_keys, typename

#: The recipe schema version this Boscage writes and the newest it reads.
SCHEMA_VERSION = 1

FIELDS = ("schema_version", "name", "notes", "channels", "compensation", "transforms",
          "cleaning", "engine", "rare", "regions", "comparison", "populations")
INFORMATIONAL = ("software",)


def where(source: str | None) -> str:
    """The prefix of a message about the recipe read from ``source``."""
    return f"recipe {os.path.basename(source)}: " if source else NOWHERE


def _regions(items: Any, at: str) -> tuple:
    """The regions (tuple of :class:`core.regions.Region`) from a RegionSet, records or stored dicts."""
    if isinstance(items, RegionSet):
        return tuple(items)
    if not isinstance(items, (list, tuple)):
        raise RecipeError(f"{at}'regions' must be a list of regions; got {typename(items)}")
    if all(isinstance(r, Region) for r in items):
        return tuple(items)
    try:
        return tuple(RegionSet.from_dict([r.to_dict() if isinstance(r, Region) else r for r in items]))
    except RegionError as exc:
        raise RecipeError(f"{at}{exc}") from exc


#: section -> how its stored form (or a record) becomes the record
_SECTIONS = {
    "compensation": lambda v, at: v if isinstance(v, Compensation) else Compensation.from_dict(v, at),
    "transforms": transforms_from_dict,
    "cleaning": lambda v, at: v if isinstance(v, Cleaning) else Cleaning.from_dict(v, at),
    "engine": lambda v, at: v if isinstance(v, Engine) else Engine.from_dict(v, at),
    "rare": lambda v, at: v if isinstance(v, RareRule) else RareRule.from_dict(v, at),
    "regions": _regions,
    "populations": lambda v, at: v if isinstance(v, Populations) else Populations.from_dict(v, at),
    "comparison": lambda v, at: v if isinstance(v, Comparison) else Comparison.from_dict(v, at),
}


@dataclass
class Recipe:
    """Everything needed to repeat an analysis (see :mod:`core.recipe` for each entry).

    The sections are typed records (:mod:`core.recipe.records`); ``regions`` is
    a tuple of :class:`core.regions.Region`.  A section given or assigned in its
    stored form (a dict, a list of region dicts) is turned into its record at
    once, checked.  ``source`` is the path the recipe was loaded from (None
    when built in code); it is used in messages and to resolve a relative
    ``csv_path``, and is not part of the stored recipe.
    """

    channels: list = field(default_factory=list)
    compensation: Compensation = field(default_factory=Compensation)
    transforms: dict = field(default_factory=dict)          # channel -> TransformSpec
    cleaning: Cleaning = field(default_factory=Cleaning)
    engine: Engine = field(default_factory=Engine)
    rare: RareRule = field(default_factory=RareRule)
    regions: tuple = ()                                       # core.regions.Region records
    populations: Populations = field(default_factory=Populations)
    comparison: Comparison = field(default_factory=Comparison)
    name: str = ""
    notes: str = ""
    schema_version: int = SCHEMA_VERSION
    source: str | None = field(default=None, compare=False, repr=False)

    def __setattr__(self, key: str, value: Any) -> None:
        convert = _SECTIONS.get(key)
        if convert is not None:
            value = convert(value, where(self.__dict__.get("source")))
        object.__setattr__(self, key, value)

    def to_dict(self) -> dict:
        """The stored form: a JSON-able dict; an empty ``populations`` is left out."""
        out: dict[str, Any] = {}
        for k in FIELDS:
            v = getattr(self, k)
            if k == "populations" and not v:
                continue
            if k == "transforms":
                v = {c: s.to_dict() for c, s in v.items()}
            elif k == "regions":
                v = [r.to_dict() for r in v]
            elif hasattr(v, "to_dict"):
                v = v.to_dict()
            out[k] = copy.deepcopy(v)
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], source: str | os.PathLike | None = None) -> "Recipe":
        """Build a recipe from its stored form, checking keys, types and values (RecipeError)."""
        src = None if source is None else os.fspath(source)
        at = where(src)
        if not isinstance(d, Mapping):
            raise RecipeError(f"{at}a recipe must be a JSON object; got {typename(d)}")
        sv = _schema_version(d, at)
        check_keys(d, FIELDS + INFORMATIONAL, "the recipe", at)
        for key in ("name", "notes"):
            if not isinstance(d.get(key, ""), str):
                raise RecipeError(f"{at}'{key}' must be text; got {typename(d[key])}")
        chans = d.get("channels")
        if (not isinstance(chans, list) or not chans
                or not all(isinstance(c, str) and c.strip() for c in chans)):
            raise RecipeError(f"{at}'channels' must be a non-empty list of channel names ($PnN); got {chans!r}")
        dup = sorted({c for c in chans if chans.count(c) > 1})
        if dup:
            raise RecipeError(f"{at}channel(s) listed twice in 'channels': {', '.join(dup)}")
        r = cls(source=src, channels=list(chans), name=d.get("name", ""), notes=d.get("notes", ""),
                schema_version=sv)
        for key in ("compensation", "transforms", "cleaning", "engine", "rare", "regions", "comparison",
                    "populations"):
            if key in d:
                setattr(r, key, d[key])
        r.check_sections()
        return r

    def check_sections(self) -> None:
        """The checks that join sections: regions drawn on the recipe's transforms,
        stored populations found on the recipe's channels (RecipeError)."""
        at = where(self.source)
        try:
            self.region_set().check_transforms(self.transforms)
        except RegionError as exc:
            raise RecipeError(f"{at}{exc}") from exc
        d = self.populations.definition
        if d is not None and list(d.get("channels", [])) != list(self.channels):
            raise RecipeError(f"{at}the stored populations were found on channels "
                              f"{', '.join(d.get('channels', []))}, not the recipe's {', '.join(self.channels)}")

    def engine_arguments(self) -> dict:
        """Keyword arguments for the density engine: ``engine`` with ``random_state`` defaulting to 0."""
        return self.engine.arguments()

    def region_set(self) -> RegionSet:
        """The recipe's regions as a new :class:`core.regions.RegionSet`."""
        try:
            return RegionSet(self.regions)
        except RegionError as exc:
            raise RecipeError(f"{where(self.source)}{exc}") from exc

    def csv_path_resolved(self) -> str | None:
        """``compensation.csv_path`` made absolute (relative to the recipe file's folder)."""
        p = self.compensation.csv_path
        if not p:
            return None
        if os.path.isabs(p) or not self.source:
            return os.path.abspath(p)
        return os.path.join(os.path.dirname(os.path.abspath(self.source)), p)


def _schema_version(d: Mapping, at: str) -> int:
    # schema version first: a newer recipe may legitimately hold keys we do not know
    if "schema_version" not in d:
        raise RecipeError(f"{at}no 'schema_version'; this is not a {SOFTWARE_NAME} recipe")
    sv = d["schema_version"]
    if not isinstance(sv, int) or isinstance(sv, bool) or sv < 1:
        raise RecipeError(f"{at}'schema_version' must be a whole number of at least 1; got {sv!r}")
    if sv > SCHEMA_VERSION:
        raise RecipeError(f"{at}it was written by a newer {SOFTWARE_NAME} (recipe schema {sv}); "
                          f"this {SOFTWARE_NAME} {__version__} reads schema {SCHEMA_VERSION}. "
                          f"Upgrade {SOFTWARE_NAME} to use this recipe.")
    return sv


__all__ = ["Recipe", "SCHEMA_VERSION", "TransformSpec"]
