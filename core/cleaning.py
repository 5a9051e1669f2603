"""Why events are set aside before density fitting: non-finite values, saturation, piles; atoms.

Rules in :mod:`core.prepare` (points 1-3 of its notes).  Everything here reads
event matrices column by column, in whatever float type they are held
(float32 files stay float32), converting one column at a time to float64.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import Sequence

import numpy as np

from .errors import EventDataError

REASON_KEPT = ""
REASON_NON_FINITE = "non-finite"
REASON_SATURATED = "saturated"
REASON_FLOOR_PILE = "floor pile"
REASON_CEILING_PILE = "ceiling pile"
#: Every reason an event can be set aside for, in the order they are shown.
REASONS = (REASON_SATURATED, REASON_CEILING_PILE, REASON_FLOOR_PILE, REASON_NON_FINITE)
#: The ONE table of reason codes: code -> text.  Per-event reasons are held as
#: these small codes (int8, one byte per event; ``PreparedEvents.reason_code``,
#: ``Analysis.reason_code``) and turned into text only where shown; the code is
#: also the ``cleaning flag`` exports carry (0 kept, 1 saturated, 2 non-finite,
#: 3 floor pile, 4 ceiling pile).
REASON_TEXTS = (REASON_KEPT, REASON_SATURATED, REASON_NON_FINITE, REASON_FLOOR_PILE, REASON_CEILING_PILE)
CODE_KEPT, CODE_SATURATED, CODE_NON_FINITE, CODE_FLOOR_PILE, CODE_CEILING_PILE = range(len(REASON_TEXTS))
#: The per-event ``cleaning flag`` exports carry: text -> its code in :data:`REASON_TEXTS`.
CLEANING_FLAGS = {text: code for code, text in enumerate(REASON_TEXTS)}


def reason_texts(codes) -> np.ndarray:
    """(n_events,) str array ("" kept, else a :data:`REASONS` entry) from reason codes (n_events,)."""
    return np.array(REASON_TEXTS)[np.asarray(codes, dtype=np.intp)]


def reason_codes(reasons) -> np.ndarray:
    """(n_events,) int8 reason codes of :data:`REASON_TEXTS` from texts or codes (codes are checked, not copied).

    EventDataError for a text or code that is not a reason."""
    a = np.asarray(reasons)
    if a.dtype.kind in "iu":
        if a.size and (a.min() < 0 or a.max() >= len(REASON_TEXTS)):
            raise EventDataError(f"reason codes must lie in 0-{len(REASON_TEXTS) - 1}; got {a.min()}-{a.max()}")
        return a.astype(np.int8, copy=False)
    out = np.full(a.shape, -1, dtype=np.int8)
    for code, text in enumerate(REASON_TEXTS):
        out[a == text] = code
    if (out < 0).any():
        bad = sorted({str(v) for v in a[out < 0]})
        raise EventDataError(f"unknown reason(s) {', '.join(map(repr, bad))}; the reasons are "
                             f"{', '.join(map(repr, REASON_TEXTS))}")
    return out


def reason_counts(codes) -> dict[str, int]:
    """Events set aside per reason, ``{reason: count}`` over :data:`REASONS` (zeros included)."""
    counts = np.bincount(np.asarray(codes, dtype=np.intp).ravel(), minlength=len(REASON_TEXTS))
    return {r: int(counts[CLEANING_FLAGS[r]]) for r in REASONS}

#: A channel's lowest/highest value holding at least this share of the events is a pile.
PILE_SHARE = 0.005
#: A value of a density channel holding more than this share of the kept events is an atom.
ATOM_SHARE = 0.001


def _as_matrix(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 2:
        raise EventDataError(f"{what} must be a 2-D array of events x channels; it has shape {a.shape}")
    return a


def _as_events(x, what: str) -> np.ndarray:
    """``x`` as a 2-D float array in its own float type (float32 stays float32; no copy)."""
    a = np.asarray(x)
    if a.dtype.kind != "f":
        a = a.astype(np.float64)
    if a.ndim != 2:
        raise EventDataError(f"{what} must be a 2-D array of events x channels; it has shape {a.shape}")
    return a


#: Events per block where a whole-matrix pass would make a full-size temporary.
CHUNK_EVENTS = 1 << 17


def non_finite_rows(x: np.ndarray) -> np.ndarray:
    """(n_events,) bool: events holding a NaN or inf in any channel (in blocks of events)."""
    out = np.empty(x.shape[0], dtype=bool)
    for start in range(0, x.shape[0], CHUNK_EVENTS):
        out[start:start + CHUNK_EVENTS] = ~np.isfinite(x[start:start + CHUNK_EVENTS]).all(axis=1)
    return out


#: A pile of at least this many events at a channel's largest value, within
#: PILE_FRACTION of its range, counts as saturation (see saturation_mask).
PILE_MIN_EVENTS = 3
PILE_FRACTION = 0.95


def saturation_mask(raw, channel_ranges) -> np.ndarray:
    """(n_events, n_channels) bool: events at or beyond the top of a channel.

    A value is saturated when it is >= the channel's range ($PnR, in the
    units of ``raw``), or when it equals the channel's largest finite value,
    that value lies within the top 5 % of the range and at least
    ``PILE_MIN_EVENTS`` events share it (detectors clip at their top channel
    value, $PnR - 1 for integer files; common practice).  Channels whose range
    is missing, zero, negative or non-finite are never flagged; non-finite
    values are not flagged (they are "non-finite").
    """
    x = _as_events(raw, "raw event values")
    r = np.asarray(channel_ranges, dtype=np.float64).ravel()
    if r.size != x.shape[1]:
        raise EventDataError(f"{r.size} channel ranges were given for {x.shape[1]} channels")
    sat = np.zeros(x.shape, dtype=bool)
    for j in np.flatnonzero(np.isfinite(r) & (r > 0)):
        sat[:, j] = _saturated_column(np.asarray(x[:, j], dtype=np.float64), r[j])
    return sat


def _saturated_column(col: np.ndarray, rng: float) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        sat = col >= rng                       # NaN compares False; +inf is non-finite, not saturated
        hi = col.max() if col.size else np.nan
        if not np.isfinite(hi) or hi >= rng:   # the usual case skips the masks below
            finite = np.isfinite(col)
            sat &= finite
            below = finite & ~sat
            if not below.any():
                return sat
            top = col[below].max()
        else:
            below, top = None, hi
        if top >= PILE_FRACTION * rng:
            at_top = col == top
            if below is not None:
                at_top &= below
            if np.count_nonzero(at_top) >= PILE_MIN_EVENTS:
                sat |= at_top
    return sat


def pile_masks(col, pile_share: float = PILE_SHARE) -> tuple[np.ndarray, np.ndarray]:
    """(floor, ceiling) bool masks (n_events,) of one raw channel's piles.

    The lowest (highest) finite value is a pile when it holds at least
    ``pile_share`` of the finite values and at least ``PILE_MIN_EVENTS`` events,
    and the channel holds more than one value.
    """
    col = np.asarray(col, dtype=np.float64)
    none = np.zeros(col.shape, dtype=bool)
    if col.size == 0:
        return none, none.copy()
    lo, hi = float(col.min()), float(col.max())
    n = col.size
    if not (np.isfinite(lo) and np.isfinite(hi)):      # the rare case: NaN or inf present
        finite = np.isfinite(col)
        n = int(finite.sum())
        if n == 0:
            return none, none.copy()
        lo, hi = float(col[finite].min()), float(col[finite].max())
    if lo == hi:
        return none, none.copy()
    need = max(PILE_MIN_EVENTS, pile_share * n)
    floor = col == lo
    ceiling = col == hi
    return (floor if np.count_nonzero(floor) >= need else none), \
        (ceiling if np.count_nonzero(ceiling) >= need else none.copy())


def clean_events(raw, judged: Sequence[int], channel_ranges=None, *, drop_saturated: bool = True,
                 drop_piles: bool = True, pile_share: float = PILE_SHARE):
    """Reasons for every event from the raw values (no jitter, no transform).

    ``judged``: the channels whose saturation and piles count (others are
    only checked for non-finite values, which always set an event aside).
    Returns ``(reason code (n,) int8 of :data:`REASON_TEXTS`, saturated (n,) bool,
    sat_cells, floor_cells, ceiling_cells)``; the cell arrays are dicts channel ->
    (n,) bool masks holding only the channels with at least one flagged event
    (a missing channel flags none: a mask per channel would be n bytes each).
    """
    x = _as_events(raw, "event values")
    n, k = x.shape
    r = None if channel_ranges is None else np.asarray(channel_ranges, dtype=np.float64).ravel()
    if r is not None and r.size != k:
        raise EventDataError(f"{r.size} channel ranges were given for {k} channels")
    non_finite = non_finite_rows(x)
    saturated = np.zeros(n, dtype=bool)
    floor_any = np.zeros(n, dtype=bool)
    ceiling_any = np.zeros(n, dtype=bool)
    sat_cells, floor_cells, ceiling_cells = {}, {}, {}
    for j in judged:
        col = np.asarray(x[:, j], dtype=np.float64)   # one column at a time (float32 files)
        if r is not None and np.isfinite(r[j]) and r[j] > 0:
            s = _saturated_column(col, r[j])
            if not s.any():
                s = None
        else:
            s = None
        fl, ce = pile_masks(col, pile_share)
        if s is not None:
            sat_cells[j] = s
            saturated |= s
            fl, ce = fl & ~s, ce & ~s
        if fl.any():
            floor_cells[j] = fl
            floor_any |= fl
        if ce.any():
            ceiling_cells[j] = ce
            ceiling_any |= ce
    saturated &= ~non_finite
    # later rules win: ceiling over floor pile, saturated over piles, non-finite over all
    code = np.zeros(n, dtype=np.int8)
    if drop_piles:
        code[floor_any] = CODE_FLOOR_PILE
        code[ceiling_any] = CODE_CEILING_PILE
    if drop_saturated:
        code[saturated] = CODE_SATURATED
    code[non_finite] = CODE_NON_FINITE
    return code, saturated, sat_cells, floor_cells, ceiling_cells


def largest_tie_share(col, limit_events: int = 400_000, random_state=0, rows=None) -> float:
    """Largest share of the values of ``col`` held by one value (0 for an empty column).

    Beyond ``limit_events`` values, a seeded random subsample of that size is
    examined (a value holding 0.1 % of a million events holds about 400 of it);
    ``rows``: that subsample's indices when already drawn (:func:`_tie_rows`).
    """
    v = np.asarray(col).ravel()
    if v.size == 0:
        return 0.0
    if v.size > limit_events:
        v = v[_tie_rows(v.size, limit_events, random_state) if rows is None else rows]
    s = np.sort(np.asarray(v, dtype=np.float64))
    edges = np.flatnonzero(np.diff(s) != 0)
    runs = np.diff(np.concatenate([[-1], edges, [s.size - 1]]))
    return float(runs.max() / s.size)


def _tie_rows(n: int, limit_events: int, random_state) -> np.ndarray | None:
    """The seeded subsample of :func:`largest_tie_share` (None when all n values are examined)."""
    if n <= limit_events:
        return None
    return np.random.default_rng(random_state).choice(n, limit_events, replace=False)


#: Events x channels from which the atoms check runs its channels on two threads.
ATOM_THREADS_MIN_WORK = 2_000_000


def atoms(matrix, names: Sequence[str], share: float = ATOM_SHARE) -> dict[str, float]:
    """Channels of ``matrix`` (events x channels) where one value holds more than ``share``
    of the events: name -> that share (the atoms check before fitting)."""
    m = _as_matrix(matrix, "the density's events")
    rows = _tie_rows(m.shape[0], 400_000, 0)   # the same seeded subsample for every channel, drawn once
    if rows is not None:
        rows = np.sort(rows)   # read in order (the share does not depend on the order): fewer cache misses
    names = [str(name) for name in names]

    def tie(j):
        return largest_tie_share(m[:, j], rows=rows)
    if m.shape[0] * len(names) >= ATOM_THREADS_MIN_WORK and len(names) > 1:
        # numpy's sorts release the GIL: channels on two threads (each channel's share is its own)
        with ThreadPoolExecutor(max_workers=min(2, os.cpu_count() or 1)) as pool:
            ties = list(pool.map(tie, range(len(names))))
    else:
        ties = [tie(j) for j in range(len(names))]
    return {name: t for name, t in zip(names, ties) if t > share}


def _per_channel(cells: dict, k: int, rows=None) -> np.ndarray:
    out = np.zeros(k, dtype=np.int64)
    for j, m in cells.items():
        out[j] = int(np.count_nonzero(m if rows is None else m & rows))
    return out
