"""The mixture EM's event cap (``AdditiveTreeDensity(max_em_events=...)``,
:func:`core.density.fitting.em_event_cap`): the default keeps the former fixed
cap, the by-channels rule grows it above 12 channels, and a capped fit's EM
sees only a subsample (checked against scikit-learn's GaussianMixture fitted to
the same events: more events to EM, a held-out value at least as close)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.mixture import GaussianMixture

from core.density import fitting
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
