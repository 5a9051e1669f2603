"""Estimator conventions of the density engine (scikit-learn's are the reference:
``clone``, ``GridSearchCV``, ``cross_val_score`` and its not-fitted error), and
model files written by an earlier version of this program."""

from __future__ import annotations

import os

import numpy as np
import pytest

from core.density import AdditiveTreeDensity
from core.errors import BoscageError, ModelFileError, NotFittedError

DATA = os.path.join(os.path.dirname(__file__), "data", "density_models")
SMALL = dict(base="gmm", n_trees=3, layer_trees=3, patience=1, random_state=0)


def _events(n, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    X[: n // 2] += 4.0
    return X


def test_settings_are_listed_once_and_round_trip():
    names = AdditiveTreeDensity.param_names()
    model = AdditiveTreeDensity()
    assert list(model.get_params()) == list(names)
    assert set(AdditiveTreeDensity.default_params()) == set(names)
    model.set_params(n_trees=7, base="logistic")
    assert model.get_params()["n_trees"] == 7
    with pytest.raises(ValueError, match="unknown density engine setting"):
        model.set_params(no_such_setting=1)


def test_repr_shows_every_changed_setting_and_only_those():
    assert repr(AdditiveTreeDensity()) == "AdditiveTreeDensity()"
    text = repr(AdditiveTreeDensity(base="gmm", tol=0.01, random_state=3, jitter=True, lookahead=1))
    # the order of __init__, as scikit-learn's estimators print theirs
    assert text == "AdditiveTreeDensity(jitter=True, lookahead=1, tol=0.01, base='gmm', random_state=3)"
    again = eval(text, {"AdditiveTreeDensity": AdditiveTreeDensity})
    assert again.get_params() == AdditiveTreeDensity(base="gmm", tol=0.01, random_state=3, jitter=True,
                                                     lookahead=1).get_params()


def test_not_fitted_error_is_what_scikit_learn_users_catch():
    model = AdditiveTreeDensity()
    for call in (lambda: model.score_samples(np.zeros((3, 2))), lambda: model.sample(2),
                 lambda: model.n_trees_):
        with pytest.raises(NotFittedError) as info:
            call()
        # scikit-learn's NotFittedError is both a ValueError and an AttributeError
        assert isinstance(info.value, (ValueError)) and isinstance(info.value, AttributeError)
        assert isinstance(info.value, BoscageError)
    assert not hasattr(model, "n_features_in_")


def test_works_with_scikit_learn_model_selection():
    sk = pytest.importorskip("sklearn")  # a test-only dependency
    from sklearn.base import clone
    from sklearn.model_selection import GridSearchCV, KFold, cross_val_score
    from sklearn.utils.validation import check_is_fitted

    X = _events(900, 0)
    model = AdditiveTreeDensity(**SMALL)
    copy = clone(model)
    assert copy is not model and copy.get_params() == model.get_params()
    with pytest.raises(sk.exceptions.NotFittedError):
        check_is_fitted(model)
    cv = KFold(3, shuffle=True, random_state=0)
    scores = cross_val_score(model, X, cv=cv)
    # score = mean held-out log-likelihood: the same number computed by hand
    train, test = next(iter(cv.split(X)))
    by_hand = clone(model).fit(X[train]).score_samples(X[test]).mean()
    assert scores.shape == (3,) and np.isfinite(scores).all()
    assert scores[0] == pytest.approx(by_hand, rel=1e-12)
    search = GridSearchCV(model, {"base": ["gmm", "logistic"]}, cv=cv).fit(X)
    assert search.best_params_["base"] in ("gmm", "logistic")
    check_is_fitted(search.best_estimator_)
    # two separated blobs: the mixture base describes them better than per-channel logistics
    assert search.best_params_["base"] == "gmm"


CASES = ("logistic_layers", "gmm_trees", "skewed_base_only", "auto_trees")


@pytest.mark.parametrize("name", CASES)
def test_model_files_of_the_earlier_layout_load_and_score_the_same(name):
    # written by the version before the engine's parts had names (same .npz layout)
    model = AdditiveTreeDensity.load(os.path.join(DATA, f"{name}.npz"))
    with np.load(os.path.join(DATA, "expected_scores.npz")) as ref:
        if getattr(model, "_gmm", None) is not None and model._gmm.is_skewed:
            # a skewed mixture's map now multiplies its transforms' Jacobians before one log
            # (core/density/EXPERIMENTS.md section 27): the same map and scores to rounding (the
            # trees after it stretch the map's 4e-16 to 2e-13)
            np.testing.assert_allclose(model.score_samples(ref["events"]), ref[name], rtol=0, atol=1e-12)
            np.testing.assert_allclose(model.transform(ref["events"]), ref[name + "_transform"], rtol=0, atol=1e-12)
            return
        np.testing.assert_array_equal(model.score_samples(ref["events"]), ref[name])
        np.testing.assert_array_equal(model.transform(ref["events"]), ref[name + "_transform"])


def test_a_resaved_earlier_file_is_the_same_model(tmp_path):
    old = AdditiveTreeDensity.load(os.path.join(DATA, "auto_trees.npz"))
    old.save(tmp_path / "again.npz")
    again = AdditiveTreeDensity.load(tmp_path / "again.npz")
    X = _events(200, 1) + np.array([0.0, 0.0])
    X = np.column_stack([X, np.abs(X[:, 0]) + 0.5])
    np.testing.assert_array_equal(again.score_samples(X), old.score_samples(X))
    assert again.n_trees_ == old.n_trees_ and again.base_ == old.base_
    with pytest.raises(ModelFileError):
        AdditiveTreeDensity.load(tmp_path / "missing.npz")


def test_tried_steps_leaves_out_the_kept_value_entries():
    from core.density.model import tried_steps

    # engine-shaped curves (the layout documented on learning_curve_): base, trees, then the
    # kept value appended after a roll-back and after a dropped layer
    assert list(tried_steps([2.0, 2.1, 2.3, 2.2, 2.3])) == [2.0, 2.1, 2.3, 2.2]
    assert list(tried_steps([-1.5, -1.6, -1.5, -1.5])) == [-1.5, -1.6]
    assert list(tried_steps([0.5])) == [0.5] and tried_steps(None).size == 0
    # a real fit: every tried step is a curve entry, none repeats, the kept value is the last entry
    rng = np.random.default_rng(3)
    X = rng.normal(size=(3000, 3)) @ np.array([[1.0, 0.5, 0.0], [0.0, 1.0, 0.3], [0.0, 0.0, 1.0]])
    m = AdditiveTreeDensity(n_trees=5, random_state=0).fit(X)
    steps = tried_steps(m.learning_curve_)
    assert steps.size >= 1 and np.unique(steps).size == steps.size
    assert np.isin(steps, m.learning_curve_).all() and m.learning_curve_[-1] == m.heldout_loglik_
