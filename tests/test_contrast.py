"""Test-vs-control contrast (core/contrast.py): conformal p-values, Benjamini-Hochberg, shift warning.

The background of both samples is the same 3-channel correlated normal; the
test sample also holds a spiked population of 1 % that the control lacks.
References: scipy.stats (uniform distribution and kstest, binomtest, beta,
ks_2samp, false_discovery_control), fcsparser's bundled files (random halves of
one real file: the complete null), the conformal p-value's definition
((1 + #{reference >= s}) / (n + 1), from memory) counted by brute force.
"""

import numpy as np
import pytest
from scipy import stats

from core.analysis import density_input
from core.contrast import (assign_parts, conformal_pvalues, contrast, prepare_control, shift_check)
from core.density import AdditiveTreeDensity
from core.errors import Cancelled, EventDataError
from core.fcs import read_fcs
from core.recipe import default_recipe
from tests.bundled_files import pick

MEAN = np.array([2.0, 2.0, 1.0])
COV = np.array([[0.30, 0.15, 0.00], [0.15, 0.30, 0.05], [0.00, 0.05, 0.20]])
SPIKE_MEAN = np.array([3.2, 0.9, 1.0])
ENGINE = {"random_state": 0}
SMALL_ENGINE = {"n_trees": 30, "marginal_trees": 20, "patience": 5, "random_state": 0}


def background(n, rng):
    return rng.multivariate_normal(MEAN, COV, size=n)


def spiked_values():
    """(test, control) (12,000 x 3 each): the test holds 120 spiked events at its end."""
    rng = np.random.default_rng(20261201)
    control = background(12_000, rng)
    n_spike = 120
    test = np.vstack([background(12_000 - n_spike, rng), rng.normal(SPIKE_MEAN, 0.08, size=(n_spike, 3))])
    return test, control


def remembering_factory():
    """Fit each distinct event matrix once (a second contrast of the same files reuses the fits)."""
    fitted = {}

    def fit(X, progress=None):
        key = (X.shape, X.tobytes())
        if key not in fitted:
            fitted[key] = AdditiveTreeDensity(**ENGINE).fit(X, progress=progress)
        return fitted[key]
    return fit


@pytest.fixture(scope="module")
def spiked():
    test, control = spiked_values()
    labels = np.r_[np.zeros(12_000 - 120, bool), np.ones(120, bool)]
    fit = remembering_factory()
    res = contrast(test, control, model_factory=fit, random_state=0, channel_names=["a", "b", "c"])
    res.info["density alone"] = contrast(test, control, model_factory=fit, random_state=0, smallest=0)
    return res, labels


@pytest.fixture(scope="module")
def null_run():
    # control and test drawn from the same distribution (the complete null)
    rng = np.random.default_rng(11)
    control, test = background(3000, rng), background(3000, rng)
    pc = prepare_control(control, engine=SMALL_ENGINE, random_state=0)
    res = contrast(test, None, engine=SMALL_ENGINE, random_state=0, prepared_control=pc)
    res.info["control_part"] = pc.part
    return res


def test_conformal_pvalue_is_the_rank_formula():
    rng = np.random.default_rng(0)
    ref = rng.normal(size=500)
    ref[:20] = ref[20:40]                      # ties count as ">="
    s = np.r_[rng.normal(size=200), ref[:5], np.nan, 99.0]
    p = conformal_pvalues(s, ref)
    # brute force of the definition p = (1 + #{ref >= s}) / (n + 1)
    expected = np.array([(1 + np.sum(ref >= v)) / (ref.size + 1) for v in s[:-2]])
    np.testing.assert_allclose(p[:-2], expected, rtol=0, atol=1e-15)
    assert np.isnan(p[-2]) and p[-1] == 1 / (ref.size + 1)


def test_pvalues_are_uniform_under_the_null(null_run):
    assert np.isfinite(null_run.pvalue).all()
    # the density score's own conformal p-values (the combined p-value of both scores is
    # checked over independent replicates in tests/test_contrast_local.py)
    p = conformal_pvalues(null_run.score, null_run.control_scores)
    # reference: scipy.stats.kstest against scipy.stats.uniform -- conformal p-values
    # of events exchangeable with the control events are uniform on (0, 1].  All p share
    # one reference of 3,000 control scores, so a one-sample test of all 3,000 would
    # ignore the reference's own spread: test every 10th (300 << 3,000)
    assert stats.kstest(p[::10], stats.uniform.cdf).pvalue > 0.05
    # exchangeability itself: test and control scores from one distribution
    # (reference: scipy.stats.ks_2samp)
    assert stats.ks_2samp(null_run.score, null_run.control_scores).pvalue > 0.05
    # within one part the pair of models saw neither the test nor the control events of that
    # part, so there the two are exactly exchangeable (3 parts, so each at 0.05 / 3)
    part, c_part = null_run.info["part"], null_run.info["control_part"]
    for k in range(3):
        assert stats.ks_2samp(null_run.score[part == k], null_run.control_scores[c_part == k]).pvalue > 0.05 / 3


def test_nothing_is_flagged_under_the_null(null_run):
    # Benjamini-Hochberg at 5 % under the complete null flags anything with probability <= 5 %
    assert null_run.count == 0 and null_run.threshold == np.inf
    assert null_run.shift is not None and not null_run.shift.warn, null_run.shift.text


def test_qvalues_are_benjamini_hochberg_of_the_pvalues(spiked):
    res, _ = spiked
    ok = np.isfinite(res.pvalue)
    # reference: scipy.stats.false_discovery_control (Benjamini-Hochberg adjusted p-values)
    np.testing.assert_allclose(res.qvalue[ok], stats.false_discovery_control(res.pvalue[ok], method="bh"),
                               rtol=1e-12)
    # enriched: q <= rate and both estimates of the log density ratio >= log(min fold)
    expected = (res.qvalue <= res.rate) & (np.minimum(res.score, res.local_fold) >= np.log(res.min_fold))
    np.testing.assert_array_equal(res.enriched, expected)
    assert res.rate == 0.05 and res.min_fold == 2.0


def test_spiked_population_is_found_at_the_false_discovery_rate(spiked):
    res, labels = spiked
    recall = res.enriched[labels].mean()
    precision = labels[res.enriched].mean()
    assert recall >= 0.95, recall
    # BH at 5 %: the false share of the enriched events is near 5 % or below (one run: allow 10 %)
    assert precision >= 0.9, precision
    assert res.count == res.enriched.sum() and res.share == pytest.approx(res.count / labels.size)
    # every finite control event is in the reference; the expected false discoveries are the
    # control share as extreme as the weakest enriched event (the events its p counts) and
    # passing the minimum fold by both estimates, times the test events.  Brute force: rank the
    # weakest event among the control events by each score (reference: scipy.stats.rankdata,
    # "max" = how many score at least as high)
    assert res.n_control == 12_000
    t = np.flatnonzero(res.enriched)[np.argmax(res.pvalue[res.enriched])]
    r1 = stats.rankdata(-np.r_[res.control_scores, res.score[t]], method="max")
    r2 = stats.rankdata(-np.r_[res.local_control_scores, res.local_score[t]], method="max")
    lo, hi = np.minimum(r1, r2), np.maximum(r1, r2)
    counted = ((lo < lo[-1]) | ((lo == lo[-1]) & (hi <= hi[-1])))[:-1]
    assert (1 + counted.sum()) / 12_001 == pytest.approx(res.pvalue[t], rel=1e-12)
    fold_ok = np.minimum(res.control_scores, res.local_control_fold) >= np.log(2.0)
    assert res.expected_false == pytest.approx(np.mean(counted & fold_ok) * labels.size)
    assert res.threshold == pytest.approx(res.score[res.enriched].min())
    # by the density score alone, that share is the control scores at or above the lowest enriched score
    alone = res.info["density alone"]
    assert alone.local_score is None and alone.info["neighbours"] == 0
    assert alone.expected_false == pytest.approx(np.mean(alone.control_scores >= alone.threshold) * labels.size)


def test_minimum_fold_removes_small_ratios(spiked):
    res, labels = spiked
    # the spiked events are far more than 2-fold denser in the test sample
    assert np.all(res.score[res.enriched & labels] >= np.log(2.0))
    with pytest.raises(EventDataError, match="minimum fold"):
        contrast(np.zeros((300, 3)), np.zeros((300, 3)), min_fold=0.5)
    with pytest.raises(EventDataError, match="false discovery rate"):
        contrast(np.zeros((300, 3)), np.zeros((300, 3)), rate=0.0)


def test_share_interval_is_clopper_pearson(spiked):
    res, labels = spiked
    n, k = labels.size, res.count
    # reference: Clopper-Pearson bounds from scipy.stats.beta quantiles
    low = stats.beta.ppf(0.025, k, n - k + 1)
    high = stats.beta.ppf(0.975, k + 1, n - k)
    assert res.share_ci[0] == pytest.approx(low, rel=1e-6)
    assert res.share_ci[1] == pytest.approx(high, rel=1e-6)
    assert res.share_ci[0] < res.share < res.share_ci[1]


def test_parts_are_seeded_and_balanced():
    a, b = assign_parts(1000, 3, [5, 1]), assign_parts(1000, 3, [5, 1])
    np.testing.assert_array_equal(a, b)
    assert sorted(np.bincount(a).tolist()) == [333, 333, 334]
    with pytest.raises(EventDataError, match="at least 2 parts"):
        assign_parts(10, 1, 0)


def test_shift_warning_names_the_channel_that_moved():
    rng = np.random.default_rng(4)
    C = np.column_stack([rng.normal(5.0, 1.0, 40_000), rng.gamma(3.0, 1.0, 40_000), rng.normal(0, 1, 40_000)])
    T = np.column_stack([rng.normal(5.0, 1.0, 40_000), rng.gamma(3.0, 1.0, 40_000), rng.normal(0, 1, 40_000)])
    names = ["CD3", "CD4", "CD8"]
    same = shift_check(T, C, names)
    assert not same.warn and same.text == ""
    # a 5 % gain change on CD4 (values in instrument units, log-scaled for the density)
    logC, logT = np.log(C + 10), np.log(T + 10)
    logT[:, 1] = np.log(T[:, 1] * 1.05 + 10)
    moved = shift_check(logT, logC, names, to_units=[lambda v: np.exp(v) - 10] * 3)
    assert moved.warn and moved.moved == ["CD4"]
    top = moved.channels[0]
    # reference: scipy.stats.ks_2samp gives the statistic reported
    assert top["ks"] == pytest.approx(stats.ks_2samp(logT[:, 1], logC[:, 1]).statistic)
    # medians are reported in instrument units through the inverse map
    assert top["median_test"] / top["median_control"] == pytest.approx(1.05, rel=0.02)
    assert "CD4" in moved.text and "compensation" in moved.text and "CD3" not in moved.text
    # many enriched events warn even when no channel moved
    many = shift_check(T, C, names, enriched_share=0.25)
    assert many.warn and "25.0 %" in many.text and many.moved == []


def test_prepared_control_holds_every_control_event_scored_out_of_part():
    rng = np.random.default_rng(9)
    C = background(1500, rng)
    C[3, 0] = np.nan
    calls = []
    pc = prepare_control(C, engine=SMALL_ENGINE, progress=lambda s, t, i: calls.append(i["stage"]))
    assert pc.n_events == 1499 and pc.folds == 3 and len(pc.models) == 3
    for k in range(3):
        np.testing.assert_allclose(pc.log_control[pc.part == k], pc.models[k].score_samples(pc.events[pc.part == k]))
    assert calls[0].startswith("Control model, part 1 of 3") and calls[-1].startswith("Control model, part 3 of 3")


def test_nan_rows_are_never_enriched_and_cancel_stops():
    rng = np.random.default_rng(3)
    control = background(3000, rng)
    test = background(3000, rng)
    test[:5, 1] = np.nan
    res = contrast(test, control, engine=SMALL_ENGINE)
    assert np.isnan(res.score[:5]).all() and not res.enriched[:5].any()
    assert np.isnan(res.pvalue[:5]).all() and np.isnan(res.qvalue[:5]).all()
    with pytest.raises(Cancelled):
        contrast(test, control, engine=SMALL_ENGINE, progress=lambda s, t, i: False)
    with pytest.raises(EventDataError, match="same channels"):
        contrast(test, control[:, :2])


def test_random_halves_of_a_real_file_flag_nothing():
    # fcsparser's smallest bundled FCS 3.0 integer file (725 events; the default recipe gives
    # the density 6 fluorescence channels), chosen by its properties (tests/bundled_files.py):
    # two random halves of one file are two draws of one sample (the complete null), so
    # Benjamini-Hochberg at 5 % should flag nothing and no channel should have moved
    ef = read_fcs(pick(version="FCS3.0", datatype="I", events=lambda n: n < 1000))
    recipe = default_recipe(ef)
    prep, _ = density_input(ef, recipe)
    X = prep.matrix
    assert X.shape[0] > 600 and X.shape[1] >= 3
    perm = np.random.default_rng(0).permutation(X.shape[0])
    half = X.shape[0] // 2
    res = contrast(X[perm[half:]], X[perm[:half]], engine=SMALL_ENGINE, random_state=0,
                   channel_names=recipe.channels)
    assert res.count == 0 and not res.shift.warn, res.shift.text
    # the conformal p-values of the test half against the control half: uniform
    # (reference: scipy.stats.kstest against scipy.stats.uniform; every 4th, as above)
    assert stats.kstest(res.pvalue[np.isfinite(res.pvalue)][::4], stats.uniform.cdf).pvalue > 0.05
