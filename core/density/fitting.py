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
from .boosting import Shares, fit_layers
from .chain import Chain
from .correlation_prior import CORR_PRIOR, PRIOR_COMPONENTS
from .checks import ATOM_SHARE, largest_atom_share, nonfinite_error
from .mixture_base import MIXTURE_BASES, MixtureBase
from .mixture_fit import MixtureSettings, fit_mixture

_LOGISTIC_IQR = 2.0 * math.log(3.0)


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


def fit_mixture_base(chain: Chain, base: str, X_tr, X_va, rng, progress, n_trees: int) -> MixtureBase:
    """The mixture base on the channels that vary ("skewed": skewed components and
    a flat-top background), component count chosen on the held-out events."""
    free = ~chain.constant
    settings = MixtureSettings(random_state=int(rng.integers(2 ** 31)), skew=base == "skewed",
                               flat_background=base == "skewed", components=PRIOR_COMPONENTS,
                               corr_prior=CORR_PRIOR)
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
        chain.mixture = fit_mixture_base(chain, base, X[tr], X[va], rng, progress, int(p.n_trees))
    U_tr, _ = chain.base_forward(X[tr])
    U_va, ld_va = chain.base_forward(X[va])
    base_ll = float(ld_va.mean())
    stage = fit_layers(p, chain, base, Shares(U_tr, U_va, ld_va), rng, progress)
    return FittedDensity(chain, base, bounds, X.shape[0], stage.n_marginal_trees, np.array(stage.curve),
                         float(stage.curve[-1]), base_ll, stage.stopped_by)


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
