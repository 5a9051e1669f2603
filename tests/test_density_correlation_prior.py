"""Tests of the correlation prior of the mixture base (core.density.correlation_prior):
the shrunk covariances against numpy's own correlation (np.corrcoef) and the
EM with the prior against scipy.stats.multivariate_normal (the true density)."""

from __future__ import annotations

import numpy as np
from scipy import stats

from core.density.correlation_prior import shrink_correlations, split_groups
from core.density.em import em_iterations, split_components
from core.density.mixture_base import MixtureBase, background_logpdf


def _covariances(seed, k=3, d=5):
    """k sample covariances (k, d, d) of correlated draws and their sample sizes (k,)."""
    rng = np.random.default_rng(seed)
    n = np.array([60, 150, 400][:k], dtype=np.float64)
    covs, samples = [], []
    for c in range(k):
        A = rng.normal(size=(d, d)) * 0.5 + np.eye(d) * (1.0 + c)
        S = rng.normal(size=(int(n[c]), d)) @ A.T
        samples.append(S)
        covs.append(np.cov(S, rowvar=False))
    return np.array(covs), n, samples


def test_no_prior_changes_nothing_and_a_group_of_one_is_kept():
    covs, n, _ = _covariances(0)
    np.testing.assert_allclose(shrink_correlations(covs, n, np.zeros(3, int), 0.0), covs, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(shrink_correlations(covs, n, np.arange(3), 500.0), covs, rtol=1e-12, atol=1e-12)


def test_shrunk_correlation_is_the_weighted_mean_of_numpy_corrcoef():
    covs, n, samples = _covariances(1)
    prior = 200.0
    out = shrink_correlations(covs, n, np.zeros(3, int), prior)
    # reference: numpy's correlation of each sample, pooled by sample size
    C = np.array([np.corrcoef(S, rowvar=False) for S in samples])
    pooled = np.einsum("k,kij->ij", n, C) / n.sum()
    for c in range(3):
        want_corr = (n[c] * C[c] + prior * pooled) / (n[c] + prior)
        sd = np.sqrt(np.diag(covs[c]))
        np.testing.assert_allclose(out[c], want_corr * np.outer(sd, sd), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(np.diag(out[c]), np.diag(covs[c]), rtol=1e-12)  # variances kept
        np.linalg.cholesky(out[c])  # still a covariance (positive definite)


def test_split_groups_follow_split_components():
    # split_components puts the children of component k at 2k and 2k + 1
    w = np.array([0.1, 0.45, 0.45])
    mu = np.array([[0.0, 0.0], [5.0, 5.0]])
    cov = np.array([np.diag([4.0, 1.0]), np.diag([1.0, 9.0])])
    _, mu2, _ = split_components(w, mu, cov)
    groups = split_groups(np.array([0, 1]))
    np.testing.assert_array_equal(groups, [0, 0, 1, 1])
    for g in (0, 1):  # the two children straddle their parent's mean
        np.testing.assert_allclose(mu2[groups == g].mean(axis=0), mu[g], atol=1e-12)


def test_em_with_a_strong_prior_shares_one_correlation_and_fits_the_truth():
    # two populations with one correlation matrix and different scales (as the
    # slices of a population that fans out): truth by scipy.stats.multivariate_normal
    rng = np.random.default_rng(3)
    d = 6
    A = rng.normal(size=(d, d // 2))
    R = 0.5 * (A @ A.T) / np.outer(np.linalg.norm(A, axis=1), np.linalg.norm(A, axis=1)) + 0.5 * np.eye(d)
    sds = [np.full(d, 0.5), np.linspace(1.0, 2.0, d)]
    means = [np.zeros(d), np.full(d, 12.0)]
    truth = [stats.multivariate_normal(m, R * np.outer(s, s)) for m, s in zip(means, sds)]
    X = np.vstack([t.rvs(1500, random_state=10 + i) for i, t in enumerate(truth)])
    Xte = np.vstack([t.rvs(1500, random_state=20 + i) for i, t in enumerate(truth)])
    true_ll = np.logaddexp(truth[0].logpdf(Xte), truth[1].logpdf(Xte)).mean() + np.log(0.5)
    # start: each population's mean and a unit covariance, one group
    w0 = np.array([1e-3, 0.4995, 0.4995])
    mu0 = np.array(means) + 0.3
    cov0 = np.array([np.eye(d), np.eye(d)])
    loc, scale = X.mean(axis=0), X.std(axis=0) * 3.0
    reg = 1e-6 * X.var(axis=0)
    bg = background_logpdf(X, loc, scale, None)
    _, w, mu, cov, _ = em_iterations(X, bg, w0, mu0, cov0, reg, 100, 1e-6, None, (np.zeros(2, int), 1e9))
    corr = cov / np.sqrt(np.einsum("kii->ki", cov)[:, :, None] * np.einsum("kii->ki", cov)[:, None, :])
    # one shared correlation (up to the 1e-6 x variance floor added on the diagonal after it)
    np.testing.assert_allclose(corr[0], corr[1], atol=1e-3)
    np.testing.assert_allclose(corr[0], R, atol=0.06)             # and it is the true one
    got = MixtureBase(w, mu, cov, loc, scale).logpdf(Xte).mean()
    assert abs(got - true_ll) < 0.03, (got, true_ll)


def test_em_with_the_prior_survives_an_atom_and_a_copied_channel():
    # a population with one channel on a single value and two identical channels
    # (as an atom and a duplicated parameter in an FCS file, common practice to
    # meet): its moment matrix is singular; EM with the prior must stay finite and
    # every covariance positive definite (numpy's Cholesky factorisation succeeds)
    rng = np.random.default_rng(5)
    A = rng.normal(size=(800, 4))
    A[:, 0] = 5.0
    A[:, 2] = A[:, 1]
    B = rng.normal(size=(800, 4)) + 6.0
    X = np.vstack([A, B])
    loc, scale = X.mean(axis=0), X.std(axis=0) * 3.0
    reg = 1e-6 * X.var(axis=0)
    bg = background_logpdf(X, loc, scale, None)
    w0 = np.array([1e-3, 0.4995, 0.4995])
    mu0 = np.array([A.mean(axis=0), B.mean(axis=0)])
    cov0 = np.array([np.eye(4), np.eye(4)])
    ll, w, mu, cov, _ = em_iterations(X, bg, w0, mu0, cov0, reg, 30, 1e-6, None, (np.zeros(2, int), 50.0))
    assert np.isfinite(ll)
    np.linalg.cholesky(cov)
