"""The gap study's refit of the truth's own family (tests/benchmarks/density_gap_study.py):
its profile log-likelihood and hand-written gradient, checked against scipy."""

from __future__ import annotations

import importlib.util
import os
import sys

import numpy as np
from scipy.optimize import approx_fprime

_HERE = os.path.join(os.path.dirname(__file__), "benchmarks")
if _HERE not in sys.path:
    sys.path.insert(0, _HERE)
_spec = importlib.util.spec_from_file_location("density_gap_study", os.path.join(_HERE, "density_gap_study.py"))
G = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(G)
S = G.S


def _population(d=5, n=1500):
    mix = S.build_cyto(d)
    X, lab = mix.sample(n * 12, np.random.default_rng(0))
    pop = mix.components[0]
    return pop, X[lab == mix.labels[0]][:n]


def _theta(pop):
    f = pop.inner
    return np.concatenate([f.base, f.slope, f.growth, pop.centre, np.log(pop.scale), pop.eps])


def test_profile_gradient_matches_finite_differences():
    pop, X = _population()
    f = pop.inner
    theta = _theta(pop) + np.random.default_rng(1).normal(0.0, 0.05, size=_theta(pop).size)
    _, _, grad = G._profile(theta, X, f.driver, f.rest, grad=True)
    # scipy.optimize.approx_fprime: forward differences, error about step x curvature
    num = approx_fprime(theta, lambda t: G._profile(t, X, f.driver, f.rest)[0], 1e-7)
    np.testing.assert_allclose(grad, num, rtol=0, atol=1e-4 * max(1.0, np.abs(num).max()))


def test_profile_is_the_fitted_family_density_and_beats_the_true_parameters():
    pop, X = _population()
    f = pop.inner
    ll, (mu, sd, cov), _ = G._profile(_theta(pop), X, f.driver, f.rest)
    # level mean / sd and the covariance are maximum-likelihood given the rest: at least the truth's value
    assert ll >= pop.logpdf(X).mean()
    fitted, res = G.refit_skewed_fan(pop, X, maxiter=60)   # a few steps: enough to check the bookkeeping
    # the profile value is the mean of the refitted SkewWarp's exact log density (density_scenarios,
    # scipy.stats.norm for the level) on the same events, and the refit only raises it
    ll_fit, _, _ = G._profile(res.x, X, f.driver, f.rest)
    np.testing.assert_allclose(fitted.logpdf(X).mean(), ll_fit, rtol=0, atol=1e-9)
    assert ll_fit >= ll - 1e-9
