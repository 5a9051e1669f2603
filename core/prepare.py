"""Cleaning events before density fitting: non-finite values, saturation, piles, de-quantisation.

What the density sees must be a sample from a continuous distribution that
describes cells.  Four things in real files break that, each handled here
explicitly and seeded (all randomness comes from ``random_state``):

1. **Non-finite values** (NaN, inf) cannot be placed anywhere: such events are
   set aside with the reason ``"non-finite"``.
2. **Saturation**: a detector that reached the top of its range ($PnR) reports
   the range (or beyond) instead of the true value.  Judged on the **raw**
   values (as decoded from the file, before compensation and transforms),
   where the range is meaningful (:func:`saturation_mask`).  Reason
   ``"saturated"`` (kept with ``drop_saturated=False``, still counted).
3. **Piles at the floor and the ceiling**: when a channel's lowest (or
   highest) stored value holds at least ``pile_share`` (0.5 %) of the events,
   those events carry only "at or below" ("at or above") information: the
   detector or the electronics clipped them.  They are set aside with the
   reason ``"floor pile"`` / ``"ceiling pile"`` (a saturated event keeps the
   reason ``"saturated"``).  With ``drop_piles=False`` they are kept and spread
   across their bin (the grid cell of a quantised channel; otherwise a cell as
   wide as the span of as many neighbouring values as the pile holds events).
4. **Quantisation**: instruments store values on a grid.  Each event gets
   uniform jitter of half a grid step either side, in the units in which the
   grid is regular, *before* compensation and transforms:

   * integer channels ($DATATYPE I): half a **stored** unit, before $PnE/$PnG
     decoding (``core.fcs.ChannelDecoding``), so a log-amplified channel gets
     jitter of the right geometric width: a stored value x stands for
     ``f2 * 10 ** (f1 * (x + U(-1/2, 1/2)) / $PnR)`` (FCS 3.1 $PnE);
   * float channels whose values sit on a grid: half the grid step, the grid
     detected robustly (:func:`detect_grid`), uniform in the value
     (``v + U(-1/2, 1/2) step``) or in its logarithm (``v * 10 ** (U step)``);
   * float channels with many ties but no regular grid (fewer distinct values
     than 90 % of the events; seen in files whose values are computed from
     several digitised signals): each distinct value is spread over a cell as
     wide as its events would cover at the local spacing of the neighbouring
     values (``"cells"``; on a regular grid with even counts, the grid step);
   * continuous channels: untouched.

   Jitter goes on the values the density sees, never on what plots show or
   exports write.  Each channel draws its own uniform numbers from a generator
   seeded by ``(random_state, channel)``, one per event of the file, so the
   jitter of an event does not depend on the other channels or events.

Nothing is dropped silently: ``reason`` has one entry per event of the file
("" for kept events), ``kept`` is the mask of events in ``matrix``.
Shapes are events x channels; values are float64.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from .errors import EventDataError

REASON_KEPT = ""
REASON_NON_FINITE = "non-finite"
REASON_SATURATED = "saturated"
REASON_FLOOR_PILE = "floor pile"
REASON_CEILING_PILE = "ceiling pile"
#: Every reason an event can be set aside for, in the order they are shown.
REASONS = (REASON_SATURATED, REASON_CEILING_PILE, REASON_FLOOR_PILE, REASON_NON_FINITE)
#: The per-event ``cleaning flag`` exports carry: 0 kept, then one number per reason.
CLEANING_FLAGS = {REASON_KEPT: 0, REASON_SATURATED: 1, REASON_NON_FINITE: 2,
                  REASON_FLOOR_PILE: 3, REASON_CEILING_PILE: 4}

#: Largest share of distinct values (distinct / events) for a float channel to be
#: examined for a grid.
MAX_UNIQUE_FRACTION = 0.9
#: A channel's lowest/highest value holding at least this share of the events is a pile.
PILE_SHARE = 0.005
#: A value of a density channel holding more than this share of the kept events is an atom.
ATOM_SHARE = 0.001
#: Grid kinds: integer stored values, a float grid uniform in the value, or in log10 of it,
#: or irregular cells around each distinct value (float values with ties but no regular grid).
GRID_STORED, GRID_LINEAR, GRID_LOG, GRID_CELLS = "stored", "linear", "log", "cells"


@dataclass
class PreparedEvents:
    """The cleaned events the density sees, and what happened to every event.

    ``matrix``: (n_kept, n_columns) float64, kept events in file order.
    ``kept``: (n_events,) bool, True for events in ``matrix``.
    ``reason``: (n_events,) str, "" kept or one of :data:`REASONS`.
    ``steps``: (n_channels,) float64, jitter step per raw channel in the units
    named by ``grids`` (stored units, value units or log10 units); 0 when the
    channel was not jittered.
    ``grids``: (n_channels,) list of "stored", "linear", "log" or "".
    ``saturated``: (n_events,) bool, events at or beyond a channel range
    (whether or not they were dropped).
    ``saturated_per_channel``, ``floor_per_channel``, ``ceiling_per_channel``:
    (n_channels,) events flagged in each channel (saturated cells among finite
    events; pile cells whether or not they were dropped).
    """

    matrix: np.ndarray
    kept: np.ndarray
    reason: np.ndarray
    steps: np.ndarray
    saturated: np.ndarray
    saturated_per_channel: np.ndarray = field(default=None)
    grids: list = field(default_factory=list)
    floor_per_channel: np.ndarray = field(default=None)
    ceiling_per_channel: np.ndarray = field(default=None)

    @property
    def n_events(self) -> int:
        return int(self.kept.size)

    @property
    def n_kept(self) -> int:
        return int(self.kept.sum())

    @property
    def n_non_finite(self) -> int:
        return int(np.count_nonzero(self.reason == REASON_NON_FINITE))

    @property
    def n_saturated(self) -> int:
        """Events saturated in at least one channel (dropped or not)."""
        return int(self.saturated.sum())

    @property
    def n_dropped(self) -> int:
        return self.n_events - self.n_kept

    def set_aside(self) -> dict[str, int]:
        """Events set aside per reason (every reason of :data:`REASONS`, zeros included)."""
        return {r: int(np.count_nonzero(self.reason == r)) for r in REASONS}

    @property
    def counts(self) -> dict[str, int]:
        """``{"events", "kept", "non-finite", "saturated", "floor pile", "ceiling pile", "dropped"}``.

        "saturated" counts saturated events whether or not they were dropped;
        the pile counts are events set aside for that reason.
        """
        aside = self.set_aside()
        return {"events": self.n_events, "kept": self.n_kept, "non-finite": self.n_non_finite,
                "saturated": self.n_saturated, "floor pile": aside[REASON_FLOOR_PILE],
                "ceiling pile": aside[REASON_CEILING_PILE], "dropped": self.n_dropped}


def _as_matrix(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 2:
        raise EventDataError(f"{what} must be a 2-D array of events x channels; it has shape {a.shape}")
    return a


# --------------------------------------------------------------------------- grids

def detect_step(values, max_unique_fraction: float = MAX_UNIQUE_FRACTION) -> float:
    """Step of a grid uniform in the values themselves, or 0.0 when there is none.

    A channel counts as quantised when its distinct values are fewer than
    ``max_unique_fraction`` of its events and at least 90 % of the gaps
    between neighbouring distinct values (up to 64 steps wide) are whole
    multiples of one step within 10 % of a step.  The step is the low 2 %
    quantile of the gaps, refined on the gaps of about one step and then by a
    least-squares fit of the distinct values to the grid, so a few irregular
    gaps and clipped values at the ends do not fool it.  Non-finite values are
    ignored.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size < 3:
        return 0.0
    u, counts = np.unique(v, return_counts=True)
    if u.size < 2 or u.size > max_unique_fraction * v.size:
        return 0.0
    gaps = np.diff(u)
    s0 = float(np.quantile(gaps, 0.02))
    if not s0 > 0:
        return 0.0
    near_one = gaps[np.abs(gaps / s0 - 1.0) < 0.25]
    if near_one.size == 0:
        return 0.0
    s = float(np.median(near_one))
    r = gaps / s
    m = np.rint(r)
    informative = (m >= 1) & (m <= 64)
    if informative.sum() < max(2, 0.5 * gaps.size):
        return 0.0
    regular = informative & (np.abs(r - m) <= 0.1)
    if regular.sum() < 0.9 * informative.sum():
        return 0.0
    s = float(gaps[regular].sum() / m[regular].sum())
    # refine over the whole range: fit u = anchor + s k on the distinct values on the grid,
    # near the anchor first (a relative error e in s shifts values k steps away by e k steps);
    # the anchor is the most frequent value away from the ends (clipped piles need not be on it)
    inner = slice(1, -1) if u.size > 2 else slice(None)
    anchor = u[inner][np.argmax(counts[inner])]
    for reach, tol in ((1000.0, 0.1), (np.inf, 0.1), (np.inf, 0.05)):
        k = (u - anchor) / s
        kk = np.rint(k)
        on = (np.abs(k - kk) <= tol) & (np.abs(kk) <= reach)
        if on.sum() < 2 or np.ptp(kk[on]) == 0:
            continue
        kk_on = kk[on]
        slope = float(np.dot(kk_on, u[on] - anchor) / np.dot(kk_on, kk_on))
        if not slope > 0:
            break
        s = slope
    return s


def detect_grid(values, max_unique_fraction: float = MAX_UNIQUE_FRACTION) -> tuple[str, float]:
    """The grid a float channel's values sit on: ``("linear", step)``, ``("log", step)`` or ``("", 0.0)``.

    ``linear``: values ``a + k step`` (:func:`detect_step` on the values).
    ``log``: positive values ``a * 10 ** (k step)`` (:func:`detect_step` on
    ``log10`` of the positive values, which must be at least 90 % of the
    finite values); the step is in decades.  The linear grid is tried first.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    step = detect_step(v, max_unique_fraction)
    if step > 0:
        return GRID_LINEAR, step
    pos = v[v > 0]
    if pos.size >= 3 and pos.size >= 0.9 * v.size:
        step = detect_step(np.log10(pos), max_unique_fraction)
        if step > 0:
            return GRID_LOG, step
    return "", 0.0


@dataclass(frozen=True)
class ChannelJitter:
    """How one channel is de-quantised: ``grid`` ("stored", "linear", "log") and ``step``.

    ``decoding`` (a :class:`core.fcs.ChannelDecoding`) for the "stored" grid.
    """

    grid: str
    step: float
    decoding: object = None
    values: np.ndarray | None = None   # "cells": the sorted distinct values
    widths: np.ndarray | None = None   # "cells": the width of each one's cell

    def apply(self, col: np.ndarray, u: np.ndarray) -> np.ndarray:
        """``col`` (raw values) spread by ``u`` ~ U(-1/2, 1/2) steps (new array; non-finite unchanged)."""
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if self.grid == GRID_STORED:
                out = self.decoding.decode(self.decoding.encode(col) + u * self.step)
            elif self.grid == GRID_LOG:
                out = np.where(col > 0, col * np.power(10.0, u * self.step), col)
            elif self.grid == GRID_CELLS:
                at = np.clip(np.searchsorted(self.values, col), 0, self.values.size - 1)
                width = np.where(self.values[at] == col, self.widths[at], 0.0)
                out = col + u * width
            else:
                out = col + u * self.step
        bad = ~np.isfinite(col)
        if bad.any():
            out[bad] = col[bad]
        return out


def plan_jitter(raw_col, decoding=None, max_unique_fraction: float = MAX_UNIQUE_FRACTION):
    """The :class:`ChannelJitter` for one raw channel, or None when it is continuous.

    Integer channels with their ``decoding`` are jittered by one stored unit
    (half either side); others by the grid :func:`detect_grid` finds.
    """
    if decoding is not None and getattr(decoding, "integer", False):
        return ChannelJitter(GRID_STORED, 1.0, decoding)
    col = np.asarray(raw_col, dtype=np.float64).ravel()
    # the grid shows in an evenly strided share of at most GRID_SAMPLE values
    # (sorting a million values per channel would dominate the preparation)
    sample = col[::-(-col.size // GRID_SAMPLE)] if col.size > GRID_SAMPLE else col
    grid, step = detect_grid(sample, max_unique_fraction)
    if step > 0:
        return ChannelJitter(grid, step)
    if sample is not col and _cells(sample, max_unique_fraction) is None:
        return None
    return _cells(col, max_unique_fraction)


#: Values examined for a grid (an evenly strided share of a longer channel).
GRID_SAMPLE = 200_000
#: Distinct values either side that estimate the local spacing of a "cells" channel.
CELL_NEIGHBOURS = 10


def _cells(raw_col, max_unique_fraction: float):
    """The "cells" plan (see the module notes), or None for a continuous channel.

    A distinct value holding c events gets a cell c times the local spacing per
    event (the span of ``CELL_NEIGHBOURS`` distinct values either side divided by
    the events they hold), so a tied value is spread over the width its events
    would cover in the surrounding data; on a regular grid with even counts this
    is the grid step.
    """
    v = np.asarray(raw_col, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    u, cnt = np.unique(v, return_counts=True)
    if u.size < 3 or u.size > max_unique_fraction * v.size:
        return None
    i = np.arange(u.size)
    lo = np.maximum(i - CELL_NEIGHBOURS, 0)
    hi = np.minimum(i + CELL_NEIGHBOURS, u.size - 1)
    cs = np.concatenate([[0], np.cumsum(cnt)])
    around = cs[hi + 1] - cs[lo] - cnt
    widths = np.where(around > 0, cnt * (u[hi] - u[lo]) / np.maximum(around, 1), 0.0)
    return ChannelJitter(GRID_CELLS, float(np.median(widths)), values=u, widths=widths)


def channel_uniforms(random_state, channel: int, n: int) -> np.ndarray:
    """(n,) draws of U(-1/2, 1/2) for one channel, from a generator seeded by (seed, channel)."""
    if isinstance(random_state, np.random.Generator):
        seed = int(random_state.bit_generator.seed_seq.entropy % (2 ** 63)) \
            if hasattr(random_state.bit_generator, "seed_seq") else 0
    else:
        seed = int(random_state or 0)
    return np.random.default_rng([seed, int(channel)]).random(n) - 0.5


def dequantise(raw, random_state=0, steps=None, max_unique_fraction: float = MAX_UNIQUE_FRACTION,
               decoding: Sequence | None = None):
    """Spread raw values over their quantisation cells (see the module notes).

    ``raw``: (n_events, n_channels) raw values.  ``decoding``: optional
    per-channel :class:`core.fcs.ChannelDecoding` (integer channels are then
    jittered in stored units).  ``steps``: optional per-channel steps of a
    linear grid, replacing the detection.  Returns ``(jittered, steps)``: a
    new float64 array and the (n_channels,) steps used (0: untouched).
    """
    x = _as_matrix(raw, "raw event values")
    k = x.shape[1]
    plans = _plans(x, range(k), decoding, steps, max_unique_fraction)
    out = x.copy()
    for j, plan in plans.items():
        out[:, j] = plan.apply(x[:, j], channel_uniforms(random_state, j, x.shape[0]))
    return out, np.array([plans[j].step if j in plans else 0.0 for j in range(k)])


def _plans(x, columns, decoding, steps, max_unique_fraction) -> dict:
    if steps is not None:
        steps = np.asarray(steps, dtype=np.float64)
        if steps.shape != (x.shape[1],) or np.any(~np.isfinite(steps)) or np.any(steps < 0):
            raise EventDataError(f"steps must be {x.shape[1]} finite values >= 0, one per channel; "
                                 f"got {steps!r}")
        return {j: ChannelJitter(GRID_LINEAR, float(steps[j])) for j in columns if steps[j] > 0}
    plans = {}
    for j in columns:
        plan = plan_jitter(x[:, j], None if decoding is None else decoding[j], max_unique_fraction)
        if plan is not None:
            plans[j] = plan
    return plans


# --------------------------------------------------------------------------- saturation and piles

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
    x = _as_matrix(raw, "raw event values")
    r = np.asarray(channel_ranges, dtype=np.float64).ravel()
    if r.size != x.shape[1]:
        raise EventDataError(f"{r.size} channel ranges were given for {x.shape[1]} channels")
    sat = np.zeros(x.shape, dtype=bool)
    for j in np.flatnonzero(np.isfinite(r) & (r > 0)):
        sat[:, j] = _saturated_column(x[:, j], r[j])
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


def _spread_pile(col: np.ndarray, pile: np.ndarray, u: np.ndarray, upward: bool) -> np.ndarray:
    """Kept pile events of a continuous channel spread over a cell centred on the pile value,
    as wide as the span from the pile to the m-th value beyond it (m = events in the pile)."""
    m = int(pile.sum())
    v = col[pile][0]
    others = col[np.isfinite(col) & ~pile]
    others = np.sort(others[others > v] if upward else -others[others < v])
    if others.size == 0:
        return col
    width = abs(others[min(m, others.size) - 1] - (v if upward else -v))
    out = col.copy()
    out[pile] = v + u[pile] * width
    return out


def clean_events(raw, judged: Sequence[int], channel_ranges=None, *, drop_saturated: bool = True,
                 drop_piles: bool = True, pile_share: float = PILE_SHARE):
    """Reasons for every event from the raw values (no jitter, no transform).

    ``judged``: the channels whose saturation and piles count (others are
    only checked for non-finite values, which always set an event aside).
    Returns ``(reason (n,) str, saturated (n,) bool, sat_cells, floor_cells,
    ceiling_cells)``; the cell arrays are dicts channel -> (n,) bool masks.
    """
    x = _as_matrix(raw, "event values")
    n, k = x.shape
    r = None if channel_ranges is None else np.asarray(channel_ranges, dtype=np.float64).ravel()
    if r is not None and r.size != k:
        raise EventDataError(f"{r.size} channel ranges were given for {k} channels")
    non_finite = ~np.isfinite(x).all(axis=1)
    saturated = np.zeros(n, dtype=bool)
    floor_any = np.zeros(n, dtype=bool)
    ceiling_any = np.zeros(n, dtype=bool)
    sat_cells, floor_cells, ceiling_cells = {}, {}, {}
    for j in judged:
        col = x[:, j]
        if r is not None and np.isfinite(r[j]) and r[j] > 0:
            s = _saturated_column(col, r[j])
            sat_cells[j] = s
            saturated |= s
        else:
            s = None
        fl, ce = pile_masks(col, pile_share)
        if s is not None:
            fl, ce = fl & ~s, ce & ~s
        floor_cells[j], ceiling_cells[j] = fl, ce
        floor_any |= fl
        ceiling_any |= ce
    saturated &= ~non_finite
    # small codes first, strings once at the end (a million-entry object array is slow)
    names = np.array([REASON_KEPT, REASON_FLOOR_PILE, REASON_CEILING_PILE, REASON_SATURATED, REASON_NON_FINITE])
    code = np.zeros(n, dtype=np.int8)
    if drop_piles:
        code[floor_any] = 1
        code[ceiling_any] = 2
    if drop_saturated:
        code[saturated] = 3
    code[non_finite] = 4
    return names[code], saturated, sat_cells, floor_cells, ceiling_cells


def jittered_column(raw_col: np.ndarray, j: int, plan, random_state, floor=None, ceiling=None,
                    spread_piles: bool = False) -> np.ndarray:
    """Raw channel ``j`` as the density sees it before compensation and transforms (new array).

    ``plan``: the channel's :class:`ChannelJitter` or None; with ``spread_piles``
    the kept ``floor``/``ceiling`` pile events of a channel without a grid are
    spread across their cell (a grid's jitter already spreads them).
    """
    u = channel_uniforms(random_state, j, raw_col.shape[0])
    out = plan.apply(raw_col, u) if plan is not None else raw_col.copy()
    if spread_piles and plan is None:
        for mask, upward in ((floor, True), (ceiling, False)):
            if mask is not None and mask.any():
                out = _spread_pile(out, mask, u, upward)
    return out


def largest_tie_share(col, limit_events: int = 400_000, random_state=0) -> float:
    """Largest share of the values of ``col`` held by one value (0 for an empty column).

    Beyond ``limit_events`` values, a seeded random subsample of that size is
    examined (a value holding 0.1 % of a million events holds about 400 of it).
    """
    v = np.asarray(col, dtype=np.float64).ravel()
    if v.size == 0:
        return 0.0
    if v.size > limit_events:
        v = v[np.random.default_rng(random_state).choice(v.size, limit_events, replace=False)]
    s = np.sort(v)
    edges = np.flatnonzero(np.diff(s) != 0)
    runs = np.diff(np.concatenate([[-1], edges, [s.size - 1]]))
    return float(runs.max() / s.size)


def atoms(matrix, names: Sequence[str], share: float = ATOM_SHARE) -> dict[str, float]:
    """Channels of ``matrix`` (events x channels) where one value holds more than ``share``
    of the events: name -> that share (the atoms check before fitting)."""
    m = _as_matrix(matrix, "the density's events")
    out = {}
    for j, name in enumerate(names):
        t = largest_tie_share(m[:, j])
        if t > share:
            out[str(name)] = t
    return out


# --------------------------------------------------------------------------- the whole step

def prepare_events(data, channel_ranges=None, drop_saturated: bool = True, dequantise: bool = True,
                   random_state=0, *, raw_data=None,
                   pipeline: Callable[[np.ndarray], np.ndarray] | None = None,
                   steps=None, decoding: Sequence | None = None, drop_piles: bool = True,
                   pile_share: float = PILE_SHARE) -> PreparedEvents:
    """Clean events for density fitting; see the module docstring.

    Two ways to call it:

    * ``prepare_events(raw, ranges)``: ``data`` are raw values and also what the
      density sees (no transform); jitter is added to them directly.
    * ``prepare_events(None or transformed, ranges, raw_data=raw, pipeline=f)``:
      ``f(raw) -> values the density sees`` (compensation then transforms,
      events x columns).  Cleaning is judged on ``raw``; the jitter is added
      to ``raw`` and ``matrix = f(jittered raw)[kept]``.

    Giving ``raw_data`` without ``pipeline`` and ``dequantise=True`` is refused
    (the jitter cannot be carried through an unknown transform).

    ``channel_ranges``: (n_channels,) $PnR in raw units, or None (no saturation test).
    ``decoding``: per-channel :class:`core.fcs.ChannelDecoding` (integer channels
    are jittered in stored units).  ``steps``: optional linear-grid steps per
    channel replacing the detection.  Saturation and piles are judged on every
    channel.  :func:`core.analysis.density_input` prepares a recipe's density
    channels in one pass with the same pieces.
    """
    raw = _as_matrix(raw_data if raw_data is not None else data, "event values")
    n, k = raw.shape
    if pipeline is None and raw_data is not None and dequantise:
        if data is None or data is not raw_data:
            raise EventDataError(
                "de-quantisation adds jitter to the raw values, so it needs the pipeline that turns raw "
                "values into the values the density sees: pass pipeline=..., or call dequantise() on the "
                "raw values yourself, transform them, and pass dequantise=False")
    reason, saturated, sat_cells, floor_cells, ceiling_cells = clean_events(
        raw, range(k), channel_ranges, drop_saturated=drop_saturated, drop_piles=drop_piles,
        pile_share=pile_share)
    plans = _plans(raw, range(k), decoding, steps, MAX_UNIQUE_FRACTION) if dequantise else {}
    if dequantise or not drop_piles:
        jittered = np.empty_like(raw)
        for j in range(k):
            jittered[:, j] = jittered_column(raw[:, j], j, plans.get(j), random_state, floor_cells.get(j),
                                             ceiling_cells.get(j), spread_piles=not drop_piles)
    else:
        jittered = raw
    if pipeline is not None:
        seen = _as_matrix(pipeline(jittered), "the pipeline's output")
    elif raw_data is not None and data is not None and data is not raw_data:
        seen = _as_matrix(data, "event values")
    else:
        seen = jittered
    if seen.shape[0] != n:
        raise EventDataError(f"the values for the density have {seen.shape[0]} events but the raw values have {n}")
    bad = ~np.isfinite(seen).all(axis=1) & (reason == REASON_KEPT)
    if bad.any():
        reason = reason.astype(object)
        reason[bad] = REASON_NON_FINITE
        reason = reason.astype(str)
    kept = reason == REASON_KEPT
    return PreparedEvents(matrix=np.ascontiguousarray(seen[kept], dtype=np.float64), kept=kept, reason=reason,
                          steps=np.array([plans[j].step if j in plans else 0.0 for j in range(k)]),
                          saturated=saturated & (reason != REASON_NON_FINITE),
                          saturated_per_channel=_per_channel(sat_cells, k, reason != REASON_NON_FINITE),
                          grids=[plans[j].grid if j in plans else "" for j in range(k)],
                          floor_per_channel=_per_channel(floor_cells, k),
                          ceiling_per_channel=_per_channel(ceiling_cells, k))


def _per_channel(cells: dict, k: int, rows=None) -> np.ndarray:
    out = np.zeros(k, dtype=np.int64)
    for j, m in cells.items():
        out[j] = int(np.count_nonzero(m if rows is None else m & rows))
    return out


_dequantise = dequantise
