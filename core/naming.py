"""File names for everything this program writes: one rule, in one place.

The rule (documented for users in README.md, "Output file names"): a name
part made from user text -- an input file's stem, a region's name -- is

1. letters and digits (of any alphabet), ``-``, ``_``, ``.`` and ``+``: kept;
2. white space: each character becomes ``_``;
3. ``%``: becomes ``pct``;
4. any other character (``/ \\ : * ? " < > | # & , ; ' ( ) [ ] { } = @ ! ~ ^ $``,
   control characters...): becomes ``-``;
5. white space and ``.`` at either end: removed (a part is never hidden, ``.``
   or ``..``); an empty part becomes a fallback word (``file``, ``region``);
6. a part gets ``_`` and 8 hex digits of the SHA-256 of the original text
   (:func:`short_hash`) when step 4 or 5 changed it, when it is longer than 100
   UTF-8 bytes (it is cut first), or when it equals, ignoring case, another
   part of the same set (the input files of one batch, the regions of one
   file) or a name the caller reserves.  So no character is lost silently: the
   same original always gets the same part, and two originals never share one.

Parts are joined with ``_`` (:func:`events_file_name`): ``<stem>_rare.fcs``,
``<stem>_region_<name>.fcs``, ``<stem>_enriched.fcs``,
``<stem>_rare_population_<N>.fcs``; the app proposes ``<stem>_all.fcs``,
``<stem>_rare.fcs``, ``<stem>_enriched.fcs`` or ``<stem>_region_<name>.fcs``
(``.csv`` for CSV).  No file name this program writes holds a space or ``#``.
"""

from __future__ import annotations

import hashlib
from typing import Iterable, Sequence

#: Joins the parts of a file name.
SEPARATOR = "_"
#: Kept as they are besides letters and digits (step 1).
KEPT = "-_.+"
#: Characters written as a word (step 3).
WORDS = {"%": "pct"}
#: What any other character becomes (step 4).
SUBSTITUTE = "-"
#: Longest part kept from an input stem or region name (UTF-8 bytes): a batch file
#: name holds two of them plus about 40 bytes, within the usual 255-byte limit.
MAX_PART_BYTES = 100


def short_hash(text: str) -> str:
    """8 hex digits of the SHA-256 of ``text`` (UTF-8, surrogates escaped)."""
    return hashlib.sha256(str(text).encode("utf-8", "surrogatepass")).hexdigest()[:8]


def _nbytes(text: str) -> int:
    return len(text.encode("utf-8", "surrogatepass"))


def _shorten(text: str, limit: int = MAX_PART_BYTES) -> str:
    """``text`` cut to at most ``limit`` UTF-8 bytes (whole characters)."""
    while _nbytes(text) > limit:
        text = text[:-1]
    return text


def _clean(text: str) -> tuple[str, bool]:
    """Steps 1-5 without the fallback: ``(part, exact)``; ``exact`` is False when
    step 4 or 5 replaced or removed a character."""
    core = text.strip().strip(".").strip()
    exact = core == text
    out = []
    for c in core:
        if c.isalnum() or c in KEPT:
            out.append(c)
        elif c.isspace():
            out.append("_")
        elif c in WORDS:
            out.append(WORDS[c])
        else:
            out.append(SUBSTITUTE)
            exact = False
    return "".join(out), exact


def file_names(originals: Sequence[str], reserved: Iterable[str] = (), fallback: str = "unnamed",
               bases: Sequence[str] | None = None) -> dict:
    """Name parts for ``originals`` by the module's rule: safe, stable and pairwise distinct.

    Each part is made from ``bases[i]`` (default: the original itself; for input
    files, the stem of the file name); the hash of step 6 is of the original.
    ``reserved``: names the part may not equal ignoring case (the names the
    batch writes beside the per-file folders).  Returns ``{original: part}``;
    an original that still cannot get a distinct part (two hashes equal)
    maps to None, for the caller to report.
    """
    originals = [str(o) for o in originals]
    bases = [str(b) for b in (bases if bases is not None else originals)]
    taken = {str(r).casefold() for r in reserved}
    cleaned = [_clean(b) for b in bases]
    counts: dict = {}
    for part, _exact in cleaned:
        counts[(part or fallback).casefold()] = counts.get((part or fallback).casefold(), 0) + 1
    out: dict = {}
    for o, (part, exact) in zip(originals, cleaned):
        name = part or fallback
        plain = (exact and part and _nbytes(name) <= MAX_PART_BYTES and name.casefold() not in taken
                 and counts[name.casefold()] == 1)
        out[o] = name if plain else f"{_shorten(name).rstrip('.') or fallback}{SEPARATOR}{short_hash(o)}"
    groups: dict = {}
    for o, name in out.items():
        groups.setdefault(name.casefold(), []).append(o)
    for group in groups.values():
        if len(group) > 1 or out[group[0]].casefold() in taken:
            for o in group:
                out[o] = None
    return out


def file_part(text: str, fallback: str = "unnamed") -> str:
    """The name part of ``text`` alone (no other name to keep apart from)."""
    return file_names([text], (), fallback)[str(text)]


def events_file_name(stem: str, what: str, name: str | None = None, ext: str = "fcs") -> str:
    """``<stem>_<what>[_<name>].<ext>``: the file of an events export, in the batch and the app.

    ``stem`` and ``name`` are parts made by :func:`file_names`; ``what`` is one of
    ``all``, ``rare``, ``enriched``, ``region`` (with the region's part as
    ``name``) or ``rare_population`` (with the population number).
    """
    return SEPARATOR.join([stem, what] + ([str(name)] if name is not None else [])) + "." + ext
