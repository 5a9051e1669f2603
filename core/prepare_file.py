"""One pass over an event file: the values plots see and the cleaned events the density sees.

:func:`transformed_values` compensates and transforms every channel once;
:func:`prepare_file_events` cleans, de-quantises, compensates and transforms
the density channels (rules in :mod:`core.prepare`).  Both take the recipe's
pieces as plain arguments (:func:`core.analysis.density_input` reads the
recipe) and read ``EventFile.data`` in whatever float type the reader holds
it (float32 files are not copied to float64 as a whole: conversion happens one
column, or one block of events, at a time).  Shapes are events x channels.
"""

from __future__ import annotations

import ctypes
import sys
from typing import Mapping, Sequence

import numpy as np

from .cleaning import CODE_KEPT, CODE_NON_FINITE, _as_events, _per_channel, clean_events, non_finite_rows
from .compensation import checked_detectors, compensate_columns
from .errors import ChannelError, EventDataError
from .grids import MAX_UNIQUE_FRACTION, jittered_column, plan_jitter
from .prepare import PreparedEvents
from .transforms import make_transform


def _forward(spec, col: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        return make_transform(spec).forward(col)


def check_transform_channels(names: Sequence[str], transforms: Mapping, where: str) -> None:
    """ChannelError naming the file when ``transforms`` has a spec for a channel not in ``names``."""
    for ch, spec in transforms.items():
        if spec is not None and ch not in names:
            raise ChannelError(f"{where}: the recipe transforms channel {ch!r} which the file lacks; the "
                               f"file's channels are {', '.join(names)}")


def transformed_values(data, names: Sequence[str], S, transforms: Mapping, where: str,
                       order: str = "C") -> np.ndarray:
    """(n_events, n_channels) float64: ``data`` compensated by ``S`` (or None), then transformed.

    Only ``S``'s detectors change under compensation; each channel with a spec
    in ``transforms`` is mapped by that transform's ``forward``, the others keep
    their (compensated) values.  The result is the one full-size float64 matrix;
    ``data`` is never modified.  ``where`` (the file name) goes into errors.
    ``order``: "C" (rows contiguous: the density's row-wise gathers) or "F"
    (columns contiguous: what the app's plots and regions read; each channel
    is then written in place, with no strided writes and no second copy).
    """
    x = _as_events(data, "event values")
    names = list(names)
    if x.shape[1] != len(names):
        raise EventDataError(f"{where}: event values of shape {x.shape} do not match {len(names)} channels")
    check_transform_channels(names, transforms, where)
    det = checked_detectors(names, S, where) if S is not None else []
    values = np.empty(x.shape, order=order)
    for start in range(0, x.shape[0] if det else 0, BLOCK_EVENTS):   # in blocks: no full-size temporaries
        values[start:start + BLOCK_EVENTS, det] = compensate_columns(x[start:start + BLOCK_EVENTS], det, S)
    # one call per channel (the logicle's compiled solver runs in parallel over a whole column)
    for j, name in enumerate(names):
        spec = transforms.get(name)
        if spec is not None:
            values[:, j] = _forward(spec, values[:, j] if j in det else x[:, j])
        elif j not in det:
            values[:, j] = x[:, j]
    return values


#: Events per block of the row-wise passes (a block of 30 channels fits in a core's cache).
BLOCK_EVENTS = 1 << 14


def prepare_file_events(event_file, idx: Sequence[int], S, transforms: Mapping, values: np.ndarray, *,
                        drop_saturated: bool = True, drop_piles: bool = True, dequantise: bool = True,
                        random_state=0, where: str = "") -> PreparedEvents:
    """The density's events of ``event_file``'s columns ``idx`` (see :func:`core.analysis.density_input`).

    ``values``: :func:`transformed_values` of the file (the density columns
    that need no jitter are taken from it).  Reasons come from the raw values
    of the density channels and, when compensation mixes them, of the
    spillover detectors; only raw channels that feed the density and sit on a
    grid are jittered (or have kept piles spread), on the kept events, and
    their density columns compensated and transformed again.
    """
    raw = _as_events(event_file.data, "event values")
    names = list(event_file.channel_names)
    n, k = raw.shape
    detectors = checked_detectors(names, S, where) if S is not None else []
    # raw channels that feed the density: a compensated density channel mixes every detector
    mixes = S is not None and any(j in detectors for j in idx)
    feeders = sorted(set(idx) | (set(detectors) if mixes else set()))
    code, saturated, sat_cells, floor_cells, ceiling_cells = clean_events(
        raw, feeders, event_file.channel_ranges, drop_saturated=drop_saturated, drop_piles=drop_piles)
    kept = code == CODE_KEPT
    all_kept = bool(kept.all())
    decoding = getattr(event_file, "decoding", None)
    plans = {}
    if dequantise:
        kept_rows = None if all_kept else np.flatnonzero(kept)   # judged in place: only a sample is copied
        for j in feeders:
            plan = plan_jitter(raw[:, j], None if decoding is None else decoding[j], MAX_UNIQUE_FRACTION,
                               rows=kept_rows)
            if plan is not None:
                plans[j] = plan
    spread = set() if drop_piles else {j for j in feeders if any(
        j in cells and cells[j][kept].any() for cells in (floor_cells, ceiling_cells))}
    changed = set(plans) | spread

    def column(j: int) -> np.ndarray:
        """Raw channel j over the kept events (float64), jittered / piles spread as planned."""
        if j not in changed:
            return np.asarray(raw[:, j] if all_kept else raw[kept, j], dtype=np.float64)
        fl = floor_cells.get(j)
        ce = ceiling_cells.get(j)
        # uniforms are drawn for every event of the file, then the kept ones taken
        full = raw[:, j].astype(np.float64)
        if not all_kept:
            full[~kept] = 0.0
        out = jittered_column(full, j, plans.get(j), random_state, None if fl is None else fl & kept,
                              None if ce is None else ce & kept, spread_piles=j in spread)
        return out if all_kept else out[kept]

    matrix = np.empty((int(kept.sum()), len(idx)))
    redo = [c for c, j in enumerate(idx) if (j in changed) or (mixes and j in detectors and changed & set(detectors))]
    compensated = None
    if mixes and any(idx[c] in detectors for c in redo):
        compensated = np.empty((matrix.shape[0], len(detectors)))
        for c, d in enumerate(detectors):
            compensated[:, c] = column(d)
        compensated = compensate_columns(compensated, list(range(len(detectors))), S)
    copied = [c for c in range(len(idx)) if c not in redo]
    source = [idx[c] for c in copied]
    rows = None if all_kept else np.flatnonzero(kept)
    in_order = copied == list(range(len(idx)))
    for start in range(0, matrix.shape[0], BLOCK_EVENTS):   # gathered by blocks of whole rows
        block = values[start:start + BLOCK_EVENTS] if all_kept else values[rows[start:start + BLOCK_EVENTS]]
        taken = np.take(block, source, axis=1)
        if in_order:
            matrix[start:start + BLOCK_EVENTS] = taken
        else:
            for i, c in enumerate(copied):
                matrix[start:start + BLOCK_EVENTS, c] = taken[:, i]
    for c, j in enumerate(idx):
        if c not in redo:
            continue
        col = compensated[:, detectors.index(j)] if (compensated is not None and j in detectors) else column(j)
        spec = transforms.get(names[j])
        matrix[:, c] = _forward(spec, col) if spec is not None else col
    bad = non_finite_rows(matrix)   # in blocks: no full-size bool matrix
    if bad.any():
        code[np.flatnonzero(kept)[bad]] = CODE_NON_FINITE
        kept = code == CODE_KEPT
        matrix = matrix[~bad]
    steps = np.zeros(k)
    grids = [""] * k
    for j, plan in plans.items():
        steps[j], grids[j] = plan.step, plan.grid
    finite_rows = code != CODE_NON_FINITE
    return PreparedEvents(matrix=matrix, kept=kept, reason_code=code, steps=steps,
                          saturated=saturated & finite_rows,
                          saturated_per_channel=_per_channel(sat_cells, k, finite_rows), grids=grids,
                          floor_per_channel=_per_channel(floor_cells, k),
                          ceiling_per_channel=_per_channel(ceiling_cells, k),
                          from_values=tuple((c, idx[c]) for c in copied))


class ValuesAside:
    """The file's transformed values (n_events, n_channels) held without the columns
    the density matrix already holds, while the fit and the populations run.

    A density column copied from the values (``PreparedEvents.from_values``)
    equals them at the kept events, so only its removed events' values are
    kept here; every other channel is kept whole.  :meth:`restore` rebuilds
    the same array (bit for bit, same memory order) from the matrix.  At 1M
    events x 30 channels this frees 240 MB of 1M x 30 float64 during the fit.
    """

    def __init__(self, values: np.ndarray, prepared: PreparedEvents):
        n, k = values.shape
        self.shape, self.fortran = (n, k), bool(values.flags.f_contiguous and not values.flags.c_contiguous)
        self.kept = prepared.kept
        pairs = [(c, j) for c, j in prepared.from_values]
        self.matrix_cols = [c for c, _ in pairs]
        self.value_cols = [j for _, j in pairs]
        self.other_cols = [j for j in range(k) if j not in set(self.value_cols)]
        self.other = values[:, self.other_cols].copy()                 # (n, k - copied)
        self.removed_rows = np.flatnonzero(~self.kept)
        self.removed = values[self.removed_rows][:, self.value_cols]   # (n removed, copied)

    def restore(self, matrix: np.ndarray) -> np.ndarray:
        """The values (n_events, n_channels) again, from ``matrix`` (PreparedEvents.matrix).

        The allocator's freed pages go back to the system first
        (:func:`return_freed_memory`), so the new full-size array does not sit
        beside the fit's and the populations' freed temporaries.
        """
        n, k = self.shape
        return_freed_memory()
        values = np.empty((n, k), order="F" if self.fortran else "C")
        values[:, self.other_cols] = self.other
        if not self.value_cols:
            return values
        vcols, mcols = _as_slice(self.value_cols), _as_slice(self.matrix_cols)
        at = gone = 0                        # matrix rows and removed rows used so far
        for a in range(0, n, BLOCK_EVENTS):  # by blocks of whole rows, in file order
            b = min(n, a + BLOCK_EVENTS)
            keep = self.kept[a:b]
            nk = int(np.count_nonzero(keep))
            src = matrix[at:at + nk, mcols]
            if nk == b - a:
                values[a:b, vcols] = src
            else:
                block = np.empty((b - a, len(self.value_cols)))
                block[keep] = src
                block[~keep] = self.removed[gone:gone + (b - a - nk)]
                values[a:b, vcols] = block
            at += nk
            gone += b - a - nk
        return values


def _as_slice(cols: list):
    """``cols`` as a slice when they are consecutive (basic indexing: no gather), else as they are."""
    if cols and cols == list(range(cols[0], cols[0] + len(cols))):
        return slice(cols[0], cols[0] + len(cols))
    return cols


def _malloc_trim():
    """glibc's ``malloc_trim`` (None on other systems or C libraries)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        trim = ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):   # not glibc (e.g. musl has no malloc_trim)
        return None
    trim.argtypes, trim.restype = [ctypes.c_size_t], ctypes.c_int
    return trim


_TRIM = _malloc_trim()


def return_freed_memory() -> bool:
    """Hand the C allocator's freed memory back to the system; False where that is not possible.

    numpy arrays up to tens of MB are carved from the allocator's heaps, and
    numba's worker threads each keep their own; memory freed there stays
    resident until the heap is trimmed (glibc ``malloc_trim(0)``, which returns
    free pages of every heap).  At 1M events x 30 channels about 90 MB of the
    fit's and the populations' temporaries are returned this way before the
    values are rebuilt.  Takes well under a millisecond; changes no value.
    """
    if _TRIM is None:
        return False
    _TRIM(0)
    return True
