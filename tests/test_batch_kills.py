"""Kills and odd output folders for ``boscage batch`` (core/batch/, core/naming.py, core/write_guard.py).

A ``kill -9`` of the batch leaves no process behind and no write after it;
temporary files of a killed write are removed by the next run; an output
folder that cannot be created or would mix outputs with inputs gives exit
code 2 and a sentence; names that clean to the same file never share one.
"""

import hashlib
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from core.batch import (DONE_NAME, OUT_MARK, SUMMARY_NAME, file_out_dir, main, output_folder_names,
                        run_batch)
from core.fcs import read_fcs, write_fcs
from core.recipe import Recipe, save_recipe

CHANNELS = ["FSC-A", "SSC-A", "CD3", "CD4"]
MARKERS = ["CD3", "CD4"]
TINY_ENGINE = {"n_trees": 4, "marginal_trees": 4, "patience": 2, "n_layers": 1, "base": "logistic",
               "random_state": 0}
REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def write_events(path, n=600, seed=0):
    rng = np.random.default_rng(seed)
    data = np.column_stack([rng.normal(6e4, 8e3, n), rng.normal(3e4, 6e3, n),
                            rng.lognormal(7.0, 0.5, n), rng.lognormal(6.0, 0.6, n)]).round()
    write_fcs(str(path), data, CHANNELS, channel_ranges=[262144.0] * 4)


def tiny_recipe(regions=()):
    return Recipe(channels=MARKERS, transforms={c: {"kind": "arcsinh", "cofactor": 150.0} for c in MARKERS},
                  engine=dict(TINY_ENGINE), regions=list(regions))


def rect(name):
    return {"name": name, "kind": "rectangle", "channels": ["CD3", "CD4"], "x": [-10.0, 100.0],
            "y": [-10.0, 100.0], "transforms": {c: {"kind": "arcsinh", "cofactor": 150.0} for c in MARKERS}}


# ----------------------------------------------------------------------------- folders and names

def test_out_folder_that_contains_the_input_folder_is_refused_with_exit_2(tmp_path, capsys):
    # finding: `batch X/run1 --out X` wrote the rare events and done.json into the input folder
    run1 = tmp_path / "run1"
    run1.mkdir()
    write_events(run1 / "run1.fcs")
    before = sorted(os.listdir(run1))
    code = main([str(run1), "--out", str(tmp_path), "--workers", "1"])
    assert code == 2
    assert "contains the input folder" in capsys.readouterr().err
    assert sorted(os.listdir(run1)) == before


def test_out_folder_given_as_a_link_to_the_input_folder_is_refused(tmp_path, capsys):
    # finding: --out as a symlink to the input folder overwrote README.txt and summary.csv kept there
    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "a.fcs")
    (inp / "README.txt").write_text("my notes")
    (inp / SUMMARY_NAME).write_text("my table")
    os.symlink(inp, tmp_path / "link")
    assert main([str(inp), "--out", str(tmp_path / "link"), "--workers", "1"]) == 2
    assert "input folder" in capsys.readouterr().err
    assert (inp / "README.txt").read_text() == "my notes"
    assert (inp / SUMMARY_NAME).read_text() == "my table"


def test_a_foreign_folder_holding_files_the_batch_would_replace_is_refused(tmp_path, capsys):
    inp, out = tmp_path / "in", tmp_path / "out"
    inp.mkdir()
    out.mkdir()
    write_events(inp / "a.fcs")
    (out / "README.txt").write_text("kept by the user")
    assert main([str(inp), "--out", str(out), "--workers", "1"]) == 2
    assert "not written by a batch" in capsys.readouterr().err
    assert (out / "README.txt").read_text() == "kept by the user"


@pytest.mark.parametrize("make", ["file", "under a file", "no permission"])
def test_out_folder_that_cannot_be_created_gives_exit_2_and_a_sentence(tmp_path, capsys, make):
    # finding: an --out that cannot be created ended in a raw traceback and exit 1
    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "a.fcs")
    if make in ("file", "under a file"):
        out = tmp_path / "taken"
        out.write_text("a file, not a folder")
        if make == "under a file":
            out = out / "out"
    elif os.geteuid() != 0:
        locked = tmp_path / "locked"
        locked.mkdir(mode=0o500)
        out = locked / "out"
    elif os.path.isdir("/proc/self"):
        out = "/proc/boscage-out"  # root may write anywhere but in /proc (Linux)
    else:
        pytest.skip("no folder this user cannot write in")
    code = main([str(inp), "--out", str(out), "--workers", "1"])
    err = capsys.readouterr().err
    assert code == 2
    assert "output folder cannot be created" in err and "Traceback" not in err


def test_output_folder_names_are_unique_stable_and_never_the_summary():
    # finding: x.fcs / x.FCS, a:b.fcs / a_b.fcs, 'tube 1..fcs' / 'tube 1.fcs' shared one folder;
    # summary.csv.fcs made a folder named summary.csv
    groups = [["x.fcs", "x.FCS"], ["a:b.fcs", "a_b.fcs"], ["tube 1..fcs", "tube 1.fcs"],
              ["summary.csv.fcs", "other.fcs"]]
    for names in groups:
        out = output_folder_names(names)
        folders = [out[n] for n in names]
        assert None not in folders
        assert len({f.casefold() for f in folders}) == len(folders), folders
        assert all(f.casefold() not in (SUMMARY_NAME, "readme.txt", "recipe.json") for f in folders)
        # stable: the same input gets the same folder whatever else is in the run
        assert output_folder_names(names) == out
    assert output_folder_names(["plain name.fcs"])["plain name.fcs"] == "plain_name"
    assert file_out_dir("o", "plain name.fcs") == os.path.join("o", "plain_name")


def test_colliding_input_names_and_region_names_write_separate_files(tmp_path):
    # findings: colliding file names overwrote each other's exports with every row ok;
    # regions 'a/b' and 'a_b' wrote one file; summary.csv.fcs ended in IsADirectoryError
    inp, out = tmp_path / "in", tmp_path / "out"
    inp.mkdir()
    for k, name in enumerate(["x.fcs", "x.FCS", "a:b.fcs", "a_b.fcs", "summary.csv.fcs"]):
        write_events(inp / name, seed=k)
    regions = [rect("a/b"), dict(rect("a_b"), x=[-10.0, 6.5]), dict(rect("top 5%"), x=[6.0, 100.0])]
    res = run_batch(str(inp), str(out), recipe=tiny_recipe(regions), workers=1)
    assert [r["status"] for r in res.rows] == ["ok"] * 5, res.rows
    assert os.path.isfile(out / SUMMARY_NAME)
    # the naming rule (core/naming.py): no name written holds a space or '#'; '%' is kept as 'pct'
    written = [n for _, dirs, files in os.walk(out) for n in dirs + files]
    assert written and not [n for n in written if " " in n or "#" in n]
    # 'x.fcs' meets 'x.FCS' ignoring case: its folder gets 8 hex digits of hashlib's SHA-256 of its name
    stem = "x_" + hashlib.sha256(b"x.fcs").hexdigest()[:8]
    assert f"{stem}_region_top_5pct.fcs" in written and f"{stem}_rare.fcs" in written
    folders = {r["file"]: file_out_dir(str(out), r["file"], output_folder_names(os.listdir(inp)))
               for r in res.rows}
    assert len(set(folders.values())) == 5
    for name, folder in folders.items():
        with open(os.path.join(folder, DONE_NAME), encoding="utf-8") as fh:
            assert json.load(fh)["row"]["file"] == name
        rare = [f for f in os.listdir(folder) if f.endswith("_rare.fcs")]
        region_files = sorted(f for f in os.listdir(folder) if "_region_" in f)
        assert len(rare) == 1 and len(region_files) == 3
        src = read_fcs(str(inp / name))
        counts = sorted(read_fcs(os.path.join(folder, f)).n_events for f in region_files)
        row = next(r for r in res.rows if r["file"] == name)
        assert counts == sorted([row["region:a/b"], row["region:a_b"], row["region:top 5%"]])
        assert read_fcs(os.path.join(folder, rare[0])).keywords["BOSCAGE_SOURCE"] == os.path.basename(src.path)
    # a re-run finds every file done (the markers are where the run left them)
    again = run_batch(str(inp), str(out), recipe=tiny_recipe(regions), workers=1)
    assert again.n_skipped == 5


def test_stale_temporary_files_are_removed_by_the_next_run(tmp_path):
    # finding: a kill during a write left a .part file that the successful re-run kept
    inp, out = tmp_path / "in", tmp_path / "out"
    inp.mkdir()
    write_events(inp / "a.fcs")
    run_batch(str(inp), str(out), recipe=tiny_recipe(), workers=1)
    folder = file_out_dir(str(out), "a.fcs")
    stale = [os.path.join(folder, ".boscage-k1.part"), os.path.join(str(out), ".boscage-k2.part")]
    for p in stale:
        with open(p, "wb") as fh:
            fh.write(b"half written")
    run_batch(str(inp), str(out), recipe=tiny_recipe(), workers=1)
    assert not any(os.path.exists(p) for p in stale)


def test_deeply_nested_recipe_gives_exit_2_and_a_sentence(tmp_path, capsys):
    # finding: --recipe with deeply nested JSON gave a RecursionError traceback and exit 1
    inp = tmp_path / "in"
    inp.mkdir()
    write_events(inp / "a.fcs")
    deep = tmp_path / "deep.json"
    deep.write_text('{"channels": ' + "[" * 100_000 + "]" * 100_000 + "}")
    code = main([str(inp), "--out", str(tmp_path / "out"), "--recipe", str(deep), "--workers", "1"])
    err = capsys.readouterr().err
    assert code == 2
    assert "deep.json" in err and "nested" in err and "Traceback" not in err


# ----------------------------------------------------------------------------- kill -9

def _stat(pid):
    """The fields of /proc/PID/stat after the command name (state, ppid, pgrp, session, ...);
    None when the process is gone."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            return fh.read().rsplit(")", 1)[1].split()
    except OSError:
        return None


def _session_processes(sid):
    """PIDs of live (not zombie) processes in session ``sid`` (Linux /proc)."""
    pids = []
    for entry in os.listdir("/proc"):
        fields = _stat(entry) if entry.isdigit() else None
        if fields is not None and int(fields[3]) == sid and fields[0] not in ("Z", "X"):
            pids.append(int(entry))
    return pids


def _workers(sid):
    """PIDs of the batch's worker processes: live processes of session ``sid`` forked
    from the fork server (its command line, a parent other than the batch's process).
    A count of the session's processes is not enough: importing numpy's testing
    module (numpy 1.26) runs ``lscpu``, a short-lived process in the session, in
    the batch's process and in the fork server."""
    workers = []
    for pid in _session_processes(sid):
        fields = _stat(pid)
        try:
            with open(f"/proc/{pid}/cmdline", "rb") as fh:
                forked_from_server = b"multiprocessing.forkserver" in fh.read()
        except OSError:
            continue
        if fields is not None and int(fields[1]) != sid and forked_from_server:
            workers.append(pid)
    return workers


def _snapshot(folder):
    out = {}
    for root, _dirs, files in os.walk(folder):
        for f in files:
            p = os.path.join(root, f)
            try:
                out[p] = os.stat(p).st_mtime_ns
            except OSError:
                pass
    return out


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_kill_9_of_the_batch_leaves_no_process_and_no_later_write(tmp_path):
    # finding: kill -9 of the parent left the fork server, two workers and the resource
    # tracker alive; they finished queued files after the parent was gone
    inp, out = tmp_path / "in", tmp_path / "out"
    inp.mkdir()
    for k in range(6):
        write_events(inp / f"t{k}.fcs", n=4000, seed=k)
    recipe = tmp_path / "r.json"
    save_recipe(Recipe(channels=MARKERS, transforms={c: {"kind": "arcsinh", "cofactor": 150.0} for c in MARKERS},
                       engine={"n_trees": 60, "patience": 60, "random_state": 0, "base": "logistic"}),
                str(recipe))
    env = dict(os.environ, PYTHONPATH=REPO)
    code = "import sys; from core.batch import main; sys.exit(main(sys.argv[1:]))"
    proc = subprocess.Popen([sys.executable, "-c", code, str(inp), "--out", str(out), "--recipe",
                             str(recipe), "--workers", "2"], cwd=REPO, env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        # the two workers are up (forked from the fork server, seen twice 0.2 s apart)
        deadline, seen = time.time() + 60, []
        while time.time() < deadline and not (len(seen) >= 2 and len(seen[-1]) >= 2 and len(seen[-2]) >= 2):
            seen.append(_workers(proc.pid))
            time.sleep(0.2)
        assert len(_workers(proc.pid)) >= 2, f"the workers did not start: {_session_processes(proc.pid)}"
        time.sleep(1.0)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        at_kill = _snapshot(out)
        deadline = time.time() + 10
        while time.time() < deadline and _session_processes(proc.pid):
            time.sleep(0.1)
        left = _session_processes(proc.pid)
        assert left == [], f"processes left after kill -9: {left}"
        time.sleep(0.5)
        after = _snapshot(out)
        assert {p: m for p, m in after.items() if at_kill.get(p) != m} == {}
    finally:
        for pid in _session_processes(proc.pid):
            try:
                os.kill(pid, signal.SIGKILL)
            except OSError:
                pass
    # the re-run removes what the kill left half-written and completes every file (with the light
    # recipe: every file is redone, none skipped, and the re-run takes seconds instead of a minute)
    res = run_batch(str(inp), str(out), recipe=tiny_recipe(), workers=1)
    assert res.n_ok == 6
    assert not [f for f in _snapshot(out) if f.endswith(".part")]
    assert os.path.isfile(out / OUT_MARK)


def test_names_that_cannot_be_made_distinct_are_reported_per_file(tmp_path, monkeypatch):
    # two hashed names can only meet if their 8 hex digits collide; force that to see the report
    from core import naming

    monkeypatch.setattr(naming, "short_hash", lambda text: "00000000")
    inp, out = tmp_path / "in", tmp_path / "out"
    inp.mkdir()
    for k, name in enumerate(["a:b.fcs", "a;b.fcs", "plain.fcs"]):
        write_events(inp / name, seed=k)
    res = run_batch(str(inp), str(out), recipe=tiny_recipe(), workers=1)
    status = {r["file"]: r["status"] for r in res.rows}
    assert status == {"a:b.fcs": "error", "a;b.fcs": "error", "plain.fcs": "ok"}
    assert all("rename the file" in r["message"] for r in res.rows if r["status"] == "error")
    assert sorted(os.listdir(out)) == sorted([".boscage-batch", "README.txt", "plain", "recipe.json",
                                              SUMMARY_NAME, "populations.csv"])
