"""Hostile and unusual FCS files: wrong data are never returned silently (core/fcs.py).

Layout rules from the FCS 3.1 standard (Data File Standard for Flow Cytometry,
version FCS 3.1): section 3.1 (HEADER offsets, inclusive byte ranges; $BEGINDATA
/ $ENDDATA carry the same offsets), section 3.2 (keywords are case-insensitive;
$DATATYPE, $MODE, $BYTEORD values), the $PnB/$PnR bit masking and the $PnE /
$PnG decoding formulas.  Files from fcsparser's test data are iterated in place.
"""

import glob
import os
import threading

import fcsparser
import numpy as np
import pytest

from core.errors import FcsFileError
from core.fcs import read_fcs, write_fcs

DATA_START = 4096
FCSPARSER_FILES = sorted(glob.glob(os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data", "**",
                                                "*.fcs"), recursive=True))


def build_fcs(path, pairs, data: bytes, version="FCS3.1", header_data=None, keyword_data=True):
    """Write an FCS file: HEADER, TEXT (delimiter '/') from 58, DATA from byte 4096.

    ``header_data``: (start, end) written in the HEADER instead of the true offsets;
    ``keyword_data``: also write $BEGINDATA/$ENDDATA (FCS 3.0+), with the true offsets.
    """
    start, end = (DATA_START, DATA_START + len(data) - 1) if data else (0, 0)
    pairs = list(pairs)
    if keyword_data:
        pairs = [("$BEGINDATA", str(start)), ("$ENDDATA", str(end))] + pairs
    text = ("/" + "".join(f"{k}/{v}/" for k, v in pairs)).encode("utf-8")
    text_end = 58 + len(text) - 1
    assert text_end < DATA_START
    hs, he = header_data if header_data is not None else (start, end)
    header = f"{version:<10}" + "".join(f"{v:>8d}" for v in (58, text_end, hs, he, 0, 0))
    body = header.encode("ascii") + text
    body += b" " * (DATA_START - len(body)) + data
    with open(path, "wb") as fh:
        fh.write(body)
    return str(path)


def int16_file(path, values, extra=(), **kw):
    """Two 16-bit integer channels, little-endian, $PnR 1024."""
    values = np.asarray(values, dtype="<u2")
    pairs = [("$BYTEORD", "1,2"), ("$DATATYPE", "I"), ("$MODE", "L"), ("$NEXTDATA", "0"),
             ("$PAR", "2"), ("$TOT", str(values.shape[0])),
             ("$P1N", "FSC"), ("$P1B", "16"), ("$P1R", "1024"), ("$P1E", "0,0"),
             ("$P2N", "SSC"), ("$P2B", "16"), ("$P2R", "1024"), ("$P2E", "0,0")]
    pairs = [p for p in pairs if p[0] not in dict(extra)] + list(extra)
    return build_fcs(path, pairs, values.tobytes(), **kw)


VALUES = np.array([[1, 2], [300, 400], [1000, 5], [7, 1023]])


def test_builder_writes_a_file_fcsparser_and_we_read_alike(tmp_path):
    p = int16_file(tmp_path / "ok.fcs", VALUES)
    _, ref = fcsparser.parse(p, channel_naming="$PnN", dtype=None)  # reference reader
    np.testing.assert_array_equal(read_fcs(p).data, ref.to_numpy(dtype=float))
    np.testing.assert_array_equal(read_fcs(p).data, VALUES)


def test_tot_zero_while_data_holds_events_is_an_error(tmp_path):
    # finding: $TOT 0 with a full DATA segment was read as 0 events
    p = int16_file(tmp_path / "tot0.fcs", VALUES, extra=[("$TOT", "0")])
    with pytest.raises(FcsFileError, match=r"\$TOT is 0"):
        read_fcs(p)


def test_data_offsets_overlapping_the_text_segment_are_an_error(tmp_path):
    # finding: DATA offsets inside TEXT were accepted and TEXT bytes came back as events
    n = VALUES.size * 2
    p = int16_file(tmp_path / "overlap.fcs", VALUES, header_data=(100, 100 + n - 1), keyword_data=False)
    with pytest.raises(FcsFileError, match="overlaps"):
        read_fcs(p)


@pytest.mark.parametrize("early", range(1, 11))
@pytest.mark.parametrize("keywords", [True, False])
def test_a_data_start_a_few_bytes_early_is_an_error_not_a_shift(tmp_path, early, keywords):
    # finding: a HEADER data start 1-10 bytes early passed a one-event tolerance, values shifted
    n = VALUES.size * 2
    p = int16_file(tmp_path / "early.fcs", VALUES, header_data=(DATA_START - early, DATA_START + n - 1),
                   keyword_data=keywords, version="FCS3.1" if keywords else "FCS2.0")
    with pytest.raises(FcsFileError, match="disagree|DATA segment"):
        read_fcs(p)


def test_an_end_offset_that_disagrees_is_resolved_only_by_a_confirmed_start(tmp_path):
    n = VALUES.size * 2
    # same start in HEADER and TEXT, HEADER end damaged: the $ENDDATA that fits $TOT is used
    p = int16_file(tmp_path / "end.fcs", VALUES, header_data=(DATA_START, DATA_START + n + 40))
    ef = read_fcs(p)
    np.testing.assert_array_equal(ef.data, VALUES)
    assert any("disagree" in note for note in ef.notes)
    # neither end fits $TOT: refused
    p = int16_file(tmp_path / "end2.fcs", VALUES, header_data=(DATA_START, DATA_START + n + 40),
                   extra=[("$TOT", "3")])
    with pytest.raises(FcsFileError, match="disagree"):
        read_fcs(p)


def test_a_range_beyond_the_stored_bits_keeps_every_bit_with_a_note(tmp_path):
    # finding: $PnR 4294967296 on a 16-bit channel gave all zeros with only a cast warning
    p = int16_file(tmp_path / "bigrange.fcs", VALUES, extra=[("$P1R", "4294967296")])
    ef = read_fcs(p)
    np.testing.assert_array_equal(ef.data, VALUES)  # the stored values, unmasked (16 bits < 32)
    assert any("$P1" in n and "range" in n for n in ef.notes)


@pytest.mark.parametrize("key,value,match", [("$P1G", "1e-320", "gain"), ("$P1G", "1e300", "gain"),
                                             ("$P1E", "400,1", "log amplification"),
                                             ("$P1E", "1e300,1", "log amplification"),
                                             ("$P1E", "4,1e300", "log amplification"),
                                             ("$P1R", "1e305", "range")])
def test_unbounded_gain_exponent_or_range_is_a_clear_error(tmp_path, key, value, match):
    # findings: $PnG 1e-320 made every value inf; $P1E 400,1 / 1e300,1 raised OverflowError
    p = int16_file(tmp_path / "bounds.fcs", VALUES, extra=[(key, value)])
    with pytest.raises(FcsFileError, match=match):
        read_fcs(p)


@pytest.mark.parametrize("bad", [None, 12, 3.5, b"\x00", ["a.fcs"]])
def test_paths_that_are_not_paths_give_our_error(bad):
    # finding: an integer or None as the path raised TypeError
    with pytest.raises(FcsFileError):
        read_fcs(bad)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_folder_and_named_pipe_are_refused_before_opening(tmp_path):
    # finding: a named pipe as the path blocked forever
    fifo = tmp_path / "pipe.fcs"
    os.mkfifo(fifo)
    outcome = []

    def attempt():
        try:
            read_fcs(str(fifo))
        except FcsFileError as exc:
            outcome.append(str(exc))

    t = threading.Thread(target=attempt, daemon=True)
    t.start()
    t.join(5.0)
    assert outcome and "regular file" in outcome[0]
    with pytest.raises(FcsFileError, match="folder"):
        read_fcs(str(tmp_path))


@pytest.mark.parametrize("change", ["lower keywords", "datatype i", "mode l", "no mode"])
def test_keyword_case_and_missing_mode_are_read_as_fcs_31_says(tmp_path, change):
    # finding: lower-case keywords, $DATATYPE i, $MODE l and a missing $MODE were refused
    # (FCS 3.1 section 3.2: keywords are case-insensitive; $MODE is optional in 3.1, list mode)
    base = int16_file(tmp_path / "base.fcs", VALUES)
    edits = {"lower keywords": [("$PAR", "2"), ("$TOT", "4")], "datatype i": [("$DATATYPE", "i")],
             "mode l": [("$MODE", "l")], "no mode": []}[change]
    pairs = [("$BYTEORD", "1,2"), ("$DATATYPE", "I"), ("$MODE", "L"), ("$NEXTDATA", "0"),
             ("$PAR", "2"), ("$TOT", "4"), ("$P1N", "FSC"), ("$P1B", "16"), ("$P1R", "1024"),
             ("$P2N", "SSC"), ("$P2B", "16"), ("$P2R", "1024")]
    pairs = [(k, v) for k, v in pairs if not (change == "no mode" and k == "$MODE")]
    pairs = [(k, dict(edits).get(k, v)) for k, v in pairs]
    if change == "lower keywords":
        pairs = [(k.lower(), v) for k, v in pairs]
    p = build_fcs(tmp_path / "variant.fcs", pairs, np.asarray(VALUES, "<u2").tobytes())
    np.testing.assert_array_equal(read_fcs(p).data, read_fcs(base).data)


def _case_variant(raw: bytes) -> bytes:
    """The same file with every '$' keyword (and the values of $DATATYPE/$MODE) in lower case.
    Same byte length, so every offset stays valid."""
    head = raw[:58]
    t0, t1 = int(head[10:18]), int(head[18:26])
    text = raw[t0:t1 + 1]
    delim = text[:1]
    parts = text.split(delim)
    out = []
    lower_next = False
    for k, part in enumerate(parts):
        if lower_next:
            out.append(part.lower())
            lower_next = False
            continue
        if part.startswith(b"$") and k % 2 == 1:
            lower_next = part.upper() in (b"$DATATYPE", b"$MODE")
            out.append(part.lower())
        else:
            out.append(part)
    return raw[:t0] + delim.join(out) + raw[t1 + 1:]


def _readable_real_files():
    out = []
    for path in FCSPARSER_FILES:
        try:
            read_fcs(path)
        except FcsFileError:
            continue
        out.append(path)
    return out


def test_lower_case_variants_of_fcsparsers_files_read_identically(tmp_path):
    # finding: 189 of 315 keyword-case variants of valid files were refused
    files = _readable_real_files()
    assert len(files) >= 10
    for k, path in enumerate(files):
        raw = open(path, "rb").read()
        variant = tmp_path / f"v{k}.fcs"
        variant.write_bytes(_case_variant(raw))
        a, b = read_fcs(path), read_fcs(str(variant))
        np.testing.assert_array_equal(a.data, b.data)
        assert a.channel_names == b.channel_names


def test_our_own_files_round_trip_and_an_empty_file_stays_valid(tmp_path):
    write_fcs(str(tmp_path / "e.fcs"), np.zeros((0, 2)), ["A", "B"])
    assert read_fcs(str(tmp_path / "e.fcs")).n_events == 0
