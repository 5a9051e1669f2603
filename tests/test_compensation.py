"""Tests of core.compensation against the FCS 3.1 $SPILLOVER definition,
numpy.linalg and the real files fcsparser ships (iterated in place)."""

import glob
import os
import warnings

import fcsparser
import numpy as np
import pytest

from core.compensation import (
    SpilloverMatrix,
    compensate,
    parse_spillover_text,
    read_spillover_csv,
    spillover_from_keywords,
    spillover_to_keyword,
)
from core.errors import CompensationError

FCSPARSER_DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")


def _fcs_files():
    return sorted(p for p in glob.glob(os.path.join(FCSPARSER_DATA, "**", "*.fcs"), recursive=True))


def _parse(path):
    """Keywords and $PnN names via fcsparser (the reference reader)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta, data = fcsparser.parse(path, reformat_meta=True, channel_naming="$PnN")
    return meta, data


def _random_spillover(k, rng):
    # Spillover values typical of fluorescence flow: 1 on the diagonal, a few
    # percent to ~30 % off it (common practice).
    m = rng.uniform(0.0, 0.3, size=(k, k))
    np.fill_diagonal(m, 1.0)
    return m


def test_single_stain_signals_are_recovered():
    # Each event carries one fluorochrome's true signal; mixing by S
    # (observed = true @ S, FCS 3.1 $SPILLOVER row convention) and compensating
    # must give the true signals back.  reference: numpy.linalg.inv
    rng = np.random.default_rng(7)
    k = 5
    m = _random_spillover(k, rng)
    names = [f"FL{i}-A" for i in range(1, k + 1)]
    true = np.zeros((500, k))
    which = rng.integers(0, k, size=500)
    true[np.arange(500), which] = rng.lognormal(8, 1, size=500)
    observed = true @ m
    # extra channels before and after the detectors must stay untouched
    fsc = rng.uniform(0, 1e5, size=(500, 1))
    time = np.arange(500.0)[:, None]
    data = np.hstack([fsc, observed[:, ::-1], time])
    channels = ["FSC-A", *names[::-1], "Time"]
    S = SpilloverMatrix(names, m)
    out = compensate(data, channels, S)
    assert out is not data
    np.testing.assert_allclose(out[:, 1:1 + k][:, ::-1], true, rtol=0, atol=1e-9 * true.max())
    np.testing.assert_array_equal(out[:, 0], fsc[:, 0])
    np.testing.assert_array_equal(out[:, -1], time[:, 0])
    # the same as multiplying by numpy's inverse  reference: numpy.linalg.inv
    np.testing.assert_allclose(out[:, 1:1 + k][:, ::-1], observed @ np.linalg.inv(m), rtol=1e-12, atol=1e-9)
    # the input is not modified
    np.testing.assert_array_equal(data[:, 1:1 + k], observed[:, ::-1])


def test_keyword_round_trip_and_variants():
    rng = np.random.default_rng(3)
    S = SpilloverMatrix(["FITC-A", "PE-A", "APC-A"], _random_spillover(3, rng))
    text = spillover_to_keyword(S)
    # reference: FCS 3.1 $SPILLOVER "n,[names],[n*n values]" row by row
    tokens = text.split(",")
    assert tokens[0] == "3" and tokens[1:4] == S.detectors and len(tokens) == 1 + 3 + 9
    assert float(tokens[4 + 1]) == S.matrix[0, 1]
    for key in ("$SPILLOVER", "SPILL", "$SPILL", "spill", "$spillover"):
        got = spillover_from_keywords({key: text})
        assert got.detectors == S.detectors
        np.testing.assert_array_equal(got.matrix, S.matrix)
    assert spillover_from_keywords({"$PAR": "3"}) is None


def test_names_given_as_parameter_numbers_resolve_to_pnn():
    kw = {"$PAR": "3", "$P1N": "FSC-A", "$P2N": "FITC-A", "$P3N": "PE-A",
          "$SPILLOVER": "2,2,3,1,0.1,0.05,1"}
    S = spillover_from_keywords(kw)
    assert S.detectors == ["FITC-A", "PE-A"]
    assert S.matrix[0, 1] == 0.1 and S.matrix[1, 0] == 0.05


def test_real_files_with_spillover_keywords():
    # Every fcsparser file carrying SPILL / $SPILLOVER either parses into a
    # matrix whose detectors are channels ($PnN) of that file, or is malformed
    # and raises a CompensationError naming the problem.
    # reference: fcsparser.parse (keywords, $PnN names); FCS 3.1 $SPILLOVER
    parsed, malformed = 0, 0
    for path in _fcs_files():
        try:
            meta, data = _parse(path)
        except Exception:
            continue  # files fcsparser itself cannot read (corrupted on purpose)
        keys = [k for k in meta if str(k).upper() in ("$SPILLOVER", "SPILL", "$SPILL")]
        if not keys:
            assert spillover_from_keywords(meta, source=path) is None
            continue
        text = str(meta[keys[0]]).split(",")
        k = int(text[0])
        if len(text) != 1 + k + k * k:
            with pytest.raises(CompensationError, match="values"):
                spillover_from_keywords(meta, source=path)
            malformed += 1
            continue
        S = spillover_from_keywords(meta, source=path)
        channels = list(data.columns)
        assert S.n_detectors == k
        assert set(S.detectors) <= set(channels), (path, S.detectors, channels)
        # the diagonal is 1 in these files (common practice)
        np.testing.assert_allclose(np.diag(S.matrix), 1.0)
        comp = compensate(data.values, channels, S, source=path)
        idx = [channels.index(d) for d in S.detectors]
        # reference: numpy.linalg.inv
        np.testing.assert_allclose(comp[:, idx], data.values[:, idx].astype(np.float64) @ np.linalg.inv(S.matrix),
                                   rtol=1e-9, atol=1e-6)
        other = [i for i in range(len(channels)) if i not in idx]
        np.testing.assert_array_equal(comp[:, other], data.values[:, other].astype(np.float64))
        parsed += 1
    # fcsparser 0.2.8 ships 4 files with SPILL (FCS 3.0 float: 83,411 x 12, 14,945 x 11 and
    # two of 11,585 x 11)
    # and 3 with a $SPILLOVER holding names only (counted by listing its tests/data)
    assert parsed >= 4 and malformed >= 1


def test_missing_detectors_are_listed():
    S = SpilloverMatrix(["FITC-A", "PE-A"], np.eye(2))
    with pytest.raises(CompensationError) as err:
        compensate(np.zeros((3, 2)), ["FITC-A", "SSC-A"], S, source="tube.fcs")
    msg = str(err.value)
    assert "PE-A" in msg and "SSC-A" in msg and "tube.fcs" in msg and "FITC-A, SSC-A" in msg


def test_singular_and_ill_conditioned_matrices_are_refused():
    # reference: numpy.linalg.cond of a rank-deficient matrix is huge/inf
    S = SpilloverMatrix(["A", "B"], [[1.0, 1.0], [1.0, 1.0]])
    with pytest.raises(CompensationError, match="singular"):
        compensate(np.ones((2, 2)), ["A", "B"], S)
    S = SpilloverMatrix(["A", "B"], [[1.0, 1.0], [1.0, 1.0 + 1e-13]])
    assert np.linalg.cond(S.matrix) > 1e10
    with pytest.raises(CompensationError, match="condition number"):
        compensate(np.ones((2, 2)), ["A", "B"], S)


def test_malformed_matrices():
    with pytest.raises(CompensationError, match="square"):
        SpilloverMatrix(["A", "B"], np.ones((2, 3)))
    with pytest.raises(CompensationError, match="not numbers"):
        SpilloverMatrix(["A", "B"], [["1", "x"], ["0", "1"]])
    with pytest.raises(CompensationError, match="non-finite"):
        SpilloverMatrix(["A", "B"], [[1, np.nan], [0, 1]])
    with pytest.raises(CompensationError, match="twice"):
        SpilloverMatrix(["A", "A"], np.eye(2))
    with pytest.raises(CompensationError, match="not a number"):
        parse_spillover_text("2,A,B,1,zero,0,1")
    with pytest.raises(CompensationError, match="needs 2 names and 4 values"):
        parse_spillover_text("2,A,B,1,0,0")


def test_csv_layouts(tmp_path):
    m = np.array([[1.0, 0.12, 0.0], [0.03, 1.0, 0.2], [0.0, 0.01, 1.0]])
    names = ["FITC-A", "PE-A", "APC-A"]
    # header only
    p1 = tmp_path / "plain.csv"
    p1.write_text(",".join(names) + "\n" + "\n".join(",".join(repr(v) for v in r) for r in m) + "\n")
    # empty corner cell and row names in shuffled order, semicolons
    p2 = tmp_path / "rows.csv"
    order = [2, 0, 1]
    p2.write_text(";" + ";".join(names) + "\n"
                  + "\n".join(names[i] + ";" + ";".join(repr(v) for v in m[i]) for i in order))
    for p in (p1, p2):
        S = read_spillover_csv(p)
        assert S.detectors == names
        np.testing.assert_array_equal(S.matrix, m)


def test_csv_errors_name_the_file(tmp_path):
    empty = tmp_path / "empty.csv"
    empty.write_text("\n")
    with pytest.raises(CompensationError, match="empty.csv.*empty"):
        read_spillover_csv(empty)
    notsq = tmp_path / "notsquare.csv"
    notsq.write_text("A,B,C\n1,0,0\n0,1,0\n")
    with pytest.raises(CompensationError, match="notsquare.csv.*square"):
        read_spillover_csv(notsq)
    text = tmp_path / "text.csv"
    text.write_text("A,B\n1,0\n0,one\n")
    with pytest.raises(CompensationError, match="text.csv.*'one'.*not a number"):
        read_spillover_csv(text)


def test_csv_in_percent(tmp_path):
    # spillover written in percent, diagonal 100 (common practice in some exports)
    p = tmp_path / "percent.csv"
    p.write_text("A,B\n100,12.5\n3,100\n")
    S = read_spillover_csv(p)
    np.testing.assert_allclose(S.matrix, [[1.0, 0.125], [0.03, 1.0]], rtol=1e-15)


def test_float32_events_compensate_in_blocks_like_numpy_inverse():
    # float32 event matrices (as read_fcs holds float files) are compensated block by block
    # without a float64 copy of the whole matrix; reference: observed @ numpy.linalg.inv(S)
    # on the same values in float64 (FCS 3.1 spillover: observed = true @ S)
    from core.compensation import CHUNK_EVENTS, compensate_columns

    rng = np.random.default_rng(5)
    names = ["FSC-A", "FL1-A", "FL2-A", "FL3-A"]
    S = SpilloverMatrix(["FL1-A", "FL2-A", "FL3-A"],
                        np.array([[1.0, 0.12, 0.02], [0.05, 1.0, 0.2], [0.0, 0.07, 1.0]]))
    data = rng.lognormal(6.0, 1.0, (2 * CHUNK_EVENTS + 17, 4)).astype(np.float32)
    out = compensate(data, names, S)
    assert out.dtype == np.float64 and data.dtype == np.float32
    expected = data.astype(np.float64)
    expected[:, 1:] = expected[:, 1:] @ np.linalg.inv(S.matrix)
    np.testing.assert_allclose(out, expected, rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(out[:, 1:], compensate_columns(data, [1, 2, 3], S))
    np.testing.assert_array_equal(out, compensate(data.astype(np.float64), names, S))
