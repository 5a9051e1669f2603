"""Log density of a skewed mixture at axis probes x +- h_j e_j (compiled, parallel over rows).

Hill climbing on the fitted density (:mod:`core.populations`) scores, for each
row x (d channels), the 2 d points x + h_j e_j and x - h_j e_j.  Scoring them
one by one costs 2 d full mixture evaluations (each O(K d^2)).  Moving one
channel changes, in each component, only that channel's sinh-arcsinh value:
with ``L`` the component's lower-triangular factor (its Rosenblatt form,
``L z = y - mean``, diagonal the sds), the whitened vector moves along a
column of ``L^-1``:  z' = z + delta * B[:, j] with ``B[:, j] = sd_j
L^-1[:, j]`` and ``delta = (y_j' - y_j) / sd_j``, so

    |z'|^2 = |z|^2 + 2 delta (z . B[:, j]) + delta^2 |B[:, j]|^2

and every probe costs O(K) once z . B (O(K d^2), one evaluation) is known:
about two evaluations for the 2 d probes of a row instead of 2 d.  The
values equal the mixture kernel's (:func:`.mixture._skew_logpdf_rows`) to
rounding (~1e-12 relative); the kernel's z clip (``z_max``, 1e100) is not
applied to the probes, as it never binds on values clipped to the far limits.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .common import _LOG_SQRT_2PI, parallel

#: Rows per parallel block (a climb has a few hundred rows, each costing 2 evaluations).
PROBE_BLOCK = 16
from .mixture import bg_logpdf, conditional_means, skew_y


def probe_factors(comp) -> tuple[np.ndarray, np.ndarray]:
    """``B`` (d, d, K) with ``B[:, j, k] = sd_j L_k^-1[:, j]`` and its squared
    column norms (d, K), from a :class:`.mixture.ComponentsInner` (``chol_t``
    strict lower part and ``1 / inv_sd`` on the diagonal make L_k)."""
    chol_t, inv_sd = comp.chol_t, comp.inv_sd
    d, _, K = chol_t.shape
    B = np.empty((d, d, K))
    for k in range(K):
        L = np.tril(chol_t[:, :, k], -1) + np.diag(1.0 / inv_sd[:, k])
        Linv = np.linalg.solve(L, np.eye(d))
        B[:, :, k] = np.tril(Linv) / inv_sd[None, :, k]
    return np.ascontiguousarray(B), np.ascontiguousarray((B * B).sum(axis=0))


@njit(cache=True, error_model="numpy")
def _probe_rows(start, stop, X, H, lo, hi, S, comp, bg, z_max, B, nB, floor):
    """S[i, j] = log density at clip(x_i + h_ij e_j), S[i, d + j] at clip(x_i - h_ij e_j)
    (each coordinate clipped to [lo, hi], as :meth:`AdditiveTreeDensity.score_samples` does)."""
    logw, means_t, chol_t, inv_sd, log_sd, skew = (comp.logw, comp.means_t, comp.chol_t, comp.inv_sd,
                                                   comp.log_sd, comp.skew)
    d, K = means_t.shape
    start_k = np.empty(K)
    for k in range(K):
        start_k[k] = logw[k + 1] - d * _LOG_SQRT_2PI
        for j in range(d):
            start_k[k] -= log_sd[j, k]
    y0 = np.empty((d, K))
    ij0 = np.empty((d, K))      # 1 / dy/dx (times scale) of each channel at x
    z = np.empty((d, K))
    a = np.empty((d, K))
    m = np.empty(K)
    q0 = np.empty(K)
    u = np.empty(K)
    w = np.empty(K)
    base_k = np.empty(K)
    bgj = np.empty(d)
    for i in range(start, stop):
        lw0 = logw[0]
        for k in range(K):
            q0[k] = 0.0
            base_k[k] = start_k[k]
            w[k] = 1.0
        for j in range(d):
            x = min(max(X[i, j], lo[j]), hi[j])
            bgj[j] = bg_logpdf(x, j, bg, z_max)
            lw0 += bgj[j]
            conditional_means(m, means_t, chol_t, z, j)
            for k in range(K):
                y, jac = skew_y(x, skew, j, k)
                y0[j, k] = y
                ij0[j, k] = 1.0 / jac
                w[k] *= jac
                zz = min(max((y - m[k]) * inv_sd[j, k], -z_max), z_max)
                z[j, k] = zz
                q0[k] += zz * zz
        for k in range(K):
            base_k[k] += math.log(w[k]) - 0.5 * q0[k]
        # a[j, k] = z_k . B[:, j, k] (B lower triangular: rows q >= j)
        for j in range(d):
            for k in range(K):
                a[j, k] = 0.0
            for q in range(j, d):
                for k in range(K):
                    a[j, k] += z[q, k] * B[q, j, k]
        for side in range(2):
            for j in range(d):
                xr = X[i, j] + H[i, j] if side == 0 else X[i, j] - H[i, j]
                xp = min(max(xr, lo[j]), hi[j])
                l0 = lw0 - bgj[j] + bg_logpdf(xp, j, bg, z_max)
                # per component: the log density without the moved channel's change of
                # dy/dx (u), and that change as a factor (w, within exp(+-2|eps|))
                for k in range(K):
                    yp, jac = skew_y(xp, skew, j, k)
                    w[k] = jac * ij0[j, k]
                    dl = (yp - y0[j, k]) * inv_sd[j, k]
                    u[k] = base_k[k] - dl * a[j, k] - 0.5 * dl * dl * nB[j, k]
                mx = l0
                for k in range(K):
                    mx = max(mx, u[k])
                acc = math.exp(l0 - mx)
                for k in range(K):
                    acc += math.exp(u[k] - mx) * w[k]
                S[i, side * d + j] = max(mx + math.log(acc), floor)


@njit(cache=True, parallel=True, error_model="numpy")
def _probe_par(X, H, lo, hi, S, comp, bg, z_max, B, nB, floor):
    n = X.shape[0]
    nb = (n + PROBE_BLOCK - 1) // PROBE_BLOCK
    for b in prange(nb):
        _probe_rows(b * PROBE_BLOCK, min(n, (b + 1) * PROBE_BLOCK), X, H, lo, hi, S, comp, bg, z_max, B, nB, floor)


def skew_probe_logpdf(X, H, lo, hi, comp, bg, z_max, B, nB, floor) -> np.ndarray:
    """(m, 2 d) log densities of the skewed mixture at the axis probes of the rows of X
    (see the module docstring); H (m, d) the probe offsets, lo / hi (d,) the clip."""
    X = np.ascontiguousarray(X, dtype=np.float64)
    H = np.ascontiguousarray(H, dtype=np.float64)
    m, d = X.shape
    S = np.empty((m, 2 * d))
    args = (X, H, np.ascontiguousarray(lo, dtype=np.float64), np.ascontiguousarray(hi, dtype=np.float64),
            S, comp, bg, float(z_max), B, nB, float(floor))
    K = comp.means_t.shape[1]
    if parallel(m, (K + 1) * d * (d + 20)):
        _probe_par(*args)
    else:
        _probe_rows(0, m, *args)
    return S
