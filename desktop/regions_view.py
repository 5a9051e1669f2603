"""Regions on the window: drawing, dragging, renaming, nesting, combining,
"show only", keeping rare events, export.  Every change is made by the
session (:class:`core.session.Session`); this controller only passes the
analyst's gestures on and shows the result on the map and in the table."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

from PySide6.QtCore import QObject, QTimer
from PySide6.QtWidgets import QInputDialog

from core.errors import RegionError

from desktop.messages import guarded

DRAW_HINTS = {"rectangle": "Press and drag a box on a plot",
              "interval": "Press and drag across a plot: the band of its horizontal channel",
              "polygon": "Click the outline's corners on a plot; double-click to close it"}


class RegionsController(QObject):
    def __init__(self, window) -> None:
        super().__init__(window)
        self.win = window
        self.only = ""  # the region shown alone, or ""
        self._pending: tuple | None = None
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(30)
        self._timer.timeout.connect(self.apply_pending)
        dm, sel = window.density_map, window.selections
        dm.roiDrawn.connect(self.drawn)
        dm.roiChanged.connect(self.moving)
        dm.roiFinished.connect(self.moved)
        sel.renameRequested.connect(self.rename)
        sel.deleteRequested.connect(self.delete)
        sel.combineRequested.connect(self.combine)
        sel.nestRequested.connect(self.nest)
        sel.showOnlyRequested.connect(self.show_only)
        sel.exportRequested.connect(window.export_dialog)
        window.rarity_bar.keepRequested.connect(lambda _share: self.keep_rare())

    @property
    def session(self):
        return self.win.session

    # -- drawing -------------------------------------------------------------------
    def arm(self, kind: str) -> None:
        if self.session.current is None:
            return
        self.win.density_map.start_drawing(kind)
        self.win.statusBar().showMessage(DRAW_HINTS[kind], 6000)

    @guarded("add region")
    def drawn(self, kind: str, x_name: str, y_name: str, vertices) -> None:
        d = self.session.drawn_region(kind, x_name, y_name, vertices, parent=self.only or None)
        self.add(d)
        self.win.selections.select(d["name"])
        self.win.show_panel(self.win.selections)

    def add(self, region):
        r = self.session.add_region(region)
        self.show_roi(r)
        self.refresh(full=True)
        return r

    def show_roi(self, r) -> None:
        if r.kind == "rectangle":
            verts = [(r.x[0], r.y[0]), (r.x[1], r.y[1])]
        elif r.kind == "polygon":
            verts = list(r.vertices)
        elif r.kind == "interval":
            self.win.density_map.add_band(r.name, r.channels[0], r.low, r.high, r.name)
            return
        else:
            return
        self.win.density_map.add_roi(r.name, r.kind, r.channels[0], r.channels[1], verts, r.name)

    def show_all(self, tube) -> None:
        for r in tube.regions:
            self.show_roi(r)
        self.refresh(full=True)
        self._apply_only(tube)

    # -- dragging ------------------------------------------------------------------
    def moving(self, name: str, vertices) -> None:
        self._pending = (name, vertices)
        if not self._timer.isActive():
            self._timer.start()

    def moved(self, name: str, vertices) -> None:
        self._pending = (name, vertices)
        self.apply_pending(final=True)

    def apply_pending(self, final: bool = False) -> None:
        tube = self.session.current
        if self._pending is None or tube is None:
            return
        name, vertices = self._pending
        self._pending = None
        if name not in tube.regions:
            return
        try:
            fast = self.session.move_region(name, vertices, final=final)
        except RegionError as exc:  # e.g. a polygon squashed flat while dragging: keep the last good one
            self.win.statusBar().showMessage(str(exc), 4000)
            return
        self.refresh(counts_only=True) if fast else self.refresh()
        if final and self.only:
            self._apply_only(tube)

    def refresh(self, full: bool = False, counts_only: bool = False) -> None:
        tube = self.session.current
        if tube is None:
            return
        if full:
            self.win.selections.show_regions(list(tube.regions), tube.stats)
            self.win.map_view.update_legend(tube)
        else:
            self.win.selections.update_counts(tube.stats)

    # -- table actions ---------------------------------------------------------------
    @guarded("rename region")
    def rename(self, old: str, new: str) -> None:
        try:
            self.session.rename_region(old, new)
        except RegionError:
            self.refresh(full=True)  # put the old name back in the table
            raise
        self.win.density_map.remove_roi(old)
        self.show_roi(self.session.current.regions[new.strip()])
        if self.only == old:
            self.only = new.strip()
        self.refresh(full=True)

    @guarded("delete region")
    def delete(self, names) -> None:
        if self.session.current is None or not names:
            return
        for name in self.session.delete_regions(names):
            self.win.density_map.remove_roi(name)
        if self.only in names:
            self.show_only("")
        self.refresh(full=True)

    @guarded("combine regions")
    def combine(self, operator: str, names) -> None:
        r = self.session.combine_regions(operator, names)
        self.refresh(full=True)
        self.win.selections.select(r.name)

    @guarded("nest region")
    def nest(self, name: str, parent: str | None = None) -> None:
        tube = self.session.require()
        if parent is None:
            choices = ["(not nested)"] + [n for n in tube.regions.names if n != name]
            parent, ok = QInputDialog.getItem(self.win, "Nest a region", f"Count {name!r} only among the "
                                              "events of:", choices, 0, False)
            if not ok:
                return
        self.session.set_parent(name, None if parent == "(not nested)" else parent)
        self.refresh(full=True)

    @guarded("show only")
    def show_only(self, name: str) -> None:
        tube = self.session.current
        self.only = name if tube is not None and name in tube.regions else ""
        self._apply_only(tube)
        sel = self.win.selections.only_button
        sel.blockSignals(True)
        sel.setChecked(bool(self.only))
        sel.blockSignals(False)

    def _apply_only(self, tube) -> None:
        if tube is None:
            return
        if self.only and self.only not in tube.masks:
            self.only = ""
        if self.only or self.win.density_map.only is not None:  # no redraw when nothing changes
            self.win.density_map.set_filter(tube.masks[self.only] if self.only else None)
        self.win.map_view.update_title(tube)

    @guarded("keep new events")
    def keep_enriched(self) -> None:
        r = self.session.keep_enriched_region()
        self.refresh(full=True)
        self.win.selections.select(r.name)
        self.win.show_panel(self.win.selections)

    @guarded("keep rare events")
    def keep_rare(self) -> None:
        r = self.session.keep_rare_region()
        self.refresh(full=True)
        self.win.selections.select(r.name)
