"""Channel transforms for display, regions and density fitting: the recipe's view.

The functions live by kind: :mod:`core.scales` (linear, log, arcsinh and the
Gating-ML 2.0 fasinh) and :mod:`core.logicle` (the Gating-ML 2.0 logicle); this
module re-exports them, so ``from core.transforms import logicle`` keeps
working.  Each takes values of any shape (instrument units, after
compensation) and returns float64 display units (logicle and fasinh map T to 1).

Transforms used by recipes are :class:`Transform` objects built from a
JSON-able spec by :func:`make_transform`:

    {"kind": "linear", "scale": 1.0, "offset": 0.0}
    {"kind": "log", "floor": 1.0}                       (optional "decades")
    {"kind": "arcsinh", "cofactor": 150.0}
    {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0}
    {"kind": "fasinh", "T": 262144.0, "M": 4.5, "A": 0.0}
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from .channel_kinds import FLUORESCENCE, SCATTER, TIME, channel_kind
from .errors import TransformError
from .logicle import (  # noqa: F401  (re-exported: the old import path)
    check_logicle_parameters, logicle, logicle_auto_w, logicle_constants, logicle_inverse)
from .scales import (  # noqa: F401  (re-exported: the old import path)
    DEFAULT_COFACTOR, DEFAULT_M, LN10, _check_cofactor, _check_fasinh, _check_log, _f64, _finite_number,
    arcsinh, arcsinh_inverse, fasinh, fasinh_inverse, linear, linear_inverse, log_floor, log_floor_inverse)

# ----------------------------------------------------------------------------- Transform objects

@dataclass(frozen=True)
class TransformParameter:
    """One parameter of a transform kind.

    ``default`` None means "no fixed default": the caller supplies it (``T``:
    the channel's range, ``$PnR``; ``decades``: optional).  ``low``/``high``:
    the inclusive bounds an editor offers and :func:`make_transform` checks
    (the kind's own rules, e.g. Gating-ML 2.0's, are checked as well).
    """

    key: str
    label: str
    help: str
    default: float | None
    low: float
    high: float
    optional: bool = False
    from_data: str = ""   # where a default of None comes from, in words (for the docs)


@dataclass(frozen=True)
class TransformKind:
    """A transform kind: its ``name`` in specs, a short ``label``, a ``help`` line, its parameters."""

    name: str
    label: str
    help: str
    parameters: tuple


_T = TransformParameter("T", "Top (T)", "Largest data value of the scale (usually the channel range, $PnR).",
                        None, 1e-9, 1e12, from_data="the channel range ($PnR)")
_M = TransformParameter("M", "Decades (M)", "Number of decades the scale covers.", DEFAULT_M, 1e-3, 10.0)

#: The ONE registry of transform kinds: recipe validation, make_transform, the
#: Channels panel and the docs (transform_kinds_markdown) all read it.
TRANSFORM_KINDS: dict[str, TransformKind] = {k.name: k for k in (
    TransformKind("linear", "linear", "scale * x + offset", (
        TransformParameter("scale", "Scale", "Multiply the values by this factor (not 0).", 1.0, -1e12, 1e12),
        TransformParameter("offset", "Offset", "Add this after scaling (in scaled units).", 0.0, -1e12, 1e12))),
    TransformKind("log", "log", "log10(max(x, floor)), optionally in units of `decades` above the floor", (
        TransformParameter("floor", "Floor", "Values below the floor are raised to it before the logarithm "
                           "(instrument units; common practice: 1).", 1.0, 1e-12, 1e12),
        TransformParameter("decades", "Decades", "Express the result in units of this many decades above "
                           "the floor (optional).", None, 1e-3, 100.0, optional=True))),
    TransformKind("arcsinh", "arcsinh", "arcsinh(x / cofactor)", (
        TransformParameter("cofactor", "Cofactor", "arcsinh(x / cofactor): linear near zero, logarithmic far "
                           "from it. Common practice: about 150 for fluorescence detectors, 5 for mass channels.",
                           DEFAULT_COFACTOR, 1e-9, 1e12),)),
    TransformKind("logicle", "logicle", "Gating-ML 2.0 logicle (biexponential)", (
        _T,
        TransformParameter("W", "Linear width (W)", "Width of the near-linear region around zero, in decades "
                           "(0 <= W <= M/2).", None, 0.0, 5.0,
                           from_data="from the negative values (logicle_auto_w)"),
        _M,
        TransformParameter("A", "Extra negative (A)", "Additional decades of negative values shown "
                           "(-W <= A <= M - 2W).", 0.0, -5.0, 10.0))),
    TransformKind("fasinh", "fasinh", "Gating-ML 2.0 parametrised inverse hyperbolic sine", (
        _T, _M,
        TransformParameter("A", "Extra negative (A)", "Additional decades of negative values shown "
                           "(0 <= A <= M).", 0.0, 0.0, 10.0))),
)}


def transform_kinds_markdown() -> str:
    """The registry as a Markdown table (DEVELOPERS.md carries it; a test keeps them equal)."""
    lines = ["| kind | what | parameter | default | bounds |", "|---|---|---|---|---|"]
    for k in TRANSFORM_KINDS.values():
        for i, p in enumerate(k.parameters):
            default = ("optional" if p.optional else p.from_data) if p.default is None else f"{p.default:g}"
            lines.append(f"| {k.name if i == 0 else ''} | {k.help if i == 0 else ''} | {p.key} | {default} "
                         f"| {p.low:g} .. {p.high:g} |")
    return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class Transform:
    """A channel transform: ``forward(x)``, ``inverse(y)``, a JSON-able ``spec`` and a short ``label``.

    Two transforms are equal when their specs are equal.
    """

    spec: dict
    label: str
    _forward: Callable[[Any], np.ndarray]
    _inverse: Callable[[Any], np.ndarray]

    @property
    def kind(self) -> str:
        return self.spec["kind"]

    def forward(self, x) -> np.ndarray:
        """Transformed values (float64, same shape as ``x``)."""
        return self._forward(x)

    def inverse(self, y) -> np.ndarray:
        """Values in instrument units (float64, same shape as ``y``)."""
        return self._inverse(y)

    __call__ = forward

    def __eq__(self, other) -> bool:
        return isinstance(other, Transform) and self.spec == other.spec

    def __hash__(self) -> int:
        return hash(tuple(sorted((k, str(v)) for k, v in self.spec.items())))


def _g(v: float) -> str:
    return f"{v:g}"


def make_transform(spec: dict) -> Transform:
    """Build a :class:`Transform` from its spec (see the module docstring).

    Missing optional parameters take their defaults; unknown kinds or
    parameters and invalid values raise :class:`TransformError`.
    """
    if not isinstance(spec, dict) or "kind" not in spec:
        raise TransformError(f"a transform needs a dict with a 'kind', not {spec!r}")
    kind = str(spec["kind"]).lower()
    if kind not in TRANSFORM_KINDS:
        raise TransformError(f"unknown transform kind {spec['kind']!r}; known kinds: {', '.join(TRANSFORM_KINDS)}")
    allowed = {p.key: p for p in TRANSFORM_KINDS[kind].parameters}
    extra = sorted(set(spec) - set(allowed) - {"kind"})
    if extra:
        raise TransformError(f"the {kind} transform has no parameter(s) {', '.join(extra)}; "
                             f"it takes {', '.join(allowed)}")
    params = {}
    for key, p in allowed.items():
        value = spec.get(key, p.default)
        if value is None and not p.optional:
            raise TransformError(f"the {kind} transform needs the parameter {key}")
        params[key] = None if value is None else _finite_number(value, key)
    transform = _build(kind, params)   # the kind's own rules first: their messages say more
    for key, p in allowed.items():
        if params[key] is not None and not p.low <= params[key] <= p.high:
            raise TransformError(f"the {kind} transform's {p.label} ({key}) must lie between {p.low:g} and "
                                 f"{p.high:g}, not {params[key]:g}")
    return transform


def _build(kind: str, params: dict) -> Transform:

    if kind == "linear":
        s, o = params["scale"], params["offset"]
        linear(0.0, s, o)  # validates
        return Transform({"kind": "linear", "scale": s, "offset": o},
                         "linear" if (s == 1 and o == 0) else f"linear ×{_g(s)}" + (f" {o:+g}" if o else ""),
                         lambda x: linear(x, s, o), lambda y: linear_inverse(y, s, o))
    if kind == "log":
        fl, dec = params["floor"], params["decades"]
        _check_log(fl, dec)
        out = {"kind": "log", "floor": fl}
        if dec is not None:
            out["decades"] = dec
        return Transform(out, f"log10 (floor {_g(fl)})",
                         lambda x: log_floor(x, fl, dec), lambda y: log_floor_inverse(y, fl, dec))
    if kind == "arcsinh":
        cf = _check_cofactor(params["cofactor"])
        return Transform({"kind": "arcsinh", "cofactor": cf}, f"arcsinh (cofactor {_g(cf)})",
                         lambda x: arcsinh(x, cf), lambda y: arcsinh_inverse(y, cf))
    if kind == "fasinh":
        T, M, A = _check_fasinh(params["T"], params["M"], params["A"])
        return Transform({"kind": "fasinh", "T": T, "M": M, "A": A}, f"fasinh (T={_g(T)}, M={_g(M)}, A={_g(A)})",
                         lambda x: fasinh(x, T, M, A), lambda y: fasinh_inverse(y, T, M, A))
    T, W, M, A = check_logicle_parameters(params["T"], params["W"], params["M"], params["A"])
    return Transform({"kind": "logicle", "T": T, "W": W, "M": M, "A": A},
                     f"logicle (T={_g(T)}, W={W:.2f}, M={_g(M)}, A={_g(A)})",
                     lambda x: logicle(x, T, W, M, A), lambda y: logicle_inverse(y, T, W, M, A))


def is_scatter_or_time(channel_name: str, label: str | None = None) -> bool:
    """True for scatter and time channels (:func:`core.channel_kinds.channel_kind`)."""
    return channel_kind(channel_name, label) in (SCATTER, TIME)


def default_transform_spec(channel_name: str, values=None, channel_range: float | None = None,
                           label: str | None = None) -> dict:
    """A sensible starting transform for a channel.

    Scatter, time and other channels (:mod:`core.channel_kinds`): linear,
    scaled by the channel range ($PnR) so values run over about [0, 1].
    Fluorescence: logicle with T = the channel range, M = 4.5 and W from the
    negative ``values`` (:func:`logicle_auto_w`); arcsinh (cofactor 150) when
    the range is unknown.
    """
    rng = None
    if channel_range is not None:
        try:
            rng = float(channel_range)
        except (TypeError, ValueError):
            rng = None
        if rng is not None and not (math.isfinite(rng) and rng > 0):
            rng = None

    if channel_kind(channel_name, label) != FLUORESCENCE:
        if rng is None and values is not None:
            x = _f64(values)
            x = x[np.isfinite(x)]
            top = float(np.max(np.abs(x))) if x.size else 0.0
            rng = top if top > 0 else None
        return {"kind": "linear", "scale": 1.0 / rng if rng else 1.0, "offset": 0.0}
    if rng is None:
        return {"kind": "arcsinh", "cofactor": DEFAULT_COFACTOR}
    W = logicle_auto_w(values, rng, DEFAULT_M) if values is not None else 0.0
    return {"kind": "logicle", "T": rng, "W": W, "M": DEFAULT_M, "A": 0.0}
