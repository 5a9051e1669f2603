"""Marker profiles of populations: per-population medians, channel splits, levels and names."""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np

from .settings import _MINUS, BRIGHT_ABOVE, DIM_BELOW, MIN_GAP


def population_stats(values: np.ndarray, labels: np.ndarray, n_populations: int):
    """Per population: counts (P,), channel medians (P, d) and robust standard
    deviations 1.4826 MAD (P, d); NaN rows for empty populations.  One stable
    sort of the events by label, then per channel one gathered column (n,)
    cut into contiguous slices: no copy of the whole matrix."""
    X = np.asarray(values)
    ok = np.flatnonzero(labels >= 0)
    lab = labels[ok]
    counts = np.bincount(lab, minlength=n_populations)
    rows = ok[np.argsort(lab, kind="stable")]
    bounds = np.concatenate([[0], np.cumsum(counts)])
    med = np.full((n_populations, X.shape[1]), np.nan)
    sd = np.full((n_populations, X.shape[1]), np.nan)
    for j in range(X.shape[1]):
        col = X[rows, j].astype(np.float64, copy=False)
        for p in range(n_populations):
            if counts[p]:
                block = col[bounds[p]:bounds[p + 1]]
                med[p, j] = np.median(block)
                sd[p, j] = 1.4826 * np.median(np.abs(block - med[p, j]))
    return counts, med, sd


def channel_splits(values: np.ndarray, labels: np.ndarray, n_populations: int, stats=None) -> list[dict]:
    """Per channel the profile rule's split (module docstring): ``threshold`` (None
    when no gap is wide enough), the levels ``neg`` and ``pos``, and ``gap`` in
    units of the two neighbouring populations' summed spread.  ``stats``:
    :func:`population_stats` of the same events when already computed."""
    counts, med, sd = stats if stats is not None else population_stats(values, labels, n_populations)
    pops = np.flatnonzero(counts >= 3)
    out = []
    for j in range(med.shape[1]):
        if pops.size < 2:
            out.append({"threshold": None, "neg": np.nan, "pos": np.nan, "gap": 0.0})
            continue
        meds = med[pops, j]
        spread = sd[pops, j]
        w = counts[pops].astype(float)
        order = np.argsort(meds, kind="stable")
        gaps = np.diff(meds[order])
        k = int(np.argmax(gaps))
        pair = spread[order[k]] + spread[order[k + 1]]
        gap = float(gaps[k] / pair) if pair > 0 else (np.inf if gaps[k] > 0 else 0.0)
        if gap < MIN_GAP:
            out.append({"threshold": None, "neg": np.nan, "pos": np.nan, "gap": gap})
            continue
        neg, pos = order[:k + 1], order[k + 1:]
        out.append({"threshold": float(0.5 * (meds[order[k]] + meds[order[k + 1]])),
                    "neg": float(_weighted_median(meds[neg], w[neg])),
                    "pos": float(_weighted_median(meds[pos], w[pos])), "gap": gap})
    return out


def _weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    o = np.argsort(v)
    c = np.cumsum(w[o])
    return float(v[o][np.searchsorted(c, 0.5 * c[-1])])


def marker_level(median: float, split: Mapping) -> str | None:
    """"-", "dim", "+" or "bright" for a population median on one channel (module
    docstring rule); None when the channel has no split."""
    if split["threshold"] is None or not np.isfinite(median):
        return None
    if median < split["threshold"]:
        return "-"
    span = split["pos"] - split["neg"]
    r = (median - split["neg"]) / span if span > 0 else 1.0
    return "dim" if r < DIM_BELOW else "bright" if r > BRIGHT_ABOVE else "+"


def profile_text(levels: Sequence[str], names: Sequence[str]) -> str:
    """"CD3+ CD4+ CD8−" from per-channel levels (None: channel left out)."""
    parts = []
    for lv, nm in zip(levels, names):
        if lv is None:
            continue
        parts.append(nm + (_MINUS if lv == "-" else lv))
    return " ".join(parts)
