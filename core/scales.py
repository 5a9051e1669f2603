"""The simple channel transforms and the checks every transform's parameters share.

Pure, vectorised functions on arrays of any shape (usually one channel's
events; float32 input is read as float64), each with its inverse; the results
are float64:

* ``linear(x, scale, offset)``: ``scale * x + offset``.
* ``log_floor(x, floor, decades)``: ``log10`` with values below ``floor``
  clipped to ``floor`` (the inverse gives back ``floor`` for those).
* ``arcsinh(x, cofactor)``: ``arcsinh(x / cofactor)``; a cofactor of about 150
  is common practice for fluorescence flow, about 5 for mass cytometry.
* ``fasinh(x, T, M, A)``: the Gating-ML 2.0 parametrised inverse hyperbolic sine,
  ``(asinh(x sinh(M ln10) / T) + A ln10) / ((M + A) ln10)``; maps T to 1.

The logicle is in :mod:`core.logicle`; recipes build transforms through
:mod:`core.transforms`, which re-exports all of these.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import TransformError

LN10 = math.log(10.0)

#: Logicle decades used by default (common practice for 18-bit data, T = 262144).
DEFAULT_M = 4.5
#: arcsinh cofactor used when a fluorescence channel has no known range (common practice).
DEFAULT_COFACTOR = 150.0


def _f64(x) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _finite_number(value, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TransformError(f"the transform parameter {name} must be a number, not {value!r}") from None
    if not math.isfinite(v):
        raise TransformError(f"the transform parameter {name} must be finite, not {v}")
    return v


# ----------------------------------------------------------------------------- linear

def linear(x, scale: float = 1.0, offset: float = 0.0) -> np.ndarray:
    """``scale * x + offset`` (float64, same shape as ``x``)."""
    scale = _finite_number(scale, "scale")
    offset = _finite_number(offset, "offset")
    if scale == 0.0:
        raise TransformError("the linear transform's scale must not be zero")
    return _f64(x) * scale + offset


def linear_inverse(y, scale: float = 1.0, offset: float = 0.0) -> np.ndarray:
    """Inverse of :func:`linear`: ``(y - offset) / scale``."""
    scale = _finite_number(scale, "scale")
    offset = _finite_number(offset, "offset")
    if scale == 0.0:
        raise TransformError("the linear transform's scale must not be zero")
    return (_f64(y) - offset) / scale


# ----------------------------------------------------------------------------- log

def _check_log(floor, decades):
    floor = _finite_number(floor, "floor")
    if floor <= 0:
        raise TransformError(f"the log transform's floor must be above zero, not {floor}")
    if decades is not None:
        decades = _finite_number(decades, "decades")
        if decades <= 0:
            raise TransformError(f"the log transform's number of decades must be above zero, not {decades}")
    return floor, decades


def log_floor(x, floor: float = 1.0, decades: float | None = None) -> np.ndarray:
    """``log10(max(x, floor))``; NaN stays NaN.

    With ``decades`` the result is expressed in units of ``decades`` decades
    above the floor: ``(log10(max(x, floor)) - log10(floor)) / decades``, so the
    floor maps to 0 and ``floor * 10**decades`` to 1.
    """
    floor, decades = _check_log(floor, decades)
    x = _f64(x)
    y = np.log10(np.fmax(x, floor))   # fmax keeps the floor for -inf; NaN propagates below
    y = np.where(np.isnan(x), np.nan, y)
    if decades is not None:
        y = (y - math.log10(floor)) / decades
    return y


def log_floor_inverse(y, floor: float = 1.0, decades: float | None = None) -> np.ndarray:
    """Inverse of :func:`log_floor` (values clipped to the floor come back as the floor)."""
    floor, decades = _check_log(floor, decades)
    y = _f64(y)
    if decades is not None:
        y = y * decades + math.log10(floor)
    return np.power(10.0, y)


# ----------------------------------------------------------------------------- arcsinh

def _check_cofactor(cofactor):
    cofactor = _finite_number(cofactor, "cofactor")
    if cofactor <= 0:
        raise TransformError(f"the arcsinh cofactor must be above zero, not {cofactor}")
    return cofactor


def arcsinh(x, cofactor: float = DEFAULT_COFACTOR) -> np.ndarray:
    """``arcsinh(x / cofactor)``."""
    return np.arcsinh(_f64(x) / _check_cofactor(cofactor))


def arcsinh_inverse(y, cofactor: float = DEFAULT_COFACTOR) -> np.ndarray:
    """Inverse of :func:`arcsinh`: ``cofactor * sinh(y)``."""
    return _check_cofactor(cofactor) * np.sinh(_f64(y))


# ----------------------------------------------------------------------------- fasinh (Gating-ML 2.0)

def _check_top_and_decades(T, M, who: str = "") -> tuple[float, float]:
    """T (top of scale) and M (decades) as floats, both above zero (Gating-ML 2.0)."""
    T = _finite_number(T, "T")
    M = _finite_number(M, "M")
    if T <= 0:
        raise TransformError(f"{who}the top of scale T must be above zero, not {T}")
    if M <= 0:
        raise TransformError(f"{who}the number of decades M must be above zero, not {M}")
    return T, M


def _check_fasinh(T, M, A):
    T, M = _check_top_and_decades(T, M)
    A = _finite_number(A, "A")
    if not 0 <= A <= M:
        raise TransformError(f"the extra negative decades A must lie between 0 and M = {M}, not {A}")
    return T, M, A


def fasinh(x, T: float, M: float = DEFAULT_M, A: float = 0.0) -> np.ndarray:
    """Gating-ML 2.0 fasinh: ``(asinh(x sinh(M ln10)/T) + A ln10) / ((M+A) ln10)``."""
    T, M, A = _check_fasinh(T, M, A)
    return (np.arcsinh(_f64(x) * (math.sinh(M * LN10) / T)) + A * LN10) / ((M + A) * LN10)


def fasinh_inverse(y, T: float, M: float = DEFAULT_M, A: float = 0.0) -> np.ndarray:
    """Inverse of :func:`fasinh`: ``T sinh((M+A) ln10 y - A ln10) / sinh(M ln10)``."""
    T, M, A = _check_fasinh(T, M, A)
    return T * np.sinh((M + A) * LN10 * _f64(y) - A * LN10) / math.sinh(M * LN10)

