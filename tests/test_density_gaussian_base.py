"""Tests of the Gaussian-mixture base measure of the additive tree density
(core.density.gaussian_base): its Rosenblatt map, log-Jacobian, inverse and
EM fit, against scipy.stats (multivariate_normal, logistic, kstest,
pearsonr) and scikit-learn's GaussianMixture as outside references.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from core.density import AdditiveTreeDensity
from core.density.gaussian_base import U_CLIP, GaussianMixtureBase
from core.errors import ModelFileError

W = np.array([1e-3, 0.35, 0.649])
MU = np.array([[0.0, 0.0, 1.0], [3.0, -1.0, 2.0]])
COV = np.array([[[1.0, 0.8, 0.2], [0.8, 1.0, 0.1], [0.2, 0.1, 1.5]],
                [[0.5, -0.2, 0.05], [-0.2, 0.3, 0.0], [0.05, 0.0, 2.0]]])
LOC = np.array([1.5, -0.5, 1.5])
SCALE = np.array([2.0, 1.0, 1.5])


@pytest.fixture(scope="module")
def known():
    return GaussianMixtureBase(W, MU, COV, LOC, SCALE)


def _rvs(n, rng):
    """Draws from the known mixture: background logistic product or a Gaussian."""
    k = rng.choice(3, size=n, p=W)
    X = np.empty((n, 3))
    bg = k == 0
    X[bg] = stats.logistic(LOC, SCALE).rvs(size=(bg.sum(), 3), random_state=rng)
    for c in (1, 2):
        sel = k == c
        X[sel] = rng.multivariate_normal(MU[c - 1], COV[c - 1], sel.sum())
    return X


def _ref_logpdf(X):
    # reference: scipy.stats.multivariate_normal and scipy.stats.logistic densities
    dens = W[0] * np.exp(stats.logistic(LOC, SCALE).logpdf(X).sum(axis=1))
    for c in (1, 2):
        dens = dens + W[c] * stats.multivariate_normal(MU[c - 1], COV[c - 1]).pdf(X)
    return np.log(dens)


def test_rosenblatt_of_mixture_samples_is_uniform(known):
    X = _rvs(20_000, np.random.default_rng(1))
    U, _ = known.forward(X)
    for j in range(3):
        # reference: scipy.stats.kstest against uniform(0, 1)
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3
    for i, j in ((0, 1), (0, 2), (1, 2)):
        # independent coordinates after the map; reference: scipy.stats.pearsonr
        assert stats.pearsonr(U[:, i], U[:, j]).pvalue > 1e-3


def test_log_jacobian_is_mixture_logpdf(known):
    X = _rvs(2000, np.random.default_rng(2))
    _, logd = known.forward(X)
    np.testing.assert_allclose(logd, _ref_logpdf(X), rtol=0, atol=1e-10)
    # and it is the map's own Jacobian
    np.testing.assert_allclose(triangular_log_jacobian(known.forward, X[:200]), logd[:200], rtol=0, atol=1e-5)


def triangular_log_jacobian(forward, X, h=1e-6):
    """log |det dU/dX| of a triangular map ``forward(X) -> (U, ...)`` at events X
    (n, d): sum_j log d u_j / d x_j by central differences of step h."""
    jac = np.zeros(X.shape[0])
    for j in range(X.shape[1]):
        up, dn = X.copy(), X.copy()
        up[:, j] += h
        dn[:, j] -= h
        jac += np.log((forward(up)[0][:, j] - forward(dn)[0][:, j]) / (2 * h))
    return jac


def test_inverse_round_trip_and_clipped_edges(known):
    X = _rvs(5000, np.random.default_rng(3))
    U, _ = known.forward(X)
    np.testing.assert_allclose(known.inverse(U), X, rtol=0, atol=1e-9)
    edge = np.array([[0.0, 1.0, 0.5], [U_CLIP, 1 - U_CLIP, 1e-300], [1.0, 0.0, 1.0]])
    B = known.inverse(edge)
    assert np.isfinite(B).all()
    # u = 0 and u = 1 are clipped to [U_CLIP, 1 - U_CLIP]: same points as the clip levels
    np.testing.assert_allclose(known.forward(B)[0], np.clip(edge, U_CLIP, 1 - U_CLIP), rtol=1e-6)


def test_far_events_have_finite_log_density(known):
    far = np.array([[1e3, 0.0, 0.0], [-1e6, 1e6, 0.0], [0.0, 1e12, 3.0], [1e300, -1e300, 1e300]])
    U, logd = known.forward(far)
    assert np.isfinite(logd).all() and np.isfinite(U).all()
    # exponential tails of the background: log density ~ -|x|/scale, not -x^2/2
    assert logd[0] == pytest.approx(_ref_logpdf(far[:1])[0], abs=1e-9)


def test_em_recovers_known_mixture_heldout_loglik():
    rng = np.random.default_rng(4)
    w = np.array([0.35, 0.65])

    def draw(n):
        k = rng.random(n) < w[0]
        return np.where(k[:, None], rng.multivariate_normal(MU[0], COV[0], n),
                        rng.multivariate_normal(MU[1], COV[1], n))

    X, Xt = draw(20_000), draw(20_000)
    truth = np.log(w[0] * stats.multivariate_normal(MU[0], COV[0]).pdf(Xt)
                   + w[1] * stats.multivariate_normal(MU[1], COV[1]).pdf(Xt)).mean()
    q25, med, q75 = np.percentile(X, [25, 50, 75], axis=0)
    g = GaussianMixtureBase.fit(X, med, (q75 - q25) / (2 * np.log(3)), random_state=0)
    # reference: scipy.stats.multivariate_normal log density of the true mixture
    assert abs(g.logpdf(Xt).mean() - truth) < 0.02
    # more components do not beat two on held-out events: the search stops at the truth's count
    assert g.n_components == 2


def test_em_matches_scikit_learn_at_fixed_count():
    mixture = pytest.importorskip("sklearn.mixture")
    X = _rvs(8000, np.random.default_rng(5))
    q25, med, q75 = np.percentile(X, [25, 50, 75], axis=0)
    g = GaussianMixtureBase.fit(X, med, (q75 - q25) / (2 * np.log(3)), components=(4,), random_state=0)
    # reference: sklearn.mixture.GaussianMixture (full covariances, 3 restarts)
    ref = mixture.GaussianMixture(4, covariance_type="full", n_init=3, random_state=0).fit(X)
    assert g.logpdf(X).mean() == pytest.approx(ref.score(X), abs=0.02)


def test_invalid_parameters_rejected():
    bad_cov = COV.copy()
    bad_cov[0, 0, 0] = -1.0
    with pytest.raises(ValueError, match="positive definite|symmetric"):
        GaussianMixtureBase(W, MU, bad_cov, LOC, SCALE)
    with pytest.raises(ValueError, match="weights"):
        GaussianMixtureBase(np.array([0.5, 0.5, 0.5]), MU, COV, LOC, SCALE)


def _saved_arrays(model, path):
    """Save ``model`` to ``path`` and read the arrays of the file back (no pickle)."""
    model.save(path)
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def test_damaged_mixture_in_model_file(tmp_path):
    X = _rvs(3000, np.random.default_rng(6))
    arrays = _saved_arrays(AdditiveTreeDensity(base="gmm", random_state=0, n_trees=3).fit(X),
                           tmp_path / "good.npz")
    cov = arrays["gmm_covariances"].copy()
    cov[0] = -np.eye(3)
    broken = tmp_path / "not_pd.npz"
    np.savez(broken, **{**arrays, "gmm_covariances": cov})
    with pytest.raises(ModelFileError, match="not_pd.npz"):
        AdditiveTreeDensity.load(broken)
    partial = tmp_path / "partial.npz"
    np.savez(partial, **{k: v for k, v in arrays.items() if k != "gmm_means"})
    with pytest.raises(ModelFileError, match="partial.npz"):
        AdditiveTreeDensity.load(partial)


def test_core_does_not_import_scikit_learn():
    code = "import sys, core.density.model, core.density.gaussian_base; print('sklearn' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_file_without_base_parameter_reads_as_logistic(tmp_path):
    # model files of format version 1 were written before "base" existed: logistic base
    X = _rvs(3000, np.random.default_rng(7))
    model = AdditiveTreeDensity(base="logistic", random_state=0, n_trees=3).fit(X)
    path = tmp_path / "v1.npz"
    arrays = _saved_arrays(model, path)
    meta = json.loads(str(arrays["metadata"][()]))
    assert meta["format_version"] == 1
    del meta["params"]["base"]
    old = tmp_path / "old.npz"
    np.savez(old, **{**arrays, "metadata": np.array(json.dumps(meta))})
    loaded = AdditiveTreeDensity.load(old)
    assert loaded.base == "logistic"
    np.testing.assert_array_equal(loaded.score_samples(X[:500]), model.score_samples(X[:500]))


def test_cancel_while_fitting_the_mixture_base_keeps_a_usable_model():
    # the progress protocol (core.progress): returning False stops cleanly; the
    # mixture found so far is the model.  Reference: a one-component mixture is
    # a single normal (plus the background), so the cancelled model's log density
    # must track scipy.stats.multivariate_normal fitted to the same events.
    from scipy import stats

    rng = np.random.default_rng(3)
    X = np.vstack([rng.normal(0.0, 1.0, size=(3000, 3)), rng.normal(4.0, 0.5, size=(1000, 3))])
    stages = []

    def progress(step, total, info):
        if isinstance(info, dict):
            stages.append(info["stage"])
            return "2 components" not in info["stage"]
        return True

    model = AdditiveTreeDensity(random_state=0).fit(X, progress=progress)
    assert model.stopped_by_ == "cancelled" and model.n_trees_ == 0
    assert model.mixture_.n_components == 1
    assert any("1 component" in s for s in stages)
    full = AdditiveTreeDensity(random_state=0).fit(X)
    assert full.mixture_.n_components >= 2 and full.stopped_by_ != "cancelled"
    ref = stats.multivariate_normal(X.mean(axis=0), np.cov(X.T)).logpdf(X)
    got = model.score_samples(X)
    assert np.isfinite(got).all()
    assert np.corrcoef(got, ref)[0, 1] > 0.99
    assert full.score(X) > model.score(X) + 0.1


def test_density_only_path_matches_the_map_and_scipy(known):
    # The mixture's density without its CDFs (used to score a model that is the
    # base alone) must be the map's log-Jacobian to the last bit, and the mixture
    # density itself.  Reference: scipy.stats.multivariate_normal and
    # scipy.stats.logistic for the components, summed with the weights.
    rng = np.random.default_rng(11)
    X = np.vstack([_rvs(4000, rng), [[40.0, -30.0, 25.0], [1e6, 0.0, 0.0]]])
    dens_only = known.logpdf(X)
    _, log_jac = known.forward(X)
    np.testing.assert_array_equal(dens_only, log_jac)
    parts = [np.log(W[0]) + stats.logistic(LOC, SCALE).logpdf(X).sum(axis=1)]
    for c in (1, 2):
        parts.append(np.log(W[c]) + stats.multivariate_normal(MU[c - 1], COV[c - 1]).logpdf(X))
    ref = np.logaddexp.reduce(np.vstack(parts), axis=0)
    np.testing.assert_allclose(dens_only, ref, rtol=1e-10, atol=1e-10)


def test_a_model_that_is_the_base_alone_scores_without_the_map():
    # after a mixture base the first layer of trees is dropped when it gains less
    # than layer_tol; the model's log density is then the base's (reference: the
    # base's own log-Jacobian through the full forward map, and save/load keeps it)
    import os
    import tempfile

    rng = np.random.default_rng(12)
    X = np.vstack([rng.normal(0.0, 1.0, size=(3000, 3)), rng.normal(3.0, 0.5, size=(1000, 3))])
    model = AdditiveTreeDensity(random_state=0).fit(X)
    assert model.n_trees_ == 0 and model.chain_.density_is_base()
    assert model.heldout_loglik_ == model.base_heldout_loglik_
    _, via_map = model.chain_.forward(np.ascontiguousarray(X))
    np.testing.assert_array_equal(model.score_samples(X), via_map)
    path = os.path.join(tempfile.mkdtemp(), "base-only.npz")
    model.save(path)
    again = AdditiveTreeDensity.load(path)
    assert again.chain_.density_is_base()
    np.testing.assert_array_equal(again.score_samples(X), model.score_samples(X))
