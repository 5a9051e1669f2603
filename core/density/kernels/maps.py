"""Per-channel maps of the cube chain (compiled, parallel over events): the
logistic map into (0, 1), monotone piecewise-linear maps of [0, 1] onto
itself (the composed marginal trees), and the rotation in Gaussianised
coordinates.

A piecewise-linear map travels as one record with fields ``offsets``,
``xs``, ``ys``, ``slopes``, ``log_slopes``
(:class:`core.density.marginals.PiecewiseLinearMap`).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .common import BLOCK, U_EPS, log_sigmoid_pair, logistic_cdf, ndtr, ndtri, parallel


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
            U[i, j] = logistic_cdf(z)
            acc += log_sigmoid_pair(z) - log_scale[j]
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
def _piece(knots, a, b, v):
    """Index in [a, b - 2] of the piece of one channel's knots ``knots[a:b]`` holding v:
    the last knot <= v, clamped to the first and last piece."""
    k = np.searchsorted(knots[a:b], v, side="right") - 1
    if k < 0:
        k = 0
    if k > b - a - 2:
        k = b - a - 2
    return a + k


@njit(cache=True)
def _pwl_forward_rows(start, stop, U, logd, m):
    """Per-channel monotone piecewise-linear maps of [0, 1] onto itself, in place.

    Channel j uses knots ``xs[offsets[j]:offsets[j+1]]`` (increasing, 0 .. 1),
    values ``ys`` at the knots and the exact slope of each piece
    (``slopes``/``log_slopes`` are indexed by the piece's left knot), all
    fields of the record ``m``.
    """
    offsets, xs, ys, slopes, log_slopes = m.offsets, m.xs, m.ys, m.slopes, m.log_slopes
    d = U.shape[1]
    for i in range(start, stop):
        acc = 0.0
        for j in range(d):
            a = offsets[j]
            b = offsets[j + 1]
            if b - a < 2:
                continue
            u = U[i, j]
            p = _piece(xs, a, b, u)
            v = ys[p] + (u - xs[p]) * slopes[p]
            if v < 0.0:
                v = 0.0
            elif v > 1.0:
                v = 1.0
            U[i, j] = v
            acc += log_slopes[p]
        logd[i] += acc


@njit(cache=True)
def _pwl_inverse_rows(start, stop, U, m):
    """Inverse of :func:`pwl_forward` in place."""
    offsets, xs, ys, slopes = m.offsets, m.xs, m.ys, m.slopes
    d = U.shape[1]
    for i in range(start, stop):
        for j in range(d):
            a = offsets[j]
            b = offsets[j + 1]
            if b - a < 2:
                continue
            v = U[i, j]
            p = _piece(ys, a, b, v)
            u = xs[p] + (v - ys[p]) / slopes[p]
            if u < xs[p]:
                u = xs[p]
            elif u > xs[p + 1]:
                u = xs[p + 1]
            U[i, j] = u

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
    if parallel(U.shape[0], 30 * U.shape[1]):
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



# Parallel drivers: blocks of BLOCK events per thread (identical results).

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
def _pwl_forward_par(U, logd, m):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _pwl_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, logd, m)


@njit(cache=True, parallel=True)
def _pwl_inverse_par(U, m):
    n = U.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _pwl_inverse_rows(b * BLOCK, min(n, (b + 1) * BLOCK), U, m)


def base_forward(X, U, logd, loc, scale, log_scale):
    """Per-channel logistic map into (0, 1); see :func:`_base_forward_rows`."""
    args = (X, U, logd, loc, scale, log_scale)
    if parallel(X.shape[0], 8 * X.shape[1]):
        _base_forward_par(*args)
    else:
        _base_forward_rows(0, X.shape[0], *args)


def base_inverse(U, X, loc, scale):
    """Inverse of :func:`base_forward`."""
    if parallel(U.shape[0], 8 * U.shape[1]):
        _base_inverse_par(U, X, loc, scale)
    else:
        _base_inverse_rows(0, U.shape[0], U, X, loc, scale)


def pwl_forward(U, logd, m):
    """Per-channel monotone piecewise-linear maps ``m`` in place; see :func:`_pwl_forward_rows`."""
    if parallel(U.shape[0], 8 * U.shape[1]):
        _pwl_forward_par(U, logd, m)
    else:
        _pwl_forward_rows(0, U.shape[0], U, logd, m)


def pwl_inverse(U, m):
    """Inverse of :func:`pwl_forward` in place."""
    if parallel(U.shape[0], 8 * U.shape[1]):
        _pwl_inverse_par(U, m)
    else:
        _pwl_inverse_rows(0, U.shape[0], U, m)
