"""The stored population definition and the assignment of events to its populations."""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ..density.gaussian_base import GaussianMixtureBase
from ..errors import EventDataError, RecipeError
from .settings import _CHUNK, DEFINITION_VERSION


@dataclass
class PopulationDefinition:
    """What assigns events to populations, storable in a recipe (JSON).

    ``columns``: indices (into the density channels) the mixture covers;
    ``mixture``: the mixture's arrays (lists); ``groups``: population id per
    mixture component; ``modes``: (n_populations, n_channels) mode locations;
    ``names``: a short name (the marker profile) per population.
    """

    channels: list
    columns: list
    mixture: dict
    groups: list
    modes: list
    names: list
    split: dict = field(default_factory=dict)
    scale: list = field(default_factory=list)
    version: int = DEFINITION_VERSION
    _mix: Any = field(default=None, repr=False, compare=False)

    @property
    def n_populations(self) -> int:
        return len(self.modes)

    def to_dict(self) -> dict:
        """The JSON-able stored form (deep copy)."""
        return {"version": self.version, "channels": list(self.channels), "columns": list(self.columns),
                "mixture": copy.deepcopy(self.mixture), "groups": list(self.groups),
                "modes": copy.deepcopy(self.modes), "names": list(self.names),
                "split": copy.deepcopy(self.split), "scale": list(self.scale)}

    @classmethod
    def from_dict(cls, d: Mapping) -> "PopulationDefinition":
        """Rebuild from :meth:`to_dict`'s form (RecipeError when malformed or newer)."""
        if not isinstance(d, Mapping) or "version" not in d:
            raise RecipeError("a population definition must be an object with a 'version'")
        v = d["version"]
        if not isinstance(v, int) or isinstance(v, bool) or v < 1:
            raise RecipeError(f"population definition version must be a whole number; got {v!r}")
        if v > DEFINITION_VERSION:
            raise RecipeError(f"the population definition has version {v}; this program reads up to "
                              f"{DEFINITION_VERSION}: upgrade to use it")
        need = ("channels", "columns", "mixture", "groups", "modes", "names")
        missing = [k for k in need if k not in d]
        if missing:
            raise RecipeError(f"the population definition lacks {', '.join(missing)}")
        out = cls(channels=list(d["channels"]), columns=[int(c) for c in d["columns"]],
                  mixture=copy.deepcopy(dict(d["mixture"])), groups=[int(g) for g in d["groups"]],
                  modes=copy.deepcopy(list(d["modes"])), names=[str(s) for s in d["names"]],
                  split=copy.deepcopy(dict(d.get("split") or {})), scale=[float(x) for x in d.get("scale") or []],
                  version=v)
        try:
            mix = out.mixture_model()
        except (KeyError, TypeError, ValueError) as exc:
            raise RecipeError(f"the population definition's mixture is invalid: {exc}") from exc
        if len(out.groups) != mix.n_components or (out.groups and not 0 <= min(out.groups)) \
                or (out.groups and max(out.groups) >= len(out.modes)) or len(out.names) != len(out.modes):
            raise RecipeError("the population definition's groups, modes and names do not agree")
        d_ch = len(out.channels)
        for k, sp in out.split.items():
            ok = ((k == "background" or (str(k).isdigit() and int(k) < mix.n_components))
                  and isinstance(sp, Mapping)
                  and len(sp.get("starts", [])) == len(sp.get("populations", [])) > 0
                  and all(len(x) == d_ch for x in sp["starts"])
                  and all(-1 <= int(q) < len(out.modes) for q in sp["populations"]))
            if not ok or len(out.scale) != d_ch:
                raise RecipeError("the population definition's split components are malformed")
        return out

    def mixture_model(self):
        """The stored mixture as a :class:`~core.density.gaussian_base.GaussianMixtureBase` (cached)."""
        if self._mix is None:
            m = self.mixture
            self._mix = GaussianMixtureBase(
                np.asarray(m["weights"], float), np.asarray(m["means"], float),
                np.asarray(m["covariances"], float), np.asarray(m["loc"], float),
                np.asarray(m["scale"], float),
                skew=None if m.get("skew") is None else np.asarray(m["skew"], float),
                background=None if m.get("background") is None else np.asarray(m["background"], float))
        return self._mix


def _mixture_dict(mix) -> dict:
    return {"weights": mix.weights.tolist(), "means": mix.means.tolist(),
            "covariances": mix.covariances.tolist(), "loc": mix.loc.tolist(), "scale": mix.scale.tolist(),
            "skew": None if mix.skew is None else mix.skew.tolist(),
            "background": None if mix.background is None else mix.background.tolist()}


# ---------------------------------------------------------------------------
# posteriors and assignment (compiled kernel)
# ---------------------------------------------------------------------------

def component_posteriors(mix, X) -> np.ndarray:
    """Posterior component probabilities (n, K + 1), background first, of events X (n, d)."""
    return mix.posteriors(X)


def _labels_from_posteriors(R: np.ndarray, G: np.ndarray, X: np.ndarray | None = None,
                            split: Mapping | None = None, scale=None) -> np.ndarray:
    P = R[:, 1:] @ G                            # (n, n_pop) population posteriors
    none = R[:, 0].copy()
    for k, sp in (split or {}).items():
        # a split component's share goes to the population of the nearest start (its basin)
        starts = np.asarray(sp["starts"], float) / scale
        Z = X / scale
        d2 = (Z * Z).sum(axis=1)[:, None] - 2.0 * Z @ starts.T + (starts * starts).sum(axis=1)[None, :]
        pop = np.asarray(sp["populations"], int)[np.argmin(d2, axis=1)]
        rows = np.flatnonzero(pop >= 0)
        if k == "background":
            P[rows, pop[rows]] += none[rows]
            none[rows] = 0.0
            continue
        k = int(k)
        P[:, int(np.argmax(G[k]))] -= R[:, k + 1]
        P[rows, pop[rows]] += R[rows, k + 1]
    lab = np.argmax(P, axis=1).astype(np.int64)
    lab[none >= P[np.arange(P.shape[0]), lab]] = -1
    return lab


def _group_matrix(groups: Sequence[int], n_pop: int) -> np.ndarray:
    G = np.zeros((len(groups), n_pop))
    G[np.arange(len(groups)), np.asarray(groups, int)] = 1.0
    return G


def assign_populations(definition: PopulationDefinition | Mapping, values) -> np.ndarray:
    """Population id per event (n_events,) int, -1 for none, of ``values``
    (n_events, n_channels: the definition's channels, transformed as its recipe says).

    Deterministic: the same events give the same labels.  Non-finite rows get -1.
    """
    if isinstance(definition, Mapping):
        definition = PopulationDefinition.from_dict(definition)
    X = np.asarray(values, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != len(definition.channels):
        raise EventDataError(f"population assignment: expected events x {len(definition.channels)} channels "
                             f"({', '.join(definition.channels)}), got shape {X.shape}")
    mix = definition.mixture_model()
    G = _group_matrix(definition.groups, definition.n_populations)
    cols = np.asarray(definition.columns, int)
    out = np.full(X.shape[0], -1, dtype=np.int64)
    ok = np.isfinite(X).all(axis=1)
    for a in range(0, X.shape[0], _CHUNK):
        sel = np.flatnonzero(ok[a:a + _CHUNK]) + a
        if sel.size:
            Xc = X[sel]
            out[sel] = _labels_from_posteriors(component_posteriors(mix, Xc[:, cols]), G, Xc,
                                               definition.split, np.asarray(definition.scale, float))
    return out
