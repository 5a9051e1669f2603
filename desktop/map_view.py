"""What the density map shows for a tube: events coloured by the fit (density
rank or log density), highlighted rare or enriched events, contours, regions,
the title and the legend line saying what each of them is."""

from __future__ import annotations

import desktop.qtfix  # noqa: F401  (before any Qt call; see desktop/qtfix.py)

import os

from PySide6.QtCore import QObject

from desktop import style
from desktop.plots import COLOUR_MODES


class MapPresenter(QObject):
    def __init__(self, window) -> None:
        super().__init__(window)
        self.win = window
        self.colour_mode = "rank"  # a key of desktop.plots.COLOUR_MODES

    def draw_map(self, tube) -> None:
        values, label, levels = self.colouring(tube)
        self.win.density_map.set_events(tube.values, tube.names, tube.pairs, tube.labels, colour_values=values,
                                    colour_label=label, specs=[tube.spec(n) for n in tube.names], levels=levels)
        self.win.regions.show_all(tube)
        self.update_highlight()
        self.draw_contours(tube)

    def colouring(self, tube):
        a = tube.analysis
        if a is None:
            return None, "", None
        if self.colour_mode == "log":
            return a.log_density, COLOUR_MODES["log"], None
        return a.rarity, COLOUR_MODES["rank"], (0.0, 100.0)

    def set_colour_mode(self, mode: str) -> None:
        self.colour_mode = mode
        if self.win.session.current is not None:
            self.recolour(self.win.session.current)

    def recolour(self, tube) -> None:
        values, label, levels = self.colouring(tube)
        self.win.density_map.set_colouring_levels(values, label, levels)
        self.update_legend(tube)

    def draw_contours(self, tube) -> None:
        if tube.contours is None or tube.analysis is None:
            self.win.density_map.set_contours(None)
        else:
            by_pair = dict(tube.contours)
            self.win.density_map.set_contours([by_pair.get(p, []) for p in tube.pairs])
            self.win.density_map.show_contours(self.win.act_contours.isChecked())
        self.update_legend(tube)

    def update_legend(self, tube) -> None:
        sw = '<span style="color:{}">{}</span>'.format
        if tube.analysis is None:
            colour = "Colour: events per bin (log scale). Fit the density to rank events."
        elif self.colour_mode == "log":
            colour = "Colour: the fitted density over all density channels (log, nats)."
        else:
            colour = ("Colour: how common each bin's events are under the density fitted to all density "
                      "channels (0 % rarest, 100 % most common).")
        parts = [colour]
        if tube.contours and self.win.act_contours.isChecked():
            parts.append("Lines " + " ".join(sw(c, "━") for c in style.CONTOUR) +
                         ": 50 / 90 / 99 % of events, from a 2-D fit of each pair alone.")
        if tube.analysis is not None:
            parts.append(sw(style.RARE, "■") + (" new events (vs control)" if tube.highlight_enriched
                                                 else " rare events"))
        if len(tube.regions):
            parts.append(sw(style.REGION, "□") + " regions")
        self.win.density_map.set_legend(" &nbsp; ".join(parts))

    def update_highlight(self) -> None:
        win = self.win
        tube = win.session.current
        if tube is None:
            return
        a = tube.analysis
        mask = tube.highlight()
        bar = win.rarity_bar
        if a is None:
            bar.show_count("Fit the density to rank events", False)
        elif tube.highlight_enriched:
            bar.show_count(f"{int(mask.sum()):,} new events (vs control) highlighted", False)
        else:
            n = int(mask.sum()) if mask is not None else 0
            bar.show_count(f"{n:,} rare events ({100.0 * n / max(a.n_kept, 1):.2f} % of {a.n_kept:,})", True)
        self._rarity_controls_active(not tube.highlight_enriched)
        win.density_map.set_highlight(mask)
        self.update_title(tube)
        self.update_legend(tube)

    def _rarity_controls_active(self, on: bool) -> None:
        """The Rarity share means nothing while the new events of a contrast are shown: grey it out."""
        bar, win = self.win.rarity_bar, self.win
        for w in (bar.slider, bar.spin):
            w.setEnabled(on)
        bar.slider.setToolTip("Share of events, counted from the lowest fitted density up, to highlight as rare "
                              "on every plot. Keys [ and ] step it." if on else
                              "Not in use: the plots show the new events of the contrast. Switch off "
                              "'Highlight the new events' in the Contrast panel to rank by rarity again.")
        win.act_rarer.setEnabled(on)
        win.act_more.setEnabled(on)

    def update_title(self, tube) -> None:
        state = "fitted" if tube.analysis is not None else "not fitted — colour shows event counts"
        only = f" · showing only {self.win.regions.only}" if self.win.regions.only else ""
        self.win.density_map.set_title(f"<b>{os.path.basename(tube.path)}</b> · {tube.n_events:,} events · {state}{only}")

    def pair_extent(self, pair):
        t = self.win.session.current
        cell = self.win.density_map.cell_for(t.names[pair[0]], t.names[pair[1]])
        return None if cell is None else cell.extent

