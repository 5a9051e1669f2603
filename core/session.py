"""The analyst's session without any window: open tubes, their recipes,
analyses and regions, and every operation on them.

The desktop window only presents a :class:`Session` and connects signals;
a notebook or a test drives the same object.  No Qt here.

* :class:`Tube` -- one opened file: events, the recipe being edited, values
  (events x channels, compensated and transformed), the fitted analysis,
  regions with their masks and statistics, rare events at the current share.
* :class:`Session` -- the opened tubes and the current one.  Every action on
  "the current tube" goes through :meth:`Session.require`; switching tubes
  (:meth:`Session.switch`) leaves each tube's state with that tube.
* Pure helpers: :func:`rescale_region` (a region carried onto new scales),
  :func:`region_closure` / :func:`uses_rarity` (what a region depends on),
  :func:`default_pairs`, :func:`region_name` (names from channels).
"""

from __future__ import annotations

import copy
import os
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .errors import BoscageError, ChannelError, RegionError
from .files import expand_paths
from .rare import share_mask, share_order
from .regions import Region, RegionSet, region_from_dict

#: Default share of events highlighted as rare (0.5 %).
DEFAULT_SHARE = 0.005
#: At most this many channel pairs on the density map.
MAX_PAIRS = 9


# --------------------------------------------------------------------- regions

def region_closure(regions: RegionSet, name: str) -> set[str]:
    """``name`` and every region it depends on (parents and operands, recursively)."""
    needed, stack = {name}, [name]
    while stack:
        for ref in regions[stack.pop()].references():
            if ref not in needed and ref in regions:
                needed.add(ref)
                stack.append(ref)
    return needed


def uses_rarity(region: Region, regions: RegionSet) -> bool:
    """True when ``region`` or anything it depends on is a rarity region."""
    if region.kind == "rarity":
        return True
    return any(regions[n].kind == "rarity" for n in region_closure(regions, region.name))


def rescale_region(region: Region, old_specs: Mapping, new_specs: Mapping) -> Region:
    """``region`` carried onto new scales: its bounds or vertices go back to
    instrument units through the old transform and forward through the new
    one (channels whose spec did not change are left as they are)."""
    from .transforms import make_transform

    chans = region.channels_used()
    if not chans or all(old_specs.get(c) == new_specs.get(c) for c in chans):
        return region

    def mapper(c):
        old, new = old_specs.get(c), new_specs.get(c)
        inv = (lambda v: v) if old is None else make_transform(old).inverse
        fwd = (lambda v: v) if new is None else make_transform(new).forward
        return lambda v: np.asarray(fwd(inv(np.asarray(v, dtype=np.float64))), dtype=np.float64)

    d = region.to_dict()
    if d["kind"] == "rectangle":
        d["x"] = sorted(mapper(chans[0])(d["x"]).tolist())
        d["y"] = sorted(mapper(chans[1])(d["y"]).tolist())
    elif d["kind"] == "polygon":
        v = np.asarray(d["vertices"], dtype=np.float64)
        d["vertices"] = np.column_stack([mapper(chans[0])(v[:, 0]), mapper(chans[1])(v[:, 1])]).tolist()
    elif d["kind"] == "interval":
        f = mapper(chans[0])
        d["low"] = None if d["low"] is None else float(f([d["low"]])[0])
        d["high"] = None if d["high"] is None else float(f([d["high"]])[0])
    d["transforms"] = {c: new_specs.get(c) for c in chans}
    return region_from_dict(d)


def region_name(kind: str, channels: Sequence[str], taken: Iterable[str]) -> str:
    """A free region name made from its channels, e.g. "CD3 x CD4 box",
    "CD19 band"; a number is added only when the name is taken."""
    word = {"rectangle": "box", "polygon": "outline", "interval": "band"}.get(kind, kind)
    stem = f"{' x '.join(channels)} {word}".strip()
    taken = set(taken)
    if stem not in taken:
        return stem
    k = 2
    while f"{stem} {k}" in taken:
        k += 1
    return f"{stem} {k}"


def default_pairs(names: list, density_channels: list, limit: int = 6) -> list:
    """Channel pairs (x index, y index) for the density map: forward against side
    scatter when both exist, then the density channels two by two."""
    pairs = []
    upper = [n.upper() for n in names]

    def find(prefix):
        for suffix in ("-A", "-H", ""):
            for i, n in enumerate(upper):
                if n == prefix + suffix:
                    return i
        for i, n in enumerate(upper):
            if n.startswith(prefix):
                return i
        return None

    fsc, ssc = find("FSC"), find("SSC")
    if fsc is not None and ssc is not None:
        pairs.append((fsc, ssc))
    chans = [names.index(c) for c in density_channels if c in names]
    for k in range(0, len(chans) - 1, 2):
        pairs.append((chans[k], chans[k + 1]))
    if len(chans) % 2 == 1 and len(chans) > 1:
        pairs.append((chans[-2], chans[-1]) if (chans[-2], chans[-1]) not in pairs else (chans[0], chans[-1]))
    if not pairs:
        if len(names) >= 2:
            pairs.append((0, 1))
        elif chans:
            pairs.append((chans[0], chans[0]))
    out = []
    for p in pairs:
        if p not in out and p[0] != p[1]:
            out.append(p)
    return out[:limit]


# --------------------------------------------------------------------- one tube

@dataclass
class Tube:
    """One opened file and everything the analyst did to it (see module docstring)."""

    path: str
    event_file: Any
    recipe: Any
    names: list = field(default_factory=list)
    values: np.ndarray | None = None  # (n_events, n_channels) compensated + transformed
    analysis: Any = None
    regions: RegionSet = field(default_factory=RegionSet)
    masks: dict = field(default_factory=dict)
    stats: list = field(default_factory=list)
    share: float = DEFAULT_SHARE
    rare_mask: np.ndarray | None = None
    contours: list | None = None
    pairs: list = field(default_factory=list)
    control_path: str | None = None
    highlight_enriched: bool = False  # enriched events shown instead of rare ones
    fit_note: str = ""  # why the last fit was discarded ("" when none was)
    dirty: bool = False  # regions changed since the recipe was last saved
    _compensated: np.ndarray | None = None
    _rare_order: np.ndarray | None = None
    _rare_for: Any = None

    @classmethod
    def open(cls, path: str) -> "Tube":
        from .fcs import read_fcs
        from .recipe import default_recipe

        ef = read_fcs(path)
        recipe = default_recipe(ef)
        share = float((recipe.rare or {}).get("share", DEFAULT_SHARE))
        tube = cls(path=os.path.abspath(path), event_file=ef, recipe=recipe, share=share)
        tube.recompute_values()
        tube.pairs = default_pairs(tube.names, recipe.channels)
        return tube

    @property
    def n_events(self) -> int:
        return int(self.event_file.n_events)

    @property
    def labels(self) -> list[str]:
        """Channel labels ($PnS) in channel order ("" when a channel has none)."""
        labels = list(self.event_file.channel_labels or [])
        return [(labels[i] if i < len(labels) else "") or "" for i in range(len(self.names))]

    def display_name(self, channel: str) -> str:
        """What the analyst calls a channel: its label when it has one, else its name."""
        i = self.names.index(channel)
        return self.labels[i] or channel

    def channel_index(self, text: str) -> int:
        """Index of a channel given by name ($PnN) or label ($PnS)."""
        text = str(text).strip()
        if text in self.names:
            return self.names.index(text)
        for i, lab in enumerate(self.labels):
            if lab and lab == text:
                return i
        raise ChannelError(f"{os.path.basename(self.path)}: no channel is named or labelled {text!r}; "
                           f"the channels are {', '.join(self.names)}")

    # -- values -----------------------------------------------------------
    def recompute_values(self) -> None:
        """Compensate and transform every channel as the recipe says (core.analysis)."""
        from .analysis import compensated_and_transformed

        self.names, self.values = compensated_and_transformed(self.event_file, self.recipe)
        self._compensated = None

    def compensated(self, channel: str) -> np.ndarray:
        """Compensated, untransformed values of one channel (for scale previews)."""
        if self._compensated is None:
            from .analysis import compensated_and_transformed

            bare = copy.copy(self.recipe)
            bare.transforms = {}
            _, self._compensated = compensated_and_transformed(self.event_file, bare)
        return self._compensated[:, self.names.index(channel)]

    def by_channel(self) -> dict:
        return {name: self.values[:, j] for j, name in enumerate(self.names)}

    def spec(self, channel: str):
        return (self.recipe.transforms or {}).get(channel)

    # -- fit ----------------------------------------------------------------
    @property
    def rarity(self):
        return None if self.analysis is None else self.analysis.rarity

    @property
    def fitted(self) -> bool:
        return self.analysis is not None

    def discard_fit(self, reason: str) -> None:
        """Forget the fit and everything drawn from it; ``reason`` says why."""
        self.analysis = None
        self.rare_mask = None
        self.contours = None
        self.highlight_enriched = False
        self._rare_for = self._rare_order = None
        self.fit_note = reason
        self.update_regions()

    def highlight(self) -> np.ndarray | None:
        """The events drawn on top of the plots: enriched or rare ones (None before a fit)."""
        a = self.analysis
        if a is None:
            return None
        if self.highlight_enriched and getattr(a, "enriched", None) is not None:
            return a.enriched
        return self.rare_mask

    def update_rare(self) -> None:
        """Rare events at the current share (core.rare.rare_by_share's rule; the
        ordering is sorted once per fit so moving the share costs no sort)."""
        a = self.analysis
        if a is None:
            self.rare_mask = None
            return
        if self._rare_for is not a:
            self._rare_order = share_order(a.log_density)
            self._rare_for = a
        self.rare_mask = share_mask(self._rare_order, self.share, self.n_events)

    # -- regions ------------------------------------------------------------
    def update_regions(self) -> None:
        """Masks and statistics of every region (core.regions)."""
        if len(self.regions) == 0:
            self.masks, self.stats = {}, []
            return
        values = self.by_channel()
        rarity = self.rarity
        regions = self.regions
        if rarity is None and any(r.kind == "rarity" for r in regions):
            # a rarity region has no meaning before a fit: count only the others
            regions = RegionSet([r for r in regions if not uses_rarity(r, self.regions)])
        self.masks = regions.evaluate(values, rarity, self.n_events)
        self.stats = regions.statistics(values, rarity, self.n_events, masks=self.masks)

    def update_region(self, name: str) -> bool:
        """Re-count one region (and what it refers to) without touching the others:
        the fast path while its outline is dragged.  Returns False when a full
        update is needed instead."""
        if name not in self.regions or not self.stats:
            return False
        needed = region_closure(self.regions, name)
        if self.rarity is None and any(uses_rarity(self.regions[n], self.regions) for n in needed):
            return False
        sub = RegionSet([r for r in self.regions if r.name in needed])
        values = self.by_channel()
        masks = sub.evaluate(values, self.rarity, self.n_events)
        rows = {s.name: s for s in sub.statistics(values, self.rarity, self.n_events, masks=masks)}
        self.masks.update(masks)
        self.stats = [rows.get(s.name, s) for s in self.stats]
        return True

    def count(self, name: str) -> int:
        for s in self.stats:
            if s.name == name:
                return int(s.count)
        raise RegionError(f"there is no region named {name!r}")

    def recipe_with_regions(self):
        r = copy.deepcopy(self.recipe)
        r.regions = self.regions.to_dict()
        r.rare = {"rule": "share", "share": float(self.share)}
        return r


# --------------------------------------------------------------------- session

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
        old = dict(tube.recipe.transforms or {})
        new = dict(specs)
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
        from .transforms import is_scatter_or_time

        tube = self.require()
        spec = tube.spec(channel)
        specs = dict(tube.recipe.transforms or {})
        for c in tube.names:
            if not is_scatter_or_time(c):
                specs[c] = None if spec is None else dict(spec)
        return self.set_scales(specs, tube.recipe.channels)

    def set_compensation(self, source: str, edited=None, csv_path: str | None = None,
                         matrix_folder: str | None = None) -> str:
        """Compensate the current tube from ``source`` ("none", "file" or "csv").
        An ``edited`` SpilloverMatrix is first written as a new CSV file in
        ``matrix_folder``.  Returns the reason the fit was discarded."""
        from .atomic import unique_path
        from .compensation import write_spillover_csv

        tube = self.require()
        comp = {"source": source, "csv_path": None}
        if edited is not None:
            stem = os.path.splitext(os.path.basename(tube.path))[0]
            path = unique_path(os.path.join(matrix_folder or os.path.dirname(tube.path),
                                            f"{stem}-spillover-edited.csv"))
            write_spillover_csv(path, edited)
            comp = {"source": "csv", "csv_path": path}
        elif source == "csv":
            comp["csv_path"] = csv_path or (tube.recipe.compensation or {}).get("csv_path")
            if not comp["csv_path"]:
                raise BoscageError("choose a spillover CSV file first (Load CSV...)")
        old = copy.deepcopy(tube.recipe.compensation)
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
        from .recipe import load_recipe, validate_recipe

        tube = self.require()
        recipe = load_recipe(path)
        validate_recipe(recipe, tube.event_file)
        tube.recipe = recipe
        tube.regions = recipe.region_set()
        if (recipe.rare or {}).get("rule") == "share":
            tube.share = float(recipe.rare["share"])
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
        tube.analysis = analysis
        tube.recipe.engine = dict(recipe.engine or {})
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

    def close(self, path: str) -> None:
        tube = self.tubes.pop(path)
        if tube is self.current:
            self.current = None
