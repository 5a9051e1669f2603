"""Rare events by share and by probability mass (core/rare.py).

The known densities here are scipy.stats distributions wrapped with the
model interface (``sample`` / ``score_samples``): for a d-dimensional normal the
highest-density region holding mass p is the ellipsoid of squared Mahalanobis
radius chi2.ppf(p, d), so its density level is exact.
"""

import numpy as np
import pytest
from scipy import stats

from core.errors import RecipeError
from core.rare import (mass_level, mass_levels, rare_by_mass, rare_by_share, rare_events,
                       rarity_percentile)


class NormalModel:
    """A multivariate normal with the density-model interface (reference: scipy.stats)."""

    def __init__(self, mean, cov):
        self.dist = stats.multivariate_normal(mean=mean, cov=cov)
        self.d = len(mean)

    def sample(self, n, random_state=None):
        return np.atleast_2d(self.dist.rvs(size=n, random_state=random_state)).reshape(n, self.d)

    def score_samples(self, X):
        return np.atleast_1d(self.dist.logpdf(X))


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
