"""The one write guard (core/write_guard.py through core/atomic.py): inputs are never replaced.

Each case writes through a public entry point (export_events_fcs,
export_events_csv, save_recipe, a model's save, write_fcs) and checks that the
input's bytes are unchanged afterwards.
"""

import os

import numpy as np
import pytest

from core import write_guard
from core.atomic import atomic_write
from core.errors import ExportError
from core.export import export_events_csv, export_events_fcs
from core.fcs import read_fcs, write_fcs
from core.recipe import Recipe, save_recipe
from tests.test_fcs_hostile import VALUES, int16_file

RECIPE = Recipe(channels=["FSC", "SSC"], transforms={"FSC": {"kind": "linear"}, "SSC": {"kind": "linear"}})


def ours(path, seed=0):
    """An FCS file this program wrote (carries its mark), read so it is an input of this process."""
    data = np.random.default_rng(seed).uniform(0, 1000, (50, 2)).round()
    write_fcs(str(path), data, ["FSC", "SSC"])
    return str(path)


def test_export_onto_another_acquisition_is_refused_even_with_overwrite(tmp_path):
    # finding: export_events_fcs(path_of_another_input, overwrite=True) replaced that input
    src = read_fcs(ours(tmp_path / "a.fcs"))
    other = int16_file(tmp_path / "acquisition.fcs", VALUES)  # never opened in this process
    before = open(other, "rb").read()
    with pytest.raises(ExportError, match="did not write"):
        export_events_fcs(other, src, None, None, "digest", overwrite=True)
    assert open(other, "rb").read() == before


def test_export_onto_another_open_tube_is_refused(tmp_path):
    # finding: the app passed overwrite=True after its dialog and protected only the current tube
    a = read_fcs(ours(tmp_path / "a.fcs", 1))
    b_path = ours(tmp_path / "b.fcs", 2)
    read_fcs(b_path)  # a second tube opened in the same session
    before = open(b_path, "rb").read()
    with pytest.raises(ExportError, match="input file"):
        export_events_fcs(b_path, a, None, None, "digest", overwrite=True)
    assert open(b_path, "rb").read() == before


def test_csv_export_cannot_overwrite_its_own_source_with_default_source_paths(tmp_path):
    # finding: export_events_csv overwrote its own source when source_paths was left at its default
    ef = read_fcs(ours(tmp_path / "src.fcs", 3))
    before = open(ef.path, "rb").read()
    with pytest.raises(ExportError, match="input file"):
        export_events_csv(ef.path, ef.channel_names, ef.data, None, None, overwrite=True)
    assert open(ef.path, "rb").read() == before


def test_save_recipe_never_replaces_an_fcs_file(tmp_path):
    # finding: save_recipe(..., some_input.fcs, overwrite=True) replaced an FCS file
    acq = int16_file(tmp_path / "acq.fcs", VALUES)
    before = open(acq, "rb").read()
    with pytest.raises(ExportError):
        save_recipe(RECIPE, acq, overwrite=True)
    assert open(acq, "rb").read() == before


@pytest.mark.parametrize("link", ["symlink", "hardlink", "case"])
def test_links_and_case_variants_of_an_input_are_refused(tmp_path, link):
    src = ours(tmp_path / "in.fcs", 4)
    ef = read_fcs(src)
    before = open(src, "rb").read()
    target = tmp_path / ("IN.FCS" if link == "case" else "link.fcs")
    if link == "symlink":
        os.symlink(src, target)
    elif link == "hardlink":
        os.link(src, target)
    with pytest.raises(ExportError, match="input file"):
        export_events_fcs(str(target), ef, None, None, "digest", overwrite=True)
    with pytest.raises(ExportError, match="input file"):
        with atomic_write(str(target), "w", overwrite=True) as fh:
            fh.write("x")
    assert open(src, "rb").read() == before


def test_our_own_outputs_may_be_replaced_when_asked(tmp_path):
    ef = read_fcs(ours(tmp_path / "s.fcs", 5))
    out = str(tmp_path / "s rare.fcs")
    export_events_fcs(out, ef, None, None, "digest")
    with pytest.raises(ExportError, match="exists"):
        export_events_fcs(out, ef, None, None, "digest")
    export_events_fcs(out, ef, np.arange(50) < 10, None, "digest", overwrite=True)
    assert read_fcs(out).n_events == 10


def test_a_folder_target_is_refused_with_a_sentence(tmp_path):
    (tmp_path / "summary.csv").mkdir()
    with pytest.raises(ExportError, match="folder"):
        with atomic_write(str(tmp_path / "summary.csv"), "w", overwrite=True) as fh:
            fh.write("x")


def test_check_output_folder_rule(tmp_path):
    inp = tmp_path / "X" / "run1"
    inp.mkdir(parents=True)
    with pytest.raises(ExportError, match="contains"):
        write_guard.check_output_folder(str(tmp_path / "X"), [str(inp)])
    with pytest.raises(ExportError, match="input folder"):
        write_guard.check_output_folder(str(inp), [str(inp)])
    write_guard.check_output_folder(str(inp / "results"), [str(inp)])  # a subfolder: allowed
    write_guard.check_output_folder(str(tmp_path / "elsewhere"), [str(inp)])


def test_safe_unique_names_keep_plain_names_and_separate_the_rest():
    names = write_guard.safe_unique_names(["a/b", "a_b", "plain", "Plain2", "..", ""], reserved=["rare"])
    assert names["plain"] == "plain" and names["Plain2"] == "Plain2"
    assert len({v.casefold() for v in names.values()}) == len(names)
    assert all("/" not in v and not v.startswith(".") for v in names.values())


def test_the_app_refuses_to_write_over_any_open_tube(qtbot, tmp_path, monkeypatch):
    # finding: the app passed overwrite=True after its file dialog and protected only the current tube
    from PySide6.QtWidgets import QMessageBox

    from desktop.app import make_app
    from desktop.dialogs import ExportDialog
    from desktop.main_window import MainWindow

    shown = []
    monkeypatch.setattr(QMessageBox, "critical", staticmethod(lambda p, t, text, *a, **k: shown.append(text)
                                                              or QMessageBox.Ok))
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: QMessageBox.Discard))
    monkeypatch.setenv("BOSCAGE_SETTINGS", str(tmp_path / "settings.ini"))
    make_app()
    a, b = ours(tmp_path / "tube a.fcs", 6), ours(tmp_path / "tube b.fcs", 7)
    win = MainWindow()
    qtbot.addWidget(win)
    win.open_paths([a, b], raise_errors=True)
    before = {p: open(p, "rb").read() for p in (a, b)}
    win.discard_changes = True
    for target in (a, b):
        assert win.save_recipe_dialog(target) is None  # the dialog "asked before replacing"
        dlg = ExportDialog(win, win.current)
        dlg.path.setText(target)
        dlg._overwrite = True
        dlg.export()
    assert {p: open(p, "rb").read() for p in (a, b)} == before
    assert len(shown) == 4 and all("input file" in t or "never" in t for t in shown), shown
