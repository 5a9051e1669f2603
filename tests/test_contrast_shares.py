"""The control given the test's population shares (core/contrast.py): a population that
grew is not "new".

References: scipy.stats.multivariate_normal (the component densities, so the
reweighted mixture is computed outside the project), scikit-learn's
GaussianMixture (a fitted mixture with ``weights_`` / ``predict_proba``); the
maximum-likelihood weights of a mixture with known components are the mean
posteriors (the EM fixed point, from memory), which with well-separated
components are the components' shares of the events.
"""

import hashlib

import numpy as np
import pytest
from scipy import stats
from sklearn.mixture import GaussianMixture

from core.contrast import contrast, population_shares, prepare_control, reweighted_control
from core.density import AdditiveTreeDensity

MEANS = np.array([[0.0, 0.0], [4.0, 0.0], [0.0, 4.0]])
COV = np.eye(2) * 0.5


def _mixture(n, w, rng):
    counts = rng.multinomial(n, w)
    X = np.vstack([rng.multivariate_normal(m, COV, size=c) for m, c in zip(MEANS, counts)])
    return X, counts


def _posteriors(X, w):
    dens = np.column_stack([stats.multivariate_normal(m, COV).pdf(X) for m in MEANS]) * w
    return dens / dens.sum(axis=1, keepdims=True)


def test_shares_are_the_maximum_likelihood_weights():
    rng = np.random.default_rng(3)
    X, counts = _mixture(6000, [0.7, 0.2, 0.1], rng)
    w0 = np.full(3, 1 / 3)
    w = population_shares(_posteriors(X, w0), w0, n_fixed=0)
    # separated components: the ML weights are (within a share of a percent) the events' shares
    np.testing.assert_allclose(w, counts / counts.sum(), atol=0.005)
    # the EM fixed point: the mean posterior under w is w itself
    np.testing.assert_allclose(_posteriors(X, w).mean(axis=0), w, atol=1e-6)
    # the first component kept: its weight unchanged, the others share the rest
    wf = population_shares(_posteriors(X, w0), w0, n_fixed=1)
    assert wf[0] == pytest.approx(1 / 3, abs=1e-15) and wf.sum() == pytest.approx(1.0, abs=1e-12)
    assert wf[1] / wf[2] == pytest.approx(counts[1] / counts[2], rel=0.05)


def test_reweighted_control_is_the_mixture_with_the_new_weights():
    rng = np.random.default_rng(4)
    control, _ = _mixture(4000, [0.8, 0.15, 0.05], rng)
    test, _ = _mixture(4000, [0.4, 0.15, 0.45], rng)
    gm = GaussianMixture(n_components=3, random_state=0).fit(control)
    factor = reweighted_control(gm, test)
    w = population_shares(gm.predict_proba(test), gm.weights_, n_fixed=0)
    assert w[np.argmin(np.linalg.norm(gm.means_ - MEANS[2], axis=1))] == pytest.approx(0.45, abs=0.03)
    X = rng.normal(1.5, 2.0, size=(300, 2))
    # reference: the mixture with weights w built from scipy.stats.multivariate_normal
    expected = np.log(sum(wk * stats.multivariate_normal(m, c).pdf(X)
                          for wk, m, c in zip(w, gm.means_, gm.covariances_)))
    np.testing.assert_allclose(gm.score_samples(X) + factor(X), expected, rtol=0, atol=1e-8)


# A control of two populations, A (95 %) and B (5 %); the test: B grown 8x (40 %)
# plus 1 % of cells the control lacks.
A_MEAN, A_COV = np.array([1.0, 1.0, 1.0]), np.array([[0.2, 0.05, 0.0], [0.05, 0.2, 0.0], [0.0, 0.0, 0.2]])
B_MEAN, B_COV = np.array([3.0, 2.5, 1.0]), np.diag([0.05, 0.05, 0.1])
NEW_MEAN = np.array([1.0, 3.5, 3.0])


def _sample(n, share_b, share_new, rng):
    nb, nn = int(round(share_b * n)), int(round(share_new * n))
    X = np.vstack([rng.multivariate_normal(A_MEAN, A_COV, n - nb - nn), rng.multivariate_normal(B_MEAN, B_COV, nb),
                   rng.normal(NEW_MEAN, 0.1, size=(nn, 3))])
    labels = np.r_[np.zeros(n - nb - nn, int), np.ones(nb, int), np.full(nn, 2)]
    order = rng.permutation(n)
    return X[order], labels[order]


def test_a_grown_population_is_not_new():
    rng = np.random.default_rng(0)
    control, _ = _sample(12_000, 0.05, 0.0, rng)
    test, labels = _sample(12_000, 0.40, 0.01, rng)
    fitted = {}

    def fit(X, progress=None):   # each part's model fitted once for both scores
        key = hashlib.sha1(np.ascontiguousarray(X).tobytes()).hexdigest()
        if key not in fitted:
            fitted[key] = AdditiveTreeDensity(random_state=0).fit(X)
        return fitted[key]

    pc = prepare_control(control, model_factory=fit)
    # minimum fold 4 (1.39 nats): B's density ratio is 8 (2.08 nats) as fitted and 1 once
    # the control has the test's shares; with fold 2, estimation noise of a few tenths of
    # a nat at B's edges lets a handful pass
    new = contrast(test, None, prepared_control=pc, model_factory=fit, min_fold=4.0)
    former = contrast(test, None, prepared_control=pc, model_factory=fit, min_fold=4.0, reweight=False)
    assert all(new.info["reweighted"]) and not any(former.info["reweighted"])
    grown, novel = labels == 1, labels == 2
    # the former score flagged B's events beside the new cells; the new rule none of them
    assert np.sum(former.enriched & grown) >= 10
    assert np.sum(new.enriched & grown) == 0
    assert np.sum(new.enriched & novel) >= 0.95 * novel.sum()
    assert np.nanmedian(new.score[grown]) < 0.5 < np.log(4.0) < np.nanmedian(former.score[grown])


def test_one_pass_reweighting_equals_the_two_pass_definition():
    # the log density and the posteriors from one compiled pass (score_samples(posteriors=...))
    # give the same log f_c' as the log density plus reweighted_control's factor (checked
    # against scipy.stats above), also for a chunk with an event beyond the far-value clip
    from core.contrast import reweighted_log_density, share_ratio
    rng = np.random.default_rng(0)

    def skewed(n, w):    # three gamma-skewed populations: the engine keeps skewed components
        k = rng.multinomial(n, w)
        return np.vstack([rng.gamma(2.0, 0.5, size=(k[0], 3)), rng.gamma(2.0, 0.5, size=(k[1], 3)) + [4, 0, 0],
                          rng.gamma(2.0, 0.5, size=(k[2], 3)) + [0, 4, 0]])
    control, test = skewed(4000, [0.8, 0.15, 0.05]), skewed(4000, [0.4, 0.15, 0.45])
    model = AdditiveTreeDensity(random_state=0, n_trees=0, marginal_trees=0).fit(control)
    assert model.scores_with_posteriors          # a skewed mixture alone: the one-pass route
    ratio = share_ratio(model, test)
    assert not np.allclose(ratio, 1.0)           # the shares did change
    X = np.vstack([rng.normal(1.5, 2.0, size=(300, 3)), [[1e45, 0.0, 0.0]]])
    two_pass = model.score_samples(X) + reweighted_control(model, test)(X)
    np.testing.assert_allclose(reweighted_log_density(model, X, ratio), two_pass, rtol=0, atol=1e-9)
    np.testing.assert_allclose(reweighted_log_density(model, X[:300], ratio), two_pass[:300], rtol=0, atol=1e-9)
    gm = GaussianMixture(n_components=3, random_state=0).fit(control)   # a model without the one-pass route
    np.testing.assert_allclose(reweighted_log_density(gm, X[:300], share_ratio(gm, test)),
                               gm.score_samples(X[:300]) + reweighted_control(gm, test)(X[:300]), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(reweighted_log_density(model, X, None), model.score_samples(X))
