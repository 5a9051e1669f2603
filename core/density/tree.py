"""Tree measures on the unit cube: greedy maximum-likelihood fit with shrinkage,
and a flat container (:class:`Forest`) for a sequence of them.

A tree measure is a recursive binary partition of the cube [0, 1]^d in which
the split of node A (dimension j, location c) carries theta, the probability
of the left child given A.  Fitting (:func:`fit_tree`) grows the partition
level by level on equal-width candidate cuts of each node's extent, choosing
per node the cut with the largest gain in training log-likelihood of the
*shrunk* measure

    P(A) = (1 - lr) vol(A) + lr n_A / N,

i.e. the mixture (1 - lr) uniform + lr (piecewise-constant maximum likelihood
fit on the same partition).  That mixture is again a tree measure on the same
partition with theta = P(left) / P(node) in (0, 1) for lr < 1, so every local
CDF slope is positive and finite.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import kernels

#: Events sampled (evenly) from a node for its pair histogram in the lookahead.
LOOKAHEAD_EVENTS = 20_000


@dataclass
class Forest:
    """A sequence of tree measures stored as flat node arrays (see :mod:`kernels`).

    ``roots`` (n_trees,) int64; node arrays ``dim`` int64, ``cut``, ``lo``,
    ``hi``, ``theta`` float64, ``left``/``right`` int64 (absolute indices, -1
    for a leaf).  Derived arrays (mid, slopes, log slopes) are rebuilt by
    :meth:`finish`.
    """

    roots: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    dim: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    cut: np.ndarray = field(default_factory=lambda: np.zeros(0))
    lo: np.ndarray = field(default_factory=lambda: np.zeros(0))
    hi: np.ndarray = field(default_factory=lambda: np.zeros(0))
    theta: np.ndarray = field(default_factory=lambda: np.zeros(0))
    left: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    right: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))

    def __post_init__(self):
        self.finish()

    @property
    def n_trees(self) -> int:
        return int(self.roots.shape[0])

    @property
    def n_nodes(self) -> int:
        return int(self.dim.shape[0])

    def finish(self) -> None:
        """Recompute the derived arrays used by the kernels."""
        width = self.hi - self.lo
        self.mid = self.lo + self.theta * width
        m = self.dim.shape[0]
        self.child = np.empty(2 * m, np.int64)
        self.child[0::2] = self.left
        self.child[1::2] = self.right
        self.base = np.empty(2 * m)
        self.base[0::2] = self.lo
        self.base[1::2] = self.mid
        self.anchor = np.empty(2 * m)
        self.anchor[0::2] = self.lo
        self.anchor[1::2] = self.cut
        self.slope = np.empty(2 * m)
        with np.errstate(divide="ignore", invalid="ignore"):
            self.slope[0::2] = self.theta * width / (self.cut - self.lo)
            self.slope[1::2] = (1.0 - self.theta) * width / (self.hi - self.cut)
        self.lslope = np.log(self.slope)
        self.arrays = kernels.ForestArrays(self.roots, self.dim, self.cut, self.mid, self.child, self.base,
                                           self.anchor, self.slope, self.lslope)

    def append(self, tree: "Forest") -> None:
        """Append the trees of ``tree`` (node indices shifted)."""
        shift = self.n_nodes
        roots = np.where(tree.roots >= 0, tree.roots + shift, -1)
        self.roots = np.concatenate([self.roots, roots])
        self.dim = np.concatenate([self.dim, tree.dim])
        self.cut = np.concatenate([self.cut, tree.cut])
        self.lo = np.concatenate([self.lo, tree.lo])
        self.hi = np.concatenate([self.hi, tree.hi])
        self.theta = np.concatenate([self.theta, tree.theta])
        self.left = np.concatenate([self.left, np.where(tree.left >= 0, tree.left + shift, -1)])
        self.right = np.concatenate([self.right, np.where(tree.right >= 0, tree.right + shift, -1)])
        self.finish()

    def prefix(self, n_trees: int) -> "Forest":
        """The first ``n_trees`` trees (nodes of later trees dropped)."""
        n_trees = int(n_trees)
        if n_trees >= self.n_trees:
            keep = self.n_nodes
        else:
            later = self.roots[n_trees:]
            later = later[later >= 0]
            keep = int(later.min()) if later.size else self.n_nodes
        return Forest(self.roots[:n_trees].copy(), self.dim[:keep].copy(), self.cut[:keep].copy(),
                      self.lo[:keep].copy(), self.hi[:keep].copy(), self.theta[:keep].copy(),
                      self.left[:keep].copy(), self.right[:keep].copy())

    def slice_trees(self, t0: int, t1: int) -> "Forest":
        """Trees t0 .. t1-1 as a new forest (node indices shifted to start at 0)."""
        roots = self.roots[t0:t1]
        used = roots[roots >= 0]
        if used.size == 0:
            return Forest(roots=np.full(roots.shape, -1, np.int64))
        a = int(used.min())
        later = self.roots[t1:]
        later = later[later >= 0]
        b = int(later.min()) if later.size else self.n_nodes
        shift = lambda v: np.where(v >= 0, v - a, -1)  # noqa: E731
        return Forest(shift(roots), self.dim[a:b].copy(), self.cut[a:b].copy(), self.lo[a:b].copy(),
                      self.hi[a:b].copy(), self.theta[a:b].copy(), shift(self.left[a:b]),
                      shift(self.right[a:b]))

    def with_dim(self, j: int) -> "Forest":
        """A copy whose splits all act on dimension ``j`` (for one-channel trees)."""
        out = Forest(self.roots.copy(), np.full_like(self.dim, j), self.cut.copy(), self.lo.copy(),
                     self.hi.copy(), self.theta.copy(), self.left.copy(), self.right.copy())
        return out

    def forward(self, U: np.ndarray, logd: np.ndarray) -> None:
        """Apply all trees to U (n, d) in place, adding log densities to logd (n,)."""
        if self.n_trees:
            kernels.forest_forward(U, logd, self.arrays)

    def inverse(self, U: np.ndarray) -> None:
        """Undo :meth:`forward` in place."""
        if self.n_trees:
            kernels.forest_inverse(U, self.arrays)

    def max_depth(self) -> int:
        """Depth of the deepest path (number of split nodes on it)."""
        depth = np.zeros(self.n_nodes, np.int64)
        best = 0
        for m in range(self.n_nodes):  # parents precede children
            if depth[m] == 0:
                depth[m] = 1
            for c in (self.left[m], self.right[m]):
                if c >= 0:
                    depth[c] = depth[m] + 1
            best = max(best, int(depth[m]))
        return best


def fit_tree(R: np.ndarray, learning_rate: float, max_depth: int, n_bins: int, min_leaf: int,
             allowed: np.ndarray | None = None, alpha: float = -1.0, rng=None,
             min_gain: float = 0.0, lookahead: int = 0, lookahead_bins: int = 32) -> Forest:
    """Fit one shrunk tree measure to events R (n, d) in the unit cube.

    Growth is level by level up to ``max_depth`` splits on any path; a node
    is split at the equal-width candidate (``n_bins`` bins of its extent on
    each allowed dimension) with the largest positive gain leaving at least
    ``min_leaf`` events on each side.  Returns a one-tree :class:`Forest`
    (possibly without splits).  ``alpha >= 0`` switches from the global
    mixture shrinkage to per-node shrinkage (:func:`kernels.node_theta`).
    With a numpy Generator ``rng`` each node's grid of candidate cuts is
    shifted by a random fraction of a bin, so successive trees cut at
    different places (the composition is smoother than any one tree).
    Nodes in the first ``lookahead`` levels (per-node shrinkage only) are
    split by two-level lookahead on a ``lookahead_bins`` grid
    (:func:`kernels.lookahead_split`).
    """
    n, d = R.shape
    lr = float(learning_rate)
    if allowed is None:
        allowed = np.ones(d, np.bool_)
    node_of = np.zeros(n, np.int64)
    # per active node at the current level
    box_lo = np.zeros((1, d))
    box_hi = np.ones((1, d))
    counts = np.array([n], np.int64)
    parent_gid = np.array([-1], np.int64)   # global id of each active node's parent
    parent_left = np.array([False])         # is the active node its parent's left child

    rule = kernels.SplitRule(lr, float(alpha), int(min_leaf), float(min_gain), float(n))
    dims, cuts, los, his, thetas = [], [], [], [], []
    lefts = np.zeros(0, np.int64)
    rights = np.zeros(0, np.int64)
    n_split = 0

    for _level in range(int(max_depth)):
        n_nodes = box_lo.shape[0]
        if n_nodes == 0:
            break
        width = box_hi - box_lo
        vol = np.prod(width, axis=1)
        shift = rng.random(n_nodes) if rng is not None else np.zeros(n_nodes)
        hist = kernels.level_histogram(R, node_of, box_lo, 1.0 / width, n_nodes, int(n_bins),
                                       allowed, shift)
        bdim, bbin, _gain, nleft = kernels.best_splits(hist, counts, vol, shift, allowed, rule)
        cut_frac = (bbin + 1.0 - shift) / n_bins
        if _level < lookahead and alpha >= 0:
            inv = 1.0 / width
            for k in range(n_nodes):
                if counts[k] < 2 * min_leaf:
                    continue
                # at most ~LOOKAHEAD_EVENTS events per pair histogram
                stride = max(1, int(counts[k]) // LOOKAHEAD_EVENTS)
                H = kernels.pair_histogram(R, node_of, k, box_lo[k], inv[k], int(lookahead_bins), allowed,
                                           stride)
                j, b, _nl, _score = kernels.lookahead_split(H, lr, float(alpha) / stride,
                                                            max(1, int(min_leaf) // stride), allowed)
                if j >= 0:
                    frac = (b + 1.0) / lookahead_bins
                    c = box_lo[k, j] + frac * width[k, j]
                    nl = int(np.count_nonzero((node_of == k) & (R[:, j] < c)))
                    if nl >= min_leaf and counts[k] - nl >= min_leaf:
                        bdim[k], nleft[k] = j, nl
                        cut_frac[k] = frac
        split_cut = np.zeros(n_nodes)
        child_l = np.full(n_nodes, -1, np.int64)
        child_r = np.full(n_nodes, -1, np.int64)
        ks = np.flatnonzero(bdim >= 0)
        js = bdim[ks]
        a = box_lo[ks, js]
        b = box_hi[ks, js]
        c = a + cut_frac[ks] * (b - a)
        good = (a < c) & (c < b)  # rounding at a tiny node: leave it a leaf
        ks, js, a, b, c = ks[good], js[good], a[good], b[good], c[good]
        bdim = np.where(np.isin(np.arange(n_nodes), ks), bdim, -1)
        m = ks.size
        if m == 0:
            break
        split_cut[ks] = c
        gids = n_split + np.arange(m)
        # link each new node to its parent
        pa = parent_gid[ks]
        has_pa = pa >= 0
        is_l = parent_left[ks]
        lefts[pa[has_pa & is_l]] = gids[has_pa & is_l]
        rights[pa[has_pa & ~is_l]] = gids[has_pa & ~is_l]
        nl = nleft[ks].astype(np.float64)
        na = counts[ks].astype(np.float64)
        nr = na - nl
        frac = (c - a) / (b - a)
        if alpha >= 0:
            theta = (1.0 - lr) * frac + lr * (nl + alpha * frac) / (na + alpha)
        else:
            pl = (1.0 - lr) * vol[ks] * frac + lr * nl / n
            pr = (1.0 - lr) * vol[ks] * (1.0 - frac) + lr * nr / n
            theta = pl / (pl + pr)
        dims.append(js)
        cuts.append(c)
        los.append(a)
        his.append(b)
        thetas.append(theta)
        lefts = np.concatenate([lefts, np.full(m, -1, np.int64)])
        rights = np.concatenate([rights, np.full(m, -1, np.int64)])
        n_split += m
        # children that can still be split become next level's nodes (left, right per node)
        grow = np.stack([nl >= 2 * min_leaf, nr >= 2 * min_leaf], axis=1).ravel()
        if not grow.any() or _level == max_depth - 1:
            break
        rows = np.repeat(np.arange(m), 2)[grow]
        sides = np.tile([True, False], m)[grow]
        kk = ks[rows]
        new_lo = box_lo[kk].copy()
        new_hi = box_hi[kk].copy()
        new_hi[sides, js[rows][sides]] = c[rows][sides]
        new_lo[~sides, js[rows][~sides]] = c[rows][~sides]
        local = np.arange(rows.size)
        child_l[kk[sides]] = local[sides]
        child_r[kk[~sides]] = local[~sides]
        new_counts = np.where(sides, nl[rows], nr[rows]).astype(np.int64)
        kernels.route_events(R, node_of, bdim, split_cut, child_l, child_r)
        box_lo, box_hi, counts = new_lo, new_hi, new_counts
        parent_gid = gids[rows]
        parent_left = sides

    if n_split == 0:
        return Forest(roots=np.array([-1], np.int64))
    return Forest(roots=np.array([0], np.int64), dim=np.concatenate(dims).astype(np.int64),
                  cut=np.concatenate(cuts), lo=np.concatenate(los), hi=np.concatenate(his),
                  theta=np.concatenate(thetas), left=lefts, right=rights)
