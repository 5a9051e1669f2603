"""Axis probes of the hill climbs in one compiled pass (core.density.kernels.probes,
AdditiveTreeDensity.score_probes, core.populations.modes._hill_climb(probe=...)).

References: the model's own score_samples of the 2 d probe points x +- h_j e_j, built
one by one (the former way of scoring them: equal to rounding, 1e-9 nats), and the
climbs and populations found with the probes scored that way.
"""

import numpy as np
import pytest

from core.density import AdditiveTreeDensity
from core.populations import find_populations
from core.populations.modes import _hill_climb

NAMES = ["CD3", "CD4", "CD8", "CD19"]


def events(seed=5):
    rng = np.random.default_rng(seed)
    return np.vstack([rng.normal([0, 0, 0, 1], 0.5, (1500, 4)),
                      rng.normal([3, 1, -1, 0], 0.7, (1000, 4)),
                      rng.gamma(2.0, 1.0, (700, 4)) + [0, 4, 2, -2]])


def probes_one_by_one(model, X, H):
    m, d = X.shape
    out = np.empty((m, 2 * d))
    for j in range(d):
        for side, sign in ((0, 1.0), (1, -1.0)):
            P = X.copy()
            P[:, j] = X[:, j] + sign * H[:, j]
            out[:, side * d + j] = model.score_samples(P)
    return out


@pytest.fixture(scope="module")
def mixture_alone():
    X = events()
    model = AdditiveTreeDensity(n_trees=0, random_state=0).fit(X)
    assert model.scores_with_posteriors            # the compiled probe path applies
    return X, model


def test_probes_equal_scoring_each_probe(mixture_alone):
    X, model = mixture_alone
    rng = np.random.default_rng(0)
    rows = X[rng.choice(len(X), 300, replace=False)].copy()
    rows[0, 2] += 1e4                    # beyond the far-value clip: scored at the clip, as score_samples does
    H = rng.uniform(1e-4, 2.0, rows.shape)
    got = model.score_probes(rows, H)
    want = probes_one_by_one(model, rows, H)
    assert got.shape == (300, 8)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)
    assert np.isfinite(got).all()


def test_a_model_with_trees_scores_its_probes_with_score_samples(mixture_alone):
    X, _ = mixture_alone
    model = AdditiveTreeDensity(base="logistic", n_trees=5, random_state=0).fit(X)
    assert not model.scores_with_posteriors
    H = np.full((20, 4), 0.1)
    assert np.array_equal(model.score_probes(X[:20], H), probes_one_by_one(model, X[:20], H))


def test_climbs_with_probes_end_where_the_one_by_one_climbs_end(mixture_alone):
    X, model = mixture_alone
    starts = X[::150]
    scale = np.subtract(*np.percentile(X, [75, 25], axis=0))
    f0 = model.score_samples(starts)
    x1, f1 = _hill_climb(model.score_samples, starts, f0, scale)
    x2, f2 = _hill_climb(model.score_samples, starts, f0, scale, probe=model.score_probes)
    np.testing.assert_allclose(x2, x1, rtol=0, atol=1e-8)
    np.testing.assert_allclose(f2, f1, rtol=0, atol=1e-9)
    assert (f1 > f0 - 1e-12).all() and (f1 > f0).any()        # the climbs rise


def test_populations_found_with_probes_are_the_former_ones(mixture_alone, monkeypatch):
    X, model = mixture_alone
    with_probes = find_populations(model, X, NAMES)
    monkeypatch.setattr(AdditiveTreeDensity, "score_probes", None)   # probes scored one by one
    former = find_populations(model, X, NAMES)
    assert np.array_equal(with_probes.labels, former.labels)
    assert [r["count"] for r in with_probes.table] == [r["count"] for r in former.table]
    assert with_probes.definition.n_populations >= 2
