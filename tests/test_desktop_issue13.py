"""The analyst's everyday path in the window (pytest-qt, offscreen): tube
switching, axes in original units, the Fit panel, regions, dialogs, pairs and
small screens.  References are named beside each check."""

from __future__ import annotations

import os
from types import SimpleNamespace

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from tests.test_desktop_app import FEW_TREES, fit, make_fcs, messages, window  # noqa: E402,F401


def _fake_fit(tube, enriched=None):
    """A fitted-looking analysis (log density from a seeded normal draw)."""
    from core.rare import rarity_percentile

    n = tube.n_events
    ld = np.random.default_rng(n).normal(size=n)
    return SimpleNamespace(log_density=ld, rarity=rarity_percentile(ld), kept=np.ones(n, bool), n_kept=n,
                           n_events=n, enriched=enriched, contrast=None, model=None, reason=np.full(n, ""),
                           values=tube.values, heldout_loglik=0.0, timing={"total": 0.0}, info={},
                           cleaning_text=lambda: f"{n:,} of {n:,} events kept")


def test_switch_tubes_after_fit_contrast_and_region_edit(qtbot, window, tmp_path, messages):
    a = make_fcs(tmp_path / "a.fcs", n=1500, seed=1)
    b = make_fcs(tmp_path / "b.fcs", n=2000, seed=2)
    window.open_paths([a, b])
    window.show_tube_by_path(a)
    fit(qtbot, window)
    ta = window.current
    assert window.density_map.highlight_mask.shape == (1500,)
    window.show_tube_by_path(b)  # used to fail: the old tube's (1500,) mask against (2000,) events
    assert not messages, messages
    tb = window.current
    assert tb.path == b and "b.fcs" in window.density_map.title.text and "not fitted" in window.density_map.title.text
    assert window.density_map.highlight_mask is None and not window.rarity_bar.keep_button.isEnabled()
    # after a contrast: A highlights enriched events; B must not inherit it
    window.show_tube_by_path(a)
    ta.highlight_enriched = True
    ta.analysis.enriched = np.zeros(1500, bool)
    ta.analysis.enriched[:30] = True
    window.show_tube(ta)
    assert window.density_map.highlight_mask.sum() == 30
    window.show_tube_by_path(b)
    assert not messages and window.density_map.highlight_mask is None and not window.highlight_enriched
    # after a region edit on A: B shows none of A's regions, A keeps its own
    window.show_tube_by_path(a)
    window.regions.drawn("rectangle", "FL1-A", "FL2-A", [(0.1, 0.1), (0.5, 0.5)])
    window.show_tube_by_path(b)
    assert len(tb.regions) == 0 and window.selections.table.rowCount() == 0
    assert all(not c.rois for c in window.density_map.cells)
    window.show_tube_by_path(a)
    assert len(ta.regions) == 1 and window.selections.table.rowCount() == 1 and not messages


def test_axes_read_in_original_units_and_colour_has_a_legend(qtbot, window, tmp_path):
    from core.transforms import make_transform
    from desktop.axes import axis_ticks

    window.open_paths([make_fcs(tmp_path / "a.fcs", n=1500)])
    tube = window.current
    cell = window.density_map.cell_for("FL1-A", "FL2-A")
    axis = cell.plot.getAxis("bottom")
    spec = tube.recipe.transforms["FL1-A"]
    assert axis.spec == spec and spec["kind"] != "linear"
    lo, hi = cell.plot.vb.viewRange()[0]
    major, minor = axis_ticks(spec, lo, hi)
    labels = [t for _, t in major]
    assert len(labels) >= 2 and all(t == "0" or t.lstrip("-").startswith("10") for t in labels)
    # reference: the inverse transform of every labelled position is 0 or a power of ten (+-)
    back = make_transform(spec).inverse(np.array([p for p, _ in major]))
    for v in back:
        assert abs(v) < 1e-6 or abs(np.log10(abs(v)) - round(np.log10(abs(v)))) < 1e-6
    # linear scatter axes read in instrument units (no x0.001 factor)
    scatter = window.density_map.cells[0].plot.getAxis("bottom")
    assert scatter.spec["kind"] == "linear" and not scatter.autoSIPrefix
    # colour: density rank by default, on a fixed 0-100 scale; a legend says what is drawn
    tube.analysis = _fake_fit(tube)
    tube.update_rare()
    window.show_tube(tube)
    assert window.density_map.levels == (0.0, 100.0)
    assert "rank" in window.density_map.colourbar.axis.labelText
    text = window.density_map.legend.text()
    assert "rarest" in text and "rare events" in text
    window.rarity_bar.colour.setCurrentIndex(window.rarity_bar.colour.findData("log"))
    assert "log density" in window.density_map.colourbar.axis.labelText


def test_fit_panel_ranges_stages_and_sentences(qtbot, window):
    from core.density import AdditiveTreeDensity
    from desktop.messages import error_text
    from desktop.panels.fit import fit_stage

    p = window.fit_panel
    # the largest values the panel allows are accepted by the engine's own checks
    for box, key in ((p.learning_rate, "learning_rate"), (p.max_depth, "max_depth")):
        AdditiveTreeDensity(**{key: box.maximum()})._validate_params()
        with pytest.raises(ValueError):
            AdditiveTreeDensity(**{key: box.maximum() + (0.01 if key == "learning_rate" else 1)})._validate_params()
    assert not p.advanced.isVisibleTo(p) and p.n_trees.parent() is p.advanced  # trees etc. under the fold
    # progress moves and the stage is named during the mixture search (the engine reports
    # (0, n_trees) there: the bar used to sit at 0 %)
    p.started()
    p.step(0, 400, {"stage": "Fitting the Gaussian-mixture base: 4 components"})
    for _ in range(20):
        p.step(0, 400, {"stage": "Fitting the Gaussian-mixture base: 4 components"})
    assert p.progress.value() > 0 and "Stage 1 of 3" in p.stage.text()
    p.step(0, 400, {"stage": "Fitting the mixture base: skewed components (4)"})
    assert fit_stage({"stage": "Fitting the mixture base: skewed components (4)"})[0] == "skew"
    v = p.progress.value()
    p.step(200, 400, 1.5)
    assert p.progress.value() > v and "Stage 3 of 3" in p.stage.text()
    label = p.curve_plot.getAxis("bottom").labelText
    p.show_curve([1.0, 1.2, 1.3])
    assert p.curve_plot.getAxis("bottom").labelText == label  # one x-axis label
    # a fit whose one tree was rolled back: the engine's curve is base, tree, then the kept
    # value twice (roll-back, dropped layer); two steps were tried and the base was kept
    p.show_curve([15.793, 15.7895, 15.793, 15.793])
    xs, ys = p.curve.getData()
    assert list(xs) == [1.0, 2.0] and list(ys) == [15.793, 15.7895]
    assert p.kept_line.value() == 15.793 and p.kept_line.isVisible()
    # fit steps are whole numbers: no tick between step 1 and 2 (pyqtgraph's own axis puts
    # ticks at 0.5 steps over a range of 3)
    ticks = [v for _, level in p.curve_plot.getAxis("bottom").tickValues(1.0, 4.0, 300.0) for v in level]
    assert ticks and all(float(t).is_integer() for t in ticks)
    text = error_text(ValueError("learning_rate must be in (0, 1)"))
    assert "Traceback" not in text and "Unexpected" not in text and text.endswith((".", ")"))


class _Drag:
    """A left-button drag as pyqtgraph's view box receives it."""

    def __init__(self, start, now, first, last):
        from PySide6.QtCore import Qt

        self._s, self._n, self._first, self._last, self._b = start, now, first, last, Qt.LeftButton

    def button(self):
        return self._b

    def accept(self):
        pass

    def isStart(self):  # noqa: N802
        return self._first

    def isFinish(self):  # noqa: N802
        return self._last

    def scenePos(self):  # noqa: N802
        return self._n

    def buttonDownScenePos(self):  # noqa: N802
        return self._s


def test_regions_drag_handles_names_nesting_show_only_and_export(qtbot, window, tmp_path, monkeypatch, messages):
    from PySide6.QtCore import QPointF
    from PySide6.QtWidgets import QMessageBox

    from desktop.dialogs import ExportDialog

    src = tmp_path / "in"
    src.mkdir()
    window.open_paths([make_fcs(src / "t.fcs", n=1500)])
    tube = window.current
    cell = window.density_map.cell_for("FL1-A", "FL2-A")
    vb = cell.plot.vb
    (x0, x1), (y0, y1) = vb.viewRange()
    a = (x0 + 0.2 * (x1 - x0), y0 + 0.2 * (y1 - y0))
    b = (x0 + 0.7 * (x1 - x0), y0 + 0.8 * (y1 - y0))
    window.act_rect.trigger()
    start = vb.mapViewToScene(QPointF(*a))
    for k, pt in enumerate((a, (0.5 * (a[0] + b[0]), a[1]), b)):
        vb.mouseDragEvent(_Drag(start, vb.mapViewToScene(QPointF(*pt)), k == 0, k == 2))
    name = "CD3 x CD4 box"  # named from its channels' labels
    r = tube.regions[name]
    assert r.x == pytest.approx((a[0], b[0]), rel=1e-6) and r.y == pytest.approx((a[1], b[1]), rel=1e-6)
    roi = cell.rois[name]
    assert len(roi.getHandles()) == 4  # a handle on every corner
    (vx0, vx1), (vy0, vy1) = vb.viewRange()
    lx, ly = roi.label.pos().x(), roi.label.pos().y()
    assert vx0 <= lx <= vx1 and vy0 <= ly <= vy1  # the name sits inside the view
    # the count is in the second column, visible without scrolling
    assert window.selections.COLUMNS[1] == "Events"
    # nesting and "show only": a band drawn while the box is shown alone is nested in it
    window.selections.select(name)
    window.selections.only_button.setChecked(True)
    assert window.density_map.only is not None and window.density_map.only.sum() == tube.count(name)
    window.act_interval.trigger()
    c = vb.mapViewToScene(QPointF(x0 + 0.3 * (x1 - x0), y0 + 0.5 * (y1 - y0)))
    d = vb.mapViewToScene(QPointF(x0 + 0.5 * (x1 - x0), y0 + 0.5 * (y1 - y0)))
    vb.mouseDragEvent(_Drag(c, c, True, False))
    vb.mouseDragEvent(_Drag(c, d, False, True))
    band = tube.regions["CD3 band"]
    assert band.kind == "interval" and band.parent == name
    v1 = tube.values[:, tube.names.index("FL1-A")]
    # reference: numpy on the values, inside the box's mask
    assert tube.count("CD3 band") == int(np.count_nonzero(tube.masks[name] & (v1 >= band.low) & (v1 < band.high)))
    # export: the last export folder (never beside the input), a name from the region, a replace question
    out = tmp_path / "exports"
    out.mkdir()
    window.settings.set_value("folders/export", str(out))
    dlg = ExportDialog(window, tube, [name], window.settings)
    assert dlg.which.currentText().startswith(name) and not dlg.which.currentText().startswith("Region")
    assert os.path.dirname(dlg.path.text()) == str(out) and " " not in os.path.basename(dlg.path.text())
    dlg.export()
    written = dlg.written
    asked = []
    monkeypatch.setattr(QMessageBox, "question", staticmethod(lambda *a, **k: asked.append(a) or QMessageBox.No))
    dlg2 = ExportDialog(window, tube, [name], window.settings)
    assert dlg2.path.text() == written
    dlg2.export()
    assert asked and dlg2.written is None and not messages


def test_batch_dialog_defaults_and_control(qtbot, window, tmp_path):
    from desktop.dialogs import BatchDialog

    folder = tmp_path / "tubes"
    folder.mkdir()
    for k, n in enumerate(("ctrl.fcs", "s1.fcs", "s2.fcs")):
        make_fcs(folder / n, n=300, seed=k)
    window.open_paths([str(folder / "s1.fcs")])
    dlg = BatchDialog(window, None, folder=str(folder), control=str(folder / "ctrl.fcs"))
    qtbot.addWidget(dlg)
    assert dlg.input.text() == str(folder)  # starts at the open tube's folder
    # the command line's default: every core (core.batch's --workers help says so)
    assert dlg.workers.value() == (os.cpu_count() or 1)
    text = dlg.files_label.text()
    assert text.startswith("2 FCS file(s)") and "ctrl.fcs is in this folder" in text and "not analysed" in text
    # output names are the batch's (core.batch.output_folder_names), shown before the run
    from core.batch import output_folder_names

    first = output_folder_names([str(folder / "s1.fcs")])["s1.fcs"]
    assert f"{first}/" in text and f"'{first}_rare.fcs'" in text


def test_pairs_from_lists_scales_apply_and_fitted_mark(qtbot, window, tmp_path):
    from desktop.dialogs import PairsDialog

    path = make_fcs(tmp_path / "a.fcs", n=1500)
    window.open_paths([path])
    tube = window.current
    dlg = PairsDialog(window, tube)
    items = [dlg.rows[0][0].itemText(i) for i in range(dlg.rows[0][0].count())]
    assert "CD3 (FL1-A)" in items  # label and name
    window.edits.set_pairs([("CD3", "CD4")])  # labels are accepted
    assert tube.pairs == [(2, 3)] and window.density_map.cells[0].plot.getAxis("bottom").labelText.startswith("CD3")
    fit(qtbot, window)
    assert "•" in window.tubes_list.list.item(0).text()
    specs = dict(tube.recipe.transforms)
    specs["FL1-A"] = {"kind": "arcsinh", "cofactor": 150.0}
    window.channels_panel.set_spec("FL1-A", specs["FL1-A"])
    qtbot.waitUntil(lambda: tube.analysis is None, timeout=3000)
    assert "•" not in window.tubes_list.list.item(0).text()
    assert "discarded" in window.fit_panel.status.text() and "CD3" in window.fit_panel.status.text()


def test_layout_at_1280_x_720(qtbot, window, tmp_path):
    window.resize(1280, 720)
    window.open_paths([make_fcs(tmp_path / "a.fcs", n=1500)])
    qtbot.wait(50)
    assert window.rarity_bar.slider.width() >= 100  # not a dot
    # every tab reachable without scrolling, even with two more panels than today
    from PySide6.QtWidgets import QLabel

    before = window.notebook.count()
    for title in ("Notes", "More"):
        window.add_side_panel(QLabel("another panel"), title)
    qtbot.wait(50)
    bar = window.notebook.tabBar()
    last = bar.tabRect(bar.count() - 1)
    assert bar.count() == before + 2 >= 8 and last.bottom() <= bar.height() and last.right() <= bar.width()
    assert not window.rarity_bar.keep_button.isEnabled()  # before a fit: nothing to keep
