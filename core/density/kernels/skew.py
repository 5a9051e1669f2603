"""The skew search's inner solve (compiled): the residual variance of each
candidate skew of one channel given the others, for the generalised EM of
the skewed mixture (:mod:`core.density.skew_fit`)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit

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

