"""Tests of the skewed-component mixture base of the additive tree density
(core.density.gaussian_base with ``skew``): each component is a Gaussian on
its own sinh-arcsinh transform of the channels.  Outside references:
scipy.stats (multivariate_normal, logistic, kstest, pearsonr) for the
density and the uniformity of the map, numpy's trapezoid rule for the
normalisation, and the change-of-variables formula written directly with
numpy's sinh/arcsinh.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from core.density import AdditiveTreeDensity
from core.density.gaussian_base import MAX_SKEW, GaussianMixtureBase

W = np.array([2e-3, 0.45, 0.548])
MU = np.array([[0.2, -0.1, 0.0], [-0.3, 0.4, 0.1]])
COV = np.array([[[1.0, 0.6, 0.2], [0.6, 1.0, 0.1], [0.2, 0.1, 0.8]],
                [[0.7, -0.3, 0.05], [-0.3, 0.9, 0.0], [0.05, 0.0, 1.2]]])
CENTRE = np.array([[0.0, 1.0, -1.0], [3.0, -2.0, 1.0]])
SCALE = np.array([[1.0, 0.5, 2.0], [0.7, 1.5, 1.0]])
EPS = np.array([[0.8, -0.5, 0.0], [-1.2, 0.3, 1.5]])
LOC = np.array([1.5, -0.5, 0.0])
BG_SCALE = np.array([3.0, 2.0, 3.0])


@pytest.fixture(scope="module")
def known():
    return GaussianMixtureBase(W, MU, COV, LOC, BG_SCALE, skew=np.stack([CENTRE, SCALE, EPS]))


def _rvs(n, rng):
    """Draws: y ~ N(mu_k, cov_k), x = centre + scale sinh(asinh(y) + eps); or the background."""
    k = rng.choice(3, size=n, p=W)
    X = np.empty((n, 3))
    bg = k == 0
    X[bg] = stats.logistic(LOC, BG_SCALE).rvs(size=(bg.sum(), 3), random_state=rng)
    for c in (1, 2):
        sel = k == c
        y = rng.multivariate_normal(MU[c - 1], COV[c - 1], sel.sum())
        X[sel] = CENTRE[c - 1] + SCALE[c - 1] * np.sinh(np.arcsinh(y) + EPS[c - 1])
    return X


def _ref_logpdf(X):
    # change of variables written directly: y = sinh(asinh(t) - eps), t = (x - c)/s,
    # dy/dx = cosh(asinh(t) - eps) / sqrt(1 + t^2) / s; Gaussian density from
    # scipy.stats.multivariate_normal, background from scipy.stats.logistic
    dens = W[0] * np.exp(stats.logistic(LOC, BG_SCALE).logpdf(X).sum(axis=1))
    for c in (1, 2):
        t = (X - CENTRE[c - 1]) / SCALE[c - 1]
        a = np.arcsinh(t) - EPS[c - 1]
        y = np.sinh(a)
        logjac = (np.log(np.cosh(a)) - 0.5 * np.log1p(t * t) - np.log(SCALE[c - 1])).sum(axis=1)
        dens = dens + W[c] * np.exp(stats.multivariate_normal(MU[c - 1], COV[c - 1]).logpdf(y) + logjac)
    return np.log(dens)


def test_log_density_matches_change_of_variables(known):
    X = _rvs(3000, np.random.default_rng(1))
    ref = _ref_logpdf(X)
    np.testing.assert_allclose(known.logpdf(X), ref, rtol=0, atol=1e-9)
    _, logd = known.forward(X)
    np.testing.assert_allclose(logd, ref, rtol=0, atol=1e-9)


def test_map_of_samples_is_uniform_and_independent(known):
    U, _ = known.forward(_rvs(20_000, np.random.default_rng(2)))
    for j in range(3):
        # reference: scipy.stats.kstest against uniform(0, 1)
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3
    for i, j in ((0, 1), (0, 2), (1, 2)):
        # reference: scipy.stats.pearsonr (independent coordinates after the map)
        assert stats.pearsonr(U[:, i], U[:, j]).pvalue > 1e-3


def test_log_jacobian_is_the_maps_own(known):
    # the map is triangular: log det = sum_j log d u_j / d x_j (central differences)
    X = _rvs(200, np.random.default_rng(3))
    _, logd = known.forward(X)
    h = 1e-6
    jac = np.zeros(X.shape[0])
    for j in range(3):
        up, dn = X.copy(), X.copy()
        up[:, j] += h
        dn[:, j] -= h
        jac += np.log((known.forward(up)[0][:, j] - known.forward(dn)[0][:, j]) / (2 * h))
    np.testing.assert_allclose(jac, logd, rtol=0, atol=1e-5)


def test_inverse_round_trip_and_sampling(known):
    X = _rvs(5000, np.random.default_rng(4))
    U, _ = known.forward(X)
    np.testing.assert_allclose(known.inverse(U), X, rtol=1e-9, atol=1e-9)
    # uniform draws pushed back follow the mixture: compare each channel with
    # direct draws (reference: scipy.stats.ks_2samp)
    S = known.inverse(np.random.default_rng(5).random((20_000, 3)))
    D = _rvs(20_000, np.random.default_rng(6))
    for j in range(3):
        assert stats.ks_2samp(S[:, j], D[:, j]).pvalue > 1e-3


def test_two_channel_density_integrates_to_one():
    # numpy trapezoid rule on a wide grid (the logistic background's tails
    # beyond +-150 scale units hold < 1e-60 of the mass)
    sk = np.stack([CENTRE[:, :2], SCALE[:, :2], EPS[:, :2]])
    m = GaussianMixtureBase(W, MU[:, :2], COV[:, :2, :2], LOC[:2], BG_SCALE[:2], skew=sk)
    g = np.concatenate([np.linspace(-400, -20, 400), np.linspace(-20, 20, 2001)[1:-1],
                        np.linspace(20, 400, 400)])
    A, B = np.meshgrid(g, g, indexing="ij")
    dens = np.exp(m.logpdf(np.column_stack([A.ravel(), B.ravel()]))).reshape(A.shape)
    total = np.trapz(np.trapz(dens, g, axis=1), g)
    assert abs(total - 1.0) < 2e-3


def test_far_events_keep_a_finite_log_density(known):
    X = np.array([[1e300, 0.0, 0.0], [-1e300, 1e300, -1e300], [0.0, 0.0, 1e-300]])
    ld = known.logpdf(X)
    assert np.isfinite(ld).all()
    U, logd = known.forward(X)
    assert np.isfinite(U).all() and np.isfinite(logd).all()


def test_invalid_skew_rejected():
    sk = np.stack([CENTRE, SCALE, EPS])
    bad_scale = sk.copy()
    bad_scale[1, 0, 0] = 0.0
    bad_eps = sk.copy()
    bad_eps[2, 1, 2] = MAX_SKEW + 0.1
    for bad in (bad_scale, bad_eps, sk[:, :, :2], np.where(np.isnan(sk), 0, np.nan)):
        with pytest.raises(ValueError):
            GaussianMixtureBase(W, MU, COV, LOC, BG_SCALE, skew=bad)


def test_fit_recovers_a_skewed_mixture_better_than_gaussians():
    rng = np.random.default_rng(7)
    X, Xt = _rvs(30_000, rng), _rvs(30_000, rng)
    truth = _ref_logpdf(Xt).mean()
    gauss = GaussianMixtureBase.fit(X, LOC, BG_SCALE, random_state=0, skew=False)
    skewed = GaussianMixtureBase.fit(X, LOC, BG_SCALE, random_state=0, skew=True)
    assert gauss.skew is None and skewed.skew is not None
    ll_g, ll_s = gauss.logpdf(Xt).mean(), skewed.logpdf(Xt).mean()
    assert ll_s > ll_g
    assert truth - ll_s < 0.03, (truth, ll_s, ll_g)


def test_model_file_keeps_the_skew(tmp_path):
    rng = np.random.default_rng(8)
    X = _rvs(8000, rng)
    model = AdditiveTreeDensity(random_state=0).fit(X)
    assert model.base == "skewed" and model._gmm.skew is not None
    path = tmp_path / "skewed.npz"
    model.save(path)
    with np.load(path, allow_pickle=False) as z:
        assert json.loads(str(z["metadata"][()]))["format_version"] == 3
        np.testing.assert_array_equal(z["gmm_skew"], model._gmm.skew)
    back = AdditiveTreeDensity.load(path)
    Xt = _rvs(2000, rng)
    np.testing.assert_array_equal(back.score_samples(Xt), model.score_samples(Xt))
    np.testing.assert_array_equal(back.sample(500, random_state=1), model.sample(500, random_state=1))
