"""Tests of the density engine's scaling machinery: the pruned E step of the
mixture EM, the component-count search and the tree stage's cost rule,
against scipy.stats (multivariate_normal, logistic) and scikit-learn's
GaussianMixture as outside references.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from core.density import AdditiveTreeDensity, kernels
from core.density import boosting as boosting_module
from core.density import em as em_module
from core.density import fitting as fitting_module
from core.density import model as model_module
from core.density.kernels import common as kernels_common
from core.density.kernels import em as em_kernels
from core.density.gaussian_base import GaussianMixtureBase


def _separated_mixture(d, k, seed, gap=8.0):
    """Parameters of k Gaussians in d channels (centres ``gap`` apart on a
    diagonal, random correlations): (weights (k,), means (k, d), covs (k, d, d))."""
    rng = np.random.default_rng(seed)
    w = np.full(k, 1.0 / k)
    means = np.array([np.full(d, gap * c) + rng.normal(0.0, 0.5, d) for c in range(k)])
    covs = []
    for _ in range(k):
        A = rng.normal(size=(d, d)) * 0.3 + np.eye(d)
        covs.append(A @ A.T)
    return w, means, np.array(covs)


def _draw(n, params, seed):
    """n events (n, d) from the mixture ``params``."""
    w, means, covs = params
    rng = np.random.default_rng(seed)
    lab = rng.choice(w.size, size=n, p=w)
    X = np.empty((n, means.shape[1]))
    for c in range(w.size):
        sel = lab == c
        X[sel] = rng.multivariate_normal(means[c], covs[c], int(sel.sum()))
    return X


@pytest.mark.parametrize("vector_max", [0, 12])
def test_pruned_e_step_matches_scipy_responsibilities(monkeypatch, vector_max):
    # both layouts of the pass: pruned (vector_max 0) and component-innermost (6 channels <= 12)
    monkeypatch.setattr(em_kernels, "VECTOR_MAX_CHANNELS", vector_max)
    d, k = 6, 5
    w, means, covs = _separated_mixture(d, k, 3)
    X = _draw(4000, (w, means, covs), 4)
    loc, scale = np.median(X, axis=0), np.full(d, 5.0)
    # background: the product of logistics (reference: scipy.stats.logistic)
    bg = stats.logistic(loc, scale).logpdf(X).sum(axis=1)
    logw = np.log(np.concatenate([[1e-3], (1 - 1e-3) * w]))
    chol = np.linalg.cholesky(covs)
    log_det = np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
    # reference: scipy.stats.multivariate_normal log densities and the exact responsibilities
    L = np.column_stack([logw[0] + bg] + [logw[c + 1] + stats.multivariate_normal(means[c], covs[c]).logpdf(X)
                                         for c in range(k)])
    ll_ref = special.logsumexp(L, axis=1)
    R = np.exp(L - ll_ref[:, None])
    hint = np.zeros(X.shape[0], np.int64)
    for _ in range(2):  # the second call starts from each event's most probable component
        total, N, S, M = kernels.em_stats(X, bg, logw, means, np.ascontiguousarray(chol), log_det, hint=hint)
        assert total == pytest.approx(ll_ref.sum(), rel=1e-12)
        # the E step alone (held-out events during EM) gives the same total
        assert kernels.em_loglik(X, bg, logw, means, np.ascontiguousarray(chol), log_det) == \
            pytest.approx(ll_ref.sum(), rel=1e-12)
        # and each event's log density (the count search's held-out scores)
        np.testing.assert_allclose(kernels.em_logpdf(X, bg, logw, means, np.ascontiguousarray(chol), log_det),
                                   ll_ref, rtol=1e-12, atol=1e-11)
        np.testing.assert_allclose(N, R.sum(axis=0), rtol=1e-10, atol=1e-9)
        for c in range(k):
            D = X - means[c]
            np.testing.assert_allclose(S[c], R[:, c + 1] @ D, rtol=1e-9, atol=1e-7)
            np.testing.assert_allclose(M[c], (D * R[:, c + 1, None]).T @ D, rtol=1e-9, atol=1e-7)
    # the hints are the most probable Gaussian components (the pruned layout uses them)
    if vector_max < d:
        assert np.mean(hint == R[:, 1:].argmax(axis=1)) > 0.999


def test_pruning_bound_never_exceeds_the_mahalanobis_distance():
    # q = (x - m)^T Sigma^-1 (x - m) >= inv_top |inv_sd (x - m)|^2 (Rayleigh quotient of the correlation
    # matrix; reference distances: scipy.spatial.distance.mahalanobis); channels of very different spreads
    from scipy.spatial import distance  # test-only reference
    rng = np.random.default_rng(5)
    d, k = 20, 4
    scales = np.exp(rng.normal(0.0, 1.5, d))
    covs = []
    for _ in range(k):
        A = rng.normal(size=(d, d)) * 0.4 + np.eye(d)
        covs.append(scales[:, None] * (A @ A.T) * scales[None, :])
    chol = np.linalg.cholesky(np.array(covs))
    inv_sd, inv_top = kernels_common.correlation_bound(chol)
    np.testing.assert_allclose(inv_sd, 1.0 / np.sqrt(np.einsum("kjj->kj", np.array(covs))), rtol=1e-12)
    ratios = []
    for c in range(k):
        VI = np.linalg.inv(covs[c])
        for _ in range(200):
            x = rng.normal(size=d) * scales * rng.uniform(0.1, 5.0)
            q = distance.mahalanobis(x, np.zeros(d), VI) ** 2
            ratios.append(inv_top[c] * np.sum((inv_sd[c] * x) ** 2) / q)
    assert max(ratios) <= 1.0 + 1e-9
    assert min(ratios) < 0.9  # a bound, not the distance itself


def test_pruned_e_step_with_the_bound_matches_scipy_at_twenty_channels():
    # far-apart components in 20 channels of unequal spreads (most event-component pairs are left out
    # by the bound before any triangular solve); reference: scipy.stats.multivariate_normal
    d, k = 20, 6
    w, means, covs = _separated_mixture(d, k, 8, gap=4.0)
    spread = np.exp(np.linspace(-1.0, 1.0, d))
    means = means * spread
    covs = covs * spread[None, :, None] * spread[None, None, :]
    X = _draw(3000, (w, means, covs), 9)
    bg = stats.logistic(np.median(X, axis=0), 5.0 * spread).logpdf(X).sum(axis=1)
    logw = np.log(np.concatenate([[1e-3], (1 - 1e-3) * w]))
    chol = np.ascontiguousarray(np.linalg.cholesky(covs))
    log_det = np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
    L = np.column_stack([logw[0] + bg] + [logw[c + 1] + stats.multivariate_normal(means[c], covs[c]).logpdf(X)
                                         for c in range(k)])
    ll_ref = special.logsumexp(L, axis=1)
    R = np.exp(L - ll_ref[:, None])
    inv_sd, inv_top = kernels_common.correlation_bound(chol)
    e2 = np.einsum("nkd,kd->nk", (X[:, None, :] - means[None]) ** 2, inv_sd ** 2) * inv_top
    c = logw[1:] - log_det - d * 0.5 * np.log(2 * np.pi)
    assert np.mean(c[None, :] - 0.5 * e2 < ll_ref[:, None] - em_kernels.EM_PRUNE) > 0.5
    hint = np.zeros(X.shape[0], np.int64)
    for _ in range(2):
        total, N, S, M = kernels.em_stats(X, bg, logw, means, chol, log_det, hint=hint)
        assert total == pytest.approx(ll_ref.sum(), rel=1e-12)
        np.testing.assert_allclose(kernels.em_logpdf(X, bg, logw, means, chol, log_det), ll_ref,
                                   rtol=1e-12, atol=1e-11)
        np.testing.assert_allclose(N, R.sum(axis=0), rtol=1e-10, atol=1e-9)
        for c in range(k):
            D = X - means[c]
            np.testing.assert_allclose(M[c], (D * R[:, c + 1, None]).T @ D, rtol=1e-9, atol=1e-7)


def test_count_search_scores_held_out_events_as_the_mixture_density_does():
    # the search's held-out scores (pruned E step, 14 channels > VECTOR_MAX_CHANNELS) against the
    # mixture's own density with a flat-top background, itself checked against scipy.stats elsewhere
    from core.density.mixture_base import MixtureBase, background_logpdf
    from core.density.mixture_fit import heldout_logpdf
    from core.density.skew_fit import initial_flat_background
    d, k = 14, 4
    w, means, covs = _separated_mixture(d, k, 5, gap=3.0)
    X = _draw(3000, (w, means, covs), 6)
    loc, scale, flat = np.median(X, axis=0), X.std(axis=0), initial_flat_background(X)
    model = MixtureBase(np.concatenate([[0.01], 0.99 * w]), means, covs, loc, scale, background=flat)
    np.testing.assert_allclose(heldout_logpdf(model, X, background_logpdf(X, loc, scale, flat)),
                               model.logpdf(X), rtol=1e-13, atol=1e-12)


def test_count_search_abandons_a_losing_count_and_keeps_the_same_mixture(monkeypatch):
    # four clear populations: the search stops after the count that fails to gain; abandoning
    # that count's EM once it cannot reach its target must leave the chosen mixture unchanged
    d, k = 4, 4
    params = _separated_mixture(d, k, 5)
    X, Xva = _draw(8000, params, 6), _draw(2000, params, 7)
    passes = []
    real = kernels.em_stats

    def counted(*args, **kw):
        passes.append(args[3].shape[0])
        return real(*args, **kw)

    def fit():
        passes.clear()
        gm = GaussianMixtureBase.fit(X, np.median(X, axis=0), np.full(d, 5.0), random_state=0, skew=False,
                                     validation=Xva)
        return gm, list(passes)

    monkeypatch.setattr(em_module.kernels, "em_stats", counted)
    fast, fast_passes = fit()
    monkeypatch.setattr(em_module, "ABANDON_GAP", np.inf)   # never abandon: every count runs to convergence
    full, full_passes = fit()
    assert fast.n_components == full.n_components == k
    np.testing.assert_array_equal(fast.means, full.means)
    np.testing.assert_array_equal(fast.covariances, full.covariances)
    # the count after k (2k, started from the split) stopped sooner
    assert fast_passes.count(2 * k) < full_passes.count(2 * k)
    assert fast_passes[:fast_passes.index(2 * k)] == full_passes[:full_passes.index(2 * k)]
    # reference: scikit-learn's GaussianMixture with the true count scores the held-out events alike
    from sklearn.mixture import GaussianMixture
    ref = GaussianMixture(k, covariance_type="full", random_state=0).fit(X)
    assert fast.logpdf(Xva).mean() == pytest.approx(ref.score(Xva), abs=0.01)


def test_count_search_finds_the_number_of_populations():
    d, k = 4, 4
    params = _separated_mixture(d, k, 5)
    means = params[1]
    X, Xva = _draw(8000, params, 6), _draw(2000, params, 7)
    gm = GaussianMixtureBase.fit(X, np.median(X, axis=0), np.full(d, 5.0), random_state=0,
                                 skew=False, validation=Xva)
    assert gm.n_components == k
    found = gm.means[np.argsort(gm.means[:, 0])]
    np.testing.assert_allclose(found, means, atol=0.15)
    # reference: scikit-learn's GaussianMixture with the true count scores the same held-out events alike
    from sklearn.mixture import GaussianMixture
    ref = GaussianMixture(k, covariance_type="full", random_state=0).fit(X)
    assert gm.logpdf(Xva).mean() == pytest.approx(ref.score(Xva), abs=0.01)


def test_tree_stage_adds_nothing_when_the_mixture_is_the_truth():
    d, k = 3, 2
    w, means, covs = _separated_mixture(d, k, 8, gap=4.0)
    X = _draw(6000, (w, means, covs), 9)
    m = AdditiveTreeDensity(base="gmm", random_state=0).fit(X)
    assert m.n_trees_ == 0
    # the first trees fell short of the required gain: abandoned at once, no patience run
    n_tree_entries = len(m.learning_curve_) - 3   # marginal entry, roll-back and drop entries
    assert n_tree_entries <= model_module.EARLY_TREES
    Xt = _draw(4000, (w, means, covs), 10)
    # reference: the true density from scipy.stats.multivariate_normal
    true = np.log(sum(w[c] * stats.multivariate_normal(means[c], covs[c]).pdf(Xt) for c in range(k)))
    assert abs(m.score(Xt) - true.mean()) < 0.02


def test_first_tree_layer_must_pay_for_the_full_map():
    # the rule's constants: a kept first layer gains >= layer_tol x MAP_COST_RATIO
    rng = np.random.default_rng(1)
    # an L of two uniform bars: sharp edges the mixture only approximates
    arm = rng.random((4000, 1)) < 0.5
    X = np.where(arm, np.c_[2.0 * rng.random(4000), 0.3 * rng.random(4000)],
                 np.c_[0.3 * rng.random(4000), 2.0 * rng.random(4000)])
    m = AdditiveTreeDensity(base="gmm", random_state=0).fit(X)
    loose = AdditiveTreeDensity(base="gmm", random_state=0, layer_tol=1e-9).fit(X)
    assert loose.n_trees_ > 0   # the trees do gain something here
    gain = loose.heldout_loglik_ - loose.base_heldout_loglik_
    required = m.layer_tol * model_module.MAP_COST_RATIO
    if gain < required:
        assert m.n_trees_ == 0
    else:
        assert m.n_trees_ > 0
        assert m.heldout_loglik_ - m.base_heldout_loglik_ >= required


def _l_bars(n, seed):
    """n events (n, 2) on an L of two uniform bars (sharp edges a mixture only approximates)."""
    rng = np.random.default_rng(seed)
    arm = rng.random((n, 1)) < 0.5
    return np.where(arm, np.c_[2.0 * rng.random(n), 0.3 * rng.random(n)],
                    np.c_[0.3 * rng.random(n), 2.0 * rng.random(n)])


def test_probe_tree_ends_the_tree_stage_only_when_trees_cannot_pay(monkeypatch):
    called = []
    real = fitting_module.fit_layers

    def counted(*args, **kw):
        called.append(True)
        return real(*args, **kw)

    monkeypatch.setattr(fitting_module, "fit_layers", counted)
    # a mixture that is the truth: the probe (on 1,000 of the 4,800 training events) ends the stage
    params = _separated_mixture(3, 2, 8, gap=4.0)
    X = _draw(6000, params, 9)
    assert boosting_module.probe_events(4800) is None  # below PROBE_MIN_TRAIN: no probe
    without = AdditiveTreeDensity(base="gmm", random_state=0).fit(X)
    assert called and without.n_trees_ == 0
    called.clear()
    monkeypatch.setattr(boosting_module, "PROBE_EVENTS", 1000)
    monkeypatch.setattr(boosting_module, "PROBE_MIN_TRAIN", 2000)
    probed = AdditiveTreeDensity(base="gmm", random_state=0).fit(X)
    assert not called and probed.n_trees_ == 0 and probed.stopped_by_ == "early stopping"
    Xt = _draw(3000, params, 10)
    np.testing.assert_array_equal(probed.score_samples(Xt), without.score_samples(Xt))
    # trees that pay (the L of two bars, layer_tol lowered so the first layer is kept): the probe
    # lets the tree stage run, the training share's map reuses the probe's, and the model is the
    # one fitted without a probe
    X = _l_bars(6000, 1)
    called.clear()
    probed = AdditiveTreeDensity(base="gmm", random_state=0, layer_tol=1e-4).fit(X)
    assert called and probed.n_trees_ > 0
    monkeypatch.setattr(boosting_module, "PROBE_MIN_TRAIN", 10 ** 9)
    plain = AdditiveTreeDensity(base="gmm", random_state=0, layer_tol=1e-4).fit(X)
    assert plain.n_trees_ == probed.n_trees_
    Xt = _l_bars(2000, 2)
    np.testing.assert_array_equal(probed.score_samples(Xt), plain.score_samples(Xt))
