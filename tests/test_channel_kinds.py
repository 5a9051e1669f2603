"""core.channel_kinds: the kind of every channel name in every file fcsparser ships and in
our demo files, stated here one by one, and the modules that must follow it."""

import glob
import os
import warnings

import fcsparser
import numpy as np
import pytest

from core.channel_kinds import FLUORESCENCE, OTHER, SCATTER, TIME, channel_kind, scatter_direction

FCSPARSER_DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# Expected kind of every $PnN in fcsparser 0.2.8's tests/data and in sample_events/
# (common practice: FSC/SSC/FS/SS scatter, Time clock, HDR-T the time channel of instruments
# that prefix internal channels with HDR-, other HDR-* and DOUBLET instrument-internal values,
# everything else a fluorescence detector).
EXPECTED = {
    # scatter
    "FSC": SCATTER, "SSC": SCATTER, "FSC-A": SCATTER, "FSC-H": SCATTER, "FSC-W": SCATTER,
    "SSC-A": SCATTER, "SSC-H": SCATTER, "SSC-W": SCATTER, "FSC-HLin": SCATTER, "FSC-HLog": SCATTER,
    "FS INT LIN": SCATTER, "SS INT LIN": SCATTER,
    # time
    "Time": TIME, "TIME": TIME, "HDR-T": TIME,
    # other (not a detector's signal)
    "HDR-CE": OTHER, "HDR-SE": OTHER, "HDR-V": OTHER, "DOUBLET": OTHER,
    # fluorescence
    **{n: FLUORESCENCE for n in (
        "APC-A", "APC-Cy7-A", "Alexa700-A", "AmCyan-A", "FITC-A", "PE-A", "PE-Cy7-A", "PE-Texas Red-A",
        "PE-TxRed YG-A", "PacificBlue-A", "PerCP-A", "PerCP-Cy5-5-A",
        "B1-A", "B1-H", "B1-W", "V2-A", "V2-H", "V2-W", "Y2-A", "Y2-H", "Y2-W",
        "FL1", "FL2", "FL3", "FL4", "FL5", "FL6", "FL4 red", "FL5 red",
        "FL1-H", "FL2-A", "FL2-H", "FL2-W", "FL3-H", "FL4-A", "FL4-H", "FL4-W", "FL7-A", "FL7-H", "FL7-W",
        "FL1 INT LOG", "FL2 INT LOG", "FL3 INT LOG", "FL4 INT LOG", "FL5 INT LOG",
        "RED-HLin", "RED-HLog", "RED-W", "YEL-HLin", "YEL-HLog", "YEL-W",
        *(f"B{i}-A" for i in range(2, 15)), *(f"R{i}-A" for i in range(1, 9)),
        # our demo files
        *(f"FL{i}-A" for i in (1, 3, 5, 6, 8, 9, 10)))},
}


def _all_channels():
    """(file, $PnN, $PnS) for every channel of every file fcsparser can parse (TEXT only)."""
    out = []
    for path in sorted(glob.glob(os.path.join(FCSPARSER_DATA, "**", "*"), recursive=True)) + \
            sorted(glob.glob(os.path.join(ROOT, "sample_events", "*.fcs"))):
        if os.path.isdir(path):
            continue
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                # reference: fcsparser reads the TEXT segment
                meta = fcsparser.parse(path, meta_data_only=True, reformat_meta=False, encoding="latin-1")
        except Exception:  # noqa: BLE001 - files broken on purpose (not FCS at all)
            continue
        for i in range(1, int(meta["$PAR"]) + 1):
            out.append((path, str(meta.get(f"$P{i}N", "")).strip(), str(meta.get(f"$P{i}S", "")).strip()))
    return out


def test_every_channel_name_has_its_stated_kind():
    channels = _all_channels()
    assert len({p for p, _, _ in channels}) >= 17  # 13+ fcsparser files and our 4 demo tubes
    for path, name, label in channels:
        assert name in EXPECTED, f"{os.path.basename(path)}: {name!r} has no stated kind here"
        assert channel_kind(name, label) == EXPECTED[name], (os.path.basename(path), name, label)
    # every stated name occurs in some file (the table states what the files hold)
    assert set(EXPECTED) == {n for _, n, _ in channels}


def test_rules_on_made_up_names():
    # common practice: names decide; a label "Time" marks the clock too
    assert channel_kind("FS-A") == SCATTER and channel_kind("SS-H") == SCATTER   # not fluorescence
    assert channel_kind("HDR-T") == TIME                                          # not scatter/fluor
    assert channel_kind("P13", "Time") == TIME
    assert channel_kind("Event_length") == OTHER and channel_kind("EVENT#") == OTHER
    assert channel_kind("FSCALE-A") == FLUORESCENCE       # letters after FS: not scatter
    assert channel_kind("Timer-A") == FLUORESCENCE and channel_kind("Time-1") == TIME
    assert channel_kind("SSC-B-A") == SCATTER and scatter_direction("SSC-B-A") == "side"
    assert scatter_direction("FS INT LIN") == "forward" and scatter_direction("FL1-A") is None


def test_recipe_transforms_and_tube_follow_the_kinds():
    from core.recipe import default_recipe
    from core.transforms import default_transform_spec
    from desktop.tube import default_pairs

    names = ["FS-A", "SS-H", "HDR-T", "HDR-V", "FL1 INT LOG", "CD3 FITC"]
    for name in names:
        spec = default_transform_spec(name, np.linspace(-10, 1000, 50), 1024.0)
        # fluorescence logicle, every other kind linear (the one rule of core.channel_kinds)
        assert (spec["kind"] == "logicle") == (channel_kind(name) == FLUORESCENCE), name

    class File:
        path = "made-up.fcs"
        channel_names = names
        channel_labels = [""] * len(names)
        channel_ranges = np.full(len(names), 1024.0)
        data = np.random.default_rng(0).uniform(0, 1000, (200, len(names)))
        keywords = {}

    r = default_recipe(File())
    assert r.channels == ["FL1 INT LOG", "CD3 FITC"]
    assert default_pairs(names, r.channels)[0] == (0, 1)   # forward against side scatter first


def test_one_pulse_measure_per_detector():
    # reference: fcsparser's FCS 2.0 float file of 10,000 events x 16 channels: its widths are
    # computed from area and height (W = A / (H x 0.002) to 1e-12 on every event with positive
    # values), so a density over A, H and W of one detector lies on a surface
    from core.channel_kinds import one_measure_per_detector, pulse_measure
    from core.fcs import read_fcs
    from tests.bundled_files import pick

    ef = read_fcs(pick(version="FCS2.0", datatype="F"))
    d = {n: ef.data[:, j] for j, n in enumerate(ef.channel_names)}
    a, h, w = d["Y2-A"], d["Y2-H"], d["Y2-W"]
    ok = (a > 0) & (h > 0) & (w > 0)
    assert ok.sum() > 5000
    np.testing.assert_allclose(w[ok], a[ok] / (h[ok] * 0.002), rtol=1e-3)
    assert pulse_measure("FL2-W") == ("FL2", "W") and pulse_measure("FL1") == ("FL1", "")
    assert one_measure_per_detector(["V2-A", "V2-H", "V2-W", "Y2-H", "Y2-W", "FL1", "B1-W"]) == \
        ["V2-A", "Y2-H", "FL1", "B1-W"]
