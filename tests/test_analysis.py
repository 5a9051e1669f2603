"""One file through one recipe (core/analysis.py).

References: numpy.linalg (compensation = observed x inverse(S), FCS 3.1 $SPILLOVER
convention), numpy.arcsinh (the arcsinh transform), scipy.stats.percentileofscore
(rarity), hand-computed rectangle masks (Gating-ML 2.0 half-open bounds, from memory).
"""

import os

import numpy as np
import pytest
from scipy import stats

from core.analysis import analyse, compensated_and_transformed
from core.compensation import spillover_to_keyword, SpilloverMatrix
from core.errors import RecipeError
from core.fcs import EventFile, read_fcs, write_fcs
from core.recipe import Recipe

MARKERS = ["CD3", "CD4", "CD8"]
NAMES = ["FSC-A", "SSC-A"] + MARKERS + ["Time"]
RANGE = 262144.0
S = np.array([[1.0, 0.12, 0.02], [0.05, 1.0, 0.20], [0.0, 0.03, 1.0]])
ARCSINH = {"kind": "arcsinh", "cofactor": 150.0}
SMALL_ENGINE = {"n_trees": 30, "marginal_trees": 20, "patience": 5, "random_state": 0}


def make_file(path, n=3000, seed=0, spike=0):
    """Raw events mixed by S (stored in $SPILLOVER), 5 saturated events, optional spiked population."""
    rng = np.random.default_rng(seed)
    pop = rng.random(n) < 0.6
    true = np.column_stack([np.where(pop, rng.lognormal(8.0, 0.3, n), rng.lognormal(5.0, 0.5, n)),
                            np.where(pop, rng.lognormal(7.0, 0.4, n), rng.lognormal(4.0, 0.6, n)),
                            rng.lognormal(5.5, 0.5, n)])
    if spike:
        true[:spike] = rng.lognormal([5.0, 9.0, 9.5], 0.1, size=(spike, 3))
    mixed = true @ S
    data = np.column_stack([rng.normal(60_000, 8_000, n), rng.normal(30_000, 6_000, n), mixed,
                            np.sort(rng.uniform(0, 1000, n))])
    data = np.round(data)
    data[-5:, 3] = RANGE  # saturated in CD4
    kw = {"$SPILLOVER": spillover_to_keyword(SpilloverMatrix(MARKERS, S))}
    write_fcs(str(path), data, NAMES, keywords=kw, channel_ranges=[RANGE] * len(NAMES))
    return data


def recipe(**changes):
    d = dict(channels=MARKERS, compensation={"source": "file", "csv_path": None},
             transforms={c: dict(ARCSINH) for c in MARKERS}, engine=dict(SMALL_ENGINE),
             regions=[{"name": "CD3+", "kind": "rectangle", "channels": ["CD3", "CD4"], "x": [3.0, 10.0],
                       "y": [-10.0, 10.0], "transforms": {"CD3": dict(ARCSINH), "CD4": dict(ARCSINH)}},
                      {"name": "scatter", "kind": "interval", "channels": ["FSC-A"], "low": 50_000.0,
                       "high": None, "transforms": {"FSC-A": None}}])
    d.update(changes)
    return Recipe(**d)


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    path = tmp_path_factory.mktemp("an") / "tube.fcs"
    raw = make_file(path)
    ef = read_fcs(str(path))
    return ef, raw, analyse(ef, recipe())


def test_compensation_and_transform_follow_numpy(analysed):
    ef, raw, _ = analysed
    names, values = compensated_and_transformed(ef, recipe())
    assert names == NAMES and values.shape == raw.shape
    idx = [NAMES.index(c) for c in MARKERS]
    # reference: numpy.linalg.inv -- compensated = observed @ inv(S); numpy.arcsinh for the transform
    comp = raw[:, idx] @ np.linalg.inv(S)
    np.testing.assert_allclose(values[:, idx], np.arcsinh(comp / 150.0), rtol=1e-10, atol=1e-12)
    # channels without a transform keep their recorded values
    np.testing.assert_array_equal(values[:, 0], raw[:, 0])
    # the input file is not touched
    np.testing.assert_array_equal(ef.data, raw)


def test_per_event_arrays_keep_removed_events_with_their_reason(analysed):
    _, raw, an = analysed
    assert an.n_events == 3000 and an.log_density.shape == (3000,)
    assert list(an.reason[-5:]) == ["saturated"] * 5 and (an.reason[:-5] == "").all()
    assert np.isnan(an.log_density[-5:]).all() and np.isfinite(an.log_density[:-5]).all()
    assert np.isnan(an.rarity[-5:]).all() and not an.rare[-5:].any()
    assert an.prepared.matrix.shape == (2995, 3)
    np.testing.assert_allclose(an.log_density[:-5], an.model.score_samples(an.prepared.matrix))


def test_rarity_and_rare_rule(analysed):
    _, _, an = analysed
    kept = an.log_density[:-5]
    # reference: scipy.stats.percentileofscore(kind="strict")
    for i in [0, 17, 400, 2990]:
        assert an.rarity[i] == pytest.approx(stats.percentileofscore(kept, kept[i], kind="strict"))
    assert an.n_rare == round(0.005 * 2995)
    assert np.nanmax(an.log_density[an.rare]) < np.nanmin(an.log_density[~an.rare & (an.reason == "")])


def test_region_masks_on_transformed_values(analysed):
    ef, raw, an = analysed
    comp = raw[:, 2:5] @ np.linalg.inv(S)
    cd3, cd4 = np.arcsinh(comp[:, 0] / 150), np.arcsinh(comp[:, 1] / 150)
    # reference: half-open rectangle bounds low <= x < high (Gating-ML 2.0, from memory)
    want = (cd3 >= 3.0) & (cd3 < 10.0) & (cd4 >= -10.0) & (cd4 < 10.0)
    np.testing.assert_array_equal(an.region_masks["CD3+"], want)
    np.testing.assert_array_equal(an.region_masks["scatter"], raw[:, 0] >= 50_000)
    assert 0 < want.sum() < 3000


def test_table_has_one_row_per_event(analysed):
    _, _, an = analysed
    t = an.table()
    assert len(t) == 3000
    for col in NAMES + ["log density", "rarity percentile", "rare", "reason", "region: CD3+", "region: scatter"]:
        assert col in t.columns
    assert (t["reason"] == "saturated").sum() == 5
    assert t["rare"].sum() == an.n_rare
    assert np.isfinite(an.heldout_loglik) and an.timing["fit"] > 0


def test_cancel_through_progress_keeps_a_usable_result(analysed):
    ef, _, _ = analysed
    calls = []

    def stop_after_three(step, total, info):
        calls.append(step)
        return len(calls) < 3

    an = analyse(ef, recipe(), progress=stop_after_three)
    assert an.cancelled and len(calls) == 3
    assert np.isfinite(an.log_density[:-5]).all() and an.n_rare == round(0.005 * 2995)


def test_recipe_that_does_not_fit_the_file(analysed):
    ef, _, _ = analysed
    with pytest.raises(RecipeError, match="CD19"):
        analyse(ef, recipe(channels=["CD3", "CD19"]))


def test_non_finite_events_are_flagged():
    rng = np.random.default_rng(3)
    data = rng.normal(1000, 100, size=(800, 3))
    data[:4, 1] = np.nan
    ef = EventFile(path="memory.fcs", data=data, channel_names=MARKERS, channel_labels=[""] * 3,
                   channel_ranges=np.full(3, RANGE), keywords={}, version="FCS3.1")
    an = analyse(ef, recipe(compensation={"source": "none", "csv_path": None}, regions=[]))
    assert list(an.reason[:4]) == ["non-finite"] * 4 and np.isnan(an.log_density[:4]).all()
    assert np.isfinite(an.log_density[4:]).all()


def test_contrast_with_a_control_finds_the_spike(tmp_path):
    n, n_spike = 10_000, 100
    make_file(tmp_path / "control.fcs", n=n, seed=10)
    make_file(tmp_path / "treated.fcs", n=n, seed=11, spike=n_spike)
    an = analyse(str(tmp_path / "treated.fcs"), recipe(regions=[]), control=str(tmp_path / "control.fcs"))
    spike = np.zeros(n, bool)
    spike[:n_spike] = True
    assert an.enriched.shape == (n,) and not an.enriched[-5:].any()
    assert np.isnan(an.contrast_score[-5:]).all()
    assert an.enriched[spike].mean() >= 0.8
    # the recipe's comparison section sets the false discovery rate and the minimum fold
    assert an.contrast.rate == 0.05 and an.contrast.min_fold == 2.0
    # Benjamini-Hochberg at 5 %: the false share of the enriched events stays near 5 %
    # (allow the spread of one run: at most 15 % here)
    assert an.enriched[~spike].sum() <= 0.15 * an.enriched.sum()
    kept = an.reason == ""
    assert np.isfinite(an.contrast_p[kept]).all() and np.isnan(an.contrast_q[~kept]).all()
    cols = an.export_columns()
    assert {"contrast score", "contrast local", "contrast local fold", "contrast p", "contrast q",
            "enriched"} <= set(cols)
    assert (cols["contrast q"][~kept] == 1.0).all()
    assert {"contrast p", "contrast q", "enriched"} <= set(an.table().columns)


def test_enriched_region_is_evaluated_after_the_contrast(tmp_path):
    make_file(tmp_path / "control.fcs", n=4000, seed=10)
    make_file(tmp_path / "treated.fcs", n=4000, seed=11, spike=60)
    r = recipe(regions=[{"name": "new", "kind": "enriched", "control": "control.fcs"}])
    an = analyse(str(tmp_path / "treated.fcs"), r, control=str(tmp_path / "control.fcs"))
    np.testing.assert_array_equal(an.region_masks["new"], an.enriched)
    assert an.enriched.sum() > 0
    # without a control the region (and those built on it) is left out; the others are evaluated
    r.regions = [*r.to_dict()["regions"], {"name": "not new", "kind": "not", "operands": ["new"]},
                 {"name": "CD3 any", "kind": "interval", "channels": ["CD3"], "low": -100.0, "high": None,
                  "transforms": {"CD3": dict(ARCSINH)}}]
    plain = analyse(str(tmp_path / "treated.fcs"), r)
    assert list(plain.region_masks) == ["CD3 any"]
    assert plain.info["regions_without_control"] == ["new", "not new"]
