"""Compiled hot loops of the additive tree density (numba, float64).

Array conventions (shared with :mod:`core.density.tree`):

* Event matrices are ``(n_events, n_channels)`` C-contiguous float64, in the
  unit cube for the tree kernels.
* A *forest* is a flat set of split nodes.  ``roots[t]`` is the index of tree
  ``t``'s root node (-1 for a tree without splits).  For node ``m``:
  ``dim[m]`` split dimension, ``cut[m]`` split location,
  ``mid[m] = lo + theta (hi - lo)`` the image of the cut, where [lo, hi] is
  the node's extent along ``dim[m]``.  Per side (``code = 2 m + side``,
  side 0 left of the cut): ``child[code]`` (-1 for a leaf) and the local CDF
  piece ``v -> base + (v - anchor) * slope`` with ``lslope = log(slope)``
  (left: base = anchor = lo, slope = theta (hi-lo)/(cut-lo); right:
  base = mid, anchor = cut, slope = (1-theta)(hi-lo)/(hi-cut)).

Every kernel is deterministic: parallel loops only split work over events
(each event's result is computed by one thread in a fixed order) or sum
integer counts.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange


#: Events per parallel work block in the per-event kernels.
BLOCK = 512
#: Deepest path a tree may have (path buffers are this long).
MAX_PATH = 64
#: Below this many (events x cost units) a kernel runs on one thread: thread
#: start-up costs more than it saves, and a busy machine makes it worse.
PARALLEL_MIN_WORK = 400_000


@njit(cache=True)
def _forest_forward_rows(start, stop, U, logd, roots, dim, cut, child, base, anchor, slope, lslope):
    """Apply the tree-CDFs of trees ``roots`` in order to rows start:stop of ``U`` in place.

    U: (n, d) float64 points in the cube, overwritten by their images.
    logd: (n,) float64, the log-density of each tree at the point it was
    applied to is added (sum of log slopes along the root-to-leaf path).
    Each tree: find the path top-down, then apply the moves bottom-up.
    Side arrays are indexed by ``code = 2 * node + side`` (side 0 left of
    the cut, 1 right): on that side the node maps v to
    ``base + (v - anchor) * slope``.  Trees are the outer loop so a block of
    events gives the processor independent work to overlap.
    """
    n_trees = roots.shape[0]
    path = np.empty(MAX_PATH, np.int64)
    for t in range(n_trees):
        root = roots[t]
        if root < 0:
            continue
        for i in range(start, stop):
            node = root
            k = 0
            while node >= 0:
                code = 2 * node + (1 if U[i, dim[node]] >= cut[node] else 0)
                path[k] = code
                k += 1
                node = child[code]
            acc = 0.0
            for q in range(k - 1, -1, -1):
                code = path[q]
                j = dim[code >> 1]
                U[i, j] = base[code] + (U[i, j] - anchor[code]) * slope[code]
                acc += lslope[code]
            logd[i] += acc


@njit(cache=True)
def _forest_inverse_rows(start, stop, U, roots, dim, mid, child, base, anchor, slope):
    """Undo :func:`forest_forward` on rows start:stop in place: trees last to first,
    each root first (the root's inverse move decides which child the point came from)."""
    n_trees = roots.shape[0]
    for t in range(n_trees - 1, -1, -1):
        root = roots[t]
        if root < 0:
            continue
        for i in range(start, stop):
            node = root
            while node >= 0:
                j = dim[node]
                v = U[i, j]
                right = v >= mid[node]
                code = 2 * node + (1 if right else 0)
                w = anchor[code] + (v - base[code]) / slope[code]
                c = anchor[2 * node + 1]  # the cut
                if right:
                    if w < c:
                        w = c
                elif w > c:
                    w = c
                U[i, j] = w
                node = child[code]


@njit(cache=True)
def _log_sigmoid_pair(z):
    """log(sigma(z)) + log(sigma(-z)) = log of the logistic density at z, stably."""
    a = abs(z)
    return -a - 2.0 * math.log1p(math.exp(-a))


@njit(cache=True)
def _logistic_cdf(z):
    """sigma(z) = 1 / (1 + exp(-z)), without overflow for either sign of z."""
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True)
def _base_forward_rows(start, stop, X, U, logd, loc, scale, log_scale):
    """Per-channel logistic map R -> (0, 1): u = sigma((x - loc) / scale).

    X: (n, d) values in the units of the data; U: (n, d) output in [0, 1];
    logd: (n,) the log-Jacobian  sum_j [log sigma'(z_j) - log scale_j]  is added.
    """
    d = X.shape[1]
    for i in range(start, stop):
        acc = 0.0
        for j in range(d):
            z = (X[i, j] - loc[j]) / scale[j]
            U[i, j] = _logistic_cdf(z)
            acc += _log_sigmoid_pair(z) - log_scale[j]
        logd[i] += acc


@njit(cache=True)
def _base_inverse_rows(start, stop, U, X, loc, scale):
    """Inverse of :func:`base_forward`: x = loc + scale * logit(u); u = 0 or 1 give -inf/+inf."""
    d = U.shape[1]
    for i in range(start, stop):
        for j in range(d):
            u = U[i, j]
            if u <= 0.0:
                X[i, j] = -np.inf
            elif u >= 1.0:
                X[i, j] = np.inf
            else:
                X[i, j] = loc[j] + scale[j] * (math.log(u) - math.log1p(-u))


@njit(cache=True)
def _pwl_forward_rows(start, stop, U, logd, offsets, xs, ys, slopes, log_slopes):
    """Per-channel monotone piecewise-linear maps of [0, 1] onto itself, in place.

    Channel j uses knots ``xs[offsets[j]:offsets[j+1]]`` (increasing, 0 .. 1),
    values ``ys`` at the knots and the exact slope of each piece
    (``slopes``/``log_slopes`` are indexed by the piece's left knot).
    """
    d = U.shape[1]
    for i in range(start, stop):
        acc = 0.0
        for j in range(d):
            a = offsets[j]
            b = offsets[j + 1]
            if b - a < 2:
                continue
            u = U[i, j]
            # last knot <= u, restricted to a piece index in [a, b-2]
            k = np.searchsorted(xs[a:b], u, side="right") - 1
            if k < 0:
                k = 0
            if k > b - a - 2:
                k = b - a - 2
            p = a + k
            v = ys[p] + (u - xs[p]) * slopes[p]
            if v < 0.0:
                v = 0.0
            elif v > 1.0:
                v = 1.0
            U[i, j] = v
            acc += log_slopes[p]
        logd[i] += acc


@njit(cache=True)
def _pwl_inverse_rows(start, stop, U, offsets, xs, ys, slopes):
    """Inverse of :func:`pwl_forward` in place."""
    d = U.shape[1]
    for i in range(start, stop):
        for j in range(d):
            a = offsets[j]
            b = offsets[j + 1]
            if b - a < 2:
                continue
            v = U[i, j]
            k = np.searchsorted(ys[a:b], v, side="right") - 1
            if k < 0:
                k = 0
            if k > b - a - 2:
                k = b - a - 2
            p = a + k
            u = xs[p] + (v - ys[p]) / slopes[p]
            if u < xs[p]:
                u = xs[p]
            elif u > xs[p + 1]:
                u = xs[p + 1]
            U[i, j] = u


# ---------------------------------------------------------------- rotations

_SQRT1_2 = 0.7071067811865476
_INV_SQRT_2PI = 0.3989422804014327
_LOG_SQRT_2PI = 0.9189385332046727  # log(sqrt(2 pi))
#: probit input is kept in [U_EPS, 1 - U_EPS] (|z| <= 8.2); beyond that the
#: normal CDF itself rounds to 0 or 1 in float64.
U_EPS = 1e-16


@njit(cache=True)
def ndtr(z):
    """Standard normal CDF (via erfc, accurate in the lower tail)."""
    return 0.5 * math.erfc(-z * _SQRT1_2)


@njit(cache=True)
def ndtri(p):
    """Inverse of the standard normal CDF for p in (0, 1).

    Start: Abramowitz & Stegun 26.2.23 rational approximation (|error| < 4.5e-4,
    coefficients from memory); then two Halley steps on Q(z) = 0.5 erfc(z / sqrt 2)
    = q, each of which cubes the error, to full double precision."""
    if p < 0.5:
        q = p
    else:
        q = 1.0 - p
    t = math.sqrt(-2.0 * math.log(q))
    z = t - (2.515517 + t * (0.802853 + t * 0.010328)) / (1.0 + t * (1.432788 + t * (0.189269 + t * 0.001308)))
    for _ in range(2):
        e = 0.5 * math.erfc(z * _SQRT1_2) - q
        w = e / (_INV_SQRT_2PI * math.exp(-0.5 * z * z))
        z = z + w / (1.0 - 0.5 * w * z)
    if p < 0.5:
        return -z
    return z


@njit(cache=True)
def _rotate_rows(start, stop, U, Q):
    """u -> Phi(Q Phi^-1(u)) for rows start:stop in place (Q orthogonal, d x d).

    The Jacobian determinant is exactly 1: prod phi(z') / prod phi(z) with
    |z'| = |z| (an orthogonal map preserves the standard normal density)."""
    d = U.shape[1]
    z = np.empty(d)
    for i in range(start, stop):
        for j in range(d):
            u = U[i, j]
            if u < U_EPS:
                u = U_EPS
            elif u > 1.0 - U_EPS:
                u = 1.0 - U_EPS
            z[j] = ndtri(u)
        for a in range(d):
            acc = 0.0
            for b in range(d):
                acc += Q[a, b] * z[b]
            U[i, a] = ndtr(acc)


@njit(cache=True, parallel=True)
def _rotate_par(U, Q):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _rotate_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, Q)


def rotate(U, Q):
    """Apply u -> Phi(Q Phi^-1(u)) to U (n, d) in place (inverse: pass Q.T)."""
    if _parallel(U.shape[0], 30 * U.shape[1]):
        _rotate_par(U, Q)
    else:
        _rotate_rows(0, U.shape[0], U, Q)


@njit(cache=True, parallel=True)
def probit_matrix(U):
    """Phi^-1 of every entry (clipped to [U_EPS, 1 - U_EPS]); returns a new (n, d) array."""
    n, d = U.shape
    Z = np.empty((n, d))
    for i in prange(n):
        for j in range(d):
            u = min(max(U[i, j], U_EPS), 1.0 - U_EPS)
            Z[i, j] = ndtri(u)
    return Z


# ---------------------------------------------------------------- fitting

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
def best_splits(hist, counts, vol, lr, n_total, min_leaf, allowed, alpha, shift, min_gain):
    """Best split of each node by the gain in training log-likelihood of the shrunk model.

    The shrunk tree measure puts density (1 - lr) + lr * n_A / (N vol_A) on a
    leaf A; the gain of splitting A into L, R is
    n_L log f_L + n_R log f_R - n_A log f_A.
    With ``alpha >= 0`` the shrinkage is per node instead (see
    :func:`node_theta`) and the gain is the node's own term of the
    log-likelihood, n_L log(theta / frac) + n_R log((1 - theta) / (1 - frac)).
    Returns (best_dim, best_bin, best_gain, n_left) per node; best_dim = -1 when
    no split gains more than ``min_gain`` nats (and at least 1e-9) with at
    least ``min_leaf`` events on each side.
    hist has n_bins + 1 bins of a grid shifted by ``shift[node]`` (see
    :func:`level_histogram`); the split location is after bin ``best_bin``:
    cut = lo + (best_bin + 1 - shift) / n_bins * width.
    """
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


# ---------------------------------------------------------------- drivers
# Each per-event kernel has a serial body (``_*_rows``) and a parallel driver
# that hands blocks of BLOCK events to threads; results are identical because
# every event is computed by exactly one thread in the same order.

@njit(cache=True, parallel=True)
def _forest_forward_par(U, logd, roots, dim, cut, child, base, anchor, slope, lslope):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _forest_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, logd, roots, dim, cut, child,
                             base, anchor, slope, lslope)


@njit(cache=True, parallel=True)
def _forest_inverse_par(U, roots, dim, mid, child, base, anchor, slope):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _forest_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, roots, dim, mid, child, base,
                             anchor, slope)


@njit(cache=True, parallel=True)
def _base_forward_par(X, U, logd, loc, scale, log_scale):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _base_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, U, logd, loc, scale, log_scale)


@njit(cache=True, parallel=True)
def _base_inverse_par(U, X, loc, scale):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _base_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, X, loc, scale)


@njit(cache=True, parallel=True)
def _pwl_forward_par(U, logd, offsets, xs, ys, slopes, log_slopes):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _pwl_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, logd, offsets, xs, ys, slopes,
                          log_slopes)


@njit(cache=True, parallel=True)
def _pwl_inverse_par(U, offsets, xs, ys, slopes):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _pwl_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, offsets, xs, ys, slopes)


def _parallel(n_events, cost):
    return n_events * cost >= PARALLEL_MIN_WORK


def forest_forward(U, logd, roots, dim, cut, child, base, anchor, slope, lslope):
    """Apply trees ``roots`` in order to U (n, d) in place; add their log densities to logd (n,)."""
    args = (U, logd, roots, dim, cut, child, base, anchor, slope, lslope)
    if _parallel(U.shape[0], 4 * roots.shape[0]):
        _forest_forward_par(*args)
    else:
        _forest_forward_rows(0, U.shape[0], *args)


def forest_inverse(U, roots, dim, mid, child, base, anchor, slope):
    """Undo :func:`forest_forward` in place (trees last to first, each root first)."""
    args = (U, roots, dim, mid, child, base, anchor, slope)
    if _parallel(U.shape[0], 4 * roots.shape[0]):
        _forest_inverse_par(*args)
    else:
        _forest_inverse_rows(0, U.shape[0], *args)


def base_forward(X, U, logd, loc, scale, log_scale):
    """Per-channel logistic map into (0, 1); see :func:`_base_forward_rows`."""
    args = (X, U, logd, loc, scale, log_scale)
    if _parallel(X.shape[0], 8 * X.shape[1]):
        _base_forward_par(*args)
    else:
        _base_forward_rows(0, X.shape[0], *args)


def base_inverse(U, X, loc, scale):
    """Inverse of :func:`base_forward`."""
    if _parallel(U.shape[0], 8 * U.shape[1]):
        _base_inverse_par(U, X, loc, scale)
    else:
        _base_inverse_rows(0, U.shape[0], U, X, loc, scale)


def pwl_forward(U, logd, offsets, xs, ys, slopes, log_slopes):
    """Per-channel monotone piecewise-linear maps in place; see :func:`_pwl_forward_rows`."""
    args = (U, logd, offsets, xs, ys, slopes, log_slopes)
    if _parallel(U.shape[0], 8 * U.shape[1]):
        _pwl_forward_par(*args)
    else:
        _pwl_forward_rows(0, U.shape[0], *args)


def pwl_inverse(U, offsets, xs, ys, slopes):
    """Inverse of :func:`pwl_forward` in place."""
    if _parallel(U.shape[0], 8 * U.shape[1]):
        _pwl_inverse_par(U, offsets, xs, ys, slopes)
    else:
        _pwl_inverse_rows(0, U.shape[0], U, offsets, xs, ys, slopes)


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


# ------------------------------------------------------------ Gaussian-mixture base

# The mixture kernels use numpy's error model (IEEE results, no Python
# ZeroDivisionError checks) so their loops over components can be vectorised;
# no division in them can meet a zero divisor (scales and sds are positive).

#: |(x - centre) / scale| is clipped here before a skew transform, so its square stays finite.
_SKEW_XT_MAX = 1e150


@njit(cache=True, error_model="numpy")
def _softplus(u):
    """log(1 + exp(u)), stably."""
    if u > 0.0:
        return u + math.log1p(math.exp(-u))
    return math.log1p(math.exp(u))


@njit(cache=True, error_model="numpy")
def _bg_logpdf(x, j, bgp, flat, z_max):
    """Log density of the mixture's background component in channel j at x.

    ``flat`` False: logistic, bgp[:, j] = (loc, scale, log scale, ...).
    ``flat`` True: share 1 - eta a flat top with soft edges, the uniform on
    [a, b] convolved with a logistic of scale s:
    (sigma((x - a)/s) - sigma((x - b)/s)) / (b - a), computed as
    log sigma(u_a) + log sigma(-u_b) + log(1 - exp(-(b - a)/s)) - log(b - a)
    (no cancellation); share eta the logistic of (loc, scale), which bounds
    the penalty of an event beyond a thin edge.  bgp[:, j] = (a, b, s,
    log(1 - exp(-(b - a)/s)) - log(b - a) + log(1 - eta), loc, scale,
    log scale - log eta, eta, and rows 8, 9 the linear-space factors
    (1 - eta)(1 - exp(-(b - a)/s)) / (b - a) and eta / scale)."""
    if flat:
        ua = min(max((x - bgp[0, j]) / bgp[2, j], -z_max), z_max)
        ub = min(max((x - bgp[1, j]) / bgp[2, j], -z_max), z_max)
        zb = min(max((x - bgp[4, j]) / bgp[5, j], -z_max), z_max)
        # in linear space first (one exp and one log where the density is not
        # tiny; sigma(u) is taken as 1 beyond u = 40, a change below 4e-18)
        sa = 1.0 if ua > 40.0 else 1.0 / (1.0 + math.exp(-ua))
        sb = 1.0 if ub < -40.0 else 1.0 / (1.0 + math.exp(ub))
        e = math.exp(-abs(zb))
        dens = bgp[8, j] * sa * sb + bgp[9, j] * e / ((1.0 + e) * (1.0 + e))
        if dens > 1e-280:
            return math.log(dens)
        # far tails: in log space
        lf = bgp[3, j] - _softplus(-ua) - _softplus(ub)
        ll = _log_sigmoid_pair(zb) - bgp[6, j]
        if lf >= ll:
            return lf + math.log1p(math.exp(ll - lf))
        return ll + math.log1p(math.exp(lf - ll))
    zb = min(max((x - bgp[0, j]) / bgp[1, j], -z_max), z_max)
    return _log_sigmoid_pair(zb) - bgp[2, j]


@njit(cache=True, error_model="numpy")
def _bg_cdf(x, j, bgp, flat, z_max):
    """CDF of the background component in channel j at x (see :func:`_bg_logpdf`);
    the flat top's is s / (b - a) (softplus(u_a) - softplus(u_b))."""
    if flat:
        ua = min(max((x - bgp[0, j]) / bgp[2, j], -z_max), z_max)
        ub = min(max((x - bgp[1, j]) / bgp[2, j], -z_max), z_max)
        c = bgp[2, j] / (bgp[1, j] - bgp[0, j]) * (_softplus(ua) - _softplus(ub))
        c = min(max(c, 0.0), 1.0)
        zb = min(max((x - bgp[4, j]) / bgp[5, j], -z_max), z_max)
        return (1.0 - bgp[7, j]) * c + bgp[7, j] * _logistic_cdf(zb)
    return _logistic_cdf(min(max((x - bgp[0, j]) / bgp[1, j], -z_max), z_max))


@njit(cache=True, error_model="numpy")
def _skew_y(x, skew, j, k):
    """Component k's sinh-arcsinh transform of channel j at x:
    ``y = sinh(asinh(t) - eps)`` with ``t = (x - centre) / scale``, and
    ``J = scale * dy/dx = cosh(eps) - t sinh(eps) / sqrt(1 + t^2)`` (in
    [exp(-|eps|), exp(|eps|)], always positive).  ``skew`` (4, d, K) holds centre,
    1/scale, cosh(eps) and sinh(eps).  Returns (y, J)."""
    t = (x - skew[0, j, k]) * skew[1, j, k]
    t = min(max(t, -_SKEW_XT_MAX), _SKEW_XT_MAX)
    r = math.sqrt(1.0 + t * t)
    return t * skew[2, j, k] - r * skew[3, j, k], skew[2, j, k] - t * skew[3, j, k] / r


@njit(cache=True, error_model="numpy")
def _skew_x(y, skew, j, k):
    """Inverse of :func:`_skew_y`: the x whose transform is y."""
    return skew[0, j, k] + (y * skew[2, j, k] + math.sqrt(1.0 + y * y) * skew[3, j, k]) / skew[1, j, k]


@njit(cache=True, error_model="numpy")
def _gmm_forward_rows(start, stop, X, U, logd, logw, means, chol, sd, log_sd, bgp, flat,
                      u_clip, z_max, want_u, skewed, skew):
    """Rosenblatt map of background + K Gaussians (see core.density.gaussian_base).

    X: (n, d) events; U: (n, d) output in [u_clip, 1 - u_clip]; logd: (n,) the
    mixture's log density is added.  logw: (K + 1,) log weights (background
    first); means (K, d); chol (K, d, d) lower Cholesky factors; sd, log_sd:
    (d, K) their diagonals; bgp (4, d), flat: the background (:func:`_bg_logpdf`).
    ``want_u=False`` skips the CDFs (U is not touched): the mixture's log
    density alone, bit-identical to the log-Jacobian of the full map (skewed
    mixtures score with :func:`_skew_logpdf_rows` instead).
    ``skewed``: each component's Gaussian is on its own sinh-arcsinh transform
    of the channels (``skew``, see :func:`_skew_y`; means and chol are then in
    the transformed units and log_sd includes log(scale)); else ``skew`` is unused.
    """
    K, d = means.shape
    lw = np.empty(K + 1)
    z = np.empty((K, d))
    lj = np.zeros(K)
    for i in range(start, stop):
        for k in range(K + 1):
            lw[k] = logw[k]
        for j in range(d):
            x = X[i, j]
            lbg = _bg_logpdf(x, j, bgp, flat, z_max)
            for k in range(K):
                m = means[k, j]
                for q in range(j):
                    m += chol[k, j, q] * z[k, q]
                y = x
                if skewed:
                    y, jac = _skew_y(x, skew, j, k)
                    lj[k] = math.log(jac)
                z[k, j] = min(max((y - m) / sd[j, k], -z_max), z_max)
            if not want_u:
                lw[0] += lbg
                for k in range(K):
                    lw[k + 1] += -0.5 * z[k, j] * z[k, j] - _LOG_SQRT_2PI - log_sd[j, k] + lj[k]
                continue
            mx = lw[0]
            for k in range(1, K + 1):
                mx = max(mx, lw[k])
            # posterior-weighted conditional CDFs; a component whose weight is below
            # exp(-40) ~ 4e-18 of the largest changes u by less than float64 resolution
            s = 0.0
            acc = 0.0
            for k in range(K + 1):
                g = lw[k] - mx
                if g < -40.0:
                    continue
                p = math.exp(g)
                s += p
                if k == 0:
                    c = _bg_cdf(x, j, bgp, flat, z_max)
                else:
                    c = ndtr(z[k - 1, j])
                acc += p * c
            u = acc / s
            U[i, j] = min(max(u, u_clip), 1.0 - u_clip)
            lw[0] += lbg
            for k in range(K):
                lw[k + 1] += -0.5 * z[k, j] * z[k, j] - _LOG_SQRT_2PI - log_sd[j, k] + lj[k]
        mx = lw[0]
        for k in range(1, K + 1):
            mx = max(mx, lw[k])
        s = 0.0
        for k in range(K + 1):
            s += math.exp(lw[k] - mx)
        logd[i] += mx + math.log(s)


@njit(cache=True, error_model="numpy")
def _skew_logpdf_rows(start, stop, X, logd, logw, means_t, chol_t, inv_sd, log_sd, bgp, flat,
                      z_max, skew, R):
    """Log density of a mixture with skewed components (added to logd), laid out
    with the component index innermost so the compiler can vectorise over
    components: means_t (d, K), chol_t (d, d, K) (chol_t[j, q, k] = L_k[j, q]),
    inv_sd, log_sd (d, K) (log_sd includes log scale of the transform), skew
    (4, d, K).  The same density as :func:`_gmm_forward_rows` with
    ``want_u=False`` (to ~1e-14; the per-channel factors dy/dx are multiplied,
    each within exp(+-|eps|), and one log is taken per component).  When R
    has rows (n, K + 1), each event's posterior component probabilities
    (background first) are written there too: the E step of the fit."""
    d, K = means_t.shape
    want_r = R.shape[0] > 0
    lw = np.empty(K)
    m = np.empty(K)
    jp = np.empty(K)
    z = np.empty((d, K))
    start_k = np.empty(K)  # log weight minus the normal constants and log sds of all channels
    for k in range(K):
        start_k[k] = logw[k + 1] - d * _LOG_SQRT_2PI
        for j in range(d):
            start_k[k] -= log_sd[j, k]
    for i in range(start, stop):
        lw0 = logw[0]
        for k in range(K):
            lw[k] = start_k[k]
            jp[k] = 1.0
        for j in range(d):
            x = X[i, j]
            lw0 += _bg_logpdf(x, j, bgp, flat, z_max)
            for k in range(K):
                m[k] = means_t[j, k]
            for q in range(j):
                for k in range(K):
                    m[k] += chol_t[j, q, k] * z[q, k]
            for k in range(K):
                y, jac = _skew_y(x, skew, j, k)
                jp[k] *= jac
                zz = min(max((y - m[k]) * inv_sd[j, k], -z_max), z_max)
                z[j, k] = zz
                lw[k] -= 0.5 * zz * zz
        mx = lw0
        for k in range(K):
            lw[k] += math.log(jp[k])
            mx = max(mx, lw[k])
        acc = math.exp(lw0 - mx)
        for k in range(K):
            lw[k] = math.exp(lw[k] - mx)
            acc += lw[k]
        logd[i] += mx + math.log(acc)
        if want_r:
            inv = 1.0 / acc
            R[i, 0] = math.exp(lw0 - mx) * inv
            for k in range(K):
                R[i, k + 1] = lw[k] * inv


@njit(cache=True, parallel=True, error_model="numpy")
def _skew_logpdf_par(X, logd, logw, means_t, chol_t, inv_sd, log_sd, bgp, flat, z_max, skew, R):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _skew_logpdf_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, logd, logw, means_t, chol_t, inv_sd,
                          log_sd, bgp, flat, z_max, skew, R)


def skew_logpdf(X, logd, logw, means_t, chol_t, inv_sd, log_sd, bgp, flat, z_max, skew, R=None):
    """Log density of the skewed-component mixture added to logd; with R (n, K + 1)
    also the posterior component probabilities; see :func:`_skew_logpdf_rows`."""
    if R is None:
        R = np.empty((0, means_t.shape[1] + 1))
    args = (X, logd, logw, means_t, chol_t, inv_sd, log_sd, bgp, bool(flat), float(z_max), skew, R)
    d, K = means_t.shape
    if _parallel(X.shape[0], (K + 1) * d * (d + 10)):
        _skew_logpdf_par(*args)
    else:
        _skew_logpdf_rows(0, X.shape[0], *args)


@njit(cache=True, parallel=True, error_model="numpy")
def _gmm_forward_par(X, U, logd, logw, means, chol, sd, log_sd, bgp, flat, u_clip, z_max,
                     want_u, skewed, skew):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _gmm_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, U, logd, logw, means, chol, sd, log_sd,
                          bgp, flat, u_clip, z_max, want_u, skewed, skew)


#: ``skew`` argument of the mixture kernels for a mixture without skew transforms.
NO_SKEW = np.zeros((4, 1, 1))


def gmm_forward(X, U, logd, logw, means, chol, sd, log_sd, bgp, flat, u_clip, z_max,
                want_u=True, skew=None):
    """Rosenblatt map of the Gaussian-mixture base; see :func:`_gmm_forward_rows`.
    ``want_u=False``: only the log density (U is not touched, its CDFs not computed).
    ``skew``: (4, d, K) per-component transforms (see :func:`_skew_y`) or None."""
    skewed = skew is not None
    args = (X, U, logd, logw, means, chol, sd, log_sd, bgp, bool(flat), float(u_clip), float(z_max),
            bool(want_u), skewed, skew if skewed else NO_SKEW)
    K, d = means.shape
    cost = (4 if want_u else 1) * (K + 1) * d * (d + 2 + (8 if skewed else 0))
    if _parallel(X.shape[0], cost):
        _gmm_forward_par(*args)
    else:
        _gmm_forward_rows(0, X.shape[0], *args)


def gmm_logpdf(X, logd, logw, means, chol, sd, log_sd, bgp, flat, z_max):
    """Log density of the Gaussian-mixture base (Gaussian components) added to logd:
    :func:`gmm_forward` without its CDFs."""
    gmm_forward(X, np.empty((0, X.shape[1])), logd, logw, means, chol, sd, log_sd, bgp, flat,
                0.0, z_max, want_u=False)


@njit(cache=True, error_model="numpy")
def _gmm_inverse_rows(start, stop, U, X, logw, means, chol, sd, log_sd, bgp, flat,
                      u_clip, z_max, skewed, skew):
    """Inverse of :func:`_gmm_forward_rows`: coordinate by coordinate, the root of
    the conditional mixture CDF F(x) = u by Newton steps safeguarded by a bracket
    (the components' own quantiles enclose the mixture quantile; when Newton
    leaves it, false position with the Illinois rule once both ends' residuals
    are known, else bisection: 6.7 instead of 11.4 steps per coordinate on a
    32-component fit), to a relative step of 1e-13.  u is clipped to
    [u_clip, 1 - u_clip]; components below exp(-40) of the largest posterior
    weight are left out, as in the forward map.  With ``skewed`` a component's
    conditional CDF is Phi((y_k(x) - mean) / sd), y_k its monotone skew
    transform, and its quantile is mapped back through the inverse transform."""
    K, d = means.shape
    lw = np.empty(K + 1)
    z = np.empty((K, d))
    mean = np.empty(K)
    p = np.empty(K + 1)
    for i in range(start, stop):
        for k in range(K + 1):
            lw[k] = logw[k]
        for j in range(d):
            u = min(max(U[i, j], u_clip), 1.0 - u_clip)
            for k in range(K):
                m = means[k, j]
                for q in range(j):
                    m += chol[k, j, q] * z[k, q]
                mean[k] = m
            mx = lw[0]
            for k in range(1, K + 1):
                mx = max(mx, lw[k])
            s = 0.0
            for k in range(K + 1):
                g = lw[k] - mx
                p[k] = math.exp(g) if g >= -40.0 else 0.0
                s += p[k]
            qn = ndtri(u)
            lu = math.log(u) - math.log1p(-u)
            if flat:
                # the flat top's quantile lies between a + s logit(u) and b + s logit(u),
                # the background's between those and its logistic share's quantile
                ql = bgp[4, j] + bgp[5, j] * lu
                qb_lo = min(bgp[0, j] + bgp[2, j] * lu, ql)
                qb_hi = max(bgp[1, j] + bgp[2, j] * lu, ql)
            else:
                qb_lo = bgp[0, j] + bgp[1, j] * lu
                qb_hi = qb_lo
            lo = np.inf
            hi = -np.inf
            x = 0.0
            for k in range(K + 1):
                if p[k] == 0.0:
                    continue
                p[k] /= s
                if k == 0:
                    lo = min(lo, qb_lo)
                    hi = max(hi, qb_hi)
                    x += p[0] * 0.5 * (qb_lo + qb_hi)
                    continue
                q = mean[k - 1] + sd[j, k - 1] * qn
                if skewed:
                    q = _skew_x(q, skew, j, k - 1)
                lo = min(lo, q)
                hi = max(hi, q)
                x += p[k] * q
            x = min(max(x, lo), hi)
            rlo = 0.0  # F - u at lo and hi once known (0: not yet)
            rhi = 0.0
            side = 0
            for _ in range(200):
                F = 0.0
                f = 0.0
                for k in range(K + 1):
                    if p[k] == 0.0:
                        continue
                    if k == 0:
                        F += p[0] * _bg_cdf(x, j, bgp, flat, z_max)
                        f += p[0] * math.exp(_bg_logpdf(x, j, bgp, flat, z_max))
                    else:
                        y = x
                        dydx = 1.0
                        if skewed:
                            y, jac = _skew_y(x, skew, j, k - 1)
                            dydx = jac * skew[1, j, k - 1]
                        zk = (y - mean[k - 1]) / sd[j, k - 1]
                        F += p[k] * ndtr(zk)
                        f += p[k] * math.exp(-0.5 * zk * zk - _LOG_SQRT_2PI) / sd[j, k - 1] * dydx
                r = F - u
                if r == 0.0:
                    break
                if r < 0.0:
                    lo = x
                    rlo = r
                    if side == -1:
                        rhi *= 0.5  # Illinois: the end kept twice in a row counts half
                    side = -1
                else:
                    hi = x
                    rhi = r
                    if side == 1:
                        rlo *= 0.5
                    side = 1
                xn = x - r / f if f > 0.0 else lo - 1.0
                if not (xn > lo and xn < hi):
                    # Newton left the bracket: false position on it once both ends
                    # are known (Illinois), else halve it
                    if rlo < 0.0 and rhi > 0.0:
                        xn = lo + (hi - lo) * (-rlo) / (rhi - rlo)
                    if not (xn > lo and xn < hi):
                        xn = 0.5 * (lo + hi)
                step = abs(xn - x)
                x = xn
                tol = 1e-13 * max(1.0, abs(x))
                if step <= tol or hi - lo <= tol:
                    break
            X[i, j] = x
            lw[0] += _bg_logpdf(x, j, bgp, flat, z_max)
            for k in range(K):
                y = x
                ljk = 0.0
                if skewed:
                    y, jac = _skew_y(x, skew, j, k)
                    ljk = math.log(jac)
                zk = min(max((y - mean[k]) / sd[j, k], -z_max), z_max)
                z[k, j] = zk
                lw[k + 1] += -0.5 * zk * zk - _LOG_SQRT_2PI - log_sd[j, k] + ljk


@njit(cache=True, parallel=True, error_model="numpy")
def _gmm_inverse_par(U, X, logw, means, chol, sd, log_sd, bgp, flat, u_clip, z_max,
                     skewed, skew):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _gmm_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, X, logw, means, chol, sd, log_sd,
                          bgp, flat, u_clip, z_max, skewed, skew)


def gmm_inverse(U, X, logw, means, chol, sd, log_sd, bgp, flat, u_clip, z_max, skew=None):
    """Inverse Rosenblatt map of the Gaussian-mixture base; see :func:`_gmm_inverse_rows`."""
    skewed = skew is not None
    args = (U, X, logw, means, chol, sd, log_sd, bgp, bool(flat), float(u_clip), float(z_max),
            skewed, skew if skewed else NO_SKEW)
    K, d = means.shape
    if _parallel(U.shape[0], 40 * (K + 1) * d * (d + 2)):
        _gmm_inverse_par(*args)
    else:
        _gmm_inverse_rows(0, U.shape[0], *args)


# ------------------------------------------------------------ Gaussian-mixture EM

#: A component whose log weight x density falls this far below the best one
#: seen for an event is left out of that event's E step: its responsibility
#: is below exp(-40) ~ 4e-18 (the moments already skip those below 1e-13), and
#: its share of the event's log-likelihood is below float64 resolution.
EM_PRUNE = 40.0


@njit(cache=True, error_model="numpy")
def _em_stats_rows(start, stop, X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint):
    """E step for rows start:stop and their responsibility-weighted sums.

    X (n, d) events; bg (n,) log density of each event under the background
    component; logw (K + 1,) log weights (background first); means (K, d);
    chol (K, d, d) lower Cholesky factors; log_det (K,) sum of the log
    diagonals.  Adds to acc_n (K + 1,) the responsibilities, to acc_s (K, d)
    sum r (x - mean_k), to acc_m (K, d, d) (lower triangle) sum r (x - mean_k)(x - mean_k)^T,
    and to ll_out[0] the log-likelihood of the rows.  Centring on the current
    means keeps the second moments free of cancellation.

    Pruning: components are visited starting at ``hint[i]`` (the event's most
    probable component in the previous call; updated here).  The squared
    Mahalanobis distance only grows channel by channel, so a component whose
    partial log term already lies ``EM_PRUNE`` nats below the best so far is
    abandoned (responsibility < exp(-40), left out exactly as the moments
    leave out those below 1e-13).
    """
    K, d = means.shape
    lp = np.empty(K + 1)
    live = np.zeros(K, np.bool_)
    D = np.empty((K, d))
    z = np.empty(d)
    inv_diag = np.empty((K, d))
    for k in range(K):
        for j in range(d):
            inv_diag[k, j] = 1.0 / chol[k, j, j]
    ll = 0.0
    half_d_log2pi = d * _LOG_SQRT_2PI
    for i in range(start, stop):
        lp[0] = logw[0] + bg[i]
        mx = lp[0]
        k0 = hint[i]
        best = k0
        for t in range(K):
            k = k0 + t
            if k >= K:
                k -= K
            c = logw[k + 1] - log_det[k] - half_d_log2pi
            floor = mx - EM_PRUNE
            q = 0.0
            ok = True
            for j in range(d):
                D[k, j] = X[i, j] - means[k, j]
                v = D[k, j]
                for a in range(j):
                    v -= chol[k, j, a] * z[a]
                v *= inv_diag[k, j]
                z[j] = v
                q += v * v
                if c - 0.5 * q < floor:
                    ok = False
                    break
            live[k] = ok
            if ok:
                lp[k + 1] = c - 0.5 * q
                if lp[k + 1] > mx:
                    mx = lp[k + 1]
                    best = k
        s = 0.0
        lp[0] = math.exp(lp[0] - mx)
        s += lp[0]
        for k in range(K):
            if live[k]:
                lp[k + 1] = math.exp(lp[k + 1] - mx)
                s += lp[k + 1]
        hint[i] = best
        ll += mx + math.log(s)
        inv = 1.0 / s
        acc_n[0] += lp[0] * inv
        for k in range(K):
            if not live[k]:
                continue
            r = lp[k + 1] * inv
            if r < 1e-13:
                continue  # its share of any moment is below float64 resolution of the sums
            acc_n[k + 1] += r
            for j in range(d):
                rv = r * D[k, j]
                acc_s[k, j] += rv
                for a in range(j + 1):
                    acc_m[k, j, a] += rv * D[k, a]
    ll_out[0] += ll


@njit(cache=True, parallel=True, error_model="numpy")
def _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint):
    n = X.shape[0]
    nb = acc_n.shape[0]
    step = (n + nb - 1) // nb
    for b in prange(nb):
        _em_stats_rows(b * step, min(n, (b + 1) * step), X, bg, logw, means, chol, log_det,
                       acc_n[b], acc_s[b], acc_m[b], ll_out[b], hint)


def em_stats(X, bg, logw, means, chol, log_det, n_parts=16, hint=None):
    """One E step over all events with the M step's sufficient statistics.

    Returns (total log-likelihood, N (K + 1,), S (K, d), M (K, d, d) symmetric):
    responsibilities summed per component, and per Gaussian component the
    responsibility-weighted first and second moments of (x - means[k]).
    Events are split into ``n_parts`` fixed parts summed in order, so the
    result does not depend on the number of threads.  ``hint`` (n,) int64:
    each event's most probable component from the previous call (visited
    first, which lets the pruning of :func:`_em_stats_rows` start early);
    updated in place; None starts every event at component 0.
    """
    K, d = means.shape
    n = X.shape[0]
    if hint is None or hint.shape[0] != n:
        hint = np.zeros(n, np.int64)
    np.minimum(hint, max(K - 1, 0), out=hint)
    parts = max(1, min(int(n_parts), n // 256)) if _parallel(n, K * d * d) else 1
    acc_n = np.zeros((parts, K + 1))
    acc_s = np.zeros((parts, K, d))
    acc_m = np.zeros((parts, K, d, d))
    ll = np.zeros((parts, 1))
    if parts > 1:
        _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll, hint)
    else:
        _em_stats_rows(0, n, X, bg, logw, means, chol, log_det, acc_n[0], acc_s[0], acc_m[0], ll[0], hint)
    N = acc_n.sum(axis=0)
    S = acc_s.sum(axis=0)
    M = acc_m.sum(axis=0)
    low = np.tril(M)
    M = low + np.swapaxes(np.tril(M, -1), 1, 2)
    return float(ll.sum()), N, S, M


# ------------------------------------------------------------ skew search

@njit(cache=True, error_model="numpy")
def skew_residual_variance(CZ, b_t, b_r, j, ch, sh):
    """Residual variance of each candidate y_j on the other transformed channels.

    The transformed channels are y_k = b_t[k] t_k + b_r[k] r_k (k != j) and the
    candidates y_j = ch[g] t_j - sh[g] r_j, with CZ (2d, 2d) the weighted
    covariance of [t, r] (t first).  Returns var (G,): Var(y_j) minus the part
    explained by the others (their covariance solved by Cholesky, in plain
    loops: no threaded linear algebra inside a fit).  +inf for every candidate
    when the others' covariance is not positive definite."""
    d = b_t.shape[0]
    G = ch.shape[0]
    m = d - 1
    idx = np.empty(m, np.int64)
    q = 0
    for k in range(d):
        if k != j:
            idx[q] = k
            q += 1
    # BtC[a, :] = row a of B^T CZ for the other channels (B has two nonzeros a column)
    S = np.empty((m, m))
    c_t = np.empty(m)   # cov(y_a, t_j)
    c_r = np.empty(m)   # cov(y_a, r_j)
    for a in range(m):
        ka = idx[a]
        for b in range(m):
            kb = idx[b]
            S[a, b] = (b_t[ka] * (b_t[kb] * CZ[ka, kb] + b_r[kb] * CZ[ka, d + kb])
                       + b_r[ka] * (b_t[kb] * CZ[d + ka, kb] + b_r[kb] * CZ[d + ka, d + kb]))
        c_t[a] = b_t[ka] * CZ[ka, j] + b_r[ka] * CZ[d + ka, j]
        c_r[a] = b_t[ka] * CZ[ka, d + j] + b_r[ka] * CZ[d + ka, d + j]
    var = np.empty(G)
    for g in range(G):
        var[g] = ch[g] * ch[g] * CZ[j, j] - 2.0 * ch[g] * sh[g] * CZ[j, d + j] + sh[g] * sh[g] * CZ[d + j, d + j]
    if m == 0:
        return var
    # Cholesky S = L L^T
    L = np.zeros((m, m))
    for a in range(m):
        for b in range(a + 1):
            s = S[a, b]
            for k in range(b):
                s -= L[a, k] * L[b, k]
            if a == b:
                if not s > 0.0:
                    for g in range(G):
                        var[g] = np.inf
                    return var
                L[a, a] = math.sqrt(s)
            else:
                L[a, b] = s / L[b, b]
    # explained variance of a candidate: |L^-1 c|^2 with c = ch c_t - sh c_r (linear in
    # the candidate), so solve for c_t and c_r once
    wt = np.empty(m)
    wr = np.empty(m)
    for a in range(m):
        st = c_t[a]
        sr = c_r[a]
        for k in range(a):
            st -= L[a, k] * wt[k]
            sr -= L[a, k] * wr[k]
        wt[a] = st / L[a, a]
        wr[a] = sr / L[a, a]
    tt = 0.0
    tr = 0.0
    rr = 0.0
    for a in range(m):
        tt += wt[a] * wt[a]
        tr += wt[a] * wr[a]
        rr += wr[a] * wr[a]
    for g in range(G):
        var[g] -= ch[g] * ch[g] * tt - 2.0 * ch[g] * sh[g] * tr + sh[g] * sh[g] * rr
    return var
