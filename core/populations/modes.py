"""Modes of a log density by hill climbing, saddles between them, and merging hills into populations."""

from __future__ import annotations

import math

import numpy as np

from .settings import MAX_STEP


def _hill_climb(score, starts: np.ndarray, f0: np.ndarray, step0: np.ndarray, iters: int = 60, probe=None):
    """Gradient ascent of ``score`` (log density) from each row of ``starts`` (m, d).

    Each round probes x +- h e_j on every channel (2 d points per row, one
    ``score`` call for all rows) with h half the row's current step: central
    differences give the gradient at the scale of the move, so the piecewise
    constant cells of a tree density (zero gradient inside a cell) do not stall
    it.  The row moves one step along the gradient, or to its best probe (a
    compass move) when that is higher; a move is kept only when the log
    density rises, and the step grows by 1.5 after a rise (up to
    :data:`MAX_STEP` of the channel scales, so a climb does not leap over a
    valley) and halves otherwise.  ``step0`` (d,) is a channel's scale; the
    first step is 0.05 of it.  ``probe(x, h) -> (m, 2 d)``: the log densities
    of the probes x + h_j e_j (columns j) and x - h_j e_j (columns d + j) in one
    call, equal to ``score`` of them (``AdditiveTreeDensity.score_probes``: about
    two evaluations per row instead of 2 d); None scores the probes with
    ``score``.  Returns (x (m, d), log density (m,))."""
    x = starts.copy()
    f = f0.copy()
    m, d = x.shape
    step = np.full(m, 0.05)
    rows = np.arange(m)
    for _ in range(iters):
        h = (0.5 * step)[:, None] * step0[None, :]             # (m, d)
        if probe is None:
            P = np.repeat(x, 2 * d, axis=0).reshape(m, 2 * d, d)
            P[:, np.arange(d), np.arange(d)] += h
            P[:, d + np.arange(d), np.arange(d)] -= h
            s = score(P.reshape(-1, d)).reshape(m, 2 * d)
        else:
            s = probe(x, h)
        g = (s[:, :d] - s[:, d:]) / (2 * h)                     # (m, d)
        gn = np.sqrt(((g * step0) ** 2).sum(axis=1))
        gn[gn == 0] = 1.0
        trial = x + step[:, None] * g * step0 ** 2 / gn[:, None]
        ft = score(trial)
        best = np.argmax(s, axis=1)
        probe_better = s[rows, best] > ft
        if probe is None:
            trial[probe_better] = P[rows, best][probe_better]
        else:   # the best probe: x with one channel moved by +-h
            r = np.flatnonzero(probe_better)
            c = best[r] % d
            moved = x[r, c] + np.where(best[r] < d, h[r, c], -h[r, c])
            trial[r] = x[r]
            trial[r, c] = moved
        ft[probe_better] = s[rows, best][probe_better]
        up = ft > f
        x[up], f[up] = trial[up], ft[up]
        step = np.where(up, np.minimum(step * 1.5, MAX_STEP), step * 0.5)
        if (step < 1e-4).all():
            break
    return x, f


def _spread_starts(Z: np.ndarray, f: np.ndarray, m: int, rng) -> list:
    """Up to ``m`` row indices of Z (events of one component, scaled): the
    highest-density one, then farthest-point picks (each the event farthest
    from those picked so far), on a seeded subsample of at most 4,000."""
    n = Z.shape[0]
    pool = np.arange(n) if n <= 4000 else np.sort(rng.choice(n, 4000, replace=False))
    first = int(np.argmax(f))
    if first not in set(pool.tolist()):
        pool = np.r_[first, pool]
    picked = [first]
    d = ((Z[pool] - Z[first]) ** 2).sum(axis=1)
    while len(picked) < min(m, pool.size):
        j = int(np.argmax(d))
        if d[j] <= 0:
            break
        picked.append(int(pool[j]))
        d = np.minimum(d, ((Z[pool] - Z[pool[j]]) ** 2).sum(axis=1))
    return picked


def _same_place(E: np.ndarray, f: np.ndarray, tol: float = 0.05) -> np.ndarray:
    """Node id per climb end (rows of E, scaled units): ends closer than ``tol``
    to a higher end already kept share its node."""
    order = np.lexsort((np.arange(f.size), -f))
    node = np.full(f.size, -1, dtype=np.int64)
    kept = []
    for i in order:
        for q, j in enumerate(kept):
            if np.sqrt(((E[i] - E[j]) ** 2).sum()) < tol:
                node[i] = q
                break
        else:
            node[i] = len(kept)
            kept.append(i)
    return node


def _saddles(score, modes: np.ndarray, n_points: int, scale: np.ndarray, neighbours: int = 12,
             bend_steps: int = 0, probe=None, peaks=None):
    """Edges (i, j, saddle) between each mode and its ``neighbours`` nearest modes
    (scaled distance; a neighbourhood graph): the lowest log density at
    ``n_points`` points of the straight segment between the two; ``probe`` as in
    :func:`_hill_climb` (the bent path's climb).  ``peaks`` (m,): the modes' log
    densities; a join whose straight segment stays at or above the lower of its two
    peaks needs no bent path (the merge takes min(saddle, peaks), so a higher
    saddle cannot change it), and only the other joins are bent."""
    m, d = modes.shape
    Z = modes / scale
    D = ((Z[:, None, :] - Z[None, :, :]) ** 2).sum(axis=2)
    np.fill_diagonal(D, np.inf)
    near = np.argsort(D, axis=1, kind="stable")[:, :min(neighbours, m - 1)]
    pairs = sorted({(min(i, int(j)), max(i, int(j))) for i in range(m) for j in near[i]})
    if not pairs:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0)
    iu = np.array([p[0] for p in pairs])
    ju = np.array([p[1] for p in pairs])
    t = np.linspace(0.0, 1.0, n_points)[1:-1]

    def lowest(a, b):
        pts = a[:, None, :] * (1 - t)[None, :, None] + b[:, None, :] * t[None, :, None]
        return score(pts.reshape(-1, d)).reshape(a.shape[0], t.size).min(axis=1)

    straight = lowest(modes[iu], modes[ju])
    if bend_steps <= 0:
        return iu, ju, straight
    # a bent path: the segment's midpoint moved up by a short hill climb, then
    # the two segments mode -> moved midpoint -> mode; any path's lowest point is
    # a lower bound of the true saddle, so the higher of the two is kept
    bend = np.arange(iu.size) if peaks is None else np.flatnonzero(straight < np.minimum(peaks[iu], peaks[ju]))
    saddle = straight.copy()
    if bend.size == 0:
        return iu, ju, saddle
    a, b = modes[iu[bend]], modes[ju[bend]]
    mid = 0.5 * (a + b)
    # each row climbs on its own (fewer than 10 rounds never reach the all-rows stop), so bending
    # only these joins gives each the same path as bending all of them
    top, _ = _hill_climb(score, mid, score(mid), scale, iters=bend_steps, probe=probe)
    bent = np.minimum(lowest(a, top), lowest(top, b))
    saddle[bend] = np.maximum(straight[bend], bent)
    return iu, ju, saddle


def _merge(peaks: np.ndarray, edges, ratio: float, above=None, min_events: float = 0.0) -> np.ndarray:
    """Group per mode by the persistence and runt-size rules (module docstring);
    ``edges`` (i, j, saddle) from :func:`_saddles`.  ``above(nodes, level)``:
    number of events of the modes ``nodes`` (list) whose log density exceeds
    ``level``; with ``min_events`` > 0, the smaller side of a join holding fewer
    such events merges whatever the depth of the saddle."""
    iu, ju, saddle = edges
    m = peaks.size
    parent = list(range(m))
    top = peaks.astype(float).copy()   # best peak of each root's group
    members = {i: [i] for i in range(m)}

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    s = np.minimum(saddle, np.minimum(peaks[iu], peaks[ju]))
    order = np.lexsort((ju, iu, -s))      # highest saddle first, ties by index (deterministic)
    depth = math.log(1.0 / ratio)
    for e in order:
        a, b = find(int(iu[e])), find(int(ju[e]))
        if a == b:
            continue
        runt = (min_events > 0 and above is not None
                and min(above(members[a], s[e]), above(members[b], s[e])) < min_events)
        if runt or min(top[a], top[b]) - s[e] <= depth:
            lo, hi = (a, b) if top[a] < top[b] or (top[a] == top[b] and a > b) else (b, a)
            parent[lo] = hi
            members[hi] = members[hi] + members.pop(lo)
    roots = [find(i) for i in range(m)]
    return np.unique(roots, return_inverse=True)[1]


def _node_of_events(Z: np.ndarray, hard: np.ndarray, starts: np.ndarray, owner: np.ndarray,
                    node: np.ndarray) -> np.ndarray:
    """Mode (node) per event of the subsample: the node reached from the nearest
    start (scaled units ``Z``) among the starts of the event's own component
    (``hard``, -1 background), as the assignment splits components."""
    out = np.zeros(Z.shape[0], dtype=np.int64)
    for k in np.unique(hard):
        ev = np.flatnonzero(hard == k)
        mine = np.flatnonzero(owner == k)
        if mine.size == 0:      # a component without starts: nearest start of all
            mine = np.arange(owner.size)
        S = Z[starts[mine]]
        for a in range(0, ev.size, 8192):
            E = Z[ev[a:a + 8192]]
            d2 = (E * E).sum(axis=1)[:, None] - 2.0 * E @ S.T + (S * S).sum(axis=1)[None, :]
            out[ev[a:a + 8192]] = node[mine[np.argmin(d2, axis=1)]]
    return out
