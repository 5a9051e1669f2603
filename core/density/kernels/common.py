"""What every compiled kernel shares: the work-splitting rule, constants and
scalar functions of the logistic and normal distributions (numba, float64)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit

#: Events per parallel work block in the per-event kernels.
BLOCK = 512
#: Deepest path a tree may have (path buffers are this long).
MAX_PATH = 64
#: Below this many (events x cost units) a kernel runs on one thread: thread
#: start-up costs more than it saves, and a busy machine makes it worse.
PARALLEL_MIN_WORK = 400_000

_SQRT1_2 = 0.7071067811865476
_INV_SQRT_2PI = 0.3989422804014327
_LOG_SQRT_2PI = 0.9189385332046727  # log(sqrt(2 pi))
#: probit input is kept in [U_EPS, 1 - U_EPS] (|z| <= 8.2); beyond that the
#: normal CDF itself rounds to 0 or 1 in float64.
U_EPS = 1e-16


def parallel(n_events, cost):
    """True when ``n_events`` x ``cost`` is worth splitting over threads."""
    return n_events * cost >= PARALLEL_MIN_WORK


@njit(cache=True)
def log_sigmoid_pair(z):
    """log(sigma(z)) + log(sigma(-z)) = log of the logistic density at z, stably."""
    a = abs(z)
    return -a - 2.0 * math.log1p(math.exp(-a))


@njit(cache=True)
def logistic_cdf(z):
    """sigma(z) = 1 / (1 + exp(-z)), without overflow for either sign of z."""
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


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


@njit(cache=True, error_model="numpy")
def softplus(u):
    """log(1 + exp(u)), stably."""
    if u > 0.0:
        return u + math.log1p(math.exp(-u))
    return math.log1p(math.exp(u))


@njit(inline="always")
def scaled_sq_distances(X, i, centre_t, slope_t, out):
    """out[k] = sum_j ((X[i, j] - centre_t[j, k]) * slope_t[j, k])^2 for every component k;
    centre_t, slope_t (d, K), out (K,).  The component index is innermost, which the
    compiler vectorises; inlined into the pruned E steps that rank components by it."""
    K = out.shape[0]
    for k in range(K):
        out[k] = 0.0
    for j in range(X.shape[1]):
        x = X[i, j]
        for k in range(K):
            t = (x - centre_t[j, k]) * slope_t[j, k]
            out[k] += t * t


def correlation_bound(chol):
    """For lower Cholesky factors chol (K, d, d) of covariances Sigma_k: (inv_sd
    (K, d) the inverse standard deviations, inv_top (K,) a lower bound of
    1 / lambda_max(C_k), C_k = S_k^-1 Sigma_k S_k^-1 the correlation matrix), so that
    (x - m)^T Sigma_k^-1 (x - m) >= inv_top[k] |inv_sd[k] (x - m)|^2 for every x, m.
    lambda_max(C_k) is the squared largest singular value of S_k^-1 L_k (LAPACK's
    SVD), widened by 1e-9 relative so that rounding never makes the bound too high."""
    sd = np.sqrt(np.einsum("kja,kja->kj", chol, chol))
    inv_sd = 1.0 / sd
    top = np.linalg.svd(chol * inv_sd[:, :, None], compute_uv=False)[:, 0]
    return inv_sd, 1.0 / (top * top * (1.0 + 1e-9))
