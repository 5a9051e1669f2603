"""GUI tests of the desktop application (pytest-qt, offscreen).

Each check names its outside reference: fcsparser for files read back,
numpy / scipy for counts computed independently of the project, the
definitions in core's contracts where the task says "equals core's".
"""

from __future__ import annotations

import csv
import os
import subprocess
import sys

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from PySide6.QtWidgets import QMessageBox  # noqa: E402

from core.fcs import write_fcs  # noqa: E402

CHANNELS = ["FSC-A", "SSC-A", "FL1-A", "FL2-A"]
SPILL = np.array([[1.0, 0.12], [0.04, 1.0]])
FEW_TREES = {"n_trees": 4, "max_depth": 3, "max_fit_events": 3000}


def make_fcs(path, n=3000, seed=0):
    """A small FCS 3.1 file: two scatter channels, two fluorescence channels with
    spillover (FCS 3.1 $SPILLOVER), a small bright population."""
    rng = np.random.default_rng(seed)
    true = np.column_stack([rng.normal(60000, 9000, n), rng.normal(30000, 5000, n),
                            rng.lognormal(6, 0.6, n), rng.lognormal(7, 0.5, n)])
    k = n // 40
    true[:k, 2] = rng.normal(20000, 2000, k)
    obs = true.copy()
    obs[:, 2:] = true[:, 2:] @ SPILL
    spill = "2,FL1-A,FL2-A," + ",".join(f"{v:g}" for v in SPILL.ravel())
    write_fcs(path, obs, CHANNELS, keywords={"$SPILLOVER": spill},
              channel_labels=["", "", "CD3", "CD4"], channel_ranges=[262144] * 4)
    return str(path)


@pytest.fixture
def messages(monkeypatch):
    """Record message boxes instead of blocking on them."""
    seen = []

    def critical(parent, title, text, *a, **k):
        seen.append((title, text))
        return QMessageBox.Ok

    monkeypatch.setattr(QMessageBox, "critical", staticmethod(critical))
    # closing with unsaved regions asks first; the tests answer "discard" unless they say otherwise
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: QMessageBox.Discard))
    return seen


@pytest.fixture
def window(qtbot, tmp_path, monkeypatch, messages):
    monkeypatch.setenv("BOSCAGE_SETTINGS", str(tmp_path / "settings.ini"))
    from desktop.app import make_app
    from desktop.settings import Settings

    make_app()
    s = Settings()
    s.set_value("view/contours", False)  # contours get their own test
    s.sync()
    from desktop.main_window import MainWindow

    win = MainWindow()
    qtbot.addWidget(win)
    win.resize(1200, 800)
    win.show()
    win.fit_panel.set_engine_settings(FEW_TREES)
    yield win
    win.discard_changes = True
    if win.job is not None:
        win.job.cancel()
        win.job.wait(20000)
    # free the window's widgets now: a closed window left alive keeps every later
    # test's layout and style passes busy with it
    win.close()
    win.deleteLater()
    from PySide6.QtCore import QCoreApplication, QEvent

    QCoreApplication.sendPostedEvents(None, QEvent.DeferredDelete)


def fit(qtbot, win, timeout=120_000):
    with qtbot.waitSignal(win.fitEnded, timeout=timeout) as blocker:
        win.start_fit()
    assert blocker.args == [True], win.last_fit_problem
    qtbot.waitUntil(lambda: not win.fit_running(), timeout=timeout)


def test_open_fit_rarity_regions_export(qtbot, window, tmp_path, messages):
    import fcsparser

    from core.rare import rare_by_share

    path = make_fcs(tmp_path / "tube.fcs")
    window.open_paths([path])
    tube = window.current
    assert tube is not None and tube.n_events == 3000
    # before fitting the map shows event counts: every in-range event is in a bin
    # (reference: numpy.histogram2d over the same extent counts the same events)
    cell = window.density_map.cells[0]
    x, y = tube.values[:, cell.ix], tube.values[:, cell.iy]
    h, _, _ = np.histogram2d(x, y, bins=200, range=[cell.extent[:2], cell.extent[2:]])
    assert cell.counts.sum() == pytest.approx(h.sum(), abs=2)  # edges are half-open here

    fit(qtbot, window)
    a = tube.analysis
    assert a is not None and np.isfinite(a.log_density[a.kept]).all()
    # the panel names the first map the engine chose
    from desktop.fitting import BASE_NAMES

    assert BASE_NAMES[a.model.base_] in window.fit_panel.status.text()

    # the rarity control: count equals core's, and is the definition of "lowest share"
    window.rarity_bar.set_share(0.02)
    n_kept = int(a.kept.sum())
    expected = rare_by_share(a.log_density, 0.02).count
    assert window.rare_count() == expected == round(0.02 * n_kept)
    rare = tube.rare_mask
    # reference: numpy ordering -- every rare event is no denser than every other kept event
    assert a.log_density[rare].max() <= a.log_density[a.kept & ~rare].min()
    assert f"{expected:,} rare" in window.rarity_bar.count.text()
    # "Keep as region": a rarity region holding exactly the highlighted events
    # (reference: core.rare.rare_by_share's mask, computed independently of the region code)
    window.rarity_bar.keep_button.click()
    kept_name = window.selections.selected_names()[0]
    assert kept_name.startswith("rarest 2 pct")
    assert window.region_count(kept_name) == expected
    np.testing.assert_array_equal(tube.masks[kept_name], rare_by_share(a.log_density, 0.02).mask)
    window.rarity_bar.slider.setValue(window.rarity_bar.slider.value() + 100)  # drag the slider
    assert window.rare_count() == rare_by_share(a.log_density, window.rarity_bar.share()).count
    assert window.rare_count() > expected

    # a rectangle region: count against numpy with half-open bounds
    # (reference: Gating-ML 2.0 rectangle gates include the low bound, exclude the high one -- from memory)
    j1, j2 = tube.names.index("FL1-A"), tube.names.index("FL2-A")
    v1, v2 = tube.values[:, j1], tube.values[:, j2]
    lo1, hi1 = np.percentile(v1, [20, 80])
    lo2, hi2 = np.percentile(v2, [10, 70])
    spec = tube.recipe.transforms
    window.add_region({"name": "middle", "kind": "rectangle", "channels": ["FL1-A", "FL2-A"],
                       "x": [lo1, hi1], "y": [lo2, hi2],
                       "transforms": {"FL1-A": spec["FL1-A"], "FL2-A": spec["FL2-A"]}})
    ref = int(np.count_nonzero((v1 >= lo1) & (v1 < hi1) & (v2 >= lo2) & (v2 < hi2)))
    assert window.region_count("middle") == ref
    assert window.selections.count_text("middle") == f"{ref:,}"

    # move its outline as a drag would: the count follows (reference: numpy again)
    roi = window.density_map.cell_for("FL1-A", "FL2-A").rois["middle"]
    shift = 0.1 * (hi1 - lo1)
    roi.setPos([lo1 + shift, lo2])
    qtbot.waitUntil(lambda: window.current.regions["middle"].x[0] == pytest.approx(lo1 + shift), timeout=2000)
    r = window.current.regions["middle"]
    ref2 = int(np.count_nonzero((v1 >= r.x[0]) & (v1 < r.x[1]) & (v2 >= r.y[0]) & (v2 < r.y[1])))
    assert window.region_count("middle") == ref2

    # a triangle: reference scipy.spatial.Delaunay (a point is inside a convex polygon
    # when it falls in a simplex of the polygon's triangulation)
    from scipy.spatial import Delaunay

    tri = np.array([[lo1, lo2], [hi1, lo2], [0.5 * (lo1 + hi1), hi2]])
    window.add_region({"name": "tri", "kind": "polygon", "channels": ["FL1-A", "FL2-A"],
                       "vertices": tri.tolist(), "transforms": {"FL1-A": spec["FL1-A"], "FL2-A": spec["FL2-A"]}})
    inside = Delaunay(tri).find_simplex(np.column_stack([v1, v2])) >= 0
    assert abs(window.region_count("tri") - int(inside.sum())) <= 2  # boundary points may differ
    # combine: "not tri" is the complement (reference: numpy logical not)
    window.regions.combine("not", ["tri"])
    assert window.region_count("not tri") == tube.n_events - window.region_count("tri")

    # export the rectangle's events to FCS and read them back with fcsparser (reference)
    from desktop.dialogs import ExportDialog

    dlg = ExportDialog(window, tube, ["middle"])
    out = tmp_path / "middle.fcs"
    dlg.path.setText(str(out))
    dlg.export()
    assert not messages, messages
    meta, df = fcsparser.parse(str(out), reformat_meta=True, channel_naming="$PnN")
    mask = tube.masks["middle"]
    assert len(df) == int(mask.sum()) == window.region_count("middle")
    raw = tube.event_file.data[mask]
    for j, name in enumerate(CHANNELS):
        np.testing.assert_allclose(df[name].to_numpy(), raw[:, j].astype(np.float32), rtol=1e-6)
    assert "log density" in df.columns

    # and the rare events to CSV (reference: the csv module)
    dlg = ExportDialog(window, tube)
    dlg.which.setCurrentIndex(dlg.which.findData("rare"))
    dlg.format.setCurrentIndex(dlg.format.findData("csv"))
    out_csv = tmp_path / "rare.csv"
    dlg.path.setText(str(out_csv))
    dlg.export()
    with open(out_csv, newline="") as handle:
        rows = [r for r in csv.reader(handle) if r and not r[0].startswith("#")]
    assert len(rows) - 1 == window.rare_count()


def test_cancel_keeps_previous_state(qtbot, window, tmp_path, monkeypatch):
    # A fit that keeps reporting progress until it is asked to stop (the real
    # engine fits this small file faster than the cancel can arrive), then
    # returns a usable model like the engine does when cancelled.
    import time

    from core.density import AdditiveTreeDensity
    from core.progress import keep_going

    real_fit = AdditiveTreeDensity.fit

    def fit_until_cancelled(self, X, progress=None):
        for step in range(100_000):
            if not keep_going(progress, step, 100_000, -1.0):
                break
            time.sleep(0.005)
        self.set_params(n_trees=0)
        real_fit(self, X)
        self.stopped_by_ = "cancelled"
        return self

    monkeypatch.setattr(AdditiveTreeDensity, "fit", fit_until_cancelled)
    window.open_paths([make_fcs(tmp_path / "t.fcs")])
    with qtbot.waitSignal(window.fitEnded, timeout=120_000) as blocker:
        window.start_fit()
        qtbot.waitUntil(lambda: window.fit_panel.progress.maximum() > 0 or not window.fit_running(), timeout=60_000)
        window.cancel_job()
    assert blocker.args == [False]
    assert window.current.analysis is None  # no half-fitted model is shown
    assert not window.fit_running() and window.act_fit.isEnabled()
    assert "Cancelled" in window.fit_panel.status.text()


def test_broken_file_shows_message_and_app_carries_on(qtbot, window, tmp_path, messages):
    bad = tmp_path / "broken.fcs"
    bad.write_bytes(b"FCS3.1    not really an FCS file" + b"\0" * 40)
    good = make_fcs(tmp_path / "good.fcs", n=500)
    opened = window.open_paths([str(bad), good])
    assert opened == [os.path.abspath(good)]
    assert len(messages) == 1 and "broken.fcs" in messages[0][1]
    assert window.current is not None and window.current.path == os.path.abspath(good)


def test_slot_errors_become_message_boxes(qtbot, window, messages):
    window.start_fit()  # no tube open: a user error, not a crash
    assert messages and "open a tube first" in messages[-1][1].lower()
    # nothing to keep before a fit: the button is disabled instead of answering with an error
    assert not window.rarity_bar.keep_button.isEnabled()


def test_scale_and_compensation_edits_recompute_values(qtbot, window, tmp_path):
    from core.compensation import read_spillover_csv

    path = make_fcs(tmp_path / "t.fcs", n=800)
    window.open_paths([path])
    tube = window.current
    raw = tube.event_file.data
    # default recipe compensates with the file's matrix; check against numpy.linalg.solve (reference)
    comp = raw[:, 2:] @ np.linalg.inv(SPILL)
    # arcsinh with cofactor c is arcsinh(x / c) (common practice; reference numpy.arcsinh)
    window.channels_panel.table.selectRow(2)
    window.channels_panel.set_spec("FL1-A", {"kind": "arcsinh", "cofactor": 5.0})
    qtbot.waitUntil(lambda: tube.recipe.transforms["FL1-A"]["kind"] == "arcsinh", timeout=3000)
    np.testing.assert_allclose(tube.values[:, 2], np.arcsinh(comp[:, 0] / 5.0), rtol=1e-9, atol=1e-12)
    # the live preview is the histogram of the new scale (reference: numpy.histogram, same bins)
    xs, ys = window.channels_panel.hist_curve.getData()
    shown = np.arcsinh(comp[:, 0] / 5.0)
    lo, hi = np.percentile(shown, [0.05, 99.95])
    ref_counts, ref_edges = np.histogram(shown, bins=120, range=(lo, hi))
    np.testing.assert_allclose(xs, ref_edges)
    np.testing.assert_array_equal(ys, ref_counts)
    # edit one spillover value, apply: the matrix is saved as CSV and used
    window.comp_panel.set_value(0, 1, 0.2)
    window.comp_panel.apply_button.click()
    assert tube.recipe.compensation.source == "csv"
    S = read_spillover_csv(tube.recipe.compensation.csv_path)
    edited = SPILL.copy()
    edited[0, 1] = 0.2
    np.testing.assert_allclose(S.matrix, edited)
    comp2 = raw[:, 2:] @ np.linalg.inv(edited)
    np.testing.assert_allclose(tube.values[:, 2], np.arcsinh(comp2[:, 0] / 5.0), rtol=1e-9, atol=1e-12)


def test_recipe_round_trip_and_recent_files(qtbot, window, tmp_path, monkeypatch):
    import json

    from desktop.settings import Settings

    path = make_fcs(tmp_path / "t.fcs", n=600)
    window.open_paths([path])
    tube = window.current
    spec = tube.recipe.transforms
    window.add_region({"name": "box", "kind": "rectangle", "channels": ["FSC-A", "SSC-A"],
                       "x": [0.1, 0.3], "y": [0.05, 0.2],
                       "transforms": {"FSC-A": spec["FSC-A"], "SSC-A": spec["SSC-A"]}})
    saved = window.edits.save_recipe(str(tmp_path / "r.json"))
    with open(saved) as handle:  # reference: the json module reads what we wrote
        stored = json.load(handle)
    assert [r["name"] for r in stored["regions"]] == ["box"]
    assert not tube.dirty
    window.regions.delete(["box"])
    assert len(tube.regions) == 0
    window.edits.load_recipe(saved)
    assert tube.regions.names == ["box"]
    # recent files persist in the settings file between launches
    assert os.path.abspath(path) in Settings().recent_paths()


def test_close_with_unsaved_regions_asks(qtbot, window, tmp_path, monkeypatch):
    window.open_paths([make_fcs(tmp_path / "t.fcs", n=400)])
    spec = window.current.recipe.transforms
    window.add_region({"name": "box", "kind": "rectangle", "channels": ["FSC-A", "SSC-A"],
                       "x": [0.1, 0.3], "y": [0.05, 0.2],
                       "transforms": {"FSC-A": spec["FSC-A"], "SSC-A": spec["SSC-A"]}})
    asked = []
    monkeypatch.setattr(QMessageBox, "question",
                        staticmethod(lambda *a, **k: asked.append(a) or QMessageBox.Cancel))
    assert window.close() is False and window.isVisible()
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: QMessageBox.Discard))
    assert window.close() is True
    assert len(asked) == 1


def test_batch_dialog_runs_and_shows_summary(qtbot, window, tmp_path):
    from desktop.dialogs import BatchDialog

    folder = tmp_path / "tubes"
    folder.mkdir()
    make_fcs(folder / "a.fcs", n=600, seed=1)
    make_fcs(folder / "b.fcs", n=600, seed=2)
    window.open_paths([str(folder / "a.fcs")])
    recipe = window.fitting.recipe_for_fit(window.current)
    dlg = BatchDialog(window, recipe)
    qtbot.addWidget(dlg)
    dlg.input.setText(str(folder))
    dlg.output.setText(str(tmp_path / "out"))
    # one file at a time, in this process: the process pool is core.batch's (tests/test_batch*.py);
    # fresh worker processes would spend most of this test importing and compiling
    dlg.workers.setValue(1)
    with qtbot.waitSignal(dlg.ended, timeout=180_000) as blocker:
        dlg.run()
    assert blocker.args == [True]
    assert dlg.table.rowCount() == 2
    header = [dlg.table.horizontalHeaderItem(j).text() for j in range(dlg.table.columnCount())]
    status = [dlg.table.item(i, header.index("Status")).text() for i in range(2)]
    assert status == ["ok", "ok"]
    assert header[:2] == ["File", "Status"]  # the status is seen without scrolling
    # reference: the csv module reads the summary the table shows (readable headers)
    from desktop.dialogs import summary_header

    with open(dlg.result.summary_path, newline="") as handle:
        rows = [r for r in csv.reader(handle) if r and not r[0].startswith("#")]
    assert len(rows) == 3 and sorted(map(summary_header, rows[0])) == sorted(header)
    assert all("_" not in h for h in header)
    dlg.close()


def test_screenshot_is_not_blank(qtbot, tmp_path, monkeypatch, messages):
    from PySide6.QtGui import QImage

    from desktop.app import run_screenshot

    monkeypatch.setenv("BOSCAGE_SETTINGS", str(tmp_path / "settings.ini"))
    path = make_fcs(tmp_path / "t.fcs", n=1500)
    out = tmp_path / "shot.png"
    assert run_screenshot(str(out), [path], engine=FEW_TREES) == 0
    img = QImage(str(out))
    assert (img.width(), img.height()) == (1400, 900)
    img = img.convertToFormat(QImage.Format_RGB888)
    arr = np.frombuffer(img.constBits(), dtype=np.uint8, count=img.sizeInBytes())
    arr = arr.reshape(img.height(), img.bytesPerLine())[:, : img.width() * 3].reshape(img.height(), img.width(), 3)
    assert arr.std() > 20  # a blank or single-colour picture has (almost) no variance
    # the density map area holds many distinct colours (the colour map at work)
    centre = arr[150:800, 300:900].reshape(-1, 3)
    assert len(np.unique(centre, axis=0)) > 50


def test_batch_command_does_not_import_qt(tmp_path):
    code = ("import sys\nfrom desktop.launcher import main\n"
            "try:\n    main(['batch', '--help'])\nexcept SystemExit:\n    pass\n"
            "print('QT' if any(m.startswith('PySide6') for m in sys.modules) else 'NOQT')\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    assert res.stdout.strip().endswith("NOQT"), res.stdout + res.stderr
    assert "usage" in res.stdout.lower()


def test_many_qt_calls_do_not_abort_the_interpreter():
    # PySide6 6.12.0 on CPython 3.11 drops a reference to None / True on every
    # void Qt call and every emit (measured with sys.getrefcount, the CPython
    # reference); desktop.qtfix must keep a long session alive.
    code = ("import desktop.qtfix\nfrom PySide6.QtCore import QObject, Signal\n"
            "class P(QObject):\n    s = Signal(object)\n"
            "p = P()\nfor i in range(50000):\n    p.setObjectName('x'); p.s.emit(None)\nprint('ALIVE')\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    assert res.returncode == 0 and "ALIVE" in res.stdout, res.stderr[-2000:]


class _Click:
    """What pyqtgraph's scene hands to a click handler (button, place, double)."""

    def __init__(self, pos, double=False):
        self._pos, self._double = pos, double

    def button(self):
        from PySide6.QtCore import Qt

        return Qt.LeftButton

    def scenePos(self):
        return self._pos

    def double(self):
        return self._double

    def accept(self):
        pass


def test_drawing_tools_rename_and_drop(qtbot, window, tmp_path):
    from PySide6.QtCore import QMimeData, QPointF, Qt, QUrl
    from PySide6.QtGui import QDropEvent

    path = make_fcs(tmp_path / "t.fcs", n=1000)
    # drop the file on the window, as from a file manager
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(path)])
    drop = QDropEvent(QPointF(50, 50), Qt.CopyAction, mime, Qt.LeftButton, Qt.NoModifier)
    window.dropEvent(drop)
    qtbot.waitUntil(lambda: window.current is not None, timeout=10_000)
    tube = window.current
    cell = window.density_map.cells[0]
    vb = cell.plot.vb
    (x0, x1), (y0, y1) = vb.viewRange()
    # rectangle tool: one click places a box centred on the click
    window.act_rect.trigger()
    centre = vb.mapViewToScene(QPointF(0.5 * (x0 + x1), 0.5 * (y0 + y1)))
    window.density_map._scene_clicked(_Click(centre))
    assert len(tube.regions) == 1
    r = tube.regions.names[0]
    reg = tube.regions[r]
    xs, ys = tube.values[:, cell.ix], tube.values[:, cell.iy]
    # reference: numpy count with half-open bounds (Gating-ML 2.0 rectangle gates, from memory)
    ref = np.count_nonzero((xs >= reg.x[0]) & (xs < reg.x[1]) & (ys >= reg.y[0]) & (ys < reg.y[1]))
    assert window.region_count(r) == ref > 0
    # polygon tool: three clicks, the last a double-click, close a triangle
    window.act_poly.trigger()
    pts = [(x0 + 0.1 * (x1 - x0), y0 + 0.1 * (y1 - y0)), (x0 + 0.9 * (x1 - x0), y0 + 0.1 * (y1 - y0)),
           (0.5 * (x0 + x1), y0 + 0.9 * (y1 - y0))]
    for k, (px, py) in enumerate(pts + [pts[-1]]):
        window.density_map._scene_clicked(_Click(vb.mapViewToScene(QPointF(px, py)), double=(k == 3)))
    assert len(tube.regions) == 2
    poly = tube.regions[tube.regions.names[1]]
    assert poly.kind == "polygon" and len(poly.vertices) == 3
    # rename by editing the table cell
    window.selections.table.item(0, 0).setText("box")
    assert tube.regions.names[0] == "box" and "box" in window.density_map.cells[0].rois


def test_contrast_with_control_highlights_enriched(qtbot, window, tmp_path):
    import fcsparser

    test_path = make_fcs(tmp_path / "test.fcs", n=2000, seed=3)
    # control: events of the same generator without the bright FL1 population
    base = make_fcs(tmp_path / "base.fcs", n=2000, seed=4)
    from core.fcs import read_fcs

    ef = read_fcs(base)
    data = ef.data.copy()
    k = 2000 // 40
    data[:k, 2] = data[k:2 * k, 2]  # remove the bright population
    write_fcs(tmp_path / "control.fcs", data, CHANNELS, keywords={"$SPILLOVER": ef.keywords["$SPILLOVER"]},
              channel_labels=["", "", "CD3", "CD4"], channel_ranges=[262144] * 4)
    window.open_paths([test_path])
    panel = window.contrast_panel
    stages = []
    real_step = panel.step
    panel.step = lambda step, total, info: (stages.append(panel.stage.text()), real_step(step, total, info))
    with qtbot.waitSignal(window.fitEnded, timeout=120_000) as blocker:
        window.choose_control(str(tmp_path / "control.fcs"))
        # during the run the panel itself says what is happening, not "No control chosen"
        assert not panel.progress.isHidden() and "Contrasting with control.fcs" in panel.result.text()
        assert window.notebook.currentWidget() is panel
    assert blocker.args == [True], window.last_fit_problem
    assert panel.progress.isHidden()
    # the stage text named the models being fitted: control parts, then test parts
    seen = " | ".join(stages)
    assert "Control model, part 1 of 3" in seen and "Test model, part 3 of 3" in seen, seen[-300:]
    a = window.current.analysis
    assert a.enriched is not None and a.contrast.rate == 0.05
    assert window.highlight_enriched
    assert f"{int(a.enriched.sum()):,} new events" in window.rarity_bar.count.text()
    assert f"{a.contrast.count:,} new events" in panel.result.text() and "false discovery rate of 5 %" in panel.result.text()
    # the enriched events lie mostly in the population the control lacks (the first 50 events)
    assert a.enriched[:k].mean() > 0.5 > 10 * a.enriched[k:].mean()
    # the Rarity controls do nothing while the new events are shown: they are greyed out
    assert not window.rarity_bar.slider.isEnabled() and not window.rarity_bar.spin.isEnabled()
    panel.show_enriched.setChecked(False)
    assert window.rarity_bar.slider.isEnabled() and "rare events" in window.rarity_bar.count.text()
    panel.show_enriched.setChecked(True)
    # keep the new events as a region (kind "enriched"), counted like any region
    assert panel.keep_button.isEnabled()
    panel.keep_button.click()
    tube = window.current
    name = "new vs control"
    assert tube.regions[name].kind == "enriched" and tube.regions[name].control == "control.fcs"
    assert window.region_count(name) == int(a.enriched.sum())
    assert tube.recipe_with_regions().regions[-1].to_dict() == {"name": name, "kind": "enriched", "parent": None,
                                                       "control": "control.fcs"}
    # and exported like any region: read back with fcsparser, p and q columns included
    from desktop.dialogs import ExportDialog

    dlg = ExportDialog(window, tube, [name])
    out = tmp_path / "new-events.fcs"
    dlg.path.setText(str(out))
    dlg.export()
    meta, df = fcsparser.parse(str(out), reformat_meta=True)
    assert len(df) == int(a.enriched.sum())
    assert (df["contrast q"] <= 0.05).all() and (df["contrast p"] > 0).all()
    assert (df[f"region {name}"] == 1).all()
    assert meta["BOSCAGE_CONTROL"] == "control.fcs" and float(meta["BOSCAGE_FDR"]) == 0.05


def test_scale_editor_keeps_small_factors(qtbot, window, tmp_path):
    # a linear scale of 1/$PnR (about 3.8e-06 for a 262,144 range) must be shown
    # and kept as is, not rounded to 0 by the editor
    path = make_fcs(tmp_path / "t.fcs", n=500)
    window.open_paths([path])
    tube = window.current
    panel = window.channels_panel
    panel.set_spec("FSC-A", {"kind": "linear", "scale": 3.814697265625e-06, "offset": 0.0})
    qtbot.waitUntil(lambda: tube.recipe.transforms["FSC-A"]["scale"] == 3.814697265625e-06, timeout=3000)
    panel.table.selectRow(panel._names.index("FSC-A"))
    box = panel._param_boxes["scale"]
    assert box.value() == pytest.approx(3.814697265625e-06, rel=1e-12)
    assert box.text().startswith("3.8147e-06")
    box.stepBy(1)          # a step is a tenth of the value's magnitude
    qtbot.waitUntil(lambda: tube.recipe.transforms["FSC-A"]["scale"] == pytest.approx(3.914697265625e-06, rel=1e-9),
                    timeout=3000)
    scale = tube.recipe.transforms["FSC-A"]["scale"]
    np.testing.assert_allclose(tube.values[:, 0], tube.event_file.data[:, 0].astype(np.float64) * scale, rtol=1e-12)


def test_populations_list_highlight_keep_as_region_and_export(qtbot, window, tmp_path, messages):
    """The Populations panel shows core.populations' table; choosing a row lights
    exactly that population's events; keeping it makes a population region whose
    exported events are read back with fcsparser (reference)."""
    import fcsparser

    from desktop.dialogs import ExportDialog

    path = make_fcs(tmp_path / "pops.fcs", n=4000, seed=3)
    window.open_paths([path], raise_errors=True)
    # with 4 trees the bright 2.5 % group is a plateau of the fitted density, not a hill of its own;
    # at 3,000 fit events the mixture's background holds it and only the trees make it a hill, so the
    # tree stage's keep rule (layer_tol x the map's scoring cost) is lowered here to keep them
    window.fit_panel.set_engine_settings({"n_trees": 20, "max_depth": 14, "max_fit_events": 3000})
    window.current.recipe.engine = dict(window.current.recipe.engine or {}, layer_tol=0.0025)
    fit(qtbot, window)
    tube = window.current
    a = tube.analysis
    panel = window.populations_panel
    assert a.populations is not None
    assert panel.table.rowCount() == len(a.populations.table) >= 2
    # rows in the table's order, rare first; profile and count as core computed them
    for i, r in enumerate(a.populations.table):
        assert panel.table.item(i, 1).text() == r["short_profile"]
        assert r["profile"] in panel.table.item(i, 1).toolTip()
        assert panel.table.item(i, 2).text() == f"{r['count']:,}"
    small = min(a.populations.table, key=lambda r: r["count"])
    panel.choose(small["id"])
    expected = a.population_labels == small["id"]
    assert np.array_equal(window.density_map.highlight_mask, expected)
    assert int(expected.sum()) == small["count"]     # numpy count of the labels
    panel.keep_button.click()
    regions = [r for r in tube.regions if r.kind == "population"]
    assert len(regions) == 1
    name = regions[0].name
    assert np.array_equal(tube.masks[name], expected)
    # the region is stored in the recipe with its definition
    assert any(d["kind"] == "population" and d["population"] == small["id"] and d["definition"]
               for d in tube.recipe_with_regions().to_dict()["regions"])
    dlg = ExportDialog(window, tube, [name])
    out = tmp_path / "population.fcs"
    dlg.path.setText(str(out))
    dlg.export()
    assert not messages, messages
    meta, df = fcsparser.parse(str(out), reformat_meta=True, channel_naming="$PnN")
    assert len(df) == int(expected.sum())
    # the exported column holds the population number the panel shows (id + 1)
    np.testing.assert_array_equal(df["population"].to_numpy(), np.full(len(df), small["id"] + 1, dtype=np.float32))
    panel.clear_choice()
    assert np.array_equal(window.density_map.highlight_mask, tube.rare_mask)
    # keep the populations in the recipe: the saved recipe carries the definition (core's JSON form)
    window.populations_panel.store_button.click()
    saved = window.fitting.recipe_for_fit(tube)
    assert saved.populations["definition"] == a.populations.definition.to_dict()


def test_close_tube_frees_its_events_and_leaves_the_file(qtbot, window, tmp_path, monkeypatch):
    import gc
    import hashlib
    import weakref

    from PySide6.QtCore import QCoreApplication, QEvent

    a_path, b_path = make_fcs(tmp_path / "a.fcs", seed=1), make_fcs(tmp_path / "b.fcs", seed=2)
    before = hashlib.sha256(open(a_path, "rb").read()).hexdigest()
    window.open_paths([a_path, b_path])
    window.show_tube_by_path(os.path.abspath(a_path))
    a = window.current
    assert a.path == os.path.abspath(a_path)
    spec = a.recipe.transforms
    window.add_region({"name": "box", "kind": "rectangle", "channels": ["FSC-A", "SSC-A"],
                       "x": [0.1, 0.3], "y": [0.05, 0.2],
                       "transforms": {"FSC-A": spec["FSC-A"], "SSC-A": spec["SSC-A"]}})
    del spec
    # unsaved regions: "Cancel" keeps the tube open, "Discard" closes it
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: QMessageBox.Cancel))
    assert window.close_tube() is False
    assert a.path in window.tubes and window.current is a
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: QMessageBox.Discard))
    held = [weakref.ref(a), weakref.ref(a.values), weakref.ref(a.event_file.data)]
    del a
    assert window.close_tube() is True
    assert list(window.tubes) == [os.path.abspath(b_path)]
    assert window.current.path == os.path.abspath(b_path)           # the other tube is shown
    assert window.tubes_list.paths() == [os.path.abspath(b_path)]
    assert window.density_map.values is window.current.values
    gc.collect()
    assert [r() for r in held] == [None, None, None], "a closed tube's events are still held"
    assert hashlib.sha256(open(a_path, "rb").read()).hexdigest() == before  # the file is not touched
    # while a tube is being fitted it is not closed (Stop first)
    b = window.current
    window.fit_panel.set_engine_settings({"n_trees": 200, "max_fit_events": 3000})
    window.start_fit()
    assert window.fit_running()  # ends only when its result reaches the GUI thread
    assert window.close_tube() is False and b.path in window.tubes
    window.cancel_job()
    qtbot.waitUntil(lambda: not window.fit_running(), timeout=60_000)
    # the last tube closed: an empty window holding no per-event array
    held = [weakref.ref(b.values)]
    del b
    assert window.close_tube() is True
    QCoreApplication.sendPostedEvents(None, QEvent.DeferredDelete)  # the ended job deletes itself
    gc.collect()
    assert window.current is None and window.tubes == {} and window.tubes_list.paths() == []
    assert window.density_map.values is None and window.density_map.cells == []
    assert held[0]() is None
    assert window.card.summary.text() == "No tube open"
    # and a file opens again after that
    window.open_paths([a_path])
    assert window.current.n_events == 3000 and len(window.density_map.cells) > 0


def test_a_closed_window_frees_every_tube(qtbot, tmp_path, monkeypatch, messages):
    import gc
    import weakref

    monkeypatch.setenv("BOSCAGE_SETTINGS", str(tmp_path / "settings.ini"))
    from desktop.app import make_app
    from desktop.main_window import MainWindow

    make_app()
    win = MainWindow(interactive=False)
    qtbot.addWidget(win)
    win.show()
    win.open_paths([make_fcs(tmp_path / "a.fcs")])
    held = [weakref.ref(win.current.values), weakref.ref(win.current.event_file.data)]
    win.close()  # the Python wrapper of a closed window can live on (signal connections)
    gc.collect()
    assert [r() for r in held] == [None, None]


def test_a_refit_frees_the_previous_fit_and_its_contours_job(qtbot, window, tmp_path):
    # an ended job kept its closures (the fit's events, the contours' analysis) alive
    # as long as the window lived: every refit held on to the previous analysis
    import gc
    import weakref

    from PySide6.QtCore import QCoreApplication, QEvent

    window.open_paths([make_fcs(tmp_path / "tube.fcs")])
    window.act_contours.setChecked(True)
    with qtbot.waitSignal(window.contoursEnded, timeout=120_000):
        fit(qtbot, window)
    first = weakref.ref(window.current.analysis)
    fit(qtbot, window)
    qtbot.waitUntil(lambda: not window.fit_running(), timeout=120_000)
    QCoreApplication.sendPostedEvents(None, QEvent.DeferredDelete)
    gc.collect()
    assert window.current.analysis is not None
    assert first() is None, "the previous fit is still held"
