"""Tests of the additive tree density (core.density) against outside references:
scipy.stats distributions and goodness-of-fit tests, scipy.integrate
quadrature, numpy's .npz reader.  Sample sizes are small where the check
allows, so the whole file runs in well under a minute including compilation.
"""

from __future__ import annotations

import json
import os
import zipfile

import numpy as np
import pytest
from scipy import integrate, stats

from core.density import AdditiveTreeDensity
from core.errors import EventDataError, ModelFileError

# ------------------------------------------------------------ known densities
# reference: scipy.stats (norm, lognorm, multivariate_normal) give the exact
# log densities the fitted model is compared with.

MIX1 = [(0.4, -2.0, 0.5), (0.6, 1.5, 1.0)]


def mix1_rvs(n, rng):
    k = rng.random(n) < MIX1[0][0]
    return np.where(k, rng.normal(MIX1[0][1], MIX1[0][2], n), rng.normal(MIX1[1][1], MIX1[1][2], n))[:, None]


def mix1_logpdf(x):
    x = x[:, 0]
    return np.log(sum(w * stats.norm.pdf(x, m, s) for w, m, s in MIX1))


LOGNORM = stats.lognorm(s=0.8, scale=np.exp(1.0))

MIX2 = [(0.3, [0.0, 0.0], [[1.0, 0.8], [0.8, 1.0]]),
        (0.7, [3.0, -1.0], [[0.5, -0.2], [-0.2, 0.3]])]


def mix2_rvs(n, rng):
    k = rng.random(n) < MIX2[0][0]
    a = rng.multivariate_normal(MIX2[0][1], MIX2[0][2], n)
    b = rng.multivariate_normal(MIX2[1][1], MIX2[1][2], n)
    return np.where(k[:, None], a, b)


def mix2_logpdf(x):
    return np.log(sum(w * stats.multivariate_normal(m, c).pdf(x) for w, m, c in MIX2))


@pytest.fixture(scope="module", params=["logistic", "gmm", "skewed", "auto"])
def base(request):
    """Every model test runs with each base (logistic map / Gaussian-mixture Rosenblatt map /
    the same with skewed components / the default choice between them)."""
    return request.param


@pytest.fixture(scope="module")
def mix2_model(base):
    rng = np.random.default_rng(11)
    X = mix2_rvs(20_000, rng)
    model = AdditiveTreeDensity(base=base, random_state=0).fit(X)
    return model, X, mix2_rvs(20_000, rng)


@pytest.fixture(scope="module")
def mix1_model(base):
    rng = np.random.default_rng(12)
    X = mix1_rvs(20_000, rng)
    return AdditiveTreeDensity(base=base, random_state=0).fit(X), X, mix1_rvs(20_000, rng)


# ------------------------------------------------------------ accuracy

def test_accuracy_1d_normal_mixture(mix1_model):
    model, _, Xt = mix1_model
    # reference: scipy.stats.norm; held-out mean log-likelihood within 0.05 nats of the truth
    assert abs(model.score(Xt) - mix1_logpdf(Xt).mean()) < 0.05


def test_accuracy_lognormal(base):
    rng = np.random.default_rng(13)
    X = LOGNORM.rvs(size=(20_000, 1), random_state=rng)
    Xt = LOGNORM.rvs(size=(20_000, 1), random_state=rng)
    model = AdditiveTreeDensity(base=base, random_state=0).fit(X)
    # reference: scipy.stats.lognorm.logpdf
    assert abs(model.score(Xt) - LOGNORM.logpdf(Xt[:, 0]).mean()) < 0.05


def test_accuracy_2d_correlated_mixture(mix2_model, base):
    model, _, Xt = mix2_model
    # reference: scipy.stats.multivariate_normal.pdf of the two-component mixture
    truth = mix2_logpdf(Xt).mean()
    assert abs(model.score(Xt) - truth) < 0.05
    # the held-out curve is what early stopping followed: its best entry is the kept model
    assert model.heldout_loglik_ == pytest.approx(model.learning_curve_[-1])
    if base == "logistic":
        assert model.n_trees_ >= 1
    else:
        # the mixture base already is the truth's family: trees are kept only when they
        # raise the held-out log-likelihood above the base's own
        assert model.heldout_loglik_ >= model.base_heldout_loglik_


# ------------------------------------------------------------ normalisation

def _cauchy_substitution(n, centre, width):
    """Grid v in (0, 1) and x = centre + width tan(pi (v - 1/2)) with dx/dv: maps the
    whole real line onto (0, 1), so no tail is cut off."""
    v = (np.arange(n) + 0.5) / n
    x = centre + width * np.tan(np.pi * (v - 0.5))
    dxdv = width * np.pi / np.cos(np.pi * (v - 0.5)) ** 2
    return v, x, dxdv


def test_integrates_to_one_1d(mix1_model):
    model, X, _ = mix1_model
    # direct quadrature on a fine grid over a wide range (the data span about -4 .. 5)
    # reference: scipy.integrate.trapezoid
    grid = np.linspace(-60.0, 60.0, 1_200_001)
    dens = np.exp(model.score_samples(grid[:, None]))
    assert integrate.trapezoid(dens, grid) == pytest.approx(1.0, abs=1e-3)
    # the tails beyond the grid: whole line via x = c + w tan(pi (v - 1/2))
    v, x, dxdv = _cauchy_substitution(400_000, float(np.median(X)), 2.0)
    total = integrate.trapezoid(np.exp(model.score_samples(x[:, None])) * dxdv, v)
    assert total == pytest.approx(1.0, abs=1e-3)
    outside = np.abs(x) > 60.0
    tail = np.sum(np.exp(model.score_samples(x[outside, None])) * dxdv[outside]) / v.size
    assert tail < 1e-4


def test_integrates_to_one_2d(base):
    rng = np.random.default_rng(11)
    X = mix2_rvs(4000, rng)
    model = AdditiveTreeDensity(base=base, random_state=0).fit(X)
    # reference: scipy.integrate.trapezoid applied per axis on the substituted grid.
    # The density is discontinuous across box edges, so the quadrature error
    # falls only like the grid step: 2500 x 2500 points keep it near 2e-4.
    n = 2500
    centre = np.median(X, axis=0)
    v, x0, d0 = _cauchy_substitution(n, centre[0], 2.0)
    _, x1, d1 = _cauchy_substitution(n, centre[1], 2.0)
    g0, g1 = np.meshgrid(x0, x1, indexing="ij")
    dens = np.exp(model.score_samples(np.column_stack([g0.ravel(), g1.ravel()]))).reshape(n, n)
    inner = integrate.trapezoid(dens * d0[:, None] * d1[None, :], v, axis=1)
    assert integrate.trapezoid(inner, v) == pytest.approx(1.0, abs=1e-3)


# ------------------------------------------------------------ exact maps and sampling

def test_inverse_transform_round_trip(mix2_model):
    model, _, Xt = mix2_model
    U = model.transform(Xt[:5000])
    assert U.min() >= 0.0 and U.max() <= 1.0
    back = model.inverse_transform(U)
    np.testing.assert_allclose(back, Xt[:5000], rtol=0, atol=1e-9)


def test_transform_of_model_samples_is_uniform(mix2_model):
    model, _, _ = mix2_model
    S = model.sample(20_000, random_state=5)
    U = model.transform(S)
    for j in range(U.shape[1]):
        # reference: scipy.stats.kstest against the uniform distribution on [0, 1]
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3


def test_samples_match_heldout_data(mix2_model):
    model, _, Xt = mix2_model
    S = model.sample(5000, random_state=8)
    H = Xt[-5000:]
    for j in range(2):
        # reference: scipy.stats.ks_2samp, two-sample Kolmogorov-Smirnov
        assert stats.ks_2samp(S[:, j], H[:, j]).pvalue > 1e-3
    w = np.array([0.6, -0.8])  # a fixed random-looking projection
    assert stats.ks_2samp(S @ w, H @ w).pvalue > 1e-3


def test_sample_is_seeded(mix1_model):
    model, _, _ = mix1_model
    np.testing.assert_array_equal(model.sample(100, random_state=3), model.sample(100, random_state=3))


def test_sampling_2d_cancels_dependence_correctly(base):
    # a strongly dependent density: y = x + small noise.  Samples must keep the
    # dependence (reference: scipy.stats.pearsonr of the sample vs the data)
    rng = np.random.default_rng(21)
    x = rng.normal(size=8000)
    X = np.column_stack([x, x + 0.3 * rng.normal(size=8000)])
    model = AdditiveTreeDensity(base=base, random_state=1).fit(X)
    S = model.sample(8000, random_state=2)
    r_data = stats.pearsonr(X[:, 0], X[:, 1])[0]
    r_samp = stats.pearsonr(S[:, 0], S[:, 1])[0]
    assert abs(r_data - r_samp) < 0.03
    assert stats.ks_2samp(S[:, 1] - S[:, 0], X[:, 1] - X[:, 0]).pvalue > 1e-3


# ------------------------------------------------------------ files

def test_save_load_identical(tmp_path, mix2_model, base):
    model, _, Xt = mix2_model
    path = tmp_path / "model.npz"
    model.save(path)
    loaded = AdditiveTreeDensity.load(path)
    np.testing.assert_array_equal(loaded.score_samples(Xt[:2000]), model.score_samples(Xt[:2000]))
    np.testing.assert_array_equal(loaded.sample(500, random_state=1), model.sample(500, random_state=1))
    assert loaded.n_trees_ == model.n_trees_
    np.testing.assert_array_equal(loaded.bounds_, model.bounds_)
    np.testing.assert_array_equal(loaded.learning_curve_, model.learning_curve_)
    assert loaded.base_heldout_loglik_ == model.base_heldout_loglik_
    # reference: numpy.load with allow_pickle=False reads it (no pickled objects inside)
    with np.load(path, allow_pickle=False) as z:
        meta = json.loads(str(z["metadata"][()]))
    # version 1: logistic base; version 2 adds the Gaussian-mixture arrays, version 3 skewed components
    new_parts = model.mixture_ is not None and (model.mixture_.skew is not None or model.mixture_.background is not None)
    assert meta["format_version"] == (1 if base == "logistic" else 3 if new_parts or base == "auto" else 2)
    assert meta["base_used"] == model.base_ == loaded.base_
    assert meta["n_features_in"] == 2


def test_damaged_files_raise_model_file_error(tmp_path, mix1_model):
    model, _, _ = mix1_model
    good = tmp_path / "good.npz"
    model.save(good)
    data = good.read_bytes()

    truncated = tmp_path / "truncated.npz"
    truncated.write_bytes(data[: len(data) // 2])
    garbage = tmp_path / "garbage.npz"
    garbage.write_bytes(b"this is not a model" * 10)
    foreign = tmp_path / "foreign.npz"
    np.savez(foreign, a=np.arange(3))
    missing = tmp_path / "missing.npz"
    for bad in (truncated, garbage, foreign, missing):
        with pytest.raises(ModelFileError, match=bad.name):
            AdditiveTreeDensity.load(bad)

    # a newer format version and a hand-edited tree structure
    with np.load(good, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    meta = json.loads(str(arrays["metadata"][()]))
    newer = tmp_path / "newer.npz"
    np.savez(newer, **{**arrays, "metadata": np.array(json.dumps({**meta, "format_version": 99}))})
    with pytest.raises(ModelFileError, match="newer"):
        AdditiveTreeDensity.load(newer)
    if arrays["left"].size:
        broken = tmp_path / "broken.npz"
        left = arrays["left"].copy()
        left[:] = 0  # every node pointing at the first: cycles
        np.savez(broken, **{**arrays, "left": left})
        with pytest.raises(ModelFileError, match="broken.npz"):
            AdditiveTreeDensity.load(broken)
    nan_theta = tmp_path / "nan_theta.npz"
    theta = arrays["theta"].astype(float)
    theta[:1] = np.nan
    np.savez(nan_theta, **{**arrays, "theta": theta})
    if theta.size:
        with pytest.raises(ModelFileError):
            AdditiveTreeDensity.load(nan_theta)
    # the reader never unpickles: an object array inside is refused
    pickled = tmp_path / "pickled.npz"
    np.savez(pickled, **{**arrays, "loc": np.array([object()], dtype=object)})
    with pytest.raises(ModelFileError):
        AdditiveTreeDensity.load(pickled)
    assert zipfile.is_zipfile(good)


# ------------------------------------------------------------ fitting behaviour

def test_cancel_keeps_a_usable_model(mix2_model, base):
    _, X, Xt = mix2_model
    calls = []

    def progress(step, total, info):
        calls.append((step, total, info))
        return step < 3

    # every layer is kept (negative layer_tol): after a mixture base that is the truth here the
    # first trees would not pay, and the tree stage would end before the cancel at step 3
    model = AdditiveTreeDensity(base=base, random_state=0, layer_tol=-1.0).fit(X[:5000], progress=progress)
    assert model.n_trees_ == 3 and model.stopped_by_ == "cancelled"
    # the mixture base reports its stages first (step 0, a dict naming the stage)
    base_calls = [c for c in calls if isinstance(c[2], dict)]
    assert all(c[0] == 0 and "stage" in c[2] for c in base_calls)
    assert (len(base_calls) > 0) == (base != "logistic")
    assert model.base_ == ("skewed" if base == "auto" else base)
    tree_calls = [c for c in calls if not isinstance(c[2], dict)]
    assert [c[0] for c in tree_calls] == [0, 1, 2, 3]
    assert all(np.isfinite(c[2]) for c in tree_calls)
    s = model.score_samples(Xt[:1000])
    assert np.isfinite(s).all()
    assert model.sample(10, random_state=0).shape == (10, 2)


def test_deterministic_given_seed(mix2_model, base):
    _, X, Xt = mix2_model
    a = AdditiveTreeDensity(base=base, random_state=3).fit(X[:6000])
    b = AdditiveTreeDensity(base=base, random_state=3).fit(X[:6000])
    np.testing.assert_array_equal(a.score_samples(Xt[:3000]), b.score_samples(Xt[:3000]))
    np.testing.assert_array_equal(a.transform(Xt[:500]), b.transform(Xt[:500]))


def test_subsample_above_max_fit_events(mix2_model, base):
    _, X, Xt = mix2_model
    model = AdditiveTreeDensity(base=base, random_state=0, max_fit_events=3000).fit(X)
    assert model.n_events_fitted_ == 3000
    np.testing.assert_array_equal(model.bounds_.shape, (2, 2))
    # reference: scipy.stats mixture density; a smaller fit is still close
    assert abs(model.score(Xt) - mix2_logpdf(Xt).mean()) < 0.3


def test_bounds_are_training_min_max(mix1_model):
    model, X, _ = mix1_model
    np.testing.assert_array_equal(model.bounds_, np.vstack([X.min(axis=0), X.max(axis=0)]))
    assert model.n_features_in_ == 1


# ------------------------------------------------------------ bad input

def test_nan_and_inf_are_reported_with_count_and_columns(base):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(200, 3))
    X[5, 1] = np.nan
    X[7, 1] = np.inf
    X[9, 2] = np.nan
    with pytest.raises(EventDataError, match=r"3 event\(s\).*\[1, 2\]"):
        AdditiveTreeDensity(base=base).fit(X)
    model = AdditiveTreeDensity(base=base, random_state=0).fit(rng.normal(size=(200, 3)))
    with pytest.raises(EventDataError, match=r"3 event\(s\)"):
        model.score_samples(X)


def test_too_few_events_and_wrong_columns(base):
    rng = np.random.default_rng(0)
    with pytest.raises(EventDataError, match="too few"):
        AdditiveTreeDensity(base=base).fit(rng.normal(size=(49, 2)))
    model = AdditiveTreeDensity(base=base, random_state=0).fit(rng.normal(size=(300, 2)))
    with pytest.raises(EventDataError, match="2 channels"):
        model.score_samples(rng.normal(size=(10, 3)))


def test_outside_range_points_have_finite_density(mix2_model):
    model, _, _ = mix2_model
    far = np.array([[1e3, 0.0], [-1e6, 1e6], [0.0, 1e12], [1e300, -1e300]])
    s = model.score_samples(far)
    assert np.isfinite(s).all()
    # density falls off away from the data
    assert s[0] < model.score_samples(np.array([[3.0, -1.0]]))[0] - 100


def test_constant_channel_fallback(base):
    rng = np.random.default_rng(4)
    X = np.column_stack([rng.normal(size=2000), np.full(2000, 7.0), rng.normal(size=2000)])
    model = AdditiveTreeDensity(base=base, random_state=0).fit(X)
    s = model.score_samples(X[:100])
    assert np.isfinite(s).all()
    S = model.sample(1000, random_state=1)
    assert np.abs(S[:, 1] - 7.0).max() < 0.1
    # the constant channel is independent: the others' scores do not depend on it
    Y = X[:100].copy()
    Y[:, 1] = 7.001
    dy = model.score_samples(Y) - s
    assert np.ptp(dy) < 1e-9


def test_input_not_modified(mix1_model):
    model, _, Xt = mix1_model
    U = model.transform(Xt[:100])
    U_copy = U.copy()
    model.inverse_transform(U)
    np.testing.assert_array_equal(U, U_copy)
    X = Xt[:100].copy()
    model.score_samples(X)
    np.testing.assert_array_equal(X, Xt[:100])


def test_float32_and_chunked_scoring_agree(mix2_model, monkeypatch):
    model, _, Xt = mix2_model
    import core.density.model as m
    whole = model.score_samples(Xt[:3000])
    monkeypatch.setattr(m, "CHUNK", 1000)
    np.testing.assert_array_equal(model.score_samples(Xt[:3000]), whole)
    s32 = model.score_samples(Xt[:3000].astype(np.float32))
    np.testing.assert_allclose(s32, whole, atol=1e-3)


def test_rotation_layers_stay_exact(tmp_path, base):
    # force three layers (two rotations in Gaussianised coordinates)
    rng = np.random.default_rng(31)
    X = mix2_rvs(6000, rng)
    model = AdditiveTreeDensity(base=base, random_state=0, n_layers=3, layer_trees=4, layer_tol=-1e9).fit(X)
    assert sum(layer.rotation is not None for layer in model.chain_.layers) == 2
    Xt = mix2_rvs(3000, rng)
    np.testing.assert_allclose(model.inverse_transform(model.transform(Xt)), Xt, rtol=0, atol=1e-9)
    U = model.transform(model.sample(20_000, random_state=2))
    for j in range(2):
        # reference: scipy.stats.kstest against uniform(0, 1)
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3
    # normalisation with rotations (pieces are no longer axis-aligned boxes in event space);
    # reference: scipy.integrate.trapezoid on the Cauchy-substituted grid over the whole plane
    n = 1500
    v, x0, d0 = _cauchy_substitution(n, float(np.median(X[:, 0])), 2.0)
    _, x1, d1 = _cauchy_substitution(n, float(np.median(X[:, 1])), 2.0)
    g0, g1 = np.meshgrid(x0, x1, indexing="ij")
    dens = np.exp(model.score_samples(np.column_stack([g0.ravel(), g1.ravel()]))).reshape(n, n)
    total = integrate.trapezoid(integrate.trapezoid(dens * d0[:, None] * d1[None, :], v, axis=1), v)
    assert total == pytest.approx(1.0, abs=1e-3)
    path = tmp_path / "layers.npz"
    model.save(path)
    np.testing.assert_array_equal(AdditiveTreeDensity.load(path).score_samples(Xt), model.score_samples(Xt))
