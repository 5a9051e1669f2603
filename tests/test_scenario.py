"""Tests of core.scenario: determinism, spillover round trip through FCS 3.1
files, the rare population's share, and the committed sample files."""

import os

import numpy as np
import pytest

from core.compensation import compensate, spillover_from_keywords
from core.errors import ExportError
from core.fcs import read_fcs
from core.prepare import prepare_events
from core.scenario import (
    CHANNEL_NAMES,
    DEFAULT_SEED,
    RANGE,
    RARE_POPULATION,
    TUBES,
    generate_tube,
    load_truth,
    spillover_matrix,
    write_sample_events,
)

REPO_SAMPLES = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "sample_events")


def _quantisation_bound(S):
    # stored values are rounded to whole units (error <= 1/2 per detector);
    # compensation maps that error through inverse(S): |e @ inv(S)|_j <= 1/2 sum_i |inv(S)_ij|
    return 0.5 * np.abs(np.linalg.inv(S.matrix)).sum(axis=0) + 1e-9


def test_generator_is_deterministic():
    a = generate_tube(1, seed=123)
    b = generate_tube("tube_B_treated_low", seed=123)
    np.testing.assert_array_equal(a.data, b.data)
    np.testing.assert_array_equal(a.premix, b.premix)
    np.testing.assert_array_equal(a.labels, b.labels)
    c = generate_tube(1, seed=124)
    assert not np.array_equal(a.data, c.data)
    # tubes draw from their own streams
    assert not np.array_equal(generate_tube(0, seed=123).data[:100], a.data[:100])


def test_tube_contents_and_rare_share():
    for i, spec in enumerate(TUBES):
        t = generate_tube(i)
        n = spec.n_events
        assert 20000 <= n <= 50000
        assert t.data.shape == (n, len(CHANNEL_NAMES)) and t.premix.shape == (n, 10)
        assert np.all(np.isfinite(t.data))
        # stored values lie on a whole-unit grid and never beyond the range
        np.testing.assert_array_equal(t.data, np.rint(t.data))
        assert t.data.max() <= RANGE
        # a few saturated events (at the range), flagged in the truth
        assert 0 < t.saturated.sum() < 0.005 * n
        np.testing.assert_array_equal(t.saturated, np.any(t.data >= RANGE, axis=1))
        share = t.rare.mean()
        if i == 0:
            assert share == 0.0                     # the control has no rare population
        else:
            assert 0.0005 <= share <= 0.005, (spec.name, share)
        np.testing.assert_array_equal(t.rare, t.labels == RARE_POPULATION)
        # the Time channel increases with event order (acquisition order)
        assert np.all(np.diff(t.data[:, -1]) >= 0)
    # the treated tubes' rare share grows with the dose
    shares = [generate_tube(i).rare.mean() for i in range(1, 4)]
    assert shares == sorted(shares)


def test_spillover_in_generated_values_compensates_back():
    t = generate_tube(2)
    S = spillover_matrix()
    # reference: numpy.linalg.cond; a usable spillover matrix is well conditioned
    assert np.linalg.cond(S.matrix) < 10
    comp = compensate(t.data, CHANNEL_NAMES, S)
    ok = ~t.saturated
    err = np.abs(comp[ok, 2:12] - t.premix[ok])
    assert np.all(err <= _quantisation_bound(S))
    # scatter and Time are untouched by compensation
    np.testing.assert_array_equal(comp[:, [0, 1, 12]], t.data[:, [0, 1, 12]])


def test_written_files_round_trip(tmp_path):
    paths = write_sample_events(tmp_path, seed=DEFAULT_SEED)
    total = sum(os.path.getsize(p) for p in paths)
    assert total < 15e6
    for spec in TUBES:
        t = generate_tube(spec)
        # reference: core.fcs.read_fcs (fcsparser-backed FCS 3.1 reader)
        ef = read_fcs(os.path.join(tmp_path, spec.file_stem + ".fcs"))
        assert ef.version == "FCS3.1"
        assert ef.channel_names == CHANNEL_NAMES
        np.testing.assert_array_equal(ef.data, t.data)        # whole units are exact in float32
        np.testing.assert_array_equal(ef.channel_ranges, RANGE)
        assert ef.keywords.get("$SRC") == spec.name
        S = spillover_from_keywords(ef.keywords, ef.path)
        np.testing.assert_array_equal(S.matrix, spillover_matrix().matrix)
        comp = compensate(ef.data, ef.channel_names, S, source=ef.path)
        ok = ~t.saturated
        assert np.all(np.abs(comp[ok, 2:12] - t.premix[ok]) <= _quantisation_bound(S))
        truth = load_truth(tmp_path, spec.file_stem)
        np.testing.assert_array_equal(truth["labels"], t.labels)
        np.testing.assert_array_equal(truth["rare"], t.rare)
        # cleaning flags exactly the generator's saturated events
        prep = prepare_events(ef.data, ef.channel_ranges, dequantise=False)
        np.testing.assert_array_equal(prep.reason == "saturated", truth["saturated"])
    with pytest.raises(ExportError, match="exists already"):
        write_sample_events(tmp_path)


def test_committed_sample_files_match_the_generator():
    if not os.path.isdir(REPO_SAMPLES):
        pytest.skip("sample_events/ not generated in this checkout")
    for spec in TUBES:
        path = os.path.join(REPO_SAMPLES, spec.file_stem + ".fcs")
        assert os.path.exists(path), path
        ef = read_fcs(path)
        np.testing.assert_array_equal(ef.data, generate_tube(spec, DEFAULT_SEED).data)


def test_committed_files_read_by_fcsparser():
    # reference: fcsparser.parse, an FCS reader outside the project
    import warnings

    import fcsparser

    if not os.path.isdir(REPO_SAMPLES):
        pytest.skip("sample_events/ not generated in this checkout")
    spec = TUBES[1]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta, data = fcsparser.parse(os.path.join(REPO_SAMPLES, spec.file_stem + ".fcs"),
                                     reformat_meta=True, channel_naming="$PnN")
    assert meta["__header__"]["FCS format"] == b"FCS3.1"
    assert list(data.columns) == CHANNEL_NAMES
    np.testing.assert_array_equal(data.values.astype(np.float64), generate_tube(spec).data)
    S = spillover_from_keywords(meta)
    np.testing.assert_array_equal(S.matrix, spillover_matrix().matrix)
