"""The Gating-ML 2.0 logicle transform and its inverse.

``logicle(x, T, W, M, A)`` is the root y of the biexponential
``B(y) = a e^(b y) - c e^(-d y) - f`` with ``w = W/(M+A)``, ``x2 = A/(M+A)``,
``x1 = x2 + w``, ``x0 = x2 + 2w``, ``b = (M+A) ln10``, d the root of
``2(ln d - ln b) + w(b + d) = 0``, ``ca = e^(x0 (b + d))``,
``fa = e^(b x1) - ca e^(-d x1)``, ``a = T / (e^b - fa - ca e^(-d))``,
``c = ca a``, ``f = fa a``.  ``B(x1) = 0`` and ``B(1) = T``; negative data are
reflected about x1 (``logicle(-x) = 2 x1 - logicle(x)``), as the logicle method
defines the scale.  Written around x1 as ``p expm1(b z) - q expm1(-d z)`` with
``z = y - x1``, ``p = a e^(b x1)``, ``q = c e^(-d x1)``, the function has no
cancellation near zero.

Solving, per value (compiled, parallel over values; input of any float type,
output float64): the start comes from a cached table of exact roots at
256 points per octave of the value (the octave and the position in it read
from the float's exponent and mantissa, no logarithm), within about 1e-7 of
the root; one Halley step then brings it to the rounding of the logicle value
(cubic convergence).  A value whose step is not small, or that lies outside the
table, goes to Halley's method kept inside the bracket
``log1p(max(v - q, 0)/p)/b <= z <= log1p(v/p)/b`` (bisection when a step leaves
it), which always converges: relative residual about 1e-15.  The inverse is the
closed form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numba
import numpy as np

from .errors import TransformError
from .scales import DEFAULT_M, LN10, _check_top_and_decades, _f64, _finite_number

__all__ = ["check_logicle_parameters", "logicle", "logicle_inverse", "logicle_constants", "logicle_auto_w"]


def check_logicle_parameters(T, W, M, A) -> tuple[float, float, float, float]:
    """Validated ``(T, W, M, A)`` as floats; raises :class:`TransformError` in plain words.

    Gating-ML 2.0: T > 0, M > 0, 0 <= W <= M/2, -W <= A <= M - 2W.
    """
    T, M = _check_top_and_decades(T, M, "logicle: ")
    W = _finite_number(W, "W")
    A = _finite_number(A, "A")
    if not 0 <= W <= M / 2:
        raise TransformError(
            f"logicle: the linear width W must lie between 0 and M/2 = {M / 2:g} decades, not {W}")
    if not -W <= A <= M - 2 * W:
        raise TransformError(
            f"logicle: the extra negative decades A must lie between -W = {-W:g} and M - 2W = {M - 2 * W:g}, not {A}")
    return T, W, M, A


@dataclass(frozen=True)
class _LogicleConstants:
    x1: float
    b: float
    d: float
    p: float   # a e^(b x1)
    q: float   # c e^(-d x1)


def _solve_d(b: float, w: float) -> float:
    """Root d in (0, b] of 2(ln d - ln b) + w(b + d) = 0 (Gating-ML 2.0); d = b when w = 0."""
    if w == 0.0:
        return b
    g = lambda d: 2.0 * (math.log(d) - math.log(b)) + w * (b + d)  # noqa: E731, increasing in d
    lo, hi = 0.0, b          # g(b) = 2wb > 0, g(0+) = -inf
    d = b / 2
    for _ in range(200):     # Newton inside the bracket, bisection when it leaves it
        gd = g(d)
        if gd > 0:
            hi = d
        else:
            lo = d
        step = gd / (2.0 / d + w)
        nd = d - step
        if not lo < nd < hi:
            nd = 0.5 * (lo + hi)
        if abs(nd - d) <= 2 * np.finfo(float).eps * nd:
            return nd
        d = nd
    return d


@lru_cache(maxsize=256)
def _logicle_constants(T: float, W: float, M: float, A: float) -> _LogicleConstants:
    w = W / (M + A)
    x2 = A / (M + A)
    x1 = x2 + w
    x0 = x2 + 2 * w
    b = (M + A) * LN10
    d = _solve_d(b, w)
    ca = math.exp(x0 * (b + d))
    fa = math.exp(b * x1) - ca * math.exp(-d * x1)
    a = T / (math.exp(b) - fa - ca * math.exp(-d))
    c = ca * a
    return _LogicleConstants(x1=x1, b=b, d=d, p=a * math.exp(b * x1), q=c * math.exp(-d * x1))


def logicle_constants(T: float, W: float, M: float = DEFAULT_M, A: float = 0.0) -> dict[str, float]:
    """The Gating-ML 2.0 biexponential constants a, b, c, d, f, x1 for these parameters."""
    T, W, M, A = check_logicle_parameters(T, W, M, A)
    k = _logicle_constants(T, W, M, A)
    a = k.p * math.exp(-k.b * k.x1)
    c = k.q * math.exp(k.d * k.x1)
    return {"a": a, "b": k.b, "c": c, "d": k.d, "f": k.p - k.q, "x1": k.x1}


def _biex_positive(z: np.ndarray, k: _LogicleConstants) -> np.ndarray:
    """B(x1 + z) for z >= 0, without cancellation."""
    return k.p * np.expm1(k.b * z) - k.q * np.expm1(-k.d * z)


def logicle(x, T: float, W: float, M: float = DEFAULT_M, A: float = 0.0) -> np.ndarray:
    """Gating-ML 2.0 logicle of ``x`` (any shape and float type; float64 out); maps 0 to (W+A)/(M+A), T to 1.

    NaN stays NaN, +-inf map to +-inf.
    """
    T, W, M, A = check_logicle_parameters(T, W, M, A)
    k = _logicle_constants(T, W, M, A)
    x = np.asarray(x)
    if x.dtype.kind != "f":
        x = x.astype(np.float64)
    flat = x if x.ndim == 1 else np.ascontiguousarray(x).reshape(-1)   # a column of a matrix is read in place
    table, e_lo, e_hi = _start_table(k)
    out = _logicle_kernel(flat, table, e_lo, e_hi, _PER_OCTAVE, k.x1, k.p, k.q, k.b, k.d)
    return out.reshape(x.shape)


#: Table points per octave of the value (linear in the mantissa within an octave).
_PER_OCTAVE = 256
#: Below this z the start is the linear term v / B'(x1) (relative error about z).
_TABLE_LOW_Z = 1e-9
#: The table covers logicle values up to x1 + this (beyond it the start is the log bound).
_TABLE_REACH = 1.6


@lru_cache(maxsize=64)
def _start_table(k: _LogicleConstants) -> tuple[np.ndarray, int, int]:
    """(z_table, e_lo, e_hi): exact roots z at v = 2^(e-1) (1 + i / 256) for octaves e_lo <= e < e_hi.

    Entry ``(e - e_lo) * 256 + i``; one more entry closes the last octave.  In
    the linear region z is linear in v, so interpolation within an octave is
    exact to first order there; in the logarithmic region z is about
    log2(v) ln2 / b, whose curvature in the mantissa bounds the interpolation
    error by about (1/256)^2 / 8 / b (1e-7 here).  The roots come from the
    bracketed solver, to full convergence.
    """
    slope = k.p * k.b + k.q * k.d          # B'(x1)
    e_lo = math.frexp(slope * _TABLE_LOW_Z)[1]
    e_hi = math.frexp(float(_biex_positive(np.array(_TABLE_REACH), k)))[1] + 1
    i = np.arange((e_hi - e_lo) * _PER_OCTAVE + 1)
    e = e_lo + i // _PER_OCTAVE
    v = np.ldexp(1.0 + (i % _PER_OCTAVE) / _PER_OCTAVE, (e - 1).astype(np.int64))
    z = _bracketed_kernel(v, k.p, k.q, k.b, k.d, 200)
    return z, int(e_lo), int(e_hi)


@numba.njit(cache=True, parallel=True, fastmath=False)
def _logicle_kernel(x, table, e_lo, e_hi, per, x1, p, q, b, d):  # pragma: no cover - compiled
    """logicle of every x[i] (see the module notes); x: 1-D of any float type."""
    n = x.shape[0]
    out = np.empty(n)
    slope = p * b + q * d
    for i in numba.prange(n):
        xi = np.float64(x[i])
        if not np.isfinite(xi):
            out[i] = xi            # NaN stays NaN, +-inf stay +-inf
            continue
        v = abs(xi)
        if v == 0.0:
            out[i] = x1
            continue
        m, e = math.frexp(v)       # v = m 2^e, 0.5 <= m < 1
        if e < e_lo:
            z = v / slope
        elif e >= e_hi:
            z = math.log1p(v / p) / b
        else:
            t = (2.0 * m - 1.0) * per
            j = int(t)
            at = (e - e_lo) * per + j
            z = table[at] + (t - j) * (table[at + 1] - table[at])
        _, step = _halley(z, v, p, q, b, d)
        zn = z - step
        # Halley converges cubically: from a start within about 1e-7 the error left is of
        # order b^2 step^3, below the rounding of the logicle value; otherwise solve fully
        if not (abs(step) <= 1e-6 and zn >= 0.0):
            zn = _bracketed_one(v, p, q, b, d, 200)
        out[i] = x1 + zn if xi > 0.0 else x1 - zn
    return out


@numba.njit(cache=True, fastmath=False, inline="always")
def _halley(z, v, p, q, b, d):  # pragma: no cover - compiled
    """(h, step): the residual p expm1(b z) - q expm1(-d z) - v and Halley's step from z.

    expm1 alone gives both e^x - 1 (no cancellation near z = 0) and e^x; the step
    is written as newton / (1 - newton h'' / (2 h')) to avoid overflow.
    """
    emb = math.expm1(b * z)
    emd = math.expm1(-d * z)
    h = p * emb - q * emd - v
    h1 = p * b * (emb + 1.0) + q * d * (emd + 1.0)
    h2 = p * b * b * (emb + 1.0) - q * d * d * (emd + 1.0)
    newton = h / h1
    return h, newton / (1.0 - 0.5 * newton * (h2 / h1))


@numba.njit(cache=True, fastmath=False)
def _bracketed_one(v, p, q, b, d, max_iter):  # pragma: no cover - compiled
    """z >= 0 with p expm1(b z) - q expm1(-d z) = v (finite v > 0): Halley inside a bracket."""
    eps = 2.220446049250313e-16
    lo = math.log1p(max(v - q, 0.0) / p) / b
    hi = math.log1p(v / p) / b
    z = 0.5 * (lo + hi)
    for _ in range(max_iter):
        h, step = _halley(z, v, p, q, b, d)
        if h == 0.0:
            break
        if h < 0.0:
            lo = z
        else:
            hi = z
        zn = z - step
        if abs(step) <= 2.0 * eps * abs(z):
            z = zn if (zn >= lo and zn <= hi) else z
            break
        if not (zn >= lo and zn <= hi):
            zn = 0.5 * (lo + hi)
        z = zn
        if hi - lo <= 2.0 * eps * abs(z):
            break
    return z


@numba.njit(cache=True, parallel=True, fastmath=False)
def _bracketed_kernel(v, p, q, b, d, max_iter):  # pragma: no cover - compiled
    n = v.shape[0]
    out = np.empty(n)
    for i in numba.prange(n):
        out[i] = 0.0 if v[i] == 0.0 else _bracketed_one(v[i], p, q, b, d, max_iter)
    return out


def logicle_inverse(y, T: float, W: float, M: float = DEFAULT_M, A: float = 0.0) -> np.ndarray:
    """Inverse of :func:`logicle`: the biexponential ``B(y)``, reflected about x1 (closed form)."""
    T, W, M, A = check_logicle_parameters(T, W, M, A)
    k = _logicle_constants(T, W, M, A)
    z = _f64(y) - k.x1
    return np.sign(z) * _biex_positive(np.abs(z), k)


def logicle_auto_w(data, T: float, M: float = DEFAULT_M, r_quantile: float = 0.05) -> float:
    """Linear width W from the negative data, as the logicle method describes.

    ``W = (M - log10(T / |r|)) / 2`` with r the ``r_quantile`` quantile of the
    negative finite values (r_quantile = 0.05: the 5th percentile, near the most
    negative end), clipped to [0, M/2].  W = 0 when there are no negative values.
    """
    T = _finite_number(T, "T")
    M = _finite_number(M, "M")
    if T <= 0 or M <= 0:
        raise TransformError(f"logicle: T and M must be above zero (T = {T}, M = {M})")
    if not 0 <= r_quantile <= 1:
        raise TransformError(f"logicle: the quantile for W must lie between 0 and 1, not {r_quantile}")
    x = _f64(data).ravel()
    neg = x[np.isfinite(x) & (x < 0)]
    if neg.size == 0:
        return 0.0
    r = float(np.quantile(neg, r_quantile))
    w = (M - math.log10(T / abs(r))) / 2.0
    return float(min(max(w, 0.0), M / 2.0))
