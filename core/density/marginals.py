"""The marginal stage: per channel, boosted one-dimensional tree measures
composed into one monotone piecewise-linear map of [0, 1] onto itself
(:class:`PiecewiseLinearMap`, exact slopes, so log densities are exact)."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from . import kernels
from .boosting_stop import EarlyStopping
from .tree import Forest, fit_tree


class PiecewiseLinearMap(NamedTuple):
    """Per-channel monotone piecewise-linear maps of [0, 1] onto itself.

    Channel j uses knots ``xs[offsets[j]:offsets[j + 1]]`` (increasing, 0 .. 1),
    the map's values ``ys`` at the knots and the exact slope of each piece
    (``slopes``, ``log_slopes``; indexed by the piece's left knot, the last
    entry of each channel unused and 1).  offsets (d + 1,) int64, the others
    float64 of one length.  The compiled kernels read this record directly
    (:func:`core.density.kernels.pwl_forward`)."""
    offsets: np.ndarray
    xs: np.ndarray
    ys: np.ndarray
    slopes: np.ndarray
    log_slopes: np.ndarray

    @classmethod
    def from_channels(cls, pieces) -> "PiecewiseLinearMap":
        """One map from per-channel (xs, ys, slopes) triples, in channel order."""
        offsets = np.cumsum([0] + [xs.size for xs, _, _ in pieces]).astype(np.int64)
        sl = np.concatenate([p[2] for p in pieces])
        return cls(offsets, np.concatenate([p[0] for p in pieces]), np.concatenate([p[1] for p in pieces]),
                   sl, np.log(sl))

    @classmethod
    def identity(cls, d: int) -> "PiecewiseLinearMap":
        """The identity on each of d channels (two knots, slope 1)."""
        xs = np.tile([0.0, 1.0], d)
        sl = np.ones(2 * d)
        return cls(np.arange(0, 2 * d + 1, 2, dtype=np.int64), xs, xs.copy(), sl, np.log(sl))

    @property
    def is_identity(self) -> bool:
        """True when every piece has slope 1 (the map changes nothing)."""
        return bool(np.all(self.slopes == 1.0))

    def forward(self, U: np.ndarray, logd: np.ndarray) -> None:
        """Map U (n, d) in place, adding the log slopes to logd (n,)."""
        kernels.pwl_forward(U, logd, self)

    def inverse(self, U: np.ndarray) -> None:
        """Undo :meth:`forward` in place."""
        kernels.pwl_inverse(U, self)


def compose_1d(forest: Forest):
    """Compose a sequence of one-dimensional tree-CDFs on [0, 1] into one
    monotone piecewise-linear map.

    Returns knots ``xs`` (increasing, 0 .. 1), the map's values ``ys`` at the
    knots and the exact slope of each piece (last entry unused, set to 1):
    the slope is evaluated at the piece's midpoint as the product of the
    trees' local slopes, so log densities are exact, not differences of
    rounded values.
    """
    if forest.n_trees == 0 or forest.n_nodes == 0:
        return np.array([0.0, 1.0]), np.array([0.0, 1.0]), np.ones(2)
    knots = [np.array([0.0, 1.0])]
    for t in range(forest.n_trees):
        r = forest.roots[t]
        if r < 0:
            continue
        stop = forest.roots[t + 1:]
        stop = stop[stop >= 0]
        end = int(stop.min()) if stop.size else forest.n_nodes
        cuts = forest.cut[r:end].reshape(-1, 1).copy()
        forest.prefix(t).inverse(cuts)
        knots.append(cuts[:, 0])
    xs = np.unique(np.clip(np.concatenate(knots), 0.0, 1.0))
    mids = np.ascontiguousarray(((xs[:-1] + xs[1:]) / 2).reshape(-1, 1))
    lmid = np.zeros(mids.shape[0])
    forest.forward(mids, lmid)
    ys = np.ascontiguousarray(xs.reshape(-1, 1)).copy()
    forest.forward(ys, np.zeros(xs.size))
    ys = np.maximum.accumulate(np.clip(ys[:, 0], 0.0, 1.0))
    ys[0], ys[-1] = 0.0, 1.0
    slopes = np.append(np.exp(lmid), 1.0)
    return xs, ys, slopes


def _fit_channel(col_tr, col_va, max_trees, lr, depth, n_bins, min_leaf, alpha, patience):
    """Boost one-channel trees on one channel's training column (n, 1), stopped
    on its held-out column; returns (kept tree count, composed (xs, ys, slopes))."""
    ld = np.zeros(col_va.shape[0])
    scratch = np.zeros(col_tr.shape[0])
    forest = Forest()
    stop = EarlyStopping(0.0, patience)
    for k in range(1, max_trees + 1):
        tree = fit_tree(col_tr, lr, depth, n_bins, min_leaf, None, alpha)
        if tree.n_nodes == 0:
            break
        tree.forward(col_tr, scratch)
        tree.forward(col_va, ld)
        forest.append(tree)
        stop.update(k, float(ld.mean()))
        if stop.exhausted(k):
            break
    forest = forest.prefix(stop.best_k)
    return stop.best_k, compose_1d(forest)


def fit_marginal_map(U_tr, U_va, ld_va, frozen, max_trees, lr, depth, n_bins, min_leaf, alpha, patience):
    """Fit each free channel's marginal map (``max_trees`` 0: identity everywhere)
    and apply it to U_tr, U_va (n, d) in place, adding its log slopes to ld_va.
    Returns (PiecewiseLinearMap, one-channel trees kept per channel (d,))."""
    d = U_tr.shape[1]
    counts = np.zeros(d, np.int64)
    pieces = []
    for j in range(d):
        if frozen[j] or max_trees == 0:
            pieces.append((np.array([0.0, 1.0]), np.array([0.0, 1.0]), np.ones(2)))
            continue
        counts[j], piece = _fit_channel(U_tr[:, j:j + 1].copy(), U_va[:, j:j + 1].copy(), max_trees, lr,
                                        depth, n_bins, min_leaf, alpha, patience)
        pieces.append(piece)
    pwl = PiecewiseLinearMap.from_channels(pieces)
    pwl.forward(U_tr, np.zeros(U_tr.shape[0]))
    pwl.forward(U_va, ld_va)
    return pwl, counts
