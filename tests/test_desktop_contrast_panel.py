"""The Contrast panel's false discovery rate and minimum fold (pytest-qt, offscreen).

The controls start at the recipe's defaults, offer only values the contrast
accepts, follow the shown tube's recipe, and what is set there is what the
next contrast (and a saved recipe) uses.
"""

from __future__ import annotations

import pytest

pytest.importorskip("pytestqt")

from core.analysis import comparison_settings  # noqa: E402
from core.contrast import check_settings  # noqa: E402
from core.errors import EventDataError, RecipeError  # noqa: E402
from core.recipe import Recipe, validate_recipe  # noqa: E402
from desktop.panels.contrast import ContrastPanel  # noqa: E402
from tests.test_desktop_app import make_fcs, messages, window  # noqa: E402,F401


def test_panel_defaults_and_ranges_are_the_cores(qtbot):
    panel = ContrastPanel()
    qtbot.addWidget(panel)
    # defaults: the recipe's comparison section of an untouched recipe
    assert panel.comparison_settings() == pytest.approx(comparison_settings(Recipe()))
    # every value the controls can hold is accepted by the contrast and by the recipe's check...
    for rate, fold in ((panel.rate.minimum(), panel.min_fold.minimum()),
                       (panel.rate.maximum(), panel.min_fold.maximum())):
        panel.rate.setValue(rate)
        panel.min_fold.setValue(fold)
        s = panel.comparison_settings()
        check_settings(s["rate"], s["min_fold"])
        r = Recipe(channels=["FL1-A"])
        r.comparison = dict(s)
        validate_recipe(r)
    # ...and a value beyond them is held at the limit (the spin boxes clamp), which the core accepts
    panel.rate.setValue(0.0)
    panel.min_fold.setValue(0.5)
    s = panel.comparison_settings()
    assert s["rate"] > 0 and s["min_fold"] >= 1.0
    check_settings(s["rate"], s["min_fold"])
    # the core's own check refuses what the controls do not offer
    with pytest.raises(EventDataError):
        check_settings(0.0, 2.0)
    with pytest.raises(EventDataError):
        check_settings(0.05, 0.5)
    for text in (panel.rate.toolTip(), panel.min_fold.toolTip()):
        assert len(text) > 40 and "\n" not in text


def test_panel_settings_reach_the_contrast_recipe(qtbot, window, tmp_path):
    path = make_fcs(tmp_path / "t.fcs", n=800, seed=5)
    window.open_paths([path])
    panel = window.contrast_panel
    tube = window.current
    panel.rate.setValue(1.0)        # 1 %
    panel.min_fold.setValue(3.0)
    recipe = window.fitting.recipe_for_fit(tube)
    validate_recipe(recipe, tube.event_file)
    # what analyse() will use for the contrast (core.analysis.comparison_settings)
    assert comparison_settings(recipe) == pytest.approx({"rate": 0.01, "min_fold": 3.0, "smallest_population": 30})
    # a tube whose recipe says otherwise shows its own values when shown again (the smallest
    # population has no control in the panel: the recipe's value is kept)
    tube.recipe.comparison = {"rate": 0.1, "min_fold": 1.5, "smallest_population": 50}
    window.show_tube_by_path(path)
    assert panel.comparison_settings() == pytest.approx({"rate": 0.1, "min_fold": 1.5, "smallest_population": 50})
    assert comparison_settings(window.fitting.recipe_for_fit(tube))["smallest_population"] == 50
    # the recipe check refuses a rate the controls cannot reach
    with pytest.raises(RecipeError):
        r = Recipe(channels=["FL1-A"])
        r.comparison = {"rate": 1.0, "min_fold": 2.0}
        validate_recipe(r)
