"""Tests of core.transforms against Gating-ML 2.0 definitions, numpy and scipy."""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq

from core.errors import TransformError
from core.transforms import (
    arcsinh,
    arcsinh_inverse,
    default_transform_spec,
    fasinh,
    fasinh_inverse,
    linear,
    linear_inverse,
    log_floor,
    log_floor_inverse,
    logicle,
    logicle_auto_w,
    logicle_constants,
    logicle_inverse,
    make_transform,
)

LN10 = math.log(10)
# (T, W, M, A) sets within the Gating-ML 2.0 limits; the first is the common
# 18-bit default (common practice).
PARAMS = [
    (262144.0, 0.5, 4.5, 0.0),
    (262144.0, 0.0, 4.5, 0.0),
    (262144.0, 2.25, 4.5, 0.0),
    (10000.0, 1.0, 4.0, 1.0),
    (1024.0, 0.3, 3.0, -0.3),
]


def _published_biexponential(y, T, W, M, A):
    """B(y) = a e^(by) - c e^(-dy) - f evaluated directly from the Gating-ML 2.0
    formulas (d found by scipy's brentq, independently of the module's solver)."""
    w = W / (M + A)
    x2 = A / (M + A)
    x1 = x2 + w
    x0 = x2 + 2 * w
    b = (M + A) * LN10
    if w == 0:
        d = b
    else:
        d = brentq(lambda d: 2 * (math.log(d) - math.log(b)) + w * (b + d), 1e-12, b, xtol=1e-300, rtol=1e-15)
    ca = math.exp(x0 * (b + d))
    fa = math.exp(b * x1) - ca * math.exp(-d * x1)
    a = T / (math.exp(b) - fa - ca * math.exp(-d))
    c = ca * a
    f = fa * a
    return a * math.exp(b * y) - c * math.exp(-d * y) - f, x1


@pytest.mark.parametrize("T,W,M,A", PARAMS)
def test_logicle_gatingml_fixed_points(T, W, M, A):
    # reference: Gating-ML 2.0 logicle: logicle(T) = 1, logicle(0) = (W+A)/(M+A)
    assert logicle(T, T, W, M, A) == pytest.approx(1.0, abs=1e-14)
    assert logicle(0.0, T, W, M, A) == pytest.approx((W + A) / (M + A), abs=1e-15)
    assert logicle_inverse(1.0, T, W, M, A) == pytest.approx(T, rel=1e-13)
    k = logicle_constants(T, W, M, A)
    # reference: Gating-ML 2.0 constant b = (M + A) ln 10 and the d equation
    assert k["b"] == pytest.approx((M + A) * LN10, rel=1e-15)
    w = W / (M + A)
    assert 2 * (math.log(k["d"]) - math.log(k["b"])) + w * (k["b"] + k["d"]) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("T,W,M,A", PARAMS)
def test_logicle_solves_the_published_biexponential(T, W, M, A):
    # For x >= 0 the logicle value y is the root of B(y) - x, B from the
    # published formulas (reference: Gating-ML 2.0 logicle; scipy.optimize.brentq).
    xs = np.concatenate([np.logspace(-2, math.log10(4 * T), 40), [1.0, 0.5 * T]])
    ys = logicle(xs, T, W, M, A)
    for x, y in zip(xs, ys):
        Bx, x1 = _published_biexponential(y, T, W, M, A)
        y_ref = brentq(lambda t: _published_biexponential(t, T, W, M, A)[0] - x, x1, 3.0, xtol=1e-16, rtol=1e-15)
        assert y == pytest.approx(y_ref, rel=1e-12, abs=1e-13)


@pytest.mark.parametrize("T,M,A", [(262144.0, 4.5, 0.0), (262144.0, 4.5, 1.0), (1000.0, 3.0, 0.5)])
def test_logicle_with_zero_width_is_fasinh(T, M, A):
    # reference: Gating-ML 2.0: logicle with W = 0 is fasinh
    x = np.concatenate([-np.logspace(-3, 6, 50), np.logspace(-3, 6, 50), [0.0]])
    np.testing.assert_allclose(logicle(x, T, 0.0, M, A), fasinh(x, T, M, A), rtol=1e-12, atol=1e-14)


def test_fasinh_gatingml_values():
    T, M, A = 262144.0, 4.5, 0.5
    # reference: Gating-ML 2.0 fasinh: fasinh(T) = 1, fasinh(0) = A/(M+A)
    assert fasinh(T, T, M, A) == pytest.approx(1.0, abs=1e-14)
    assert fasinh(0.0, T, M, A) == pytest.approx(A / (M + A), abs=1e-15)
    x = np.array([-5000.0, -1.0, 3.0, 1e4, 1e7])
    # reference: the Gating-ML 2.0 formula evaluated with numpy.arcsinh
    ref = (np.arcsinh(x * np.sinh(M * LN10) / T) + A * LN10) / ((M + A) * LN10)
    np.testing.assert_allclose(fasinh(x, T, M, A), ref, rtol=1e-14)
    np.testing.assert_allclose(fasinh_inverse(fasinh(x, T, M, A), T, M, A), x, rtol=1e-9)


def test_arcsinh_matches_numpy():
    x = np.linspace(-1e5, 1e5, 1001)
    # reference: numpy.arcsinh; cofactor 150 for fluorescence flow (common practice)
    np.testing.assert_array_equal(arcsinh(x, 150.0), np.arcsinh(x / 150.0))
    np.testing.assert_allclose(arcsinh_inverse(arcsinh(x, 5.0), 5.0), x, rtol=1e-12, atol=1e-9)


def test_linear_and_log():
    x = np.array([-10.0, 0.0, 0.5, 1.0, 10.0, 1e5, np.nan])
    np.testing.assert_allclose(linear(x, 2.0, 1.0), 2.0 * x + 1.0)
    np.testing.assert_allclose(linear_inverse(linear(x, 1 / 262144, 0.1), 1 / 262144, 0.1), x, rtol=1e-12)
    y = log_floor(x, floor=1.0)
    # reference: numpy.log10 with values below the floor clipped to it
    np.testing.assert_array_equal(y[:6], np.log10(np.maximum(x[:6], 1.0)))
    assert np.isnan(y[-1])
    assert log_floor(1e4, floor=10.0, decades=3.0) == pytest.approx(1.0)   # floor*10**decades -> 1
    np.testing.assert_allclose(log_floor_inverse(log_floor(x[3:6], 1.0), 1.0), x[3:6], rtol=1e-12)


@settings(max_examples=60, deadline=None)
@given(T=st.floats(10.0, 1e7), M=st.floats(2.0, 7.0), wfrac=st.floats(0.0, 1.0), afrac=st.floats(0.0, 1.0),
       xs=st.lists(st.floats(-1e7, 1e7, allow_nan=False), min_size=2, max_size=30))
def test_logicle_monotone_and_round_trip(T, M, wfrac, afrac, xs):
    W = wfrac * M / 2
    A = -W + afrac * (M - W)   # within [-W, M - 2W]
    A = min(A, M - 2 * W)
    x = np.sort(np.array(xs))
    y = logicle(x, T, W, M, A)
    # reference: Gating-ML 2.0: logicle is the inverse of the increasing biexponential
    assert np.all(np.diff(y) >= 0)
    back = logicle_inverse(y, T, W, M, A)
    big = np.abs(x) >= 1.0
    np.testing.assert_allclose(back[big], x[big], rtol=1e-9)
    # in the transformed space the round trip is exact to rounding
    yy = np.linspace(-0.5, 1.5, 25)
    np.testing.assert_allclose(logicle(logicle_inverse(yy, T, W, M, A), T, W, M, A), yy, rtol=0, atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(T=st.floats(10.0, 1e7), M=st.floats(1.0, 7.0), afrac=st.floats(0.0, 1.0),
       xs=st.lists(st.floats(-1e7, 1e7, allow_nan=False), min_size=2, max_size=30))
def test_fasinh_monotone_and_round_trip(T, M, afrac, xs):
    A = afrac * M
    x = np.sort(np.array(xs))
    y = fasinh(x, T, M, A)
    assert np.all(np.diff(y) >= 0)
    big = np.abs(x) >= 1.0
    np.testing.assert_allclose(fasinh_inverse(y, T, M, A)[big], x[big], rtol=1e-9)


def test_logicle_handles_non_finite_and_shapes():
    T, W, M, A = PARAMS[0]
    x = np.array([[np.nan, np.inf], [-np.inf, 0.0]])
    y = logicle(x, T, W, M, A)
    assert y.shape == (2, 2)
    assert np.isnan(y[0, 0]) and y[0, 1] == np.inf and y[1, 0] == -np.inf
    assert y[1, 1] == pytest.approx(1 / 9)


@pytest.mark.parametrize("kwargs,words", [
    (dict(T=0.0, W=0.5, M=4.5, A=0.0), "top of scale T"),
    (dict(T=1e4, W=0.5, M=0.0, A=0.0), "decades M"),
    (dict(T=1e4, W=3.0, M=4.5, A=0.0), "linear width W"),
    (dict(T=1e4, W=-0.1, M=4.5, A=0.0), "linear width W"),
    (dict(T=1e4, W=0.5, M=4.5, A=-1.0), "negative decades A"),
    (dict(T=1e4, W=1.0, M=4.5, A=3.0), "negative decades A"),
    (dict(T=float("nan"), W=0.5, M=4.5, A=0.0), "finite"),
])
def test_logicle_parameter_checks(kwargs, words):
    # reference: Gating-ML 2.0 logicle limits T > 0, M > 0, 0 <= W <= M/2, -W <= A <= M - 2W
    with pytest.raises(TransformError, match=words):
        logicle(1.0, **kwargs)


def test_auto_w():
    rng = np.random.default_rng(0)
    T, M = 262144.0, 4.5
    x = np.concatenate([rng.normal(0, 100, 20000), rng.lognormal(8, 1, 20000)])
    neg = x[x < 0]
    r = np.quantile(neg, 0.05)
    # reference: logicle method, W = (M - log10(T/|r|)) / 2 (from memory of the published rule)
    assert logicle_auto_w(x, T, M) == pytest.approx((M - math.log10(T / abs(r))) / 2)
    assert logicle_auto_w(np.abs(x), T, M) == 0.0                       # no negatives -> W = 0
    assert logicle_auto_w(np.array([-1e9, 5.0]), T, M) == M / 2          # clipped to M/2
    assert logicle_auto_w(np.array([-1e-6, 5.0]), T, M) == 0.0           # clipped to 0
    # wider negative spread -> wider linear region
    assert logicle_auto_w(x * np.where(x < 0, 5, 1), T, M) > logicle_auto_w(x, T, M)


def test_transform_objects_from_specs():
    x = np.array([-300.0, 0.0, 12.0, 5e4])
    specs = [
        {"kind": "linear", "scale": 1 / 262144, "offset": 0.0},
        {"kind": "log", "floor": 1.0},
        {"kind": "arcsinh", "cofactor": 150.0},
        {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0},
        {"kind": "fasinh", "T": 262144.0, "M": 4.5, "A": 0.0},
    ]
    refs = [x / 262144, np.log10(np.maximum(x, 1.0)), np.arcsinh(x / 150.0),
            logicle(x, 262144.0, 0.5, 4.5, 0.0), fasinh(x, 262144.0, 4.5, 0.0)]
    for spec, ref in zip(specs, refs):
        t = make_transform(spec)
        assert t.spec == spec
        assert json.loads(json.dumps(t.spec)) == spec           # JSON-able
        assert make_transform(t.spec).spec == t.spec
        np.testing.assert_allclose(t.forward(x), ref, rtol=1e-14)
        if spec["kind"] != "log":
            np.testing.assert_allclose(t.inverse(t.forward(x)), x, rtol=1e-9, atol=1e-9)
        assert isinstance(t.label, str) and 0 < len(t.label) < 60
    # defaults fill in optional parameters
    assert make_transform({"kind": "arcsinh"}).spec == {"kind": "arcsinh", "cofactor": 150.0}
    for bad, words in [({"kind": "sqrt"}, "unknown transform kind"),
                       ({"kind": "arcsinh", "cofator": 5}, "no parameter"),
                       ({"kind": "logicle", "T": 1e4}, "needs the parameter W"),
                       ({"kind": "linear", "scale": 0}, "scale must not be zero"),
                       ({"kind": "log", "floor": -1}, "floor must be above zero"),
                       ("logicle", "needs a dict")]:
        with pytest.raises(TransformError, match=words):
            make_transform(bad)


def test_default_transform_specs():
    rng = np.random.default_rng(1)
    fl = np.concatenate([rng.normal(0, 80, 5000), rng.lognormal(7, 1, 5000)])
    # scatter and Time: linear scaled by the range (names are common practice)
    for name in ("FSC-A", "SSC-H", "Time", "FS INT LIN"):
        spec = default_transform_spec(name, rng.uniform(0, 1e5, 100), 262144.0)
        assert spec == {"kind": "linear", "scale": 1 / 262144.0, "offset": 0.0}
    spec = default_transform_spec("CD3 FITC-A", fl, 262144.0)
    assert spec["kind"] == "logicle" and spec["T"] == 262144.0 and spec["M"] == 4.5
    assert spec["W"] == pytest.approx(logicle_auto_w(fl, 262144.0, 4.5))
    make_transform(spec)  # valid
    assert default_transform_spec("PE-A", fl, None) == {"kind": "arcsinh", "cofactor": 150.0}


@pytest.mark.parametrize("T,W,M,A", PARAMS)
def test_logicle_reflects_negative_values_about_x1(T, W, M, A):
    # reference: logicle method, negative data are reflected: logicle(-x) = 2 x1 - logicle(x)
    # (from memory of the published method; Gating-ML 2.0 fixes x1 = (W+A)/(M+A))
    x = np.logspace(-2, 6, 30)
    x1 = (W + A) / (M + A)
    np.testing.assert_allclose(logicle(-x, T, W, M, A), 2 * x1 - logicle(x, T, W, M, A), rtol=0, atol=1e-14)


def test_transforms_compare_by_spec():
    a = make_transform({"kind": "logicle", "T": 262144, "W": 0.5, "M": 4.5, "A": 0})
    b = make_transform({"kind": "logicle", "T": 262144.0, "W": 0.5})
    assert a == b and hash(a) == hash(b)
    assert a != make_transform({"kind": "logicle", "T": 262144.0, "W": 0.6})


@pytest.mark.parametrize("T,W,M,A", PARAMS)
def test_logicle_extreme_values_round_trip(T, W, M, A):
    # far beyond the top of scale and far below one unit (the solver's table and
    # its bracketed fallback); reference: the closed-form Gating-ML 2.0 biexponential
    x = np.concatenate([np.logspace(0, 300, 301), -np.logspace(0, 300, 301)])
    y = logicle(x, T, W, M, A)
    assert np.all(np.isfinite(y))
    np.testing.assert_allclose(logicle_inverse(y, T, W, M, A), x, rtol=1e-9)
    tiny = np.logspace(-300, -1, 50)
    assert np.all(np.diff(logicle(tiny, T, W, M, A)) >= 0)


def test_one_registry_of_kinds_read_by_transforms_recipe_panel_and_docs(qtbot):
    # the registry is the one list: make_transform, recipe validation, the Channels panel
    # and DEVELOPERS.md all follow it (reference for fasinh: Gating-ML 2.0)
    import os

    from core.errors import RecipeError
    from core.recipe import Recipe
    from core.transforms import TRANSFORM_KINDS, make_transform, transform_kinds_markdown
    from desktop.panels.channels import ChannelsPanel

    for name, kind in TRANSFORM_KINDS.items():
        spec = {"kind": name}
        for p in kind.parameters:
            if not p.optional:
                spec[p.key] = p.default if p.default is not None else {"T": 1e4, "W": 0.5}[p.key]
        t = make_transform(spec)
        assert t.kind == name and np.allclose(t.inverse(t.forward([1.0, 50.0, 900.0])), [1.0, 50.0, 900.0])
        Recipe.from_dict({"schema_version": 1, "channels": ["X"], "transforms": {"X": spec}})
        # bounds come from the registry: a value beyond one is refused in both places
        p = kind.parameters[0]
        bad = dict(spec, **{p.key: p.high * 10 if p.high > 0 else p.low * 10})
        with pytest.raises(TransformError):
            make_transform(bad)
        with pytest.raises(RecipeError):
            Recipe.from_dict({"schema_version": 1, "channels": ["X"], "transforms": {"X": bad}})
    panel = ChannelsPanel()
    qtbot.addWidget(panel)
    offered = [panel.kind.itemData(i) for i in range(panel.kind.count())]
    assert offered == list(TRANSFORM_KINDS)
    values = np.random.default_rng(0).normal(500, 200, 1000)
    panel.ranges = {"FL1-A": 1024.0}
    panel.show_channels(["FL1-A"], [""], {"FL1-A": {"kind": "linear"}}, ["FL1-A"], lambda name: values)
    panel.kind.setCurrentIndex(offered.index("fasinh"))
    spec = panel.specs()["FL1-A"]
    assert spec["kind"] == "fasinh" and spec["T"] == 1024.0   # top of scale from the channel range
    make_transform(spec)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    with open(os.path.join(root, "DEVELOPERS.md"), encoding="utf-8") as fh:
        assert transform_kinds_markdown() in fh.read()


def test_logicle_reads_float32_input_as_its_float64_values():
    # float32 event files are transformed without a float64 copy; the result must be the
    # logicle of the exact float32 values (reference: the same values given as float64)
    x = np.random.default_rng(3).lognormal(6.0, 1.5, 5000).astype(np.float32) - np.float32(200.0)
    y32 = logicle(x, 262144.0, 0.5, 4.5, 0.0)
    assert y32.dtype == np.float64
    np.testing.assert_array_equal(y32, logicle(x.astype(np.float64), 262144.0, 0.5, 4.5, 0.0))
