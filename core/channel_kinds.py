"""What a channel measures, from its $PnN name (and $PnS label): the ONE place for that rule.

Kinds: ``"scatter"``, ``"fluorescence"``, ``"time"``, ``"other"``.  The rules
follow common practice in how instruments name their channels (case and
surrounding spaces ignored), checked in this order:

1. **time**: the name or the label is ``Time`` or starts with ``Time`` followed
   by a non-letter (``TIME``, ``Time-1``), or the name is ``HDR-T`` (the
   time channel of instruments that prefix internal channels with ``HDR-``).
2. **other**: counters and instrument-internal channels that are not a
   detector's signal: names starting with ``Event`` (event count), ``HDR-``
   (internal channels other than HDR-T), ``Doublet``, ``Sort``, ``Well``.
3. **scatter**: names starting with ``FSC``, ``SSC``, ``FS`` or ``SS`` not
   followed by a letter (``FSC-A``, ``SSC-H``, ``FS-A``, ``SS INT LIN``,
   ``FSC-HLin``, ``SSC-B-A``).
4. **fluorescence**: every other channel (marker detectors such as ``FL1-H``,
   ``FITC-A``, ``V2-A``, ``YEL-HLog``; their pulse widths and heights too).

Who uses it: :func:`core.recipe.default_recipe` (density channels are the
fluorescence channels; when a file has none, scatter and fluorescence),
:func:`core.transforms.default_transform_spec` (linear for scatter, time and
other; logicle for fluorescence) and the desktop app.
"""

from __future__ import annotations

import re

SCATTER, FLUORESCENCE, TIME, OTHER = "scatter", "fluorescence", "time", "other"
KINDS = (SCATTER, FLUORESCENCE, TIME, OTHER)

_TIME = re.compile(r"^time(?![a-z])", re.IGNORECASE)
_TIME_NAMES = frozenset({"hdr-t"})
_OTHER = re.compile(r"^(event|hdr-|doublet|sort|well)", re.IGNORECASE)
_SCATTER = re.compile(r"^(fsc|ssc|fs|ss)(?![a-z])", re.IGNORECASE)


def channel_kind(name: str, label: str | None = None) -> str:
    """``"scatter"``, ``"fluorescence"``, ``"time"`` or ``"other"`` for a channel (rules above)."""
    n = str(name or "").strip()
    lab = str(label or "").strip()
    if _TIME.match(n) or _TIME.match(lab) or n.casefold() in _TIME_NAMES:
        return TIME
    if _OTHER.match(n):
        return OTHER
    if _SCATTER.match(n):
        return SCATTER
    return FLUORESCENCE


def scatter_direction(name: str) -> str | None:
    """``"forward"`` (FSC*, FS*) or ``"side"`` (SSC*, SS*) for a scatter channel, else None."""
    n = str(name or "").strip()
    if channel_kind(n) != SCATTER:
        return None
    return "forward" if n[:1].upper() == "F" else "side"


def is_fluorescence(name: str, label: str | None = None) -> bool:
    """True when :func:`channel_kind` says fluorescence."""
    return channel_kind(name, label) == FLUORESCENCE
