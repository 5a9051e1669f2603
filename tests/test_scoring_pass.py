"""One compiled pass that scores events and gives the mixture's posteriors
(core.density.model.score_samples(posteriors=...), core.populations.find_populations_and_score,
and analyse() using them), and the stages' cheaper pieces (population medians column by
column, Clopper-Pearson share intervals, the rarity from one sort, column-major values).

References: the same computations done the former way (score_samples, then
find_populations / assign_populations: the results must be equal bit for bit),
numpy.median / numpy.percentile over axis 0, scipy.stats.binomtest(...).proportion_ci(
method="exact") (Clopper-Pearson), scipy.stats.rankdata(method="min") (events strictly below).
"""

import numpy as np
import pytest
from scipy import stats

from core.analysis import analyse, compensated_and_transformed
from core.density import AdditiveTreeDensity
from core.fcs import read_fcs
from core.populations import (assign_populations, find_populations, find_populations_and_score,
                              population_stats)
from core.populations.search import _column_iqr
from core.populations.table import _share_ci
from core.prepare_file import transformed_values
from core.rare import rarity_percentile, share_order
from core.tube import Tube

from .test_analysis import MARKERS, make_file, recipe

NAMES = ["CD3", "CD4", "CD8"]


def events(n_scale=1, seed=3):
    rng = np.random.default_rng(seed)
    return np.vstack([rng.normal([0, 0, 0], 0.5, (1500 * n_scale, 3)),
                      rng.normal([3, 1, -1], 0.7, (1000 * n_scale, 3)),
                      rng.gamma(2.0, 1.0, (700 * n_scale, 3)) + [0, 4, 2]])


@pytest.fixture(scope="module")
def mixture_alone():
    """A skewed mixture with no trees: the model that scores with posteriors."""
    X = events()
    model = AdditiveTreeDensity(n_trees=0, random_state=0).fit(X)
    assert model.base_ == "skewed" and model.n_trees_ == 0 and model.scores_with_posteriors
    return X, model


def collect(model, X):
    got = []
    ld = model.score_samples(X, posteriors=lambda a, b, R: got.append((a, b, R)))
    return ld, got


def test_scoring_with_posteriors_gives_the_same_log_density_and_the_mixtures_posteriors(mixture_alone, monkeypatch):
    X, model = mixture_alone
    monkeypatch.setattr("core.density.model.CHUNK", 1000)        # several chunks
    ld, got = collect(model, X)
    assert np.array_equal(ld, model.score_samples(X))            # bit for bit
    assert [(a, b) for a, b, _ in got] == [(a, min(a + 1000, len(X))) for a in range(0, len(X), 1000)]
    R = np.vstack([r for _, _, r in got])
    mix, cols = model.mixture_, ~model._frozen
    assert np.array_equal(R, mix.posteriors(X[:, cols]))
    np.testing.assert_allclose(R.sum(axis=1), 1.0, rtol=0, atol=1e-12)


def test_a_chunk_with_a_far_value_gets_no_posteriors_but_the_same_log_density(mixture_alone, monkeypatch):
    X, model = mixture_alone
    monkeypatch.setattr("core.density.model.CHUNK", 1000)
    Y = X.copy()
    Y[1500, 1] = 1e60                                            # beyond the far-value clip: scored clipped
    ld, got = collect(model, Y)
    assert np.array_equal(ld, model.score_samples(Y))
    assert [r is None for _, _, r in got] == [False, True, False, False]


def test_a_model_that_is_not_a_skewed_mixture_alone_passes_no_posteriors(mixture_alone):
    X, _ = mixture_alone
    gaussian = AdditiveTreeDensity(base="gmm", n_trees=0, random_state=0).fit(X)
    assert not gaussian.scores_with_posteriors
    ld, got = collect(gaussian, X)
    assert np.array_equal(ld, gaussian.score_samples(X)) and all(r is None for _, _, r in got)


def test_finding_populations_while_scoring_equals_scoring_then_finding(mixture_alone):
    X, model = mixture_alone
    ld = model.score_samples(X)
    settings = {"mode_events": 2000}                              # the mode search on a subsample
    before = find_populations(model, X, NAMES, settings=settings, log_density=ld)
    pops, scores = find_populations_and_score(model, X, NAMES, settings=settings)
    assert np.array_equal(scores, ld)
    assert np.array_equal(pops.labels, before.labels)
    assert pops.table == before.table
    assert pops.definition.to_dict() == before.definition.to_dict()
    assert np.array_equal(assign_populations(pops.definition, X), pops.labels)
    assert before.definition.n_populations >= 2


def test_analyse_with_a_mixture_alone_scores_in_the_populations_pass(tmp_path):
    path = tmp_path / "tube.fcs"
    make_file(path, n=2000)
    ef = read_fcs(str(path))
    an = analyse(ef, recipe(engine={"n_trees": 0, "random_state": 0}))
    assert an.model.scores_with_posteriors
    kept = an.kept
    assert np.array_equal(an.log_density[kept], an.model.score_samples(an.prepared.matrix))
    assert np.isnan(an.log_density[~kept]).all()
    assert np.array_equal(an.population_labels[kept], assign_populations(an.populations.definition,
                                                                         an.prepared.matrix))
    assert (an.population_labels[~kept] == -1).all()
    # the one sort: the kept events from the lowest log density up, ties by event order
    assert np.array_equal(an.density_order, np.flatnonzero(kept)[np.argsort(an.log_density[kept], kind="stable")])
    assert an.n_rare == round(0.005 * an.n_kept)
    assert set(an.timing) >= {"prepare", "fit", "score", "populations"}


def test_population_stats_column_by_column_match_numpy():
    rng = np.random.default_rng(4)
    X = rng.normal(size=(3001, 4))
    labels = rng.integers(-1, 5, size=3001)
    labels[labels == 3] = 2                                      # population 3 empty
    counts, med, sd = population_stats(X, labels, 5)
    for p in range(5):
        block = X[labels == p]
        assert counts[p] == block.shape[0]
        if block.shape[0] == 0:
            assert np.isnan(med[p]).all() and np.isnan(sd[p]).all()
            continue
        # reference: numpy.median over axis 0, and 1.4826 x the median absolute deviation
        want = np.median(block, axis=0)
        assert np.array_equal(med[p], want)
        assert np.array_equal(sd[p], 1.4826 * np.median(np.abs(block - want), axis=0))


def test_column_iqr_matches_numpy_percentile_over_axis_0():
    X = np.round(np.random.default_rng(6).normal(size=(1001, 5)), 2)
    want = np.percentile(X, 75, axis=0) - np.percentile(X, 25, axis=0)
    assert np.array_equal(_column_iqr(X), want)


@pytest.mark.parametrize("k,n", [(0, 10), (3, 10), (10, 10), (1, 100_000), (94_765, 1_000_000), (5, 7)])
def test_share_interval_is_clopper_pearson(k, n):
    lo, hi = _share_ci(k, n)
    # reference: the interval's definition with scipy.stats.binom: P(X >= k | lo) = P(X <= k | hi) = 2.5 %
    if k > 0:
        assert stats.binom.sf(k - 1, n, lo) == pytest.approx(0.025, rel=1e-9)
    else:
        assert lo == 0.0
    if k < n:
        assert stats.binom.cdf(k, n, hi) == pytest.approx(0.025, rel=1e-9)
    else:
        assert hi == 1.0
    # reference: scipy.stats.binomtest(...).proportion_ci(method="exact"), which finds the same
    # bounds by a root search (to about 1e-6 relative for the smallest counts)
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert lo == pytest.approx(ci.low, rel=1e-5, abs=1e-15)
    assert hi == pytest.approx(ci.high, rel=1e-9)


def test_rarity_from_one_sort_counts_the_events_strictly_below():
    rng = np.random.default_rng(7)
    ld = np.round(rng.normal(size=5000), 2)                      # many ties
    ld[rng.random(5000) < 0.05] = np.nan
    ok = np.isfinite(ld)
    order = share_order(ld)
    got = rarity_percentile(ld, order)
    assert np.array_equal(got, rarity_percentile(ld), equal_nan=True)
    # reference: scipy.stats.rankdata(method="min") - 1 = how many entries are strictly below
    want = 100.0 * (stats.rankdata(ld[ok], method="min") - 1) / ok.sum()
    assert np.array_equal(got[ok], want)
    assert np.isnan(got[~ok]).all()
    assert np.isnan(rarity_percentile(np.full(3, np.nan), share_order(np.full(3, np.nan)))).all()


def test_column_major_values_equal_row_major_ones(tmp_path):
    path = tmp_path / "tube.fcs"
    make_file(path, n=500)
    ef = read_fcs(str(path))
    specs = {c: {"kind": "arcsinh", "cofactor": 150.0} for c in MARKERS}
    c_order = transformed_values(ef.data, ef.channel_names, None, specs, "tube.fcs")
    f_order = transformed_values(ef.data, ef.channel_names, None, specs, "tube.fcs", order="F")
    assert f_order.flags.f_contiguous and c_order.flags.c_contiguous
    assert np.array_equal(c_order, f_order)
    np.testing.assert_allclose(c_order[:, 2], np.arcsinh(ef.data[:, 2].astype(np.float64) / 150.0), rtol=1e-14)


def test_a_tube_holds_its_values_column_major_and_equal_to_the_analysis_values(tmp_path):
    path = tmp_path / "tube.fcs"
    make_file(path, n=500)
    tube = Tube.open(str(path))
    names, want = compensated_and_transformed(tube.event_file, tube.recipe)
    assert tube.values.flags.f_contiguous and names == tube.names
    assert np.array_equal(tube.values, want)
