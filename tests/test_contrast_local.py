"""The comparison's local neighbour score and the one p-value of two scores (core/contrast_local.py).

References: scipy.stats (binom.logsf, kstest against uniform, multivariate_normal),
scipy.spatial.cKDTree's neighbours checked against numpy distances sorted by
brute force, the conformal p-value's definition (the test event ranked among
itself and the n reference events, p = share of the n + 1 at least as extreme;
from memory) counted by brute force, Benjamini-Hochberg via core.fdr (checked
against scipy in tests/test_fdr.py).
"""

import numpy as np
import pytest
from scipy import stats

from core.contrast import conformal_pvalues, contrast
import core.contrast_local as contrast_local
from core.contrast_local import (MIN_SCAN, dominance_counts, local_scores, min_rank_pvalues, neighbours_for)
from core.errors import EventDataError
from core.fdr import bh_qvalues
from core.recipe import Recipe
from core.recipe.records import Comparison


def brute_min_rank(s1, ref1, s2, ref2, tie_break=True):
    """The definition: rank the test event among itself and the reference, per score (rank =
    how many of the n + 1 score at least as high); statistic (smaller rank, larger rank)."""
    out = []
    for a, b in zip(s1, s2):
        A, B = np.r_[ref1, a], np.r_[ref2, b]
        ra = np.array([np.sum(A >= v) for v in A])
        rb = np.array([np.sum(B >= v) for v in B])
        lo, hi = np.minimum(ra, rb), np.maximum(ra, rb)
        if tie_break:
            out.append(np.sum((lo < lo[-1]) | ((lo == lo[-1]) & (hi <= hi[-1]))) / A.size)
        else:
            out.append(np.sum(lo <= lo[-1]) / A.size)
    return np.array(out)


def test_min_rank_pvalue_is_the_rank_definition():
    rng = np.random.default_rng(7)
    # rounded scores: many ties, in the reference and between test and reference
    ref1, ref2 = np.round(rng.normal(size=250), 1), np.round(rng.normal(size=250), 1)
    s1, s2 = np.round(1.3 * rng.normal(size=150), 1), np.round(1.3 * rng.normal(size=150), 1)
    exact = min_rank_pvalues(s1, ref1, s2, ref2, exact_top=10**6)
    np.testing.assert_allclose(exact, brute_min_rank(s1, ref1, s2, ref2), rtol=0, atol=1e-15)
    # beyond exact_top the smaller rank alone (ties against the test event): exact for that
    # statistic, and never below the tie-broken p (still a valid p-value)
    bulk = min_rank_pvalues(s1, ref1, s2, ref2, exact_top=0)
    np.testing.assert_allclose(bulk, brute_min_rank(s1, ref1, s2, ref2, tie_break=False), rtol=0, atol=1e-15)
    assert np.all(bulk >= exact - 1e-15)
    assert np.isnan(min_rank_pvalues(np.array([np.nan]), ref1, np.array([1.0]), ref2)).all()
    # the reference events as_extreme names are the ones each exact p counts
    from core.contrast_local import as_extreme

    counted = np.array([(1 + as_extreme(a, ref1, b, ref2).sum()) / (ref1.size + 1) for a, b in zip(s1, s2)])
    np.testing.assert_allclose(counted, exact, rtol=0, atol=1e-15)


def test_dominance_counts_by_brute_force():
    rng = np.random.default_rng(3)
    x, y = rng.integers(1, 40, size=300), rng.integers(1, 40, size=300)
    qx, qy = rng.integers(0, 45, size=100), rng.integers(0, 45, size=100)
    expected = [np.sum((x <= a) & (y <= b)) for a, b in zip(qx, qy)]
    np.testing.assert_array_equal(dominance_counts(x, y, qx, qy), expected)


def test_min_rank_pvalues_are_uniform_for_exchangeable_events():
    # one test event and 199 reference events drawn alike (two correlated scores, one of them
    # discrete like neighbour counts): P(p <= u) = u.  Reference: scipy.stats.kstest against
    # scipy.stats.uniform, one p per independent replicate (so no shared reference)
    rng = np.random.default_rng(11)
    p = []
    for _ in range(400):
        z = rng.normal(size=(200, 2))
        a = z[:, 0]
        b = 0.5 * z[:, 0] + z[:, 1] + 1e-6 * rng.random(200)      # continuous: no ties
        p.append(min_rank_pvalues(a[:1], a[1:], b[:1], b[1:])[0])
    p = np.array(p)
    # discrete on {1, ..., 200} / 200: compare with the uniform at the grid's midpoints
    assert stats.kstest(p - 0.5 / 200, stats.uniform.cdf).pvalue > 0.05
    assert np.mean(p <= 0.05) <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / 400)


def test_an_outlier_in_one_score_does_not_hide_events_first_in_the_other():
    # the failure the local score was built for: one control event scores above every new
    # event by the density ratio; by neighbour counts the new events rank first
    rng = np.random.default_rng(2)
    n = 6000
    ref_density, ref_local = rng.normal(size=n), rng.normal(size=n)
    ref_density[0] = 14.0                           # a control tail event (its local score is ordinary)
    test_density = np.r_[rng.normal(size=n - 30), rng.uniform(5, 8, size=30)]
    test_local = np.r_[rng.normal(size=n - 30), rng.uniform(6, 9, size=30)]
    new = np.r_[np.zeros(n - 30, bool), np.ones(30, bool)]
    alone = conformal_pvalues(test_density, ref_density)
    assert np.all(alone[new] == 2 / (n + 1))        # under the outlier: 2 / (n + 1)
    assert not (bh_qvalues(alone) <= 0.05).any()    # BH needs p <= 0.05 x 30 / 6000 = 1 / 4000: none pass
    both = min_rank_pvalues(test_density, ref_density, test_local, ref_local)
    assert np.all(both[new] == 1 / (n + 1))
    found = bh_qvalues(both) <= 0.05
    assert found[new].all() and found[~new].sum() <= 3


def test_local_score_is_the_binomial_scan_of_the_nearest_neighbours():
    rng = np.random.default_rng(5)
    train_t, train_c = rng.normal(size=(300, 3)), rng.normal(size=(200, 3))
    train_t[:25] = rng.normal([3.0, 3.0, 0.0], 0.1, size=(25, 3))     # a test-only cluster
    X = np.vstack([rng.normal([3.0, 3.0, 0.0], 0.1, size=(5, 3)), rng.normal(size=(20, 3))])
    phi = np.r_[np.zeros(5), rng.normal(0, 0.3, size=20)]     # the share correction (0 at the cluster)
    k = 12
    score, fold = local_scores(train_t, train_c, X, phi, k)
    # brute force: robust scale of the pool, Euclidean distances, j nearest, binomial upper tail
    pool = np.vstack([train_t, train_c])
    med = np.median(pool, axis=0)
    scale = 1.4826 * np.median(np.abs(pool - med), axis=0)
    odds = 300 / 200 * np.exp(phi)
    pi0 = odds / (1 + odds)
    for i, x in enumerate(X):
        d = np.sqrt((((pool - x) / scale) ** 2).sum(axis=1))
        is_test = np.argsort(d, kind="stable")[:k] < 300
        a = np.cumsum(is_test)
        j = np.arange(1, k + 1)
        surprise = -stats.binom.logsf(a - 1, j, pi0[i])           # reference: scipy.stats.binom
        assert score[i] == pytest.approx(surprise[MIN_SCAN - 1:].max(), rel=1e-9, abs=1e-12)
        assert fold[i] == pytest.approx(np.log((a[-1] + 0.5) / (k - a[-1] + 0.5)) - np.log(odds[i]), rel=1e-12)
    # the cluster's events have only test neighbours: the scan is at least -k ln(pi0)
    assert np.all(score[:5] >= -k * np.log(pi0[:5]) - 1e-9)
    assert np.all(score[:5] > score[5:].max())


def _brute_local(train_t, train_c, X, k):
    """Local scores by brute force (numpy distances, stable sort; scipy.stats.binom), phi = 0."""
    pool = np.vstack([train_t, train_c])
    med = np.median(pool, axis=0)
    scale = 1.4826 * np.median(np.abs(pool - med), axis=0)
    pi0 = len(train_t) / len(pool)
    out = []
    for x in X:
        d = np.sqrt((((pool - x) / scale) ** 2).sum(axis=1))
        a = np.cumsum(np.argsort(d, kind="stable")[:k] < len(train_t))
        out.append((-stats.binom.logsf(a - 1, np.arange(1, k + 1), pi0))[MIN_SCAN - 1:].max())
    return np.array(out)


def test_large_file_search_is_exact_for_the_top_share(monkeypatch):
    # two stages (core/contrast_local.py, "Large files"): approximate search for every event, then
    # the top share by approximate score searched exactly.  Reference: brute-force neighbours.
    monkeypatch.setattr(contrast_local, "EXACT_MIN", 0)
    rng = np.random.default_rng(8)
    d, k = 6, 12
    train_t, train_c = rng.normal(size=(1500, d)), rng.normal(size=(1500, d))
    train_t[:20] = rng.normal(2.5, 0.1, size=(20, d))                 # a test-only cluster
    X = np.vstack([rng.normal(2.5, 0.1, size=(6, d)), rng.normal(size=(394, d))])
    phi = np.zeros(len(X))
    exact, _ = local_scores(train_t, train_c, X, phi, k)
    brute = _brute_local(train_t, train_c, X, k)
    np.testing.assert_allclose(exact, brute, rtol=1e-9, atol=1e-12)
    approx, _ = local_scores(train_t, train_c, X, phi, k, eps=3.0, exact_share=0.0)
    assert np.mean(approx != exact) > 0.2                 # a loose search changes many scores
    two, _ = local_scores(train_t, train_c, X, phi, k, eps=3.0, exact_share=0.1)
    top = approx >= np.sort(approx)[-40]                  # the top 10 % of 400 by approximate score (ties in)
    assert top.sum() >= 40
    np.testing.assert_allclose(two[top], brute[top], rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(two[~top], approx[~top])
    assert np.all(two[:6] > np.quantile(two[6:], 0.99))   # the cluster's events still rank first
    # eps=None: exact while the pool holds at most EXACT_POOL events, the two stages beyond
    np.testing.assert_array_equal(local_scores(train_t, train_c, X, phi, k, eps=None)[0], exact)
    monkeypatch.setattr(contrast_local, "EXACT_POOL", 1000)
    monkeypatch.setattr(contrast_local, "APPROX_EPS", 3.0)
    np.testing.assert_array_equal(local_scores(train_t, train_c, X, phi, k, eps=None, exact_share=0.1)[0], two)


class _Normal:
    """A Gaussian density (scipy.stats.multivariate_normal): a cheap stand-in model, no mixture."""

    def __init__(self, X):
        self.dist = stats.multivariate_normal(X.mean(axis=0), np.cov(X.T))

    def score_samples(self, X):
        return self.dist.logpdf(X)


@pytest.mark.parametrize("search", ["exact", "large-file"])
def test_contrast_pvalues_are_uniform_under_the_null(search, monkeypatch):
    # control and test drawn alike; each replicate's first test event: its combined p-value,
    # and the local score's own conformal p-value (the cross-fitting keeps both exchangeable).
    # "large-file": the two-stage search at every size (approximate with a loose eps, exact for
    # the top 5 % of each part's test and control events together): still exchangeable
    if search == "large-file":
        monkeypatch.setattr(contrast_local, "EXACT_POOL", 0)
        monkeypatch.setattr(contrast_local, "EXACT_MIN", 0)
        monkeypatch.setattr(contrast_local, "APPROX_EPS", 3.0)
    rng = np.random.default_rng(4)
    mean, cov = np.zeros(3), np.array([[1.0, 0.4, 0.0], [0.4, 1.0, 0.2], [0.0, 0.2, 1.0]])
    both, local = [], []
    for r in range(150):
        C, T = rng.multivariate_normal(mean, cov, size=240), rng.multivariate_normal(mean, cov, size=240)
        res = contrast(T, C, model_factory=lambda X, progress=None: _Normal(X), random_state=r, smallest=15)
        assert res.info["neighbours"] == 10
        both.append(res.pvalue[0])
        local.append(conformal_pvalues(res.local_score, res.local_control_scores)[0])
    # reference: scipy.stats.kstest against scipy.stats.uniform (p on a grid of 1 / 241)
    for p in (both, local):
        assert stats.kstest(np.array(p) - 0.5 / 241, stats.uniform.cdf).pvalue > 0.05


def test_smallest_population_setting():
    # k = floor(m (K - 1) / K): 20 neighbours for 30 events in 3 parts; never below MIN_SCAN
    assert neighbours_for(30, 3) == 20 and neighbours_for(10, 2) == MIN_SCAN
    assert Comparison().smallest_population == 30.0
    assert Comparison(smallest_population=0).smallest_population == 0.0
    with pytest.raises(Exception, match="smallest_population"):
        Comparison(smallest_population=5)
    base = {**Recipe().to_dict(), "channels": ["FL1-A", "FL2-A"]}
    r = Recipe.from_dict({**base, "comparison": {"rate": 0.05, "min_fold": 2.0, "smallest_population": 50}})
    assert r.comparison.smallest_population == 50.0
    assert Recipe.from_dict(r.to_dict()).comparison.smallest_population == 50.0
    # a recipe written before the setting existed loads with the default
    assert Recipe.from_dict({**base, "comparison": {"rate": 0.05, "min_fold": 2.0}}
                            ).comparison.smallest_population == 30.0
    with pytest.raises(EventDataError, match="smallest population"):
        contrast(np.zeros((300, 3)), np.zeros((300, 3)), smallest=3)


def test_contrast_panel_keeps_the_recipes_smallest_population(qtbot):
    from desktop.panels.contrast import ContrastPanel

    panel = ContrastPanel()
    qtbot.addWidget(panel)
    assert panel.comparison_settings()["smallest_population"] == 30.0
    panel.set_comparison({"rate": 0.01, "min_fold": 3.0, "smallest_population": 60.0})
    assert panel.comparison_settings() == {"rate": 0.01, "min_fold": 3.0, "smallest_population": 60.0}
