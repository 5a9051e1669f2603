"""Export: FCS files read back by fcsparser (reference), CSV read back by pandas,
provenance keywords, refusal to overwrite inputs, and failed writes that leave
nothing behind (meaningful as root: missing folders and a real OS write limit)."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import textwrap
import warnings

import fcsparser
import numpy as np
import pandas as pd
import pytest

from core import RESEARCH_USE_NOTE, __version__
from core.errors import ExportError
from core.export import export_events_csv, export_events_fcs
from core.fcs import read_fcs, write_fcs
from tests.bundled_files import bundled, pick

DATA = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data", "FlowCytometers")
# fcsparser's files chosen by what they are (tests/bundled_files.py): the FCS 3.1 float file of
# 10,000 events x 19 channels whose Time range is 25.6708, and the smaller of the two FCS 3.0
# float files of 11,585 events x 11 channels with a spillover matrix
FLOAT_31 = pick(version="FCS3.1", events=10000, size=lambda b: 887600 < b < 887650)
WITH_SPILL = pick(version="FCS3.0", events=11585, size=lambda b: b == min(
    f["size"] for f in bundled() if f["events"] == 11585))
REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _parse(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fcsparser.parse(path, reformat_meta=False, channel_naming="$PnN")


def _sha(path):
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def _spillover_numbers(text):
    """reference: FCS 3.1 $SPILLOVER layout: n, n detector names, n*n values row by row."""
    tokens = [t.strip() for t in text.split(",")]
    k = int(tokens[0])
    return tokens[1:1 + k], np.array([float(v) for v in tokens[1 + k:]]).reshape(k, k)


def _synthetic_source(folder, n=300, seed=0, name="source.fcs"):
    rng = np.random.default_rng(seed)
    data = np.c_[rng.uniform(0, 1000, n), rng.normal(100, 30, n), rng.integers(0, 1024, n)]
    path = os.path.join(folder, name)
    write_fcs(path, data, ["FSC-A", "FL1-A", "FL2-A"], channel_labels=["", "CD3", "CD4"],
              keywords={"$SPILLOVER": "2,FL1-A,FL2-A,1,0.1,0.02,1"})
    return read_fcs(path)


# ---------------------------------------------------------------------------
# FCS
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("source", [FLOAT_31, WITH_SPILL], ids=["fcs3.1-float", "fcs3.0-spill"])
def test_fcs_export_reads_back_with_fcsparser(source, tmp_path):
    before = _sha(source)
    ef = read_fcs(source)
    ref_meta, ref_df = _parse(source)
    rng = np.random.default_rng(1)
    mask = rng.random(ef.n_events) < 0.2
    log_density = rng.normal(-5, 2, ef.n_events)
    rarity = rng.uniform(0, 100, ef.n_events)
    region = (rng.random(ef.n_events) < 0.5)
    out = export_events_fcs(tmp_path / "out.fcs", ef, mask,
                            {"log density": log_density, "rarity percentile": rarity, "region: R1": region},
                            "0123456789abcdef")
    assert out == str(tmp_path / "out.fcs")
    meta, df = _parse(out)
    n_ch = ef.n_channels
    # reference: fcsparser reads the exported file; values are float32 ($DATATYPE F, FCS 3.1)
    assert int(meta["$TOT"]) == mask.sum() and int(meta["$PAR"]) == n_ch + 3
    assert list(df.columns) == ef.channel_names + ["log density", "rarity percentile", "region: R1"]
    got = df.to_numpy()
    np.testing.assert_array_equal(got[:, :n_ch], ef.data[mask].astype(np.float32))
    # the original raw values as fcsparser reads the source itself, where no $PnG gain rescales them
    for j, name in enumerate(ef.channel_names):
        gain = ref_meta.get(f"$P{j + 1}G")
        if gain is None or float(gain) == 1.0:
            np.testing.assert_array_equal(got[:, j], ref_df.iloc[:, j].to_numpy()[mask].astype(np.float32))
    np.testing.assert_array_equal(got[:, n_ch], log_density[mask].astype(np.float32))
    np.testing.assert_array_equal(got[:, n_ch + 1], rarity[mask].astype(np.float32))
    np.testing.assert_array_equal(got[:, n_ch + 2], region[mask].astype(np.float32))
    for j, label in enumerate(ef.channel_labels):
        if label:
            assert meta[f"$P{j + 1}S"] == label
    # provenance keywords
    assert meta["BOSCAGE_SOURCE"] == os.path.basename(source)
    assert meta["BOSCAGE_RECIPE"] == "0123456789abcdef"
    assert meta["BOSCAGE_VERSION"] == __version__
    assert meta["BOSCAGE_CAUTION"] == RESEARCH_USE_NOTE
    assert RESEARCH_USE_NOTE in meta["$COM"]
    src_spill = next(ref_meta[k] for k in ("$SPILLOVER", "SPILL") if k in ref_meta)
    try:
        names, matrix = _spillover_numbers(src_spill)
        well_formed = True
    except ValueError:
        well_formed = False
    if well_formed:
        names2, matrix2 = _spillover_numbers(meta["$SPILLOVER"])
        assert names2 == names
        np.testing.assert_array_equal(matrix2, matrix)
    else:  # a malformed source matrix is carried as written
        assert meta["$SPILLOVER"] == src_spill
    assert _sha(source) == before  # the input file is untouched


def test_nonfinite_events_left_out_and_counted(tmp_path):
    ef = _synthetic_source(str(tmp_path))
    ef.data = ef.data.copy()
    ef.data[3, 1] = np.nan
    ef.data[4, 2] = np.inf
    mask = np.zeros(ef.n_events, bool)
    mask[:10] = True
    out = export_events_fcs(tmp_path / "out.fcs", ef, mask, {}, "d")
    meta, df = _parse(out)
    assert int(meta["$TOT"]) == 8 and meta["BOSCAGE_NONFINITE"] == "2"
    keep = mask.copy()
    keep[[3, 4]] = False
    np.testing.assert_array_equal(df.to_numpy(), ef.data[keep].astype(np.float32))


def test_missing_values_in_added_columns(tmp_path):
    ef = _synthetic_source(str(tmp_path))
    ld = np.linspace(-3, 3, ef.n_events)
    ld[[0, 5]] = np.nan
    with pytest.raises(ExportError, match="'log density'.*NaN.*2 selected"):
        export_events_fcs(tmp_path / "a.fcs", ef, None, {"log density": ld}, "d")
    assert not (tmp_path / "a.fcs").exists()
    out = export_events_fcs(tmp_path / "a.fcs", ef, None, {"log density": ld}, "d", missing_value=-999.0)
    meta, df = _parse(out)
    assert df["log density"].iloc[0] == -999.0 and df["log density"].iloc[5] == -999.0
    assert float(meta["BOSCAGE_MISSING"]) == -999.0
    with pytest.raises(ExportError, match="name of another column"):
        export_events_fcs(tmp_path / "b.fcs", ef, None, {"FL1-A": ld}, "d", missing_value=0.0)
    with pytest.raises(ExportError, match="one value per event"):
        export_events_fcs(tmp_path / "b.fcs", ef, None, {"x": ld[:-1]}, "d")
    with pytest.raises(ExportError, match="true/false"):
        export_events_fcs(tmp_path / "b.fcs", ef, np.arange(ef.n_events), {}, "d")
    assert sorted(os.listdir(tmp_path)) == ["a.fcs", "source.fcs"]


def test_empty_selection_writes_a_file_without_events(tmp_path):
    ef = _synthetic_source(str(tmp_path))
    out = export_events_fcs(tmp_path / "none.fcs", ef, np.zeros(ef.n_events, bool), {"x": np.ones(ef.n_events)}, "d")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        meta = fcsparser.parse(out, meta_data_only=True, reformat_meta=False)
    assert int(meta["$TOT"]) == 0 and int(meta["$PAR"]) == 4  # reference: fcsparser reads the TEXT segment


def test_never_overwrites_the_input(tmp_path):
    ef = _synthetic_source(str(tmp_path))
    before = _sha(ef.path)
    with pytest.raises(ExportError, match="input file"):
        export_events_fcs(ef.path, ef, None, {}, "d", overwrite=True)
    link = tmp_path / "link.fcs"
    os.symlink(ef.path, link)
    with pytest.raises(ExportError, match="input file"):
        export_events_fcs(link, ef, None, {}, "d", overwrite=True)
    with pytest.raises(ExportError, match="input file"):
        export_events_csv(str(tmp_path / "sub" / ".." / "source.fcs"), ef.channel_names, ef.data, None, {},
                          overwrite=True, source_paths=[ef.path])
    assert _sha(ef.path) == before
    # an existing non-input target needs overwrite=True
    out = export_events_fcs(tmp_path / "out.fcs", ef, None, {}, "d")
    with pytest.raises(ExportError, match="exists already"):
        export_events_fcs(out, ef, None, {}, "d")
    export_events_fcs(out, ef, ef.data[:, 0] > 500, {}, "d", overwrite=True)
    assert int(_parse(out)[0]["$TOT"]) == int((ef.data[:, 0] > 500).sum())


@pytest.mark.parametrize("kind", ["fcs", "csv"])
def test_missing_or_blocked_folder_leaves_nothing(kind, tmp_path):
    ef = _synthetic_source(str(tmp_path))
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    listing = sorted(os.listdir(tmp_path))
    # a folder that does not exist, and a "folder" that is a regular file (fails even as root)
    for target in (tmp_path / "no-such-folder" / "out", blocker / "out"):
        with pytest.raises(ExportError):
            if kind == "fcs":
                export_events_fcs(f"{target}.fcs", ef, None, {}, "d")
            else:
                export_events_csv(f"{target}.csv", ef.channel_names, ef.data, None, {})
    assert sorted(os.listdir(tmp_path)) == listing


@pytest.mark.parametrize("kind", ["fcs", "csv"])
def test_write_failure_mid_file_leaves_nothing(kind, tmp_path):
    """A real OS write error (file-size limit, RLIMIT_FSIZE: enforced for root too) in a child process."""
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    script = textwrap.dedent(f"""
        import resource, signal, sys
        import numpy as np
        from core.errors import ExportError
        from core.export import export_events_csv, export_events_fcs
        from types import SimpleNamespace
        data = np.random.default_rng(0).normal(size=(20000, 4))
        names = ["A", "B", "C", "D"]
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (16384, resource.getrlimit(resource.RLIMIT_FSIZE)[1]))
        try:
            if {kind!r} == "fcs":
                ef = SimpleNamespace(path="/nonexistent/src.fcs", data=data, channel_names=names,
                                     channel_labels=[""] * 4, channel_ranges=np.full(4, 10.0), keywords={{}})
                export_events_fcs({str(out_dir / 'big.fcs')!r}, ef, None, {{}}, "d")
            else:
                export_events_csv({str(out_dir / 'big.csv')!r}, names, data, None, {{}})
        except ExportError as exc:
            print("EXPORT-ERROR", exc)
            sys.exit(3)
        sys.exit(0)
    """)
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1", PYTHONPATH=REPO)
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env,
                          cwd=REPO, timeout=120)
    assert proc.returncode == 3, proc.stdout + proc.stderr
    assert "EXPORT-ERROR" in proc.stdout and "writing failed" in proc.stdout
    assert os.listdir(out_dir) == []  # no partial file, no temporary file


# ---------------------------------------------------------------------------
# CSV
# ---------------------------------------------------------------------------

def test_csv_reads_back_with_pandas(tmp_path):
    rng = np.random.default_rng(2)
    values = rng.normal(size=(500, 3)) * [1.0, 1e-7, 1e6]
    values[7, 1] = np.nan
    mask = rng.random(500) < 0.6
    names = ["FSC-A", "CD3, FITC", 'PE "A"']
    region = rng.random(500) < 0.3
    ld = rng.normal(size=500)
    out = export_events_csv(tmp_path / "e.csv", names, values, mask,
                            {"log density": ld, "region: R 1": region})
    with open(out, encoding="utf-8") as fh:
        first = fh.readline()
    assert first.startswith("# ") and RESEARCH_USE_NOTE in first
    # reference: pandas.read_csv (float_precision="round_trip": exact float64 parsing)
    df = pd.read_csv(out, skiprows=1, float_precision="round_trip")
    assert list(df.columns) == names + ["log density", "region: R 1"]
    np.testing.assert_array_equal(df[names].to_numpy(), values[mask])  # exact float64 round trip
    np.testing.assert_array_equal(df["log density"].to_numpy(), ld[mask])
    np.testing.assert_array_equal(df["region: R 1"].to_numpy(), region[mask].astype(int))
    assert len(df) == mask.sum()
    plain = export_events_csv(tmp_path / "p.csv", names, values, None, None, caution=False)
    df2 = pd.read_csv(plain)
    assert len(df2) == 500 and list(df2.columns) == names


def test_csv_checks_its_arguments(tmp_path):
    v = np.zeros((4, 2))
    with pytest.raises(ExportError, match="2 columns"):
        export_events_csv(tmp_path / "x.csv", ["a"], v, None, None)
    with pytest.raises(ExportError, match="repeat"):
        export_events_csv(tmp_path / "x.csv", ["a", "a"], v, None, None)
    with pytest.raises(ExportError, match="4 events"):
        export_events_csv(tmp_path / "x.csv", ["a", "b"], v, np.ones(3, bool), None)
    assert os.listdir(tmp_path) == []
