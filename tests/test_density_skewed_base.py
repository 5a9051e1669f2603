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

from core.density import AdditiveTreeDensity, kernels
from core.density.gaussian_base import BACKGROUND_LOGISTIC_SHARE as ETA
from core.density.gaussian_base import MAX_SKEW, GaussianMixtureBase
from core.density.skew_fit import _SKEW_GRID, _SKEW_JAC_BINS, _SKEW_MOVES
from tests.test_density_gaussian_base import triangular_log_jacobian

W = np.array([2e-3, 0.45, 0.548])
MU = np.array([[0.2, -0.1, 0.0], [-0.3, 0.4, 0.1]])
COV = np.array([[[1.0, 0.6, 0.2], [0.6, 1.0, 0.1], [0.2, 0.1, 0.8]],
                [[0.7, -0.3, 0.05], [-0.3, 0.9, 0.0], [0.05, 0.0, 1.2]]])
CENTRE = np.array([[0.0, 1.0, -1.0], [3.0, -2.0, 1.0]])
SCALE = np.array([[1.0, 0.5, 2.0], [0.7, 1.5, 1.0]])
EPS = np.array([[0.8, -0.5, 0.0], [-1.2, 0.3, 1.5]])
LOC = np.array([1.5, -0.5, 0.0])
BG_SCALE = np.array([3.0, 2.0, 3.0])
#: A flat-top background: edges a, b and softness per channel.
FLAT = np.array([[-6.0, -8.0, -5.0], [9.0, 6.0, 7.0], [0.3, 0.1, 0.5]])


@pytest.fixture(scope="module", params=["logistic background", "flat background"])
def known(request):
    flat = FLAT if request.param == "flat background" else None
    return GaussianMixtureBase(W, MU, COV, LOC, BG_SCALE, skew=np.stack([CENTRE, SCALE, EPS]), background=flat)


def _background_rvs(size, rng, flat):
    if flat is None:
        return stats.logistic(LOC, BG_SCALE).rvs(size=size, random_state=rng)
    # per channel: share 1 - ETA uniform on [a, b] plus logistic noise of scale s
    # (scipy.stats.uniform, logistic), share ETA the logistic of LOC, BG_SCALE
    top = (stats.uniform(FLAT[0], FLAT[1] - FLAT[0]).rvs(size=size, random_state=rng)
           + stats.logistic(0.0, FLAT[2]).rvs(size=size, random_state=rng))
    wide = stats.logistic(LOC, BG_SCALE).rvs(size=size, random_state=rng)
    return np.where(rng.random(size) < ETA, wide, top)


def _bg_ref_logpdf(X, flat):
    if flat is None:
        return stats.logistic(LOC, BG_SCALE).logpdf(X).sum(axis=1)
    # the convolution's density: (F_L((x - a)/s) - F_L((x - b)/s)) / (b - a), F_L the
    # logistic CDF (scipy.stats.logistic.cdf; its survival function sf right of the
    # middle, where both CDFs are near 1)
    a, b, soft = FLAT
    L = stats.logistic
    left = L.cdf((X - a) / soft) - L.cdf((X - b) / soft)
    right = L.sf((X - b) / soft) - L.sf((X - a) / soft)
    top = np.where(X < 0.5 * (a + b), left, right) / (b - a)
    return np.log((1 - ETA) * top + ETA * L(LOC, BG_SCALE).pdf(X)).sum(axis=1)


def _rvs(n, rng, flat=None):
    """Draws: y ~ N(mu_k, cov_k), x = centre + scale sinh(asinh(y) + eps); or the background."""
    k = rng.choice(3, size=n, p=W)
    X = np.empty((n, 3))
    bg = k == 0
    X[bg] = _background_rvs((bg.sum(), 3), rng, flat)
    for c in (1, 2):
        sel = k == c
        y = rng.multivariate_normal(MU[c - 1], COV[c - 1], sel.sum())
        X[sel] = CENTRE[c - 1] + SCALE[c - 1] * np.sinh(np.arcsinh(y) + EPS[c - 1])
    return X


def _ref_logpdf(X, flat=None):
    # change of variables written directly: y = sinh(asinh(t) - eps), t = (x - c)/s,
    # dy/dx = cosh(asinh(t) - eps) / sqrt(1 + t^2) / s; Gaussian density from
    # scipy.stats.multivariate_normal, background from scipy.stats.logistic
    dens = W[0] * np.exp(_bg_ref_logpdf(X, flat))
    for c in (1, 2):
        t = (X - CENTRE[c - 1]) / SCALE[c - 1]
        a = np.arcsinh(t) - EPS[c - 1]
        y = np.sinh(a)
        logjac = (np.log(np.cosh(a)) - 0.5 * np.log1p(t * t) - np.log(SCALE[c - 1])).sum(axis=1)
        dens = dens + W[c] * np.exp(stats.multivariate_normal(MU[c - 1], COV[c - 1]).logpdf(y) + logjac)
    return np.log(dens)


def test_log_density_matches_change_of_variables(known):
    X = _rvs(3000, np.random.default_rng(1), known.background)
    X[:50] = np.random.default_rng(9).uniform(-30, 30, (50, 3))  # the background's tails too
    ref = _ref_logpdf(X, known.background)
    np.testing.assert_allclose(known.logpdf(X), ref, rtol=0, atol=1e-9)
    _, logd = known.forward(X)
    np.testing.assert_allclose(logd, ref, rtol=0, atol=1e-9)


def test_map_of_samples_is_uniform_and_independent(known):
    U, _ = known.forward(_rvs(20_000, np.random.default_rng(2), known.background))
    for j in range(3):
        # reference: scipy.stats.kstest against uniform(0, 1)
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3
    for i, j in ((0, 1), (0, 2), (1, 2)):
        # reference: scipy.stats.pearsonr (independent coordinates after the map)
        assert stats.pearsonr(U[:, i], U[:, j]).pvalue > 1e-3


def test_log_jacobian_is_the_maps_own(known):
    # the map is triangular: log det = sum_j log d u_j / d x_j (central differences)
    X = _rvs(200, np.random.default_rng(3), known.background)
    _, logd = known.forward(X)
    np.testing.assert_allclose(triangular_log_jacobian(known.forward, X), logd, rtol=0, atol=1e-5)


def test_inverse_round_trip_and_sampling(known):
    X = _rvs(5000, np.random.default_rng(4), known.background)
    X[:50] = np.random.default_rng(10).uniform(-30, 30, (50, 3))
    U, _ = known.forward(X)
    # rows whose u reached the clip level (1e-15 from 0 or 1: the far tails of a
    # thin-edged background) cannot come back exactly; every other row does
    inner = ((U > 1e-13) & (U < 1 - 1e-13)).all(axis=1)
    assert inner[50:].mean() > 0.99
    back = known.inverse(U[inner])
    # in u the round trip is exact to the solver's 1e-13 relative step; in x to the conditioning
    # of the tails (where 1 - u ~ 1e-10, u's last bit moves x by ~1e-7 of the softness)
    np.testing.assert_allclose(known.forward(back)[0], U[inner], rtol=0, atol=1e-12)
    np.testing.assert_allclose(back, X[inner], rtol=1e-6, atol=1e-9)
    central = ((U > 1e-4) & (U < 1 - 1e-4)).all(axis=1)
    np.testing.assert_allclose(known.inverse(U[central]), X[central], rtol=1e-9, atol=1e-9)
    # uniform draws pushed back follow the mixture: compare each channel with
    # direct draws (reference: scipy.stats.ks_2samp)
    S = known.inverse(np.random.default_rng(5).random((20_000, 3)))
    D = _rvs(20_000, np.random.default_rng(6), known.background)
    for j in range(3):
        assert stats.ks_2samp(S[:, j], D[:, j]).pvalue > 1e-3


@pytest.mark.parametrize("flat", [None, FLAT[:, :2]], ids=["logistic background", "flat background"])
def test_two_channel_density_integrates_to_one(flat):
    # numpy trapezoid rule on a wide grid (the logistic background's tails
    # beyond +-130 scale units hold < 1e-50 of the mass)
    sk = np.stack([CENTRE[:, :2], SCALE[:, :2], EPS[:, :2]])
    w = np.array([0.3, 0.3, 0.4])  # a heavy background, so its own normalisation counts
    m = GaussianMixtureBase(w, MU[:, :2], COV[:, :2, :2], LOC[:2], BG_SCALE[:2], skew=sk, background=flat)
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


def test_invalid_skew_or_background_rejected():
    sk = np.stack([CENTRE, SCALE, EPS])
    for bad in (FLAT[::-1], FLAT[:, :2], FLAT * np.array([[1], [1], [0]])):
        with pytest.raises(ValueError):
            GaussianMixtureBase(W, MU, COV, LOC, BG_SCALE, skew=sk, background=bad)
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
    X = _rvs(12_000, rng)
    model = AdditiveTreeDensity(random_state=0).fit(X)
    assert model.base_ == "skewed" and model.mixture_.is_skewed and model.mixture_.background is not None
    path = tmp_path / "skewed.npz"
    model.save(path)
    with np.load(path, allow_pickle=False) as z:
        assert json.loads(str(z["metadata"][()]))["format_version"] == 3
        np.testing.assert_array_equal(z["gmm_skew"], model.mixture_.skew)
        np.testing.assert_array_equal(z["gmm_background"], model.mixture_.background)
    back = AdditiveTreeDensity.load(path)
    Xt = _rvs(2000, rng)
    np.testing.assert_array_equal(back.score_samples(Xt), model.score_samples(Xt))
    np.testing.assert_array_equal(back.sample(500, random_state=1), model.sample(500, random_state=1))


# ------------------------------------------------------------ the default "auto" base

def _with_floor(n, rng):
    """Events of the known mixture with 30 % of channel 0 pinned to one value (a floor)."""
    X = _rvs(n, rng)
    X[rng.random(n) < 0.3, 0] = -1.0
    return X


def test_largest_atom_share_matches_numpy_unique():
    from core.density.model import largest_atom_share

    rng = np.random.default_rng(11)
    X = _with_floor(20_000, rng)
    # reference: numpy.unique's counts of channel 0 (the others are continuous)
    _, counts = np.unique(X[:, 0], return_counts=True)
    assert largest_atom_share(X) == pytest.approx(counts.max() / X.shape[0], abs=1e-12)
    assert largest_atom_share(_rvs(5000, rng)) == pytest.approx(1 / 5000)


def test_auto_base_keeps_the_better_held_out_choice_when_a_channel_has_an_atom():
    X = _with_floor(12_000, np.random.default_rng(12))
    auto = AdditiveTreeDensity(random_state=0).fit(X)
    skewed = AdditiveTreeDensity(base="skewed", random_state=0).fit(X)
    logistic = AdditiveTreeDensity(base="logistic", random_state=0).fit(X)
    # same seed, same held-out split: auto is whichever scored better there
    best = max((skewed, logistic), key=lambda m: m.heldout_loglik_)
    assert auto.base == "auto" and auto.base_ == best.base
    assert auto.heldout_loglik_ == best.heldout_loglik_
    Xt = _with_floor(3000, np.random.default_rng(13))
    np.testing.assert_array_equal(auto.score_samples(Xt), best.score_samples(Xt))


def test_auto_base_on_continuous_events_is_the_skewed_mixture():
    X = _rvs(6000, np.random.default_rng(14))
    auto = AdditiveTreeDensity(random_state=0).fit(X)
    skewed = AdditiveTreeDensity(base="skewed", random_state=0).fit(X)
    assert auto.base_ == "skewed"
    Xt = _rvs(2000, np.random.default_rng(15))
    np.testing.assert_array_equal(auto.score_samples(Xt), skewed.score_samples(Xt))


def test_auto_base_stopped_before_the_second_fit_keeps_the_mixture_model():
    X = _with_floor(6000, np.random.default_rng(16))
    stages = []

    def progress(step, total, info):
        if isinstance(info, dict):
            stages.append(info["stage"])
            return "atoms" not in info["stage"]  # stop when the logistic fit is announced
        return True

    model = AdditiveTreeDensity(random_state=0).fit(X, progress=progress)
    assert any("atoms" in s for s in stages)
    assert model.base_ == "skewed" and model.stopped_by_ == "cancelled"
    assert np.isfinite(model.score_samples(X[:500])).all()


def test_skew_search_residual_variance_matches_least_squares():
    from core.density import kernels

    rng = np.random.default_rng(17)
    n, d = 4000, 5
    T = rng.standard_normal((n, d)) @ rng.standard_normal((d, d))
    Rt = np.sqrt(1 + T * T)
    w = rng.random(n)
    w /= w.sum()
    Z = np.hstack([T, Rt])
    Zc = Z - w @ Z
    CZ = (Zc * w[:, None]).T @ Zc
    eps = rng.uniform(-1, 1, d)
    cand = np.array([-0.7, 0.0, 0.4, 1.3])
    j = 2
    got = kernels.skew_residual_variance(CZ, np.cosh(eps), -np.sinh(eps), j, np.cosh(cand), np.sinh(cand))
    # reference: weighted least squares of each candidate y_j on the other y's with an
    # intercept (numpy.linalg.lstsq on sqrt(w)-scaled rows), residual variance
    Y = T * np.cosh(eps) - Rt * np.sinh(eps)
    A = np.column_stack([np.ones(n), np.delete(Y, j, axis=1)]) * np.sqrt(w)[:, None]
    for g, e in enumerate(cand):
        y = (T[:, j] * np.cosh(e) - Rt[:, j] * np.sinh(e)) * np.sqrt(w)
        resid = y - A @ np.linalg.lstsq(A, y, rcond=None)[0]
        assert got[g] == pytest.approx(resid @ resid, rel=1e-9)


def _skew_fits(X, Xva, counts):
    from core.density.mixture_fit import MixtureSettings
    from core.density.skew_fit import SkewFit
    reg = 1e-6 * X.var(axis=0)
    return [SkewFit(X, GaussianMixtureBase.fit(X, LOC, BG_SCALE, MixtureSettings(components=(k,), skew=False,
                                                                                 random_state=0)),
                    reg, 100, 1e-3, Xva) for k in counts]


def test_skew_fit_keeps_its_best_heldout_step_and_stops_when_it_stalls():
    rng = np.random.default_rng(9)
    X, Xva = _rvs(6_000, rng), _rvs(3_000, rng)
    (fit,) = _skew_fits(X, Xva, [2])
    seen = []
    while fit.step(lambda: True):
        seen.append(fit.best_heldout)
    seen.append(fit.best_heldout)
    # the kept mixture is the best on the held-out events, and scoring it again agrees
    assert fit.best.logpdf(Xva).mean() == pytest.approx(max(seen), abs=1e-12)
    np.testing.assert_array_equal(fit.best.logpdf(Xva), fit.best_scores)
    # it stopped because the held-out gain fell below tol (1e-3), well before max_iter
    assert fit.done and fit.steps < 100 and fit.last_gain < 1e-3
    # and it beats the Gaussian start it came from on the held-out events
    assert fit.best_heldout > fit.gauss.logpdf(Xva).mean()


def test_race_stops_the_clearly_worse_fit_early():
    from core.density.mixture_fit import _race
    rng = np.random.default_rng(10)
    X, Xva = _rvs(6_000, rng), _rvs(3_000, rng)
    alone = _skew_fits(X, Xva, [1])[0]
    while alone.step(lambda: True):
        pass
    good, bad = _skew_fits(X, Xva, [2, 1])
    _race([good, bad], lambda: True)
    # one Gaussian copula cannot describe two populations: it trails clearly and is dropped
    # before the steps it takes when fitted alone; the two-component fit runs to its end
    assert bad.steps < alone.steps
    assert good.best_heldout > bad.best_heldout and good.last_gain < 1e-3


def _shape_reference(T, rs, eps, reg, grid, moves, nb=512):
    """The skewed M step of one component written with numpy (the form it had
    before it was compiled): each channel's skew in turn, then the transformed
    mean and covariance.

    T (n, d): the component's events standardised by its transform centres and
    scales; rs (n,) their responsibilities; eps (d,) the current skews (updated
    in place); reg (d,) diagonal floor.  Returns (mean (d,), covariance (d, d)).

    y_j = t_j cosh(eps_j) - r_j sinh(eps_j) with r_j = sqrt(1 + t_j^2) is linear
    in (t_j, r_j), so every candidate skew's weighted moments come from one
    weighted covariance of [t, r] (2d x 2d).  With the Gaussian's mean and
    covariance at their closed-form maximum, channel j's share of the log
    likelihood is -n_k/2 log(residual variance of y_j on the other y) +
    sum rs log(cosh eps - u sinh eps), u = t / r; that sum is taken over a
    512-bin weighted histogram of u (bin means; it only ranks the candidates,
    the density itself is exact).  The best of a fixed grid and small moves
    from the current value is kept."""
    n, d = T.shape
    n_k = float(rs.sum())
    wk = rs / n_k
    Rt = np.sqrt(1.0 + T * T)
    Z = np.hstack([T, Rt])
    mz = wk @ Z
    Zc = Z - mz
    CZ = (Zc * wk[:, None]).T @ Zc
    Uq = T / Rt
    idx = np.clip(((Uq + 1.0) * (0.5 * nb)).astype(np.int64), 0, nb - 1)
    diag = np.arange(d)
    B = np.zeros((2 * d, d))
    B[diag, diag] = np.cosh(eps)
    B[d + diag, diag] = -np.sinh(eps)
    # every channel's weighted histogram in one pass (bin j * nb + b)
    flat = (idx + nb * diag[None, :]).ravel()
    HW = np.bincount(flat, weights=np.repeat(rs, d), minlength=nb * d).reshape(d, nb)
    HU = np.bincount(flat, weights=(Uq * rs[:, None]).ravel(), minlength=nb * d).reshape(d, nb)
    for j in range(d):
        hw = HW[j]
        keep = hw > 0
        hu = HU[j][keep] / hw[keep]
        hw = hw[keep]
        cand = np.unique(np.clip(np.concatenate([grid, eps[j] + moves]), -MAX_SKEW, MAX_SKEW))
        ch, sh = np.cosh(cand), np.sinh(cand)
        var = kernels.skew_residual_variance(CZ, B[diag, diag], B[d + diag, diag], j, ch, sh)
        if not np.isfinite(var).all():
            continue  # the other channels' covariance is singular here: keep this skew
        jac = hw @ np.log(ch[None, :] - hu[:, None] * sh[None, :])
        score = -0.5 * n_k * np.log(np.maximum(var, 1e-300)) + jac
        g = int(np.argmax(score))
        eps[j] = cand[g]
        B[j, j], B[d + j, j] = ch[g], -sh[g]
    mean = mz @ B
    cov = B.T @ CZ @ B
    return mean, 0.5 * (cov + cov.T) + np.diag(reg)


def test_compiled_skew_step_matches_numpy_and_weighted_moments():
    rng = np.random.default_rng(12)
    n, d, k = 3_000, 4, 3
    X = rng.normal(size=(n, d)) @ rng.normal(size=(d, d)) * 0.5 + rng.exponential(size=(n, d))
    R = rng.dirichlet(np.full(k + 1, 0.3), size=n)
    centre, scale = rng.normal(size=(k, d)), rng.uniform(0.5, 2.0, size=(k, d))
    eps0, reg = rng.uniform(-1.0, 1.0, size=(k, d)), np.full((k, d), 1e-6)
    thr = 1e-3 * R[:, 1:].max(axis=0)
    eps, mean, cov = eps0.copy(), np.zeros((k, d)), np.zeros((k, d, d))
    moved = kernels.component_shapes(X, R, thr, centre, scale, eps, reg, _SKEW_GRID, _SKEW_MOVES, MAX_SKEW,
                                     _SKEW_JAC_BINS, mean, cov)
    assert moved.all()
    for c in range(k):
        sel = R[:, c + 1] > thr[c]
        T = (X[sel] - centre[c]) / scale[c]
        e = eps0[c].copy()
        m_ref, c_ref = _shape_reference(T, R[sel, c + 1], e, reg[c], _SKEW_GRID, _SKEW_MOVES)
        np.testing.assert_array_equal(eps[c], e)            # the same skews chosen
        np.testing.assert_allclose(mean[c], m_ref, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(cov[c], c_ref, rtol=1e-10, atol=1e-12)
        # reference: numpy's weighted mean and covariance of the transformed channels
        Y = T * np.cosh(eps[c]) - np.sqrt(1.0 + T * T) * np.sinh(eps[c])
        np.testing.assert_allclose(mean[c], np.average(Y, axis=0, weights=R[sel, c + 1]), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(cov[c] - np.diag(reg[c]), np.cov(Y, rowvar=False, aweights=R[sel, c + 1],
                                                                   bias=True), rtol=1e-9, atol=1e-12)
    # a component with too little weight is left as it was
    R2 = R.copy()
    R2[:, 1] = 1e-9
    eps2, mean2, cov2 = eps0.copy(), np.zeros((k, d)), np.zeros((k, d, d))
    moved = kernels.component_shapes(X, R2, 1e-3 * R2[:, 1:].max(axis=0), centre, scale, eps2, reg, _SKEW_GRID,
                                     _SKEW_MOVES, MAX_SKEW, _SKEW_JAC_BINS, mean2, cov2)
    assert not moved[0] and moved[1:].all()
    np.testing.assert_array_equal(eps2[0], eps0[0])
    assert not mean2[0].any()


def test_wide_skewed_map_matches_conditional_cdfs_from_scipy():
    # 40 channels (the map folds its running Jacobian products every 32 channels and
    # leaves out components far behind without their log), 3 skewed components + a
    # logistic background.  Reference, written directly: U_j = sum_k w_k(x_<j) F_k(x_j | x_<j)
    # with w_k from scipy.stats.multivariate_normal (marginal of the first j transformed
    # channels, with the transforms' Jacobians) and scipy.stats.logistic for the
    # background; F_k the Gaussian conditional CDF (scipy.stats.norm) of y_j.
    rng = np.random.default_rng(4)
    d, K, n = 40, 3, 150
    w = np.array([0.01, 0.3, 0.3, 0.39])
    mu = rng.normal(scale=0.5, size=(K, d))
    A = rng.normal(size=(K, d, d)) * 0.15 + np.eye(d)
    cov = A @ np.swapaxes(A, 1, 2)
    centre = rng.normal(scale=2.0, size=(K, d))
    scale = rng.uniform(0.5, 2.0, size=(K, d))
    eps = rng.uniform(-1.5, 1.5, size=(K, d))
    loc, bgs = np.zeros(d), np.full(d, 6.0)
    model = GaussianMixtureBase(w, mu, cov, loc, bgs, skew=np.stack([centre, scale, eps]))
    lab = rng.choice(K, size=n, p=w[1:] / w[1:].sum())
    Y = np.array([rng.multivariate_normal(mu[k], cov[k]) for k in lab])
    X = centre[lab] + scale[lab] * np.sinh(np.arcsinh(Y) + eps[lab])
    X[:5] = rng.uniform(-12, 12, (5, d))   # events where the background weighs in
    U, logd = model.forward(X)

    L = stats.logistic(loc, bgs)
    ref = np.empty((n, d))
    logjac, ys = [], []
    for k in range(K):
        t = (X - centre[k]) / scale[k]
        a = np.arcsinh(t) - eps[k]
        ys.append(np.sinh(a))
        logjac.append(np.log(np.cosh(a)) - 0.5 * np.log1p(t * t) - np.log(scale[k]))
    for j in range(d):
        logw = [np.log(w[0]) + L.logpdf(X)[:, :j].sum(axis=1)]
        cdfs = [L.cdf(X)[:, j]]
        for k in range(K):
            y = ys[k]
            if j:
                marg = stats.multivariate_normal(mu[k, :j], cov[k, :j, :j]).logpdf(y[:, :j]).reshape(n)
                gain = np.linalg.solve(cov[k, :j, :j], cov[k, :j, j])
                m = mu[k, j] + (y[:, :j] - mu[k, :j]) @ gain
                v = cov[k, j, j] - cov[k, :j, j] @ gain
            else:
                marg, m, v = np.zeros(n), mu[k, 0], cov[k, 0, 0]
            logw.append(np.log(w[k + 1]) + marg + logjac[k][:, :j].sum(axis=1))
            cdfs.append(stats.norm.cdf((y[:, j] - m) / np.sqrt(v)))
        lw = np.array(logw)
        p = np.exp(lw - lw.max(axis=0))
        ref[:, j] = (p * np.array(cdfs)).sum(axis=0) / p.sum(axis=0)
    np.testing.assert_allclose(U, np.clip(ref, 1e-15, 1 - 1e-15), rtol=0, atol=1e-9)
    # the log density is the mixture's (change of variables), as the density-only path gives it
    np.testing.assert_allclose(logd, model.logpdf(X), rtol=0, atol=1e-10)
    parts = [w[0] * np.exp(L.logpdf(X).sum(axis=1))]
    for k in range(K):
        parts.append(w[k + 1] * np.exp(stats.multivariate_normal(mu[k], cov[k]).logpdf(ys[k])
                                       + logjac[k].sum(axis=1)))
    dens = np.sum(parts, axis=0)
    np.testing.assert_allclose(logd, np.log(dens), rtol=0, atol=1e-8)
    # beyond 12 channels the density-only pass is pruned component by component: the same
    # posteriors (the skewed E step) as the scipy terms above, and the same density
    assert d > kernels.mixture.SKEW_VECTOR_MAX_CHANNELS
    ll, R = model.logpdf_and_posteriors(X)
    np.testing.assert_allclose(ll, np.log(dens), rtol=0, atol=1e-8)
    np.testing.assert_allclose(R, np.array(parts).T / dens[:, None], rtol=0, atol=1e-10)
    # the pruned pass first tests each component against a lower bound of its whitened squared
    # distance (transform slopes >= exp(-|eps|), correlation's top eigenvalue): never above the
    # distance (x - mu)^T cov^-1 (x - mu) of the transformed events, computed here with numpy's solve
    outer = kernels.mixture.outer_layout(model._inner)
    for k in range(K):
        D = ys[k] - mu[k]
        q = np.einsum("ij,ij->i", D, np.linalg.solve(cov[k], D.T).T)
        bound = outer.bound_top[k] * (((X - outer.bound_centre[:, k]) * outer.bound_slope[:, k]) ** 2).sum(axis=1)
        assert np.all(bound <= q * (1.0 + 1e-9))
        assert np.median(bound / q) > 1e-3  # and not a trivial bound


def test_flat_background_bins_are_numpys_histogram():
    # the flat-top background's step bins each channel once per fit; the weighted
    # histograms it sums from those bins must be numpy's own (np.histogram with the
    # channel's range), to the last bit, past numpy's 65,536-event blocks, for
    # ties, values on the edges and a constant channel (no bins)
    from core.density.skew_fit import _BG_BINS, _binned, channel_bins
    rng = np.random.default_rng(5)
    n = 70_000
    X = np.column_stack([rng.normal(size=n), rng.integers(0, 5, n).astype(float),
                         np.linspace(-1.0, 1.0, n), np.full(n, 2.0)])
    r0 = rng.random(n)
    bins = channel_bins(X)
    assert bins[3] is None
    for j in range(3):
        x = X[:, j]
        for wts in (r0, r0 * x):
            ref = np.histogram(x, bins=_BG_BINS, range=(x.min(), x.max()), weights=wts)[0]
            np.testing.assert_array_equal(_binned(bins[j], wts), ref)
