"""The "Density map": a grid of pairwise event plots.

Events are never drawn one graphics item each.  Every plot is an image of a
2-D binning of the events (``BINS`` x ``BINS``): before a fit each bin is
coloured by its event count (log10), after a fit by the mean density rank
(or log density) of its events, through a perceptually uniform colour map with a
colour bar.  Highlighted events (rare or enriched) are drawn as a scatter on
top, subsampled to at most ``MAX_HIGHLIGHT`` points per plot with a fixed seed
(the label above the grid always gives the full count).  Highest-density-region
contours (50 / 90 / 99 %) come from :mod:`core.contours` and are drawn as lines.
Building blocks (binning, dots, contour lines, the drawing view box) are in
:mod:`desktop.plot_items`.
Values are events x channels (transformed units, what regions use).
"""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QRectF, Qt, Signal
from PySide6.QtWidgets import QLabel, QVBoxLayout, QWidget

from desktop import style
from desktop.axes import TransformAxis
from desktop.plot_items import (BINS, DotsItem, DrawingViewBox, axis_label, channel_bins, channel_extent,
                                pair_index, roi_vertices)

#: Colour modes: the density's rank (percent of events less dense: 0 rarest, 100
#: most common; the default) or the fitted log density in nats.
COLOUR_MODES = {"rank": "density rank: % of events less dense", "log": "log density (nats)"}
MAX_HIGHLIGHT = 20000
#: Plots built when the map is created (the default pairs' count).
DEFAULT_PLOTS = 6


@dataclass
class PairCell:
    """One plot of the grid: channels ``ix`` (x axis) and ``iy`` (y axis)."""

    ix: int
    iy: int
    plot: pg.PlotItem
    image: pg.ImageItem
    highlight: DotsItem
    extent: tuple[float, float, float, float]
    index: np.ndarray  # flat bin per event, -1 outside
    inside: np.ndarray  # events with index >= 0
    counts: np.ndarray  # (BINS*BINS,) events per bin
    contours: list = field(default_factory=list)
    rois: dict = field(default_factory=dict)  # region id -> ROI item


class DensityMap(QWidget):
    """Grid of pair plots with density colouring, highlights, contours and regions.

    Signals:
      ``roiChanged(region_id, vertices)`` while a region's outline is dragged
      (vertices: list of (x, y) in the plot's transformed units);
      ``roiDrawn(kind, x_channel, y_channel, vertices)`` when the analyst has
      drawn a new rectangle or polygon with a drawing tool.
    """

    roiChanged = Signal(str, object)
    roiFinished = Signal(str, object)
    roiDrawn = Signal(str, str, str, object)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.view = pg.GraphicsLayoutWidget()
        self.view.setBackground(style.SLATE)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(0)
        lay.addWidget(self.view, 1)
        self.legend = QLabel()
        self.legend.setObjectName("MapLegend")
        self.legend.setWordWrap(True)
        self.legend.setStyleSheet(f"background: {style.SLATE}; color: #c9d1cc; padding: 3px 8px; font-size: 9pt;")
        lay.addWidget(self.legend)
        self.only: np.ndarray | None = None  # show only these events (bool (n_events,)) or all
        self.level_range: tuple[float, float] | None = None  # fixed colour levels, else percentiles
        self._drag_preview = None
        self.cells: list[PairCell] = []
        self.names: list[str] = []
        self.values: np.ndarray | None = None
        self.colour_values: np.ndarray | None = None
        self.colour_label = "events per bin (log10)"
        self.highlight_mask: np.ndarray | None = None
        self.contours_visible = True
        self.draw_mode: str | None = None  # None, "rectangle", "polygon"
        self._poly_points: list[tuple[float, float]] = []
        self._poly_cell: PairCell | None = None
        self._poly_preview: pg.PlotDataItem | None = None
        self.colourbar: pg.ColorBarItem | None = None
        self._plots: list = []  # (PlotItem, ImageItem, DotsItem) of the grid shown now
        self._pool: list = []   # every such triple made so far (reused between grids)
        self.title = pg.LabelItem("", color="#c9d1cc", size="10pt")
        self.view.scene().sigMouseClicked.connect(self._scene_clicked)
        # the usual grid (six pairs, three columns) is built now, hidden, so that
        # opening a file only bins and colours (building plots is the slow part)
        self._build_grid(DEFAULT_PLOTS, 3)
        for plot, _img, _hl in self._plots:
            plot.hide()

    # ------------------------------------------------------------------ data
    def set_events(self, values: np.ndarray, names: Sequence[str],
                   pairs: Sequence[tuple[int, int]], labels: Sequence[str] | None = None,
                   columns: int | None = None, colour_values: np.ndarray | None = None,
                   colour_label: str = "", specs: Sequence | None = None,
                   levels: tuple[float, float] | None = None) -> None:
        """Show ``values`` (events x channels) as one plot per (x, y) channel pair,
        bins coloured by ``colour_values`` (see :meth:`set_colouring`).

        Regions and contours are cleared (the caller shows the ones that apply).
        Plot items are reused when the grid keeps its shape (creating them is
        the slow part of a redraw)."""
        values = np.asarray(values, dtype=np.float64)
        # highlights and filters belong to the events they were made for: the
        # caller shows the ones that apply to these events
        self.highlight_mask = None
        self.only = None
        self.values = values
        self.level_range = levels
        self.names = list(names)
        labels = list(labels) if labels else [""] * len(self.names)
        self._cancel_polygon()
        self._remove_overlays()
        n = len(pairs)
        if columns is None:
            columns = 1 if n <= 1 else 2 if n <= 4 else 3
        if len(self._plots) != n or getattr(self, "_columns", None) != columns:
            self._build_grid(n, columns)
        for plot, _img, _hl in self._plots:
            plot.show()
        self.cells = []
        extents: dict[int, tuple[float, float]] = {}
        chan_bins: dict[int, np.ndarray] = {}
        for k, (ix, iy) in enumerate(pairs):
            for c in (ix, iy):
                if c not in extents:
                    extents[c] = channel_extent(values[:, c])
                    chan_bins[c] = channel_bins(values[:, c], *extents[c])
            ext = extents[ix] + extents[iy]
            plot, img, hl = self._plots[k]
            plot.setLabel("bottom", axis_label(self.names[ix], labels[ix]))
            plot.setLabel("left", axis_label(self.names[iy], labels[iy]))
            if specs is not None:
                plot.getAxis("bottom").set_spec(specs[ix])
                plot.getAxis("left").set_spec(specs[iy])
            img.setRect(QRectF(ext[0], ext[2], ext[1] - ext[0], ext[3] - ext[2]))
            plot.setRange(xRange=ext[:2], yRange=ext[2:], padding=0)
            idx = pair_index(chan_bins[ix], chan_bins[iy])
            inside = idx >= 0
            if self.only is not None:
                inside &= self.only
            counts = np.bincount(idx[inside], minlength=BINS * BINS).astype(np.float64)
            self.cells.append(PairCell(ix, iy, plot, img, hl, ext, idx, inside, counts))
        self.colour_values = None if colour_values is None else np.asarray(colour_values, dtype=np.float64)
        self.colour_label = colour_label or ("mean log density" if colour_values is not None
                                             else "events per bin (log10)")
        self._redraw_images()
        self._redraw_highlight()

    def release(self) -> None:
        """Drop every per-event array (the window is closing); the plots keep their pictures."""
        self.values = self.colour_values = self.highlight_mask = self.only = None
        self.cells = []  # each held a bin number and an inside flag per event

    def _remove_overlays(self) -> None:
        """Take every region item and contour line off the plots shown now."""
        for cell in self.cells:
            for roi in cell.rois.values():
                cell.plot.removeItem(roi.label)
                cell.plot.removeItem(roi)
            for item in cell.contours:
                cell.plot.removeItem(item)

    def clear(self, title: str) -> None:
        """Show no events (the last tube was closed): plots hidden, regions and
        contours removed, every per-event array dropped."""
        self._cancel_polygon()
        self._remove_overlays()
        self.release()
        for plot, img, hl in self._plots:
            img.clear()
            plot.hide()
        if self.colourbar is not None:
            self.colourbar.hide()
        self.set_legend("")
        self.set_title(title)

    def _build_grid(self, n: int, columns: int) -> None:
        """Lay out ``n`` plots in ``columns``; plots made before are reused
        (making one is the slow part), new ones are added to the pool."""
        self.view.clear()
        self.colourbar = None
        self._columns = columns
        self.view.addItem(self.title, row=0, col=0, colspan=columns)
        while len(self._pool) < n:
            plot = pg.PlotItem(axisItems={"bottom": TransformAxis("bottom"), "left": TransformAxis("left")},
                               viewBox=DrawingViewBox(self))
            plot.setMenuEnabled(False)
            plot.hideButtons()
            plot.getViewBox().setBackgroundColor("#11161a")
            img = pg.ImageItem(np.zeros((BINS, BINS, 4), dtype=np.uint8), axisOrder="row-major")
            plot.addItem(img)
            hl = DotsItem(style.RARE, 3.5)
            hl.setZValue(5)
            plot.addItem(hl)
            self._pool.append((plot, img, hl))
        self._plots = self._pool[:n]
        for k, (plot, _img, _hl) in enumerate(self._plots):
            self.view.addItem(plot, row=1 + k // columns, col=k % columns)

    def names_of(self, cell: PairCell) -> tuple[str, str]:
        return self.names[cell.ix], self.names[cell.iy]

    def set_colouring(self, per_event: np.ndarray | None, label: str = "") -> None:
        """Colour bins by the mean of ``per_event`` (e.g. log density, (n_events,));
        None returns to event counts."""
        self.colour_values = None if per_event is None else np.asarray(per_event, dtype=np.float64)
        self.colour_label = label or ("mean log density" if per_event is not None else "events per bin (log10)")
        self._redraw_images()

    def set_colouring_levels(self, per_event, label: str, levels: tuple[float, float] | None) -> None:
        """As :meth:`set_colouring`, with fixed colour levels (None: 1st-99.9th percentile)."""
        self.level_range = levels
        self.set_colouring(per_event, label)

    def set_filter(self, mask: np.ndarray | None) -> None:
        """Show only the events in ``mask`` (bool (n_events,)); None shows all."""
        self.only = None if mask is None else np.asarray(mask, dtype=bool)
        for cell in self.cells:
            inside = cell.index >= 0
            if self.only is not None:
                inside &= self.only
            cell.inside = inside
            cell.counts = np.bincount(cell.index[inside], minlength=BINS * BINS).astype(np.float64)
        self._redraw_images()
        self._redraw_highlight()

    def set_legend(self, html: str) -> None:
        self.legend.setText(html)

    def set_highlight(self, mask: np.ndarray | None) -> None:
        """Draw the events in ``mask`` (bool, (n_events,)) on top of every plot."""
        self.highlight_mask = None if mask is None else np.asarray(mask, dtype=bool)
        self._redraw_highlight()

    def set_title(self, text: str) -> None:
        self.title.setText(text)

    # -------------------------------------------------------------- drawing
    def _redraw_images(self) -> None:
        if not self.cells:
            return
        cmap_name = style.DENSITY_COLOURMAP if self.colour_values is not None else style.COUNT_COLOURMAP
        cmap = pg.colormap.get(cmap_name)
        lut = cmap.getLookupTable(0.0, 1.0, 256, alpha=True)
        per_cell = []
        finite_vals = []
        for cell in self.cells:
            counts = cell.counts
            filled = counts > 0
            if self.colour_values is None:
                val = np.where(filled, np.log10(np.maximum(counts, 1.0)), np.nan)
            else:
                w = self.colour_values[cell.inside]
                ok = np.isfinite(w)
                idx = cell.index[cell.inside][ok]
                s = np.bincount(idx, weights=w[ok], minlength=BINS * BINS)
                c = np.bincount(idx, minlength=BINS * BINS)
                with np.errstate(invalid="ignore", divide="ignore"):
                    val = np.where(c > 0, s / np.maximum(c, 1), np.nan)
            per_cell.append(val)
            finite_vals.append(val[np.isfinite(val)])
        allv = np.concatenate(finite_vals) if finite_vals else np.zeros(0)
        if self.colour_values is not None and self.level_range is not None:
            lo, hi = self.level_range
        elif allv.size:
            lo, hi = np.percentile(allv, [1.0, 99.9]) if self.colour_values is not None else (0.0, float(allv.max()))
            if not hi > lo:
                hi = lo + 1.0
        else:
            lo, hi = 0.0, 1.0
        self.levels = (float(lo), float(hi))
        for cell, val in zip(self.cells, per_cell):
            rgba = np.zeros((BINS * BINS, 4), dtype=np.uint8)
            ok = np.isfinite(val)
            t = np.clip((val[ok] - lo) / (hi - lo), 0.0, 1.0)
            rgba[ok] = lut[(t * 255).astype(np.int64)]
            rgba[ok, 3] = 255
            cell.image.setImage(rgba.reshape(BINS, BINS, 4), autoLevels=False, levels=(0, 255))
        if self.colourbar is None:
            self.colourbar = pg.ColorBarItem(values=self.levels, colorMap=cmap, interactive=False,
                                             width=14, colorMapMenu=False)
            self.colourbar.axis.setLabel(self.colour_label)
            self.view.addItem(self.colourbar, row=1, col=self._columns,
                              rowspan=max(1, (len(self.cells) + self._columns - 1) // self._columns))
        else:
            self.colourbar.setColorMap(cmap)
            self.colourbar.setLevels(self.levels)
            self.colourbar.axis.setLabel(self.colour_label)
            self.colourbar.show()

    def _redraw_highlight(self) -> None:
        mask = self.highlight_mask
        for cell in self.cells:
            if mask is None or self.values is None or not mask.any():
                cell.highlight.setData(x=[], y=[])
                continue
            sel = np.flatnonzero(mask & cell.inside)
            if sel.size > MAX_HIGHLIGHT:
                sel = np.sort(np.random.default_rng(0).choice(sel, MAX_HIGHLIGHT, replace=False))
            cell.highlight.setData(x=self.values[sel, cell.ix], y=self.values[sel, cell.iy])

    def highlighted_points(self) -> int:
        """Number of highlight points currently drawn over all plots (after subsampling)."""
        return sum(c.highlight.n for c in self.cells)

    # ------------------------------------------------------------- contours
    def set_contours(self, lines_per_cell: Sequence[Sequence[tuple[int, np.ndarray]]] | None) -> None:
        """Draw contour lines: for each cell, a list of (level_index, (m, 2) xy array)
        with level_index 0/1/2 for the 50/90/99 % regions."""
        for cell in self.cells:
            for item in cell.contours:
                cell.plot.removeItem(item)
            cell.contours = []
        if not lines_per_cell:
            return
        for cell, lines in zip(self.cells, lines_per_cell):
            for level_index, xy in lines:
                colour = style.CONTOUR[min(level_index, len(style.CONTOUR) - 1)]
                item = pg.PlotCurveItem(xy[:, 0], xy[:, 1], pen=pg.mkPen(colour, width=1.2))
                item.setZValue(4)
                item.setVisible(self.contours_visible)
                cell.plot.addItem(item)
                cell.contours.append(item)

    def show_contours(self, on: bool) -> None:
        self.contours_visible = bool(on)
        for cell in self.cells:
            for item in cell.contours:
                item.setVisible(self.contours_visible)

    # -------------------------------------------------------------- regions
    def cell_for(self, x_name: str, y_name: str) -> PairCell | None:
        for cell in self.cells:
            if self.names_of(cell) == (x_name, y_name):
                return cell
        return None

    def add_roi(self, region_id: str, kind: str, x_name: str, y_name: str,
                vertices: Sequence[tuple[float, float]], name: str = "") -> bool:
        """Show a rectangle or polygon region on the plot of (x_name, y_name), with
        a handle on every corner and its name inside the view.

        Returns False when that pair is not on the map (the region still counts)."""
        cell = self.cell_for(x_name, y_name)
        if cell is None:
            return False
        pen = pg.mkPen(style.REGION, width=1.6)
        vs = np.asarray(vertices, dtype=np.float64)
        if kind == "rectangle":
            x0, y0 = vs.min(axis=0)
            x1, y1 = vs.max(axis=0)
            roi = pg.RectROI([x0, y0], [x1 - x0, y1 - y0], pen=pen, removable=False)
            # RectROI has one scale handle (top right); add the other three corners
            for pos, centre in (([0, 0], [1, 1]), ([1, 0], [0, 1]), ([0, 1], [1, 0])):
                roi.addScaleHandle(pos, centre)
        else:
            roi = pg.PolyLineROI([tuple(v) for v in vs], closed=True, pen=pen, removable=False)
        roi.setZValue(10)
        self._attach_region_item(cell, roi, kind, name, region_id)
        return True

    def _attach_region_item(self, cell, item, kind: str, name: str, region_id) -> None:
        """Put a region's ROI or band on ``cell`` with its name label, and relay its edits."""
        item.kind = kind
        item.name = name
        label = pg.TextItem(name, color=style.REGION, anchor=(0, 0), fill=pg.mkBrush(29, 35, 38, 170))
        label.setZValue(11)
        cell.plot.addItem(label)
        item.label = label
        cell.plot.addItem(item)
        cell.rois[region_id] = item
        self._place_label(cell, item)

        def changed(r=item, rid=region_id, c=cell):
            self._place_label(c, r)
            self.roiChanged.emit(rid, roi_vertices(r))

        item.sigRegionChanged.connect(changed)
        item.sigRegionChangeFinished.connect(lambda r=item, rid=region_id: self.roiFinished.emit(rid, roi_vertices(r)))

    @staticmethod
    def _place_label(cell: PairCell, roi) -> None:
        """Put a region's name at its top-left corner, kept inside the plot's view."""
        v = np.asarray(roi_vertices(roi), dtype=np.float64)
        (vx0, vx1), (vy0, vy1) = cell.plot.vb.viewRange()
        px, py = cell.plot.vb.viewPixelSize()
        rect = roi.label.textItem.boundingRect()
        w, h = (rect.width() + 6) * px, (rect.height() + 2) * py
        if getattr(roi, "kind", "") == "interval":
            top = vy1
        else:
            top = float(v[:, 1].max())
        x = min(max(float(v[:, 0].min()), vx0), max(vx0, vx1 - w))
        y = min(max(top, vy0 + h), vy1)
        roi.label.setPos(x, y)

    def add_band(self, region_id: str, x_name: str, low, high, name: str = "") -> bool:
        """Show an interval region as a band over every plot whose horizontal
        channel is ``x_name`` (None bounds reach the view's edge)."""
        shown = False
        for cell in self.cells:
            if self.names[cell.ix] != x_name:
                continue
            (vx0, vx1), _ = cell.plot.vb.viewRange()
            lo = vx0 if low is None else float(low)
            hi = vx1 if high is None else float(high)
            band = pg.LinearRegionItem(values=(lo, hi), orientation="vertical",
                                       brush=pg.mkBrush(245, 215, 110, 40),
                                       pen=pg.mkPen(style.REGION, width=1.6))
            band.setZValue(9)
            self._attach_region_item(cell, band, "interval", name, region_id)
            shown = True
        return shown

    def rename_roi(self, region_id: str, name: str) -> None:
        for cell in self.cells:
            roi = cell.rois.get(region_id)
            if roi is not None:
                roi.name = name
                roi.label.setText(name)

    def remove_roi(self, region_id: str) -> None:
        for cell in self.cells:
            roi = cell.rois.pop(region_id, None)
            if roi is not None:
                cell.plot.removeItem(roi.label)
                cell.plot.removeItem(roi)

    def start_drawing(self, kind: str | None) -> None:
        """Arm a drawing tool: "rectangle" (press and drag a box on a plot),
        "interval" (press and drag across a plot: the x channel's band) or
        "polygon" (click the corners, double-click to close)."""
        self._cancel_polygon()
        self.draw_mode = kind

    def _cell_at(self, scene_pos) -> PairCell | None:
        for cell in self.cells:
            if cell.plot.vb.sceneBoundingRect().contains(scene_pos):
                return cell
        return None

    def _scene_clicked(self, event) -> None:
        if self.draw_mode is None or event.button() != Qt.LeftButton:
            return
        cell = self._cell_at(event.scenePos())
        if cell is None:
            return
        p = cell.plot.vb.mapSceneToView(event.scenePos())
        x, y = float(p.x()), float(p.y())
        xn, yn = self.names_of(cell)
        if self.draw_mode in ("rectangle", "interval"):
            # a click without a drag: a box a fifth of the view around the point
            (vx0, vx1), (vy0, vy1) = cell.plot.vb.viewRange()
            w, h = 0.2 * (vx1 - vx0), 0.2 * (vy1 - vy0)
            verts = [(x - w / 2, y - h / 2), (x + w / 2, y + h / 2)]
            kind, self.draw_mode = self.draw_mode, None
            self.roiDrawn.emit(kind, xn, yn, verts)
            event.accept()
            return
        # polygon
        if self._poly_cell is not None and self._poly_cell is not cell:
            self._cancel_polygon()
        self._poly_cell = cell
        if event.double() and len(self._poly_points) >= 3:
            verts = list(self._poly_points)
            self._cancel_polygon()
            self.draw_mode = None
            self.roiDrawn.emit("polygon", xn, yn, verts)
            event.accept()
            return
        self._poly_points.append((x, y))
        if self._poly_preview is None:
            self._poly_preview = pg.PlotDataItem(pen=pg.mkPen(style.REGION, width=1.2, style=Qt.DashLine),
                                                 symbol="o", symbolSize=5, symbolBrush=style.REGION)
            cell.plot.addItem(self._poly_preview)
        xy = np.asarray(self._poly_points)
        self._poly_preview.setData(xy[:, 0], xy[:, 1])
        event.accept()

    def _show_drag(self, vb, a, b) -> None:
        """Dashed outline of the box being dragged (None: remove it)."""
        if self._drag_preview is not None:
            self._drag_preview[0].removeItem(self._drag_preview[1])
            self._drag_preview = None
        if vb is None:
            return
        (x0, y0), (x1, y1) = a, b
        item = pg.PlotDataItem([x0, x1, x1, x0, x0], [y0, y0, y1, y1, y0],
                               pen=pg.mkPen(style.REGION, width=1.2, style=Qt.DashLine))
        vb.addItem(item)
        self._drag_preview = (vb, item)

    def _cancel_polygon(self) -> None:
        if self._poly_preview is not None and self._poly_cell is not None:
            self._poly_cell.plot.removeItem(self._poly_preview)
        self._poly_preview = None
        self._poly_cell = None
        self._poly_points = []
