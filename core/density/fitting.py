"""Fitting the additive tree density, by job: the subsample, the per-channel
logistic map, the held-out split, the mixture base, the tree stage
(:mod:`core.density.boosting`), and the automatic choice of base.  Each fit
returns a :class:`FittedDensity` record; the estimator
(:class:`core.density.model.AdditiveTreeDensity`) holds the one it keeps."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..progress import keep_going
from .boosting import (MAP_COST_RATIO, TREE_ABANDON_GAP, Shares, TreeStage, fit_layers, marginal_tree_count,
                       probe_events, probe_gain)
from .chain import Chain
from .correlation_prior import CORR_PRIOR, PRIOR_COMPONENTS
from .checks import ATOM_SHARE, largest_atom_share, nonfinite_error
from .mixture_average import fit_averaged
from .mixture_base import MIXTURE_BASES, MixtureBase
from .mixture_fit import MixtureSettings, fit_mixture

_LOGISTIC_IQR = 2.0 * math.log(3.0)
#: The probe tree's gain, scaled to the whole training share, is taken this many
#: times over before it may end the tree stage (the scaling is a measurement: a
#: tree on 3.2x the events gained 3.6x at 200,000 x 8 and 2.6x at 200,000 x 30;
#: 1.25 covers the larger; EXPERIMENTS.md sections 26, 27 and 29).
PROBE_SAFETY = 1.25


@dataclass
class FittedDensity:
    """Everything a fit produces: the map ``chain`` and what describes the fit
    (the estimator's attributes ending in ``_`` read these)."""
    chain: Chain
    base: str                       # the first map used: "logistic", "gmm" or "skewed"
    bounds: np.ndarray              # (2, d) min and max of the fitted events
    n_events: int                   # events fitted (after subsampling)
    n_marginal_trees: np.ndarray    # (d,) one-channel trees of the first layer
    learning_curve: np.ndarray      # held-out mean log-likelihood after each step
    heldout_loglik: float           # the kept model's held-out mean log-likelihood
    base_heldout_loglik: float | None  # the base map's alone
    stopped_by: str

    @property
    def n_features(self) -> int:
        return int(self.bounds.shape[1])

    @property
    def n_trees(self) -> int:
        return self.chain.n_trees


def subsample(X, max_events: int, rng) -> np.ndarray:
    """At most ``max_events`` events (a seeded random subsample, in order) as C float64."""
    if X.shape[0] > int(max_events):
        X = X[np.sort(rng.choice(X.shape[0], int(max_events), replace=False))]
    X = np.ascontiguousarray(X, dtype=np.float64)
    if not np.isfinite(X).all():
        raise nonfinite_error(X, "fit")
    return X


def logistic_map(X, bounds):
    """Per-channel robust location and scale of the logistic map (d,), and the
    constant channels (d,) bool (max == min), whose scale is 1e-3 x max(1, |value|)."""
    q25, med, q75 = np.percentile(X, [25.0, 50.0, 75.0], axis=0)
    scale = (q75 - q25) / _LOGISTIC_IQR
    std = X.std(axis=0) * math.sqrt(3.0) / math.pi
    scale = np.where(scale > 0, scale, std)
    constant = bounds[1] <= bounds[0]
    scale = np.where(constant, 1e-3 * np.maximum(1.0, np.abs(med)), scale)
    # std can be >0 yet tiny relative to the values; keep scale meaningful
    scale = np.maximum(scale, 1e-12 * np.maximum(1.0, np.abs(med)))
    return med.astype(np.float64), scale.astype(np.float64), constant


def heldout_split(n: int, fraction: float, rng):
    """Sorted (held-out, training) event indices; the held-out share is ``fraction``."""
    perm = rng.permutation(n)
    n_val = max(1, int(round(float(fraction) * n)))
    return np.sort(perm[:n_val]), np.sort(perm[n_val:])


#: ``max_em_events="by_channels"``: the mixture EM's event cap is ``EM_CAP_BASE``
#: up to ``EM_CAP_CHANNELS`` fitted channels and grows by ``EM_CAP_PER_CHANNEL``
#: events per channel above (16 channels: 100,000; 24 and more: 200,000, i.e. the
#: whole training share of a 200,000-event fit; EXPERIMENTS.md section 30).
EM_CAP_BY_CHANNELS = "by_channels"
EM_CAP_BASE = MixtureSettings.max_em_events   # the former fixed cap
EM_CAP_CHANNELS = 12
EM_CAP_PER_CHANNEL = 12_500


#: ``max_em_events="refit_by_channels"``: the count search's EM on ``EM_CAP_BASE``
#: events (the expensive part), the skewed refit of the chosen count(s) on the
#: by-channels cap but at most ``EM_REFIT_PER_COMPONENT`` events per component of
#: the chosen Gaussian count (128 components: 160,000 events, the whole training
#: share of a 200,000-event fit; 32: none beyond the search's; EXPERIMENTS.md section 32).
EM_CAP_REFIT = "refit_by_channels"
EM_REFIT_PER_COMPONENT = 1250
#: The settings ``max_em_events`` takes besides a whole number.
EM_CAP_RULES = (EM_CAP_BY_CHANNELS, EM_CAP_REFIT)
#: The estimator's default ``max_em_events``: up to 12 fitted channels the former
#: fixed cap; above, the refit on more events (EXPERIMENTS.md section 32).
EM_CAP_DEFAULT = EM_CAP_REFIT


def em_event_caps(setting, channels: int) -> tuple[int, int, int]:
    """(count search's cap, skewed refit's cap, refit's events per component or 0),
    events the mixture EM runs on, for ``channels`` the channels the mixture fits:
    :func:`em_event_cap` for both caps and no per-component limit, except
    ``EM_CAP_REFIT``: ``EM_CAP_BASE`` for the search, the by-channels cap and
    ``EM_REFIT_PER_COMPONENT`` for the refit."""
    if setting == EM_CAP_REFIT:
        return EM_CAP_BASE, em_event_cap(EM_CAP_BY_CHANNELS, channels), EM_REFIT_PER_COMPONENT
    cap = em_event_cap(setting, channels)
    return cap, cap, 0


def em_event_cap(setting, channels: int) -> int:
    """Most training events the mixture EM runs on: ``setting`` itself when a
    number, else (``EM_CAP_BY_CHANNELS``) ``EM_CAP_BASE`` + ``EM_CAP_PER_CHANNEL`` x
    max(0, channels - ``EM_CAP_CHANNELS``), for ``channels`` the channels the mixture fits."""
    if setting == EM_CAP_BY_CHANNELS:
        return EM_CAP_BASE + EM_CAP_PER_CHANNEL * max(0, int(channels) - EM_CAP_CHANNELS)
    return int(setting)


def fit_mixture_base(chain: Chain, base: str, X_tr, X_va, rng, progress, n_trees: int,
                     max_em_events=EM_CAP_BASE) -> MixtureBase:
    """The mixture base on the channels that vary ("skewed": skewed components and
    a flat-top background), component count chosen on the held-out events, the
    two raced skewed fits blended when that scores better (``blend_race``;
    EXPERIMENTS.md section 30); the count search's EM and the skewed refit on at
    most the events :func:`em_event_caps` gives for ``max_em_events`` (section 32)."""
    free = ~chain.constant
    search_cap, refit_cap, per_component = em_event_caps(max_em_events, int(free.sum()))
    settings = MixtureSettings(random_state=int(rng.integers(2 ** 31)), skew=base == "skewed",
                               flat_background=base == "skewed", components=PRIOR_COMPONENTS,
                               corr_prior=CORR_PRIOR, max_em_events=search_cap,
                               final_em_events=refit_cap, final_per_component=per_component,
                               blend_race=True)
    return fit_mixture(X_tr[:, free], chain.loc[free], chain.scale[free], settings,
                       validation=X_va[:, free],
                       progress=lambda step, total, info: keep_going(progress, 0, n_trees, info))


def fit_with_base(p, X, base: str, progress) -> FittedDensity:
    """Fit with the first map ``base`` ("logistic", "gmm" or "skewed"); ``p`` holds
    the estimator's settings, X (n, d) is checked already."""
    rng = np.random.default_rng(p.random_state)
    X = subsample(X, p.max_fit_events, rng)
    bounds = np.vstack([X.min(axis=0), X.max(axis=0)])
    chain = Chain(*logistic_map(X, bounds))
    va, tr = heldout_split(X.shape[0], p.validation_fraction, rng)
    if base in MIXTURE_BASES and (~chain.constant).any():
        chain.mixture = fit_averaged(lambda r: fit_mixture_base(chain, base, X[tr], X[va], r, progress, int(p.n_trees),
                                                                p.max_em_events),
                                     int(p.mixture_fits), rng, X[va][:, ~chain.constant])
    U_va, ld_va = chain.base_forward(X[va])
    base_ll = float(ld_va.mean())
    stage, rows, U_probe = _probe_says_no_trees(p, chain, base, X[tr], U_va, ld_va, rng)
    if stage is None:
        U_tr = _training_map(chain, X[tr], rows, U_probe)
        stage = fit_layers(p, chain, base, Shares(U_tr, U_va, ld_va), rng, progress)
    return FittedDensity(chain, base, bounds, X.shape[0], stage.n_marginal_trees, np.array(stage.curve),
                         float(stage.curve[-1]), base_ll, stage.stopped_by)


def _training_map(chain: Chain, X_tr, rows, U_rows) -> np.ndarray:
    """The base map of the training events X_tr (n, d) -> U (n, d); the events
    ``rows`` were mapped already (``U_rows``; the map is event by event, so the
    result is the same as mapping all of them at once)."""
    if rows is None:
        return chain.base_forward(X_tr)[0]
    rest = np.ones(X_tr.shape[0], bool)
    rest[rows] = False
    U = np.empty(X_tr.shape)
    U[rows] = U_rows
    if rest.any():
        U[rest] = chain.base_forward(X_tr[rest])[0]
    return U


def _probe_says_no_trees(p, chain: Chain, base: str, X_tr, U_va, ld_va, rng):
    """After a mixture base with many training events: the first tree fitted on an
    evenly spread probe of them (:func:`core.density.boosting.probe_gain`).  When
    even ``PROBE_SAFETY`` times its gain scaled up to the whole training share would
    end the first layer after one tree (:data:`core.density.boosting.TREE_ABANDON_GAP`),
    the base is the whole model and the tree stage's record is returned (curve:
    base, probe, base); else None (the tree stage runs on the whole training share,
    as without the probe).  Returns (that record or None, the probe's event indices
    or None, their map (m, d) or None)."""
    rows = probe_events(X_tr.shape[0])
    if (rows is None or chain.mixture is None or chain.mixture.cancelled or int(p.n_trees) <= 0
            or (~chain.constant).sum() < 2 or marginal_tree_count(p, base) != 0):
        return None, None, None
    U_probe, _ = chain.base_forward(X_tr[rows])
    gain = probe_gain(p, chain, U_probe, U_va, ld_va, rng)
    # a tree on n events gains about n / m times what one on m of them gains (measured: 3.6x
    # for 160,000 / 50,000); the layer stops after its first tree when that tree's gain times
    # (1 + TREE_ABANDON_GAP) falls short of the layer's required gain
    expected = gain * X_tr.shape[0] / rows.size * PROBE_SAFETY
    if expected * (1.0 + TREE_ABANDON_GAP) >= float(p.layer_tol) * MAP_COST_RATIO:
        return None, rows, U_probe
    base_ll = float(ld_va.mean())
    chain.keep_base_only()
    return TreeStage(curve=[base_ll, base_ll + gain, base_ll], stopped_by="early stopping",
                     n_marginal_trees=np.zeros(X_tr.shape[1], np.int64)), None, None


def fit_auto(p, X, progress) -> FittedDensity:
    """The automatic base: the skewed-mixture fit and, when a channel has an atom
    (:func:`~core.density.checks.largest_atom_share` >= ``ATOM_SHARE``), the
    logistic-base fit too (its progress follows, with the stage named); returns
    the one with the better held-out log-likelihood.  Stopped during the second
    fit, the skewed-mixture fit is returned with ``stopped_by`` "cancelled"."""
    skewed = fit_with_base(p, X, "skewed", progress)
    if skewed.stopped_by == "cancelled" or largest_atom_share(X) < ATOM_SHARE:
        return skewed
    if not keep_going(progress, 0, int(p.n_trees),
                      {"stage": "Channels with atoms: fitting the logistic base as well"}):
        skewed.stopped_by = "cancelled"  # the skewed-mixture model is complete and usable
        return skewed
    logistic = fit_with_base(p, X, "logistic", progress)
    if logistic.stopped_by == "cancelled":
        skewed.stopped_by = "cancelled"
        return skewed
    return logistic if logistic.heldout_loglik > skewed.heldout_loglik else skewed


def fit_density(p, X, progress) -> FittedDensity:
    """Fit with ``p.base`` ("auto": :func:`fit_auto`)."""
    if p.base == "auto":
        return fit_auto(p, X, progress)
    return fit_with_base(p, X, p.base, progress)
