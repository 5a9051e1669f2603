"""One opened file and what the analyst did to it, without any window.

:class:`Tube` holds the events, the recipe being edited, the values (events x
channels, compensated and transformed), the fitted analysis, the regions with
their masks and statistics and the rare events at the current share.  The pure
helpers here say what a region depends on (:func:`region_closure`,
:func:`uses_rarity`), carry a region onto new scales (:func:`rescale_region`),
name regions from their channels (:func:`region_name`) and choose the first
channel pairs to plot (:func:`default_pairs`).  The session
(:mod:`core.session`) owns the tubes.
"""

from __future__ import annotations

import copy
import os
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .channel_kinds import scatter_direction
from .errors import ChannelError, RegionError
from .fcs import read_fcs
from .file_values import compensate_transform, compensated_and_transformed
from .rare import share_mask, share_order
from .recipe import RareRule, default_recipe
from .regions import Region, RegionSet, region_from_dict
from .transforms import make_transform

#: Default share of events highlighted as rare: the recipe's default rare rule (core.recipe.RareRule).
DEFAULT_SHARE = RareRule().share
#: Transform kinds that map every real number to a distinct value (their
#: inverse gives back the compensated values); log is not (values below its
#: floor are raised to it).
INVERTIBLE_KINDS = ("linear", "arcsinh", "fasinh", "logicle")


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


def uses_kind(region: Region, regions: RegionSet, kind: str) -> bool:
    """True when ``region`` or anything it depends on is a region of ``kind``."""
    if region.kind == kind:
        return True
    return any(regions[n].kind == kind for n in region_closure(regions, region.name))


def uses_rarity(region: Region, regions: RegionSet) -> bool:
    """True when ``region`` or anything it depends on is a rarity region."""
    return uses_kind(region, regions, "rarity")


def rescale_region(region: Region, old_specs: Mapping, new_specs: Mapping) -> Region:
    """``region`` carried onto new scales: its bounds or vertices go back to
    instrument units through the old transform and forward through the new
    one (channels whose spec did not change are left as they are)."""
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

    def find(direction):
        """The area, else height, else any scatter channel of that direction (core.channel_kinds)."""
        hits = [i for i, n in enumerate(names) if scatter_direction(n) == direction]
        for suffix in ("-A", "-H"):
            for i in hits:
                if names[i].strip().upper().endswith(suffix):
                    return i
        return hits[0] if hits else None

    fsc, ssc = find("forward"), find("side")
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
    _compensated: tuple | None = None  # (channel, compensated column) when it had to be recomputed
    _rare_order: np.ndarray | None = None
    _rare_for: Any = None

    @classmethod
    def open(cls, path: str) -> "Tube":
        ef = read_fcs(path)
        recipe = default_recipe(ef)
        share = recipe.rare.share
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
        """Compensate and transform every channel as the recipe says (core.file_values)."""
        # column-major: every use here takes whole channels (plots, regions, previews), and a
        # contiguous column is read 5-10x faster than a strided one at millions of events;
        # built that way (each channel written in place), not copied into it
        self.names, self.values = compensated_and_transformed(self.event_file, self.recipe, order="F")
        self._compensated = None

    def compensated(self, channel: str) -> np.ndarray:
        """Compensated, untransformed values of one channel (n_events,), for scale previews.

        Read back from ``values`` (no copy for an untransformed channel; the
        inverse transform for the scales that map every real number one to one,
        :data:`INVERTIBLE_KINDS`, exact to about 1e-14).  For other scales (log
        raises values below its floor) the file is compensated again and only
        this channel's column is kept: the tube holds no second events x
        channels matrix."""
        j = self.names.index(channel)
        spec = self.spec(channel)
        if spec is None:
            return self.values[:, j]
        if str(spec.get("kind", "")).lower() in INVERTIBLE_KINDS:
            with np.errstate(invalid="ignore", over="ignore"):
                return np.asarray(make_transform(spec).inverse(self.values[:, j]), dtype=np.float64)
        if self._compensated is None or self._compensated[0] != channel:
            full = compensate_transform(self.event_file, self.recipe).compensated(self.event_file.data)
            self._compensated = (channel, full[:, j].copy())
            del full
        return self._compensated[1]

    def by_channel(self) -> dict:
        return {name: self.values[:, j] for j, name in enumerate(self.names)}

    def spec(self, channel: str):
        return self.recipe.transforms.get(channel)

    # -- fit ----------------------------------------------------------------
    @property
    def rarity(self):
        return None if self.analysis is None else self.analysis.rarity

    @property
    def enriched(self):
        """The contrast's enriched mask (n_events,), or None without a contrast."""
        return None if self.analysis is None else getattr(self.analysis, "enriched", None)

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
            order = getattr(a, "density_order", None)   # sorted once by analyse
            self._rare_order = order if order is not None else share_order(a.log_density)
            self._rare_for = a
        self.rare_mask = share_mask(self._rare_order, self.share, self.n_events)

    # -- regions ------------------------------------------------------------
    def update_regions(self) -> None:
        """Masks and statistics of every region (core.regions)."""
        if len(self.regions) == 0:
            self.masks, self.stats = {}, []
            return
        values = self.by_channel()
        rarity, enriched = self.rarity, self.enriched
        regions = self.regions
        # a rarity region has no meaning before a fit, an enriched one before a
        # contrast: count only the others
        if rarity is None and any(r.kind == "rarity" for r in regions):
            regions = RegionSet([r for r in regions if not uses_rarity(r, self.regions)])
        if enriched is None and any(r.kind == "enriched" for r in regions):
            regions = RegionSet([r for r in regions if not uses_kind(r, self.regions, "enriched")])
        self.masks = regions.evaluate(values, rarity, self.n_events, enriched=enriched)
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
        if self.enriched is None and any(uses_kind(self.regions[n], self.regions, "enriched") for n in needed):
            return False
        sub = RegionSet([r for r in self.regions if r.name in needed])
        values = self.by_channel()
        masks = sub.evaluate(values, self.rarity, self.n_events, enriched=self.enriched)
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
        r.regions = tuple(self.regions)
        r.rare = RareRule(rule="share", share=float(self.share))
        return r
