"""The tree stage: layers of [rotation] -> marginal maps -> boosted dependence
trees, fitted on the training share and stopped on the held-out share
(:class:`~core.density.boosting_stop.EarlyStopping`), each layer kept only when
it pays for itself."""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field

import numpy as np

from ..progress import keep_going
from . import kernels
from .boosting_stop import EarlyStopping
from .chain import Chain, Layer
from .marginals import fit_marginal_map
from .tree import Forest, fit_tree

#: (nodes x channel pairs) per tree the two-level lookahead may examine.
LOOKAHEAD_PAIR_BUDGET = 1200
#: Scoring with the full map (Rosenblatt map, rotations, trees) costs about this
#: many times the mixture's density alone (4.7x measured on 1,000,000 x 28, 3.4x
#: on 1,000,000 x 10): the first layer of trees after a mixture base must gain
#: ``layer_tol`` x this (nats per event) on the held-out share to be kept.
MAP_COST_RATIO = 4.0
#: After a mixture base, a layer whose first this-many trees have not reached
#: its required held-out gain is abandoned at once (no patience run, nothing
#: to roll back).  After the logistic base later layers keep their patience
#: (slow starters may pay there; EXPERIMENTS.md section 22).
EARLY_TREES = 3
#: Before that, after a mixture base, a layer is abandoned as soon as its best
#: held-out value plus this many times the latest tree's gain stays below the
#: required gain (the same projection as the mixture stage's count search,
#: :data:`core.density.em.ABANDON_GAP`: a first tree that loses on the held-out
#: share ends a layer that must gain 0.04 nats; EXPERIMENTS.md section 26).
TREE_ABANDON_GAP = 3.0


@dataclass
class Shares:
    """The training and held-out events in the cube (n, d), mapped in place as
    layers are added, and the held-out log density so far (m,)."""
    U_tr: np.ndarray
    U_va: np.ndarray
    ld_va: np.ndarray

    @property
    def heldout(self) -> float:
        return float(self.ld_va.mean())

    def copy(self) -> "Shares":
        return Shares(self.U_tr.copy(), self.U_va.copy(), self.ld_va.copy())


@dataclass
class TreeStage:
    """What the tree stage found: the learning curve (held-out mean
    log-likelihood after each step), why it stopped and the first layer's
    one-channel trees per channel."""
    curve: list = field(default_factory=list)
    stopped_by: str = "n_trees"
    n_marginal_trees: np.ndarray | None = None


def lookahead_levels(p, free: int) -> int:
    """Levels of two-level lookahead: ``p.lookahead``, fewer when channels^2 x nodes
    would exceed ``LOOKAHEAD_PAIR_BUDGET`` (3 levels up to 12 free channels, 2 up
    to 20, only the root beyond)."""
    look = int(p.lookahead)
    if look > 0:
        nodes = LOOKAHEAD_PAIR_BUDGET / max(1, free * free)
        look = max(1, min(look, int(math.floor(math.log2(nodes + 1.0)))))
    return look


def rotation(U: np.ndarray, allowed: np.ndarray, kind: str, rng) -> np.ndarray:
    """Orthogonal d x d matrix: principal axes of the events U (n, d) in Gaussianised
    coordinates (probit of each cube coordinate), or a random rotation
    (``kind`` "random"), acting on the ``allowed`` channels."""
    d = U.shape[1]
    if kind == "random":
        k = int(allowed.sum())
        vecs, r = np.linalg.qr(rng.normal(size=(k, k)))
        vecs = vecs * np.sign(np.diag(r))
    else:
        Z = kernels.probit_matrix(U)[:, allowed]
        C = np.cov(Z, rowvar=False)
        _, vecs = np.linalg.eigh(C)
        vecs = vecs[:, ::-1]
    # fix signs so the result does not depend on the eigen-solver's choice
    vecs = vecs * np.where(vecs[np.abs(vecs).argmax(axis=0), np.arange(vecs.shape[1])] < 0, -1.0, 1.0)
    Q = np.eye(d)
    idx = np.flatnonzero(allowed)
    Q[np.ix_(idx, idx)] = vecs.T
    return Q


def marginal_tree_count(p, base: str) -> int:
    """Most one-channel trees per channel (resolves the automatic -1: none after a
    mixture base, 100 after the logistic one)."""
    m = int(p.marginal_trees)
    if m >= 0:
        return m
    return 0 if base in ("gmm", "skewed") else 100


def fit_layers(p, chain: Chain, base: str, shares: Shares, rng, progress) -> TreeStage:
    """Add layers to ``chain`` (whose base map made ``shares``) until the tree
    budget ``p.n_trees`` is spent, a layer does not pay or no split is found.
    ``p`` holds the estimator's settings.  A layer gains at least ``p.layer_tol``
    nats per event (the first after a mixture base ``MAP_COST_RATIO`` times
    that) or is dropped (the first then leaves the base alone)."""
    d = shares.U_tr.shape[1]
    allowed = ~chain.constant
    total = int(p.n_trees) if allowed.sum() >= 2 else 0  # one free channel: marginals are the model
    stage = TreeStage()
    chain.layers = []
    mixture = chain.mixture is not None
    if mixture and chain.mixture.cancelled:
        # stopped while fitting the mixture: it is the whole model, and the caller is not asked again
        stage.stopped_by = "cancelled"
        chain.keep_base_only()
        stage.n_marginal_trees = np.zeros(d, np.int64)
        stage.curve.append(shares.heldout)
        return stage
    look = lookahead_levels(p, int(allowed.sum()))
    done = 0
    for layer in range(max(1, int(p.n_layers)) if total else 1):
        # after a mixture base the first layer must pay for itself too,
        # and for the full map it forces on scoring (MAP_COST_RATIO)
        start_ll = shares.heldout if layer or mixture else -np.inf
        needed = float(p.layer_tol) * (MAP_COST_RATIO if layer == 0 else 1.0)
        Q = None
        if layer > 0:
            Q = rotation(shares.U_tr, allowed, p.rotation, rng)
            kernels.rotate(shares.U_tr, Q)
            kernels.rotate(shares.U_va, Q)
        pwl, counts = fit_marginal_map(shares.U_tr, shares.U_va, shares.ld_va, chain.constant,
                                       marginal_tree_count(p, base), float(p.marginal_learning_rate),
                                       int(p.marginal_depth), int(p.n_bins), int(p.min_leaf),
                                       float(p.marginal_alpha), int(p.patience))
        if layer == 0:
            stage.n_marginal_trees = counts
        stage.curve.append(shares.heldout)
        chain.layers.append(Layer(Q, pwl))
        if not keep_going(progress, done, total, stage.curve[-1]):
            stage.stopped_by = "cancelled"
            break
        budget = min(total - done, int(p.layer_trees))
        forest, best_k, best_ll, rolled_back = _fit_trees(p, shares, budget, allowed, look, start_ll, needed,
                                                          mixture, rng, progress, done, stage)
        chain.layers[-1].forest = forest
        if stage.stopped_by == "cancelled":
            break
        if rolled_back is not None:
            shares = rolled_back
            stage.curve.append(best_ll)
        done += best_k
        if best_ll - start_ll < needed:
            # a layer that does not pay for its scoring time; the first one
            # (after a mixture base) leaves the base alone, whose density
            # then needs no Rosenblatt map (gmm_logpdf, ~3x faster)
            if layer > 0:
                chain.layers.pop()
            else:
                chain.keep_base_only()
                stage.n_marginal_trees = np.zeros(d, np.int64)
            stage.curve.append(start_ll)
            break
        if done >= total or stage.stopped_by == "no split":
            break
    return stage


def _fit_trees(p, shares, budget, allowed, look, start_ll, needed, mixture, rng, progress, done, stage):
    """Boost up to ``budget`` dependence trees on ``shares``; returns (forest cut back
    to its best prefix, trees kept, held-out value reached, and the shares at that
    prefix when trees were rolled back, else None: ``shares`` moved on in place).
    Stops on patience, on a cancel (forest as fitted) or, after a mixture base,
    once ``EARLY_TREES`` trees have not reached the layer's ``needed`` gain, or sooner
    when the latest tree's gain projects short of it (``TREE_ABANDON_GAP``)."""
    forest = Forest()
    stop = EarlyStopping(stage.curve[-1], p.patience, p.tol)
    scratch = np.zeros(shares.U_tr.shape[0])
    best_state = pre_state = None
    prev_ll = stage.curve[-1]
    for k in range(1, budget + 1):
        tree = fit_tree(shares.U_tr, float(p.learning_rate), int(p.max_depth), int(p.n_bins), int(p.min_leaf),
                        allowed, float(p.alpha), rng if p.jitter else None, float(p.min_gain), look,
                        int(p.lookahead_bins))
        if tree.n_nodes == 0:
            stage.stopped_by = "no split"
            break
        if best_state is None:
            pre_state = shares.copy()
        tree.forward(shares.U_tr, scratch)
        tree.forward(shares.U_va, shares.ld_va)
        forest.append(tree)
        ll = shares.heldout
        stage.curve.append(ll)
        if stop.update(k, ll):
            best_state = None
        elif best_state is None:
            best_state = pre_state  # the state at the best prefix
        pre_state = None
        if not keep_going(progress, done + k, int(p.n_trees), ll):
            stage.stopped_by = "cancelled"
            return forest, forest.n_trees, ll, None
        short = stop.best_ll - start_ll < needed
        hopeless = stop.best_ll + TREE_ABANDON_GAP * max(ll - prev_ll, 0.0) - start_ll < needed
        prev_ll = ll
        if stop.exhausted(k) or (mixture and short and (k >= EARLY_TREES or hopeless)):
            # no patience run for a layer whose first trees do not pay
            stage.stopped_by = "early stopping"
            break
    if forest.n_trees > stop.best_k:
        # roll back to the best prefix (state saved when it was passed)
        return forest.prefix(stop.best_k), stop.best_k, stop.best_ll, best_state
    return forest, stop.best_k, stop.best_ll, None


#: The first tree after a mixture base is first fitted on an evenly spread probe
#: of at most this many training events, half of them when fewer than twice as
#: many (the Rosenblatt map of the training share is the cost: 27 % of a
#: 200,000 x 8 fit, 10-15 % of a 50,000-event fit); a probe tree that does not
#: raise the held-out log-likelihood enough ends the tree stage before the rest
#: of the training share is mapped (:func:`probe_gain`; EXPERIMENTS.md sections 26, 29).
PROBE_EVENTS = 50_000
#: With fewer training events than this there is no probe (the tree stage runs as it is).
PROBE_MIN_TRAIN = 30_000


def probe_events(n_train: int) -> np.ndarray | None:
    """Indices (evenly spread, increasing) of the training events the probe tree is
    fitted on (``min(PROBE_EVENTS, n_train // 2)`` of them), or None when ``n_train``
    < ``PROBE_MIN_TRAIN`` (the tree stage runs as it is)."""
    if n_train < PROBE_MIN_TRAIN:
        return None
    return np.linspace(0, n_train - 1, min(PROBE_EVENTS, n_train // 2)).astype(np.int64)


def probe_gain(p, chain: Chain, U_probe, U_va, ld_va, rng) -> float:
    """Held-out gain (nats per event) of the first dependence tree the tree stage
    would fit after a mixture base, fitted on the probe events ``U_probe`` (m, d)
    (in the cube) and scored on the held-out share U_va (n, d), ld_va (n,) (neither
    changed).  The first layer's marginal maps are the identity after a mixture base
    (no one-channel trees), so the probe tree sees what the first tree would see.
    A copy of ``rng`` serves the tree's jitter, so the tree stage that may follow
    draws exactly as without the probe."""
    allowed = ~chain.constant
    look = lookahead_levels(p, int(allowed.sum()))
    tree = fit_tree(np.array(U_probe), float(p.learning_rate), int(p.max_depth), int(p.n_bins),
                    int(p.min_leaf), allowed, float(p.alpha), copy.deepcopy(rng) if p.jitter else None,
                    float(p.min_gain), look, int(p.lookahead_bins))
    if tree.n_nodes == 0:
        return 0.0
    U, ld = U_va.copy(), ld_va.copy()
    tree.forward(U, ld)
    return float(ld.mean() - ld_va.mean())
