"""write_fcs: FCS 3.1 layout, fcsparser reads our files, round trips of fcsparser's files.

reference: FCS 3.1 normative text (HEADER layout, required keywords, delimiter doubling,
offsets beyond 99,999,999 bytes); reference: fcsparser 0.2.8 parse() as independent reader.
"""

from __future__ import annotations

import os
import warnings

import fcsparser
import numpy as np
import pytest

import core.fcs as fcs
import core.fcs_write as fcs_write
from core.errors import ChannelError, EventDataError, ExportError
from core.fcs import header_offset_fields, read_fcs, write_fcs
from tests.test_fcs_read import FCS_DATA, READABLE

STRUCTURAL = {"$BEGINANALYSIS", "$ENDANALYSIS", "$BEGINDATA", "$ENDDATA", "$BEGINSTEXT",
              "$ENDSTEXT", "$BYTEORD", "$DATATYPE", "$MODE", "$NEXTDATA", "$PAR", "$TOT"}


def _parse(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fcsparser.parse(str(path), channel_naming="$PnN", dtype=None)


def _events(n=500, p=4, seed=0):
    rng = np.random.default_rng(seed)
    data = rng.lognormal(6.0, 1.5, size=(n, p)) - 50.0
    data[:, 0] = rng.uniform(0, 262143, size=n)
    return data


def _header(blob: bytes) -> dict:
    # reference: FCS 3.1 section 3.1: version (6 bytes), 4 spaces, six right-justified
    # 8-byte ASCII offsets (TEXT, DATA, ANALYSIS start/end)
    assert blob[6:10] == b"    "
    vals = [int(blob[10 + 8 * k:18 + 8 * k]) for k in range(6)]
    return {"version": blob[:6].decode(), "text": vals[0:2], "data": vals[2:4],
            "analysis": vals[4:6]}


def test_fcsparser_reads_our_file_exactly(tmp_path):
    path = tmp_path / "out.fcs"
    data = _events()
    names = ["Time", "FSC-A", "SSC-A", "FL1-A"]
    write_fcs(path, data, names, channel_labels=["", "", "", "CD3 FITC"],
              channel_ranges=[262144, 262144, 262144, 1e5])
    meta, frame = _parse(path)
    # reference: fcsparser; values are float32-exact
    assert frame.to_numpy().dtype == np.float32
    assert np.array_equal(frame.to_numpy(), data.astype(np.float32))
    assert list(frame.columns) == names
    # reference: FCS 3.1 required keywords and our declared layout
    assert meta["$DATATYPE"] == "F" and meta["$BYTEORD"] == "1,2,3,4" and meta["$MODE"] == "L"
    assert meta["$NEXTDATA"] == 0 and meta["$PAR"] == 4 and meta["$TOT"] == 500
    for n in range(1, 5):
        assert meta[f"$P{n}B"] == 32 and meta[f"$P{n}E"] == "0,0"
        assert meta[f"$P{n}N"] == names[n - 1]
    assert "$P1S" not in meta and meta["$P4S"] == "CD3 FITC"
    assert meta["$P1R"] == "262144" and meta["$P4R"] == "100000"
    for key in ("$BEGINANALYSIS", "$ENDANALYSIS", "$BEGINSTEXT", "$ENDSTEXT"):
        assert meta[key] == "0"


def test_header_text_and_data_layout(tmp_path):
    path = tmp_path / "layout.fcs"
    data = _events(n=123, p=3, seed=1)
    write_fcs(path, data, ["A", "B", "C"])
    blob = path.read_bytes()
    head = _header(blob)
    assert head["version"] == "FCS3.1"
    assert head["text"][0] == 58  # TEXT follows the 58-byte HEADER
    text = blob[head["text"][0]:head["text"][1] + 1].decode("utf-8")
    delim = text[0]
    assert text[-1] == delim  # reference: FCS 3.1, TEXT starts and ends with the delimiter
    meta, _ = _parse(path)
    # HEADER and TEXT agree on the DATA segment, which is exactly $TOT x $PAR x 4 bytes
    assert head["data"] == [int(meta["$BEGINDATA"]), int(meta["$ENDDATA"])]
    assert head["data"][0] == head["text"][1] + 1
    assert head["data"][1] - head["data"][0] + 1 == 123 * 3 * 4
    assert len(blob) == head["data"][1] + 1
    assert head["analysis"] == [0, 0]
    # reference: FCS 3.1 $BYTEORD/1,2,3,4/ is little-endian; events are rows
    segment = blob[head["data"][0]:head["data"][1] + 1]
    assert segment == data.astype("<f4").tobytes()
    # the layout of the range derived from the data: ceil(largest value)
    for n, col in enumerate(data.T, start=1):
        assert meta[f"$P{n}R"] == str(int(np.ceil(col.astype(np.float32).max())))


def test_delimiter_inside_values_is_doubled(tmp_path):
    path = tmp_path / "escape.fcs"
    write_fcs(path, np.ones((3, 2)), ["FL7-A", "FL8-A"], channel_labels=["GFP/FITC-A", "x"],
              keywords={"NOTE": "a/b//c", "FILTER": "525/50 nm"})
    blob = path.read_bytes()
    # reference: FCS 3.1 section 3.2: a delimiter inside a keyword value is written twice
    assert b"/GFP//FITC-A/" in blob and b"/a//b////c/" in blob and b"/525//50 nm/" in blob
    meta, _ = _parse(path)
    assert meta["$P1S"] == "GFP/FITC-A" and meta["NOTE"] == "a/b//c"
    assert meta["FILTER"] == "525/50 nm"
    assert read_fcs(path).channel_labels == ["GFP/FITC-A", "x"]


def test_value_starting_with_slash_gets_another_delimiter(tmp_path):
    # a value that starts with the delimiter cannot be told from an empty value by some
    # readers (fcsparser among them), so another delimiter is chosen
    path = tmp_path / "source.fcs"
    write_fcs(path, np.ones((2, 1)), ["A"], keywords={"BOSCAGE_SOURCE": "/data/run 1/a.fcs"})
    blob = path.read_bytes()
    delim = blob[58:59]
    assert delim != b"/"
    meta, _ = _parse(path)
    assert meta["BOSCAGE_SOURCE"] == "/data/run 1/a.fcs"


def test_extra_keywords_carried_and_structural_ones_ignored(tmp_path):
    path = tmp_path / "kw.fcs"
    spill = "2,FL1-A,FL2-A,1,0.1,0.05,1"
    write_fcs(path, _events(n=10, p=2), ["FL1-A", "FL2-A"],
              keywords={"$spillover": spill, "BOSCAGE_SOURCE": "run 7.fcs", "$TOT": "999",
                        "$P1N": "bogus", "$P9V": "500", "$DATATYPE": "I", "EMPTY": "",
                        "$FIL": "run 7.fcs"})
    meta, frame = _parse(path)
    assert meta["$SPILLOVER"] == spill  # $-keys upper-cased (FCS keywords are case-insensitive)
    assert meta["BOSCAGE_SOURCE"] == "run 7.fcs" and meta["$FIL"] == "run 7.fcs"
    assert meta["$TOT"] == 10 and meta["$P1N"] == "FL1-A" and meta["$DATATYPE"] == "F"
    assert "$P9V" not in meta and "EMPTY" not in meta  # FCS 3.1: no empty values
    assert frame.shape == (10, 2)


def test_header_fields_beyond_99999999_bytes():
    # reference: FCS 3.1 section 3.1: offsets that do not fit in 8 bytes are written as 0
    # in the HEADER; the TEXT keywords carry the true values
    assert header_offset_fields(58, 4000, 4001, 99_999_999) == [58, 4000, 4001, 99_999_999, 0, 0]
    assert header_offset_fields(58, 4000, 4001, 100_000_000) == [58, 4000, 0, 0, 0, 0]
    assert header_offset_fields(58, 4000, 150_000_000, 250_000_000) == [58, 4000, 0, 0, 0, 0]


def test_large_offset_layout_is_readable(tmp_path, monkeypatch):
    # shrink the HEADER limit so a small file exercises the beyond-the-limit layout
    monkeypatch.setattr(fcs_write, "MAX_HEADER_OFFSET", 1500)
    path = tmp_path / "big.fcs"
    data = _events(n=200, p=3, seed=2)
    write_fcs(path, data, ["A", "B", "C"])
    blob = path.read_bytes()
    head = _header(blob)
    assert head["data"] == [0, 0] and head["text"][0] == 58
    meta, frame = _parse(path)  # fcsparser falls back to $BEGINDATA/$ENDDATA
    assert int(meta["$ENDDATA"]) == len(blob) - 1
    assert np.array_equal(frame.to_numpy(), data.astype(np.float32))
    monkeypatch.undo()
    assert np.array_equal(read_fcs(path).data, data.astype(np.float32))


def test_refuses_to_overwrite_unless_asked(tmp_path):
    path = tmp_path / "same.fcs"
    write_fcs(path, np.zeros((2, 1)), ["A"])
    first = path.read_bytes()
    with pytest.raises(ExportError) as info:
        write_fcs(path, np.ones((5, 1)), ["A"])
    assert "same.fcs" in str(info.value)
    assert path.read_bytes() == first
    write_fcs(path, np.ones((5, 1)), ["A"], overwrite=True)
    assert read_fcs(path).n_events == 5


def _listing(root):
    return sorted(os.path.relpath(os.path.join(d, f), root)
                  for d, _, files in os.walk(root) for f in files)


def test_unwritable_folder_gives_export_error_and_leaves_nothing(tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        probe = locked / "probe"
        try:
            probe.write_bytes(b"")
            probe.unlink()
            enforced = False  # running as root: permission bits do not stop writes
        except PermissionError:
            enforced = True
        if enforced:
            target = locked / "out.fcs"
        else:
            # a regular file where the folder should be stops every user, root included
            blocker = tmp_path / "blocker"
            blocker.write_bytes(b"not a folder")
            target = blocker / "out.fcs"
        before = _listing(tmp_path)
        with pytest.raises(ExportError) as info:
            write_fcs(target, _events(n=20, p=2), ["A", "B"])
        assert "out.fcs" in str(info.value)
        assert _listing(tmp_path) == before  # no temporary or partial file anywhere
        assert not os.path.exists(target)
    finally:
        locked.chmod(0o755)


def test_missing_folder_gives_export_error(tmp_path):
    with pytest.raises(ExportError) as info:
        write_fcs(tmp_path / "nowhere" / "out.fcs", np.ones((2, 1)), ["A"])
    assert "does not exist" in str(info.value)
    assert _listing(tmp_path) == []


@pytest.mark.parametrize("bad,words", [
    (np.array([[1.0, np.nan], [2.0, 3.0]]), "NaN"),
    (np.array([[1.0, 2.0], [np.inf, 3.0]]), "inf"),
    (np.array([[1.0, 2.0], [1e39, 3.0]]), "float32"),  # beyond float32 (max ~3.4e38)
    (np.ones(4), "2-D"),
    (np.ones((2, 2, 2)), "2-D"),
    (np.array([["a", "b"]]), "real numbers"),
])
def test_unusable_data_is_refused(tmp_path, bad, words):
    with pytest.raises(EventDataError) as info:
        write_fcs(tmp_path / "bad.fcs", bad, ["A", "B"])
    assert words in str(info.value)
    assert _listing(tmp_path) == []


@pytest.mark.parametrize("kwargs,words", [
    ({"channel_names": ["A"]}, "1 channel names for 2"),
    ({"channel_names": ["A", "B", "C"]}, "3 channel names for 2"),
    ({"channel_names": ["A", "A"]}, "repeat"),
    ({"channel_names": ["A", " "]}, "empty"),
    ({"channel_names": ["A", "B,C"]}, "comma"),
    ({"channel_names": ["A", "B"], "channel_labels": ["x"]}, "labels"),
    ({"channel_names": ["A", "B"], "channel_ranges": [1.0]}, "ranges"),
    ({"channel_names": ["A", "B"], "channel_ranges": [1.0, -5.0]}, "positive"),
])
def test_bad_channel_lists_are_refused(tmp_path, kwargs, words):
    with pytest.raises(ChannelError) as info:
        write_fcs(tmp_path / "bad.fcs", np.ones((3, 2)), **kwargs)
    assert words in str(info.value)
    assert _listing(tmp_path) == []


def test_zero_events_file(tmp_path):
    path = tmp_path / "empty_selection.fcs"
    write_fcs(path, np.zeros((0, 2)), ["A", "B"], channel_ranges=[1024, 1024])
    ef = read_fcs(path)
    assert ef.data.shape == (0, 2) and ef.channel_names == ["A", "B"]


@pytest.mark.parametrize("rel", READABLE)
def test_round_trip_of_bundled_files(tmp_path, rel):
    first = read_fcs(os.path.join(FCS_DATA, rel))
    out = tmp_path / "copy.fcs"
    write_fcs(out, first.data, first.channel_names, keywords=first.keywords,
              channel_labels=first.channel_labels, channel_ranges=first.channel_ranges)
    again = read_fcs(out)
    assert again.version == "FCS3.1"
    # values after the float32 cast, bit for bit
    assert np.array_equal(again.data, first.data.astype(np.float32).astype(np.float64))
    assert again.channel_names == first.channel_names
    assert again.channel_labels == first.channel_labels
    assert np.array_equal(again.channel_ranges, first.channel_ranges)
    user = {k: v for k, v in first.keywords.items()
            if k not in STRUCTURAL and not fcs._PARAM_KEY.match(k) and v != ""}
    assert {k: again.keywords.get(k) for k in user} == user
    # and the independent reader agrees on the copy
    _, frame = _parse(out)
    assert np.array_equal(frame.to_numpy(), first.data.astype(np.float32))
