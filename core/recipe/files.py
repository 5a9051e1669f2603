"""Checking a recipe against an event file, the recipe file (JSON), and the recipe's digest."""

from __future__ import annotations

import hashlib
import json
import math
import os
from typing import Any, Mapping

from .. import SOFTWARE_NAME, __version__
from .. import safe_json
from ..atomic import atomic_write
from ..compensation import match_detectors, spillover_from_keywords
from ..errors import CompensationError, RecipeError
from .model import Recipe, where as _where


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

    comp = checked.compensation.source
    if comp == "file":
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
            raise RecipeError(f"{where}the spillover CSV file {checked.compensation.csv_path!r} "
                              f"does not exist (looked for {path})")
    return checked



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


def as_recipe(recipe: Recipe | Mapping[str, Any]) -> Recipe:
    """``recipe`` itself when it is a :class:`Recipe`; a stored-form dict checked once
    (:func:`validate_recipe`) into one."""
    return recipe if isinstance(recipe, Recipe) else validate_recipe(recipe)
