"""read_fcs against fcsparser and the real files fcsparser ships (iterated in place).

reference: fcsparser 0.2.8 (its parse() and the files under fcsparser/tests/data);
reference: FCS 3.1 normative text for $PnE, $PnG, $PnR and $PnB (formulas from memory).
"""

from __future__ import annotations

import logging
import os
import warnings

import fcsparser
import numpy as np
import pytest

from core.errors import ChannelError, FcsFileError
from core.fcs import EventFile, read_fcs, write_fcs
from tests.bundled_files import pick

FCS_DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")



def _broken_on_purpose(rel: str) -> str | None:
    """Words the read error must contain for a file fcsparser ships broken on purpose, by what
    it is: no 'FCS' at the start (not an FCS file), or a HEADER and TEXT without the DATA
    $TOT x $PAR x $PnB announce (truncated); None for a whole file."""
    path = os.path.join(FCS_DATA, rel)
    with open(path, "rb") as handle:
        head = handle.read(58)
    if not head.startswith(b"FCS"):
        return "not an FCS file"
    data_end = int(head[34:42].strip() or 0)  # FCS 3.1 section 3.1: HEADER offsets
    if data_end >= os.path.getsize(path):
        return "truncated"
    return None


def _bundled_files() -> list:
    out = []
    for folder, _, files in os.walk(FCS_DATA):
        for name in files:
            if name.endswith((".txt", ".py", ".pyc", ".md")):
                continue
            out.append(os.path.relpath(os.path.join(folder, name), FCS_DATA))
    return sorted(out)


BUNDLED = _bundled_files()
BROKEN = {rel: _broken_on_purpose(rel) for rel in BUNDLED if _broken_on_purpose(rel)}
READABLE = [rel for rel in BUNDLED if rel not in BROKEN]


def _fcsparser_raw(path: str):
    """fcsparser's own parse: TEXT (Latin-1 keeps every byte) and raw DATA values."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta = fcsparser.parse(path, meta_data_only=True, channel_naming="$PnN", encoding="latin-1")
        _, frame = fcsparser.parse(path, channel_naming="$PnN", dtype=None, encoding="latin-1")
    return meta, frame.to_numpy(dtype=np.float64)


def _fcs31_scale(raw: np.ndarray, meta: dict) -> tuple[np.ndarray, list]:
    """The FCS 3.1 channel -> scale conversion written out independently for the test.

    reference: FCS 3.1, $PnE/f1,f2/: f1 > 0 is log amplification over f1 decades,
    scale = f2 * 10^(f1 * channel / $PnR); f2 = 0 is read as 1 (common practice).
    reference: FCS 3.1, $PnE/0,0/ is required for float data ($DATATYPE F/D), so a
    log $PnE on float data leaves the stored values alone (from memory).
    reference: FCS 3.1, $PnG: linear scale = channel / $PnG; not for time (common practice).
    """
    out = raw.copy()
    decoded = []
    datatype = meta["$DATATYPE"].strip().upper()
    for j in range(raw.shape[1]):
        n = j + 1
        f1, f2 = (float(v) for v in meta.get(f"$P{n}E", "0,0").split(","))
        rng = float(meta[f"$P{n}R"])
        if f1 > 0:
            if datatype == "I":
                out[:, j] = (f2 if f2 > 0 else 1.0) * 10.0 ** (f1 * raw[:, j] / rng)
                decoded.append(j)
            continue
        gain = float(meta.get(f"$P{n}G", "1"))
        if gain != 1.0 and meta[f"$P{n}N"].strip().lower() != "time":
            out[:, j] = raw[:, j] / gain
            decoded.append(j)
    return out, decoded


def test_the_bundled_folder_is_found():
    # reference: fcsparser ships these folders under tests/data (at least 17 files in 0.2.8)
    assert len(BUNDLED) >= 15
    for rel in BROKEN:
        assert rel in BUNDLED


@pytest.mark.parametrize("rel", READABLE)
def test_bundled_file_matches_fcsparser(rel):
    path = os.path.join(FCS_DATA, rel)
    meta, raw = _fcsparser_raw(path)
    ef = read_fcs(path)
    n_par = int(meta["$PAR"])
    # reference: fcsparser parse(); FCS 3.1 $TOT/$PAR
    assert isinstance(ef, EventFile)
    assert ef.data.flags.c_contiguous
    assert ef.data.shape == (int(meta["$TOT"]), n_par) == raw.shape
    assert ef.n_events == raw.shape[0] and ef.n_channels == n_par
    assert ef.version == meta["__header__"]["FCS format"].decode()
    assert ef.channel_names == [meta[f"$P{n}N"].strip() for n in range(1, n_par + 1)]
    assert ef.channel_labels == [meta.get(f"$P{n}S", "").strip() for n in range(1, n_par + 1)]

    expected, decoded = _fcs31_scale(raw, meta)
    # held as float32 where float32 holds every value exactly: float files and integer files of
    # at most 24 bits (FCS 3.1 $PnB; IEEE 754 single precision is exact on integers below 2^24),
    # when no channel is decoded by $PnE/$PnG arithmetic; float64 otherwise
    datatype = meta["$DATATYPE"].strip().upper()
    exact32 = datatype == "F" or datatype == "I" and all(int(meta[f"$P{n}B"]) <= 24 for n in range(1, n_par + 1))
    assert ef.data.dtype == (np.float32 if exact32 and not decoded else np.float64)
    for j in range(n_par):
        if j in decoded:
            # decoded channels: FCS 3.1 formula applied to fcsparser's raw values
            np.testing.assert_allclose(ef.data[:, j], expected[:, j], rtol=1e-12, atol=0)
        else:
            # no decoding applies: identical to fcsparser, value for value
            assert np.array_equal(ef.data[:, j], raw[:, j], equal_nan=True)
            assert ef.channel_ranges[j] == float(meta[f"$P{j + 1}R"])

    # every TEXT keyword fcsparser found is kept, value as written ($-keys upper-case)
    for key, value in meta.items():
        if key.startswith("__") or key.startswith("_"):
            continue
        ours = ef.keywords[key.upper() if key.startswith("$") else key]
        if isinstance(value, str):
            assert ours == value
        else:  # fcsparser turns $PAR, $TOT, $NEXTDATA and $PnB into int
            assert int(ours) == value


@pytest.mark.parametrize("rel,words", sorted(BROKEN.items()))
def test_broken_bundled_files_raise_a_plain_error(rel, words):
    path = os.path.join(FCS_DATA, rel)
    with pytest.raises(FcsFileError) as info:
        read_fcs(path)
    message = str(info.value)
    assert os.path.basename(path) in message
    assert words in message
    assert info.value.path == path


def test_reading_bundled_files_is_quiet(caplog):
    # fcsparser logs and warns on some files (non-UTF-8 TEXT, names); read_fcs turns
    # that into notes: no warning and no log record escapes.
    caplog.set_level(logging.DEBUG)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for rel in READABLE:
            read_fcs(os.path.join(FCS_DATA, rel))
    assert [str(w.message) for w in caught] == []
    assert [r.getMessage() for r in caplog.records if r.levelno >= logging.WARNING] == []


def test_log_amplified_integer_channel_by_hand():
    # reference: FCS 3.1 $PnE: fcsparser's FCS 3.0 integer file with log amplifiers has
    # $P4E/4.0,1.0/, $P4R/1024, 24-bit big-endian ints
    path = pick(version="FCS3.0", datatype="I", log_amplified=True)
    ef = read_fcs(path)
    assert ef.keywords["$P4E"] == "4.0,1.0" and ef.keywords["$BYTEORD"] == "4,3,2,1"
    with open(path, "rb") as handle:
        blob = handle.read()
    start = int(blob[26:34])  # HEADER data start, FCS 3.1 section 3.1
    first = blob[start:start + 24]  # first event: 8 channels x 3 bytes, big-endian
    fl1 = int.from_bytes(first[9:12], "big") & 1023  # $P4R = 1024 -> 10 bits
    assert ef.data[0, 3] == pytest.approx(1.0 * 10 ** (4.0 * fl1 / 1024), rel=1e-12)
    # linear channels are untouched integers
    assert ef.data[0, 1] == (int.from_bytes(first[3:6], "big") & 1023)
    assert ef.channel_ranges[3] == pytest.approx(10 ** 4.0)  # f2 * 10^f1


def test_log_channel_writing_f2_zero_is_read_as_one():
    # the FCS 2.0 integer file of 37,395 events: $P1E/4,0/ -> f2 = 0 means 1 (common practice)
    path = pick(version="FCS2.0", datatype="I", events=37395)
    meta, raw = _fcsparser_raw(path)
    ef = read_fcs(path)
    assert ef.keywords["$P1E"] == "4,0"
    np.testing.assert_allclose(ef.data[:, 0], 10.0 ** (4 * raw[:, 0] / 1024), rtol=1e-12)
    assert ef.data[:, 0].min() >= 1.0  # 10^0 at channel 0, never 0 * ...


def test_bitmask_file_values():
    # the FCS 2.0 integer file of 50,000 events x 7 channels stores 0x4210 in every 16-bit
    # field with $PnR 1024.
    # reference: FCS 3.1 $PnB/$PnR: only the ceil(log2($PnR)) = 10 low bits carry the value,
    # so the raw channel is 0x4210 & 0x3FF = 528 (fcsparser's own test expects 528 too).
    path = pick(version="FCS2.0", datatype="I", events=50000)
    with open(path, "rb") as handle:
        blob = handle.read()
    start, end = int(blob[26:34]), int(blob[34:42])
    stored = np.frombuffer(blob[start:end + 1], dtype="<u2").reshape(-1, 7)  # $BYTEORD 1,2
    masked = stored & 1023
    assert np.all(masked == 528)
    ef = read_fcs(path)
    # FS INT LIN: linear, $P1G 2 -> 528 / 2; SS INT LIN: $P2G 10 -> 52.8
    assert np.all(ef.data[:, 0] == 264.0)
    assert np.allclose(ef.data[:, 1], 52.8, rtol=1e-15)
    # FL1..FL5 INT LOG: $PnE ' 4.0,0.1024' -> 0.1024 * 10^(4 * 528 / 1024)
    assert np.allclose(ef.data[:, 2:], 0.1024 * 10 ** (4 * 528 / 1024), rtol=1e-12)
    assert ef.channel_ranges.tolist() == pytest.approx([512.0, 102.4, 1024, 1024, 1024, 1024, 1024])


def test_float_channels_with_log_pne_are_kept_as_stored():
    # the FCS 3.0 float file of 108 events: its *HLog channels carry $PnE 4.0,1.0; FCS 3.1 wants
    # 0,0 on float data, and the stored values are already log10 of the linear channel (checked here).
    path = pick(datatype="F", log_amplified=True)
    meta, raw = _fcsparser_raw(path)  # fcsparser reads the first data set by default
    ef = read_fcs(path)
    j_log, j_lin = ef.channel_index("FSC-HLog"), ef.channel_index("FSC-HLin")
    assert np.array_equal(ef.data[:, j_log], raw[:, j_log])
    positive = raw[:, j_lin] > 0
    np.testing.assert_allclose(raw[positive, j_log], np.log10(raw[positive, j_lin]), atol=1e-4)
    # the linear channel is divided by its gain ($P1G 2.95)
    np.testing.assert_allclose(ef.data[:, j_lin], raw[:, j_lin] / 2.95, rtol=1e-12)
    assert any("first one" in n for n in ef.notes)  # more than one data set


def test_time_channel_gain_is_not_applied():
    # the FCS 3.0 float file of 83,411 events: Time has $P1G 0.01; a gain on time is
    # meaningless (common practice)
    path = pick(datatype="F", events=83411)
    meta, raw = _fcsparser_raw(path)
    ef = read_fcs(path)
    assert ef.keywords["$P1G"] == "0.01" and ef.channel_names[0] == "Time"
    assert np.array_equal(ef.data[:, 0], raw[:, 0])


def test_non_utf8_text_segment_decodes_as_latin1():
    path = pick(version="FCS2.0", datatype="I", events=37395)
    with open(path, "rb") as handle:
        blob = handle.read()
    ef = read_fcs(path)
    creator = ef.keywords["CREATOR"]
    # its CREATOR holds byte 0xAA, not valid UTF-8 on its own;
    # reference: ISO 8859-1 maps byte 0xAA to U+00AA, so the text encodes back to the file's bytes
    assert "\u00aa" in creator and creator.encode("latin-1") in blob and b"\xaa" in creator.encode("latin-1")
    assert any("Latin-1" in n for n in ef.notes)
    assert all(isinstance(k, str) and isinstance(v, str) for k, v in ef.keywords.items())


def test_repeated_keyword_and_escaped_delimiter_in_bundled_file():
    # the FCS 3.1 file of 8,129 events x 9 channels repeats $VOL and writes 'GFP//FITC-A'
    # (escaped '/')
    path = pick(version="FCS3.1", events=8129)
    ef = read_fcs(path)
    assert ef.keywords["$VOL"] == "20083"
    assert ef.channel_labels[7] == "GFP/FITC-A"  # reference: FCS 3.1 delimiter doubling
    assert ef.keywords["$P8F"] == "525//50 nm"
    assert len(set(ef.channel_names)) == ef.n_channels == 9


def test_duplicate_channel_names_are_kept_and_renamed(tmp_path):
    path = tmp_path / "dup.fcs"
    data = np.arange(30, dtype=np.float64).reshape(10, 3)
    write_fcs(path, data, ["FSC-A", "CD3", "CD4"], channel_labels=["", "T cells", "helper"])
    blob = path.read_bytes()
    assert blob.count(b"/CD4/") == 1
    path.write_bytes(blob.replace(b"/CD4/", b"/CD3/"))  # same length: offsets stay valid
    # fcsparser itself keeps all three columns
    _, raw = _fcsparser_raw(str(path))
    assert raw.shape == (10, 3)

    ef = read_fcs(path)
    assert ef.channel_names == ["FSC-A", "CD3", "CD3 (2)"]
    assert ef.keywords["$P2N"] == ef.keywords["$P3N"] == "CD3"  # originals kept
    assert np.array_equal(ef.data, data)  # nothing lost, columns in order
    assert ef.channel_index("CD3") == 1 and ef.channel_index("CD3 (2)") == 2
    assert any("CD3 (2)" in n for n in ef.notes)


def test_channel_index_by_name_label_and_case(tmp_path):
    path = tmp_path / "idx.fcs"
    write_fcs(path, np.ones((4, 3)), ["FL1-A", "FL2-A", "FL3-A"],
              channel_labels=["CD3", "CD8", "CD8"])
    ef = read_fcs(path)
    assert ef.channel_index("FL2-A") == 1
    assert ef.channel_index("CD3") == 0
    assert ef.channel_index("fl3-a") == 2
    with pytest.raises(ChannelError) as info:
        ef.channel_index("CD8")  # two channels carry that label
    assert "FL2-A" in str(info.value) and "FL3-A" in str(info.value)
    with pytest.raises(ChannelError) as info:
        ef.channel_index("CD45")
    assert "CD45" in str(info.value) and "FL1-A" in str(info.value)


def test_missing_range_falls_back_to_the_largest_value(tmp_path):
    # FCS 3.1 requires $PnR; a float file without it stays readable (range = largest value)
    path = tmp_path / "norange.fcs"
    data = np.array([[1.0, 5.0], [2.0, 700.5], [3.0, np.float32(-4.0)]])
    write_fcs(path, data, ["A", "B"], channel_ranges=[1024, 1024])
    blob = path.read_bytes()
    path.write_bytes(blob.replace(b"/$P2R/", b"/$P2Q/"))  # same length: offsets stay valid
    ef = read_fcs(path)
    assert "$P2R" not in ef.keywords
    assert ef.channel_ranges.tolist() == [1024.0, 700.5]
    assert any("no usable $PnR" in n for n in ef.notes)
