"""The skew search's inner solve (compiled): the residual variance of each
candidate skew of one channel given the others, for the generalised EM of
the skewed mixture (:mod:`core.density.skew_fit`)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .common import parallel

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



@njit(cache=True, error_model="numpy")
def _one_shape(X, rk, thr, centre, scale, eps, reg, grid, moves, max_skew, nb, mean_out, cov_out):
    """:func:`component_shapes` for one component (its events: rk (n,) > thr).
    Returns False (nothing changed) when they weigh less than 2 (d + 1)."""
    n, d = X.shape
    d2 = 2 * d
    n_k = 0.0
    rows = np.empty(n, np.int64)
    n_sel = 0
    for i in range(n):
        if rk[i] > thr:
            n_k += rk[i]
            rows[n_sel] = i
            n_sel += 1
    if not n_k >= 2 * (d + 1):
        return False
    # weighted mean of z = [t, sqrt(1 + t^2)], then the weighted covariance about it
    mz = np.zeros(d2)
    z = np.empty(d2)
    for s in range(n_sel):
        i = rows[s]
        wi = rk[i] / n_k
        for j in range(d):
            t = (X[i, j] - centre[j]) / scale[j]
            mz[j] += wi * t
            mz[d + j] += wi * math.sqrt(1.0 + t * t)
    CZ = np.zeros((d2, d2))
    HW = np.zeros((d, nb))
    HU = np.zeros((d, nb))
    for s in range(n_sel):
        i = rows[s]
        r = rk[i]
        wi = r / n_k
        for j in range(d):
            t = (X[i, j] - centre[j]) / scale[j]
            rt = math.sqrt(1.0 + t * t)
            z[j] = t - mz[j]
            z[d + j] = rt - mz[d + j]
            u = t / rt
            b = min(max(int((u + 1.0) * (0.5 * nb)), 0), nb - 1)
            HW[j, b] += r
            HU[j, b] += u * r
        for a in range(d2):
            wa = wi * z[a]
            for c in range(a + 1):
                CZ[a, c] += wa * z[c]
    for a in range(d2):
        for c in range(a):
            CZ[c, a] = CZ[a, c]
    bt = np.cosh(eps)
    br = -np.sinh(eps)
    ng = grid.shape[0] + moves.shape[0]
    raw = np.empty(ng)
    hw_nz = np.empty(nb)   # the channel's non-empty bins: weight and mean u (the same values,
    hu_nz = np.empty(nb)   # in the same order, as reading every bin and skipping the empty ones)
    for j in range(d):
        for g in range(grid.shape[0]):
            raw[g] = min(max(grid[g], -max_skew), max_skew)
        for g in range(moves.shape[0]):
            raw[grid.shape[0] + g] = min(max(eps[j] + moves[g], -max_skew), max_skew)
        cand = np.unique(raw)
        ch = np.cosh(cand)
        sh = np.sinh(cand)
        var = skew_residual_variance(CZ, bt, br, j, ch, sh)
        finite = True
        for g in range(cand.shape[0]):
            if not np.isfinite(var[g]):
                finite = False
        if not finite:
            continue  # the other channels' covariance is singular here: keep this skew
        n_nz = 0
        for b in range(nb):
            hw = HW[j, b]
            if hw > 0:
                hw_nz[n_nz] = hw
                hu_nz[n_nz] = HU[j, b] / hw
                n_nz += 1
        best = -np.inf
        gbest = 0
        for g in range(cand.shape[0]):
            jac = 0.0
            for b in range(n_nz):
                jac += hw_nz[b] * math.log(ch[g] - hu_nz[b] * sh[g])
            score = -0.5 * n_k * math.log(max(var[g], 1e-300)) + jac
            if score > best:
                best = score
                gbest = g
        eps[j] = cand[gbest]
        bt[j] = ch[gbest]
        br[j] = -sh[gbest]
    for a in range(d):
        mean_out[a] = mz[a] * bt[a] + mz[d + a] * br[a]
        for c in range(d):
            cov_out[a, c] = (bt[a] * (bt[c] * CZ[a, c] + br[c] * CZ[a, d + c])
                             + br[a] * (bt[c] * CZ[d + a, c] + br[c] * CZ[d + a, d + c]))
    for a in range(d):
        for c in range(a):
            v = 0.5 * (cov_out[a, c] + cov_out[c, a])
            cov_out[a, c] = v
            cov_out[c, a] = v
        cov_out[a, a] += reg[a]
    return True


@njit(cache=True, parallel=True, error_model="numpy")
def _shapes_par(X, RT, thr, centre, scale, eps, reg, grid, moves, max_skew, nb, mean, cov, moved):
    for k in prange(centre.shape[0]):
        moved[k] = _one_shape(X, RT[k + 1], thr[k], centre[k], scale[k], eps[k], reg[k], grid, moves, max_skew, nb,
                              mean[k], cov[k])


@njit(cache=True, error_model="numpy")
def _shapes_seq(X, RT, thr, centre, scale, eps, reg, grid, moves, max_skew, nb, mean, cov, moved):
    for k in range(centre.shape[0]):
        moved[k] = _one_shape(X, RT[k + 1], thr[k], centre[k], scale[k], eps[k], reg[k], grid, moves, max_skew, nb,
                              mean[k], cov[k])


def component_shapes(X, R, thr, centre, scale, eps, reg, grid, moves, max_skew, nb, mean, cov):
    """One generalised-EM step of every skewed component's shape (compiled; one
    component per thread, so the result does not depend on the thread count).

    X (n, d) events; R (n, K + 1) responsibilities (background first); thr (K,)
    each component's least responsibility counted; centre, scale (K, d) its
    transform; eps (K, d) skews, updated in place; reg (K, d) diagonal floor in
    transformed units; grid, moves: candidate skews (fixed, and moves from the
    current value), clipped to +-max_skew; nb: histogram bins of t / sqrt(1 + t^2).
    Writes each moved component's transformed mean into mean (K, d) and
    covariance into cov (K, d, d); returns moved (K,) bool (False: too little
    weight, left as it was).

    Per component and channel: y_j = t_j cosh(eps_j) - r_j sinh(eps_j) with
    t_j = (x_j - centre_j) / scale_j and r_j = sqrt(1 + t_j^2) is linear in
    (t_j, r_j), so every candidate skew's weighted moments come from one
    weighted covariance of [t, r] (2d x 2d).  With the Gaussian's mean and
    covariance at their closed-form maximum, channel j's share of the log
    likelihood is -n_k/2 log(residual variance of y_j on the other y)
    (:func:`skew_residual_variance`) + sum r log(cosh eps - u sinh eps), u = t / r,
    that sum taken over an ``nb``-bin weighted histogram of u (bin means; it
    only ranks the candidates, the density itself is exact).  Channels in
    turn, each the best candidate; then the transformed mean and covariance."""
    K, d = centre.shape
    moved = np.zeros(K, np.bool_)
    RT = np.ascontiguousarray(R.T)  # each component's responsibilities contiguous
    args = (X, RT, thr, centre, scale, eps, reg, grid, moves, float(max_skew), int(nb), mean, cov, moved)
    if K > 1 and parallel(X.shape[0], 4 * d * d):
        _shapes_par(*args)
    else:
        _shapes_seq(*args)
    return moved
