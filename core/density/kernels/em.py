"""The Gaussian-mixture EM's pass over the events (compiled): a pruned E step
with the M step's responsibility-weighted moments, summed in fixed parts so
the result does not depend on the number of threads."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .common import _LOG_SQRT_2PI, parallel

#: A component whose log weight x density falls this far below the best one
#: seen for an event is left out of that event's E step: its responsibility
#: is below exp(-40) ~ 4e-18 (the moments already skip those below 1e-13), and
#: its share of the event's log-likelihood is below float64 resolution.
EM_PRUNE = 40.0


@njit(cache=True, error_model="numpy")
def _em_stats_rows(start, stop, X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint, moments):
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

    Without ``moments`` only ll_out (and ``hint``) are updated: the log-likelihood
    of held-out events under the current mixture, at a fraction of the cost.
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
        if not moments:
            continue
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
def _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint, moments):
    n = X.shape[0]
    nb = acc_n.shape[0]
    step = (n + nb - 1) // nb
    for b in prange(nb):
        _em_stats_rows(b * step, min(n, (b + 1) * step), X, bg, logw, means, chol, log_det,
                       acc_n[b], acc_s[b], acc_m[b], ll_out[b], hint, moments)


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
    parts = max(1, min(int(n_parts), n // 256)) if parallel(n, K * d * d) else 1
    acc_n = np.zeros((parts, K + 1))
    acc_s = np.zeros((parts, K, d))
    acc_m = np.zeros((parts, K, d, d))
    ll = np.zeros((parts, 1))
    if parts > 1:
        _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll, hint, True)
    else:
        _em_stats_rows(0, n, X, bg, logw, means, chol, log_det, acc_n[0], acc_s[0], acc_m[0], ll[0], hint, True)
    N = acc_n.sum(axis=0)
    S = acc_s.sum(axis=0)
    M = acc_m.sum(axis=0)
    low = np.tril(M)
    M = low + np.swapaxes(np.tril(M, -1), 1, 2)
    return float(ll.sum()), N, S, M



def em_loglik(X, bg, logw, means, chol, log_det, n_parts=16, hint=None):
    """Total log-likelihood of events X (n, d) under the mixture, by the E step of
    :func:`em_stats` alone (no moments; same pruning, so equal to it to ~1e-12
    nats); used to follow held-out events during EM.  ``hint`` as for :func:`em_stats`."""
    K, d = means.shape
    n = X.shape[0]
    if hint is None or hint.shape[0] != n:
        hint = np.zeros(n, np.int64)
    np.minimum(hint, max(K - 1, 0), out=hint)
    parts = max(1, min(int(n_parts), n // 256)) if parallel(n, K * d * d) else 1
    acc_n = np.zeros((parts, K + 1))
    acc_s = np.zeros((parts, 0, d))
    acc_m = np.zeros((parts, 0, d, d))
    ll = np.zeros((parts, 1))
    if parts > 1:
        _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll, hint, False)
    else:
        _em_stats_rows(0, n, X, bg, logw, means, chol, log_det, acc_n[0], acc_s[0], acc_m[0], ll[0], hint, False)
    return float(ll.sum())
