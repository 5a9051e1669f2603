"""Test-vs-control contrast (core/contrast.py) on synthetic data with a known spike.

The background of both samples is the same 3-channel correlated normal; the
test sample also holds a spiked population of 1 % that the control lacks.
"""

import numpy as np
import pytest
from scipy import stats

from core.contrast import contrast, split_heldout, threshold_for_alpha
from core.errors import Cancelled, EventDataError

MEAN = np.array([2.0, 2.0, 1.0])
COV = np.array([[0.30, 0.15, 0.00], [0.15, 0.30, 0.05], [0.00, 0.05, 0.20]])
SPIKE_MEAN = np.array([3.2, 0.9, 1.0])
ENGINE = {"random_state": 0}


def background(n, rng):
    return rng.multivariate_normal(MEAN, COV, size=n)


@pytest.fixture(scope="module")
def spiked():
    rng = np.random.default_rng(20261201)
    control = background(20_000, rng)
    n_spike = 200
    test = np.vstack([background(20_000 - n_spike, rng), rng.normal(SPIKE_MEAN, 0.08, size=(n_spike, 3))])
    labels = np.r_[np.zeros(20_000 - n_spike, bool), np.ones(n_spike, bool)]
    fresh_control = background(50_000, rng)
    res = contrast(test, control, alpha=0.001, engine=ENGINE, random_state=0)
    return res, labels, fresh_control


def test_threshold_lets_at_most_alpha_of_the_scores_pass():
    rng = np.random.default_rng(0)
    s = rng.normal(size=9_999)
    for alpha in (0.001, 0.01, 0.1):
        t = threshold_for_alpha(s, alpha)
        assert np.sum(s > t) <= alpha * s.size
        # and it is the smallest such threshold: one rank lower lets too many pass
        lower = np.sort(s)[::-1][int(np.floor(alpha * s.size)) + 1]
        assert np.sum(s > lower) > alpha * s.size
    ties = np.r_[np.zeros(50), np.ones(50)]
    assert np.sum(ties > threshold_for_alpha(ties, 0.01)) == 0


def test_heldout_split_is_seeded_and_disjoint():
    a_fit, a_out = split_heldout(1000, 0.3, 5)
    b_fit, b_out = split_heldout(1000, 0.3, 5)
    np.testing.assert_array_equal(a_out, b_out)
    assert a_out.size == 300 and np.intersect1d(a_fit, a_out).size == 0
    assert np.union1d(a_fit, a_out).size == 1000
    with pytest.raises(EventDataError, match="held-out share"):
        split_heldout(10, 1.5)


def test_spiked_population_is_found(spiked):
    res, labels, _ = spiked
    recall = res.enriched[labels].mean()
    precision = labels[res.enriched].mean()
    assert recall >= 0.9, recall
    assert precision >= 0.8, precision
    # reference: scipy.stats.binom -- background test events pass at about alpha
    # (allowing the spread of a threshold set by ~6 of 6000 held-out events: 3 x alpha)
    n_bg = int((~labels).sum())
    assert res.enriched[~labels].sum() <= stats.binom.ppf(0.999, n_bg, 3 * res.alpha)
    # the threshold was set on held-out control events: at most alpha of them pass
    assert res.control_pass_share <= res.alpha
    assert res.n_control_heldout == 6000
    assert res.count == res.enriched.sum() and res.share == pytest.approx(res.count / labels.size)


def test_fresh_control_events_pass_at_about_alpha(spiked):
    res, _, fresh = spiked
    # cross-fitted: either half's test model has not seen these events
    score = res.test_model[0].score_samples(fresh) - res.control_model.score_samples(fresh)
    k = int(np.sum(score > res.threshold))
    # reference: scipy.stats.binom -- with 6000 held-out events setting the
    # threshold, new control-like events pass at a rate near alpha; allow the
    # threshold's own sampling spread (a rate up to 4 x alpha) and no more
    assert k <= stats.binom.ppf(0.999, fresh.shape[0], 4 * res.alpha), k


def test_share_interval_is_clopper_pearson(spiked):
    res, labels, _ = spiked
    n, k = labels.size, res.count
    # reference: Clopper-Pearson bounds from scipy.stats.beta quantiles
    low = stats.beta.ppf(0.025, k, n - k + 1)
    high = stats.beta.ppf(0.975, k + 1, n - k)
    assert res.share_ci[0] == pytest.approx(low, rel=1e-6)
    assert res.share_ci[1] == pytest.approx(high, rel=1e-6)
    assert res.share_ci[0] < res.share < res.share_ci[1]
    # the spike's true share (1 %) is not above the interval: every spiked event can be found
    assert 0.01 <= res.share_ci[1]


def test_nan_rows_are_never_enriched_and_cancel_stops():
    rng = np.random.default_rng(3)
    control = background(3000, rng)
    test = background(3000, rng)
    test[:5, 1] = np.nan
    res = contrast(test, control, engine={"random_state": 0})
    assert np.isnan(res.score[:5]).all() and not res.enriched[:5].any()
    with pytest.raises(Cancelled):
        contrast(test, control, engine={"random_state": 0}, progress=lambda s, t, i: False)
    with pytest.raises(EventDataError, match="same channels"):
        contrast(test, control[:, :2])
