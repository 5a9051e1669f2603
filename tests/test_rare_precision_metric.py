"""The density benchmark's rare-precision metrics measure what their docstrings say.

``tests/benchmarks/density_benchmark.py`` reports, per scenario, the issue's
rare precision (of the 0.5 % events with the lowest true density, the share
among the model's lowest 0.5 %), a ceiling (the truth plus 0.02 nats of seeded
noise), the number of near-ties at the debris floor and a tie-robust companion
(the model's lowest 0.5 % that are within 0.1 nats of the true 0.5 % quantile).
Checks here compare them with independent numpy computations of the same
definitions, with the hypergeometric law of a random ranking (scipy.stats) and
with the benchmark scenarios themselves (small samples).
"""

from __future__ import annotations

import importlib.util
import math
import os
import sys

import numpy as np
import pytest
from scipy import stats

_PATH = os.path.join(os.path.dirname(__file__), "benchmarks", "density_benchmark.py")
_spec = importlib.util.spec_from_file_location("density_benchmark", _PATH)
B = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("density_benchmark", B)
_spec.loader.exec_module(B)
S = B.S     # density_scenarios, as the benchmark imports it


def _reference_precision(true, model, k):
    """Issue definition with numpy thresholds (valid without ties): both values at or below their k-th lowest."""
    t_k = np.sort(true)[k - 1]
    m_k = np.sort(model)[k - 1]
    return np.sum((true <= t_k) & (model <= m_k)) / k


# --------------------------------------------------------------- rare_precision

def test_truth_and_monotone_transforms_of_it_score_one():
    rng = np.random.default_rng(0)
    t = rng.normal(size=5000)
    assert B.rare_precision(t, t) == 1.0
    # rank-based: any strictly increasing map of the truth finds the same events
    # (reference: numpy, np.exp / affine maps are strictly increasing)
    assert B.rare_precision(t, 3.0 * t - 7.0) == 1.0
    assert B.rare_precision(t, np.exp(t)) == 1.0
    # the reversed ranking finds none of them while k <= n / 2
    assert B.rare_precision(t, -t) == 0.0


def test_matches_numpy_threshold_reference_on_partly_right_rankings():
    rng = np.random.default_rng(1)
    n = 20000
    t = rng.normal(size=n)
    for noise in (0.05, 0.3, 1.0, 3.0):
        m = t + noise * rng.normal(size=n)
        for share in (0.005, 0.02, 0.1):
            k = math.ceil(share * n)
            # reference: numpy (np.sort thresholds), the issue's definition restated
            assert B.rare_precision(t, m, share) == pytest.approx(_reference_precision(t, m, k), abs=1e-12)


def test_random_ranking_scores_the_share_hypergeometric():
    # For a model ranking unrelated to the truth, the overlap of two random
    # k-subsets of n events is hypergeometric(N=n, K=k, draws=k): mean k^2/n,
    # so the precision averages k/n.  reference: scipy.stats.hypergeom
    n, share = 4000, 0.05
    k = math.ceil(share * n)
    rng = np.random.default_rng(2)
    t = rng.normal(size=n)
    hits = np.array([B.rare_precision(t, rng.normal(size=n), share) * k for _ in range(200)])
    law = stats.hypergeom(n, k, k)
    assert abs(hits.mean() - law.mean()) < 5 * law.std() / math.sqrt(hits.size)
    lo, hi = law.interval(0.9999)
    assert np.all((hits >= lo) & (hits <= hi))
    # single draw at the benchmark's own share and size: within the 99.99 % interval
    n, k = 50000, B.rare_count(50000)
    assert k == 250                       # ceil(0.005 * 50000)
    t = rng.normal(size=n)
    one = B.rare_precision(t, rng.normal(size=n)) * k
    lo, hi = stats.hypergeom(n, k, k).interval(0.9999)
    assert lo <= one <= hi


def test_ties_in_the_truth_are_broken_by_event_order():
    # 30 events share the lowest true value; k = 10.  rare_precision takes the
    # first 10 of them by event order, so a model that flags 10 other tied
    # events scores 0 although they are exactly as rare (documented behaviour).
    n, k = 1000, 10
    t = np.linspace(0.0, 10.0, n)
    t[:30] = -5.0
    m = np.arange(n, dtype=float)
    m[20:30] = -1.0                      # the model's lowest: tied events 20..29
    assert B.rare_precision(t, m, share=k / n) == 0.0
    assert B.rare_precision_within(t, m, tolerance=0.0, share=k / n) == 1.0
    assert B.rare_precision_within(t, m, tolerance=0.1, share=k / n) == 1.0


def test_non_finite_model_values_count_as_rarest():
    n = 2000
    rng = np.random.default_rng(3)
    t = rng.normal(size=n)
    k = B.rare_count(n)                   # 10
    low = np.argsort(t)[:k]
    m = np.zeros(n)
    m[low[:5]] = -np.inf                  # zero density
    m[low[5:]] = np.nan                   # failed score: also flagged as rare
    assert B.rare_precision(t, m) == 1.0
    assert set(B.lowest_events(m, k).tolist()) == set(low.tolist())


def test_shape_mismatch_is_refused():
    with pytest.raises(ValueError, match="same events"):
        B.rare_precision(np.zeros(10), np.zeros(11))
    with pytest.raises(ValueError, match="lowest events"):
        B.rare_precision_of_lowest(np.zeros(1000), np.arange(3))


# --------------------------------------------------------------- tie-robust companion

def test_within_matches_numpy_reference_and_reduces_to_rare_precision_without_tolerance():
    rng = np.random.default_rng(4)
    n = 10000
    t = rng.normal(size=n)
    k = B.rare_count(n)
    q = np.sort(t)[k - 1]                 # the true 0.5 % quantile (k-th lowest)
    for noise in (0.1, 0.5, 2.0):
        m = t + noise * rng.normal(size=n)
        flagged = np.argsort(m)[:k]
        for tol in (0.0, 0.1, 0.5):
            # reference: numpy, share of the model's k lowest with truth <= q + tol
            ref = np.mean(t[flagged] <= q + tol)
            assert B.rare_precision_within(t, m, tolerance=tol) == pytest.approx(ref, abs=1e-12)
        # no ties in continuous data: tolerance 0 is the issue's metric
        assert B.rare_precision_within(t, m, tolerance=0.0) == B.rare_precision(t, m)


def test_within_counts_near_ties_but_not_events_beyond_the_tolerance():
    # 100 events near the floor (within 0.05 nats of each other), 900 far above; k = 10.
    rng = np.random.default_rng(5)
    t = np.concatenate([-10.0 + 0.05 * rng.random(100), rng.uniform(-5.0, 0.0, 900)])
    share, n = 0.01, t.size
    near_pick = np.arange(n, dtype=float)
    near_pick[90:100] = -1.0              # flags 10 near-floor events
    assert B.rare_precision_within(t, near_pick, share=share) == 1.0
    half = np.arange(n, dtype=float)
    half[95:105] = -1.0                   # 5 near-floor, 5 from 4.95+ nats above the floor
    assert B.rare_precision_within(t, half, share=share) == 0.5
    assert B.rare_precision_within(t, half, tolerance=10.0, share=share) == 1.0


# --------------------------------------------------------------- ceiling

def test_ceiling_is_one_without_noise_and_the_share_with_overwhelming_noise():
    # the truth must not come from one of the noise seeds (seed s would add a multiple of itself)
    rng = np.random.default_rng(20261202)
    n = 20000
    t = rng.uniform(-3.0, 3.0, size=n)
    assert B.rare_precision_ceiling(t, noise_sd=0.0) == 1.0
    k = B.rare_count(n, 0.05)
    law = stats.hypergeom(n, k, k)        # reference: scipy.stats.hypergeom (random ranking)
    seeds = tuple(range(20))
    c = B.rare_precision_ceiling(t, noise_sd=1e6, seeds=seeds, share=0.05)
    assert abs(c * k - law.mean()) < 5 * law.std() / math.sqrt(len(seeds))


def test_ceiling_is_the_mean_over_the_documented_seeds():
    rng = np.random.default_rng(7)
    t = rng.normal(size=3000)
    # reference: numpy default_rng(seed).standard_normal, the construction in CEILING_NOISE_SD's docstring
    by_hand = np.mean([_reference_precision(
        t, t + B.CEILING_NOISE_SD * np.random.default_rng(s).standard_normal(t.size), B.rare_count(t.size))
        for s in B.CEILING_SEEDS])
    assert B.rare_precision_ceiling(t) == pytest.approx(by_hand, abs=1e-12)


# --------------------------------------------------------------- scenarios: the ties are real

def test_debris_floor_and_tie_count_on_hand_made_events():
    d = 3
    # reference: the debris is 5 % of events, uniform over [0, 5]^3 (volume 125)
    assert B.debris_floor(d) == pytest.approx(math.log(0.05 / 125.0), abs=1e-12)
    floor = B.debris_floor(d)
    X = np.array([[1.0, 1.0, 1.0], [4.9, 0.1, 2.0], [2.0, 2.0, 2.0], [6.0, 1.0, 1.0], [0.0, 5.0, 2.5]])
    t = np.array([floor + 0.01, floor + 0.09, floor + 0.5, floor - 3.0, floor + 0.1])
    # inside and within 0.1 nats: rows 0, 1, 4 (row 3 is outside the box, row 2 too far above)
    assert B.debris_floor_ties(X, t) == 3


@pytest.mark.parametrize("name,d", [("banana", 5), ("panel", 8)])
def test_scenario_ties_sink_the_issue_metric_but_not_the_tie_robust_one(name, d):
    # 20,000 test events of a benchmark scenario (as the benchmark draws them).
    X, logpdf, _ = S.make_scenario(name, 20000, d, 1)
    t = logpdf(X)
    inside = np.all((X >= S.BOX_LOW) & (X <= S.BOX_HIGH), axis=1)
    # inside the box the true density is the debris floor plus the (positive) populations
    assert np.all(t[inside] >= B.debris_floor(d) - 1e-9)
    ties = B.debris_floor_ties(X, t)
    k = B.rare_count(t.size)
    assert ties > 5 * k                   # many more near-ties than flagged events
    ceiling = B.rare_precision_ceiling(t)
    assert ceiling < 0.6                  # 0.02 nats of noise already loses most of them
    noisy = t + B.CEILING_NOISE_SD * np.random.default_rng(0).standard_normal(t.size)
    assert B.rare_precision_within(t, noisy) == 1.0
