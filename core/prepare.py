"""Cleaning events before density fitting: non-finite values, saturation, de-quantisation.

What the density sees must be a sample from a continuous distribution.  Three
things in real files break that, and each is handled here explicitly:

1. **Non-finite values** (NaN, inf) cannot be placed anywhere: such events are
   set aside with the reason ``"non-finite"``.
2. **Saturation**: a detector that reached the top of its range ($PnR) reports
   the range (or beyond) instead of the true value; those events pile up on
   the edge as a spike.  Saturation is judged on the **raw** values, as the
   file stores them (before compensation and transforms), because only there
   is the range meaningful: an event is saturated when any channel with a
   known range has ``value >= range``.  Such events get the reason
   ``"saturated"`` and are left out of the fit (``drop_saturated=True``).
3. **Quantisation**: instruments store values on a grid (integers, or
   integers times a gain), so a channel may hold a few hundred distinct
   values over tens of thousands of events.  A density fitted to that
   collapses onto spikes.  The fix is to spread each stored value uniformly
   over its grid cell: ``raw + U(-step/2, +step/2)``.

   *Where* the jitter goes matters.  The grid is regular in **raw** units
   (one step everywhere); after compensation (a linear mix of several
   detectors) and a non-linear transform (logicle, arcsinh, log) the cells
   are skewed and vary in width.  So the jitter is added to the raw values,
   and the caller's pipeline (compensate, then transform) is applied to the
   jittered raw values: ``matrix = pipeline(dequantise(raw))``.  This is what
   :func:`prepare_events` does when given ``pipeline``.  Jitter is added to the
   values the density sees, not to the values shown in plots or exported.

   The step of a channel is detected from its sorted distinct values
   (:func:`detect_step`): a channel counts as quantised when its distinct
   values are fewer than ``max_unique_fraction`` of its events (ties are
   common) and at least 90 % of the gaps between neighbouring distinct values
   (up to 64 steps wide) are whole multiples of one step, within 10 % of a
   step.  The step is the low 2 % quantile of the gaps, refined on the gaps of
   about one step and then by a least-squares fit of the distinct values to
   the grid (relative error about 1e-8 on the bundled files), so a few
   irregular gaps and clipped values at the ends do not fool it.  Channels without
   such a regular grid (continuous values, or grids that are not evenly
   spaced) get step 0 and are left untouched.

Nothing is dropped silently: ``reason`` has one entry per event of the file
("" for kept events), ``kept`` is the mask of events in ``matrix``.
All randomness comes from ``random_state`` (seeded, deterministic).
Shapes are events x channels; values are float64.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .errors import EventDataError

REASON_KEPT = ""
REASON_NON_FINITE = "non-finite"
REASON_SATURATED = "saturated"

#: Largest share of distinct values (distinct / events) for a channel to be
#: examined for quantisation.
MAX_UNIQUE_FRACTION = 0.9


@dataclass
class PreparedEvents:
    """The cleaned events the density sees, and what happened to every event.

    ``matrix``: (n_kept, n_columns) float64, kept events in file order.
    ``kept``: (n_events,) bool, True for events in ``matrix``.
    ``reason``: (n_events,) str, "" kept, "non-finite" or "saturated".
    ``steps``: (n_channels,) float64, quantisation step in raw units per raw
    channel (0 when continuous or when de-quantisation was off).
    ``saturated``: (n_events,) bool, events at or beyond a channel range
    (whether or not they were dropped).
    """

    matrix: np.ndarray
    kept: np.ndarray
    reason: np.ndarray
    steps: np.ndarray
    saturated: np.ndarray
    saturated_per_channel: np.ndarray = field(default=None)

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

    @property
    def counts(self) -> dict[str, int]:
        """``{"events", "kept", "non-finite", "saturated", "dropped"}`` as ints."""
        return {"events": self.n_events, "kept": self.n_kept, "non-finite": self.n_non_finite,
                "saturated": self.n_saturated, "dropped": self.n_dropped}


def _as_matrix(x, what: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 2:
        raise EventDataError(f"{what} must be a 2-D array of events x channels; it has shape {a.shape}")
    return a


def detect_step(values, max_unique_fraction: float = MAX_UNIQUE_FRACTION) -> float:
    """Quantisation step of one channel's values in their own units, or 0.0 when continuous.

    See the module docstring for the rule.  Non-finite values are ignored.
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
        # most gaps are wider than 64 steps or narrower than one: no regular grid to speak of
        return 0.0
    regular = informative & (np.abs(r - m) <= 0.1)
    if regular.sum() < 0.9 * informative.sum():
        return 0.0
    # least-squares step over the regular gaps (sum of gaps / number of steps they span)
    s = float(gaps[regular].sum() / m[regular].sum())
    # refine over the whole range: fit u = anchor + s k on the distinct values that lie on the grid.
    # A relative error e in s shifts values k steps away by e k steps, so the first round uses
    # values near the anchor only, and later rounds tighten the tolerance.
    # anchor: the most frequent value away from the ends (clipped events pile up on the
    # extremes, which need not lie on the grid)
    inner = slice(1, -1) if u.size > 2 else slice(None)
    anchor = u[inner][np.argmax(counts[inner])]
    for reach, tol in ((1000.0, 0.1), (np.inf, 0.1), (np.inf, 0.05)):
        k = (u - anchor) / s
        kk = np.rint(k)
        on = (np.abs(k - kk) <= tol) & (np.abs(kk) <= reach)
        if on.sum() < 2 or np.ptp(kk[on]) == 0:
            continue
        kk_on = kk[on]
        du = u[on] - anchor
        slope = float(np.dot(kk_on, du) / np.dot(kk_on, kk_on))   # least squares through the anchor
        if not slope > 0:
            break
        s = slope
    return s


def dequantise(raw, random_state=0, steps=None, max_unique_fraction: float = MAX_UNIQUE_FRACTION):
    """Spread raw values uniformly over their quantisation cells.

    ``raw``: (n_events, n_channels) values as stored in the file (raw units).
    Returns ``(jittered, steps)``: a new float64 array with
    ``raw + U(-step/2, step/2)`` on each quantised channel (non-finite values
    and channels with step 0 unchanged), and the (n_channels,) steps used
    (detected with :func:`detect_step` unless ``steps`` is given).
    ``random_state``: int seed or ``numpy.random.Generator``; the same seed
    gives the same jitter.
    """
    x = _as_matrix(raw, "raw event values")
    k = x.shape[1]
    if steps is None:
        steps = np.array([detect_step(x[:, j], max_unique_fraction) for j in range(k)], dtype=np.float64)
    else:
        steps = np.asarray(steps, dtype=np.float64)
        if steps.shape != (k,) or np.any(~np.isfinite(steps)) or np.any(steps < 0):
            raise EventDataError(f"steps must be {k} finite values >= 0, one per channel; got {steps!r}")
    out = x.copy()
    rng = np.random.default_rng(random_state)
    # one uniform draw per event and channel, so the jitter of a channel does
    # not depend on which other channels are quantised
    u = rng.random(x.shape) - 0.5
    for j in np.flatnonzero(steps > 0):
        col = out[:, j]
        ok = np.isfinite(col)
        col[ok] += u[ok, j] * steps[j]
    return out, steps


#: A pile of at least this many events at a channel's largest value, within
#: PILE_FRACTION of its range, counts as saturation (see saturation_mask).
PILE_MIN_EVENTS = 3
PILE_FRACTION = 0.95


def saturation_mask(raw, channel_ranges) -> np.ndarray:
    """(n_events, n_channels) bool: events at or beyond the top of a channel.

    A value is saturated when it is >= the channel's range ($PnR, in the
    units of ``raw``), or when it equals the channel's largest finite value,
    that value lies within the top 5 % of the range and at least
    ``PILE_MIN_EVENTS`` events share it.  The second rule catches detectors
    that clip at their top channel value, which for integer files is
    $PnR - 1 (FCS 3.1 numbers channel values 0 .. $PnR-1) and for decoded
    log or gain-scaled channels is slightly below the decoded range (common
    practice: saturated events pile up at the largest value).

    Channels whose range is missing, zero, negative or non-finite are never
    flagged.  Non-finite values are not flagged (they are "non-finite").
    """
    x = _as_matrix(raw, "raw event values")
    r = np.asarray(channel_ranges, dtype=np.float64).ravel()
    if r.size != x.shape[1]:
        raise EventDataError(f"{r.size} channel ranges were given for {x.shape[1]} channels")
    usable = np.isfinite(r) & (r > 0)
    finite = np.isfinite(x)
    with np.errstate(invalid="ignore"):
        sat = (x >= np.where(usable, r, np.inf)) & finite
    for j in np.flatnonzero(usable):
        col = x[:, j]
        below = finite[:, j] & ~sat[:, j]
        if not below.any():
            continue
        top = col[below].max()
        if top >= PILE_FRACTION * r[j]:
            at_top = below & (col == top)
            if at_top.sum() >= PILE_MIN_EVENTS:
                sat[:, j] |= at_top
    return sat


def prepare_events(data, channel_ranges=None, drop_saturated: bool = True, dequantise: bool = True,
                   random_state=0, *, raw_data=None,
                   pipeline: Callable[[np.ndarray], np.ndarray] | None = None,
                   steps=None) -> PreparedEvents:
    """Clean events for density fitting; see the module docstring.

    Two ways to call it:

    * ``prepare_events(raw, ranges)``: ``data`` are raw values and also what the
      density sees (no transform); jitter is added to them directly.
    * ``prepare_events(None or transformed, ranges, raw_data=raw, pipeline=f)``:
      ``f(raw) -> values the density sees`` (compensation then transforms,
      events x columns).  Saturation is judged on ``raw``; the jitter is added
      to ``raw`` and ``matrix = f(jittered raw)[kept]``.

    Giving ``raw_data`` without ``pipeline`` and ``dequantise=True`` is refused
    (the jitter cannot be carried through an unknown transform): de-quantise the
    raw values with :func:`dequantise`, transform them, and pass
    ``dequantise=False``.

    ``channel_ranges``: (n_channels,) $PnR in raw units, or None (no saturation test).
    ``steps``: optional precomputed quantisation steps (raw units), e.g. from the whole file.
    Returns :class:`PreparedEvents`; raises :class:`EventDataError` for shape mismatches.
    """
    raw = _as_matrix(raw_data if raw_data is not None else data, "event values")
    n, k = raw.shape
    if pipeline is None and raw_data is not None and dequantise:
        if data is None or data is not raw_data:
            raise EventDataError(
                "de-quantisation adds jitter to the raw values, so it needs the pipeline that turns raw "
                "values into the values the density sees: pass pipeline=..., or call dequantise() on the "
                "raw values yourself, transform them, and pass dequantise=False")
    if dequantise:
        jittered, used_steps = _dequantise(raw, random_state, steps)
    else:
        jittered = raw
        used_steps = np.zeros(k) if steps is None else np.asarray(steps, dtype=np.float64)
    if pipeline is not None:
        seen = _as_matrix(pipeline(jittered), "the pipeline's output")
    elif raw_data is not None and data is not None and data is not raw_data:
        seen = _as_matrix(data, "event values")
    else:
        seen = jittered
    if seen.shape[0] != n:
        raise EventDataError(f"the values for the density have {seen.shape[0]} events but the raw values have {n}")

    non_finite = ~np.all(np.isfinite(raw), axis=1) | ~np.all(np.isfinite(seen), axis=1)
    if channel_ranges is not None:
        sat_cells = saturation_mask(raw, channel_ranges)
    else:
        sat_cells = np.zeros((n, k), dtype=bool)
    saturated = sat_cells.any(axis=1) & ~non_finite
    reason = np.full(n, REASON_KEPT, dtype=object)
    reason[saturated & drop_saturated] = REASON_SATURATED
    reason[non_finite] = REASON_NON_FINITE
    kept = reason == REASON_KEPT
    reason = reason.astype(str)
    return PreparedEvents(matrix=np.ascontiguousarray(seen[kept], dtype=np.float64), kept=kept, reason=reason,
                          steps=used_steps, saturated=saturated,
                          saturated_per_channel=sat_cells[~non_finite].sum(axis=0))


_dequantise = dequantise
