"""Recipes: JSON round trip, digest, every validation message, default recipes on
the real files fcsparser ships and on synthetic files."""

from __future__ import annotations

import hashlib
import json
import os
import types
import warnings

import fcsparser
import numpy as np
import pytest

from core import __version__
from core.errors import ExportError, RecipeError
from core.recipe import (SCHEMA_VERSION, Recipe, default_recipe, is_fluorescence_channel, load_recipe,
                         recipe_digest, save_recipe, validate_recipe)

from tests.test_channel_kinds import EXPECTED as EXPECTED_KINDS  # noqa: E402

FCSPARSER_DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")

ASINH = {"kind": "arcsinh", "cofactor": 150.0}


def _fcs_files():
    out = []
    for root, _, files in os.walk(FCSPARSER_DATA):
        for f in sorted(files):
            if f.lower().endswith(".fcs"):
                out.append(os.path.join(root, f))
    return sorted(out)


def _event_file_from_fcsparser(path):
    """An EventFile-like object built by the reference parser (fcsparser), $PnN names."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta, df = fcsparser.parse(path, reformat_meta=False, channel_naming="$PnN")
    n = int(meta["$PAR"])
    names = [str(c) for c in df.columns]
    keywords = {k: str(v) for k, v in meta.items() if not k.startswith("_")}
    ranges = np.array([float(meta.get(f"$P{i}R", "nan")) for i in range(1, n + 1)])
    return types.SimpleNamespace(path=path, data=df.to_numpy(dtype=np.float64), channel_names=names,
                                 channel_labels=[str(meta.get(f"$P{i}S", "")) for i in range(1, n + 1)],
                                 channel_ranges=ranges, keywords=keywords, version="", meta=meta)


def _synthetic_event_file(names, keywords=None, n=400, seed=0, path="/data/synthetic.fcs"):
    rng = np.random.default_rng(seed)
    data = rng.gamma(2.0, 500.0, size=(n, len(names))) - 100.0
    return types.SimpleNamespace(path=path, data=data, channel_names=list(names),
                                 channel_labels=[""] * len(names),
                                 channel_ranges=np.full(len(names), 262144.0),
                                 keywords=dict(keywords or {}), version="FCS3.1")


def _full_recipe() -> Recipe:
    return Recipe(
        channels=["FL1-A", "FL2-A"],
        compensation={"source": "csv", "csv_path": "spill.csv"},
        transforms={"FL1-A": ASINH, "FL2-A": {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0},
                    "FSC-A": {"kind": "linear", "scale": 1.0 / 262144.0, "offset": 0.0}},
        cleaning={"drop_saturated": False, "drop_piles": False, "dequantise": True},
        engine={"random_state": 7, "learning_rate": 0.05},
        rare={"rule": "mass", "mass": 0.99},
        regions=[{"name": "lymph", "kind": "rectangle", "channels": ["FL1-A", "FL2-A"], "x": [0.1, 2.0],
                  "y": [0.0, 1.0], "parent": None,
                  "transforms": {"FL1-A": ASINH,
                                 "FL2-A": {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0}}},
                 {"name": "rarest", "kind": "rarity", "percentile": 1.0, "parent": "lymph"}],
        name="two-colour", notes="ünïcode notes")


# ---------------------------------------------------------------------------
# round trip and digest
# ---------------------------------------------------------------------------

def test_round_trip_dict_and_file(tmp_path):
    r = _full_recipe()
    assert Recipe.from_dict(json.loads(json.dumps(r.to_dict()))) == r
    path = tmp_path / "r.json"
    assert save_recipe(r, path) == str(path)
    stored = json.loads(path.read_text(encoding="utf-8"))  # reference: json (RFC 8259 text)
    assert stored["schema_version"] == SCHEMA_VERSION and stored["software"] == f"Boscage {__version__}"
    back = load_recipe(path)
    assert back == r and back.source == str(path)
    assert recipe_digest(back) == recipe_digest(r)
    with pytest.raises(ExportError, match="exists already"):
        save_recipe(r, path)
    save_recipe(r, path, overwrite=True)
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]  # no temporary files left


def test_defaults_filled_and_engine_arguments():
    r = Recipe.from_dict({"schema_version": 1, "channels": ["A"]})
    assert r.compensation.to_dict() == {"source": "none", "csv_path": None}
    assert r.cleaning.to_dict() == {"drop_saturated": True, "drop_piles": True, "dequantise": True}
    assert r.rare.to_dict() == {"rule": "share", "share": 0.005}
    assert r.engine == {} and r.engine_arguments() == {"random_state": 0}
    assert r.comparison.to_dict() == {"rate": 0.05, "min_fold": 2.0}
    r2 = Recipe.from_dict({"schema_version": 1, "channels": ["A"], "engine": {"random_state": 3}})
    assert r2.engine_arguments() == {"random_state": 3}


def test_digest_definition_and_sensitivity():
    minimal = Recipe.from_dict({"schema_version": 1, "channels": ["A"], "name": "x", "notes": "y"})
    # canonical JSON written out by hand: sorted keys, no spaces, name/notes left out
    canonical = ('{"channels":["A"],"cleaning":{"dequantise":true,"drop_piles":true,"drop_saturated":true},'
                 '"comparison":{"min_fold":2,"rate":0.05},'
                 '"compensation":{"csv_path":null,"source":"none"},"engine":{},'
                 '"rare":{"rule":"share","share":0.005},"regions":[],"schema_version":1,"transforms":{}}')
    # reference: hashlib.sha256 (FIPS 180-4)
    assert recipe_digest(minimal) == hashlib.sha256(canonical.encode("utf-8")).hexdigest()[:16]
    r = _full_recipe()
    assert len(recipe_digest(r)) == 16 and int(recipe_digest(r), 16) >= 0
    renamed = Recipe.from_dict({**r.to_dict(), "name": "other", "notes": ""})
    assert recipe_digest(renamed) == recipe_digest(r)
    whole = r.to_dict()
    whole["transforms"]["FL1-A"] = {"kind": "arcsinh", "cofactor": 150}  # 150 == 150.0
    assert recipe_digest(Recipe.from_dict(whole)) == recipe_digest(r)
    changed = r.to_dict()
    changed["rare"] = {"rule": "mass", "mass": 0.995}
    assert recipe_digest(Recipe.from_dict(changed)) != recipe_digest(r)
    changed = r.to_dict()
    changed["regions"][0]["x"] = [0.1, 2.5]
    assert recipe_digest(Recipe.from_dict(changed)) != recipe_digest(r)


def test_relative_csv_path_resolves_beside_recipe(tmp_path):
    path = tmp_path / "sub" / "r.json"
    path.parent.mkdir()
    save_recipe(_full_recipe(), path)
    assert load_recipe(path).csv_path_resolved() == str(tmp_path / "sub" / "spill.csv")


# ---------------------------------------------------------------------------
# validation messages
# ---------------------------------------------------------------------------

def _with(**changes):
    d = _full_recipe().to_dict()
    d.update(changes)
    return d


@pytest.mark.parametrize("d, words", [
    (_with(schema_version=SCHEMA_VERSION + 1, future_key=1), ["newer", "Upgrade Boscage"]),
    (_with(schema_version="1"), ["schema_version", "whole number"]),
    ({"channels": ["A"]}, ["schema_version", "not a Boscage recipe"]),
    (_with(colour="red"), ["unknown key", "'colour'"]),
    (_with(channels="FL1-A"), ["'channels'", "list"]),
    (_with(channels=[]), ["'channels'", "non-empty"]),
    (_with(channels=["A", "A"]), ["twice", "A"]),
    (_with(name=3), ["'name'", "text"]),
    (_with(compensation={"source": "auto"}), ["compensation source 'auto'", "file, csv, none"]),
    (_with(compensation={"source": "csv"}), ["csv_path"]),
    (_with(compensation={"source": "none", "matrix": []}), ["unknown key", "'matrix'"]),
    (_with(transforms={"FL1-A": "asinh"}), ["'FL1-A'", "object"]),
    (_with(transforms={"FL1-A": {"kind": "cube-root"}}), ["'FL1-A'", "unknown kind 'cube-root'"]),
    (_with(transforms={"FL1-A": {"kind": "arcsinh", "cofactor": -5.0}}), ["'FL1-A'", "cofactor"]),
    (_with(cleaning={"drop_saturated": "yes"}), ["drop_saturated", "true or false"]),
    (_with(cleaning={"despeckle": True}), ["unknown key", "'despeckle'"]),
    (_with(engine={"random_state": -1}), ["random_state", ">= 0"]),
    (_with(engine={"random_state": 1.5}), ["random_state", "whole number"]),
    (_with(engine={"learning_rat": 0.1}), ["'learning_rat'", "learning_rate"]),
    (_with(engine={"learning_rate": [0.1]}), ["'learning_rate'", "number"]),
    (_with(rare={"rule": "share", "share": 5}), ["share", "between 0 and 1"]),
    (_with(rare={"rule": "mass", "mass": 1.0}), ["mass", "strictly between 0 and 1"]),
    (_with(rare={"rule": "mass", "share": 0.1}), ["unknown key", "'share'"]),
    (_with(rare={"rule": "top"}), ["rare rule 'top'"]),
    (_with(regions=[{"name": "x", "kind": "not", "operands": ["nope"]}]), ["unknown region", "'nope'"]),
    (_with(regions=[{"name": "r", "kind": "interval", "channels": ["FL1-A"], "low": 0, "high": 1,
                     "transforms": {"FL1-A": {"kind": "arcsinh", "cofactor": 5.0}}}]),
     ["drawn", "'FL1-A'", "Redraw"]),
])
def test_validation_messages(d, words):
    with pytest.raises(RecipeError) as err:
        Recipe.from_dict(d)
    for w in words:
        assert w in str(err.value)


def test_messages_name_the_recipe_file(tmp_path):
    path = tmp_path / "panel-7.json"
    path.write_text(json.dumps(_with(rare={"rule": "share", "share": -1})), encoding="utf-8")
    with pytest.raises(RecipeError, match="recipe panel-7.json: rare 'share'"):
        load_recipe(path)
    path.write_text('{"schema_version": 1,\n "channels": [NaN]}', encoding="utf-8")
    with pytest.raises(RecipeError, match="panel-7.json.*NaN"):
        load_recipe(path)
    path.write_text('{"schema_version": 1,\n "channels": ["A",]}', encoding="utf-8")
    with pytest.raises(RecipeError, match="panel-7.json: not valid JSON at line 2"):
        load_recipe(path)
    path.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(RecipeError, match="not UTF-8"):
        load_recipe(path)
    with pytest.raises(RecipeError, match="does not exist"):
        load_recipe(tmp_path / "missing.json")


def test_validation_against_an_event_file(tmp_path):
    ef = _synthetic_event_file(["FSC-A", "SSC-A", "FL1-A", "FL2-A"], path=str(tmp_path / "tube 3.fcs"))
    ok = Recipe(channels=["FL1-A", "FL2-A"], transforms={"FL1-A": ASINH})
    assert validate_recipe(ok, ef) == ok
    with pytest.raises(RecipeError) as err:
        validate_recipe(Recipe(channels=["FL1-A", "CD99"]), ef)
    msg = str(err.value)
    assert "'CD99'" in msg and "tube 3.fcs" in msg and "FSC-A, SSC-A, FL1-A, FL2-A" in msg
    with pytest.raises(RecipeError, match="transformed channel.*'FL9-A'"):
        validate_recipe(Recipe(channels=["FL1-A"], transforms={"FL9-A": ASINH}), ef)
    with pytest.raises(RecipeError, match="no spillover"):
        validate_recipe(Recipe(channels=["FL1-A"], compensation={"source": "file", "csv_path": None}), ef)
    with pytest.raises(RecipeError, match="does not exist"):
        validate_recipe(Recipe(channels=["FL1-A"], compensation={"source": "csv", "csv_path": "nope.csv"}), ef)
    # reference: FCS 3.1 $SPILLOVER = n, n names, n*n values row by row
    ef.keywords["$SPILLOVER"] = "2,FL1-A,FL9-A,1,0.1,0.05,1"
    with pytest.raises(RecipeError, match="FL9-A"):
        validate_recipe(Recipe(channels=["FL1-A"], compensation={"source": "file", "csv_path": None}), ef)


# ---------------------------------------------------------------------------
# default recipes
# ---------------------------------------------------------------------------

def test_fluorescence_rule():
    # common practice: scatter FSC*/SSC*/FS*/SS*, clock Time*/HDR-T, event counter Event*,
    # instrument-internal HDR-* (the full table: tests/test_channel_kinds.py)
    for name in ("FSC-A", "ssc-h", "FS-A", "SS INT LIN", "Time", "TIME", "HDR-T", "HDR-CE", "Event_length",
                 "EVENT#"):
        assert not is_fluorescence_channel(name)
    for name in ("FL1-A", "CD3 FITC", "PE-Cy7-A", "Sytox", "FL1 INT LOG"):
        assert is_fluorescence_channel(name)


def test_fasinh_recipe_round_trips(tmp_path):
    # reference: Gating-ML 2.0 fasinh (T, M, A); the recipe keeps it as written and
    # make_transform builds it (one registry of kinds: core.transforms.TRANSFORM_KINDS)
    from core.transforms import TRANSFORM_KINDS, fasinh, make_transform

    spec = {"kind": "fasinh", "T": 262144.0, "M": 4.5, "A": 0.5}
    r = Recipe(channels=["FL1-A"], transforms={"FL1-A": spec})
    path = tmp_path / "fasinh.json"
    save_recipe(r, path)
    back = load_recipe(path)
    assert back.transforms["FL1-A"] == spec and back == r
    assert make_transform(back.transforms["FL1-A"]).forward(262144.0) == pytest.approx(1.0)  # T maps to 1
    assert make_transform(spec).forward(1000.0) == pytest.approx(fasinh(1000.0, 262144.0, 4.5, 0.5))
    assert set(TRANSFORM_KINDS) == {"linear", "log", "arcsinh", "logicle", "fasinh"}
    with pytest.raises(RecipeError, match="A"):
        Recipe.from_dict({"schema_version": 1, "channels": ["FL1-A"],
                          "transforms": {"FL1-A": {"kind": "fasinh", "T": 1e4, "M": 4.5, "A": 9.0}}})


def _spillover_is_well_formed(meta) -> bool:
    """reference: FCS 3.1 section 3.2.20 ($SPILLOVER): n, n names, n*n numbers; SPILL/$SPILL
    carry the same text in older files (common practice)."""
    for key in ("$SPILLOVER", "SPILL", "$SPILL"):
        if key in meta and str(meta[key]).strip():
            tokens = [t.strip() for t in str(meta[key]).strip().strip(",").split(",")]
            k = int(float(tokens[0]))
            return len(tokens) == 1 + k + k * k
    return False


def _readable_reference_files():
    out = []
    for path in _fcs_files():
        try:
            out.append(_event_file_from_fcsparser(path))
        except Exception:  # noqa: BLE001 - files fcsparser itself cannot read are not references
            continue
    return out


@pytest.fixture(scope="module")
def reference_files():
    files = _readable_reference_files()
    assert len(files) >= 8
    return files


def test_default_recipe_on_fcsparser_files(reference_files, tmp_path):
    from core.transforms import make_transform

    seen_file_comp = seen_none = 0
    for ef in reference_files:
        meta = ef.meta
        n = int(meta["$PAR"])
        pnn = [str(meta[f"$P{i}N"]).strip() for i in range(1, n + 1)]
        r = default_recipe(ef)
        # reference: $PnN as fcsparser reads them; kinds as stated name by name in
        # tests/test_channel_kinds.py; channels mostly on one pile are left out and named in notes
        expected = [c for c in pnn if EXPECTED_KINDS[c] == "fluorescence"]
        if len(set(pnn)) == len(pnn):
            left_out = [c for c in expected if c not in r.channels]
            assert [c for c in expected if c in r.channels] == r.channels, len(pnn)
            assert all(c in r.notes for c in left_out) and len(left_out) < len(expected)
        assert r.channels and set(r.channels) <= set(ef.channel_names)
        want = "file" if _spillover_is_well_formed(meta) else "none"
        assert r.compensation.to_dict() == {"source": want, "csv_path": None}, os.path.basename(ef.path)
        seen_file_comp += want == "file"
        seen_none += want == "none"
        assert set(r.transforms) == set(ef.channel_names)
        for spec in r.transforms.values():
            make_transform(spec)
        assert r.engine_arguments()["random_state"] == 0
        checked = validate_recipe(r, ef)
        assert checked == r
        path = tmp_path / (os.path.basename(ef.path) + ".json")
        save_recipe(r, path)
        assert load_recipe(path) == r
    assert seen_file_comp >= 2 and seen_none >= 2  # both branches exercised on real files


def test_default_recipe_synthetic():
    names = ["FSC-A", "SSC-H", "Time", "Event_count", "CD3 FITC", "PE-A"]
    plain = default_recipe(_synthetic_event_file(names))
    assert plain.channels == ["CD3 FITC", "PE-A"]
    assert plain.compensation.source == "none"
    assert plain.regions == () and plain.rare.to_dict() == {"rule": "share", "share": 0.005}
    # reference: FCS 3.1 $SPILLOVER text
    comp = default_recipe(_synthetic_event_file(names, {"$SPILLOVER": "2,CD3 FITC,PE-A,1,0.2,0.01,1"}))
    assert comp.compensation.source == "file"
    broken = default_recipe(_synthetic_event_file(names, {"$SPILLOVER": "2,CD3 FITC,PE-A,1,0.2"}))
    assert broken.compensation.source == "none" and "not used" in broken.notes
    scatter_only = default_recipe(_synthetic_event_file(["FSC-A", "SSC-A", "Time"]))
    assert scatter_only.channels == ["FSC-A", "SSC-A"]
    with pytest.raises(RecipeError, match="Time"):
        default_recipe(_synthetic_event_file(["Time"]))


def test_comparison_section_is_checked():
    base = {"schema_version": 1, "channels": ["A"]}
    r = Recipe.from_dict({**base, "comparison": {"rate": 0.01}})
    assert r.comparison.to_dict() == {"rate": 0.01, "min_fold": 2.0}
    # the smallest population (core.contrast_local) is stored only when not its default (30)
    r50 = Recipe.from_dict({**base, "comparison": {"smallest_population": 50}})
    assert r50.comparison.to_dict() == {"rate": 0.05, "min_fold": 2.0, "smallest_population": 50.0}
    assert recipe_digest(r50) != recipe_digest(Recipe.from_dict(base))
    for bad, words in [({"rate": 0}, "false discovery rate"), ({"rate": 1.5}, "false discovery rate"),
                       ({"smallest_population": 5}, "smallest_population"),
                       ({"min_fold": 0.5}, "min_fold"), ({"rate": "5 %"}, "must be a number"),
                       ({"alpha": 0.001}, "alpha"), ([], "comparison")]:
        with pytest.raises(RecipeError, match=words):
            Recipe.from_dict({**base, "comparison": bad})
