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
(:mod:`core.density.mixture_base`), whose log-Jacobian is exactly the
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

Parts (each its own module): :mod:`.chain` (the fitted map: base, then
:class:`~core.density.chain.Layer` records of rotation, marginal map and
forest), :mod:`.fitting` (the fit by job, the automatic base), :mod:`.boosting`
(the tree stage), :mod:`.marginals`, :mod:`.tree`, the mixture base
(:mod:`.mixture_base`, :mod:`.mixture_fit`, :mod:`.em`, :mod:`.skew_fit`),
:mod:`.kernels` (compiled loops), :mod:`.storage` (files), :mod:`.checks`
(input checks) and :mod:`.estimator` (the settings' conventions).
"""

from __future__ import annotations

import numpy as np

from ..errors import BoscageError, EventDataError, ParameterError
from . import kernels
from .boosting import EARLY_TREES, LOOKAHEAD_PAIR_BUDGET, MAP_COST_RATIO  # noqa: F401  (documented constants)
from .checks import (ATOM_SHARE, FAR_SCALES, LOG_DENSITY_FLOOR, MAX_ABS_VALUE, MAX_SAMPLE,  # noqa: F401
                     MIN_EVENTS, MIN_RELATIVE_SPREAD, check_matrix, check_value_range, chunk, largest_atom_share)
from .estimator import Settings, fitted
from .fitting import EM_CAP_DEFAULT, EM_CAP_RULES, FittedDensity, fit_density
from .marginals import compose_1d  # noqa: F401  (its former home)
from .kernels.probes import probe_factors, skew_probe_logpdf
from .mixture_base import _Z_MAX, BASE_CHOICES

#: Events per chunk when scoring/transforming (bounded memory).
CHUNK = 1 << 16


class AdditiveTreeDensity(Settings):
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
    mixture_fits : int
        Mixture bases fitted from different seeds and averaged (equal shares;
        :mod:`core.density.mixture_average`); a further fit is kept only when the
        average gains on the held-out share.  1 (default): one fit.  With many
        channels the fit is mostly estimation noise: on cyto-16d / cyto-24d
        (50,000 events) 2 fits took the gap to the truth from 0.275 / 0.468 to
        0.238 / 0.413 nats per event, 3 fits to 0.228 / 0.376, for about that
        many times the mixture stage's time and the scoring time
        (EXPERIMENTS.md section 28).
    max_em_events : int, "refit_by_channels" or "by_channels"
        Most training events the mixture base's EM runs on (a seeded
        subsample of the training share; the trees see all of it).  A number:
        that fixed cap (50,000: the former default).  "refit_by_channels"
        (default): 50,000 up to 12 fitted channels; above, the component-count
        search still runs on 50,000 events and the skewed refit of the chosen
        count(s) on up to 50,000 + 12,500 per channel above 12 events (16
        channels: 100,000; 24 and more: the whole training share of a
        200,000-event fit), at most 1,250 per component of the chosen count (32
        components: no more than the search's).  "by_channels": that larger cap
        for the search too.  With many channels the mixture's estimation noise,
        not its family, is most of the gap to the truth, and more events shrink
        it (:func:`core.density.fitting.em_event_caps`; EXPERIMENTS.md sections
        30 and 32: on cyto-16d / 24d / 32d / 40d fitted on 200,000 events the
        default's gap to the truth is 0.19 / 0.24 / 0.36 / 0.44 nats per event).

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
    fitted_ : FittedDensity
        The fitted record (:class:`core.density.fitting.FittedDensity`): the map
        chain (``fitted_.chain``: base, mixture, layers) and the values above.

    The settings are the keyword arguments of ``__init__``; :meth:`param_names`
    lists them (the recipe and the contour code read it).
    """

    def __init__(self, n_trees: int = 400, learning_rate: float = 0.9, max_depth: int = 14,
                 n_bins: int = 64, min_leaf: int = 10, validation_fraction: float = 0.2,
                 patience: int = 10, max_fit_events: int = 200_000, marginal_trees: int = -1,
                 marginal_learning_rate: float = 0.2, marginal_depth: int = 6,
                 n_layers: int = 3, layer_trees: int = 150, layer_tol: float = 0.01,
                 alpha: float = 1000.0, rotation: str = "pca", jitter: bool = False,
                 min_gain: float = 0.0, lookahead: int = 3, lookahead_bins: int = 16,
                 marginal_alpha: float = -1.0, tol: float = 0.0, base: str = "auto",
                 random_state: int | None = None, mixture_fits: int = 1,
                 max_em_events: int | str = EM_CAP_DEFAULT):
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
        self.mixture_fits = mixture_fits
        self.max_em_events = max_em_events

    # ------------------------------------------------------------ fitted attributes
    n_features_in_ = fitted("n_features", "Channels.")
    bounds_ = fitted("bounds", "(2, n_channels) minimum and maximum of the fitted events.")
    n_trees_ = fitted("n_trees", "Dependence trees kept (all layers).")
    n_marginal_trees_ = fitted("n_marginal_trees", "(n_channels,) one-channel trees of the first layer.")
    learning_curve_ = fitted("learning_curve", "Held-out mean log-likelihood after each step.")
    heldout_loglik_ = fitted("heldout_loglik", "The kept model's held-out mean log-likelihood.")
    base_heldout_loglik_ = fitted("base_heldout_loglik", "Held-out mean log-likelihood of the base alone.")
    n_events_fitted_ = fitted("n_events", "Events used (after the max_fit_events subsample).")
    stopped_by_ = fitted("stopped_by", '"early stopping", "n_trees", "no split" or "cancelled".')
    base_ = fitted("base", 'The first map used ("logistic", "gmm" or "skewed").')
    chain_ = fitted("chain", "The fitted map (core.density.chain.Chain).")

    @property
    def mixture_(self):
        """The fitted mixture base (core.density.mixture_base.MixtureBase) or None (logistic base)."""
        return self.chain_.mixture

    # former private names, still read by code written before the fitted record
    _gmm = mixture_

    @property
    def _frozen(self):
        return self.chain_.constant

    # ------------------------------------------------------------ settings
    def validate_params(self) -> None:
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
        if not 1 <= int(self.mixture_fits) <= 16:
            raise ValueError("mixture_fits must be between 1 and 16")
        if self.max_em_events not in EM_CAP_RULES and (isinstance(self.max_em_events, (bool, str))
                                                       or int(self.max_em_events) < 1000):
            raise ValueError("max_em_events must be a whole number >= 1000 or one of "
                             + ", ".join(repr(r) for r in EM_CAP_RULES))

    _validate_params = validate_params  # its former name

    # ------------------------------------------------------------ fitting
    def fit(self, X, y=None, progress=None) -> "AdditiveTreeDensity":
        """Fit to events X (n_events, n_channels); returns self.  ``y`` is ignored
        (accepted for scikit-learn's model selection).

        ``progress(step, total, heldout_loglik)`` is called after the
        marginal stage (step 0) and after each dependence tree; returning
        False stops cleanly keeping the trees so far (the model is usable).
        With ``base="auto"`` the skewed-mixture model is fitted and, when a
        channel has an atom, the logistic-base model too; the better on the
        held-out share is kept (:func:`core.density.fitting.fit_auto`).

        Every problem with X or the settings raises one of this program's errors
        (EventDataError, ParameterError; both are ValueError too), never a bare
        numpy or Python exception."""
        if progress is None and callable(y):
            y, progress = None, y  # the former signature fit(X, progress)
        try:
            self.validate_params()
        except (ValueError, TypeError, OverflowError) as exc:
            if isinstance(exc, BoscageError):
                raise
            raise ParameterError(f"density engine setting: {exc}") from None
        X = check_matrix(X, "fit", min_events=MIN_EVENTS)
        if X.shape[1] == 0:
            raise EventDataError("fit: the events have no channels (0 columns)")
        check_value_range(X)
        try:
            record = fit_density(self, X, progress)
        except BoscageError:
            raise
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            raise EventDataError(f"fit: the density could not be fitted to these events ({exc})") from exc
        self.fitted_ = record
        return self

    # ------------------------------------------------------------ using
    def _check_fitted(self) -> FittedDensity:
        """The fitted record (NotFittedError before :meth:`fit`)."""
        self.chain_  # noqa: B018  (raises when not fitted)
        return self.fitted_

    def score_samples(self, X, posteriors=None) -> np.ndarray:
        """Natural-log density of each event (n_events,), per unit volume of X's units.

        Streams X in chunks of 65,536 events (memory bounded by the chunk).
        ``posteriors(a, b, R)``: called for each chunk of rows a:b.  When the model
        is a skewed mixture alone (:attr:`scores_with_posteriors`), R (b - a, K + 1)
        holds the mixture's posterior component probabilities of those rows
        (background first, as ``mixture_.posteriors``), computed in the same
        compiled pass as their log density (which stays bit-identical); R is None
        otherwise, and for a chunk holding a value beyond the far-value clip."""
        chain = self._check_fitted().chain
        X = check_matrix(X, "score", self.n_features_in_)
        out = np.empty(X.shape[0])
        lo, hi = chain.far_limits()
        with_r = posteriors is not None and self.scores_with_posteriors
        for a in range(0, X.shape[0], CHUNK):
            b = min(X.shape[0], a + CHUNK)
            C = chunk(X, a, b, "score")
            # values further than FAR_SCALES robust scales from a channel's centre are
            # scored at that distance, so every finite event gets a finite log density
            far = with_r and bool(((C < lo) | (C > hi)).any())
            np.clip(C, lo, hi, out=C)
            if with_r:
                out[a:b], R = chain.base_log_density_and_posteriors(C)
                posteriors(a, b, None if far else R)
                continue
            out[a:b] = chain.log_density(C)
            if posteriors is not None:
                posteriors(a, b, None)
        np.maximum(out, LOG_DENSITY_FLOOR, out=out)  # finite for every finite event
        return out

    @property
    def scores_with_posteriors(self) -> bool:
        """True when the model is a skewed mixture alone: :meth:`score_samples` then
        gives the mixture's posteriors from the pass that scores (see there)."""
        chain = self._check_fitted().chain
        return chain.density_is_base() and chain.mixture.is_skewed

    def score_probes(self, X, H) -> np.ndarray:
        """Log densities (m, 2 d) at the axis probes of the rows of X (m, d): column
        j is ``score_samples`` of x + H[:, j] e_j, column d + j of x - H[:, j] e_j
        (H (m, d) the offsets, in X's units).  For a skewed mixture alone without
        constant channels one compiled pass costs about two evaluations per row
        instead of 2 d (:mod:`core.density.kernels.probes`; equal to
        ``score_samples`` of the probes to rounding, ~1e-12 relative); otherwise the
        probes are scored with :meth:`score_samples`.  Used by the hill climbs of
        :mod:`core.populations`."""
        chain = self._check_fitted().chain
        X = check_matrix(X, "score", self.n_features_in_)
        H = np.asarray(H, dtype=np.float64)
        m, d = X.shape
        if H.shape != (m, d):
            raise EventDataError(f"score_probes: offsets of shape {H.shape} do not match the events {X.shape}")
        if self.scores_with_posteriors and not chain.constant.any():
            mix = chain.mixture
            if getattr(mix, "_probe_factors", None) is None:
                mix._probe_factors = probe_factors(mix._inner)
            B, nB = mix._probe_factors
            lo, hi = chain.far_limits()
            return skew_probe_logpdf(X, H, lo, hi, mix._inner, mix._bg, _Z_MAX, B, nB, LOG_DENSITY_FLOOR)
        P = np.repeat(X, 2 * d, axis=0).reshape(m, 2 * d, d)
        P[:, np.arange(d), np.arange(d)] += H
        P[:, d + np.arange(d), np.arange(d)] -= H
        return self.score_samples(P.reshape(-1, d)).reshape(m, 2 * d)

    def score(self, X, y=None) -> float:
        """Mean log density of the events X (nats per event); ``y`` is ignored."""
        return float(np.mean(self.score_samples(X)))

    def transform(self, X) -> np.ndarray:
        """The full map into the unit cube (base, marginals, all trees): (n, d) in [0, 1]."""
        chain = self._check_fitted().chain
        X = check_matrix(X, "transform", self.n_features_in_)
        out = np.empty(X.shape, dtype=np.float64)
        for a in range(0, X.shape[0], CHUNK):
            b = min(X.shape[0], a + CHUNK)
            out[a:b], _ = chain.forward(chunk(X, a, b, "transform"))
        return out

    def inverse_transform(self, U) -> np.ndarray:
        """Inverse of :meth:`transform`: points of [0, 1]^d back to event space (n, d)."""
        chain = self._check_fitted().chain
        U = check_matrix(U, "inverse_transform", self.n_features_in_)
        out = np.empty(U.shape, dtype=np.float64)
        for a in range(0, U.shape[0], CHUNK):
            b = min(U.shape[0], a + CHUNK)
            C = chunk(U, a, b, "inverse_transform")
            if (C < 0).any() or (C > 1).any():
                raise EventDataError("inverse_transform: values must lie in the unit cube [0, 1]")
            chain.inverse(C, out[a:b])
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
        from .storage import save_model  # storage imports this module's package: import at use
        self._check_fitted()
        save_model(self, path)

    @classmethod
    def load(cls, path) -> "AdditiveTreeDensity":
        """Read a model written by :meth:`save`; raises ModelFileError for a bad file."""
        from .storage import load_model  # storage imports this module's package: import at use
        return load_model(cls, path)


def tried_steps(curve) -> np.ndarray:
    """The held-out scores of the steps a fit actually tried, in order (nats per event).

    ``curve`` is a fitted model's ``learning_curve_``.  The engine appends the kept
    model's value after rolling a layer back or dropping it; such an entry repeats an
    earlier value exactly and is left out here, so each returned value is one step
    (the base with its per-channel shaping, a rotation's marginal stage, a tree).  The
    kept model's value is ``curve[-1]``."""
    values = np.asarray(curve if curve is not None else [], dtype=np.float64).ravel()
    keep = [i for i, v in enumerate(values) if not np.any(values[:i] == v)]
    return values[keep]
