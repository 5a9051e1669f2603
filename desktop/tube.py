"""What the window knows about one opened file (a "tube"): the events, the
recipe being edited, the transformed values, the fitted analysis and the regions.

No widgets here; every number comes from :mod:`core`.
"""

from __future__ import annotations

import copy
import os
from dataclasses import dataclass, field

import numpy as np

from core.regions import RegionSet


@dataclass
class Tube:
    path: str
    event_file: object
    recipe: object
    names: list = field(default_factory=list)
    values: np.ndarray | None = None  # (n_events, n_channels) compensated + transformed
    analysis: object = None
    regions: RegionSet = field(default_factory=RegionSet)
    masks: dict = field(default_factory=dict)
    stats: list = field(default_factory=list)
    share: float = 0.005
    rare_mask: np.ndarray | None = None
    contours: list | None = None
    pairs: list = field(default_factory=list)
    control_path: str | None = None
    dirty: bool = False  # regions changed since the recipe was last saved
    _compensated: np.ndarray | None = None
    _rare_order: np.ndarray | None = None
    _rare_for: object = None

    @classmethod
    def open(cls, path: str) -> "Tube":
        from core.fcs import read_fcs
        from core.recipe import default_recipe

        ef = read_fcs(path)
        recipe = default_recipe(ef)
        share = float((recipe.rare or {}).get("share", 0.005))
        tube = cls(path=os.path.abspath(path), event_file=ef, recipe=recipe, share=share)
        tube.recompute_values()
        tube.pairs = default_pairs(tube.names, recipe.channels)
        return tube

    @property
    def n_events(self) -> int:
        return int(self.event_file.n_events)

    # -- values -----------------------------------------------------------
    def recompute_values(self) -> None:
        """Compensate and transform every channel as the recipe says (core.analysis)."""
        from core.analysis import compensated_and_transformed

        self.names, self.values = compensated_and_transformed(self.event_file, self.recipe)
        self._compensated = None

    def compensated(self, channel: str) -> np.ndarray:
        """Compensated, untransformed values of one channel (for scale previews)."""
        if self._compensated is None:
            from core.analysis import compensated_and_transformed

            bare = copy.copy(self.recipe)
            bare.transforms = {}
            _, self._compensated = compensated_and_transformed(self.event_file, bare)
        return self._compensated[:, self.names.index(channel)]

    def by_channel(self) -> dict:
        return {name: self.values[:, j] for j, name in enumerate(self.names)}

    # -- rarity and regions --------------------------------------------------
    @property
    def rarity(self):
        return None if self.analysis is None else self.analysis.rarity

    @property
    def enriched(self):
        """The contrast's enriched mask (n_events,), or None without a contrast."""
        return None if self.analysis is None else getattr(self.analysis, "enriched", None)

    def update_rare(self) -> None:
        """Rare events at the current share: the rule of core.rare.rare_by_share
        (the round(share x n_kept) lowest finite log densities, ties by event
        order).  The stable ordering is sorted once per fit and kept, so moving
        the rarity control costs no sort; tests check the result equals
        core.rare.rare_by_share at every share they try."""
        a = self.analysis
        if a is None:
            self.rare_mask = None
            return
        if self._rare_for is not a:
            ld = np.asarray(a.log_density, dtype=np.float64)
            ok = np.flatnonzero(np.isfinite(ld))
            self._rare_order = ok[np.argsort(ld[ok], kind="stable")]
            self._rare_for = a
        k = int(round(self.share * self._rare_order.size))
        mask = np.zeros(self.n_events, dtype=bool)
        mask[self._rare_order[:k]] = True
        self.rare_mask = mask

    def update_regions(self) -> None:
        """Masks and statistics of every region (core.regions)."""
        if len(self.regions) == 0:
            self.masks, self.stats = {}, []
            return
        values = self.by_channel()
        rarity = self.rarity
        has_rarity_region = any(r.kind == "rarity" for r in self.regions)
        if self.enriched is None and any(_uses_kind(r, self.regions, "enriched") for r in self.regions):
            # an enriched region has no meaning before a contrast: count only the others
            keep = RegionSet([r for r in self.regions if not _uses_kind(r, self.regions, "enriched")
                              and (rarity is not None or not _uses_rarity(r, self.regions))])
            self.masks = keep.evaluate(values, rarity, self.n_events)
            self.stats = keep.statistics(values, rarity, self.n_events, masks=self.masks)
            return
        if rarity is None and has_rarity_region:
            # a rarity region has no meaning before a fit: count only the others
            keep = RegionSet([r for r in self.regions if r.kind != "rarity" and not _uses_rarity(r, self.regions)])
            self.masks = keep.evaluate(values, None, self.n_events)
            self.stats = keep.statistics(values, None, self.n_events, masks=self.masks)
            return
        self.masks = self.regions.evaluate(values, rarity, self.n_events, enriched=self.enriched)
        self.stats = self.regions.statistics(values, rarity, self.n_events, masks=self.masks)

    def update_region(self, name: str) -> bool:
        """Re-count one region (and what it refers to) without touching the others:
        the fast path while its outline is dragged.  Returns False when a full
        update is needed instead (the region relies on rarity before a fit)."""
        if name not in self.regions or not self.stats:
            return False
        needed, stack = {name}, [name]
        while stack:
            for ref in self.regions[stack.pop()].references():
                if ref not in needed:
                    needed.add(ref)
                    stack.append(ref)
        if self.rarity is None and any(_uses_rarity(self.regions[n], self.regions) for n in needed):
            return False
        if self.enriched is None and any(_uses_kind(self.regions[n], self.regions, "enriched") for n in needed):
            return False
        sub = RegionSet([r for r in self.regions if r.name in needed])
        values = self.by_channel()
        masks = sub.evaluate(values, self.rarity, self.n_events, enriched=self.enriched)
        rows = {s.name: s for s in sub.statistics(values, self.rarity, self.n_events, masks=masks)}
        self.masks.update(masks)
        self.stats = [rows.get(s.name, s) for s in self.stats]
        return True

    def recipe_with_regions(self):
        r = copy.deepcopy(self.recipe)
        r.regions = self.regions.to_dict()
        r.rare = {"rule": "share", "share": float(self.share)}
        return r


def _uses_rarity(region, regions) -> bool:
    return _uses_kind(region, regions, "rarity")


def _uses_kind(region, regions, kind: str) -> bool:
    """True when ``region`` is of ``kind`` or refers (through parents, operands) to one that is."""
    seen = set()
    stack = [region]
    while stack:
        r = stack.pop()
        if r.kind == kind:
            return True
        for name in r.references():
            if name not in seen and name in regions:
                seen.add(name)
                stack.append(regions[name])
    return False


def default_pairs(names: list, density_channels: list, limit: int = 6) -> list:
    """Channel pairs (x index, y index) for the density map: forward against side
    scatter when both exist, then the density channels two by two."""
    from core.channel_kinds import scatter_direction

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
