"""Tests of core.prepare: saturation, non-finite events, de-quantisation,
on synthetic channels and on the real files fcsparser ships (read in place)."""

import os
import warnings

import fcsparser
import numpy as np
import pytest
from scipy import stats

import core.cleaning as cleaning
from core.errors import EventDataError
from core.grids import plan_jitter
from core.prepare import (
    REASON_NON_FINITE,
    REASON_SATURATED,
    detect_step,
    dequantise,
    prepare_events,
)
from core.transforms import logicle
from tests.bundled_files import pick

# fcsparser's files chosen by what they are (tests/bundled_files.py)
FLOAT_83K = pick(datatype="F", events=lambda n: n > 50_000)           # FCS 3.0 float, 83,411 x 12
INT_LOG_30 = pick(version="FCS3.0", datatype="I", log_amplified=True)  # FCS 3.0 integer, $PnE 4,1


def _parse(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta, data = fcsparser.parse(path, reformat_meta=True, channel_naming="$PnN")
    ranges = np.array([float(r) for r in meta["_channels_"]["$PnR"]])
    return data.values.astype(np.float64), list(data.columns), ranges


def test_integer_channel_step_and_jitter():
    rng = np.random.default_rng(11)
    n = 20000
    integer = np.round(rng.normal(300, 40, n))                   # step 1
    scaled = np.round(rng.lognormal(6, 0.7, n)) * 0.54          # step 0.54 (integer times a gain)
    continuous = rng.normal(0, 1, n)
    raw = np.column_stack([integer, scaled, continuous])
    jittered, steps = dequantise(raw, random_state=5)
    assert steps[0] == pytest.approx(1.0, rel=1e-9)
    assert steps[1] == pytest.approx(0.54, rel=1e-6)
    assert steps[2] == 0.0
    # jitter stays within half a step, continuous channel untouched
    assert np.all(np.abs(jittered[:, :2] - raw[:, :2]) <= steps[:2] / 2 + 1e-12)
    np.testing.assert_array_equal(jittered[:, 2], continuous)
    # distinct values grow from a few hundred to (almost) one per event
    assert np.unique(raw[:, 0]).size < 400 and np.unique(jittered[:, 0]).size > 0.99 * n
    # the jitter within a cell is uniform  reference: scipy.stats.kstest against U(-1/2, 1/2)
    assert stats.kstest(jittered[:, 0] - raw[:, 0], stats.uniform(loc=-0.5, scale=1.0).cdf).pvalue > 1e-3
    # the input is not modified, and the same seed gives the same jitter
    assert np.unique(raw[:, 0]).size < 400
    again, _ = dequantise(raw, random_state=5)
    np.testing.assert_array_equal(again, jittered)
    other, _ = dequantise(raw, random_state=6)
    assert not np.array_equal(other, jittered)


def test_step_robust_to_a_few_irregular_gaps():
    rng = np.random.default_rng(2)
    v = np.round(rng.normal(500, 60, 30000)) * 2.0
    v[:5] = [101.3, 333.7, 612.9, 777.1, 901.5]   # a few values off the grid
    assert detect_step(v) == pytest.approx(2.0, rel=1e-6)
    # a continuous channel with ties added is still continuous
    c = rng.lognormal(3, 1, 5000)
    assert detect_step(np.concatenate([c, c[:100]])) == 0.0


def test_steps_on_real_files():
    # reference: fcsparser.parse of the FCS 3.0 float file of 83,411 events fcsparser ships;
    # its area channels hold integer multiples of a per-detector gain
    raw, names, ranges = _parse(FLOAT_83K)
    n = raw.shape[0]
    jittered, steps = dequantise(raw, random_state=0)
    fluor = [i for i, c in enumerate(names) if c.endswith("-A") and not c.startswith(("FSC", "SSC"))]
    assert len(fluor) == 8
    for j in fluor:
        s = steps[j]
        assert 0.5 < s < 2.0, (names[j], s)
        col = raw[:, j]
        k = (col - col.min()) / s
        # nearly every stored value lies on the detected grid (float32 storage rounding aside)
        assert np.mean(np.abs(k - np.rint(k)) < 0.05) > 0.99, names[j]
        assert np.all(np.abs(jittered[:, j] - col) <= s / 2 + 1e-9)
        assert np.unique(jittered[:, j]).size > 0.99 * n > np.unique(col).size
    # FSC-W is a computed width with almost no ties: left untouched
    w = names.index("FSC-W")
    assert steps[w] == 0.0
    np.testing.assert_array_equal(jittered[:, w], raw[:, w])
    # an integer-valued file (reference: fcsparser's FCS 3.0 integer file, stored values 0..1023)
    raw, names, ranges = _parse(INT_LOG_30)
    _, steps = dequantise(raw)
    assert np.allclose(steps, 1.0)


def test_reasons_cover_every_event():
    rng = np.random.default_rng(4)
    n = 1000
    raw = np.round(rng.uniform(0, 1000, size=(n, 3)))
    ranges = np.array([1024.0, 1024.0, 1024.0])
    raw[10, 1] = 1024.0          # at the range: saturated (value >= $PnR)
    raw[11, 2] = 5000.0          # beyond the range
    raw[12, 0] = 1023.0          # just below: kept
    raw[20, 0] = np.nan
    raw[21, 2] = np.inf
    raw[22, 1] = np.nan
    raw[22, 2] = 2000.0          # both: non-finite wins
    out = prepare_events(raw, ranges, random_state=1)
    assert out.reason.shape == (n,) and out.kept.shape == (n,)
    assert set(np.flatnonzero(out.reason == REASON_SATURATED)) == {10, 11}
    assert set(np.flatnonzero(out.reason == REASON_NON_FINITE)) == {20, 21, 22}
    assert np.array_equal(out.kept, out.reason == "")
    assert out.matrix.shape == (n - 5, 3) and out.matrix.dtype == np.float64
    assert out.counts == {"events": n, "kept": n - 5, "non-finite": 3, "saturated": 2, "floor pile": 0,
                          "ceiling pile": 0, "dropped": 5}
    assert list(out.saturated_per_channel) == [0, 1, 1]
    # kept rows are the de-quantised raw rows, in file order
    assert np.all(np.abs(out.matrix - raw[out.kept]) <= 0.5 + 1e-12)
    # saturated events may be kept on request, but are still counted
    keep = prepare_events(raw, ranges, drop_saturated=False, dequantise=False)
    assert keep.n_kept == n - 3 and keep.n_saturated == 2
    np.testing.assert_array_equal(keep.matrix, raw[keep.kept])
    # no ranges: no saturation test
    assert prepare_events(raw, None, dequantise=False).n_saturated == 0


def test_saturation_judged_on_raw_and_jitter_carried_through_pipeline():
    rng = np.random.default_rng(8)
    n = 5000
    raw = np.round(rng.normal(2000, 800, size=(n, 2)))
    raw[:7, 0] = 262144.0
    ranges = np.array([262144.0, 262144.0])

    def pipeline(x):
        return logicle(x, 262144.0, 0.5, 4.5, 0.0)

    out = prepare_events(None, ranges, raw_data=raw, pipeline=pipeline, random_state=3)
    assert out.n_saturated == 7 and np.all(out.reason[:7] == REASON_SATURATED)
    jittered, steps = dequantise(raw, random_state=3)
    # the density sees pipeline(jittered raw), not jitter added after the transform
    np.testing.assert_array_equal(out.matrix, pipeline(jittered)[out.kept])
    assert np.allclose(out.steps, 1.0)
    # transformed values with raw values but no pipeline: refused in plain words
    with pytest.raises(EventDataError, match="pipeline"):
        prepare_events(pipeline(raw), ranges, raw_data=raw)
    # ... unless de-quantisation is off; saturation is still judged on the raw values
    out2 = prepare_events(pipeline(jittered), ranges, raw_data=raw, dequantise=False)
    assert out2.n_saturated == 7
    np.testing.assert_array_equal(out2.matrix, pipeline(jittered)[out2.kept])


def test_shape_errors():
    with pytest.raises(EventDataError, match="2-D"):
        prepare_events(np.zeros(5))
    with pytest.raises(EventDataError, match="2 channel ranges"):
        prepare_events(np.zeros((5, 3)), [1.0, 2.0])


def test_pile_at_the_top_channel_counts_as_saturated():
    # FCS 3.1: integer channel values run 0 .. $PnR-1, so a clipping detector
    # piles its saturated events at $PnR-1, not at $PnR (common practice).
    rng = np.random.default_rng(12)
    n = 2000
    raw = np.round(rng.uniform(0, 900, size=(n, 2)))
    ranges = np.array([1024.0, 1024.0])
    raw[:6, 0] = 1023.0                       # a pile at the top channel value
    raw[6, 1] = 1023.0                        # one lone high event: kept
    out = prepare_events(raw, ranges, dequantise=False)
    assert set(np.flatnonzero(out.reason == REASON_SATURATED)) == set(range(6))
    assert list(out.saturated_per_channel) == [6, 0]
    # a pile well below the top of the range is a population, not saturation
    raw2 = raw.copy()
    raw2[:6, 0] = 800.0
    raw2[raw2[:, 0] > 800, 0] = 700.0
    assert prepare_events(raw2, ranges, dequantise=False).saturated_per_channel[0] == 0


# --------------------------------------------------------------------------- stored units, grids, piles

def test_jitter_width_follows_the_pne_formula():
    # reference: FCS 3.1 standard, section 3.2.20 ($PnE; section number from memory):
    # a log-amplified integer channel decodes as value = f2 * 10 ** (f1 * x / $PnR).
    # A stored value x stands for stored values in [x - 1/2, x + 1/2), so its jittered
    # value must lie in [f2 10^(f1 (x - 1/2) / R), f2 10^(f1 (x + 1/2) / R)).
    from core.fcs import ChannelDecoding

    dec = ChannelDecoding(integer=True, decades=4.0, offset=1.0, stored_range=1024.0)
    x = np.full(20000, 512.0)
    values = dec.decode(x)
    assert values[0] == pytest.approx(100.0, rel=1e-12)          # 10 ** (4 * 512 / 1024), by hand
    jittered, steps = dequantise(values[:, None], random_state=3, decoding=[dec])
    # explicit computation of the cell: 10 ** (4 * 511.5 / 1024) = 10 ** 1.998046875 ...
    lo, hi = 10.0 ** 1.998046875, 10.0 ** 2.001953125
    assert lo == pytest.approx(99.5512, rel=1e-5) and hi == pytest.approx(100.4507, rel=1e-5)
    assert steps[0] == 1.0 and jittered.min() >= lo and jittered.max() < hi
    # geometric width: uniform in log10 over the cell  reference: scipy.stats.kstest
    assert stats.kstest(np.log10(jittered[:, 0]), stats.uniform(loc=1.998046875, scale=0.00390625).cdf).pvalue > 1e-3
    # the cell is about 0.9 % of the value wide: a linear step of 1 on decoded values would be wrong here
    assert (hi - lo) / 100.0 == pytest.approx(10 ** (4 / 1024 / 2) - 10 ** (-4 / 1024 / 2), rel=1e-9)


def test_integer_log_file_jittered_in_stored_units():
    # reference: fcsparser's raw (undecoded) stored values of its FCS 3.0 integer file with $PnE 4,1
    from core.fcs import read_fcs

    ef = read_fcs(INT_LOG_30)
    raw, names, _ = _parse(INT_LOG_30)
    jittered, steps = dequantise(ef.data, random_state=0, decoding=ef.decoding)
    for j, dec in enumerate(ef.decoding):
        # the decoding record gives back fcsparser's stored values exactly
        np.testing.assert_array_equal(dec.encode(ef.data[:, j]), raw[:, j])
        if dec.log_amplified:
            x = np.log10(jittered[:, j] / dec.offset) * dec.stored_range / dec.decades
            assert np.all(np.abs(x - raw[:, j]) <= 0.5 + 1e-9), names[j]
            assert np.unique(jittered[:, j]).size > 0.99 * raw.shape[0]


def test_grid_detector_on_made_up_grids():
    from core.prepare import detect_grid

    rng = np.random.default_rng(21)
    n = 20000
    linear = (17.0 + 0.37 * np.round(rng.normal(400, 60, n))).astype(np.float32)   # stored as float32
    assert detect_grid(linear)[0] == "linear" and detect_grid(linear)[1] == pytest.approx(0.37, rel=1e-4)
    log = (3.0 * 10 ** (0.0125 * np.round(rng.normal(100, 30, n)))).astype(np.float32)
    kind, step = detect_grid(log)
    assert kind == "log" and step == pytest.approx(0.0125, rel=1e-4)     # decades per step
    assert detect_grid(rng.lognormal(3, 1, n)) == ("", 0.0)               # continuous
    # the jitter of a log grid is half a step of log10 either side
    jittered, _ = dequantise(log[:, None].astype(np.float64), random_state=1)
    ratio = np.log10(jittered[:, 0] / log.astype(np.float64))
    assert np.all(np.abs(ratio) <= 0.0125 / 2 + 1e-9) and np.abs(ratio).max() > 0.9 * 0.0125 / 2


def test_floor_and_ceiling_piles_set_aside_and_counted():
    from core.prepare import REASON_CEILING_PILE, REASON_FLOOR_PILE, pile_masks

    rng = np.random.default_rng(5)
    n = 10000
    raw = rng.normal(500.0, 100.0, size=(n, 2))
    raw[:150, 0] = raw[:, 0].min() - 1.0          # 1.5 % on the lowest value: floor pile
    raw[150:230, 1] = raw[:, 1].max() + 1.0       # 0.8 % on the highest value: ceiling pile
    raw[230:250, 1] = raw[:, 1].min() - 5.0       # 0.2 %: below the 0.5 % pile share, kept
    ranges = np.array([1e6, 1e6])                 # far above: not saturation
    out = prepare_events(raw, ranges, dequantise=False)
    assert set(np.flatnonzero(out.reason == REASON_FLOOR_PILE)) == set(range(150))
    assert set(np.flatnonzero(out.reason == REASON_CEILING_PILE)) == set(range(150, 230))
    assert out.counts["floor pile"] == 150 and out.counts["ceiling pile"] == 80 and out.n_kept == n - 230
    assert list(out.floor_per_channel) == [150, 0] and list(out.ceiling_per_channel) == [0, 80]
    fl, ce = pile_masks(raw[:, 1])
    assert not fl.any() and ce.sum() == 80
    # kept on request, spread across their bin: no value holds more than one event any more
    keep = prepare_events(raw, ranges, dequantise=False, drop_piles=False)
    assert keep.n_kept == n and np.unique(keep.matrix[:, 0]).size == n
    # the cell: centred on the pile value, as wide as the span to the 150th value above it
    v = raw[0, 0]
    width = np.sort(raw[150:, 0])[149] - v
    spread = keep.matrix[:150, 0]
    assert np.all(np.abs(spread - v) <= width / 2) and np.ptp(spread) > 0.9 * width
    # a saturated pile keeps its own reason
    sat = raw.copy()
    sat[150:230, 1] = 1e6
    assert np.all(prepare_events(sat, ranges, dequantise=False).reason[150:230] == REASON_SATURATED)


def test_density_input_reasons_flags_and_atoms():
    from core.analysis import density_input
    from core.fcs import ChannelDecoding, EventFile
    from core.prepare import ATOM_SHARE, CLEANING_FLAGS, atoms, largest_tie_share
    from core.recipe import Recipe

    rng = np.random.default_rng(9)
    n = 6000
    stored = np.clip(np.round(rng.normal(300, 80, size=(n, 2))), 0, 1023)
    stored[:100, 0] = 0                                   # floor pile in stored units
    dec = [ChannelDecoding(integer=True, decades=4.0, offset=1.0, stored_range=1024.0),
           ChannelDecoding(integer=True, stored_range=1024.0)]
    data = np.column_stack([dec[0].decode(stored[:, 0]), stored[:, 1]])
    data[100, 1] = np.nan
    ef = EventFile(path="made-up.fcs", data=data, channel_names=["FL1", "FL2"], channel_labels=["", ""],
                   channel_ranges=np.array([1e4, 1024.0]), keywords={}, version="FCS3.0", decoding=dec)
    recipe = Recipe(channels=["FL1", "FL2"], transforms={"FL1": {"kind": "log", "floor": 1.0}})
    prepared, values = density_input(ef, recipe)
    assert prepared.set_aside() == {"saturated": 0, "ceiling pile": 0, "floor pile": 100, "non-finite": 1}
    assert prepared.grids == ["stored", "stored"]
    # the density sees log10 of the jittered FL1, inside each stored cell (FCS 3.1 $PnE)
    k = prepared.kept
    x = prepared.matrix[:, 0] * 1024.0 / 4.0
    assert np.all(np.abs(x - stored[k, 0]) <= 0.5 + 1e-9)
    assert max(largest_tie_share(prepared.matrix[:, c]) for c in range(2)) <= ATOM_SHARE
    assert atoms(prepared.matrix, ["FL1", "FL2"]) == {}
    assert atoms(np.round(prepared.matrix), ["FL1", "FL2"])            # rounded back: atoms named
    # plots see the values without jitter
    np.testing.assert_array_equal(values[:, 0], np.log10(np.fmax(data[:, 0], 1.0)))
    # keeping piles keeps them, spread
    keep = Recipe(channels=["FL1", "FL2"], cleaning={"drop_saturated": True, "drop_piles": False,
                                                       "dequantise": True})
    assert density_input(ef, keep)[0].n_kept == n - 1
    assert CLEANING_FLAGS["floor pile"] == 3 and CLEANING_FLAGS["ceiling pile"] == 4


def test_bundled_files_leave_no_atom_after_the_default_recipe():
    # Done-when of the real-acquisitions work, on every file fcsparser ships with >= 5,000 events
    # (reference: fcsparser's files, read in place): no value of a density channel holds more
    # than 0.1 % of the kept events after the default recipe's cleaning.
    from core.analysis import density_input
    from core.fcs import read_fcs
    from core.prepare import ATOM_SHARE, largest_tie_share
    from core.recipe import default_recipe
    from tests.bundled_files import bundled

    checked = 0
    for f in bundled():
        if f["events"] < 5000 or f["size"] < 100_000:   # the 27-channel header-only file is truncated
            continue
        ef = read_fcs(f["path"])
        prepared, _ = density_input(ef, default_recipe(ef))
        assert prepared.n_kept > 0.5 * ef.n_events, (f["version"], f["events"])
        worst = max(largest_tie_share(prepared.matrix[:, c]) for c in range(prepared.matrix.shape[1]))
        assert worst <= ATOM_SHARE, (f["version"], f["datatype"], f["events"], worst)
        checked += 1
    assert checked >= 12


def test_one_pass_equals_the_pipeline_form_on_a_demo_tube():
    # Our demo tube A (float, whole units, compensated): density_input's one pass gives what the
    # pipeline form gives -- jitter the raw matrix, compensate, transform (numpy, by hand) -- with
    # the same per-channel draws, and sets aside exactly the generator's saturated events.
    from core.analysis import density_channel_indices, density_input
    from core.compensation import spillover_from_keywords
    from core.fcs import read_fcs
    from core.prepare import channel_uniforms
    from core.recipe import default_recipe
    from core.scenario import load_truth
    from core.transforms import make_transform

    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    path = os.path.join(root, "sample_events", "tube_A_control.fcs")
    ef = read_fcs(path)
    recipe = default_recipe(ef)
    prepared, values = density_input(ef, recipe)
    truth = load_truth(os.path.join(root, "sample_events"), "tube_A_control")
    idx = density_channel_indices(ef, recipe)
    S = spillover_from_keywords(ef.keywords)
    judged = sorted(set(idx) | {ef.channel_names.index(d) for d in S.detectors})
    # the generator's saturated events that are saturated in a judged channel (value >= $PnR)
    expected = truth["saturated"] & np.any(ef.data[:, judged] >= ef.channel_ranges[judged], axis=1)
    np.testing.assert_array_equal(prepared.reason == REASON_SATURATED, expected)
    assert prepared.set_aside()["floor pile"] == prepared.set_aside()["ceiling pile"] == 0
    raw = ef.data.astype(np.float64)          # the file holds float32; jitter is added in float64
    for j in set(idx) | {ef.channel_names.index(d) for d in S.detectors}:
        assert prepared.grids[j] == "linear" and prepared.steps[j] == pytest.approx(1.0, rel=1e-6)
        raw[:, j] += channel_uniforms(0, j, ef.n_events) * prepared.steps[j]
    det = [ef.channel_names.index(d) for d in S.detectors]
    raw[:, det] = raw[:, det] @ np.linalg.inv(S.matrix)          # reference: numpy.linalg
    by_hand = np.column_stack([make_transform(recipe.transforms[ef.channel_names[j]]).forward(raw[:, j])
                               for j in idx])[prepared.kept]
    np.testing.assert_allclose(prepared.matrix, by_hand, rtol=1e-9, atol=1e-12)


def test_analysis_counts_reasons_for_the_app_and_exports():
    # the app's fit line and the exports' cleaning flag read the reasons of every event
    from core.analysis import Analysis

    reason = np.array(["", "floor pile", "ceiling pile", "saturated", "non-finite", "", "floor pile"])
    n = reason.size
    an = Analysis(path="x.fcs", channel_names=["A"], values=np.zeros((n, 1)), density_channels=["A"],
                  prepared=None, model=None, log_density=np.where(reason == "", -1.0, np.nan),
                  rarity=np.where(reason == "", 50.0, np.nan), rare=np.zeros(n, bool), rare_level=0.0,
                  reason_code=reason, region_masks={}, heldout_loglik=0.0, timing={}, atoms={"A": 0.004})
    assert an.reason_code.dtype == np.int8 and list(an.reason) == list(reason)   # texts in, codes held
    assert an.set_aside == {"saturated": 1, "ceiling pile": 1, "floor pile": 2, "non-finite": 1}
    text = an.cleaning_text()
    assert text.startswith("2 of 7 events kept") and "2 floor pile" in text and "1 ceiling pile" in text
    assert "A (0.4 % of the kept events on one value)" in text
    np.testing.assert_array_equal(an.export_columns()["cleaning flag"], [0, 3, 4, 1, 2, 0, 3])
    # the per-event table (pandas) shows the reason as text, as before the codes
    assert an.table()["reason"].tolist() == list(reason)
    assert Analysis(**{**an.__dict__, "reason_code": an.reason_code}).set_aside == an.set_aside   # codes in


def test_reason_codes_round_trip_to_the_same_texts():
    # one table of code -> text; the codes are the exports' documented cleaning flags
    # (0 kept, 1 saturated, 2 non-finite, 3 floor pile, 4 ceiling pile: core/batch/reports.py's notes)
    from core.prepare import CLEANING_FLAGS, REASON_TEXTS, REASONS, reason_codes, reason_counts, reason_texts

    assert CLEANING_FLAGS == {"": 0, "saturated": 1, "non-finite": 2, "floor pile": 3, "ceiling pile": 4}
    assert set(REASON_TEXTS) == set(REASONS) | {""}
    texts = np.array(["ceiling pile", "", "non-finite", "floor pile", "saturated", "", "saturated"])
    codes = reason_codes(texts)
    assert codes.dtype == np.int8 and codes.nbytes == texts.size               # one byte per event
    assert codes.tolist() == [CLEANING_FLAGS[t] for t in texts]
    back = reason_texts(codes)
    assert back.dtype == texts.dtype and back.tolist() == texts.tolist()      # same texts, same str type
    assert reason_codes(codes) is codes                                        # codes pass unchanged
    assert reason_counts(codes) == {"saturated": 2, "ceiling pile": 1, "floor pile": 1, "non-finite": 1}
    with pytest.raises(EventDataError, match="unknown reason"):
        reason_codes(np.array(["", "clipped"]))
    with pytest.raises(EventDataError, match="reason codes"):
        reason_codes(np.array([0, 5], dtype=np.int8))


def test_cleaning_codes_equal_the_rules_applied_one_channel_at_a_time():
    # reference: each channel's saturation and pile masks (saturation_mask, pile_masks)
    # combined by the stated precedence (non-finite over saturated over ceiling over floor
    # pile), written as text with plain loops
    from core.prepare import pile_masks, reason_texts, saturation_mask

    rng = np.random.default_rng(11)
    n, k = 5000, 4
    raw = rng.normal(500.0, 100.0, size=(n, k))
    raw[:60, 0] = raw[:, 0].min() - 1.0                     # floor pile in channel 0
    raw[40:120, 1] = raw[:, 1].max() + 1.0                  # ceiling pile in channel 1
    raw[100:110, 2] = 1e4                                   # saturated in channel 2
    raw[5, 3], raw[105, 0] = np.nan, np.inf                 # non-finite
    ranges = np.array([1e6, 1e6, 1e4, 1e6])
    code, saturated, sat_cells, floor_cells, ceiling_cells = cleaning.clean_events(raw, range(k), ranges)
    sat = saturation_mask(raw, ranges)
    expected = np.full(n, "", dtype=object)
    for j in range(k):
        fl, ce = pile_masks(raw[:, j])
        for i in range(n):
            if fl[i] and not sat[i, j] and expected[i] == "":
                expected[i] = "floor pile"
    for j in range(k):
        fl, ce = pile_masks(raw[:, j])
        for i in np.flatnonzero(ce & ~sat[:, j]):
            expected[i] = "ceiling pile"
    expected[sat.any(axis=1)] = "saturated"
    expected[~np.isfinite(raw).all(axis=1)] = "non-finite"
    assert code.dtype == np.int8
    assert reason_texts(code).tolist() == expected.tolist()
    # masks are kept only for channels that flag events, and count what the rules flag
    assert sorted(sat_cells) == [2] and sorted(floor_cells) == [0] and sorted(ceiling_cells) == [1]
    assert floor_cells[0].sum() == 60 and ceiling_cells[1].sum() == 80 and sat_cells[2].sum() == 10
    # through prepare_events: the same reasons, and the per-channel counts
    out = prepare_events(raw, ranges, dequantise=False)
    assert out.reason.tolist() == expected.tolist() and out.reason_code.dtype == np.int8
    assert list(out.floor_per_channel) == [60, 0, 0, 0] and list(out.ceiling_per_channel) == [0, 80, 0, 0]
    assert list(out.saturated_per_channel) == [0, 0, 9, 0]      # among finite events: event 105 holds an inf
    np.testing.assert_array_equal(out.kept, expected == "")


def test_float32_event_file_prepares_like_its_float64_values():
    # read_fcs holds a float file as float32; the preparation converts column by column and
    # block by block, so every consumer sees the values a float64 copy would give.
    # Reference: the same tube with its event matrix converted to float64 beforehand.
    import dataclasses

    from core.analysis import compensated_and_transformed, density_input
    from core.fcs import read_fcs
    from core.recipe import default_recipe

    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    ef = read_fcs(os.path.join(root, "sample_events", "tube_B_treated_low.fcs"))
    assert ef.data.dtype == np.float32                      # FCS 3.1 $DATATYPE F, no decoding
    ef64 = dataclasses.replace(ef, data=ef.data.astype(np.float64))
    recipe = default_recipe(ef)
    prepared, values = density_input(ef, recipe)
    prepared64, values64 = density_input(ef64, recipe)
    np.testing.assert_array_equal(values, values64)
    np.testing.assert_array_equal(prepared.matrix, prepared64.matrix)
    np.testing.assert_array_equal(prepared.reason, prepared64.reason)
    assert prepared.grids == prepared64.grids
    np.testing.assert_array_equal(compensated_and_transformed(ef, recipe)[1], values)


@pytest.mark.parametrize("kind", ["linear grid", "log grid", "continuous", "ties without a grid"])
def test_plan_judged_on_kept_rows_in_place_equals_the_gathered_column(kind):
    # reference: the plan of the kept rows' values gathered first (the former call);
    # 300,000 rows, so the strided sample of GRID_SAMPLE values is taken
    rng = np.random.default_rng(1)
    n = 300_000
    if kind == "linear grid":
        col = np.round(rng.normal(500, 80, n) / 2.5) * 2.5
    elif kind == "log grid":
        col = 10 ** (np.round(rng.uniform(0, 4, n) * 256) / 256)
    elif kind == "continuous":
        col = rng.lognormal(5, 1, n)
    else:
        col = rng.choice(rng.lognormal(5, 1, 3000), n)
    X = np.column_stack([col, rng.normal(size=n)]).astype(np.float32)   # a column of a matrix, read in place
    rows = np.flatnonzero(rng.random(n) < 0.9)
    got = plan_jitter(X[:, 0], rows=rows)
    want = plan_jitter(X[rows, 0])
    assert _same_plan(got, want)
    assert _same_plan(plan_jitter(X[:, 0]), plan_jitter(np.ascontiguousarray(X[:, 0])))
    if kind != "continuous":
        assert want is not None          # each grid kind is found, so the plans' fields are compared


def _same_plan(a, b) -> bool:
    if a is None or b is None:
        return a is b
    same = lambda u, v: (u is None and v is None) or (u is not None and v is not None and np.array_equal(u, v))
    return a.grid == b.grid and a.step == b.step and same(a.values, b.values) and same(a.widths, b.widths)


def test_atoms_check_on_two_threads_equals_counting_each_channel(monkeypatch):
    # reference: numpy.unique's counts over the same seeded subsample of rows, channel by channel
    rng = np.random.default_rng(4)
    X = rng.normal(size=(500_000, 6))
    X[:2000, 1] = 1.5                       # an atom of 0.4 %
    X[:, 4] = np.round(X[:, 4], 1)          # a coarse grid: every value an atom
    names = [f"ch{j}" for j in range(6)]
    monkeypatch.setattr(cleaning, "ATOM_THREADS_MIN_WORK", 1)
    got = cleaning.atoms(X, names)
    rows = np.sort(cleaning._tie_rows(X.shape[0], 400_000, 0))
    want = {}
    for j, name in enumerate(names):
        share = np.unique(X[rows, j], return_counts=True)[1].max() / rows.size
        if share > cleaning.ATOM_SHARE:
            want[name] = share
    assert set(got) == {"ch1", "ch4"} == set(want)
    assert all(abs(got[k] - want[k]) < 1e-15 for k in want)
