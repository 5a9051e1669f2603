"""AdditiveTreeDensity: a density estimate for events x channels learned by
unsupervised tree boosting.

The model is a chain of exactly invertible maps from R^d onto the unit cube
[0, 1]^d; the density of an event is the product of the Jacobians of the
maps (the "zero" model at the end of the chain is uniform on the cube):

1. **Map into the cube** (per channel, full support): robust
   standardisation ``z = (x - median) / scale`` with ``scale`` = IQR / (2 ln 3)
   (so a standard logistic has the data's inter-quartile range), then the
   logistic CDF ``u = 1 / (1 + exp(-z))``.  Its log-Jacobian
   ``log sigma'(z) - log scale`` is exact and finite for every finite x, so
   events outside the training range get a finite tail density that decays
   like ``exp(-|x - median| / scale)`` beyond the data (never -inf, never a
   crash).  The logistic (rather than normal) CDF is chosen because its tails
   keep the map invertible to ~1e-12 relative error out to 25 robust scales,
   where a normal CDF rounds to 0 or 1 beyond about 8.
2. **Marginals first**: per channel, a boosted sequence of one-dimensional
   tree measures fitted to the mapped values, stopped early on the
   held-out share.  Their composition (a monotone piecewise-linear map of
   [0, 1] onto itself, i.e. the CDF of a one-dimensional tree measure) is
   stored as knots with the exact slope of each piece.
3. **Dependence**: boosted tree measures on the whole cube (forward-stagewise,
   shrinkage toward uniform, early stopping on held-out log-likelihood with
   patience, keeping the best prefix).
4. **Layers** (optional, ``n_layers``): an orthogonal rotation in
   Gaussianised coordinates, ``u -> Phi(Q Phi^-1(u))`` with Q the principal
   axes of the current events' probits, then steps 2 and 3 again.  Its
   Jacobian determinant is exactly 1 (an orthogonal map preserves the
   standard normal density), so the log density stays exact; probits are
   taken of u clipped to [1e-16, 1 - 1e-16].

    log f(x) = log|J_cube(x)| + sum_layers [log m'(u) + sum_k log g_k(r_{k-1})]

No integration anywhere; sampling runs the chain backwards from a uniform draw.

**Base** (``base``, default ``"auto"``): ``"logistic"`` is step 1 above.  ``"gmm"`` replaces it
with a fitted parametric base measure: a full-covariance Gaussian mixture
(plus a broad logistic background component, so tails stay finite) fitted
by EM on the training share, pushed onto the cube by its Rosenblatt map
(:mod:`core.density.gaussian_base`), whose log-Jacobian is exactly the
mixture's log density.  The trees then only correct what the mixture
misses; held-out early stopping keeps the model from doing worse on the
held-out share than the mixture itself.  ``"skewed"`` goes one step further:
the chosen mixture is refitted with a sinh-arcsinh transform per component
and channel (each component a Gaussian copula with skewed margins) and kept
when that scores better on the held-out events, with a flat-top background
component; its Rosenblatt map stays exact.  ``"auto"`` is ``"skewed"``, and on
events with atoms (a value holding >= ``ATOM_SHARE`` of a channel) also
``"logistic"``, keeping the better on the held-out share.  Constant channels
keep the logistic fallback below in every case.

Units: log densities are natural logs per unit volume of the input X
(i.e. in the units of the transformed channels the caller passes).

Constant channels (max == min in the fitted events) are documented fallback:
the channel is modelled as a logistic of scale 1e-3 * max(1, |value|) centred
on the value, independent of the others (no trees split on it), so the
model stays a valid density.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import BoscageError, EventDataError, ParameterError
from ..progress import keep_going
from . import kernels
from .gaussian_base import BASE_CHOICES, MIXTURE_BASES, GaussianMixtureBase
from .tree import Forest, fit_tree

#: Events per chunk when scoring/transforming (bounded memory).
CHUNK = 1 << 16
MIN_EVENTS = 50
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
_LOGISTIC_IQR = 2.0 * math.log(3.0)


def _check_matrix(X, what: str, n_features: int | None = None, min_events: int = 0) -> np.ndarray:
    """Return X as a 2-D array (no copy when possible) after shape checks."""
    X = np.asarray(X)
    if X.ndim == 1 and n_features == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise EventDataError(f"{what}: expected a 2-D array of events x channels, got shape {X.shape}")
    if not np.issubdtype(X.dtype, np.number) or np.iscomplexobj(X):
        raise EventDataError(f"{what}: event values must be real numbers, got dtype {X.dtype}")
    if n_features is not None and X.shape[1] != n_features:
        raise EventDataError(
            f"{what}: the model was fitted on {n_features} channels but the events have "
            f"{X.shape[1]}; pass the same channels in the same order")
    if X.shape[0] < min_events:
        raise EventDataError(
            f"{what}: {X.shape[0]} events is too few to fit a density; at least {min_events} are needed")
    return X


def _nonfinite_error(X: np.ndarray, what: str) -> EventDataError:
    bad = ~np.isfinite(X)
    rows = int(bad.any(axis=1).sum())
    cols = np.flatnonzero(bad.any(axis=0)).tolist()
    return EventDataError(
        f"{what}: {rows} event(s) have missing or infinite values (NaN/inf) in column(s) "
        f"{cols} (0-based); remove or clean them first (core.prepare.prepare_events does this)")


def _chunk(X: np.ndarray, a: int, b: int, what: str) -> np.ndarray:
    """Rows a:b of X as a fresh C-contiguous float64 array (never a view of X)."""
    C = np.array(X[a:b], dtype=np.float64, order="C", copy=True)
    if not np.isfinite(C).all():
        raise _nonfinite_error(X, what)
    return C


#: Largest |value| fit accepts: beyond it squares and products in float64 overflow.
MAX_ABS_VALUE = 1e100
#: A channel whose values vary by less than this share of their size is below
#: float64 resolution for the maps (the engine's scale floor is 1e-12 of the size).
MIN_RELATIVE_SPREAD = 1e-12
#: Scoring: values further than this many robust scales from a channel's centre are
#: scored as if at that distance (their log density is then below -1e40 nats).
FAR_SCALES = 1e40
#: Scoring: the lowest log density reported (float64 cannot go below -1.8e308).
LOG_DENSITY_FLOOR = -1e300
#: Most events :meth:`AdditiveTreeDensity.sample` draws in one call.
MAX_SAMPLE = 100_000_000


def _check_value_range(X: np.ndarray) -> None:
    """Refuse events the engine cannot represent (EventDataError naming the channel):
    values beyond +-1e100, or a non-constant channel whose spread is below 1e-12 of its size."""
    if X.shape[0] == 0 or X.shape[1] == 0:
        return
    with np.errstate(all="ignore"):
        lo, hi = np.nanmin(X, axis=0).astype(np.float64), np.nanmax(X, axis=0).astype(np.float64)
        size = np.maximum(np.abs(lo), np.abs(hi))
        spread = hi - lo
    for j in range(X.shape[1]):
        if not np.isfinite(size[j]):
            continue  # NaN/inf: reported by the fit's own check, with counts
        if size[j] > MAX_ABS_VALUE:
            raise EventDataError(
                f"fit: column {j} (0-based) holds values up to {size[j]:.3g}; the density engine works with "
                f"values within +-{MAX_ABS_VALUE:g} (transform or rescale the channel first)")
        if 0 < spread[j] < MIN_RELATIVE_SPREAD * max(1.0, size[j]):
            raise EventDataError(
                f"fit: column {j} (0-based) varies by only {spread[j]:.3g} around {size[j]:.3g}, below what "
                "float64 resolves for a density; rescale the channel or leave it out")


#: With ``base="auto"``: a channel whose most frequent value holds at least this
#: share of the events has an atom, and the logistic base is tried as well.
ATOM_SHARE = 0.05
#: Events looked at (evenly strided) to find atoms.
_ATOM_SAMPLE = 50_000


def largest_atom_share(X) -> float:
    """Largest share of events (n_events, n_channels) sitting on one single value
    in any channel, from at most 50,000 evenly strided events; 0 for none."""
    X = np.asarray(X)
    step = max(1, X.shape[0] // _ATOM_SAMPLE)
    S = np.sort(X[::step], axis=0)
    n = S.shape[0]
    best = 0
    for j in range(S.shape[1]):
        col = S[:, j]
        starts = np.flatnonzero(np.concatenate([[True], col[1:] != col[:-1], [True]]))
        best = max(best, int(np.diff(starts).max()))
    return best / n if n else 0.0


class AdditiveTreeDensity:
    """Density of events x channels by unsupervised tree boosting (see module docstring).

    Parameters
    ----------
    n_trees : int
        Most dependence trees to fit (early stopping usually ends sooner).
    learning_rate : float
        Shrinkage toward uniform of each dependence tree, in (0, 1).
    alpha : float
        Scale-dependent shrinkage: each split's left probability is
        ``(1 - lr) frac + lr (n_L + alpha frac) / (n_A + alpha)`` (frac: the
        left child's share of the node's extent), so nodes with many events
        learn nearly fully and sparse ones stay near uniform.  A negative
        value selects global shrinkage instead: the tree measure
        ``(1 - lr) uniform + lr (maximum likelihood tree)``.
    max_depth : int
        Most splits on a root-to-leaf path of a dependence tree.
    n_bins : int
        Equal-width candidate cuts per node and dimension.
    min_leaf : int
        Fewest training events on each side of a split.
    validation_fraction : float
        Share of the events held out for early stopping.
    patience : int
        Trees without held-out improvement before stopping.
    tol : float
        A dependence tree counts as an improvement only when it raises the
        best held-out mean log-likelihood by more than this (nats): the
        long tail of tiny gains, which costs scoring time, is cut.
    max_fit_events : int
        Above this many events the fit uses a seeded random subsample.
    marginal_trees, marginal_learning_rate, marginal_depth, marginal_alpha :
        The same roles for the one-channel trees of the marginal stage
        (``marginal_trees=0`` skips the stage; the default -1 means 100 after
        the logistic base and none after the Gaussian-mixture base, whose
        margins the stage did not improve: see EXPERIMENTS.md section 13).
    n_layers : int
        Most layers; layer 2, 3, ... first rotates the cube coordinates to the
        principal axes of the current events in Gaussianised coordinates, then
        fits marginals and a block of trees again.
    layer_trees : int
        Most trees per layer.
    rotation : "pca" or "random"
        How later layers choose their rotation.
    min_gain : float
        Least training log-likelihood gain (nats, summed over the node's
        events) for a dependence split.
    lookahead : int
        Levels (from the root) whose splits are chosen by two-level
        lookahead: the split's gain plus the best gain of each child.
        Fewer levels are used when channels^2 x nodes would exceed
        ``LOOKAHEAD_PAIR_BUDGET`` (at least the root).
    lookahead_bins : int
        Equal-width candidate cuts per channel in the lookahead (its cost
        grows as channels^2 x lookahead_bins^2).
    jitter : bool
        Shift each node's grid of candidate cuts by a random fraction of a
        bin (seeded by ``random_state``).
    layer_tol : float
        A layer that improves the held-out mean log-likelihood by less than
        this (nats) is dropped and fitting ends.  The first layer after a
        mixture base must gain ``MAP_COST_RATIO`` (4) times as much, because
        keeping any tree makes scoring run the full map (about 4x the
        mixture's density alone); after a mixture base, a layer whose first
        ``EARLY_TREES`` (3) trees fall short of its required gain is abandoned
        at once.
    base : "auto", "logistic", "gmm" or "skewed"
        The first map into the cube: per-channel logistic of robust
        location/scale, or the Rosenblatt map of a Gaussian mixture fitted
        by EM (component count by held-out log-likelihood) on the training
        share, or that mixture refitted with skewed components (and a
        flat-top background) when they score better.  "auto" (default):
        "skewed", and when a channel has an atom (one value holding at least
        ``ATOM_SHARE`` of the events: a floor, a pinned value) also
        "logistic", keeping the better on the held-out share: axis-aligned
        trees capture an atom exactly after the per-channel map, while the
        mixture's conditional map bends it into a surface they cannot follow.
    random_state : int or None
        Seed for subsampling, the held-out split and any random choice;
        equal seeds give bit-identical models.

    Attributes (after fit)
    ----------------------
    n_features_in_ : int
        Channels.
    bounds_ : ndarray (2, n_channels)
        Per-channel minimum and maximum of the fitted events.
    n_trees_ : int
        Dependence trees kept (all layers).
    n_marginal_trees_ : ndarray (n_channels,)
        One-channel trees of the first layer's marginal stage, per channel.
    learning_curve_ : ndarray
        Held-out mean log-likelihood (nats per event, units of X): one entry
        after each layer's rotation and marginal stage, then one after each
        dependence tree; when a layer is rolled back to its best prefix or
        dropped, the value of the kept model is appended.  The last entry
        is the kept model's value.
    heldout_loglik_ : float
        The kept model's held-out mean log-likelihood.
    base_heldout_loglik_ : float
        Held-out mean log-likelihood of the base map alone (logistic or
        Gaussian mixture), before marginals and trees.
    n_events_fitted_ : int
        Events used (after the ``max_fit_events`` subsample).
    stopped_by_ : str
        "early stopping", "n_trees", "no split" or "cancelled".
    base_ : str
        The first map used ("logistic", "gmm" or "skewed"; ``base`` unless "auto").
    """

    def __init__(self, n_trees: int = 400, learning_rate: float = 0.9, max_depth: int = 14,
                 n_bins: int = 64, min_leaf: int = 10, validation_fraction: float = 0.2,
                 patience: int = 10, max_fit_events: int = 200_000, marginal_trees: int = -1,
                 marginal_learning_rate: float = 0.2, marginal_depth: int = 6,
                 n_layers: int = 3, layer_trees: int = 150, layer_tol: float = 0.01,
                 alpha: float = 1000.0, rotation: str = "pca", jitter: bool = False,
                 min_gain: float = 0.0, lookahead: int = 3, lookahead_bins: int = 16,
                 marginal_alpha: float = -1.0, tol: float = 0.0, base: str = "auto",
                 random_state: int | None = None):
        self.n_trees = n_trees
        self.learning_rate = learning_rate
        self.max_depth = max_depth
        self.n_bins = n_bins
        self.min_leaf = min_leaf
        self.validation_fraction = validation_fraction
        self.patience = patience
        self.max_fit_events = max_fit_events
        self.marginal_trees = marginal_trees
        self.marginal_learning_rate = marginal_learning_rate
        self.marginal_depth = marginal_depth
        self.n_layers = n_layers
        self.layer_trees = layer_trees
        self.alpha = alpha
        self.rotation = rotation
        self.jitter = jitter
        self.min_gain = min_gain
        self.lookahead = lookahead
        self.lookahead_bins = lookahead_bins
        self.marginal_alpha = marginal_alpha
        self.tol = tol
        self.layer_tol = layer_tol
        self.base = base
        self.random_state = random_state

    # ------------------------------------------------------------ params
    _PARAMS = ("n_trees", "learning_rate", "max_depth", "n_bins", "min_leaf", "validation_fraction",
               "patience", "max_fit_events", "marginal_trees", "marginal_learning_rate",
               "marginal_depth", "n_layers", "layer_trees", "layer_tol", "alpha", "rotation", "jitter", "min_gain", "lookahead", "lookahead_bins", "marginal_alpha", "tol", "base", "random_state")

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self._PARAMS}

    def set_params(self, **params) -> "AdditiveTreeDensity":
        for k, v in params.items():
            if k not in self._PARAMS:
                raise ParameterError(f"unknown density engine setting {k!r}; settings: {', '.join(self._PARAMS)}")
            setattr(self, k, v)
        return self

    def __repr__(self) -> str:
        return f"AdditiveTreeDensity(n_trees={self.n_trees}, learning_rate={self.learning_rate}, max_depth={self.max_depth})"

    def _validate_params(self) -> None:
        if not 0.0 < float(self.learning_rate) < 1.0:
            raise ValueError("learning_rate must be in (0, 1)")
        if not 0.0 < float(self.marginal_learning_rate) < 1.0:
            raise ValueError("marginal_learning_rate must be in (0, 1)")
        if not 1 <= int(self.max_depth) <= kernels.MAX_PATH // 2:
            raise ValueError(f"max_depth must be between 1 and {kernels.MAX_PATH // 2}")
        if not 1 <= int(self.marginal_depth) <= kernels.MAX_PATH // 2:
            raise ValueError(f"marginal_depth must be between 1 and {kernels.MAX_PATH // 2}")
        if int(self.n_bins) < 2:
            raise ValueError("n_bins must be at least 2")
        if int(self.min_leaf) < 1:
            raise ValueError("min_leaf must be at least 1")
        if not 0.0 < float(self.validation_fraction) < 0.9:
            raise ValueError("validation_fraction must be in (0, 0.9)")
        if self.base not in BASE_CHOICES:
            raise ValueError("base must be 'auto', 'logistic', 'gmm' or 'skewed'")
        if self.rotation not in ("pca", "random"):
            raise ValueError("rotation must be 'pca' or 'random'")
        if not np.isfinite(float(self.alpha)):
            raise ValueError("alpha must be a finite number")
        if int(self.n_trees) < 0 or int(self.marginal_trees) < -1 or int(self.patience) < 1:
            raise ValueError("n_trees must be >= 0, marginal_trees >= 0 (or -1: automatic) and patience >= 1")

    # ------------------------------------------------------------ fitting
    def fit(self, X, progress=None) -> "AdditiveTreeDensity":
        """Fit to events X (n_events, n_channels); returns self (see :meth:`_fit_checked`).

        Every problem with X or the settings raises one of this program's errors
        (EventDataError, ParameterError; both are ValueError too), never a bare
        numpy or Python exception."""
        try:
            self._validate_params()
        except (ValueError, TypeError, OverflowError) as exc:
            if isinstance(exc, BoscageError):
                raise
            raise ParameterError(f"density engine setting: {exc}") from None
        X = _check_matrix(X, "fit", min_events=MIN_EVENTS)
        if X.shape[1] == 0:
            raise EventDataError("fit: the events have no channels (0 columns)")
        _check_value_range(X)
        try:
            return self._fit_checked(X, progress)
        except BoscageError:
            raise
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            raise EventDataError(f"fit: the density could not be fitted to these events ({exc})") from exc

    def _fit_checked(self, X, progress=None) -> "AdditiveTreeDensity":
        """Fit to events X (n_events, n_channels); returns self.

        ``progress(step, total, heldout_loglik)`` is called after the
        marginal stage (step 0) and after each dependence tree; returning
        False stops cleanly keeping the trees so far (the model is usable).
        With ``base="auto"`` the skewed-mixture model is fitted and, when a
        channel has an atom (:func:`largest_atom_share` >= ``ATOM_SHARE``), the
        logistic-base model too (its progress follows, with the stage named);
        the one with the better held-out log-likelihood is kept (``base_``).
        Stopped during that second fit, the skewed-mixture model is kept and
        ``stopped_by_`` is "cancelled".
        """
        self._validate_params()
        X = _check_matrix(X, "fit", min_events=MIN_EVENTS)
        if self.base != "auto":
            return self._fit_base(X, self.base, progress)
        self._fit_base(X, "skewed", progress)
        if self.stopped_by_ == "cancelled" or largest_atom_share(X) < ATOM_SHARE:
            return self
        if not keep_going(progress, 0, int(self.n_trees),
                          {"stage": "Channels with atoms: fitting the logistic base as well"}):
            self.stopped_by_ = "cancelled"  # the skewed-mixture model is complete and usable
            return self
        other = AdditiveTreeDensity(**self.get_params())
        other._fit_base(X, "logistic", progress)
        if other.stopped_by_ == "cancelled":
            self.stopped_by_ = "cancelled"
            return self
        if other.heldout_loglik_ > self.heldout_loglik_:
            # its fitted state (base_ "logistic" included), not its parameters
            self.__dict__.update({k: v for k, v in other.__dict__.items() if k not in self._PARAMS})
        return self

    def _fit_base(self, X, base, progress) -> "AdditiveTreeDensity":
        """:meth:`fit` with the first map ``base`` ("logistic", "gmm" or "skewed");
        X already checked."""
        rng = np.random.default_rng(self.random_state)
        n_all = X.shape[0]
        if n_all > int(self.max_fit_events):
            idx = np.sort(rng.choice(n_all, int(self.max_fit_events), replace=False))
            X = X[idx]
        X = np.ascontiguousarray(X, dtype=np.float64)
        if not np.isfinite(X).all():
            raise _nonfinite_error(X, "fit")
        n, d = X.shape
        self.n_features_in_ = d
        self.n_events_fitted_ = n
        self.bounds_ = np.vstack([X.min(axis=0), X.max(axis=0)])

        # 1. map into the cube
        q25, med, q75 = np.percentile(X, [25.0, 50.0, 75.0], axis=0)
        scale = (q75 - q25) / _LOGISTIC_IQR
        std = X.std(axis=0) * math.sqrt(3.0) / math.pi
        scale = np.where(scale > 0, scale, std)
        frozen = self.bounds_[1] <= self.bounds_[0]
        scale = np.where(frozen, 1e-3 * np.maximum(1.0, np.abs(med)), scale)
        # std can be >0 yet tiny relative to the values; keep scale meaningful
        scale = np.maximum(scale, 1e-12 * np.maximum(1.0, np.abs(med)))
        self._loc = med.astype(np.float64)
        self._scale = scale.astype(np.float64)
        self._frozen = frozen

        perm = rng.permutation(n)
        n_val = max(1, int(round(float(self.validation_fraction) * n)))
        va, tr = np.sort(perm[:n_val]), np.sort(perm[n_val:])
        self._gmm = None
        self.base_ = base
        if base in MIXTURE_BASES and (~frozen).any():
            free = ~frozen
            self._gmm = GaussianMixtureBase.fit(
                X[tr][:, free], self._loc[free], self._scale[free],
                random_state=int(rng.integers(2 ** 31)), skew=base == "skewed",
                flat_background=base == "skewed", validation=X[va][:, free],
                progress=lambda step, total, info: keep_going(progress, 0, int(self.n_trees), info))
        U_tr, ld_tr = self._base_forward(X[tr])
        U_va, ld_va = self._base_forward(X[va])
        self.base_heldout_loglik_ = float(ld_va.mean())

        # 2. layers: [rotation] -> marginals -> block of dependence trees
        self._layers = []
        self.n_trees_ = 0
        self.stopped_by_ = "n_trees"
        total = int(self.n_trees)
        allowed = ~frozen
        if allowed.sum() < 2:
            total = 0  # at most one free channel: the marginal stage is the whole model
        curve = []
        scratch = np.zeros(tr.size)
        lr = float(self.learning_rate)
        # lookahead costs channels^2 per node: fewer levels for many channels
        # (3 levels up to 12 channels, 2 up to 20, only the root beyond)
        free = int(allowed.sum())
        look = int(self.lookahead)
        if look > 0:
            nodes = LOOKAHEAD_PAIR_BUDGET / max(1, free * free)
            look = max(1, min(look, int(math.floor(math.log2(nodes + 1.0)))))
        done = 0
        n_layers = max(1, int(self.n_layers)) if total else 1
        if self._gmm is not None and self._gmm.cancelled:
            # stopped while fitting the mixture: it is the whole model, and the
            # caller is not asked again
            self.stopped_by_ = "cancelled"
            n_layers = 0
            self._keep_base_only(d)
            curve.append(float(ld_va.mean()))
        for layer in range(n_layers):
            # after a Gaussian-mixture base the first layer must pay for itself too,
            # and for the full map it forces on scoring (MAP_COST_RATIO)
            start_ll = float(ld_va.mean()) if layer or self._gmm is not None else -np.inf
            needed = float(self.layer_tol) * (MAP_COST_RATIO if layer == 0 else 1.0)
            Q = None
            if layer > 0:
                Q = self._rotation(U_tr, allowed, rng)
                kernels.rotate(U_tr, Q)
                kernels.rotate(U_va, Q)
            pwl = self._fit_marginals(U_tr, U_va, ld_va)
            curve.append(float(ld_va.mean()))
            forest = Forest()
            self._layers.append((Q, pwl, forest))
            if not keep_going(progress, done, total, curve[-1]):
                self.stopped_by_ = "cancelled"
                break
            best_k, best_ll = 0, curve[-1]
            best_state = pre_state = None
            for k in range(1, min(total - done, int(self.layer_trees)) + 1):
                tree = fit_tree(U_tr, lr, int(self.max_depth), int(self.n_bins), int(self.min_leaf),
                                allowed, float(self.alpha), rng if self.jitter else None,
                                float(self.min_gain), look, int(self.lookahead_bins))
                if tree.n_nodes == 0:
                    self.stopped_by_ = "no split"
                    break
                if best_state is None:
                    pre_state = (U_tr.copy(), U_va.copy(), ld_va.copy())
                tree.forward(U_tr, scratch)
                tree.forward(U_va, ld_va)
                forest.append(tree)
                ll = float(ld_va.mean())
                curve.append(ll)
                if ll > best_ll + float(self.tol):
                    best_k, best_ll = k, ll
                    best_state = None
                elif best_state is None:
                    best_state = pre_state  # the state at the best prefix
                pre_state = None
                if not keep_going(progress, done + k, total, ll):
                    self.stopped_by_ = "cancelled"
                    break
                if k - best_k >= int(self.patience) or (self._gmm is not None and k >= EARLY_TREES
                                                         and best_ll - start_ll < needed):
                    # no patience run for a layer whose first trees do not pay
                    self.stopped_by_ = "early stopping"
                    break
            if self.stopped_by_ == "cancelled":
                done += forest.n_trees
                break
            if forest.n_trees > best_k:
                # roll back to the best prefix (state saved when it was passed)
                U_tr, U_va, ld_va = best_state
                forest = forest.prefix(best_k)
                self._layers[-1] = (Q, pwl, forest)
                curve.append(best_ll)
            done += best_k
            gain = best_ll - start_ll
            if gain < needed:
                # a layer that does not pay for its scoring time; the first one
                # (after a mixture base) leaves the base alone, whose density
                # then needs no Rosenblatt map (gmm_logpdf, ~3x faster)
                if layer > 0:
                    self._layers.pop()
                else:
                    self._keep_base_only(d)
                curve.append(start_ll)
                break
            if done >= total or self.stopped_by_ == "no split":
                break
        self.n_trees_ = sum(f.n_trees for _, _, f in self._layers)
        self.learning_curve_ = np.array(curve)
        self.heldout_loglik_ = float(curve[-1])
        return self

    def _rotation(self, U: np.ndarray, allowed: np.ndarray, rng) -> np.ndarray:
        """Orthogonal d x d matrix: principal axes of the events in Gaussianised
        coordinates (probit of each cube coordinate), acting on the free channels."""
        d = U.shape[1]
        if self.rotation == "random":
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

    def _keep_base_only(self, d: int) -> None:
        """Make the base the whole model: one layer with no rotation, identity
        marginals and no trees (:meth:`_density_is_base` then holds)."""
        self._layers = [(None, _identity_pwl(d), Forest())]
        self.n_marginal_trees_ = np.zeros(d, np.int64)

    def _marginal_tree_count(self) -> int:
        """Most one-channel trees per channel (resolves the automatic -1)."""
        m = int(self.marginal_trees)
        if m >= 0:
            return m
        return 0 if getattr(self, "base_", self.base) in MIXTURE_BASES else 100

    def _fit_marginals(self, U_tr: np.ndarray, U_va: np.ndarray, ld_va: np.ndarray):
        """Boost one-channel trees per channel; compose each channel's trees into a
        monotone piecewise-linear map; apply it to U_tr/U_va in place (adding to ld_va).
        Returns the map as (offsets, xs, ys, slopes, log_slopes)."""
        d = U_tr.shape[1]
        xs_all, ys_all, sl_all = [], [], []
        offsets = [0]
        counts = np.zeros(d, np.int64)
        lr = float(self.marginal_learning_rate)
        for j in range(d):
            if self._frozen[j] or self._marginal_tree_count() == 0:
                xs = np.array([0.0, 1.0])
                ys = xs.copy()
                sl = np.ones(2)
            else:
                col_tr = U_tr[:, j:j + 1].copy()
                col_va = U_va[:, j:j + 1].copy()
                ld = np.zeros(col_va.shape[0])
                scratch = np.zeros(col_tr.shape[0])
                forest = Forest()
                best_k, best_ll = 0, 0.0
                for k in range(1, self._marginal_tree_count() + 1):
                    tree = fit_tree(col_tr, lr, int(self.marginal_depth), int(self.n_bins),
                                    int(self.min_leaf), None, float(self.marginal_alpha))
                    if tree.n_nodes == 0:
                        break
                    tree.forward(col_tr, scratch)
                    tree.forward(col_va, ld)
                    forest.append(tree)
                    ll = float(ld.mean())
                    if ll > best_ll:
                        best_k, best_ll = k, ll
                    if k - best_k >= int(self.patience):
                        break
                forest = forest.prefix(best_k)
                counts[j] = best_k
                xs, ys, sl = compose_1d(forest)
            offsets.append(offsets[-1] + xs.size)
            xs_all.append(xs)
            ys_all.append(ys)
            sl_all.append(sl)
        sl = np.concatenate(sl_all)
        pwl = (np.array(offsets, np.int64), np.concatenate(xs_all), np.concatenate(ys_all), sl, np.log(sl))
        self.n_marginal_trees_ = counts if not hasattr(self, "_layers") or not self._layers \
            else self.n_marginal_trees_
        kernels.pwl_forward(U_tr, np.zeros(U_tr.shape[0]), *pwl)
        kernels.pwl_forward(U_va, ld_va, *pwl)
        return pwl

    # ------------------------------------------------------------ using
    def _check_fitted(self) -> None:
        if not hasattr(self, "_layers"):
            raise EventDataError("the density model is not fitted yet; call fit(events) first")

    def _base_forward(self, C: np.ndarray, want_u: bool = True):
        """The base map into the cube: (U (m, d), log-Jacobian (m,)); with
        ``want_u=False`` only the log density (U is None), which for the
        Gaussian-mixture base skips the CDFs of its Rosenblatt map."""
        m, d = C.shape
        U = np.empty((m, d))
        logd = np.zeros(m)
        gmm = getattr(self, "_gmm", None)
        if gmm is None:
            kernels.base_forward(C, U, logd, self._loc, self._scale, np.log(self._scale))
            return (U if want_u else None), logd
        fr = self._frozen
        if fr.any():
            Uf = np.empty((m, int(fr.sum())))
            kernels.base_forward(np.ascontiguousarray(C[:, fr]), Uf, logd, self._loc[fr],
                                 self._scale[fr], np.log(self._scale[fr]))
            U[:, fr] = Uf
        if not want_u:
            return None, logd + gmm.logpdf(C[:, ~fr])
        Ug, lg = gmm.forward(C[:, ~fr])
        U[:, ~fr] = Ug
        logd += lg
        return U, logd

    def _density_is_base(self) -> bool:
        """True when nothing follows a Gaussian-mixture base (no rotation, identity
        marginals, no trees): the log density is then the base's alone."""
        if getattr(self, "_gmm", None) is None or len(self._layers) != 1:
            return False
        Q, pwl, forest = self._layers[0]
        return Q is None and forest.n_trees == 0 and bool(np.all(pwl[3] == 1.0))

    def _base_inverse(self, C: np.ndarray, out: np.ndarray) -> None:
        gmm = getattr(self, "_gmm", None)
        kernels.base_inverse(C, out, self._loc, self._scale)
        if gmm is not None:
            out[:, ~self._frozen] = gmm.inverse(C[:, ~self._frozen])

    def _forward_chunk(self, C: np.ndarray):
        U, logd = self._base_forward(C)
        for Q, pwl, forest in self._layers:
            if Q is not None:
                kernels.rotate(U, Q)
            kernels.pwl_forward(U, logd, *pwl)
            forest.forward(U, logd)
        return U, logd

    def score_samples(self, X) -> np.ndarray:
        """Natural-log density of each event (n_events,), per unit volume of X's units.

        Streams X in chunks of 65,536 events (memory bounded by the chunk)."""
        self._check_fitted()
        X = _check_matrix(X, "score", self.n_features_in_)
        out = np.empty(X.shape[0])
        base_only = self._density_is_base()
        for a in range(0, X.shape[0], CHUNK):
            b = min(X.shape[0], a + CHUNK)
            C = _chunk(X, a, b, "score")
            self._clip_far(C)
            out[a:b] = self._base_forward(C, want_u=False)[1] if base_only else self._forward_chunk(C)[1]
        np.maximum(out, LOG_DENSITY_FLOOR, out=out)  # finite for every finite event
        return out

    def _clip_far(self, C: np.ndarray) -> None:
        """Move values further than FAR_SCALES robust scales from each channel's centre to that
        distance (in place), so every finite event gets a finite log density."""
        reach = FAR_SCALES * self._scale
        np.clip(C, self._loc - reach, self._loc + reach, out=C)

    def score(self, X) -> float:
        """Mean log density of the events X (nats per event)."""
        return float(np.mean(self.score_samples(X)))

    def transform(self, X) -> np.ndarray:
        """The full map into the unit cube (base, marginals, all trees): (n, d) in [0, 1]."""
        self._check_fitted()
        X = _check_matrix(X, "transform", self.n_features_in_)
        out = np.empty(X.shape, dtype=np.float64)
        for a in range(0, X.shape[0], CHUNK):
            b = min(X.shape[0], a + CHUNK)
            out[a:b], _ = self._forward_chunk(_chunk(X, a, b, "transform"))
        return out

    def inverse_transform(self, U) -> np.ndarray:
        """Inverse of :meth:`transform`: points of [0, 1]^d back to event space (n, d)."""
        self._check_fitted()
        U = _check_matrix(U, "inverse_transform", self.n_features_in_)
        out = np.empty(U.shape, dtype=np.float64)
        for a in range(0, U.shape[0], CHUNK):
            b = min(U.shape[0], a + CHUNK)
            C = _chunk(U, a, b, "inverse_transform")
            if (C < 0).any() or (C > 1).any():
                raise EventDataError("inverse_transform: values must lie in the unit cube [0, 1]")
            for Q, pwl, forest in reversed(self._layers):
                forest.inverse(C)
                kernels.pwl_inverse(C, *pwl[:4])
                if Q is not None:
                    kernels.rotate(C, np.ascontiguousarray(Q.T))
            self._base_inverse(C, out[a:b])
        return out

    def sample(self, n: int, random_state=None) -> np.ndarray:
        """Draw ``n`` events (n, d) from the fitted density (exact: inverse map of uniforms)."""
        self._check_fitted()
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) and not (
                isinstance(n, (float, np.floating)) and float(n).is_integer()):
            raise ParameterError(f"sample: the number of events must be a whole number, not {n!r}")
        if not 0 <= int(n) <= MAX_SAMPLE:
            raise ParameterError(f"sample: the number of events must lie between 0 and {MAX_SAMPLE:,}; got {n}")
        try:
            rng = np.random.default_rng(random_state)
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"sample: random_state {random_state!r} is not a usable seed ({exc})") from None
        U = rng.random((int(n), self.n_features_in_))
        tiny = 2.0 ** -53
        np.clip(U, tiny, 1.0 - tiny, out=U)
        return self.inverse_transform(U)

    # ------------------------------------------------------------ files
    def save(self, path) -> None:
        """Write the fitted model to one ``.npz`` file (see :mod:`core.density.storage`)."""
        from .storage import save_model
        self._check_fitted()
        save_model(self, path)

    @classmethod
    def load(cls, path) -> "AdditiveTreeDensity":
        """Read a model written by :meth:`save`; raises ModelFileError for a bad file."""
        from .storage import load_model
        return load_model(cls, path)


def _identity_pwl(d: int):
    """The marginal stage's map with no trees: identity on each of d channels,
    as (offsets, xs, ys, slopes, log_slopes) like :meth:`AdditiveTreeDensity._fit_marginals`."""
    xs = np.tile([0.0, 1.0], d)
    sl = np.ones(2 * d)
    return (np.arange(0, 2 * d + 1, 2, dtype=np.int64), xs, xs.copy(), sl, np.log(sl))


def compose_1d(forest: Forest):
    """Compose a sequence of one-dimensional tree-CDFs on [0, 1] into one
    monotone piecewise-linear map.

    Returns knots ``xs`` (increasing, 0 .. 1), the map's values ``ys`` at the
    knots and the exact slope of each piece (last entry unused, set to 1):
    the slope is evaluated at the piece's midpoint as the product of the
    trees' local slopes, so log densities are exact, not differences of
    rounded values.
    """
    if forest.n_trees == 0 or forest.n_nodes == 0:
        return np.array([0.0, 1.0]), np.array([0.0, 1.0]), np.ones(2)
    knots = [np.array([0.0, 1.0])]
    for t in range(forest.n_trees):
        r = forest.roots[t]
        if r < 0:
            continue
        stop = forest.roots[t + 1:]
        stop = stop[stop >= 0]
        end = int(stop.min()) if stop.size else forest.n_nodes
        cuts = forest.cut[r:end].reshape(-1, 1).copy()
        forest.prefix(t).inverse(cuts)
        knots.append(cuts[:, 0])
    xs = np.unique(np.clip(np.concatenate(knots), 0.0, 1.0))
    mids = np.ascontiguousarray(((xs[:-1] + xs[1:]) / 2).reshape(-1, 1))
    lmid = np.zeros(mids.shape[0])
    forest.forward(mids, lmid)
    ys = np.ascontiguousarray(xs.reshape(-1, 1)).copy()
    forest.forward(ys, np.zeros(xs.size))
    ys = np.maximum.accumulate(np.clip(ys[:, 0], 0.0, 1.0))
    ys[0], ys[-1] = 0.0, 1.0
    slopes = np.append(np.exp(lmid), 1.0)
    return xs, ys, slopes
