"""The Gaussian-mixture EM's pass over the events (compiled): a pruned E step
with the M step's responsibility-weighted moments, summed in fixed parts so
the result does not depend on the number of threads."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .common import _LOG_SQRT_2PI, correlation_bound, parallel, scaled_sq_distances

#: A component whose log weight x density falls this far below the best one
#: seen for an event is left out of that event's E step: its responsibility
#: is below exp(-40) ~ 4e-18 (the moments already skip those below 1e-13), and
#: its share of the event's log-likelihood is below float64 resolution.
EM_PRUNE = 40.0


@njit(cache=True, error_model="numpy")
def _em_stats_rows(start, stop, X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint, moments,
                   rows, means_t, inv_sd_t, inv_top):
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
    ``rows`` (n,) or (0,): when it has n entries, each event's log density is
    written to it too.

    Before its triangular solve, a component is also tested against a cheaper
    bound: q >= |S_k^-1 (x - mean_k)|^2 / lambda_max(C_k), S_k the diagonal of the
    component's standard deviations and C_k its correlation matrix; ``means_t``
    (d, K) the means and ``inv_sd_t`` (d, K) the inverse standard deviations
    transposed (the scaled squared distances to every component are summed with
    the component index innermost, which the compiler vectorises), ``inv_top``
    (K,) a lower bound of 1 / lambda_max(C_k).  A component the bound leaves out is
    one the solve would have left out too (or kept at a share below exp(-40)).
    """
    K, d = means.shape
    lp = np.empty(K + 1)
    live = np.zeros(K, np.bool_)
    D = np.empty((K, d))
    z = np.empty(d)
    e2 = np.empty(K)
    inv_diag = np.empty((K, d))
    for k in range(K):
        for j in range(d):
            inv_diag[k, j] = 1.0 / chol[k, j, j]
    ll = 0.0
    half_d_log2pi = d * _LOG_SQRT_2PI
    for i in range(start, stop):
        scaled_sq_distances(X, i, means_t, inv_sd_t, e2)
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
            if c - 0.5 * e2[k] * inv_top[k] < floor:
                live[k] = False
                continue
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
        li = mx + math.log(s)
        ll += li
        if rows.shape[0]:
            rows[i] = li
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
def _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll_out, hint, moments, rows, means_t,
                  inv_sd_t, inv_top):
    n = X.shape[0]
    nb = acc_n.shape[0]
    step = (n + nb - 1) // nb
    for b in prange(nb):
        _em_stats_rows(b * step, min(n, (b + 1) * step), X, bg, logw, means, chol, log_det,
                       acc_n[b], acc_s[b], acc_m[b], ll_out[b], hint, moments, rows, means_t, inv_sd_t, inv_top)


def em_stats(X, bg, logw, means, chol, log_det, n_parts=16, hint=None):
    """One E step over all events with the M step's sufficient statistics.

    Returns (total log-likelihood, N (K + 1,), S (K, d), M (K, d, d) symmetric):
    responsibilities summed per component, and per Gaussian component the
    responsibility-weighted first and second moments of (x - means[k]).
    Events are split into ``n_parts`` fixed parts summed in order, so the
    result does not depend on the number of threads.  ``hint`` (n,) int64:
    each event's most probable component from the previous call (visited
    first, which lets the pruning of :func:`_em_stats_rows` start early);
    updated in place; None starts every event at component 0.  Up to
    ``VECTOR_MAX_CHANNELS`` channels the pass runs with the component index
    innermost and no pruning (:func:`_em_stats_rows_vec`: the same sums,
    bit-identical where measured, 2x faster at 8 channels; ``hint`` unused).
    """
    total, acc_n, acc_s, acc_m = _pass(X, bg, logw, means, chol, log_det, n_parts, hint, True)
    N = acc_n.sum(axis=0)
    S = acc_s.sum(axis=0)
    M = acc_m.sum(axis=0)
    low = np.tril(M)
    M = low + np.swapaxes(np.tril(M, -1), 1, 2)
    return total, N, S, M


@njit(cache=True, error_model="numpy")
def _em_stats_rows_vec(start, stop, X, bg, logw0, c0, means_t, chol_t, inv_diag_t, acc_n, acc_s, acc_m, ll_out,
                       moments, rows):
    """:func:`_em_stats_rows` laid out with the component index innermost (the
    compiler vectorises over components) and without pruning: every component's
    term is computed, those more than ``EM_PRUNE`` nats below the event's best are
    then left out as the pruned pass leaves them out.  logw0: the background's
    log weight; c0 (K,): log weight minus
    log det minus d log sqrt(2 pi); means_t (d, K); chol_t (d, d, K) with
    chol_t[j, a, k] = chol[k, j, a]; inv_diag_t (d, K) the inverse diagonals."""
    d, K = means_t.shape
    D = np.empty((d, K))
    z = np.empty((d, K))
    v = np.empty(K)
    q = np.empty(K)
    lp = np.empty(K)
    ll = 0.0
    for i in range(start, stop):
        for k in range(K):
            q[k] = 0.0
        for j in range(d):
            x = X[i, j]
            for k in range(K):
                v[k] = x - means_t[j, k]
                D[j, k] = v[k]
            for a in range(j):
                for k in range(K):
                    v[k] -= chol_t[j, a, k] * z[a, k]
            for k in range(K):
                w = v[k] * inv_diag_t[j, k]
                z[j, k] = w
                q[k] += w * w
        lp0 = logw0 + bg[i]
        mx = lp0
        for k in range(K):
            lp[k] = c0[k] - 0.5 * q[k]
            mx = max(mx, lp[k])
        s = math.exp(lp0 - mx)
        e0 = s
        for k in range(K):
            g = lp[k] - mx
            if g < -EM_PRUNE:
                lp[k] = 0.0
            else:
                lp[k] = math.exp(g)
                s += lp[k]
        li = mx + math.log(s)
        ll += li
        if rows.shape[0]:
            rows[i] = li
        if not moments:
            continue
        inv = 1.0 / s
        acc_n[0] += e0 * inv
        for k in range(K):
            r = lp[k] * inv
            if r < 1e-13:
                continue
            acc_n[k + 1] += r
            for j in range(d):
                rv = r * D[j, k]
                acc_s[k, j] += rv
                for a in range(j + 1):
                    acc_m[k, j, a] += rv * D[a, k]
    ll_out[0] += ll


@njit(cache=True, parallel=True, error_model="numpy")
def _em_stats_vec_par(X, bg, logw0, c0, means_t, chol_t, inv_diag_t, acc_n, acc_s, acc_m, ll_out, moments, rows):
    n = X.shape[0]
    nb = acc_n.shape[0]
    step = (n + nb - 1) // nb
    for b in prange(nb):
        _em_stats_rows_vec(b * step, min(n, (b + 1) * step), X, bg, logw0, c0, means_t, chol_t, inv_diag_t,
                            acc_n[b], acc_s[b], acc_m[b], ll_out[b], moments, rows)


def em_loglik(X, bg, logw, means, chol, log_det, n_parts=16, hint=None):
    """Total log-likelihood of events X (n, d) under the mixture, by the E step of
    :func:`em_stats` alone (no moments; the same terms, so equal to it to ~1e-12
    nats); used to follow held-out events during EM.  ``hint`` as for :func:`em_stats`."""
    return _pass(X, bg, logw, means, chol, log_det, n_parts, hint, False)[0]


def em_logpdf(X, bg, logw, means, chol, log_det, n_parts=16, hint=None):
    """Per-event log density (n,) of events X (n, d) under the mixture, by the E
    step of :func:`em_stats` alone: the terms of :func:`em_loglik`, one per event.
    Equal to the mixture's log density (:meth:`core.density.mixture_base.MixtureBase.logpdf`)
    to ~1e-13 nats, at a fraction of its cost beyond 12 channels (pruned)."""
    rows = np.empty(X.shape[0])
    _pass(X, bg, logw, means, chol, log_det, n_parts, hint, False, rows)
    return rows


#: Up to this many channels the EM pass is laid out with the component index
#: innermost and unpruned (faster at 8 channels, equal at 16, slower at 30: the
#: pruning saves more as channels grow; EXPERIMENTS.md section 26).
VECTOR_MAX_CHANNELS = 12


def _pass(X, bg, logw, means, chol, log_det, n_parts, hint, moments, rows=None):
    """The EM pass (moments or log-likelihood only; each event's log density
    written to ``rows`` (n,) when given); returns (total, per-part acc_n, acc_s, acc_m)."""
    K, d = means.shape
    n = X.shape[0]
    parts = max(1, min(int(n_parts), n // 256)) if parallel(n, K * d * d) else 1
    acc_n = np.zeros((parts, K + 1))
    mk = K if moments else 0
    acc_s = np.zeros((parts, mk, d))
    acc_m = np.zeros((parts, mk, d, d))
    ll = np.zeros((parts, 1))
    if rows is None:
        rows = np.empty(0)
    if d <= VECTOR_MAX_CHANNELS and K > 0:
        inv_diag = 1.0 / np.diagonal(chol, axis1=1, axis2=2)
        args = (X, bg, float(logw[0]), logw[1:] - log_det - d * _LOG_SQRT_2PI, np.ascontiguousarray(means.T),
                np.ascontiguousarray(np.transpose(chol, (1, 2, 0))), np.ascontiguousarray(inv_diag.T))
        if parts > 1:
            _em_stats_vec_par(*args, acc_n, acc_s, acc_m, ll, moments, rows)
        else:
            _em_stats_rows_vec(0, n, *args, acc_n[0], acc_s[0], acc_m[0], ll[0], moments, rows)
        return float(ll.sum()), acc_n, acc_s, acc_m
    if hint is None or hint.shape[0] != n:
        hint = np.zeros(n, np.int64)
    np.minimum(hint, max(K - 1, 0), out=hint)
    inv_sd, inv_top = correlation_bound(chol)
    bound = (np.ascontiguousarray(means.T), np.ascontiguousarray(inv_sd.T), inv_top)
    if parts > 1:
        _em_stats_par(X, bg, logw, means, chol, log_det, acc_n, acc_s, acc_m, ll, hint, moments, rows, *bound)
    else:
        _em_stats_rows(0, n, X, bg, logw, means, chol, log_det, acc_n[0], acc_s[0], acc_m[0], ll[0], hint,
                       moments, rows, *bound)
    return float(ll.sum()), acc_n, acc_s, acc_m
