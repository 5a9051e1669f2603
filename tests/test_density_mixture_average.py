"""Averaged mixture bases (core.density.mixture_average): the merged mixture's
density is the equal-share average of its members', checked against densities
written out with scipy.stats; the estimator's ``mixture_fits`` setting."""

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from core.density.mixture_average import average_mixtures, blend_pair, blend_share, fit_averaged, skew_arrays
from core.density.mixture_base import MixtureBase
from core.density.model import AdditiveTreeDensity
from core.errors import ParameterError

D = 3


def _random_mixture(rng, K, loc, scale, skewed):
    means = rng.normal(size=(K, D))
    A = rng.normal(size=(K, D, D)) * 0.4
    cov = A @ np.swapaxes(A, 1, 2) + 0.3 * np.eye(D)
    w = rng.uniform(1.0, 2.0, size=K + 1)
    skew = None
    if skewed:
        skew = np.stack([rng.normal(size=(K, D)), rng.uniform(0.5, 2.0, size=(K, D)),
                         rng.uniform(-0.8, 0.8, size=(K, D))])
    return MixtureBase(w / w.sum(), means, cov, loc, scale, skew=skew)


def _scipy_logpdf(m, X):
    """The mixture's log density written out with scipy.stats: logistic background
    (product over channels of scipy.stats.logistic) and Gaussian copulas with
    sinh-arcsinh margins y = sinh(asinh((x - c) / s) - eps), y ~ N(mu, Sigma),
    density N(y) prod_j dy_j/dx_j (the module docstring of core.density.mixture_base)."""
    terms = [np.log(m.weights[0]) + stats.logistic.logpdf(X, m.loc, m.scale).sum(axis=1)]
    skew = skew_arrays(m)
    for k in range(m.n_components):
        c, s, e = skew[:, k]
        t = (X - c) / s
        y = np.sinh(np.arcsinh(t) - e)
        logjac = np.sum(np.log(np.cosh(np.arcsinh(t) - e)) - 0.5 * np.log1p(t * t) - np.log(s), axis=1)
        terms.append(np.log(m.weights[k + 1]) + stats.multivariate_normal(m.means[k], m.covariances[k]).logpdf(y)
                     + logjac)
    return logsumexp(np.column_stack(terms), axis=1)


@pytest.mark.parametrize("skewed", [(False, False), (True, True), (True, False)])
def test_average_is_the_equal_share_mixture_of_its_members(skewed):
    rng = np.random.default_rng(5)
    loc, scale = rng.normal(size=D), rng.uniform(0.5, 1.5, size=D)
    members = [_random_mixture(rng, K, loc, scale, sk) for K, sk in zip((3, 4), skewed)]
    X = rng.normal(size=(400, D)) * 1.5
    merged = average_mixtures(members)
    assert merged.n_components == 7
    # reference: log(0.5 p1 + 0.5 p2), each member's density from scipy.stats
    ref = np.logaddexp(np.log(0.5) + _scipy_logpdf(members[0], X), np.log(0.5) + _scipy_logpdf(members[1], X))
    np.testing.assert_allclose(merged.logpdf(X), ref, rtol=0, atol=1e-9)
    # the merged mixture keeps its exact Rosenblatt map: forward's log-Jacobian is the log density
    _, logd = merged.forward(X)
    np.testing.assert_allclose(logd, ref, rtol=0, atol=1e-8)


def test_average_of_one_is_itself_and_mismatched_channels_are_refused():
    rng = np.random.default_rng(1)
    loc, scale = np.zeros(D), np.ones(D)
    m = _random_mixture(rng, 2, loc, scale, False)
    assert average_mixtures([m]) is m
    other = _random_mixture(rng, 2, loc + 1.0, scale, False)
    with pytest.raises(ValueError, match="share"):
        average_mixtures([m, other])


def test_fit_averaged_keeps_a_further_fit_only_when_the_heldout_share_gains():
    rng = np.random.default_rng(2)
    loc, scale = np.zeros(D), np.ones(D)
    good = _random_mixture(rng, 2, loc, scale, False)
    X_va = good.inverse(rng.uniform(size=(2000, D)))          # events drawn from `good`
    far = MixtureBase(good.weights, good.means + 8.0, good.covariances, loc, scale)
    fits = iter([good, far])
    kept = fit_averaged(lambda r: next(fits), 2, np.random.default_rng(0), X_va)
    assert kept is good        # averaging with a mixture far from the events loses on them
    fits = iter([good, good])
    kept = fit_averaged(lambda r: next(fits), 2, np.random.default_rng(0), X_va)
    assert kept is good        # an identical second fit gains nothing: not kept either


def test_estimator_setting():
    rng = np.random.default_rng(3)
    X = np.column_stack([rng.normal(size=1500), rng.gamma(2.0, size=1500), rng.normal(size=1500)])
    plain = AdditiveTreeDensity(random_state=0, n_trees=0).fit(X)
    one = AdditiveTreeDensity(random_state=0, n_trees=0, mixture_fits=1).fit(X)
    np.testing.assert_array_equal(plain.score_samples(X), one.score_samples(X))   # 1 is today's fit
    two = AdditiveTreeDensity(random_state=0, n_trees=0, mixture_fits=2).fit(X)
    assert two.mixture_.n_components >= plain.mixture_.n_components
    assert two.heldout_loglik_ >= plain.heldout_loglik_
    with pytest.raises(ParameterError, match="mixture_fits"):
        AdditiveTreeDensity(mixture_fits=0).fit(X)


def test_weighted_average_is_the_share_weighted_mixture():
    rng = np.random.default_rng(6)
    loc, scale = rng.normal(size=D), rng.uniform(0.5, 1.5, size=D)
    members = [_random_mixture(rng, K, loc, scale, True) for K in (2, 3)]
    X = rng.normal(size=(300, D)) * 1.5
    merged = average_mixtures(members, [0.3, 0.7])
    # reference: log(0.3 p1 + 0.7 p2), each member's density from scipy.stats
    ref = np.logaddexp(np.log(0.3) + _scipy_logpdf(members[0], X), np.log(0.7) + _scipy_logpdf(members[1], X))
    np.testing.assert_allclose(merged.logpdf(X), ref, rtol=0, atol=1e-9)


def test_blend_share_is_the_maximum_likelihood_weight():
    # reference: scipy.optimize.minimize_scalar (bounded) on the same objective
    from scipy.optimize import minimize_scalar  # test-only reference
    rng = np.random.default_rng(7)
    x = np.concatenate([rng.normal(0.0, 1.0, 700), rng.normal(2.0, 0.5, 300)])
    a, b = stats.norm(0.0, 1.0).logpdf(x), stats.norm(2.0, 0.5).logpdf(x)
    ref = minimize_scalar(lambda w: -np.mean(np.logaddexp(np.log(w) + a, np.log1p(-w) + b)),
                          bounds=(1e-9, 1 - 1e-9), method="bounded", options={"xatol": 1e-10}).x
    assert abs(blend_share(a, b) - ref) < 1e-6
    assert abs(blend_share(a, b) - 0.7) < 0.05          # the events' own share
    assert blend_share(a, a - 1.0) == 1.0 and blend_share(a - 1.0, a) == 0.0


def test_blend_pair_kept_only_when_it_gains():
    rng = np.random.default_rng(8)
    loc, scale = np.zeros(D), np.ones(D)
    one, two = _random_mixture(rng, 2, loc, scale, False), _random_mixture(rng, 2, loc, scale, False)
    truth = average_mixtures([one, two])
    X = truth.inverse(rng.uniform(size=(3000, D)))                 # events of the equal-share blend
    s1, s2 = one.logpdf(X), two.logpdf(X)
    mixture, scores = blend_pair((one, s1), (two, s2))
    np.testing.assert_allclose(scores, mixture.logpdf(X), rtol=0, atol=1e-9)
    assert scores.mean() > max(s1.mean(), s2.mean())
    assert blend_pair((one, s1), (one, s1)) is None                # the same fit twice gains nothing
