"""Recipes: a versioned JSON file that fully describes an analysis.

A recipe lets an analysis be repeated on another file, in a batch, or by a
colleague.  Stored form (schema version 1)::

    {
      "schema_version": 1,
      "name": "CD4 rare events",
      "notes": "free text",
      "channels": ["FL1-A", "FL2-A"],                  # $PnN names the density uses
      "compensation": {"source": "file", "csv_path": null},   # "file" | "csv" | "none"
      "transforms": {"FL1-A": {"kind": "arcsinh", "cofactor": 150.0}, ...},
      "cleaning": {"drop_saturated": true, "drop_piles": true, "dequantise": true},
      "engine": {"random_state": 0},                   # AdditiveTreeDensity keyword arguments
      "rare": {"rule": "share", "share": 0.005},       # or {"rule": "mass", "mass": 0.995}
      "regions": [ ...region dicts, see core.regions... ],
      "populations": {"rare_share": 0.01, "definition": {...}},   # optional, see core.populations
      "comparison": {"rate": 0.05, "min_fold": 2.0},    # contrast with a control (core.contrast)
      "software": "Boscage 0.1.0"                      # written on save, informational
    }

Meaning of the entries:

* ``compensation``: "file" uses the spillover matrix stored in the FCS file
  ($SPILLOVER, or SPILL / $SPILL), "csv" reads ``csv_path`` (a relative path
  is taken relative to the recipe file's folder), "none" analyses the values
  as recorded.
* ``transforms``: per channel, a transform spec for :func:`core.transforms.make_transform`
  (the kinds of ``core.transforms.TRANSFORM_KINDS``: linear, log, arcsinh,
  logicle, fasinh).  A channel without an entry is used untransformed.
* ``cleaning`` (see :mod:`core.prepare`): events with NaN/inf are always set
  aside; ``drop_saturated`` sets aside events at a channel's $PnR ceiling;
  ``drop_piles`` sets aside piles of events on a density channel's lowest or
  highest stored value (false: keep them, spread across their bin);
  ``dequantise`` jitters values stored on a grid (integers in stored units,
  before $PnE/$PnG decoding; float grids by half their step).
* ``engine``: keyword arguments of the additive tree density; ``{}`` means the
  engine's defaults, with ``random_state`` 0 unless given (see
  :meth:`Recipe.engine_arguments`).
* ``rare``: ``share`` is a fraction (0.005 = the lowest 0.5 % of events by
  density); ``mass`` is the probability mass of the highest-density region
  whose outside counts as rare (0.995 = 99.5 %).
* ``regions``: regions in transformed channel units with the transform of
  each channel recorded (see :mod:`core.regions`).
* ``populations``: settings of the population search (:mod:`core.populations`:
  ``rare_share``, ``merge_ratio``, ...) and, once kept, the ``definition`` of
  the populations found, so every file of the recipe is counted with the same
  populations.
* ``comparison``: how a file is contrasted with a control (:mod:`core.contrast`):
  ``rate`` is the false discovery rate of the enriched events (0.05 = 5 %,
  strictly between 0 and 1), ``min_fold`` the smallest density ratio
  test / control of an enriched event (at least 1; default 2).

The default choice of channels (:func:`default_recipe`) takes the
fluorescence channels of :mod:`core.channel_kinds` (the one place where the
kind of a channel is decided from its name).
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
from dataclasses import dataclass, field
from typing import Any, Mapping

from . import SOFTWARE_NAME, __version__
from . import safe_json
from .atomic import atomic_write
from .errors import BoscageError, CompensationError, RecipeError, RegionError
from .channel_kinds import FLUORESCENCE, SCATTER, channel_kind, is_fluorescence, one_measure_per_detector
from .regions import RegionSet
from .transforms import TRANSFORM_KINDS

#: The recipe schema version this Boscage writes and the newest it reads.
SCHEMA_VERSION = 1

COMPENSATION_SOURCES = ("file", "csv", "none")
RARE_RULES = ("share", "mass")

DEFAULT_COMPENSATION = {"source": "none", "csv_path": None}
DEFAULT_CLEANING = {"drop_saturated": True, "drop_piles": True, "dequantise": True}
DEFAULT_RARE = {"rule": "share", "share": 0.005}
DEFAULT_RANDOM_STATE = 0
DEFAULT_COMPARISON = {"rate": 0.05, "min_fold": 2.0}
#: default_recipe leaves out a channel whose floor or ceiling pile holds more than this share.
MAX_PILE_SHARE = 0.25

_FIELDS = ("schema_version", "name", "notes", "channels", "compensation", "transforms",
           "cleaning", "engine", "rare", "regions", "comparison", "populations")
_INFORMATIONAL = ("software",)


def is_fluorescence_channel(name: str, label: str | None = None) -> bool:
    """True when :func:`core.channel_kinds.channel_kind` says fluorescence."""
    return is_fluorescence(name, label)


@dataclass
class Recipe:
    """Everything needed to repeat an analysis (see the module docstring for each entry).

    ``source`` is the path the recipe was loaded from (None when built in
    code); it is used in messages and to resolve a relative ``csv_path``, and
    is not part of the stored recipe.
    """

    channels: list = field(default_factory=list)
    compensation: dict = field(default_factory=lambda: dict(DEFAULT_COMPENSATION))
    transforms: dict = field(default_factory=dict)
    cleaning: dict = field(default_factory=lambda: dict(DEFAULT_CLEANING))
    engine: dict = field(default_factory=dict)
    rare: dict = field(default_factory=lambda: dict(DEFAULT_RARE))
    regions: list = field(default_factory=list)
    populations: dict = field(default_factory=dict)
    comparison: dict = field(default_factory=lambda: dict(DEFAULT_COMPARISON))
    name: str = ""
    notes: str = ""
    schema_version: int = SCHEMA_VERSION
    source: str | None = field(default=None, compare=False, repr=False)

    def to_dict(self) -> dict:
        """The stored form: a JSON-able dict (deep copy); an empty ``populations`` is left out."""
        return {k: copy.deepcopy(getattr(self, k)) for k in _FIELDS if k != "populations" or self.populations}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], source: str | os.PathLike | None = None) -> "Recipe":
        """Build a recipe from its stored form, checking keys, types and values (RecipeError)."""
        src = None if source is None else os.fspath(source)
        return cls(source=src, **_normalise(d, src))

    def engine_arguments(self) -> dict:
        """Keyword arguments for the density engine: ``engine`` with ``random_state`` defaulting to 0."""
        args = {"random_state": DEFAULT_RANDOM_STATE}
        args.update(copy.deepcopy(self.engine))
        return args

    def region_set(self) -> RegionSet:
        """The recipe's regions as a :class:`core.regions.RegionSet`."""
        try:
            return RegionSet.from_dict(self.regions)
        except RegionError as exc:
            raise RecipeError(f"{_where(self.source)}{exc}") from exc

    def csv_path_resolved(self) -> str | None:
        """``compensation.csv_path`` made absolute (relative to the recipe file's folder)."""
        p = (self.compensation or {}).get("csv_path")
        if not p:
            return None
        if os.path.isabs(p) or not self.source:
            return os.path.abspath(p)
        return os.path.join(os.path.dirname(os.path.abspath(self.source)), p)


# ---------------------------------------------------------------------------
# checking
# ---------------------------------------------------------------------------

def _where(source: str | None) -> str:
    return f"recipe {os.path.basename(source)}: " if source else "recipe: "


def _typename(v: Any) -> str:
    return "null" if v is None else {"str": "text", "dict": "object", "list": "list", "bool": "true/false",
                                     "int": "number", "float": "number"}.get(type(v).__name__, type(v).__name__)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _check_keys(d: Mapping, known, what: str, where: str) -> None:
    unknown = [k for k in d if k not in known]
    if unknown:
        raise RecipeError(f"{where}unknown key(s) {', '.join(repr(k) for k in unknown)} in {what}; "
                          f"the known keys are {', '.join(known)}")


def _check_engine_names(engine: Mapping, where: str) -> None:
    """Compare engine keys with AdditiveTreeDensity's parameters when the engine is importable."""
    try:
        from .density import AdditiveTreeDensity  # type: ignore[attr-defined]
    except ImportError:
        return
    accepted = AdditiveTreeDensity.param_names()
    unknown = [k for k in engine if k not in accepted]
    if unknown:
        raise RecipeError(f"{where}engine parameter(s) {', '.join(repr(k) for k in unknown)} are not "
                          f"parameters of the additive tree density; accepted: {', '.join(accepted)}")


def _check_transform(channel: str, spec: Any, where: str) -> dict:
    if not isinstance(spec, Mapping):
        raise RecipeError(f"{where}the transform of channel {channel!r} must be an object like "
                          f'{{"kind": "arcsinh", "cofactor": 150.0}}; got {_typename(spec)}')
    kind = spec.get("kind")
    if kind not in TRANSFORM_KINDS:
        raise RecipeError(f"{where}the transform of channel {channel!r} has unknown kind {kind!r}; "
                          f"use one of {', '.join(TRANSFORM_KINDS)}")
    try:
        from .transforms import make_transform
    except ImportError:
        return dict(spec)
    try:
        make_transform(dict(spec))
    except BoscageError as exc:
        raise RecipeError(f"{where}the transform of channel {channel!r} is invalid: {exc}") from exc
    except (TypeError, ValueError, KeyError) as exc:
        raise RecipeError(f"{where}the transform of channel {channel!r} has a bad parameter: {exc}") from exc
    return dict(spec)


def _normalise(d: Mapping[str, Any], source: str | None) -> dict:
    """Check a stored recipe dict and return the Recipe field values (defaults filled in)."""
    where = _where(source)
    if not isinstance(d, Mapping):
        raise RecipeError(f"{where}a recipe must be a JSON object; got {_typename(d)}")
    # schema version first: a newer recipe may legitimately hold keys we do not know
    if "schema_version" not in d:
        raise RecipeError(f"{where}no 'schema_version'; this is not a {SOFTWARE_NAME} recipe")
    sv = d["schema_version"]
    if not isinstance(sv, int) or isinstance(sv, bool) or sv < 1:
        raise RecipeError(f"{where}'schema_version' must be a whole number of at least 1; got {sv!r}")
    if sv > SCHEMA_VERSION:
        raise RecipeError(f"{where}it was written by a newer {SOFTWARE_NAME} (recipe schema {sv}); "
                          f"this {SOFTWARE_NAME} {__version__} reads schema {SCHEMA_VERSION}. "
                          f"Upgrade {SOFTWARE_NAME} to use this recipe.")
    out: dict[str, Any] = {"schema_version": sv}
    _check_keys(d, _FIELDS + _INFORMATIONAL, "the recipe", where)

    for key in ("name", "notes"):
        v = d.get(key, "")
        if not isinstance(v, str):
            raise RecipeError(f"{where}'{key}' must be text; got {_typename(v)}")
        out[key] = v

    chans = d.get("channels")
    if (not isinstance(chans, list) or not chans
            or not all(isinstance(c, str) and c.strip() for c in chans)):
        raise RecipeError(f"{where}'channels' must be a non-empty list of channel names ($PnN); "
                          f"got {chans!r}")
    dup = sorted({c for c in chans if chans.count(c) > 1})
    if dup:
        raise RecipeError(f"{where}channel(s) listed twice in 'channels': {', '.join(dup)}")
    out["channels"] = list(chans)

    comp = d.get("compensation", DEFAULT_COMPENSATION)
    if not isinstance(comp, Mapping):
        raise RecipeError(f"{where}'compensation' must be an object like "
                          f'{{"source": "file", "csv_path": null}}; got {_typename(comp)}')
    _check_keys(comp, ("source", "csv_path"), "'compensation'", where)
    src = comp.get("source", "none")
    if src not in COMPENSATION_SOURCES:
        raise RecipeError(f"{where}compensation source {src!r} is unknown; use one of "
                          f"{', '.join(COMPENSATION_SOURCES)}")
    csv_path = comp.get("csv_path")
    if csv_path is not None and not isinstance(csv_path, str):
        raise RecipeError(f"{where}compensation 'csv_path' must be text or null; got {_typename(csv_path)}")
    if src == "csv" and not (csv_path and csv_path.strip()):
        raise RecipeError(f"{where}compensation source 'csv' needs 'csv_path', the spillover CSV file")
    out["compensation"] = {"source": src, "csv_path": csv_path if src == "csv" else None}

    tr = d.get("transforms", {})
    if not isinstance(tr, Mapping):
        raise RecipeError(f"{where}'transforms' must be an object mapping channel -> transform; "
                          f"got {_typename(tr)}")
    out["transforms"] = {str(c): _check_transform(str(c), s, where) for c, s in tr.items()}

    cl = d.get("cleaning", DEFAULT_CLEANING)
    if not isinstance(cl, Mapping):
        raise RecipeError(f"{where}'cleaning' must be an object; got {_typename(cl)}")
    _check_keys(cl, tuple(DEFAULT_CLEANING), "'cleaning'", where)
    cleaning = dict(DEFAULT_CLEANING)
    for k, v in cl.items():
        if not isinstance(v, bool):
            raise RecipeError(f"{where}cleaning '{k}' must be true or false; got {v!r}")
        cleaning[k] = v
    out["cleaning"] = cleaning

    eng = d.get("engine", {})
    if not isinstance(eng, Mapping):
        raise RecipeError(f"{where}'engine' must be an object of density engine parameters; got {_typename(eng)}")
    for k, v in eng.items():
        if not isinstance(k, str):
            raise RecipeError(f"{where}engine parameter names must be text; got {k!r}")
        if isinstance(v, float) and not math.isfinite(v):
            raise RecipeError(f"{where}engine parameter {k!r} must be a finite number; got {v}")
        if not (v is None or isinstance(v, (bool, int, float, str))):
            raise RecipeError(f"{where}engine parameter {k!r} must be a number, text, true/false or "
                              f"null; got {_typename(v)}")
    if "random_state" in eng:
        rs = eng["random_state"]
        if not isinstance(rs, int) or isinstance(rs, bool) or rs < 0:
            raise RecipeError(f"{where}engine 'random_state' must be a whole number >= 0 (a fixed seed "
                              f"makes the analysis repeatable); got {rs!r}")
    _check_engine_names(eng, where)
    out["engine"] = dict(eng)

    rare = d.get("rare", DEFAULT_RARE)
    if not isinstance(rare, Mapping):
        raise RecipeError(f"{where}'rare' must be an object like {json.dumps(DEFAULT_RARE)}; got {_typename(rare)}")
    rule = rare.get("rule")
    if rule not in RARE_RULES:
        raise RecipeError(f"{where}rare rule {rule!r} is unknown; use 'share' (lowest share of events "
                          "by density) or 'mass' (outside the highest-density region)")
    _check_keys(rare, ("rule", rule), f"'rare' (rule {rule!r})", where)
    if rule not in rare:
        raise RecipeError(f"{where}rare rule {rule!r} needs the value '{rule}'")
    val = rare[rule]
    if not _is_number(val) or not math.isfinite(val):
        raise RecipeError(f"{where}rare '{rule}' must be a number; got {val!r}")
    if rule == "share" and not 0.0 <= val <= 1.0:
        raise RecipeError(f"{where}rare 'share' is a fraction between 0 and 1 (0.005 = 0.5 % of "
                          f"events); got {val}")
    if rule == "mass" and not 0.0 < val < 1.0:
        raise RecipeError(f"{where}rare 'mass' is a probability strictly between 0 and 1 "
                          f"(0.995 = 99.5 %); got {val}")
    out["rare"] = {"rule": rule, rule: float(val)}

    regs = d.get("regions", [])
    if not isinstance(regs, list):
        raise RecipeError(f"{where}'regions' must be a list of regions; got {_typename(regs)}")
    try:
        rset = RegionSet.from_dict(regs)
        rset.check_transforms(out["transforms"])
    except RegionError as exc:
        raise RecipeError(f"{where}{exc}") from exc
    out["regions"] = rset.to_dict()
    out["comparison"] = _check_comparison(d.get("comparison", DEFAULT_COMPARISON), where)
    out["populations"] = _normalise_populations(d.get("populations", {}), out["channels"], where)
    return out


def _normalise_populations(pops: Any, channels: list, where: str) -> dict:
    """The recipe's ``populations`` entry: settings of :mod:`core.populations`
    (only those given are kept) and an optional stored ``definition``."""
    from .populations import PopulationDefinition, check_settings

    if not isinstance(pops, Mapping):
        raise RecipeError(f"{where}'populations' must be an object like {{\"rare_share\": 0.01}}; "
                          f"got {_typename(pops)}")
    check_settings(pops, where)
    out = {k: v for k, v in pops.items() if k != "definition"}
    if pops.get("definition") is not None:
        try:
            definition = PopulationDefinition.from_dict(pops["definition"])
        except RecipeError as exc:
            raise RecipeError(f"{where}{exc}") from exc
        if list(definition.channels) != list(channels):
            raise RecipeError(f"{where}the stored populations were found on channels "
                              f"{', '.join(definition.channels)}, not the recipe's {', '.join(channels)}")
        out["definition"] = definition.to_dict()
    return out


def _check_comparison(cmp: Any, where: str) -> dict:
    """The recipe's ``comparison`` section, defaults filled in (RecipeError if invalid)."""
    if not isinstance(cmp, Mapping):
        raise RecipeError(f"{where}'comparison' must be an object like {json.dumps(DEFAULT_COMPARISON)}; "
                          f"got {_typename(cmp)}")
    _check_keys(cmp, tuple(DEFAULT_COMPARISON), "'comparison'", where)
    out = dict(DEFAULT_COMPARISON)
    for k, v in cmp.items():
        if not _is_number(v) or not math.isfinite(v):
            raise RecipeError(f"{where}comparison '{k}' must be a number; got {v!r}")
        out[k] = float(v)
    if not 0.0 < out["rate"] < 1.0:
        raise RecipeError(f"{where}comparison 'rate' is the false discovery rate, a fraction strictly between "
                          f"0 and 1 (0.05 = 5 %); got {out['rate']}")
    if out["min_fold"] < 1.0:
        raise RecipeError(f"{where}comparison 'min_fold' is the smallest density ratio test / control of an "
                          f"enriched event, at least 1 (default 2); got {out['min_fold']}")
    return out


def validate_recipe(recipe: Recipe | Mapping[str, Any], event_file: Any = None) -> Recipe:
    """Check a recipe, and that it fits ``event_file`` when one is given; return it normalised.

    ``event_file``: a :class:`core.fcs.EventFile` (uses ``path``, ``channel_names``,
    ``keywords``).  Raises :class:`RecipeError` with a message naming the recipe
    and the event file: unknown channels (listing the file's channels), bad
    parameters, a newer schema version, unknown keys, wrong types, compensation
    that the file cannot supply.
    """
    if isinstance(recipe, Recipe):
        source = recipe.source
        checked = Recipe.from_dict(recipe.to_dict(), source)
    else:
        checked = Recipe.from_dict(recipe)
        source = None
    if event_file is None:
        return checked

    where = _where(source)
    fname = os.path.basename(str(getattr(event_file, "path", "") or "")) or "the event file"
    names = [str(c) for c in event_file.channel_names]
    known = set(names)

    def missing(chs, what):
        bad = [c for c in chs if c not in known]
        if bad:
            raise RecipeError(f"{where}{what} {', '.join(repr(c) for c in bad)} not in {fname}; "
                              f"its channels are: {', '.join(names)}")

    missing(checked.channels, "channel(s)")
    missing(list(checked.transforms), "transformed channel(s)")
    missing(checked.region_set().channels_used(), "region channel(s)")

    comp = checked.compensation["source"]
    if comp == "file":
        from .compensation import match_detectors, spillover_from_keywords
        try:
            S = spillover_from_keywords(dict(event_file.keywords), source=fname)
            if S is None:
                raise RecipeError(f"{where}compensation source is 'file' but {fname} carries no spillover "
                                  "matrix ($SPILLOVER, SPILL or $SPILL); choose 'csv' or 'none'")
            match_detectors(names, S, source=fname)
        except CompensationError as exc:
            raise RecipeError(f"{where}the spillover matrix of {fname} cannot be used: {exc}") from exc
    elif comp == "csv":
        path = checked.csv_path_resolved()
        if not path or not os.path.isfile(path):
            raise RecipeError(f"{where}the spillover CSV file {checked.compensation['csv_path']!r} "
                              f"does not exist (looked for {path})")
    return checked


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------

def save_recipe(recipe: Recipe, path: str | os.PathLike, overwrite: bool = False) -> str:
    """Check ``recipe`` and write it as UTF-8 JSON to ``path`` atomically; return the path.

    Refuses an existing file unless ``overwrite`` (ExportError from
    :func:`core.atomic.atomic_write`).
    """
    path = os.fspath(path)
    checked = validate_recipe(recipe)
    d = checked.to_dict()
    d["software"] = f"{SOFTWARE_NAME} {__version__}"
    text = json.dumps(d, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    with atomic_write(path, "w", overwrite=overwrite, encoding="utf-8") as handle:
        handle.write(text)
    return path


def _reject_constant(name: str):
    raise ValueError(f"{name} is not a valid number in a recipe")


def load_recipe(path: str | os.PathLike) -> Recipe:
    """Read and check a recipe file; RecipeError naming the file for anything wrong."""
    path = os.fspath(path)
    where = _where(path)
    if os.path.exists(path) and not os.path.isfile(path):  # a folder or a named pipe (would block)
        raise RecipeError(f"{where}not a regular file (a folder, named pipe or device) (file: {path})")
    try:
        with open(path, "r", encoding="utf-8") as handle:
            text = handle.read()
    except FileNotFoundError:
        raise RecipeError(f"{where}the file does not exist (file: {path})") from None
    except UnicodeDecodeError:
        raise RecipeError(f"{where}the file is not UTF-8 text; is it a recipe? (file: {path})") from None
    except OSError as exc:
        raise RecipeError(f"{where}cannot read the file ({exc.strerror or exc}) (file: {path})") from exc
    try:
        d = safe_json.loads(text, parse_constant=_reject_constant)  # bounded nesting: no RecursionError
    except json.JSONDecodeError as exc:
        raise RecipeError(f"{where}not valid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg} "
                          f"(file: {path})") from None
    except ValueError as exc:
        raise RecipeError(f"{where}{exc} (file: {path})") from None
    return Recipe.from_dict(d, source=path)


# ---------------------------------------------------------------------------
# defaults and digest
# ---------------------------------------------------------------------------

def default_recipe(event_file: Any) -> Recipe:
    """A starting recipe for ``event_file`` (a :class:`core.fcs.EventFile`).

    * channels: the fluorescence channels (:mod:`core.channel_kinds`); when
      there is none, the scatter channels; one pulse measure per detector (its
      area, else height, else width: the width is computed from the other two,
      see :func:`core.channel_kinds.one_measure_per_detector`).  A channel whose lowest or highest
      value holds more than :data:`MAX_PILE_SHARE` of the events (mostly below
      detection, or clipped) is left out and ``notes`` says so: its piles would
      be set aside from the fit (core.prepare) and take most events with them.
    * compensation: "file" when the file carries a usable spillover matrix,
      else "none" (an unusable one is explained in ``notes``).
    * transforms: :func:`core.transforms.default_transform_spec` for every
      channel, from its kind, the (compensated, when compensating) values and $PnR.
    * cleaning, rare rule: the defaults; engine: ``{"random_state": 0}``; no regions.
    """
    import numpy as np

    from .compensation import compensate, spillover_from_keywords
    from .transforms import default_transform_spec

    path = str(getattr(event_file, "path", "") or "")
    fname = os.path.basename(path) or "the event file"
    names = [str(c) for c in event_file.channel_names]
    labels = list(getattr(event_file, "channel_labels", None) or [""] * len(names))
    kinds = [channel_kind(c, lab) for c, lab in zip(names, labels)]
    channels = [c for c, k in zip(names, kinds) if k == FLUORESCENCE]
    if not channels:
        channels = [c for c, k in zip(names, kinds) if k == SCATTER]
    if not channels:
        raise RecipeError(f"{fname}: no fluorescence or scatter channel to analyse; "
                          f"its channels are: {', '.join(names)}")

    notes = [f"Default recipe made from {fname}."]
    from .prepare import pile_masks

    raw = np.asarray(event_file.data)   # float32 files stay float32: pile_masks converts one column
    piled = {}
    for c in channels:
        j = names.index(c)
        n_finite = max(1, int(np.isfinite(raw[:, j]).sum()))
        share = max(int(m.sum()) for m in pile_masks(raw[:, j])) / n_finite
        if share > MAX_PILE_SHARE:
            piled[c] = share
    if piled and len(piled) < len(channels):
        channels = [c for c in channels if c not in piled]
        notes.append("Left out of the density: " + ", ".join(f"{c} ({100 * v:.0f} % of the events on its "
                                                             "lowest or highest value)" for c, v in piled.items())
                     + ".")
    single = one_measure_per_detector(channels)
    if len(single) < len(channels):
        notes.append("One pulse measure per detector (area, else height, else width): left out "
                     + ", ".join(c for c in channels if c not in single) + ".")
        channels = single

    data = np.asarray(event_file.data)  # compensate returns float64; transforms read float32 as is
    comp = "none"
    try:
        S = spillover_from_keywords(dict(event_file.keywords), source=fname)
        if S is not None:
            data = compensate(data, names, S, source=fname)
            comp = "file"
    except CompensationError as exc:
        notes.append(f"The file's spillover matrix was not used: {exc}")

    ranges = getattr(event_file, "channel_ranges", None)
    transforms = {}
    for i, c in enumerate(names):
        rng = None if ranges is None else float(np.asarray(ranges, dtype=np.float64)[i])
        transforms[c] = dict(default_transform_spec(c, data[:, i], rng, labels[i]))

    return Recipe(channels=channels, compensation={"source": comp, "csv_path": None},
                  transforms=transforms, cleaning=dict(DEFAULT_CLEANING),
                  engine={"random_state": DEFAULT_RANDOM_STATE}, rare=dict(DEFAULT_RARE),
                  regions=[], name=os.path.splitext(fname)[0], notes=" ".join(notes))


def _canonical(v: Any) -> Any:
    if isinstance(v, float) and math.isfinite(v) and v.is_integer():
        return int(v)  # 150 and 150.0 are the same parameter
    if isinstance(v, Mapping):
        return {str(k): _canonical(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_canonical(x) for x in v]
    return v


def recipe_digest(recipe: Recipe | Mapping[str, Any]) -> str:
    """First 16 hex digits of the SHA-256 of the recipe's canonical JSON.

    Canonical: sorted keys, no spaces, UTF-8, whole-number floats written as
    integers.  ``name`` and ``notes`` are left out: two recipes that differ
    only in their description analyse identically and share a digest.
    """
    d = recipe.to_dict() if isinstance(recipe, Recipe) else dict(recipe)
    d = {k: v for k, v in d.items() if k not in ("name", "notes", "software")}
    text = json.dumps(_canonical(d), sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]
