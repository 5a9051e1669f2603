"""One recipe over a folder (core/batch/): summary rows, exit codes, exports, re-runs.

Exported files are read back with fcsparser (reference) and compared with the
source file's raw values; the summary CSV is read back with pandas.
"""

import io
import json
import os

import fcsparser
import numpy as np
import pandas as pd
import pytest

from core import RESEARCH_USE_NOTE
from core.analysis import analyse
from core.batch import DONE_NAME, TerminalProgress, file_out_dir, main, run_batch
from core.errors import EventDataError
from core.fcs import read_fcs, write_fcs
from core.recipe import Recipe, load_recipe

CHANNELS = ["FSC-A", "SSC-A", "CD3", "CD4", "CD8", "Time"]
MARKERS = ["CD3", "CD4", "CD8"]
RANGE = 262144.0
# a light engine (one layer of few trees on a Gaussian-mixture base): every check here compares
# the batch with the same analysis run another way, so the engine's quality is not what is tested
SMALL_ENGINE = {"n_trees": 10, "marginal_trees": 5, "patience": 3, "n_layers": 1, "base": "gmm",
                "random_state": 0}


def make_events(n, seed, names=CHANNELS):
    """Synthetic raw events: two marker populations, a small rare one, 5 saturated events."""
    rng = np.random.default_rng(seed)
    fsc = rng.normal(60_000, 8_000, n)
    ssc = rng.normal(30_000, 6_000, n)
    pop = rng.random(n) < 0.6
    cd3 = np.where(pop, rng.lognormal(8.0, 0.3, n), rng.lognormal(5.0, 0.5, n))
    cd4 = np.where(pop, rng.lognormal(7.0, 0.4, n), rng.lognormal(4.0, 0.6, n))
    cd8 = rng.lognormal(5.5, 0.5, n)
    rare = slice(0, max(3, n // 500))
    cd8[rare] = rng.lognormal(10.5, 0.1, cd8[rare].shape[0])
    time_ = np.sort(rng.uniform(0, 1000, n))
    data = np.column_stack([fsc, ssc, cd3, cd4, cd8, time_])
    data[-5:, 2] = RANGE  # saturated in CD3
    return np.round(data).astype(np.float64)


def write_events(path, n=3000, seed=0, names=CHANNELS):
    write_fcs(str(path), make_events(n, seed), list(names), channel_ranges=[RANGE] * len(names))


def small_recipe(**changes):
    d = dict(channels=MARKERS, transforms={c: {"kind": "arcsinh", "cofactor": 150.0} for c in MARKERS},
             engine=dict(SMALL_ENGINE),
             regions=[{"name": "CD3 high", "kind": "rectangle", "channels": ["CD3", "CD4"],
                       "x": [3.5, 10.0], "y": [-5.0, 10.0],
                       "transforms": {"CD3": {"kind": "arcsinh", "cofactor": 150.0},
                                      "CD4": {"kind": "arcsinh", "cofactor": 150.0}}}])
    d.update(changes)
    return Recipe(**d)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    base = tmp_path_factory.mktemp("batch")
    inp = base / "in"
    inp.mkdir()
    write_events(inp / "a good.fcs", seed=1)
    good = (inp / "a good.fcs").read_bytes()
    (inp / "b corrupt.fcs").write_bytes(good[: len(good) // 3])        # truncated DATA
    (inp / "c empty.fcs").write_bytes(b"")
    write_events(inp / "d other channels.fcs", seed=2,
                 names=["FSC-A", "SSC-A", "FITC-A", "PE-A", "APC-A", "Time"])
    (inp / "notes.txt").write_text("not an FCS file; the batch ignores it")
    recipe_path = base / "recipe.json"
    from core.recipe import save_recipe
    save_recipe(small_recipe(), str(recipe_path))
    return base, inp, recipe_path


@pytest.fixture(scope="module")
def first_run(folder):
    base, inp, recipe_path = folder
    out = base / "out"
    err = io.StringIO()
    import contextlib
    with contextlib.redirect_stderr(err):
        code = main([str(inp), "--out", str(out), "--recipe", str(recipe_path), "--workers", "1"])
    return out, code, err.getvalue()


def test_summary_rows_statuses_and_exit_code(first_run):
    out, code, err = first_run
    assert code == 1  # one file failed -> 1
    summary = pd.read_csv(out / "summary.csv", keep_default_na=False)
    assert list(summary["file"]) == ["a good.fcs", "b corrupt.fcs", "c empty.fcs", "d other channels.fcs"]
    by = summary.set_index("file")
    assert by.loc["a good.fcs", "status"] == "ok"
    for bad in ["b corrupt.fcs", "c empty.fcs", "d other channels.fcs"]:
        assert by.loc[bad, "status"] == "error"
        assert bad in by.loc[bad, "message"]
    assert "CD3" in by.loc["d other channels.fcs", "message"]  # names the missing channel
    for col in ["events", "events_kept", "rare_events", "rare_percent", "region:CD3 high",
                "heldout_loglik", "seconds", "message"]:
        assert col in summary.columns
    good = by.loc["a good.fcs"]
    assert int(good["events"]) == 3000
    assert int(good["events_kept"]) == 2995  # the 5 saturated events are removed
    # ... and counted by reason in summary.csv (core.prepare.REASONS)
    assert int(good["set_aside_saturated"]) == 5
    assert int(good["set_aside_floor_pile"]) == int(good["set_aside_ceiling_pile"]) == 0
    assert int(good["set_aside_non_finite"]) == 0
    assert int(good["rare_events"]) == round(0.005 * 2995)
    assert "ETA" in err and "1 of 4 files ok" in err


def test_output_folder_has_readme_and_recipe(first_run, folder):
    out, _, _ = first_run
    readme = (out / "README.txt").read_text()
    assert RESEARCH_USE_NOTE in readme and "CD3 high" in readme
    assert load_recipe(str(out / "recipe.json")).to_dict() == load_recipe(str(folder[2])).to_dict()


def test_exports_hold_the_original_raw_values_of_the_selected_events(first_run, folder):
    out, _, _ = first_run
    _, inp, recipe_path = folder
    ef = read_fcs(str(inp / "a good.fcs"))
    an = analyse(ef, load_recipe(str(recipe_path)))  # same recipe and seed -> same selection
    sub = file_out_dir(str(out), str(inp / "a good.fcs"))
    summary = pd.read_csv(out / "summary.csv").set_index("file")
    assert int(summary.loc["a good.fcs", "rare_events"]) == an.n_rare
    assert int(summary.loc["a good.fcs", "region:CD3 high"]) == int(an.region_masks["CD3 high"].sum())
    for name, mask in [("a_good_rare.fcs", an.rare), ("a_good_region_CD3_high.fcs", an.region_masks["CD3 high"])]:
        # reference: fcsparser reads our export
        meta, df = fcsparser.parse(os.path.join(sub, name), reformat_meta=True)
        got = df[CHANNELS].to_numpy()
        np.testing.assert_array_equal(got, ef.data[mask].astype(np.float32))
        np.testing.assert_allclose(df["log density"].to_numpy(),
                                   np.where(an.reason == "", an.log_density, 0.0)[mask].astype(np.float32))
        assert meta["BOSCAGE_SOURCE"] == "a good.fcs"


def test_rerun_skips_finished_files_and_force_redoes_them(first_run, folder):
    out, _, _ = first_run
    _, inp, recipe_path = folder
    sub = file_out_dir(str(out), str(inp / "a good.fcs"))
    marker = os.path.join(sub, DONE_NAME)
    stamp = os.stat(marker).st_mtime_ns
    res = run_batch(str(inp), str(out), recipe=str(recipe_path), workers=1)
    assert res.n_skipped == 1 and os.stat(marker).st_mtime_ns == stamp
    assert res.exit_code == 1 and [r["status"] for r in res.rows] == ["ok", "error", "error", "error"]
    res = run_batch(str(inp), str(out), recipe=str(recipe_path), workers=1, force=True)
    assert res.n_skipped == 0 and os.stat(marker).st_mtime_ns != stamp
    # a changed recipe is not "finished": the file is redone
    res = run_batch(str(inp), str(out), recipe=small_recipe(rare={"rule": "share", "share": 0.01}), workers=1)
    assert res.n_skipped == 0 and res.rows[0]["rare_events"] == round(0.01 * 2995)


def test_all_good_gives_exit_0_and_bad_arguments_exit_2(tmp_path, capsys):
    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "x.fcs", n=1500, seed=3)
    from core.recipe import save_recipe
    save_recipe(small_recipe(regions=[]), str(tmp_path / "r.json"))
    assert main([str(inp), "--out", str(tmp_path / "o"), "--recipe", str(tmp_path / "r.json"),
                 "--workers", "1"]) == 0
    assert main([str(inp)]) == 2                                    # --out missing
    assert main([str(tmp_path / "nowhere"), "--out", str(tmp_path / "o2")]) == 2
    assert main([str(inp), "--out", str(tmp_path / "o3"), "--workers", "0"]) == 2
    assert main([str(inp), "--out", str(tmp_path / "o4"), "--recipe", str(tmp_path / "missing.json")]) == 2


def test_stop_keeps_finished_files_and_marks_the_rest(tmp_path):
    inp = tmp_path / "in"
    inp.mkdir()
    for k in range(3):
        write_events(inp / f"t{k}.fcs", n=1500, seed=10 + k)
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=small_recipe(regions=[]), workers=1,
                    progress=lambda step, total, row: step < 1)   # stop after the first file
    assert res.interrupted and res.exit_code == 130
    assert [r["status"] for r in res.rows] == ["ok", "cancelled", "cancelled"]
    assert os.path.exists(os.path.join(file_out_dir(str(tmp_path / "o"), "t0.fcs"), DONE_NAME))
    assert not any(n.endswith(".part") for _, _, fs in os.walk(tmp_path / "o") for n in fs)
    # the re-run finishes the rest and skips the first
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=small_recipe(regions=[]), workers=1)
    assert res.n_skipped == 1 and res.exit_code == 0


def test_default_recipe_from_first_readable_file(tmp_path):
    # worker processes are exercised by test_batch_with_a_control_prepares_it_once_and_workers_use_it
    inp = tmp_path / "in"
    inp.mkdir()
    (inp / "0 broken.fcs").write_bytes(b"FCS3.1    garbage")
    write_events(inp / "1.fcs", n=1500, seed=4)
    write_events(inp / "2.fcs", n=1500, seed=5)
    res = run_batch(str(inp), str(tmp_path / "o"), workers=1)
    assert [r["status"] for r in res.rows] == ["error", "ok", "ok"], [r.get("message") for r in res.rows]
    assert "CD3" in res.recipe.channels and "FSC-A" not in res.recipe.channels


@pytest.fixture(scope="module")
def dask_scheduler():
    """One in-process Dask cluster for the module's cluster tests (its start is the slow part)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=1, processes=False, dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def test_dask_scheduler_runs_the_same_task(tmp_path, dask_scheduler):
    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "x.fcs", n=1500, seed=6)
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=small_recipe(), scheduler=dask_scheduler)
    assert [r["status"] for r in res.rows] == ["ok"]
    local = run_batch(str(inp), str(tmp_path / "o2"), recipe=small_recipe(), workers=1)
    assert res.rows[0]["rare_events"] == local.rows[0]["rare_events"]
    assert res.rows[0]["heldout_loglik"] == local.rows[0]["heldout_loglik"]


def test_terminal_progress_prints_counts_and_eta():
    buf = io.StringIO()
    bar = TerminalProgress(buf)
    bar(1, 4, {"file": "a.fcs", "status": "ok"})
    bar(2, 4, {"file": "b.fcs", "status": "error"})
    text = buf.getvalue()
    assert "1/4 files" in text and "2/4 files, 1 failed" in text and "ETA" in text


# ---------------------------------------------------------------------------
# the control's part of the contrast is prepared once per batch
# ---------------------------------------------------------------------------

def write_control(path, n=3000, seed=50):
    """Events like make_events but without the small rare population (a control lacks it)."""
    data = make_events(n, seed)
    rng = np.random.default_rng(seed + 1)
    k = max(3, n // 500)
    data[:k, 4] = np.round(rng.lognormal(5.5, 0.5, k))
    write_fcs(str(path), data, list(CHANNELS), channel_ranges=[RANGE] * len(CHANNELS))


def write_treated(path, n, seed):
    """Events like make_events with a new CD8-bright population of 2.5 % (big enough to be found at a
    false discovery rate of 5 % against a 2,000-event control: see core.contrast)."""
    data = make_events(n, seed)
    rng = np.random.default_rng(seed + 2)
    data[: n // 40, 4] = np.round(rng.lognormal(10.5, 0.1, n // 40))
    write_fcs(str(path), data, list(CHANNELS), channel_ranges=[RANGE] * len(CHANNELS))


@pytest.fixture(scope="module")
def control_folder(tmp_path_factory):
    base = tmp_path_factory.mktemp("batch_control")
    inp = base / "in"
    inp.mkdir()
    write_treated(inp / "p1.fcs", n=1500, seed=21)
    write_treated(inp / "p2.fcs", n=2000, seed=22)
    write_control(base / "control one.fcs", n=2000, seed=50)
    write_control(base / "control two.fcs", n=2000, seed=60)
    recipe = small_recipe(regions=[])
    # reference: the existing per-file path, analyse() with the control FILE (refits the control)
    reference = {name: {c: analyse(str(inp / name), recipe, control=str(base / c)).contrast.count
                        for c in ("control one.fcs", "control two.fcs")}
                 for name in ("p1.fcs", "p2.fcs")}
    return base, inp, recipe, reference


def test_contrast_with_a_prepared_control_equals_the_contrast_with_the_control_values():
    # reference: contrast() given the control's values (the per-file path) on seeded normal events
    from core.contrast import contrast, prepare_control

    rng = np.random.default_rng(7)
    C = rng.normal(size=(1500, 3))
    C[5, 1] = np.nan                                   # dropped from the control like contrast() does
    T = np.vstack([rng.normal(size=(1200, 3)), rng.normal(4.0, 0.2, size=(30, 3))])
    engine = dict(SMALL_ENGINE)
    direct = contrast(T, C, engine=engine)
    pc = prepare_control(C, engine=engine)
    shared = contrast(T, None, engine=engine, prepared_control=pc)
    # the per-file result (control values given) is reproduced exactly
    np.testing.assert_array_equal(shared.score, direct.score)
    np.testing.assert_array_equal(shared.pvalue, direct.pvalue)
    np.testing.assert_array_equal(shared.qvalue, direct.qvalue)
    assert shared.threshold == direct.threshold and shared.count == direct.count > 0
    # every finite control event is in the reference, scored by the part model that did not see it
    assert shared.n_control == direct.n_control == pc.n_events == 1499
    assert shared.info["control_prepared"] is True and direct.info["control_prepared"] is False
    with pytest.raises(EventDataError, match="prepared control"):   # split settings must match
        contrast(T, None, engine=engine, prepared_control=pc, folds=4)


def test_batch_with_a_control_prepares_it_once_and_workers_use_it(control_folder, tmp_path):
    base, inp, recipe, reference = control_folder
    out = tmp_path / "o"
    ctrl = str(base / "control one.fcs")
    res = run_batch(str(inp), str(out), recipe=recipe, control=ctrl, workers=2)
    assert [r["status"] for r in res.rows] == ["ok", "ok"], res.rows
    assert res.info["workers"] == 2 and res.info["numba_threads"] >= 1
    assert res.info["control_prepared"] == "built"
    assert all(reference[n]["control one.fcs"] > 0 for n in ("p1.fcs", "p2.fcs"))  # something to compare
    # same enriched counts as the per-file analysis with the control file
    assert {r["file"]: r["enriched"] for r in res.rows} == {n: reference[n]["control one.fcs"]
                                                            for n in ("p1.fcs", "p2.fcs")}
    summary = pd.read_csv(out / "summary.csv").set_index("file")
    assert int(summary.loc["p2.fcs", "enriched"]) == reference["p2.fcs"]["control one.fcs"]
    # one control model for the whole batch, and each worker's task loaded that one
    folder = res.info["control_dir"]
    assert sorted(os.listdir(folder)) == ["control.json", "events.npz", "model-0.npz", "model-1.npz",
                                          "model-2.npz"]
    meta = json.loads(open(os.path.join(folder, "control.json"), encoding="utf-8").read())
    assert meta["control"] == os.path.abspath(ctrl)
    for name in ("p1.fcs", "p2.fcs"):
        with open(os.path.join(file_out_dir(str(out), name), DONE_NAME), encoding="utf-8") as fh:
            used = json.load(fh)["control_prepared"]
        assert used["folder"] == folder and used["sha256"] == meta["sha256"]


def test_control_is_fitted_once_per_batch_not_once_per_file(control_folder, tmp_path, monkeypatch):
    from core.density import AdditiveTreeDensity

    base, inp, recipe, reference = control_folder
    sizes = []
    real_fit = AdditiveTreeDensity.fit

    def counting_fit(self, X, *args, **kwargs):
        sizes.append(int(np.asarray(X).shape[0]))
        return real_fit(self, X, *args, **kwargs)

    monkeypatch.setattr(AdditiveTreeDensity, "fit", counting_fit)
    ctrl = str(base / "control two.fcs")
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=recipe, control=ctrl, workers=1)
    assert {r["file"]: r["enriched"] for r in res.rows} == {n: reference[n]["control two.fcs"]
                                                            for n in ("p1.fcs", "p2.fcs")}
    # the control keeps 1995 events after cleaning (5 saturated), split in 3 parts of 665:
    # its 3 part models (fitted first, before any file) see 2 parts each
    assert sizes[:3] == [1330] * 3
    # per file: its own model and 3 cross-fitted test densities, no control fit
    assert len(sizes) == 3 + 2 * (1 + 3)


def test_rerun_reuses_the_prepared_control_and_rebuilds_it_for_another_control(control_folder, tmp_path):
    from core.batch import CONTROL_DIR, load_prepared_control

    base, inp, recipe, reference = control_folder
    out = tmp_path / "o"
    one, two = str(base / "control one.fcs"), str(base / "control two.fcs")
    res = run_batch(str(inp), str(out), recipe=recipe, control=one, workers=1)
    folder = res.info["control_dir"]
    model = os.path.join(folder, "model-0.npz")
    stamp = os.stat(model).st_mtime_ns
    # one file to redo, same recipe and control: the prepared control is reused as it is
    os.unlink(os.path.join(file_out_dir(str(out), "p1.fcs"), DONE_NAME))
    res = run_batch(str(inp), str(out), recipe=recipe, control=one, workers=1)
    assert res.n_skipped == 1 and res.info["control_prepared"] == "reused"
    assert os.stat(model).st_mtime_ns == stamp
    assert res.rows[0]["enriched"] == reference["p1.fcs"]["control one.fcs"]
    # another control: every file is redone and the prepared control rebuilt for it
    res = run_batch(str(inp), str(out), recipe=recipe, control=two, workers=1)
    assert res.n_skipped == 0 and res.info["control_prepared"].startswith("rebuilt")
    assert "control" in res.info["control_prepared"]
    assert load_prepared_control(os.path.join(str(out), CONTROL_DIR)).source == os.path.abspath(two)
    assert [r["enriched"] for r in res.rows] == [reference[n]["control two.fcs"] for n in ("p1.fcs", "p2.fcs")]
    # the same control path with a new modification time counts as another control too
    os.utime(two, ns=(os.stat(two).st_atime_ns, os.stat(two).st_mtime_ns + 10**9))
    try:
        res = run_batch(str(inp), str(out), recipe=recipe, control=two, workers=1)
        assert res.n_skipped == 0 and res.info["control_prepared"].startswith("rebuilt")
        assert "source" in res.info["control_prepared"]
    finally:
        os.utime(two, ns=(os.stat(two).st_atime_ns, os.stat(two).st_mtime_ns - 10**9))


def test_damaged_prepared_control_gives_a_clear_error_and_is_rebuilt(control_folder, tmp_path):
    from core.batch import CONTROL_DIR, control_key, load_prepared_control, process_file
    from core.errors import ModelFileError
    from core.recipe import recipe_digest

    base, inp, recipe, reference = control_folder
    out = tmp_path / "o"
    one = str(base / "control one.fcs")
    run_batch(str(inp), str(out), recipe=recipe, control=one, workers=1)
    folder = os.path.join(str(out), CONTROL_DIR)
    key = control_key(one, recipe_digest(recipe))
    good = (tmp_path / "good.npz")
    good.write_bytes(open(os.path.join(folder, "model-0.npz"), "rb").read())
    for name, damage in [("model-0.npz", lambda b: b[: len(b) // 2]),
                         ("events.npz", lambda b: b[:-7] + b"garbage"),
                         ("control.json", lambda b: b"{not json")]:
        path = os.path.join(folder, name)
        original = open(path, "rb").read()
        with open(path, "wb") as fh:
            fh.write(damage(original))
        with pytest.raises(ModelFileError, match="prepared control"):
            load_prepared_control(folder, key)
        # a task given the damaged folder reports it in its row instead of crashing
        row = process_file({"path": str(inp / "p1.fcs"), "out_dir": str(out), "recipe": recipe.to_dict(),
                            "digest": recipe_digest(recipe), "control": os.path.abspath(one),
                            "control_prepared": folder, "control_key": key})
        assert row["status"] == "error" and "prepared control" in row["message"], row
        with open(path, "wb") as fh:
            fh.write(original)
    # a damaged folder is rebuilt by the next batch, with the same results
    os.unlink(os.path.join(file_out_dir(str(out), "p2.fcs"), DONE_NAME))
    with open(os.path.join(folder, "model-0.npz"), "r+b") as fh:
        fh.seek(200)
        fh.write(b"\x00" * 16)
    res = run_batch(str(inp), str(out), recipe=recipe, control=one, workers=1)
    assert res.info["control_prepared"].startswith("rebuilt") and "checksum" in res.info["control_prepared"]
    assert res.rows[1]["enriched"] == reference["p2.fcs"]["control one.fcs"]
    assert open(os.path.join(folder, "model-0.npz"), "rb").read() == good.read_bytes()


def test_unreadable_control_marks_every_file_with_the_reason(control_folder, tmp_path):
    base, inp, recipe, _ = control_folder
    bad = tmp_path / "bad control.fcs"
    bad.write_bytes(b"FCS3.1    garbage")
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=recipe, control=str(bad), workers=1)
    assert res.exit_code == 1 and res.info["control_prepared"] == "failed"
    assert [r["status"] for r in res.rows] == ["error", "error"]
    assert all("bad control.fcs" in r["message"] for r in res.rows)


def test_dask_workers_load_the_prepared_control(control_folder, tmp_path, dask_scheduler):
    base, inp, recipe, reference = control_folder
    ctrl = str(base / "control one.fcs")
    res = run_batch(str(inp), str(tmp_path / "o"), recipe=recipe, control=ctrl, scheduler=dask_scheduler)
    assert [r["enriched"] for r in res.rows] == [reference[n]["control one.fcs"] for n in ("p1.fcs", "p2.fcs")]
    with open(os.path.join(file_out_dir(str(tmp_path / "o"), "p1.fcs"), DONE_NAME), encoding="utf-8") as fh:
        assert json.load(fh)["control_prepared"]["folder"] == res.info["control_dir"]


def test_a_changed_spillover_csv_redoes_finished_files(tmp_path):
    # The recipe names a spillover CSV by path; finished files are skipped only
    # while the matrix in that file is the same (its contents, not its path, go
    # into the skip marker).  Reference for the effect: the compensated values
    # differ, so the exported events' log densities must change.
    import os

    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "a.fcs", n=1500, seed=3)
    csv_path = tmp_path / "spill.csv"
    csv_path.write_text("CD3,CD4,CD8\n1,0.02,0\n0,1,0.01\n0,0,1\n", encoding="utf-8")
    recipe = small_recipe(compensation={"source": "csv", "csv_path": str(csv_path)})
    out = tmp_path / "out"
    first = run_batch(str(inp), str(out), recipe=recipe, workers=1)
    assert [r["status"] for r in first.rows] == ["ok"]
    again = run_batch(str(inp), str(out), recipe=recipe, workers=1)
    assert again.n_skipped == 1  # same matrix: nothing to redo
    marker_before = (out / "a" / "done.json").read_text(encoding="utf-8")
    csv_path.write_text("CD3,CD4,CD8\n1,0.30,0\n0,1,0.20\n0,0,1\n", encoding="utf-8")
    redone = run_batch(str(inp), str(out), recipe=recipe, workers=1)
    assert redone.n_skipped == 0 and [r["status"] for r in redone.rows] == ["ok"]
    assert (out / "a" / "done.json").read_text(encoding="utf-8") != marker_before
    assert redone.rows[0]["heldout_loglik"] != first.rows[0]["heldout_loglik"]
    assert os.path.isfile(out / "a" / "a_rare.fcs")


def test_batch_writes_the_enriched_events_with_p_and_q_and_the_shift_warning(control_folder, tmp_path):
    # reference: fcsparser reads the exported FCS 3.1 files back (its own parser, not ours)
    from core.contrast import shift_check

    base, inp, recipe, reference = control_folder
    # a control whose CD4 detector ran 30 % hotter: an instrument-like difference on one channel
    shifted = read_fcs(str(base / "control one.fcs"))
    data = shifted.data.copy()
    data[:, CHANNELS.index("CD4")] *= 1.3
    write_fcs(str(tmp_path / "control hot.fcs"), data, list(CHANNELS), channel_ranges=[RANGE] * len(CHANNELS))
    out = tmp_path / "o"
    res = run_batch(str(inp), str(out), recipe=recipe, control=str(tmp_path / "control hot.fcs"), workers=1,
                    csv=True)
    assert [r["status"] for r in res.rows] == ["ok", "ok"], res.rows
    summary = pd.read_csv(out / "summary.csv").set_index("file")
    for col in ("enriched", "enriched_percent", "expected_false", "false_discovery_rate", "min_fold",
                "shift_warning"):
        assert col in summary.columns
    for name in ("p1.fcs", "p2.fcs"):
        row = summary.loc[name]
        assert row["false_discovery_rate"] == 0.05 and row["min_fold"] == 2.0
        assert "CD4" in row["shift_warning"] and "CD3" not in row["shift_warning"].split(":")[1][:20]
        stem = os.path.splitext(name)[0]
        folder = file_out_dir(str(out), name)
        meta, df = fcsparser.parse(os.path.join(folder, f"{stem}_enriched.fcs"), reformat_meta=True)
        assert len(df) == int(row["enriched"])
        assert {"contrast score", "contrast local", "contrast local fold", "contrast p", "contrast q"} <= set(df.columns)
        assert (df["contrast q"] <= 0.05).all() and (df["contrast p"] <= df["contrast q"] + 1e-12).all()
        # the minimum fold: both estimates of the density ratio are >= 2
        fold = np.minimum(df["contrast score"], df["contrast local fold"])
        assert (fold >= np.log(2.0) - 1e-6).all() and (df["enriched"] == 1).all()
        assert "local neighbour counts (k = 20)" in meta["BOSCAGE_CONTRAST_SCORES"]
        assert meta["BOSCAGE_CONTROL"] == "control hot.fcs" and float(meta["BOSCAGE_FDR"]) == 0.05
        assert "CD4" in meta["BOSCAGE_SHIFT_WARNING"]
        # the CSV copy holds the same events (transformed values) after the caution line
        table = pd.read_csv(os.path.join(folder, f"{stem}_enriched.csv"), comment="#")
        assert len(table) == len(df) and "contrast q" in table.columns
    # the warning is the core shift check on the two files' density inputs
    from core.analysis import density_input

    t = density_input(read_fcs(str(inp / "p1.fcs")), recipe)[0].matrix
    c = density_input(read_fcs(str(tmp_path / "control hot.fcs")), recipe)[0].matrix
    assert shift_check(t, c, recipe.channels).moved[0] == "CD4"
