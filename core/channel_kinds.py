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

Pulse measures: a detector often gives several channels named ``<detector>-A``
(area), ``-H`` (height) and ``-W`` (width); the width is computed from the other
two (width = area / height up to a constant in the files fcsparser ships), so a
density over all three lies on a surface.  :func:`pulse_measure` splits the name;
:func:`one_measure_per_detector` keeps the area, else the height, else the width
of each detector (common practice: areas for analysis, heights and widths for
doublet discrimination).

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


_PULSE = re.compile(r"^(.*\S)-([AHW])$", re.IGNORECASE)


def pulse_measure(name: str) -> tuple[str, str]:
    """``(detector, "A" | "H" | "W")`` for names ending in -A/-H/-W, else ``(name, "")``."""
    n = str(name or "").strip()
    m = _PULSE.match(n)
    return (m.group(1), m.group(2).upper()) if m else (n, "")


def one_measure_per_detector(names) -> list:
    """``names`` (in order) keeping, per detector, its area, else its height, else its width."""
    best: dict = {}
    for n in names:
        det, m = pulse_measure(n)
        rank = {"A": 0, "H": 1, "W": 2}.get(m, 0)
        if det not in best or rank < best[det][0]:
            best[det] = (rank, n)
    keep = {n for _, n in best.values()}
    return [n for n in names if n in keep]


def is_fluorescence(name: str, label: str | None = None) -> bool:
    """True when :func:`channel_kind` says fluorescence."""
    return channel_kind(name, label) == FLUORESCENCE
