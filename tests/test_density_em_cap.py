"""The mixture EM's event cap (``AdditiveTreeDensity(max_em_events=...)``,
:func:`core.density.fitting.em_event_caps`): the default ("refit_by_channels")
keeps the former fixed cap up to 12 channels and above refits the chosen
count(s) on more events (the count search keeps 50,000); the by-channels rule
grows the cap above 12 channels; a capped fit's EM sees only a subsample
(checked against scikit-learn's GaussianMixture fitted to the same events: more
events to EM, a held-out value at least as close)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.mixture import GaussianMixture

from core.density import fitting
from core.density.mixture_fit import MixtureSettings, fit_mixture
from core.density.model import AdditiveTreeDensity
from core.errors import ParameterError
from core.recipe import Recipe


def test_cap_rule_by_channels():
    assert fitting.em_event_cap(50_000, 30) == 50_000
    assert fitting.em_event_cap(80_000, 4) == 80_000
    # the rule: the base cap up to 12 channels, 12,500 events more per channel above
    assert fitting.em_event_cap("by_channels", 1) == 50_000
    assert fitting.em_event_cap("by_channels", 12) == 50_000
    assert fitting.em_event_cap("by_channels", 13) == 62_500
    assert fitting.em_event_cap("by_channels", 16) == 100_000
    assert fitting.em_event_cap("by_channels", 24) == 200_000


def test_setting_validated_and_accepted_by_the_recipe():
    X = np.random.default_rng(0).normal(size=(300, 2))
    for bad in (10, "many", True):
        with pytest.raises(ParameterError, match="max_em_events"):
            AdditiveTreeDensity(max_em_events=bad, n_trees=0).fit(X)
    r = Recipe.from_dict({"schema_version": 1, "channels": ["A"], "engine": {"max_em_events": "by_channels"}})
    assert r.engine_arguments()["max_em_events"] == "by_channels"


def _events(n, seed):
    """Three correlated Gaussian clusters in 3 channels (n, 3)."""
    rng = np.random.default_rng(seed)
    centres = np.array([[0.0, 0.0, 0.0], [4.0, 1.0, -2.0], [-3.0, 3.0, 2.0]])
    A = np.array([[1.0, 0.6, 0.0], [0.0, 0.8, 0.4], [0.0, 0.0, 0.5]])
    lab = rng.integers(3, size=n)
    return centres[lab] + rng.normal(size=(n, 3)) @ A


def test_the_cap_limits_the_events_em_sees():
    X, T = _events(6000, 1), _events(4000, 2)
    kw = dict(n_trees=0, base="gmm", random_state=0)
    default = AdditiveTreeDensity(**kw).fit(X)
    by_rule = AdditiveTreeDensity(max_em_events="by_channels", **kw).fit(X)
    capped = AdditiveTreeDensity(max_em_events=1000, **kw).fit(X)
    # 3 channels: the rule is the former cap, bit-identical
    np.testing.assert_array_equal(default.score_samples(T), by_rule.score_samples(T))
    # reference: scikit-learn's GaussianMixture (3 components, the truth's count) on the
    # events each EM could see: all 4,800 training events against 1,000 of them
    full_ref = GaussianMixture(3, random_state=0).fit(X[:4800]).score(T)
    small_ref = GaussianMixture(3, random_state=0).fit(X[:1000]).score(T)
    assert small_ref < full_ref
    assert default.score(T) > full_ref - 0.02
    assert capped.score(T) < default.score(T)


def test_refit_rule_caps():
    # the count search keeps the former cap; the skewed refit takes the by-channels cap
    assert fitting.em_event_caps(50_000, 30) == (50_000, 50_000, 0)
    assert fitting.em_event_caps("by_channels", 16) == (100_000, 100_000, 0)
    assert fitting.em_event_caps("refit_by_channels", 12) == (50_000, 50_000, 1250)
    assert fitting.em_event_caps("refit_by_channels", 16) == (50_000, 100_000, 1250)
    assert fitting.em_event_caps("refit_by_channels", 24) == (50_000, 200_000, 1250)


def _skewed_events(n, seed):
    """Three correlated clusters in 3 channels (n, 3), each channel sinh-arcsinh skewed."""
    rng = np.random.default_rng(seed)
    centres = np.array([[0.0, 0.0, 0.0], [5.0, 1.0, -3.0], [-4.0, 4.0, 3.0]])
    Z = np.sinh(np.arcsinh(rng.normal(size=(n, 3))) + 0.8)
    A = np.array([[1.0, 0.5, 0.0], [0.0, 0.8, 0.3], [0.0, 0.0, 0.6]])
    return centres[rng.integers(3, size=n)] + Z @ A


def test_refit_on_more_events_than_the_search():
    X, V, T = _skewed_events(8000, 1), _skewed_events(2000, 2), _skewed_events(20000, 3)
    loc, scale = X.mean(axis=0), X.std(axis=0)

    def fit(cap, refit, per_component=0):
        s = MixtureSettings(random_state=0, max_em_events=cap, final_em_events=refit, components=(1, 2, 4, 8),
                            final_per_component=per_component)
        m = fit_mixture(X, loc, scale, s, validation=V)
        return m.logpdf(T).mean(), m.n_components

    (capped, k), (refit, _), (full, _) = fit(1000, 0), fit(1000, 8000), fit(8000, 0)
    # per component of the chosen count: no more events than the search's -> the capped fit
    assert fit(1000, 8000, per_component=1000 // k)[0] == capped
    assert fit(1000, 8000, per_component=8000 // k)[0] == refit
    # the skewed refit on all 8,000 events recovers (within 0.01 nats) what EM on all of
    # them gives, and beats the search's 1,000 events
    assert refit > capped + 0.02
    assert abs(refit - full) < 0.01
    # reference: scikit-learn's GaussianMixture with the same largest count on all events
    # (skewed clusters: the skewed refit must be ahead of it)
    assert refit > GaussianMixture(8, random_state=0).fit(X).score(T)


def test_refit_rule_is_the_former_cap_up_to_12_channels(monkeypatch):
    # a base cap below the events, so that a refit on more events would show
    monkeypatch.setattr(fitting, "EM_CAP_BASE", 1000)
    X, T = _events(2500, 1), _events(1000, 2)
    kw = dict(n_trees=0, random_state=0)
    capped = AdditiveTreeDensity(max_em_events=1000, **kw).fit(X)
    rule = AdditiveTreeDensity(**kw).fit(X)   # the default: the refit rule
    assert rule.max_em_events == "refit_by_channels"
    np.testing.assert_array_equal(capped.score_samples(T), rule.score_samples(T))
    wider = AdditiveTreeDensity(max_em_events=2000, **kw).fit(X)
    assert not np.array_equal(capped.score_samples(T), wider.score_samples(T))
    # the same events counted as a wide panel (the rule's channel threshold lowered to 2):
    # the chosen count is refitted on all 2,000 training events, so the model changes
    monkeypatch.setattr(fitting, "EM_CAP_CHANNELS", 2)
    wide = AdditiveTreeDensity(**kw).fit(X)
    assert not np.array_equal(capped.score_samples(T), wide.score_samples(T))
