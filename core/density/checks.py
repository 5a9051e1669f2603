"""Checks of the events the density engine is given (shapes, numbers, ranges),
the streaming chunks it scores, and the atom test of the automatic base.
Every problem raises :class:`~core.errors.EventDataError` with a message
that names the columns."""

from __future__ import annotations

import numpy as np

from ..errors import EventDataError

MIN_EVENTS = 50


def check_matrix(X, what: str, n_features: int | None = None, min_events: int = 0) -> np.ndarray:
    """Return X as a 2-D array (no copy when possible) after shape checks."""
    X = np.asarray(X)
    if X.ndim == 1 and n_features == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise EventDataError(f"{what}: expected a 2-D array of events x channels, got shape {X.shape}")
    if not np.issubdtype(X.dtype, np.number) or np.iscomplexobj(X):
        raise EventDataError(f"{what}: event values must be real numbers, got dtype {X.dtype}")
    if n_features is not None and X.shape[1] != n_features:
        raise EventDataError(
            f"{what}: the model was fitted on {n_features} channels but the events have "
            f"{X.shape[1]}; pass the same channels in the same order")
    if X.shape[0] < min_events:
        raise EventDataError(
            f"{what}: {X.shape[0]} events is too few to fit a density; at least {min_events} are needed")
    return X


def nonfinite_error(X: np.ndarray, what: str) -> EventDataError:
    bad = ~np.isfinite(X)
    rows = int(bad.any(axis=1).sum())
    cols = np.flatnonzero(bad.any(axis=0)).tolist()
    return EventDataError(
        f"{what}: {rows} event(s) have missing or infinite values (NaN/inf) in column(s) "
        f"{cols} (0-based); remove or clean them first (core.prepare.prepare_events does this)")


def chunk(X: np.ndarray, a: int, b: int, what: str) -> np.ndarray:
    """Rows a:b of X as a fresh C-contiguous float64 array (never a view of X)."""
    C = np.array(X[a:b], dtype=np.float64, order="C", copy=True)
    if not np.isfinite(C).all():
        raise nonfinite_error(X, what)
    return C


#: Largest |value| fit accepts: beyond it squares and products in float64 overflow.
MAX_ABS_VALUE = 1e100
#: A channel whose values vary by less than this share of their size is below
#: float64 resolution for the maps (the engine's scale floor is 1e-12 of the size).
MIN_RELATIVE_SPREAD = 1e-12
#: Scoring: values further than this many robust scales from a channel's centre are
#: scored as if at that distance (their log density is then below -1e40 nats).
FAR_SCALES = 1e40
#: Scoring: the lowest log density reported (float64 cannot go below -1.8e308).
LOG_DENSITY_FLOOR = -1e300
#: Most events :meth:`AdditiveTreeDensity.sample` draws in one call.
MAX_SAMPLE = 100_000_000


def check_value_range(X: np.ndarray) -> None:
    """Refuse events the engine cannot represent (EventDataError naming the channel):
    values beyond +-1e100, or a non-constant channel whose spread is below 1e-12 of its size."""
    if X.shape[0] == 0 or X.shape[1] == 0:
        return
    with np.errstate(all="ignore"):
        lo, hi = np.nanmin(X, axis=0).astype(np.float64), np.nanmax(X, axis=0).astype(np.float64)
        size = np.maximum(np.abs(lo), np.abs(hi))
        spread = hi - lo
    for j in range(X.shape[1]):
        if not np.isfinite(size[j]):
            continue  # NaN/inf: reported by the fit's own check, with counts
        if size[j] > MAX_ABS_VALUE:
            raise EventDataError(
                f"fit: column {j} (0-based) holds values up to {size[j]:.3g}; the density engine works with "
                f"values within +-{MAX_ABS_VALUE:g} (transform or rescale the channel first)")
        if 0 < spread[j] < MIN_RELATIVE_SPREAD * max(1.0, size[j]):
            raise EventDataError(
                f"fit: column {j} (0-based) varies by only {spread[j]:.3g} around {size[j]:.3g}, below what "
                "float64 resolves for a density; rescale the channel or leave it out")


#: With ``base="auto"``: a channel whose most frequent value holds at least this
#: share of the events has an atom, and the logistic base is tried as well.
ATOM_SHARE = 0.05
#: Events looked at (evenly strided) to find atoms.
_ATOM_SAMPLE = 50_000


def largest_atom_share(X) -> float:
    """Largest share of events (n_events, n_channels) sitting on one single value
    in any channel, from at most 50,000 evenly strided events; 0 for none."""
    X = np.asarray(X)
    step = max(1, X.shape[0] // _ATOM_SAMPLE)
    S = np.sort(X[::step], axis=0)
    n = S.shape[0]
    best = 0
    for j in range(S.shape[1]):
        col = S[:, j]
        starts = np.flatnonzero(np.concatenate([[True], col[1:] != col[:-1], [True]]))
        best = max(best, int(np.diff(starts).max()))
    return best / n if n else 0.0
