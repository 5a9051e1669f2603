"""The recipe's typed records: round trips, one place for each default, bad values
named with the recipe file, and recipes stored before the records still load and
digest the same (batch skip markers depend on the digest)."""

from __future__ import annotations

import copy
import json
import os
import pickle

import numpy as np
import pytest

from core.errors import RecipeError
from core.recipe import (Cleaning, Comparison, Compensation, Engine, Populations, RareRule, Recipe, TransformSpec,
                         default_recipe, load_recipe, recipe_digest, save_recipe)

HERE = os.path.dirname(__file__)
STORED = os.path.join(HERE, "recipe_files", "stored_schema1.json")
SAMPLES = os.path.join(os.path.dirname(HERE), "sample_events")


@pytest.mark.parametrize("record", [
    Compensation(), Compensation("file"), Compensation("csv", "spill.csv"),
    Cleaning(), Cleaning(drop_saturated=False, drop_piles=False, dequantise=True),
    RareRule(), RareRule("mass", mass=0.99),
    Comparison(), Comparison(rate=0.01, min_fold=3.0),
    Engine(), Engine({"random_state": 4, "learning_rate": 0.05}),
    Populations(), Populations({"rare_share": 0.02}),
])
def test_each_record_round_trips_through_json(record):
    stored = json.loads(json.dumps(record.to_dict()))   # reference: json (RFC 8259) text
    back = type(record).from_dict(stored)
    assert back == record and back.to_dict() == stored
    assert pickle.loads(pickle.dumps(record)) == record    # the batch sends recipes to worker processes


def test_transform_spec_is_the_stored_dict_and_read_only():
    spec = TransformSpec({"kind": "arcsinh", "cofactor": 150.0}, "FL1-A")
    assert spec == {"kind": "arcsinh", "cofactor": 150.0} and spec.kind == "arcsinh"
    assert spec.params == {"cofactor": 150.0}
    assert json.loads(json.dumps(spec)) == spec
    with pytest.raises(TypeError):
        spec["cofactor"] = 5.0
    assert copy.deepcopy(spec) == spec and pickle.loads(pickle.dumps(spec)) == spec


def test_defaults_live_in_the_records():
    from core import contrast, rare, tube

    r = Recipe()
    assert r.compensation == Compensation() and r.compensation.source == "none"
    assert r.cleaning == Cleaning() and r.rare == RareRule() and r.comparison == Comparison()
    assert r.engine_arguments() == {"random_state": Engine.DEFAULT_RANDOM_STATE}
    # the other modules read the same values (no second copy to drift apart)
    assert rare.DEFAULT_RARE_RULE == RareRule().to_dict()
    assert tube.DEFAULT_SHARE == RareRule().share
    assert (contrast.DEFAULT_RATE, contrast.DEFAULT_MIN_FOLD) == (Comparison().rate, Comparison().min_fold)
    # a section left out of the stored form takes the record's defaults
    minimal = Recipe.from_dict({"schema_version": 1, "channels": ["A"]})
    assert (minimal.cleaning, minimal.rare, minimal.comparison) == (Cleaning(), RareRule(), Comparison())


def test_assigning_a_stored_section_makes_its_record():
    r = Recipe(channels=["FL1-A"])
    r.rare = {"rule": "mass", "mass": 0.9}
    r.transforms = {"FL1-A": {"kind": "arcsinh", "cofactor": 5.0}}
    r.engine = {"random_state": 2}
    assert r.rare == RareRule("mass", mass=0.9) and isinstance(r.transforms["FL1-A"], TransformSpec)
    assert r.engine.random_state == 2
    with pytest.raises(RecipeError, match="rare 'mass'"):
        r.rare = {"rule": "mass", "mass": 2.0}
    with pytest.raises(RecipeError, match="compensation source 'csv' needs 'csv_path'"):
        Compensation("csv")


@pytest.mark.parametrize("section, value, words", [
    ("compensation", {"source": "csv", "csv_path": ""}, "compensation source 'csv' needs 'csv_path'"),
    ("cleaning", {"dequantise": 1}, "cleaning 'dequantise' must be true or false"),
    ("rare", {"rule": "share", "share": 1.5}, "rare 'share' is a fraction between 0 and 1"),
    ("comparison", {"rate": 0.0}, "comparison 'rate' is the false discovery rate"),
    ("engine", {"random_state": "seven"}, "engine 'random_state' must be a whole number"),
    ("populations", {"rare_share": 2}, "populations 'rare_share' must be a share between 0 and 1"),
    ("transforms", {"FL1-A": {"kind": "log", "floor": -1.0}}, "the transform of channel 'FL1-A'"),
])
def test_bad_values_are_named_with_the_recipe_file(tmp_path, section, value, words):
    d = json.loads(open(STORED, encoding="utf-8").read())
    d[section] = value
    path = tmp_path / "panel-3.json"
    path.write_text(json.dumps(d), encoding="utf-8")
    with pytest.raises(RecipeError) as err:
        load_recipe(path)
    assert str(err.value).startswith("recipe panel-3.json: ") and words in str(err.value)


def test_recipe_stored_before_the_records_loads_and_digests_the_same(tmp_path):
    # stored_schema1.json and the digests below were written by the recipe code of
    # commit e667192 (plain-dict sections), from sample_events/tube_B_treated_low.fcs's
    # default recipe with every section changed from its default
    text = open(STORED, encoding="utf-8").read()
    r = load_recipe(STORED)
    assert recipe_digest(r) == "6fec226d11b0eabb"
    assert isinstance(r.rare, RareRule) and r.rare.rule == "mass" and r.rare.mass == 0.99
    assert [g.name for g in r.regions] == ["box", "rarest", "new"]
    stored = json.loads(text)
    stored.pop("software")
    assert r.to_dict() == stored
    out = tmp_path / "again.json"
    save_recipe(r, out)
    assert out.read_text(encoding="utf-8") == text   # same bytes: the stored format is unchanged


def test_default_recipe_digest_unchanged():
    from core.fcs import read_fcs

    r = default_recipe(read_fcs(os.path.join(SAMPLES, "tube_A_control.fcs")))
    assert recipe_digest(r) == "d44584803a0f81ff"   # the recipe code of commit e667192 gives this digest
    assert recipe_digest(Recipe.from_dict({"schema_version": 1, "channels": ["FL1-A"]})) == "33a06217945a4b89"


def test_compensate_transform_step_is_built_once_per_file(monkeypatch):
    from core import file_values
    from core.fcs import read_fcs

    ef = read_fcs(os.path.join(SAMPLES, "tube_B_treated_low.fcs"))
    r = default_recipe(ef)
    assert r.compensation.source == "file"
    calls = []
    real = file_values._spillover
    monkeypatch.setattr(file_values, "_spillover", lambda *a: calls.append(1) or real(*a))
    prepared, values = file_values.density_input(ef, r)
    assert len(calls) == 1
    step = file_values.compensate_transform(ef, r)
    np.testing.assert_array_equal(step.apply(ef.data), values)
    assert prepared.matrix.shape == (int(prepared.kept.sum()), len(r.channels))


def test_session_compensation_choices_make_records(tmp_path):
    from core.compensation import SpilloverMatrix, write_spillover_csv
    from core.errors import BoscageError
    from core.session import Session
    from tests.test_session import make_fcs

    path = make_fcs(tmp_path / "tube.fcs")
    s = Session()
    s.open([path])
    tube = s.current
    with pytest.raises(BoscageError, match="choose a spillover CSV file first"):
        s.set_compensation("csv")
    S = SpilloverMatrix(detectors=["FL1-A", "FL2-A"], matrix=np.array([[1.0, 0.1], [0.05, 1.0]]), source="test")
    csv = write_spillover_csv(tmp_path / "spill.csv", S)
    s.set_compensation("csv", csv_path=csv)
    assert tube.recipe.compensation == Compensation("csv", csv)
    # the values follow: compensated = observed @ inverse(S) on the detectors (FCS 3.1 $SPILLOVER meaning)
    fl = [tube.names.index("FL1-A"), tube.names.index("FL2-A")]
    by_hand = np.asarray(tube.event_file.data, dtype=np.float64)[:, fl] @ np.linalg.inv(S.matrix)
    np.testing.assert_allclose(tube.compensated("FL1-A"), by_hand[:, 0], rtol=1e-10)
    s.set_compensation("none")
    assert tube.recipe.compensation == Compensation() and tube.recipe.compensation.csv_path is None
    with pytest.raises(RecipeError, match="compensation source 'auto'"):
        s.set_compensation("auto")
    assert tube.recipe.compensation == Compensation()
