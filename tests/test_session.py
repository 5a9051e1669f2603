"""The Qt-free session (core.session) and the one FCS-file rule (core.files),
tested without importing Qt."""

from __future__ import annotations

import os

import numpy as np
import pytest

from core.fcs import write_fcs

CHANNELS = ["FSC-A", "SSC-A", "FL1-A", "FL2-A"]


def make_fcs(path, n=800, seed=0):
    rng = np.random.default_rng(seed)
    data = np.column_stack([rng.normal(60000, 9000, n), rng.normal(30000, 5000, n),
                            rng.lognormal(6, 0.6, n), rng.lognormal(7, 0.5, n)])
    write_fcs(path, data, CHANNELS, channel_labels=["", "", "CD3", "CD4"], channel_ranges=[262144] * 4)
    return str(path)


def test_fcs_file_rule_is_shared_by_batch(tmp_path):
    from core.batch import list_fcs_files as batch_list
    from core.files import expand_paths, list_fcs_files

    for name in ("b.fcs", "A.FCS", "c.lmd", "notes.txt", "d.csv"):
        (tmp_path / name).write_bytes(b"x")
    (tmp_path / "sub.fcs").mkdir()  # a folder named like a file is not a file
    expected = [str(tmp_path / n) for n in ("A.FCS", "b.fcs", "c.lmd")]
    assert list_fcs_files(tmp_path) == expected == batch_list(str(tmp_path))
    # a named file is kept whatever its extension (the reader decides); duplicates once
    assert expand_paths([tmp_path, tmp_path / "b.fcs", tmp_path / "d.csv"]) == expected + [str(tmp_path / "d.csv")]


def test_switching_tubes_keeps_each_tubes_state(tmp_path):
    from types import SimpleNamespace

    from core.rare import rare_by_share, rarity_percentile
    from core.session import Session

    a, b = make_fcs(tmp_path / "a.fcs", 800, 1), make_fcs(tmp_path / "b.fcs", 1200, 2)
    s = Session()
    opened, problems = s.open([tmp_path])
    assert opened == [a, b] and not problems and s.current.path == a
    ta = s.current
    ld = np.random.default_rng(0).normal(size=800)
    ta.analysis = SimpleNamespace(log_density=ld, rarity=rarity_percentile(ld), enriched=ld > 1.5)
    ta.highlight_enriched = True
    s.set_share(0.05)
    # reference: core.rare.rare_by_share computes the same mask from scratch
    np.testing.assert_array_equal(ta.rare_mask, rare_by_share(ld, 0.05).mask)
    tb = s.switch(b)
    assert s.current is tb and tb.highlight() is None and tb.rare_mask is None
    assert s.switch(a).highlight() is ta.analysis.enriched  # A keeps its own highlight


def test_closing_a_tube_names_the_one_to_show_next(tmp_path):
    from core.session import Session

    paths = [make_fcs(tmp_path / f"{c}.fcs", 400, k) for k, c in enumerate("abc")]
    s = Session()
    s.open([tmp_path])
    s.switch(paths[1])
    assert s.close(paths[0]) is None and s.current.path == paths[1]   # not current: nothing to show instead
    assert s.close(paths[1]).path == paths[2] and s.current is None  # the one opened after it
    s.switch(paths[2])
    assert s.close(paths[2]) is None and s.tubes == {} and s.current is None
    s.open(paths)
    s.switch(paths[2])
    assert s.close(paths[2]).path == paths[1]                         # the last: the one before it


def test_rescale_region_goes_through_instrument_units():
    from core.regions import region_from_dict
    from core.session import rescale_region
    from core.transforms import make_transform

    old = {"kind": "arcsinh", "cofactor": 150.0}
    new = {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0}
    r = region_from_dict({"name": "b", "kind": "interval", "channels": ["FL1-A"], "low": 1.0, "high": 4.0,
                          "transforms": {"FL1-A": old}})
    moved = rescale_region(r, {"FL1-A": old}, {"FL1-A": new})
    # reference: numpy's arcsinh inverse (sinh) then the logicle forward map
    raw = 150.0 * np.sinh([1.0, 4.0])
    np.testing.assert_allclose([moved.low, moved.high], make_transform(new).forward(raw), rtol=1e-9)
    assert moved.transforms["FL1-A"] == new


def test_region_names_dependencies_and_nesting(tmp_path):
    from core.session import Session, region_closure

    s = Session()
    s.open([make_fcs(tmp_path / "a.fcs")])
    t = s.current
    d = s.drawn_region("rectangle", "FL1-A", "FL2-A", [(0.1, 0.1), (0.6, 0.7)])
    assert d["name"] == "CD3 x CD4 box"  # named from the channels' labels
    s.add_region(d)
    band = s.drawn_region("interval", "FL1-A", "FL2-A", [(0.2, 0.0), (0.5, 1.0)], parent="CD3 x CD4 box")
    assert band["name"] == "CD3 band" and band["low"] == 0.2 and band["high"] == 0.5
    s.add_region(band)
    s.combine_regions("not", ["CD3 band"])
    assert region_closure(t.regions, "not CD3 band") == {"not CD3 band", "CD3 band", "CD3 x CD4 box"}
    # nested: the band counts only inside the box (reference: numpy on the values)
    v1, v2 = t.values[:, 2], t.values[:, 3]
    box = (v1 >= 0.1) & (v1 < 0.6) & (v2 >= 0.1) & (v2 < 0.7)
    assert t.count("CD3 band") == int(np.count_nonzero(box & (v1 >= 0.2) & (v1 < 0.5)))
    s.set_parent("CD3 band", None)
    assert t.count("CD3 band") == int(np.count_nonzero((v1 >= 0.2) & (v1 < 0.5)))


def test_pairs_by_label_or_name_and_discarded_fit_says_why(tmp_path):
    from types import SimpleNamespace

    from core.errors import ChannelError
    from core.session import Session

    s = Session()
    s.open([make_fcs(tmp_path / "a.fcs")])
    t = s.current
    assert s.set_pairs([("CD3", "FL2-A"), ("FSC-A", "CD4")]) == [(2, 3), (0, 3)]
    with pytest.raises(ChannelError):
        s.set_pairs([("CD99", "CD4")])
    t.analysis = SimpleNamespace(log_density=np.zeros(t.n_events), rarity=np.zeros(t.n_events), enriched=None)
    specs = dict(t.recipe.transforms)
    specs["FL1-A"] = {"kind": "arcsinh", "cofactor": 150.0}
    reason = s.set_scales(specs, t.recipe.channels)
    assert t.analysis is None and "CD3" in reason and "discarded" in reason and t.fit_note == reason


def test_spillover_csv_written_beside_its_reader(tmp_path):
    from core.compensation import SpilloverMatrix, read_spillover_csv, write_spillover_csv

    S = SpilloverMatrix(["FL1-A", "FL2-A"], np.array([[1.0, 0.1234567890123], [0.05, 1.0]]))
    path = write_spillover_csv(tmp_path / "m.csv", S)
    back = read_spillover_csv(path)
    assert list(back.detectors) == ["FL1-A", "FL2-A"]
    np.testing.assert_array_equal(back.matrix, S.matrix)  # repr floats round-trip exactly
    with pytest.raises(Exception):
        write_spillover_csv(tmp_path / "m.csv", S)  # never replaced without being asked
    assert os.path.exists(path)


def test_apply_scale_to_all_fluorescence_channels(tmp_path):
    from core.session import Session
    from core.transforms import make_transform

    s = Session()
    s.open([make_fcs(tmp_path / "a.fcs")])
    t = s.current
    spec = {"kind": "arcsinh", "cofactor": 150.0}
    specs = dict(t.recipe.transforms)
    specs["FL1-A"] = spec
    s.set_scales(specs, t.recipe.channels)
    scatter = {c: t.recipe.transforms[c] for c in ("FSC-A", "SSC-A")}
    s.apply_scale_to_all("FL1-A")
    assert t.recipe.transforms["FL2-A"] == spec and t.recipe.transforms["FL1-A"] == spec
    assert {c: t.recipe.transforms[c] for c in ("FSC-A", "SSC-A")} == scatter  # scatter keeps its scale
    # reference: numpy's arcsinh of the compensated values over the cofactor
    np.testing.assert_allclose(t.values[:, 3], np.arcsinh(t.compensated("FL2-A") / 150.0), rtol=1e-12)
    assert make_transform(spec).kind == "arcsinh"
    # reference: fcsparser reads the file's own values (no spillover here, so compensated == stored)
    import fcsparser

    _, df = fcsparser.parse(t.path, reformat_meta=True, channel_naming="$PnN")
    np.testing.assert_allclose(t.compensated("FL2-A"), df["FL2-A"].to_numpy(np.float64), rtol=1e-9)


def test_tube_holds_one_copy_of_the_events(tmp_path):
    """Scale previews read values back through the inverse transform (no second
    events x channels matrix); a log scale, which loses negative values, falls
    back to compensating again and keeps only that channel; a finished fit uses
    the tube's values instead of its own equal copy."""
    import fcsparser

    from core.session import Session, share_values

    rng = np.random.default_rng(3)
    n = 600
    data = np.column_stack([rng.normal(60000, 9000, n), rng.normal(30000, 5000, n),
                            rng.normal(200, 400, n), rng.lognormal(7, 0.5, n)])  # FL1-A has negative values
    path = str(tmp_path / "neg.fcs")
    write_fcs(path, data, CHANNELS, channel_ranges=[262144] * 4)
    _, df = fcsparser.parse(path, reformat_meta=True, channel_naming="$PnN")  # reference reader
    s = Session()
    s.open([path])
    t = s.current
    specs = dict(t.recipe.transforms)
    specs["FL1-A"] = {"kind": "log"}
    s.set_scales(specs, t.recipe.channels)
    assert (t.values[:, 2] == 0).sum() == (df["FL1-A"].to_numpy() < 1).sum()  # raised to the floor (core.transforms)
    np.testing.assert_allclose(t.compensated("FL1-A"), df["FL1-A"].to_numpy(np.float64), rtol=1e-9)
    np.testing.assert_allclose(t.compensated("FL2-A"), df["FL2-A"].to_numpy(np.float64), rtol=1e-9)
    held = [v for v in vars(t).values() if isinstance(v, np.ndarray) and v.ndim == 2]
    assert len(held) == 1 and held[0] is t.values  # the fallback kept one column, not a matrix

    class Fitted:  # what a fit hands back: its own, equal, values
        values = t.values.copy()

    a = Fitted()
    assert share_values(t, a) and a.values is t.values
    b = Fitted()
    b.values = t.values + 1.0  # other numbers are never replaced
    assert not share_values(t, b) and b.values is not t.values
