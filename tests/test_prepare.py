"""Tests of core.prepare: saturation, non-finite events, de-quantisation,
on synthetic channels and on the real files fcsparser ships (read in place)."""

import os
import warnings

import fcsparser
import numpy as np
import pytest
from scipy import stats

from core.errors import EventDataError
from core.prepare import (
    REASON_NON_FINITE,
    REASON_SATURATED,
    detect_step,
    dequantise,
    prepare_events,
)
from core.transforms import logicle

FCSPARSER_DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")
DIVA = os.path.join(FCSPARSER_DATA, "FlowCytometers", "FACS_Diva", "facs_diva_test.fcs")
CYTEK = os.path.join(FCSPARSER_DATA, "FlowCytometers", "Cytek_xP5", "Cytek_xP5.fcs")


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
    # reference: fcsparser.parse of the FACS Diva file shipped with fcsparser;
    # its area channels hold integer multiples of a per-detector gain
    raw, names, ranges = _parse(DIVA)
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
    # an integer-valued file (reference: fcsparser's Cytek xP5 file, values 0..1023)
    raw, names, ranges = _parse(CYTEK)
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
    assert out.counts == {"events": n, "kept": n - 5, "non-finite": 3, "saturated": 2, "dropped": 5}
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
