"""The analyst's session without any window: open tubes, their recipes,
analyses and regions, and every operation on them.

The desktop window only presents a :class:`Session` and connects signals;
a notebook or a test drives the same object.  No Qt here.

* :class:`Tube` (:mod:`core.tube`) -- one opened file: events, the recipe
  being edited, values (events x channels), the fitted analysis, regions with
  their masks and statistics, rare events at the current share.
* :class:`Session` -- the opened tubes and the current one.  Every action on
  "the current tube" goes through :meth:`Session.require`; switching tubes
  (:meth:`Session.switch`) leaves each tube's state with that tube.
* Pure helpers (in :mod:`core.tube`): :func:`rescale_region`,
  :func:`region_closure` / :func:`uses_rarity`, :func:`default_pairs`,
  :func:`region_name`.
"""

from __future__ import annotations

import os
from typing import Mapping, Sequence

import numpy as np

from .atomic import unique_path
from .compensation import write_spillover_csv
from .errors import BoscageError, ChannelError, RegionError
from .files import expand_paths
from .recipe import Compensation, load_recipe, validate_recipe
from .regions import Region, region_from_dict
from .transforms import is_scatter_or_time
from .tube import (Tube, default_pairs, region_closure, region_name, rescale_region,  # noqa: F401 (re-exported)
                   uses_rarity)

#: At most this many channel pairs on the density map.
MAX_PAIRS = 9


# --------------------------------------------------------------------- session

def share_values(tube: Tube, analysis) -> bool:
    """Let ``analysis`` use the tube's values (events x channels) when they are
    the same numbers, so the session holds one copy of the events and not two
    (a fit computes its own from the same file and recipe).  Returns whether
    the copy was dropped."""
    values = getattr(analysis, "values", None)
    mine = tube.values
    if values is None or mine is None or values is mine:
        return False
    if values.shape != mine.shape or values.dtype != mine.dtype or not np.array_equal(values, mine, equal_nan=True):
        return False
    analysis.values = mine
    return True


class Session:
    """The opened tubes and the current one, with every operation on them."""

    def __init__(self) -> None:
        self.tubes: dict[str, Tube] = {}
        self.current: Tube | None = None

    # -- opening and switching -------------------------------------------
    def open(self, paths) -> tuple[list[str], list[tuple[str, Exception]]]:
        """Open FCS files and the FCS files of folders (:mod:`core.files`).
        Returns (opened paths, [(path, error)] for those that failed); the
        first opened tube becomes the current one."""
        files = expand_paths(paths)
        if not files:
            raise BoscageError(f"no FCS files found in: {', '.join(map(str, paths))}")
        opened, problems = [], []
        for path in files:
            try:
                tube = self.tubes.get(path) or Tube.open(path)
            except Exception as exc:  # noqa: BLE001 - reported per file, the rest still open
                problems.append((path, exc))
                continue
            self.tubes[path] = tube
            opened.append(path)
        if opened:
            self.switch(opened[0])
        return opened, problems

    def switch(self, path: str) -> Tube:
        """Make the tube at ``path`` current.  Each tube keeps its own fit,
        highlight, regions and pairs; nothing of the old tube carries over."""
        key = path if path in self.tubes else os.path.abspath(path)
        if key not in self.tubes:
            raise BoscageError(f"{os.path.basename(path)} is not open; open it first (Ctrl+O)")
        tube = self.tubes[key]
        self.current = tube
        tube.update_rare()
        tube.update_regions()
        return tube

    def require(self, fitted: bool = False) -> Tube:
        """The current tube; a sentence for the analyst when there is none
        (or, with ``fitted``, when it has no fit yet)."""
        if self.current is None:
            raise BoscageError("open a tube first (Ctrl+O)")
        if fitted and self.current.analysis is None:
            raise BoscageError("fit the density first (Ctrl+F): this needs the fitted density")
        return self.current

    # -- scales, compensation, pairs ----------------------------------------
    def set_scales(self, specs: Mapping, channels: Sequence[str]) -> str:
        """New transforms and density channels for the current tube; regions
        follow onto the new scales.  Returns why the fit was discarded ("" when
        nothing changed)."""
        tube = self.require()
        old = dict(tube.recipe.transforms)
        new = {c: s for c, s in specs.items() if s is not None}
        changed = [c for c in set(old) | set(new) if old.get(c) != new.get(c)]
        if not changed and list(channels) == list(tube.recipe.channels):
            return ""
        tube.recipe.transforms = new
        tube.recipe.channels = list(channels)
        if changed:
            for r in list(tube.regions):
                moved = rescale_region(r, old, new)
                if moved is not r:
                    tube.regions.replace(moved)
            tube.recompute_values()
        what = ", ".join(sorted(tube.display_name(c) for c in changed if c in tube.names)[:4])
        reason = (f"The scale of {what} changed" if changed else "The density channels changed") + \
            ": the fit was discarded; fit the density again."
        tube.discard_fit(reason)
        return reason

    def apply_scale_to_all(self, channel: str) -> str:
        """Give every fluorescence channel (not scatter or time, by
        :func:`core.transforms.is_scatter_or_time`) the scale of ``channel``."""
        tube = self.require()
        spec = tube.spec(channel)
        specs = dict(tube.recipe.transforms)
        for c in tube.names:
            if not is_scatter_or_time(c):
                specs[c] = None if spec is None else dict(spec)
        return self.set_scales(specs, tube.recipe.channels)

    def set_compensation(self, source: str, edited=None, csv_path: str | None = None,
                         matrix_folder: str | None = None) -> str:
        """Compensate the current tube from ``source`` ("none", "file" or "csv").
        An ``edited`` SpilloverMatrix is first written as a new CSV file in
        ``matrix_folder``.  Returns the reason the fit was discarded."""
        tube = self.require()
        if edited is not None:
            stem = os.path.splitext(os.path.basename(tube.path))[0]
            path = unique_path(os.path.join(matrix_folder or os.path.dirname(tube.path),
                                            f"{stem}-spillover-edited.csv"))
            write_spillover_csv(path, edited)
            comp = Compensation("csv", path)
        elif source == "csv":
            csv_path = csv_path or tube.recipe.compensation.csv_path
            if not csv_path:
                raise BoscageError("choose a spillover CSV file first (Load CSV...)")
            comp = Compensation("csv", csv_path)
        else:
            comp = Compensation(source)   # the record checks the source (core.recipe)
        old = tube.recipe.compensation
        tube.recipe.compensation = comp
        try:
            tube.recompute_values()
        except Exception:
            tube.recipe.compensation = old
            tube.recompute_values()
            raise
        reason = "The compensation changed: the fit was discarded; fit the density again."
        tube.discard_fit(reason)
        return reason

    def set_pairs(self, pairs: Sequence[tuple[str, str]]) -> list[tuple[int, int]]:
        """Show these (x, y) channel pairs, each channel given by name or label."""
        tube = self.require()
        idx = []
        for p in pairs:
            if len(p) != 2:
                raise ChannelError(f"a channel pair needs two channels; got {' : '.join(map(str, p))}")
            i, j = tube.channel_index(p[0]), tube.channel_index(p[1])
            if i == j:
                raise ChannelError(f"a pair needs two different channels; got {p[0]} twice")
            if (i, j) not in idx:
                idx.append((i, j))
        if not idx:
            raise ChannelError("choose at least one channel pair")
        tube.pairs = idx[:MAX_PAIRS]
        if tube.contours is not None:
            tube.contours = [c for c in tube.contours if c[0] in tube.pairs]
        return tube.pairs

    def load_recipe(self, path: str) -> Tube:
        """Apply a saved recipe to the current tube (its fit is discarded)."""
        tube = self.require()
        recipe = load_recipe(path)
        validate_recipe(recipe, tube.event_file)
        tube.recipe = recipe
        tube.regions = recipe.region_set()
        if recipe.rare.rule == "share":
            tube.share = recipe.rare.share
        tube.recompute_values()
        tube.pairs = default_pairs(tube.names, recipe.channels)
        tube.dirty = False
        tube.discard_fit("Recipe loaded: fit the density to apply it.")
        return tube

    # -- fitting ---------------------------------------------------------------
    def fit_finished(self, tube: Tube, recipe, analysis, control: str | None = None) -> str:
        """Store a finished fit on ``tube`` (which need not be current any more).
        Returns "" or why the fit was not used."""
        if (tube.recipe.transforms != recipe.transforms or tube.recipe.compensation != recipe.compensation
                or list(tube.recipe.channels) != list(recipe.channels)):
            return "the scales, channels or compensation changed during the fit; fit again"
        share_values(tube, analysis)
        tube.analysis = analysis
        tube.recipe.engine = recipe.engine
        tube.contours = None
        tube.control_path = control
        tube.highlight_enriched = bool(control) and getattr(analysis, "enriched", None) is not None
        tube.fit_note = ""
        tube.update_rare()
        tube.update_regions()
        return ""

    def set_share(self, share: float) -> None:
        tube = self.require()
        tube.share = float(share)
        tube.update_rare()
        if any(uses_rarity(r, tube.regions) for r in tube.regions):
            tube.update_regions()

    # -- regions ---------------------------------------------------------------
    def drawn_region(self, kind: str, x: str, y: str | None, vertices, parent: str | None = None) -> dict:
        """The region dict for a shape drawn on the plot of channels (x, y) of the
        current tube: "rectangle" (two opposite corners), "polygon" (corners) or
        "interval" (the x extent of the vertices on channel x).  Named from its channels."""
        tube = self.require()
        chans = [x] if kind == "interval" else [x, y]
        d = {"name": region_name(kind, [tube.display_name(c) for c in chans], tube.regions.names),
             "kind": kind, "channels": chans, "parent": parent,
             "transforms": {c: tube.spec(c) for c in chans}}
        v = np.asarray(vertices, dtype=np.float64)
        if kind == "rectangle":
            d["x"] = [float(v[:, 0].min()), float(v[:, 0].max())]
            d["y"] = [float(v[:, 1].min()), float(v[:, 1].max())]
        elif kind == "polygon":
            d["vertices"] = v.tolist()
        elif kind == "interval":
            d["low"], d["high"] = float(v[:, 0].min()), float(v[:, 0].max())
        else:
            raise RegionError(f"cannot draw a region of kind {kind!r}")
        return d

    def add_region(self, region: Mapping | Region) -> Region:
        tube = self.require()
        r = tube.regions.add(region)
        tube.dirty = True
        tube.update_regions()
        return r

    def move_region(self, name: str, vertices, final: bool = True) -> bool:
        """New outline for a rectangle, polygon or interval region (same
        channels, scales, parent; an interval takes the x extent of ``vertices``).  While dragging (``final`` False) only it and what it depends
        on are recounted; returns True when only those were."""
        tube = self.require()
        r = tube.regions[name]
        d = r.to_dict()
        v = np.asarray(vertices, dtype=np.float64)
        if r.kind == "rectangle":
            d["x"] = [float(v[:, 0].min()), float(v[:, 0].max())]
            d["y"] = [float(v[:, 1].min()), float(v[:, 1].max())]
        elif r.kind == "polygon":
            d["vertices"] = v.tolist()
        elif r.kind == "interval":
            d["low"], d["high"] = float(v[:, 0].min()), float(v[:, 0].max())
        else:
            raise RegionError(f"region {name!r} has no outline to move")
        tube.regions.replace(region_from_dict(d))
        tube.dirty = True
        if not final and tube.update_region(name):
            return True
        tube.update_regions()
        return False

    def rename_region(self, old: str, new: str) -> None:
        tube = self.require()
        tube.regions.rename(old, new.strip())
        tube.dirty = True
        tube.update_regions()

    def delete_regions(self, names: Sequence[str]) -> list[str]:
        """Remove regions (dependants first); returns the names removed."""
        tube = self.require()
        order = sorted(names, key=lambda n: -tube.regions.names.index(n))
        for name in order:
            tube.regions.remove(name)
        tube.dirty = True
        tube.update_regions()
        return order

    def set_parent(self, name: str, parent: str | None) -> None:
        """Nest region ``name`` under ``parent`` (None: not nested)."""
        tube = self.require()
        d = tube.regions[name].to_dict()
        d["parent"] = parent or None
        tube.regions.replace(region_from_dict(d))
        tube.dirty = True
        tube.update_regions()

    def combine_regions(self, operator: str, names: Sequence[str]) -> Region:
        tube = self.require()
        names = list(names)
        if operator == "not" and len(names) != 1:
            raise RegionError("choose exactly one region to take its complement (not)")
        if operator != "not" and len(names) < 2:
            raise RegionError("choose two or more regions to combine (hold Ctrl to select several)")
        word = {"and": " and ", "or": " or "}.get(operator, "")
        name = ("not " + names[0]) if operator == "not" else word.join(names)
        if name in tube.regions:
            name = region_name("", [name], tube.regions.names)
        return self.add_region({"name": name, "kind": operator, "operands": names})

    def keep_rare_region(self) -> Region:
        """A rarity region holding exactly the events highlighted as rare now."""
        tube = self.require(fitted=True)
        rare = tube.rare_mask
        if rare is None or not rare.any():
            raise BoscageError("no events are highlighted as rare at this share; raise it first")
        # the rarity percentile of the densest highlighted event: the region then holds
        # exactly the highlighted events (percentile <= share x 100 can hold one more)
        percentile = float(np.nanmax(tube.analysis.rarity[rare]))
        name = region_name("", [f"rarest {tube.share * 100:.3g} pct"], tube.regions.names)
        return self.add_region({"name": name, "kind": "rarity", "percentile": percentile})

    def keep_enriched_region(self) -> Region:
        """An "enriched" region holding the events new against the control
        (the contrast's enriched mask), named after the control."""
        tube = self.require()
        a = tube.analysis
        if a is None or getattr(a, "enriched", None) is None:
            raise BoscageError("contrast the tube with a control first (Ctrl+K)")
        info = getattr(a, "info", None) or {}
        control = os.path.basename(tube.control_path or info.get("control", "") or "") or None
        stem = os.path.splitext(control)[0] if control else "control"
        name = region_name("", [f"new vs {stem}"], tube.regions.names)
        return self.add_region({"name": name, "kind": "enriched", "control": control})

    def close(self, path: str) -> Tube | None:
        """Forget the tube at ``path`` (its events and fit go with it; the file is not
        touched).  Returns the tube to show instead when it was the current one: the
        one opened after it, else the one before (None: no tube left or it was not
        current); ``current`` is None until that tube is switched to."""
        order = list(self.tubes)
        tube = self.tubes.pop(path)
        if tube is not self.current:
            return None
        self.current = None
        rest = list(self.tubes)
        return self.tubes[rest[min(order.index(path), len(rest) - 1)]] if rest else None
