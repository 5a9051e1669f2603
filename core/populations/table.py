"""The populations result and its table (counts, shares with intervals, profiles)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from ..transforms import Transform, make_transform
from .definition import PopulationDefinition, assign_populations
from .profiles import channel_splits, marker_level, population_stats, profile_text
from .settings import check_settings


@dataclass
class Populations:
    """Result of :func:`find_populations` (or of counting a definition on a file).

    ``labels`` (n_events,) population id (-1 none); ``table`` one dict per
    population in display order (rare first); ``definition`` the stored form's
    object; ``info`` details of the search (components, modes, base).
    """

    labels: np.ndarray
    table: list
    definition: PopulationDefinition
    info: dict = field(default_factory=dict)

    def mask(self, pop_id: int) -> np.ndarray:
        return self.labels == int(pop_id)

    @property
    def rare_ids(self) -> list:
        return [r["id"] for r in self.table if r["rare"]]


def _share_ci(count: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Clopper-Pearson ("exact") interval of a share ``count`` / ``n``: the
    quantiles alpha/2 of Beta(count, n - count + 1) and 1 - alpha/2 of
    Beta(count + 1, n - count) (0 and 1 at the ends), the interval
    ``scipy.stats.binomtest(...).proportion_ci(method="exact")`` finds by root
    search; the closed form needs scipy.special only (scipy.stats takes ~2 s to import)."""
    # imported here: scipy.special adds ~0.3 s to importing core.analysis; only the table needs it
    from scipy.special import betaincinv

    if n <= 0:
        return (float("nan"), float("nan"))
    k, n = int(count), int(n)
    half = 0.5 * (1.0 - confidence)
    lo = 0.0 if k == 0 else float(betaincinv(k, n - k + 1, half))
    hi = 1.0 if k == n else float(betaincinv(k + 1, n - k, 1.0 - half))
    return lo, hi


def population_table(values: np.ndarray, labels: np.ndarray, definition: PopulationDefinition,
                     channel_names: Sequence[str], channel_labels: Sequence[str] | None = None,
                     transforms: Mapping | None = None, settings: Mapping | None = None,
                     splits: list | None = None) -> list:
    """One record per population of ``definition`` counted on ``values``/``labels``
    (see the module docstring for the fields), rare populations first."""
    st = check_settings(settings)
    X = np.asarray(values, dtype=np.float64)
    n = X.shape[0]
    names = [(lab or "").strip() or nm for nm, lab in
             zip(channel_names, channel_labels or [""] * len(channel_names))]
    stats = population_stats(X, labels, definition.n_populations)
    if splits is None:
        splits = channel_splits(X, labels, definition.n_populations, stats)
    inv = []
    for nm in channel_names:
        spec = (transforms or {}).get(nm)
        if spec is None:
            inv.append(None)
        else:
            inv.append(spec if isinstance(spec, Transform) else make_transform(dict(spec)))
    counts, medians, _ = stats
    rows = []
    for p in range(definition.n_populations):
        c = int(counts[p])
        med = medians[p]
        orig = np.array([float(t.inverse(np.array([v]))[0]) if (t is not None and np.isfinite(v)) else float(v)
                         for v, t in zip(med, inv)])
        levels = [marker_level(float(med[j]), splits[j]) for j in range(X.shape[1])]
        share = c / n if n else float("nan")
        lo, hi = _share_ci(c, n)
        positive = [(lv, nm) for lv, nm in zip(levels, names) if lv not in (None, "-")]
        rows.append({"id": p, "profile": profile_text(levels, names) or f"population {p + 1}",
                     "short_profile": (profile_text([lv for lv, _ in positive], [nm for _, nm in positive])
                                       or ("no marker +" if any(lv == "-" for lv in levels)
                                           else f"population {p + 1}")),
                     "count": c, "share": share, "share_low": lo, "share_high": hi,
                     "rare": bool(c > 0 and share < st["rare_share"]),
                     "caution": bool(c < st["caution_events"]),
                     "mode": [float(v) for v in definition.modes[p]],
                     "median": {nm: float(v) for nm, v in zip(channel_names, med)},
                     "median_original": {nm: float(v) for nm, v in zip(channel_names, orig)},
                     "levels": {nm: lv for nm, lv in zip(names, levels) if lv is not None}})
    rows.sort(key=lambda r: (0, r["share"], r["id"]) if r["rare"] else (1, -r["share"], r["id"]))
    return rows


def count_populations(definition: PopulationDefinition | Mapping, values, channel_names,
                      channel_labels=None, transforms=None, settings=None) -> Populations:
    """Apply a stored definition to other events: labels and table (same population ids)."""
    if isinstance(definition, Mapping):
        definition = PopulationDefinition.from_dict(definition)
    labels = assign_populations(definition, values)
    table = population_table(values, labels, definition, channel_names, channel_labels, transforms, settings)
    return Populations(labels=labels, table=table, definition=definition,
                       info={"matched": True, "settings": check_settings(settings)})
