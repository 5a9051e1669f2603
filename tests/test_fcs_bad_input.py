"""read_fcs on damaged input: every case raises FcsFileError naming the file in plain words.

The damaged files are made here: written by write_fcs, then bytes are changed.
reference: FCS 3.1 section 3.1 (HEADER offsets) and section 3.2 ($TOT, $PAR, $PnB,
$DATATYPE, $BYTEORD, $MODE required keywords) for what makes each file wrong.
"""

from __future__ import annotations

import os
import tracemalloc

import numpy as np
import pytest

from core.errors import FcsFileError
from core.fcs import read_fcs, write_fcs

PAD = "x" * 60


def _good_file(folder, name="good.fcs", n=1000, p=3, seed=0) -> tuple:
    rng = np.random.default_rng(seed)
    data = rng.normal(500.0, 100.0, size=(n, p))
    path = os.path.join(folder, name)
    write_fcs(path, data, [f"FL{j + 1}-A" for j in range(p)], keywords={"PAD": PAD})
    return path, data


def _text_span(blob: bytes) -> tuple:
    return int(blob[10:18]), int(blob[18:26])  # FCS 3.1 section 3.1 HEADER fields


def _patch_text(blob: bytes, old: str, new: str) -> bytes:
    """Replace `old` by `new` inside TEXT, shortening/lengthening PAD so offsets stay valid."""
    start, end = _text_span(blob)
    text = blob[start:end + 1].decode("utf-8")
    assert text.count(old) == 1, old
    grow = len(new) - len(old)
    assert grow < len(PAD)
    text = text.replace(old, new).replace(PAD, "x" * (len(PAD) - grow))
    patched = text.encode("utf-8")
    assert len(patched) == end - start + 1
    return blob[:start] + patched + blob[end + 1:]


def _damaged(tmp_path, old, new, name="damaged.fcs"):
    path, _ = _good_file(str(tmp_path), "source.fcs")
    blob = open(path, "rb").read()
    out = tmp_path / name
    out.write_bytes(_patch_text(blob, old, new))
    return out


def _raises(path, *words):
    with pytest.raises(FcsFileError) as info:
        read_fcs(path)
    message = str(info.value)
    assert os.path.basename(str(path)) in message, message
    for w in words:
        assert w in message, message
    return message


def test_the_undamaged_file_reads(tmp_path):
    path, data = _good_file(str(tmp_path))
    ef = read_fcs(path)
    assert np.array_equal(ef.data, data.astype(np.float32))
    # the patch helper itself keeps a file readable when nothing meaningful changes
    same = tmp_path / "same.fcs"
    same.write_bytes(_patch_text(open(path, "rb").read(), "/FL1-A/", "/FL9-A/"))
    assert read_fcs(same).channel_names[0] == "FL9-A"


def test_empty_file(tmp_path):
    path = tmp_path / "empty.fcs"
    path.write_bytes(b"")
    _raises(path, "empty")


def test_random_bytes(tmp_path):
    path = tmp_path / "noise.fcs"
    path.write_bytes(np.random.default_rng(3).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    _raises(path, "not an FCS file")


def test_fcs_magic_with_garbage_offsets(tmp_path):
    path = tmp_path / "garbage.fcs"
    path.write_bytes(b"FCS3.1    " + b"abcdefgh" * 6 + b"\x00" * 500)
    _raises(path, "HEADER is damaged")


def test_file_shorter_than_a_header(tmp_path):
    path = tmp_path / "stub.fcs"
    path.write_bytes(b"FCS3.1         58")
    _raises(path, "only 17 bytes")


def test_unknown_version(tmp_path):
    path, _ = _good_file(str(tmp_path))
    blob = open(path, "rb").read()
    out = tmp_path / "v9.fcs"
    out.write_bytes(b"FCS9.9" + blob[6:])
    _raises(out, "FCS9.9", "not supported")


def test_truncated_data_segment(tmp_path):
    path, _ = _good_file(str(tmp_path))
    blob = open(path, "rb").read()
    out = tmp_path / "cut.fcs"
    out.write_bytes(blob[:-100])
    _raises(out, "truncated")


def test_truncated_text_segment(tmp_path):
    path, _ = _good_file(str(tmp_path))
    blob = open(path, "rb").read()
    out = tmp_path / "cut_text.fcs"
    out.write_bytes(blob[:300])
    _raises(out, "truncated", "TEXT")


def test_tot_larger_than_the_data(tmp_path):
    # $TOT 1000 -> 1500: the file cannot hold the announced events
    _raises(_damaged(tmp_path, "/$TOT/1000/", "/$TOT/1500/"), "1500 events", "truncated")


def test_tot_smaller_than_the_data(tmp_path):
    # $TOT 1000 -> 0900: DATA holds 100 events more than announced
    _raises(_damaged(tmp_path, "/$TOT/1000/", "/$TOT/0900/"), "disagree", "900 events")


def test_par_inconsistent_with_the_data(tmp_path):
    _raises(_damaged(tmp_path, "/$PAR/3/", "/$PAR/2/"), "disagree")


def test_header_claiming_billions_of_events_is_refused_before_allocating(tmp_path):
    path = _damaged(tmp_path, "/$TOT/1000/", "/$TOT/4000000000/")  # 48 GB of float32
    tracemalloc.start()
    try:
        message = _raises(path, "4000000000 events", "truncated")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 5_000_000, peak  # nothing near the announced size was allocated
    assert "48 GB" in message  # 4e9 events x 3 channels x 4 bytes


def test_missing_required_keyword(tmp_path):
    _raises(_damaged(tmp_path, "/$PAR/3/", "/$PAX/3/"), "lacks the required keyword $PAR")


def test_non_numeric_event_count(tmp_path):
    _raises(_damaged(tmp_path, "/$TOT/1000/", "/$TOT/1k00/"), "$TOT", "whole number")


def test_unsupported_datatype(tmp_path):
    _raises(_damaged(tmp_path, "/$DATATYPE/F/", "/$DATATYPE/A/"), "$DATATYPE", "not supported")


def test_unsupported_byte_order(tmp_path):
    _raises(_damaged(tmp_path, "/$BYTEORD/1,2,3,4/", "/$BYTEORD/3,4,1,2/"), "3,4,1,2",
            "not supported")


def test_non_list_mode(tmp_path):
    _raises(_damaged(tmp_path, "/$MODE/L/", "/$MODE/C/"), "list mode")


def test_bits_inconsistent_with_float_type(tmp_path):
    _raises(_damaged(tmp_path, "/$P2B/32/", "/$P2B/16/"), "$P2B", "needs 32")


def test_nan_and_inf_in_a_float_file_are_loaded(tmp_path):
    # our writer refuses NaN, so write sentinels and swap their bytes for NaN / inf
    rng = np.random.default_rng(5)
    data = rng.normal(100, 10, size=(50, 3))
    data[4, 1] = 1234.5
    data[9, 2] = 2345.5
    data[20, 0] = 3456.5
    path = tmp_path / "nonfinite.fcs"
    write_fcs(path, data, ["A", "B", "C"])
    blob = path.read_bytes()
    for sentinel, bad in ((1234.5, np.nan), (2345.5, np.inf), (3456.5, -np.inf)):
        old = np.float32(sentinel).tobytes()  # little-endian, FCS $BYTEORD/1,2,3,4/
        assert blob.count(old) == 1
        blob = blob.replace(old, np.float32(bad).tobytes())
    path.write_bytes(blob)
    ef = read_fcs(path)
    # reference: IEEE 754 binary32 NaN / inf bit patterns read back as NaN / inf
    assert np.isnan(ef.data[4, 1]) and ef.data[9, 2] == np.inf and ef.data[20, 0] == -np.inf
    assert np.isfinite(ef.data).sum() == ef.data.size - 3
    assert any("3 events" in n and "non-finite" in n for n in ef.notes)


def test_path_with_spaces_and_non_ascii_letters(tmp_path):
    folder = tmp_path / "Messungen März"
    folder.mkdir()
    path, data = _good_file(str(folder), name="Probe ä ñ 1.fcs")
    ef = read_fcs(path)
    assert ef.path == path and np.array_equal(ef.data, data.astype(np.float32))
    broken = folder / "Probe ø 2.fcs"
    broken.write_bytes(b"not cytometry")
    _raises(broken, "Probe ø 2.fcs")


def test_folder_instead_of_file(tmp_path):
    _raises(tmp_path, "folder")


def test_missing_file(tmp_path):
    _raises(tmp_path / "absent.fcs", "no such file")


def test_reading_never_modifies_the_input(tmp_path):
    path, _ = _good_file(str(tmp_path))
    os.chmod(path, 0o444)
    before = (open(path, "rb").read(), os.stat(path).st_mtime_ns)
    read_fcs(path)
    assert (open(path, "rb").read(), os.stat(path).st_mtime_ns) == before
