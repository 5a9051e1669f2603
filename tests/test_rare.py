"""Rare events by share and by probability mass (core/rare.py).

The known densities here are scipy.stats distributions wrapped with the
model interface (``sample`` / ``score_samples``): for a d-dimensional normal the
highest-density region holding mass p is the ellipsoid of squared Mahalanobis
radius chi2.ppf(p, d), so its density level is exact.  A normal that also has
an exact inverse map of the unit cube (``inverse_transform``: x = mean + L
norm.ppf(u), L the Cholesky factor of the covariance) takes the quasi-random
(scrambled Sobol) path of ``hdr_levels``, as the fitted engine does.
"""

import numpy as np
import pytest
from scipy import stats

from core.errors import EventDataError, RecipeError
from core.rare import (DEFAULT_LEVEL_SAMPLES, hdr_levels, mass_level, mass_levels, rare_by_mass,
                       rare_by_share, rare_events, rarity_percentile, sobol_draws)


class NormalModel:
    """A multivariate normal with the density-model interface (reference: scipy.stats)."""

    def __init__(self, mean, cov):
        self.dist = stats.multivariate_normal(mean=mean, cov=cov)
        self.d = len(mean)

    def sample(self, n, random_state=None):
        return np.atleast_2d(self.dist.rvs(size=n, random_state=random_state)).reshape(n, self.d)

    def score_samples(self, X):
        return np.atleast_1d(self.dist.logpdf(X))


class MappedNormalModel(NormalModel):
    """The same normal with an exact inverse map of [0, 1]^d (reference:
    scipy.stats.norm.ppf and the Cholesky factor: x = mean + L z has the
    normal law when z has independent standard normal coordinates)."""

    def __init__(self, mean, cov):
        super().__init__(mean, cov)
        self.n_features_in_ = self.d
        self.L = np.linalg.cholesky(np.asarray(cov, dtype=float))

    def inverse_transform(self, U):
        return self.dist.mean + stats.norm.ppf(U) @ self.L.T


class SamplerOnly:
    """A model seen through ``sample`` / ``score_samples`` only: hdr_levels then
    uses its pseudo-random draws (the estimate before the Sobol points)."""

    def __init__(self, model):
        self.sample = model.sample
        self.score_samples = model.score_samples


def true_normal_level(model, mass):
    # reference: scipy.stats.chi2 -- the HDR of a normal is {Mahalanobis^2 <= chi2.ppf(mass, d)}
    q = stats.chi2.ppf(mass, model.d)
    logdet = np.linalg.slogdet(model.dist.cov)[1]
    return -0.5 * model.d * np.log(2 * np.pi) - 0.5 * logdet - 0.5 * q


@pytest.fixture
def model4():
    cov = np.array([[1.0, 0.6, 0.0, 0.2], [0.6, 2.0, 0.3, 0.0], [0.0, 0.3, 0.5, 0.1], [0.2, 0.0, 0.1, 1.5]])
    return NormalModel(np.array([1.0, -2.0, 0.5, 3.0]), cov)


def test_rarity_percentile_matches_scipy_strict_percentile():
    rng = np.random.default_rng(1)
    ld = rng.normal(size=500)
    ld[[3, 10]] = ld[5]  # ties
    ld[7] = np.nan       # a removed event
    got = rarity_percentile(ld)
    finite = ld[np.isfinite(ld)]
    # reference: scipy.stats.percentileofscore(kind="strict") = share strictly below
    want = np.array([stats.percentileofscore(finite, v, kind="strict") for v in finite])
    np.testing.assert_allclose(got[np.isfinite(ld)], want, rtol=0, atol=1e-12)
    assert np.isnan(got[7])
    assert got[np.nanargmin(ld)] == 0.0


def test_rare_by_share_takes_the_lowest_events_and_never_removed_ones():
    rng = np.random.default_rng(2)
    ld = rng.normal(size=10_000)
    ld[:50] = np.nan
    res = rare_by_share(ld, 0.005)
    n_kept = 10_000 - 50
    assert res.count == round(0.005 * n_kept) == res.mask.sum()
    assert not res.mask[:50].any()
    # every rare event is below every other kept event
    assert ld[res.mask].max() < np.nanmin(ld[~res.mask])
    # reference: numpy.partition gives the same k smallest values
    k = res.count
    np.testing.assert_array_equal(np.sort(ld[res.mask]), np.sort(np.partition(ld[50:], k - 1)[:k]))


def test_bad_rules_raise_recipe_errors():
    with pytest.raises(RecipeError, match="between 0 and 1"):
        rare_by_share(np.zeros(10), 5.0)
    with pytest.raises(RecipeError, match="unknown rare rule"):
        rare_events(np.zeros(10), {"rule": "lowest"})
    with pytest.raises(RecipeError, match="needs the fitted density"):
        rare_events(np.zeros(10), {"rule": "mass", "mass": 0.99})


@pytest.mark.parametrize("mass", [0.5, 0.9, 0.995])
def test_mass_level_matches_the_exact_normal_hdr_level(model4, mass):
    est = mass_level(model4, mass, n_samples=200_000, random_state=3)
    true = true_normal_level(model4, mass)
    # Monte Carlo error of a quantile of 200,000 draws: well under 5 % in density
    assert abs(np.exp(est - true) - 1) < 0.05, (est, true)


def test_mass_levels_are_ordered_and_consistent(model4):
    levels = mass_levels(model4, [0.5, 0.9, 0.99], n_samples=50_000, random_state=4)
    assert levels[0] > levels[1] > levels[2]
    assert levels[1] == pytest.approx(mass_level(model4, 0.9, n_samples=50_000, random_state=4))


def test_rare_by_mass_flags_the_nominal_share_of_fresh_events(model4):
    mass = 0.99
    fresh = model4.sample(100_000, random_state=11)
    res = rare_by_mass(model4.score_samples(fresh), model4, mass, random_state=12)
    # reference: scipy.stats.binomtest -- the count of events outside the HDR is
    # Binomial(n, 1 - mass); the level's own Monte Carlo error widens it a little
    ci = stats.binomtest(res.count, fresh.shape[0]).proportion_ci(confidence_level=0.999)
    assert ci.low - 0.002 <= 1 - mass <= ci.high + 0.002, (res.count, ci)
    assert res.rule == {"rule": "mass", "mass": mass}


@pytest.fixture(scope="module")
def fitted_normal():
    from core.density import AdditiveTreeDensity

    cov = np.array([[1.0, 0.6, 0.0, 0.2], [0.6, 2.0, 0.3, 0.0], [0.0, 0.3, 0.5, 0.1], [0.2, 0.0, 0.1, 1.5]])
    truth = NormalModel(np.array([1.0, -2.0, 0.5, 3.0]), cov)
    fitted = AdditiveTreeDensity(random_state=0).fit(truth.sample(20_000, random_state=21))
    return fitted, truth.sample(40_000, random_state=22)


@pytest.mark.parametrize("mass", [0.5, 0.9, 0.99])
def test_mass_rule_with_the_fitted_engine_flags_the_nominal_share_of_new_events(fitted_normal, mass):
    fitted, fresh = fitted_normal
    res = rare_by_mass(fitted.score_samples(fresh), fitted, mass, n_samples=100_000, random_state=23)
    # the level comes from the model's own draws, so new events from the same
    # distribution fall outside the mass region about (1 - mass) of the time
    # (reference: scipy.stats.binomtest interval, widened by 10 % of 1 - mass for the fit)
    ci = stats.binomtest(res.count, fresh.shape[0]).proportion_ci(confidence_level=0.999)
    slack = 0.1 * (1 - mass)
    assert ci.low - slack <= 1 - mass <= ci.high + slack, res.count / fresh.shape[0]


COV4 = np.array([[1.0, 0.6, 0.0, 0.2], [0.6, 2.0, 0.3, 0.0], [0.0, 0.3, 0.5, 0.1], [0.2, 0.0, 0.1, 1.5]])
MEAN4 = np.array([1.0, -2.0, 0.5, 3.0])


def test_sobol_draws_are_exact_draws_of_the_model():
    model = MappedNormalModel(MEAN4, COV4)
    X = sobol_draws(model, 1 << 14, random_state=5)
    assert X.shape == (1 << 14, 4)
    # reference: scipy.stats.chi2 -- Mahalanobis^2 of draws of a 4-D normal is chi2(4)
    z = np.linalg.solve(model.L, (X - MEAN4).T)
    assert stats.kstest((z ** 2).sum(axis=0), stats.chi2(4).cdf).pvalue > 0.01
    # reference: scipy.stats.kstest -- each coordinate has its normal margin
    for j in range(4):
        assert stats.kstest(X[:, j], stats.norm(MEAN4[j], np.sqrt(COV4[j, j])).cdf).pvalue > 0.01
    with pytest.raises(EventDataError, match="power-of-two"):
        sobol_draws(model, 1000)


def test_sobol_levels_of_a_normal_beat_random_draws_against_chi2():
    # Same model, same number of draws, 12 seeds each: the levels from scrambled
    # Sobol points vs pseudo-random draws, both against the exact chi2 level.
    mapped = MappedNormalModel(MEAN4, COV4)
    masses = [0.5, 0.9, 0.99]
    true = np.array([true_normal_level(mapped, m) for m in masses])
    err_sob, err_rnd = rms_level_errors(mapped, masses, true, 1 << 15, range(12))
    # measured 2026-12-02 (three blocks of 12 seeds, 2**15 draws): rms error
    # in density at 50 / 90 / 99 % 0.2-0.3 / 0.6-0.8 / 2.4-4.0 % (Sobol) vs
    # 0.8-0.9 / 1.0-2.6 / 5.9-7.2 % (random), ratio 0.25-0.68; the gain shrinks
    # with the dimension (10-D normal, 2**17 draws: ratio 0.4-0.5)
    assert np.all(err_sob < 0.05), err_sob
    assert np.all(err_sob < 0.75 * err_rnd), (err_sob, err_rnd)


def test_rare_by_mass_with_sobol_levels_flags_the_nominal_share(model4):
    mapped = MappedNormalModel(MEAN4, COV4)
    for mass in (0.99, 0.995):
        fresh = model4.sample(200_000, random_state=31)
        res = rare_by_mass(mapped.score_samples(fresh), mapped, mass, random_state=32)
        assert res.log_level == pytest.approx(hdr_levels(mapped, [mass], random_state=32)[0])
        # reference: scipy.stats.binomtest -- events outside the exact HDR are
        # Binomial(n, 1 - mass); the Sobol level's own error is a few tenths of
        # a percent in density, below 0.0003 in mass here
        ci = stats.binomtest(res.count, fresh.shape[0]).proportion_ci(confidence_level=0.999)
        assert ci.low - 0.0003 <= 1 - mass <= ci.high + 0.0003, (mass, res.count, ci)


def rms_level_errors(model, masses, reference, n, seeds):
    """RMS relative error in density of the HDR levels over ``seeds``: (Sobol points
    through the inverse map, the model's own random draws), against ``reference``."""
    sob = np.array([hdr_levels(model, masses, n, random_state=s) for s in seeds])
    rnd = np.array([hdr_levels(SamplerOnly(model), masses, n, random_state=s) for s in seeds])
    return (np.sqrt(np.mean((np.exp(sob - reference) - 1) ** 2, axis=0)),
            np.sqrt(np.mean((np.exp(rnd - reference) - 1) ** 2, axis=0)))


def quadrature_levels_1d(model, masses, lo, hi, n=200_000):
    # reference: midpoint-rule quadrature of the model's own density on a fine
    # grid (sort the cells by density, accumulate density x width, read the
    # density where the cumulated mass reaches p), as tests/test_contours.py does in 2-D
    edges = np.linspace(lo, hi, n + 1)
    centres = 0.5 * (edges[1:] + edges[:-1])
    dens = np.sort(np.exp(model.score_samples(centres.reshape(-1, 1))))[::-1]
    cum = np.cumsum(dens) * (edges[1] - edges[0])
    assert abs(cum[-1] - 1) < 1e-4  # the grid holds the whole mass
    return np.log(dens[np.searchsorted(cum, masses)])


@pytest.fixture(scope="module")
def fitted_1d():
    from core.density import AdditiveTreeDensity

    # training events: a two-component normal mixture (scipy.stats.norm)
    rng = np.random.default_rng(41)
    upper = rng.random(8000) < 0.3
    x = np.where(upper, stats.norm(4.0, 0.5).rvs(8000, random_state=42),
                 stats.norm(0.0, 1.0).rvs(8000, random_state=43))
    return AdditiveTreeDensity(random_state=0).fit(x.reshape(-1, 1))


def test_sobol_levels_of_a_fitted_model_match_its_quadrature_and_beat_random_draws(fitted_1d):
    model = fitted_1d
    masses = np.array([0.5, 0.9, 0.995])
    exact = quadrature_levels_1d(model, masses, -10.0, 12.0)
    err_sob, err_rnd = rms_level_errors(model, masses, exact, 1 << 14, range(6))
    # measured 2026-12-02 (three blocks of 6 seeds, 2**14 draws, rms error in
    # density against the quadrature): 0.003 / 0.03-0.05 / 0.5-0.9 % at
    # 50 / 90 / 99.5 % (Sobol) vs 0.3-0.6 / 1.7-2.8 / 7-18 % (random)
    assert np.all(err_sob < 0.02), err_sob
    assert np.all(err_sob < 0.3 * err_rnd), (err_sob, err_rnd)
    # the default count (DEFAULT_LEVEL_SAMPLES) is within 0.5 % at every mass
    default = hdr_levels(model, masses, DEFAULT_LEVEL_SAMPLES, random_state=7)
    assert np.all(np.abs(np.exp(default - exact) - 1) < 0.005), (default, exact)
