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

Nothing is dropped silently: ``reason_code`` has one entry per event of the
file (0 for kept events; a small code of :data:`REASON_TEXTS`, the one table of
code -> text, one byte per event), ``reason`` gives the same as text, and
``kept`` is the mask of events in ``matrix``.
Shapes are events x channels; values are float64.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from .cleaning import (  # noqa: F401  (re-exported: the old import path)
    ATOM_SHARE, CLEANING_FLAGS, CODE_CEILING_PILE, CODE_FLOOR_PILE, CODE_KEPT, CODE_NON_FINITE, CODE_SATURATED,
    PILE_FRACTION, PILE_MIN_EVENTS, PILE_SHARE, REASON_CEILING_PILE, REASON_FLOOR_PILE, REASON_KEPT,
    REASON_NON_FINITE, REASON_SATURATED, REASON_TEXTS, REASONS, _as_matrix, _per_channel, _saturated_column,
    atoms, clean_events, largest_tie_share, non_finite_rows, pile_masks, reason_codes, reason_counts, reason_texts,
    saturation_mask)
from .errors import EventDataError
from .grids import (  # noqa: F401  (re-exported: the old import path)
    CELL_NEIGHBOURS, GRID_CELLS, GRID_LINEAR, GRID_LOG, GRID_SAMPLE, GRID_STORED, MAX_UNIQUE_FRACTION,
    ChannelJitter, _cells, _plans, _spread_pile, channel_uniforms, detect_grid, detect_step, dequantise,
    jittered_column, plan_jitter)


@dataclass
class PreparedEvents:
    """The cleaned events the density sees, and what happened to every event.

    ``matrix``: (n_kept, n_columns) float64, kept events in file order.
    ``kept``: (n_events,) bool, True for events in ``matrix``.
    ``reason_code``: (n_events,) int8, the code of each event's reason in
    :data:`REASON_TEXTS` (0 kept); ``reason`` the same as (n_events,) str ("" kept
    or one of :data:`REASONS`), built on each call.
    ``steps``: (n_channels,) float64, jitter step per raw channel in the units
    named by ``grids`` (stored units, value units or log10 units); 0 when the
    channel was not jittered.
    ``grids``: (n_channels,) list of "stored", "linear", "log" or "".
    ``saturated``: (n_events,) bool, events at or beyond a channel range
    (whether or not they were dropped).
    ``saturated_per_channel``, ``floor_per_channel``, ``ceiling_per_channel``:
    (n_channels,) events flagged in each channel (saturated cells among finite
    events; pile cells whether or not they were dropped).
    ``from_values``: (column of ``matrix``, file channel) pairs whose matrix column
    is the file's transformed values of that channel at the kept events, copied
    (set by :func:`core.prepare_file.prepare_file_events`; empty otherwise).
    """

    matrix: np.ndarray
    kept: np.ndarray
    reason_code: np.ndarray
    steps: np.ndarray
    saturated: np.ndarray
    saturated_per_channel: np.ndarray = field(default=None)
    grids: list = field(default_factory=list)
    floor_per_channel: np.ndarray = field(default=None)
    ceiling_per_channel: np.ndarray = field(default=None)
    from_values: tuple = ()

    def __post_init__(self):
        self.reason_code = reason_codes(self.reason_code)   # texts are accepted too; codes are checked

    @property
    def reason(self) -> np.ndarray:
        """(n_events,) str: "" for kept events, else the reason (built from ``reason_code``)."""
        return reason_texts(self.reason_code)

    @property
    def n_events(self) -> int:
        return int(self.kept.size)

    @property
    def n_kept(self) -> int:
        return int(self.kept.sum())

    @property
    def n_non_finite(self) -> int:
        return int(np.count_nonzero(self.reason_code == CODE_NON_FINITE))

    @property
    def n_saturated(self) -> int:
        """Events saturated in at least one channel (dropped or not)."""
        return int(self.saturated.sum())

    @property
    def n_dropped(self) -> int:
        return self.n_events - self.n_kept

    def set_aside(self) -> dict[str, int]:
        """Events set aside per reason (every reason of :data:`REASONS`, zeros included)."""
        return reason_counts(self.reason_code)

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
    code, saturated, sat_cells, floor_cells, ceiling_cells = clean_events(
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
    code[non_finite_rows(seen) & (code == CODE_KEPT)] = CODE_NON_FINITE
    kept = code == CODE_KEPT
    finite_rows = code != CODE_NON_FINITE
    return PreparedEvents(matrix=np.ascontiguousarray(seen[kept], dtype=np.float64), kept=kept, reason_code=code,
                          steps=np.array([plans[j].step if j in plans else 0.0 for j in range(k)]),
                          saturated=saturated & finite_rows,
                          saturated_per_channel=_per_channel(sat_cells, k, finite_rows),
                          grids=[plans[j].grid if j in plans else "" for j in range(k)],
                          floor_per_channel=_per_channel(floor_cells, k),
                          ceiling_per_channel=_per_channel(ceiling_cells, k))


_dequantise = dequantise
