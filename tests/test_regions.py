"""Regions: geometry against hand-computed masks and an independent brute-force
point-in-polygon reference, nesting, combinations, bookkeeping and storage."""

from __future__ import annotations

import json
import math
from fractions import Fraction

import numpy as np
import pytest
import scipy.stats

from core.errors import RegionError
from core.regions import (IntervalRegion, PolygonRegion, RarityRegion, RectangleRegion, RegionSet,
                          points_in_polygon, region_from_dict)

ASINH = {"kind": "arcsinh", "cofactor": 150.0}
LIN = {"kind": "linear", "scale": 1.0, "offset": 0.0}


def rect(name, x, y, parent=None, chans=("A", "B"), spec=None):
    return {"name": name, "kind": "rectangle", "channels": list(chans), "x": list(x), "y": list(y),
            "parent": parent, "transforms": {c: spec for c in chans}}


def _even_odd_reference(px: float, py: float, verts) -> bool:
    """Brute force, exact arithmetic: count edge crossings of a ray cast from the point
    towards +y (the implementation casts towards +x, so the two are independent).

    reference: the even-odd (odd-crossing) rule as defined for 'fill-rule: evenodd'
    in W3C SVG 1.1 section 11.3 (from memory): inside iff a ray crosses the outline
    an odd number of times.
    """
    px, py = Fraction(px), Fraction(py)
    crossings = 0
    k = len(verts)
    for i in range(k):
        x1, y1 = map(Fraction, verts[i])
        x2, y2 = map(Fraction, verts[(i + 1) % k])
        if (x1 > px) == (x2 > px):
            continue
        y_at = y1 + (px - x1) * (y2 - y1) / (x2 - x1)
        if y_at > py:
            crossings += 1
    return crossings % 2 == 1


# ---------------------------------------------------------------------------
# geometry
# ---------------------------------------------------------------------------

def test_rectangle_half_open_bounds_and_nan_outside():
    rs = RegionSet.from_dict([rect("r", (1.0, 2.0), (10.0, 20.0))])
    a = np.array([1.0, 2.0, 1.5, 1.5, 1.5, 0.99, np.nan, 1.5])
    b = np.array([10.0, 15.0, 20.0, 19.999, 9.99, 15.0, 15.0, np.nan])
    # reference: Gating-ML 2.0 rectangle gate, min <= value < max in each dimension (from memory)
    expected = np.array([True, False, False, True, False, False, False, False])
    np.testing.assert_array_equal(rs.evaluate({"A": a, "B": b})["r"], expected)


def test_interval_open_ends_and_nan():
    rs = RegionSet([IntervalRegion(name="hi", channels=("A",), low=0.0, high=None, transforms={"A": None}),
                    IntervalRegion(name="lo", channels=("A",), low=None, high=0.0, transforms={"A": None})])
    a = np.array([-1.0, 0.0, 5.0, np.inf, -np.inf, np.nan])
    m = rs.evaluate({"A": a})
    # hand-computed: [0, inf) and (-inf, 0); NaN in neither
    np.testing.assert_array_equal(m["hi"], [False, True, True, True, False, False])
    np.testing.assert_array_equal(m["lo"], [True, False, False, False, True, False])


def test_polygon_unit_square_by_hand():
    sq = [(0, 0), (1, 0), (1, 1), (0, 1)]
    x = np.array([0.5, 1.5, 0.25, -0.1, np.nan, 0.5])
    y = np.array([0.5, 0.5, 0.75, 0.5, 0.5, np.nan])
    np.testing.assert_array_equal(points_in_polygon(x, y, np.array(sq, float)),
                                  [True, False, True, False, False, False])


def test_pentagram_centre_is_outside_under_even_odd():
    # Five-pointed star drawn as one self-crossing outline (vertex i -> i+2 of a pentagon).
    angles = np.pi / 2 + 2 * np.pi * np.arange(5) / 5
    pent = np.c_[np.cos(angles), np.sin(angles)]
    star = pent[[0, 2, 4, 1, 3]]
    tips = 0.9 * pent  # inside the star's points, crossed once
    centre = np.zeros((1, 2))  # inside the inner pentagon, crossed twice
    pts = np.vstack([centre, tips])
    got = points_in_polygon(pts[:, 0], pts[:, 1], star)
    # reference: even-odd rule (W3C SVG 1.1 'fill-rule: evenodd', from memory): the
    # inner pentagon of a pentagram is outside, the five points are inside
    np.testing.assert_array_equal(got, [False, True, True, True, True, True])
    ref = [_even_odd_reference(px, py, star.tolist()) for px, py in pts]
    np.testing.assert_array_equal(got, ref)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_polygon_matches_brute_force_reference(seed):
    rng = np.random.default_rng(seed)
    verts = rng.uniform(-1, 1, size=(9, 2))  # random outline: generally self-crossing
    pts = rng.uniform(-1.2, 1.2, size=(1500, 2))
    rs = RegionSet([PolygonRegion(name="p", channels=("A", "B"), vertices=verts.tolist(),
                                  transforms={"A": ASINH, "B": ASINH})])
    got = rs.evaluate({"A": pts[:, 0], "B": pts[:, 1]})["p"]
    ref = np.array([_even_odd_reference(px, py, verts.tolist()) for px, py in pts])
    np.testing.assert_array_equal(got, ref)
    assert 0 < got.sum() < len(got)  # the check is not vacuous


# ---------------------------------------------------------------------------
# rarity, combinations, nesting, statistics
# ---------------------------------------------------------------------------

def test_rarity_region_selects_rarest_share():
    rng = np.random.default_rng(5)
    log_density = rng.normal(size=2000)
    log_density[:7] = np.nan  # removed events
    ok = np.isfinite(log_density)
    # reference: scipy.stats.rankdata (method "min"): share of kept events strictly below
    ranks = scipy.stats.rankdata(log_density[ok], method="min")
    rarity = np.full(log_density.shape, np.nan)
    rarity[ok] = 100.0 * (ranks - 1) / ok.sum()
    rs = RegionSet([RarityRegion(name="rare", percentile=2.5)])
    m = rs.evaluate({}, rarity)["rare"]
    assert not m[:7].any()
    # the rarest 2.5 %: events whose rank-1 <= 0.025 * n_kept (inclusive boundary)
    assert m.sum() == int(np.floor(0.025 * ok.sum())) + 1
    assert np.nanmax(log_density[m]) < np.nanmin(log_density[ok & ~m])


def test_rarity_region_without_density_is_an_error():
    rs = RegionSet([RarityRegion(name="rare", percentile=1.0)])
    with pytest.raises(RegionError, match="no density"):
        rs.evaluate({"A": np.zeros(3)}, None)


def test_combinations_nesting_and_statistics_by_hand():
    a = np.array([0.5, 1.5, 0.5, 1.5, 0.5, 2.5, 0.5, 0.5, 1.5, 1.5])
    b = np.array([0.5, 0.5, 1.5, 1.5, 0.5, 0.5, 0.5, 2.5, 0.5, 0.5])
    rarity = np.array([0.0, 10, 20, 30, 40, 50, 60, 70, 80, np.nan])
    rs = RegionSet.from_dict([
        rect("all", (0, 2), (0, 2)),
        rect("left", (0, 1), (0, 2), parent="all"),
        {"name": "rare", "kind": "rarity", "percentile": 45.0, "parent": "all"},
        {"name": "left_rare", "kind": "and", "operands": ["left", "rare"]},
        {"name": "left_or_rare", "kind": "or", "operands": ["left", "rare"], "parent": "all"},
        {"name": "not_left", "kind": "not", "operands": ["left"], "parent": "all"},
    ])
    m = rs.evaluate({"A": a, "B": b}, rarity)
    # hand-computed masks
    all_ = np.array([1, 1, 1, 1, 1, 0, 1, 0, 1, 1], bool)
    left = np.array([1, 0, 1, 0, 1, 0, 1, 0, 0, 0], bool)
    rare = np.array([1, 1, 1, 1, 1, 0, 0, 0, 0, 0], bool)
    np.testing.assert_array_equal(m["all"], all_)
    np.testing.assert_array_equal(m["left"], left)
    np.testing.assert_array_equal(m["rare"], rare)
    np.testing.assert_array_equal(m["left_rare"], left & rare)
    np.testing.assert_array_equal(m["left_or_rare"], left | rare)
    np.testing.assert_array_equal(m["not_left"], all_ & ~left)
    stats = {row.name: row for row in rs.statistics({"A": a, "B": b}, rarity)}
    assert [r.name for r in rs.statistics({"A": a, "B": b}, rarity)] == rs.names
    assert stats["all"].count == 8 and stats["all"].percent_of_parent == pytest.approx(80.0)
    assert stats["left"].count == 4
    assert stats["left"].percent_of_parent == pytest.approx(50.0)   # 4 of the 8 in "all"
    assert stats["left"].percent_of_all == pytest.approx(40.0)      # 4 of 10 events
    assert stats["left_rare"].count == 3 and stats["left_rare"].percent_of_parent == pytest.approx(30.0)
    assert stats["not_left"].count == 4 and stats["not_left"].percent_of_parent == pytest.approx(50.0)


def test_empty_parent_gives_nan_percentage():
    rs = RegionSet.from_dict([rect("none", (5, 6), (5, 6)), rect("child", (0, 1), (0, 1), parent="none")])
    rows = rs.statistics({"A": np.zeros(4), "B": np.zeros(4)})
    child = [r for r in rows if r.name == "child"][0]
    assert child.count == 0 and math.isnan(child.percent_of_parent) and child.percent_of_all == 0.0


# ---------------------------------------------------------------------------
# bookkeeping
# ---------------------------------------------------------------------------

def test_rename_updates_references_and_masks_unchanged():
    items = [rect("a", (0, 1), (0, 1)), rect("b", (0, 0.5), (0, 1), parent="a"),
             {"name": "c", "kind": "not", "operands": ["a"]}]
    rs = RegionSet.from_dict(items)
    v = {"A": np.linspace(-0.5, 1.5, 21), "B": np.full(21, 0.5)}
    before = rs.evaluate(v)
    rs.rename("a", "gate one")
    assert rs.names == ["gate one", "b", "c"]
    assert rs["b"].parent == "gate one" and rs["c"].operands == ("gate one",)
    after = rs.evaluate(v)
    for old, new in (("a", "gate one"), ("b", "b"), ("c", "c")):
        np.testing.assert_array_equal(before[old], after[new])
    with pytest.raises(RegionError, match="exists already"):
        rs.rename("b", "c")


def test_remove_refused_while_referenced_and_add_checks_references():
    rs = RegionSet.from_dict([rect("a", (0, 1), (0, 1)), rect("b", (0, 1), (0, 1), parent="a")])
    with pytest.raises(RegionError, match="used by 'b'"):
        rs.remove("a")
    rs.remove("b")
    rs.remove("a")
    assert len(rs) == 0
    with pytest.raises(RegionError, match="unknown region"):
        rs.add({"name": "x", "kind": "or", "operands": ["p", "q"]})
    assert len(rs) == 0  # a refused change leaves the set as it was
    rs.add(rect("a", (0, 1), (0, 1)))
    with pytest.raises(RegionError, match="exists already"):
        rs.add(rect("a", (0, 2), (0, 2)))


def test_cycles_are_detected():
    with pytest.raises(RegionError, match="circle"):
        RegionSet.from_dict([{"name": "x", "kind": "not", "operands": ["y"]},
                             {"name": "y", "kind": "and", "operands": ["x", "z"]},
                             rect("z", (0, 1), (0, 1))])
    with pytest.raises(RegionError, match="circle"):
        RegionSet.from_dict([rect("p", (0, 1), (0, 1), parent="q"), rect("q", (0, 1), (0, 1), parent="p")])


@pytest.mark.parametrize("bad, message", [
    ({"name": "r", "kind": "circle"}, "unknown kind"),
    ({**rect("r", (1, 0), (0, 1))}, "must be below"),
    ({**rect("r", (0, 1), (0, 1)), "colour": "red"}, "unknown key"),
    ({"name": "r", "kind": "rectangle", "channels": ["A", "B"], "x": [0, 1], "y": [0, 1]}, "not recorded"),
    ({"name": "p", "kind": "polygon", "channels": ["A", "B"], "vertices": [[0, 0], [1, 1], [2, 2]],
      "transforms": {"A": None, "B": None}}, "on a line"),
    ({"name": "p", "kind": "polygon", "channels": ["A", "B"], "vertices": [[0, 0], [1, 1]],
      "transforms": {"A": None, "B": None}}, "at least 3"),
    ({"name": "q", "kind": "rarity", "percentile": 120}, "between 0 and 100"),
    ({"name": "n", "kind": "not", "operands": ["a", "b"]}, "exactly one"),
    ({"name": "", "kind": "rarity", "percentile": 1}, "non-empty"),
    ({"name": "i", "kind": "interval", "channels": ["A"], "low": None, "high": None,
      "transforms": {"A": None}}, "low or a high"),
])
def test_invalid_definitions(bad, message):
    with pytest.raises(RegionError, match=message):
        region_from_dict(bad)


def test_missing_channel_named_in_error():
    rs = RegionSet.from_dict([rect("r", (0, 1), (0, 1), chans=("FL1-A", "FL9-A"))])
    with pytest.raises(RegionError, match="FL9-A"):
        rs.evaluate({"FL1-A": np.zeros(3), "FL2-A": np.zeros(3)})


# ---------------------------------------------------------------------------
# storage and transforms
# ---------------------------------------------------------------------------

def test_json_round_trip_preserves_definitions_and_masks():
    items = [rect("a", (0, 1), (-1, 1), spec=ASINH),
             {"name": "p", "kind": "polygon", "channels": ["B", "A"], "parent": "a",
              "vertices": [[0, 0], [1, 0], [0.5, 0.9]], "transforms": {"A": ASINH, "B": ASINH}},
             {"name": "i", "kind": "interval", "channels": ["A"], "low": 0.25, "high": None,
              "transforms": {"A": ASINH}},
             {"name": "r", "kind": "rarity", "percentile": 5.0},
             {"name": "c", "kind": "or", "operands": ["p", "r"]}]
    rs = RegionSet.from_dict(items)
    back = RegionSet.from_dict(json.loads(json.dumps(rs.to_dict(), allow_nan=False)))
    assert back.to_dict() == rs.to_dict()
    rng = np.random.default_rng(1)
    v = {"A": rng.uniform(-1, 2, 500), "B": rng.uniform(-1, 2, 500)}
    rarity = rng.uniform(0, 100, 500)
    m1, m2 = rs.evaluate(v, rarity), back.evaluate(v, rarity)
    for k in m1:
        np.testing.assert_array_equal(m1[k], m2[k])


def test_check_transforms():
    rs = RegionSet.from_dict([rect("a", (0, 1), (0, 1), spec=ASINH),
                              {"name": "i", "kind": "interval", "channels": ["C"], "low": 0, "high": 1,
                               "transforms": {"C": None}}])
    rs.check_transforms({"A": {"kind": "arcsinh", "cofactor": 150}, "B": ASINH})  # 150 == 150.0
    with pytest.raises(RegionError, match="'a'.*'B'"):
        rs.check_transforms({"A": ASINH, "B": {"kind": "arcsinh", "cofactor": 5.0}})
    with pytest.raises(RegionError, match="'i'"):
        rs.check_transforms({"A": ASINH, "B": ASINH, "C": LIN})


def test_replace_keeps_references_and_refuses_new_cycles():
    rs = RegionSet.from_dict([rect("a", (0, 1), (0, 1)), {"name": "n", "kind": "not", "operands": ["a"]}])
    v = {"A": np.array([0.5, 1.5]), "B": np.array([0.5, 0.5])}
    np.testing.assert_array_equal(rs.evaluate(v)["n"], [False, True])
    rs.replace(rect("a", (0, 2), (0, 1)))  # e.g. the rectangle was dragged wider
    np.testing.assert_array_equal(rs.evaluate(v)["n"], [False, False])
    with pytest.raises(RegionError, match="circle"):
        rs.replace(rect("a", (0, 2), (0, 1), parent="n"))
    assert rs["a"].parent is None  # the refused change left the set as it was
    with pytest.raises(RegionError, match="no region named"):
        rs.replace(rect("zz", (0, 1), (0, 1)))


def test_enriched_region_takes_the_contrast_mask():
    from core.regions import EnrichedRegion

    enriched = np.array([True, False, True, False])
    rs = RegionSet.from_dict([{"name": "new", "kind": "enriched", "control": "ctrl.fcs"},
                              {"name": "not new", "kind": "not", "operands": ["new"]}])
    assert isinstance(rs["new"], EnrichedRegion)
    assert rs.depending_on("enriched") == ["new", "not new"] and rs.depending_on("rarity") == []
    masks = rs.evaluate({}, None, 4, enriched=enriched)
    np.testing.assert_array_equal(masks["new"], enriched)
    np.testing.assert_array_equal(masks["not new"], ~enriched)
    # stored form round-trips
    assert RegionSet.from_dict(rs.to_dict()).to_dict() == rs.to_dict()
    assert rs.to_dict()[0] == {"name": "new", "kind": "enriched", "parent": None, "control": "ctrl.fcs"}
    with pytest.raises(RegionError, match="control"):
        rs.evaluate({}, None, 4)
    with pytest.raises(RegionError, match="3 enriched flags for 4 events"):
        rs.evaluate({}, None, 4, enriched=enriched[:3])
    with pytest.raises(RegionError, match="unknown key"):
        RegionSet.from_dict([{"name": "x", "kind": "enriched", "rate": 0.05}])
