"""Fitting tree measures (compiled): per-level histograms of the events in
each node, the best split of each node by the shrunk measure's gain, routing
events to children, and the two-level lookahead near the root.

Integer sums only in parallel loops, so serial and parallel runs agree.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit, prange

from .common import PARALLEL_MIN_WORK


class SplitRule(NamedTuple):
    """How :func:`best_splits` scores a split: shrinkage ``lr`` toward uniform,
    ``alpha`` pseudo-events of per-node shrinkage (< 0: global shrinkage),
    ``min_leaf`` fewest events per side, ``min_gain`` least gain (nats) and
    ``n_total`` the events of the whole tree (float)."""
    lr: float
    alpha: float
    min_leaf: int
    min_gain: float
    n_total: float


@njit(cache=True)
def _hist_rows(start, stop, R, node_of, box_lo, box_inv, n_bins, allowed, shift, hist):
    """Add the events start:stop to hist[node, dim, bin]: equal-width bins of each
    node's box, the grid shifted by ``shift[node]`` of a bin (n_bins + 1 bins;
    the first and last are partial when the shift is not 0)."""
    d = R.shape[1]
    for i in range(start, stop):
        k = node_of[i]
        if k < 0:
            continue
        for j in range(d):
            if not allowed[j]:
                continue
            b = int((R[i, j] - box_lo[k, j]) * box_inv[k, j] * n_bins + shift[k])
            if b < 0:
                b = 0
            elif b > n_bins:
                b = n_bins
            hist[k, j, b] += 1


@njit(cache=True, parallel=True)
def _hist_par(R, node_of, box_lo, box_inv, n_nodes, n_bins, allowed, shift, n_chunks):
    n, d = R.shape
    parts = np.zeros((n_chunks, n_nodes, d, n_bins + 1), np.int64)
    step = (n + n_chunks - 1) // n_chunks
    for c in prange(n_chunks):
        _hist_rows(c * step, min(n, (c + 1) * step), R, node_of, box_lo, box_inv, n_bins, allowed,
                   shift, parts[c])
    out = np.zeros((n_nodes, d, n_bins + 1), np.int64)
    for c in range(n_chunks):
        out += parts[c]
    return out


def level_histogram(R, node_of, box_lo, box_inv, n_nodes, n_bins, allowed, shift):
    """Counts of events per (node, dimension, equal-width bin of the node's extent).

    R: (n, d) events in the cube; node_of: (n,) node of each event at this
    level (-1: not in a node being split); box_lo/box_inv: (n_nodes, d) lower
    bound and 1/width of each node's box; allowed: (d,) bool dimensions to count.
    shift: (n_nodes,) offset of each node's bin grid in [0, 1) bins.
    Returns (n_nodes, d, n_bins + 1) int64.  Integer sums: order-independent, so
    serial and parallel runs give identical counts.
    """
    n, d = R.shape
    if n * d < PARALLEL_MIN_WORK:
        hist = np.zeros((n_nodes, d, n_bins + 1), np.int64)
        _hist_rows(0, n, R, node_of, box_lo, box_inv, n_bins, allowed, shift, hist)
        return hist
    return _hist_par(R, node_of, box_lo, box_inv, n_nodes, n_bins, allowed, shift, 4)


@njit(cache=True)
def node_theta(n_l, n_a, frac, lr, alpha):
    """Per-node shrunk probability of the left child: the conditional estimate
    with ``alpha`` pseudo-events spread uniformly, (n_L + alpha frac) / (n_A + alpha),
    mixed with the uniform frac at rate ``lr``.  Lies strictly in (0, 1) for
    lr < 1 or alpha > 0 when 0 < frac < 1: well-populated nodes learn
    nearly fully, sparse ones stay near uniform (scale-dependent shrinkage)."""
    return (1.0 - lr) * frac + lr * (n_l + alpha * frac) / (n_a + alpha)


@njit(cache=True)
def best_splits(hist, counts, vol, shift, allowed, rule):
    """Best split of each node by the gain in training log-likelihood of the shrunk model.

    The shrunk tree measure puts density (1 - lr) + lr * n_A / (N vol_A) on a
    leaf A; the gain of splitting A into L, R is
    n_L log f_L + n_R log f_R - n_A log f_A.
    With ``alpha >= 0`` the shrinkage is per node instead (see
    :func:`node_theta`) and the gain is the node's own term of the
    log-likelihood, n_L log(theta / frac) + n_R log((1 - theta) / (1 - frac)).
    ``rule``: a :class:`SplitRule`.
    Returns (best_dim, best_bin, best_gain, n_left) per node; best_dim = -1 when
    no split gains more than ``min_gain`` nats (and at least 1e-9) with at
    least ``min_leaf`` events on each side.
    hist has n_bins + 1 bins of a grid shifted by ``shift[node]`` (see
    :func:`level_histogram`); the split location is after bin ``best_bin``:
    cut = lo + (best_bin + 1 - shift) / n_bins * width.
    """
    lr, alpha, min_leaf, min_gain, n_total = rule.lr, rule.alpha, rule.min_leaf, rule.min_gain, rule.n_total
    n_nodes, d, n_b1 = hist.shape
    n_bins = n_b1 - 1
    best_dim = np.full(n_nodes, -1, np.int64)
    best_bin = np.zeros(n_nodes, np.int64)
    best_gain = np.zeros(n_nodes)
    n_left = np.zeros(n_nodes, np.int64)
    for k in range(n_nodes):
        n_a = counts[k]
        if n_a < 2 * min_leaf:
            continue
        scale = lr / (n_total * vol[k])
        f_a = (1.0 - lr) + scale * n_a
        base = n_a * math.log(f_a)
        g_best = max(min_gain, 1e-9)
        for j in range(d):
            if not allowed[j]:
                continue
            cum = 0
            n_cand = n_bins if shift[k] > 0.0 else n_bins - 1
            for b in range(n_cand):
                cum += hist[k, j, b]
                n_l = cum
                n_r = n_a - n_l
                if n_l < min_leaf:
                    continue
                if n_r < min_leaf:
                    break
                frac = (b + 1.0 - shift[k]) / n_bins
                if alpha >= 0.0:
                    th = node_theta(n_l, n_a, frac, lr, alpha)
                    g = n_l * math.log(th / frac) + n_r * math.log((1.0 - th) / (1.0 - frac))
                else:
                    f_l = (1.0 - lr) + scale * n_l / frac
                    f_r = (1.0 - lr) + scale * n_r / (1.0 - frac)
                    g = n_l * math.log(f_l) + n_r * math.log(f_r) - base
                if g > g_best:
                    g_best = g
                    best_dim[k] = j
                    best_bin[k] = b
                    n_left[k] = n_l
        best_gain[k] = g_best
    return best_dim, best_bin, best_gain, n_left


@njit(cache=True)
def route_events(R, node_of, split_dim, split_cut, child_left, child_right):
    """Move each event to its child at the next level (-1 when the child is a leaf)."""
    n = R.shape[0]
    for i in range(n):
        k = node_of[i]
        if k < 0:
            continue
        j = split_dim[k]
        if j < 0:
            node_of[i] = -1
        elif R[i, j] < split_cut[k]:
            node_of[i] = child_left[k]
        else:
            node_of[i] = child_right[k]

# ---------------------------------------------------------------- two-level lookahead

# After the marginal stage every single split of the root has almost no gain
# (each channel is already uniform): the dependence only shows once a second
# split conditions on the first.  Near the root, splits are therefore chosen
# by the gain of the split plus the best split of each of its two children.

@njit(cache=True)
def pair_histogram(R, node_of, k, box_lo, box_inv, n_bins, allowed, stride):
    """Joint counts H[j1, b1, j2, b2] of node ``k``'s events on equal-width bins
    of the node's box (n_bins per dimension), for allowed j1, j2; only every
    ``stride``-th event of the node is counted (cost n d^2 / stride)."""
    n, d = R.shape
    H = np.zeros((d, n_bins, d, n_bins), np.int64)
    bins = np.zeros(d, np.int64)
    seen = 0
    for i in range(n):
        if node_of[i] != k:
            continue
        seen += 1
        if (seen - 1) % stride != 0:
            continue
        for j in range(d):
            b = int((R[i, j] - box_lo[j]) * box_inv[j] * n_bins)
            if b < 0:
                b = 0
            elif b >= n_bins:
                b = n_bins - 1
            bins[j] = b
        for j1 in range(d):
            if not allowed[j1]:
                continue
            for j2 in range(d):
                if allowed[j2]:
                    H[j1, bins[j1], j2, bins[j2]] += 1
    return H


@njit(cache=True)
def _split_term(n_l, n_a, frac, lr, alpha):
    th = node_theta(n_l, n_a, frac, lr, alpha)
    g = 0.0
    if n_l > 0:
        g += n_l * math.log(th / frac)
    if n_a - n_l > 0:
        g += (n_a - n_l) * math.log((1.0 - th) / (1.0 - frac))
    return g


@njit(cache=True)
def _best_child_gain(counts, lo_bin, hi_bin, lr, alpha, min_leaf):
    """Best split gain of a child whose events along one dimension are counts[lo_bin:hi_bin]
    (the child's extent is exactly those bins)."""
    n_a = 0
    for b in range(lo_bin, hi_bin):
        n_a += counts[b]
    if n_a < 2 * min_leaf:
        return 0.0
    width = hi_bin - lo_bin
    best = 0.0
    cum = 0
    for b in range(lo_bin, hi_bin - 1):
        cum += counts[b]
        if cum < min_leaf:
            continue
        if n_a - cum < min_leaf:
            break
        g = _split_term(cum, n_a, (b + 1.0 - lo_bin) / width, lr, alpha)
        if g > best:
            best = g
    return best


@njit(cache=True)
def lookahead_split(H, lr, alpha, min_leaf, allowed):
    """Split of a node maximising its own gain plus the best gain of each child.

    H: pair histogram of the node (see :func:`pair_histogram`).  Returns
    (dim, bin, n_left, score); the cut is after ``bin``; dim = -1 if none.
    """
    d = H.shape[0]
    B = H.shape[1]
    best_score = 1e-9
    best_j, best_b, best_nl = -1, 0, 0
    marg = np.zeros(B, np.int64)
    row = np.zeros(B, np.int64)
    tot = np.zeros(B, np.int64)
    rest = np.zeros(B, np.int64)
    for j1 in range(d):
        if not allowed[j1]:
            continue
        for b in range(B):
            s = 0
            for c in range(B):
                s += H[j1, b, j1, c]
            marg[b] = s
        n_a = 0
        for b in range(B):
            n_a += marg[b]
        if n_a < 2 * min_leaf:
            continue
        child_l = np.zeros(B)
        child_r = np.zeros(B)
        for j2 in range(d):
            if not allowed[j2]:
                continue
            if j2 == j1:
                for b1 in range(B - 1):
                    gl = _best_child_gain(marg, 0, b1 + 1, lr, alpha, min_leaf)
                    gr = _best_child_gain(marg, b1 + 1, B, lr, alpha, min_leaf)
                    if gl > child_l[b1]:
                        child_l[b1] = gl
                    if gr > child_r[b1]:
                        child_r[b1] = gr
                continue
            for c in range(B):
                row[c] = 0
                s = 0
                for b in range(B):
                    s += H[j1, b, j2, c]
                tot[c] = s
            for b1 in range(B - 1):
                for c in range(B):
                    row[c] += H[j1, b1, j2, c]
                    rest[c] = tot[c] - row[c]
                gl = _best_child_gain(row, 0, B, lr, alpha, min_leaf)
                gr = _best_child_gain(rest, 0, B, lr, alpha, min_leaf)
                if gl > child_l[b1]:
                    child_l[b1] = gl
                if gr > child_r[b1]:
                    child_r[b1] = gr
        cum = 0
        for b1 in range(B - 1):
            cum += marg[b1]
            if cum < min_leaf:
                continue
            if n_a - cum < min_leaf:
                break
            score = _split_term(cum, n_a, (b1 + 1.0) / B, lr, alpha) + child_l[b1] + child_r[b1]
            if score > best_score:
                best_score = score
                best_j, best_b, best_nl = j1, b1, cum
    return best_j, best_b, best_nl, best_score

