"""The benchmark scenarios' exact densities are exact.

Checks: each log density integrates to 1 (exact grid in 2-D, Monte Carlo
importance sampling in 4-12 channels), agrees with scipy.stats where the
piece is a plain scipy distribution, and agrees with the sampler (1-D
marginals by Kolmogorov-Smirnov against exact or quadrature CDFs, and 2-D
histograms by chi-square against bin probabilities integrated from the
density).
"""

from __future__ import annotations

import importlib.util
import math
import os
import sys

import numpy as np
import pytest
from scipy import special, stats
from threadpoolctl import threadpool_limits

_PATH = os.path.join(os.path.dirname(__file__), "benchmarks", "density_scenarios.py")
_spec = importlib.util.spec_from_file_location("density_scenarios", _PATH)
S = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("density_scenarios", S)
_spec.loader.exec_module(S)

NATIVE = [("skewed", 6), ("heavy_tailed", 4), ("banana", 5), ("fan", 6), ("panel", 8), ("panel", 12)]


def _points(d, n, rng, spread=1.5):
    """Test points around the cytometry range, some far out in the tails."""
    X = rng.uniform(-0.5, 5.5, size=(n, d))
    X[: n // 4] = 2.5 + spread * 4 * rng.standard_normal(size=(n // 4, d))
    return X


# --------------------------------------------------------------- scipy agreement

def test_gaussian_matches_scipy_multivariate_normal():
    rng = np.random.default_rng(1)
    d = 5
    R = S.random_correlation(d, rng)
    s = rng.uniform(0.1, 0.5, size=d)
    mean = rng.uniform(0, 5, size=d)
    cov = R * np.outer(s, s)
    X = _points(d, 400, rng)
    # reference: scipy.stats.multivariate_normal.logpdf
    ref = stats.multivariate_normal(mean, cov).logpdf(X)
    np.testing.assert_allclose(S.Gaussian(mean, cov).logpdf(X), ref, rtol=1e-10, atol=1e-8)


@pytest.mark.parametrize("df", [2.5, 4.0, 30.0])
def test_multivariate_t_matches_scipy(df):
    rng = np.random.default_rng(2)
    d = 6
    R = S.random_correlation(d, rng)
    s = rng.uniform(0.1, 0.4, size=d)
    loc = rng.uniform(0, 5, size=d)
    shape = R * np.outer(s, s)
    X = _points(d, 400, rng)
    # reference: scipy.stats.multivariate_t.logpdf
    ref = stats.multivariate_t(loc, shape, df=df).logpdf(X)
    np.testing.assert_allclose(S.MultivariateT(loc, shape, df).logpdf(X), ref, rtol=1e-10, atol=1e-8)


def test_johnson_su_copula_matches_scipy_pieces():
    rng = np.random.default_rng(3)
    d = 4
    comp = S.johnson_population(d, rng)
    X = _points(d, 400, rng)
    # reference: Gaussian copula density = N_R(z) * prod f_j(x_j) / prod phi(z_j), with
    # f_j = scipy.stats.johnsonsu and z_j = Phi^-1(F_j(x_j)); N_R = scipy.stats.multivariate_normal
    margins = [stats.johnsonsu(comp.gamma[j], comp.delta[j], loc=comp.loc[j], scale=comp.scale[j])
               for j in range(d)]
    # two-sided inversion keeps precision in both tails
    Z = np.column_stack([np.where(m.cdf(X[:, j]) < 0.5, stats.norm.ppf(m.cdf(X[:, j])),
                                  stats.norm.isf(m.sf(X[:, j]))) for j, m in enumerate(margins)])
    ok = np.all(np.isfinite(Z), axis=1)          # ppf saturates far in the tails
    assert ok.sum() > 300
    ref = (stats.multivariate_normal(np.zeros(d), comp.corr).logpdf(Z[ok])
           + sum(m.logpdf(X[ok, j]) for j, m in enumerate(margins))
           - stats.norm.logpdf(Z[ok]).sum(axis=1))
    np.testing.assert_allclose(comp.logpdf(X[ok]), ref, rtol=1e-6, atol=1e-6)


def test_johnson_su_margin_is_scipy_johnsonsu_1d():
    rng = np.random.default_rng(4)
    comp = S.JohnsonSUCopula([1.5], [0.4], [1.2], [1.6], [[1.0]])
    x = np.linspace(-3, 6, 301)[:, None]
    # reference: scipy.stats.johnsonsu.logpdf
    ref = stats.johnsonsu(1.2, 1.6, loc=1.5, scale=0.4).logpdf(x[:, 0])
    np.testing.assert_allclose(comp.logpdf(x), ref, rtol=1e-10, atol=1e-10)
    del rng


def test_banana_without_bend_is_gaussian():
    rng = np.random.default_rng(5)
    d = 4
    cov = S.random_correlation(d, rng) * 0.09
    mean = np.array([1.0, 2.0, 3.0, 1.5])
    X = _points(d, 300, rng)
    comp = S.Banana(mean, cov, driver=0, bent=[1, 3], bend=[0.0, 0.0])
    # reference: scipy.stats.multivariate_normal.logpdf
    np.testing.assert_allclose(comp.logpdf(X), stats.multivariate_normal(mean, cov).logpdf(X),
                               rtol=1e-10, atol=1e-8)


def test_fan_without_growth_is_the_joint_gaussian():
    rng = np.random.default_rng(6)
    d, driver, m, s = 4, 2, 2.5, 0.6
    base = np.array([1.0, 3.0, 0.7])
    slope = np.array([0.4, -0.2, 0.1])
    spread0 = np.array([0.2, 0.15, 0.3])
    R = S.random_correlation(d - 1, rng)
    comp = S.Fan(m, s, driver, base, slope, spread0, np.zeros(d - 1), R)
    # Joint Gaussian of (L, X_rest): Cov(L, X_rest) = slope s^2,
    # Cov(X_rest) = s^2 slope slope^T + D R D (linear-Gaussian model).
    rest = [0, 1, 3]
    mean = np.empty(d)
    mean[driver], mean[rest] = m, base
    cov = np.empty((d, d))
    cov[driver, driver] = s * s
    cov[driver, rest] = cov[rest, driver] = slope * s * s
    cov[np.ix_(rest, rest)] = s * s * np.outer(slope, slope) + R * np.outer(spread0, spread0)
    X = _points(d, 300, rng)
    # reference: scipy.stats.multivariate_normal.logpdf
    np.testing.assert_allclose(comp.logpdf(X), stats.multivariate_normal(mean, cov).logpdf(X),
                               rtol=1e-9, atol=1e-8)


def test_uniform_box_matches_scipy_uniform():
    rng = np.random.default_rng(7)
    low, high = np.array([0.0, -1.0, 0.5]), np.array([5.0, 4.0, 2.5])
    X = rng.uniform(-2, 6, size=(500, 3))
    # reference: scipy.stats.uniform.logpdf (sum over independent channels)
    ref = stats.uniform(low, high - low).logpdf(X).sum(axis=1)
    np.testing.assert_array_equal(S.UniformBox(low, high).logpdf(X), ref)


def test_mixture_of_scipy_pieces_matches_scipy_sum():
    rng = np.random.default_rng(8)
    d = 3
    g = S.Gaussian([1, 1, 1], 0.04 * np.eye(d) + 0.01)
    t = S.MultivariateT([3, 2, 4], 0.09 * np.eye(d), 3.0)
    u = S.UniformBox(np.zeros(d), np.full(d, 5.0))
    mix = S.Mixture([g, t, u], [0.6, 0.35, 0.05], [0, 1, -1], ["g", "t", "u"])
    X = _points(d, 400, rng)
    # reference: log(sum_k w_k pdf_k) with scipy.stats.multivariate_normal / multivariate_t / uniform
    ref = np.log(0.6 * stats.multivariate_normal([1, 1, 1], 0.04 * np.eye(d) + 0.01).pdf(X)
                 + 0.35 * stats.multivariate_t([3, 2, 4], 0.09 * np.eye(d), df=3).pdf(X)
                 + 0.05 * np.exp(stats.uniform(0, 5).logpdf(X).sum(axis=1)))
    np.testing.assert_allclose(mix.logpdf(X), ref, rtol=1e-9, atol=1e-9)


# --------------------------------------------------------------- normalisation

@pytest.mark.parametrize("name", list(S.SCENARIOS))
def test_two_channel_version_integrates_to_one_on_a_grid(name):
    mix = S.SCENARIOS[name](2)
    # midpoint rule on cells of 0.025 over the populations (cell edges on the debris box edges 0 and 5)
    # and 0.25 in the tails out to [-10, 16]
    edges = np.concatenate([np.arange(-10.0, -2.0, 0.25), np.linspace(-2.0, 7.0, 361)[:-1],
                            np.arange(7.0, 16.001, 0.25)])
    c, w = (edges[1:] + edges[:-1]) / 2, np.diff(edges)
    A, B = np.meshgrid(c, c, indexing="ij")
    dens = np.exp(mix.logpdf(np.column_stack([A.ravel(), B.ravel()]))).reshape(A.shape)
    total = float(w @ dens @ w)
    # reference: a density integrates to 1 (definition); midpoint rule on a fine grid (the t tails
    # beyond [-10, 16] hold about 1e-5)
    assert abs(total - 1.0) < 1e-4, total


@pytest.mark.parametrize("name,d", NATIVE)
def test_integrates_to_one_by_importance_sampling(name, d):
    with threadpool_limits(limits=1):   # small BLAS calls: threads only contend on a shared machine
        _importance_check(name, d)


def _importance_check(name, d):
    mix = S.SCENARIOS[name](d)
    rng = np.random.default_rng(100 + d)
    # Proposal: for each component, a 4-piece Gaussian mixture (scikit-learn) fitted to its
    # samples, each piece widened into a multivariate t (df 4) so the proposal has heavier
    # tails than every population; components weighted equally.
    from sklearn.mixture import GaussianMixture

    props, pw = [], []
    for comp in mix.components:
        Y = comp.sample(2000, rng)
        gm = GaussianMixture(4, covariance_type="full", init_params="k-means++", max_iter=40,
                             tol=1e-2, random_state=0).fit(Y)
        for wk, mu, cov in zip(gm.weights_, gm.means_, gm.covariances_):
            props.append(stats.multivariate_t(mu, 1.5 * cov + 1e-4 * np.eye(d), df=4,
                                              seed=int(rng.integers(2**31))))
            pw.append(wk / len(mix.components))
    pw = np.asarray(pw) / np.sum(pw)
    m = 40000
    k = rng.choice(len(props), size=m, p=pw)
    Q = np.empty((m, d))
    for i, p in enumerate(props):
        if np.any(k == i):
            Q[k == i] = p.rvs(size=int(np.sum(k == i))).reshape(-1, d)
    log_q = special.logsumexp(np.column_stack([p.logpdf(Q) for p in props]) + np.log(pw), axis=1)
    w = np.exp(mix.logpdf(Q) - log_q)
    est, se = w.mean(), w.std(ddof=1) / math.sqrt(m)
    # reference: importance sampling, E_q[p/q] = integral of p = 1; proposal from scipy.stats.multivariate_t
    assert se < 0.01, (est, se)
    assert abs(est - 1.0) < 4 * se + 1e-3, (est, se)


# --------------------------------------------------------------- sampler agrees with logpdf

@pytest.mark.parametrize("name,d", NATIVE)
def test_marginals_match_exact_cdf(name, d):
    mix = S.SCENARIOS[name](d)
    X, _ = mix.sample(20000, np.random.default_rng(9))
    checked = 0
    for j in range(d):
        cdf = mix.marginal_cdf(j)
        if cdf is None:
            continue
        # reference: scipy.stats.kstest against the mixture CDF built from scipy.stats
        # johnsonsu / t / norm / uniform margins (exact) and, for bent and fanned
        # channels, 1-D Gauss-Hermite quadrature (numpy.polynomial.hermite_e)
        res = stats.kstest(X[:, j], cdf)
        assert res.pvalue > 1e-3, (j, res)
        checked += 1
    assert checked == d


def test_ks_check_can_fail():
    # The marginal check detects a mis-specified margin (guards the test above).
    mix = S.build_skewed(6)
    X, _ = mix.sample(20000, np.random.default_rng(9))
    cdf = mix.marginal_cdf(0)
    assert stats.kstest(X[:, 0] * 1.05, cdf).pvalue < 1e-6  # reference: scipy.stats.kstest


@pytest.mark.parametrize("name", list(S.SCENARIOS))
def test_two_channel_samples_match_binned_density(name):
    # Joint check of sampler against logpdf (bends, fans, copulas, not only margins):
    # 2-D histogram of samples against bin probabilities integrated from exp(logpdf).
    mix = S.SCENARIOS[name](2)
    n = 20000
    X, _ = mix.sample(n, np.random.default_rng(11))
    edges = np.linspace(-1.0, 6.0, 15)                     # 14 x 14 bins
    h = 0.02
    c = np.arange(-1.0, 6.0, h) + h / 2
    A, B = np.meshgrid(c, c, indexing="ij")
    dens = np.exp(mix.logpdf(np.column_stack([A.ravel(), B.ravel()]))).reshape(A.shape) * h * h
    per = int(round((edges[1] - edges[0]) / h))
    prob = dens.reshape(14, per, 14, per).sum(axis=(1, 3)).ravel()
    counts = np.histogram2d(X[:, 0], X[:, 1], bins=[edges, edges])[0].ravel()
    big = prob * n >= 5                                      # pool sparse bins (common practice)
    f_obs = np.append(counts[big], n - counts[big].sum())
    f_exp = np.append(prob[big], 1.0 - prob[big].sum()) * n
    # reference: scipy.stats.chisquare goodness of fit
    res = stats.chisquare(f_obs, f_exp)
    assert big.sum() > 40
    assert res.pvalue > 1e-3, res


def test_bent_margin_check_can_fail():
    # The quadrature margin of a bent channel rejects samples bent the wrong way.
    mix = S.build_banana(2)
    X, _ = mix.sample(20000, np.random.default_rng(11))
    X[:, 1] = 2 * np.median(X[:, 1]) - X[:, 1]
    ks = stats.kstest(X[:, 1], mix.marginal_cdf(1))   # reference: scipy.stats.kstest
    assert ks.pvalue < 1e-6


# --------------------------------------------------------------- structure

def test_structure_fixed_by_name_and_d_and_shares():
    X0, lp0, y0 = S.make_panel(40000, 8, seed=0)
    X1, lp1, y1 = S.make_panel(40000, 8, seed=1)
    assert X0.shape == (40000, 8) and X0.dtype == np.float64
    assert not np.array_equal(X0, X1)
    np.testing.assert_array_equal(lp0(X1), lp1(X1))    # same truth for any seed
    for y in (y0, y1):
        n = y.size
        for lab, share in ((-1, S.BACKGROUND_WEIGHT), (5, S.RARE_WEIGHT)):
            k = np.sum(y == lab)
            # reference: binomial standard deviation sqrt(n p (1-p)) (scipy not needed)
            assert abs(k - n * share) < 5 * math.sqrt(n * share * (1 - share)), (lab, k)
    # cytometry-like range, arcsinh-like units (common practice: most events in 0..5)
    lo, hi = np.percentile(X0, [2, 98])
    assert -1.0 < lo and hi < 6.0


def test_bad_d_is_rejected():
    with pytest.raises(ValueError):
        S.build_panel(1)
    with pytest.raises(ValueError):
        S.make_scenario("no_such", 10, 4, 0)
