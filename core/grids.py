"""De-quantisation: the grid a channel's values sit on, and the seeded jitter that spreads them.

Rules in :mod:`core.prepare` (point 4 of its notes).  Jitter goes on raw values
(before compensation and transforms), one generator per channel seeded by
``(random_state, channel)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .cleaning import _as_matrix
from .errors import EventDataError

#: Largest share of distinct values (distinct / events) for a float channel to be
#: examined for a grid.
MAX_UNIQUE_FRACTION = 0.9
#: Grid kinds: integer stored values, a float grid uniform in the value, or in log10 of it,
#: or irregular cells around each distinct value (float values with ties but no regular grid).
GRID_STORED, GRID_LINEAR, GRID_LOG, GRID_CELLS = "stored", "linear", "log", "cells"


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
    return _step_of(u, counts, v.size, max_unique_fraction)


def _step_of(u: np.ndarray, counts: np.ndarray, n: int, max_unique_fraction: float) -> float:
    """:func:`detect_step` from the sorted distinct values ``u`` (float64) of n finite values."""
    if u.size < 2 or u.size > max_unique_fraction * n:
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
    return _log_grid(v, max_unique_fraction)


def _log_grid(v: np.ndarray, max_unique_fraction: float) -> tuple[str, float]:
    """``("log", step)`` for finite values ``v`` on a grid uniform in log10, else ``("", 0.0)``."""
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


def plan_jitter(raw_col, decoding=None, max_unique_fraction: float = MAX_UNIQUE_FRACTION, rows=None):
    """The :class:`ChannelJitter` for one raw channel, or None when it is continuous.

    Integer channels with their ``decoding`` are jittered by one stored unit
    (half either side); others by the grid :func:`detect_grid` finds.
    ``rows``: the (sorted) rows of ``raw_col`` to judge (the kept events), the
    same as passing ``raw_col[rows]`` without gathering the whole column; a column
    of a matrix is read in place (only its sample is copied).
    """
    if decoding is not None and getattr(decoding, "integer", False):
        return ChannelJitter(GRID_STORED, 1.0, decoding)
    col = np.asarray(raw_col)
    if col.ndim != 1:
        col = col.ravel()
    n = col.size if rows is None else rows.size
    # the grid shows in an evenly strided share of at most GRID_SAMPLE values
    # (sorting a million values per channel would dominate the preparation)
    sampled = n > GRID_SAMPLE
    if rows is None:
        sample = col[::-(-n // GRID_SAMPLE)] if sampled else col
    else:
        sample = col[rows[::-(-n // GRID_SAMPLE)] if sampled else rows]
    if sample.dtype.kind != "f":
        sample = sample.astype(np.float64)
    sample = sample[np.isfinite(sample)]
    if sample.size < 3:
        return None
    # one sort of the sample serves every grid kind (in the stored type: float32 sorts faster)
    u, counts = np.unique(sample, return_counts=True)
    u = u.astype(np.float64)
    if _too_many_values(u, counts, sample.size, max_unique_fraction):
        return None
    step = _step_of(u, counts, sample.size, max_unique_fraction)
    if step > 0:
        return ChannelJitter(GRID_LINEAR, step)
    grid, step = _log_grid(np.asarray(sample, dtype=np.float64), max_unique_fraction)
    if step > 0:
        return ChannelJitter(grid, step)
    cells = _cells_of(u, counts, sample.size, max_unique_fraction)
    if not sampled or cells is None:
        return cells
    return _cells(np.asarray(col if rows is None else col[rows], dtype=np.float64), max_unique_fraction)


def _too_many_values(u: np.ndarray, counts: np.ndarray, n: int, max_unique_fraction: float) -> bool:
    """True when no grid kind can apply to n finite values with distinct values ``u`` (counts ``counts``).

    The linear grid and the "cells" both need at most ``max_unique_fraction``
    distinct values among the finite ones; the log grid the same among the
    positive values (distinct positive floats have distinct logarithms at the
    spacings data hold), when those are at least 90 % of the finite values.
    """
    if u.size <= max_unique_fraction * n:
        return False
    positive = u > 0
    n_pos = int(counts[positive].sum())
    return not (n_pos >= 3 and n_pos >= 0.9 * n and int(positive.sum()) <= max_unique_fraction * n_pos)


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
    return _cells_of(u, cnt, v.size, max_unique_fraction)


def _cells_of(u: np.ndarray, cnt: np.ndarray, n: int, max_unique_fraction: float):
    """:func:`_cells` from the sorted distinct values ``u`` (float64) of n finite values."""
    if u.size < 3 or u.size > max_unique_fraction * n:
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
