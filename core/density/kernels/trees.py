"""Applying tree measures: the forward map of a forest (tree-CDFs, with log
densities) and its inverse (compiled, parallel over events).

A forest's node arrays travel as one :class:`ForestArrays` record (layout in
:mod:`core.density.kernels`); :class:`core.density.tree.Forest` builds it.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit, prange

from .common import BLOCK, MAX_PATH, parallel


class ForestArrays(NamedTuple):
    """A forest's flat node arrays as the kernels read them (m split nodes).

    roots (n_trees,) int64 root node of each tree (-1: no split); dim (m,)
    int64 split dimension; cut (m,) split location; mid (m,) image of the cut;
    per side (index ``2 * node + side``, side 0 left of the cut): child (2m,)
    int64 (-1: leaf) and the local CDF piece ``v -> base + (v - anchor) * slope``
    with lslope = log(slope)."""
    roots: np.ndarray
    dim: np.ndarray
    cut: np.ndarray
    mid: np.ndarray
    child: np.ndarray
    base: np.ndarray
    anchor: np.ndarray
    slope: np.ndarray
    lslope: np.ndarray


@njit(cache=True)
def _forest_forward_rows(start, stop, U, logd, f):
    """Apply the tree-CDFs of trees ``f.roots`` in order to rows start:stop of ``U`` in place.

    U: (n, d) float64 points in the cube, overwritten by their images.
    logd: (n,) float64, the log-density of each tree at the point it was
    applied to is added (sum of log slopes along the root-to-leaf path).
    Each tree: find the path top-down, then apply the moves bottom-up.
    Side arrays are indexed by ``code = 2 * node + side`` (side 0 left of
    the cut, 1 right): on that side the node maps v to
    ``base + (v - anchor) * slope``.  Trees are the outer loop so a block of
    events gives the processor independent work to overlap.
    """
    roots, dim, cut, child = f.roots, f.dim, f.cut, f.child
    base, anchor, slope, lslope = f.base, f.anchor, f.slope, f.lslope
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
def _forest_inverse_rows(start, stop, U, f):
    """Undo :func:`forest_forward` on rows start:stop in place: trees last to first,
    each root first (the root's inverse move decides which child the point came from)."""
    roots, dim, mid, child = f.roots, f.dim, f.mid, f.child
    base, anchor, slope = f.base, f.anchor, f.slope
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


# Each per-event kernel has a serial body (``_*_rows``) and a parallel driver
# that hands blocks of BLOCK events to threads; results are identical because
# every event is computed by exactly one thread in the same order.

@njit(cache=True, parallel=True)
def _forest_forward_par(U, logd, f):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _forest_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, logd, f)


@njit(cache=True, parallel=True)
def _forest_inverse_par(U, f):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _forest_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, f)


def forest_forward(U, logd, f: ForestArrays):
    """Apply trees ``f.roots`` in order to U (n, d) in place; add their log densities to logd (n,)."""
    if parallel(U.shape[0], 4 * f.roots.shape[0]):
        _forest_forward_par(U, logd, f)
    else:
        _forest_forward_rows(0, U.shape[0], U, logd, f)


def forest_inverse(U, f: ForestArrays):
    """Undo :func:`forest_forward` in place (trees last to first, each root first)."""
    if parallel(U.shape[0], 4 * f.roots.shape[0]):
        _forest_inverse_par(U, f)
    else:
        _forest_inverse_rows(0, U.shape[0], U, f)
