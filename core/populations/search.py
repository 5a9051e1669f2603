"""Finding populations: the modes of a fitted density, merged at their saddles."""

from __future__ import annotations

import math

import numpy as np

from ..density.gaussian_base import GaussianMixtureBase
from ..errors import Cancelled, EventDataError
from ..progress import keep_going
from .definition import (PopulationDefinition, _group_matrix, _labels_from_posteriors, _mixture_dict,
                         assign_populations, component_posteriors)
from .modes import _hill_climb, _merge, _node_of_events, _saddles, _same_place, _spread_starts
from .settings import BEND_STEPS, MODES_ON, check_settings
from .table import Populations, population_table


def _mixture_for(model, X: np.ndarray, seed: int):
    """The model's mixture base and the columns it covers; fitted here when the model has none."""
    mix = getattr(model, "_gmm", None)
    frozen = np.asarray(getattr(model, "_frozen", np.zeros(X.shape[1], bool)), bool)
    cols = np.flatnonzero(~frozen)
    if cols.size == 0:
        raise EventDataError("populations: every density channel is constant; there is nothing to cluster")
    if mix is not None:
        return mix, cols, "model"
    Xc = X[:, cols]
    med = np.median(Xc, axis=0)
    q1, q3 = np.percentile(Xc, [25, 75], axis=0)
    scale = np.maximum((q3 - q1) / (2.0 * math.log(3.0)), 1e-12 * np.maximum(1.0, np.abs(med)))
    mix = GaussianMixtureBase.fit(Xc, med, scale, random_state=seed, skew=True, flat_background=True)
    return mix, cols, "fitted here"


def _column_iqr(X: np.ndarray) -> np.ndarray:
    """Inter-quartile range (d,) of each column of X (n, d), one column at a time
    (a copy of one column, not of the matrix; the same values as np.percentile
    over axis 0)."""
    out = np.empty(X.shape[1])
    for j in range(X.shape[1]):
        q1, q3 = np.percentile(X[:, j], [25, 75])
        out[j] = q3 - q1
    return out


def find_populations(model, values, channel_names, channel_labels=None, transforms=None,
                     settings=None, log_density=None, progress=None) -> Populations:
    """Populations of events ``values`` (n_events, n_channels; the model's channels,
    transformed) as the modes of the fitted ``model`` (see the module docstring).

    ``channel_names`` ($PnN) and ``channel_labels`` ($PnS, may hold "") per column;
    ``transforms`` {name: spec or Transform} for medians in original units;
    ``settings`` over :data:`DEFAULT_SETTINGS`; ``log_density`` (n_events,) the
    model's scores of ``values`` when already computed; ``progress(step, total,
    info)`` is called between stages (False stops: :class:`core.errors.Cancelled`).
    Deterministic for ``settings['random_state']``.
    """
    return _find(model, values, channel_names, channel_labels, transforms, settings, log_density, progress,
                 fused=False)[1]


def find_populations_and_score(model, values, channel_names, channel_labels=None, transforms=None,
                               settings=None, progress=None):
    """:func:`find_populations` of every event of ``values`` and the model's log
    density of each, (Populations, log density (n_events,)): for a model that is a
    skewed mixture alone (``model.scores_with_posteriors``) one compiled pass over
    the events gives both the log density and the posteriors that assign them
    (:func:`score_and_assign`), where scoring then assigning takes two.  The same
    populations, labels and log densities (bit for bit) as ``model.score_samples``
    followed by :func:`find_populations` with that log density."""
    scores, pops = _find(model, values, channel_names, channel_labels, transforms, settings, None, progress,
                         fused=bool(getattr(model, "scores_with_posteriors", False)))
    if scores is None:
        scores = model.score_samples(values)
    return pops, scores


def _scored_with_posteriors(model, X, mix, cols):
    """Log density (n,) and posteriors (n, K + 1) of events X in one pass (fused models)."""
    R = np.empty((X.shape[0], mix.n_components + 1))

    def keep(a, b, Rc):
        R[a:b] = Rc if Rc is not None else component_posteriors(mix, X[a:b][:, cols])
    ld = model.score_samples(X, posteriors=keep)
    return ld, R


#: Events per pass of :func:`score_and_assign` over the events not scored yet.
_REST_CHUNK = 1 << 16


def score_and_assign(model, definition: PopulationDefinition, values, known=None):
    """Population labels (n_events,) and the model's log density (n_events,) of
    ``values`` from one compiled pass per chunk of events (``model.score_samples``
    with its posteriors; see :func:`find_populations_and_score`); labels are those
    of :func:`assign_populations`.  ``known``: (rows (sorted), their log densities,
    their posteriors (rows, K + 1)) already computed by the same pass (the mode
    search's subsample): those rows are not scored again (same values: each
    event's score and posteriors depend on that event alone)."""
    X = np.asarray(values, dtype=np.float64)
    labels = np.full(X.shape[0], -1, dtype=np.int64)
    mix = definition.mixture_model()
    G = _group_matrix(definition.groups, definition.n_populations)
    cols = np.asarray(definition.columns, int)
    scale = np.asarray(definition.scale, float)

    def assign(a, b, R, Xc=None, rows=None):
        Xc = X[a:b] if Xc is None else Xc
        if R is None:
            R = component_posteriors(mix, Xc[:, cols])
        labels[slice(a, b) if rows is None else rows] = _labels_from_posteriors(R, G, Xc, definition.split, scale)
    if known is None:
        scores = model.score_samples(X, posteriors=assign)
        return labels, scores
    rows, ld, R = known
    scores = np.empty(X.shape[0])
    scores[rows] = ld
    for a in range(0, rows.size, _REST_CHUNK):
        r = rows[a:a + _REST_CHUNK]
        assign(0, 0, R[a:a + _REST_CHUNK], X[r], r)
    rest = np.ones(X.shape[0], dtype=bool)
    rest[rows] = False
    rest = np.flatnonzero(rest)
    for a in range(0, rest.size, _REST_CHUNK):
        r = rest[a:a + _REST_CHUNK]
        Xr = X[r]
        scores[r] = model.score_samples(Xr, posteriors=lambda p, q, Rc, Xr=Xr, r=r: assign(
            0, 0, Rc, Xr[p:q], r[p:q]))
    return labels, scores


def _find(model, values, channel_names, channel_labels, transforms, settings, log_density, progress,
          fused: bool):
    st = check_settings(settings)
    X = np.ascontiguousarray(values, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != len(channel_names):
        raise EventDataError(f"populations: values of shape {X.shape} do not match {len(channel_names)} channels")
    if not np.isfinite(X).all():
        raise EventDataError("populations: some events have missing or infinite values; pass the cleaned events")
    n, d = X.shape
    rng = np.random.default_rng(st["random_state"])
    total = 4

    def going(step, what):
        if not keep_going(progress, step, total, {"stage": what}):
            raise Cancelled("finding populations was stopped")

    going(0, "Populations: mixture components")
    mix, cols, origin = _mixture_for(model, X, st["random_state"])
    K = mix.n_components
    fused = fused and origin == "model" and MODES_ON == "model"
    probe = None
    if origin == "model" and MODES_ON == "model":
        score = model.score_samples
        probe = getattr(model, "score_probes", None)   # the climbs' axis probes in one pass
    else:
        # a tree density on the per-channel map is piecewise constant: nearly every
        # cell is a local maximum, so modes and saddles are taken on the smooth
        # mixture fitted to the same events (module docstring)
        def score(Z):
            return mix.logpdf(np.ascontiguousarray(Z[:, cols]))
        log_density = None

    # a seeded subsample starts the mode search
    sub = np.arange(n) if n <= st["mode_events"] else np.sort(rng.choice(n, st["mode_events"], replace=False))
    Xs = X[sub]
    if log_density is None and fused:
        ld, R = _scored_with_posteriors(model, Xs, mix, cols)
    else:
        ld = np.asarray(log_density, float)[sub] if log_density is not None else score(Xs)
        R = component_posteriors(mix, Xs[:, cols])
    hard = np.argmax(R, axis=1) - 1                     # -1 background
    going(1, "Populations: modes of the density")
    scale = np.maximum(_column_iqr(X), 1e-9)
    starts, owner = [], []
    for k in range(-1, K):          # -1: the events the background holds
        idx = np.flatnonzero(hard == k)
        if idx.size == 0:
            continue
        for i in _spread_starts(Xs[idx] / scale, ld[idx], st["starts_per_component"], rng):
            starts.append(idx[i])
            owner.append(k)
    if not starts:
        raise EventDataError("populations: no event belongs to any mixture component")
    starts = np.asarray(starts)
    owner = np.asarray(owner)
    ends, peaks = _hill_climb(score, Xs[starts], ld[starts], scale, probe=probe)
    # climbs that ended at the same place found the same mode
    node = _same_place(ends / scale, peaks)
    n_nodes = int(node.max()) + 1
    top = np.array([np.flatnonzero(node == q)[np.argmax(peaks[node == q])] for q in range(n_nodes)])
    modes, node_peaks = ends[top], peaks[top]
    going(2, "Populations: saddles between modes")
    edges = _saddles(score, modes, st["segment_points"], scale, bend_steps=BEND_STEPS, probe=probe,
                     peaks=node_peaks)
    # runt size: events of each mode's basin, sorted by log density
    ev_node = _node_of_events(Xs / scale, hard, starts, owner, node)
    by_node = [np.sort(ld[ev_node == q]) for q in range(n_nodes)]

    def above(nodes, level):
        return sum(int(by_node[q].size - np.searchsorted(by_node[q], level, side="right")) for q in nodes)

    min_ev = st["min_events"] * Xs.shape[0] / n      # in the subsample's events
    node_group = _merge(node_peaks, edges, st["merge_ratio"], above, min_ev)
    start_pop = node_group[node]
    n_pop = int(node_group.max()) + 1
    # each component goes to the population its starts reached; a component whose
    # starts reached several populations is split into the basins of its starts
    groups = np.full(K, -1, dtype=np.int64)
    split: dict = {}
    comp_pops = set(start_pop[owner >= 0].tolist())
    bg = owner < 0
    bg_only = [int(q) if q not in comp_pops else -1 for q in start_pop[bg]]
    if any(q >= 0 for q in bg_only):
        # hills reached only from the background's events: populations the mixture has no component for
        split["background"] = {"starts": Xs[starts[bg]].tolist(), "populations": bg_only}
    for k in np.unique(owner[owner >= 0]):
        sel = owner == k
        pops_k = np.unique(start_pop[sel])
        groups[k] = np.bincount(start_pop[sel]).argmax()
        if pops_k.size > 1:
            split[str(int(k))] = {"starts": Xs[starts[sel]].tolist(), "populations": start_pop[sel].tolist()}
    if (groups < 0).any():
        # components holding no event join the population of the component they overlap most
        Pk = R[:, 1:]
        has = np.flatnonzero(groups >= 0)
        for k in np.flatnonzero(groups < 0):
            i = int(np.argmax(Pk[:, k]))
            groups[k] = groups[has[np.argmax(Pk[i, has])]]
    pop_modes, pop_peaks = [], []
    for p in range(n_pop):
        members = np.flatnonzero(node_group == p)
        best = members[np.argmax(node_peaks[members])]
        pop_modes.append(modes[best])
        pop_peaks.append(float(node_peaks[best]))
    definition = PopulationDefinition(channels=list(channel_names), columns=[int(c) for c in cols],
                                      mixture=_mixture_dict(mix), groups=[int(g) for g in groups],
                                      modes=[[float(v) for v in m] for m in pop_modes],
                                      names=[""] * n_pop, split=split, scale=[float(v) for v in scale])
    definition._mix = mix
    going(3, "Populations: assigning events")
    if fused:   # the subsample's scores and posteriors are reused, the other events scored
        labels, scores = score_and_assign(model, definition, X, known=(sub, ld, R))
    else:
        labels, scores = assign_populations(definition, X), None
    table = population_table(X, labels, definition, channel_names, channel_labels, transforms, st)
    for r in table:
        definition.names[r["id"]] = r["profile"]
    going(4, "Populations: done")
    return scores, Populations(labels=labels, table=table, definition=definition,
                       info={"components": K, "components_with_events": int(np.unique(owner[owner >= 0]).size),
                             "mixture": origin, "starts": int(starts.size), "modes": n_nodes,
                             "mode_events": np.bincount(ev_node, minlength=n_nodes).tolist(),
                             "mode_peaks": node_peaks.tolist(),
                             "split_components": len(split),
                             "peaks": pop_peaks, "settings": st})
