"""Averaged mixture bases: several skewed mixtures fitted to the same training
share from different seeds, merged into one mixture with equal shares.

With many channels the chosen mixture has about as many parameters as events
(128 components x 16-24 channels for 40,000 events), so two fits from
different starts differ mostly in their estimation noise, and their average
is closer to the truth than either (EXPERIMENTS.md section 27: on cyto-16d and
cyto-24d, 50,000 events, 0.275 -> 0.228 and 0.468 -> 0.376 nats from the truth
with three fits).  The
average of mixtures is again a mixture: the merged model keeps the base's form
(its exact Rosenblatt map, scoring and sampling), with the components of all
fits; fitting and scoring time grow about in proportion to the fits.
Off by default (``AdditiveTreeDensity(mixture_fits=1)``)."""

from __future__ import annotations

import numpy as np

from .mixture_base import MixtureBase


def skew_arrays(mixture: MixtureBase) -> np.ndarray:
    """(3, K, d) skew transforms of ``mixture`` (centre, scale, skew); Gaussian
    components as the identity transform (centre 0, scale 1, skew 0), which
    leaves their density unchanged."""
    if mixture.skew is not None:
        return mixture.skew
    K, d = mixture.means.shape
    return np.stack([np.zeros((K, d)), np.ones((K, d)), np.zeros((K, d))])


def average_mixtures(mixtures) -> MixtureBase:
    """One mixture holding every component of ``mixtures`` (a list of
    :class:`MixtureBase` on the same channels and background logistic) with
    each fit's weights divided by the number of fits: the equal-share average
    of their component densities.  The background weight is the mean of the
    fits'; a flat-top background takes the mean of their edges and softness
    (the backgrounds differ little; the merged model's density is exact for
    what it holds).  Skewed and Gaussian fits can be mixed (:func:`skew_arrays`)."""
    mixtures = list(mixtures)
    if not mixtures:
        raise ValueError("average_mixtures needs at least one mixture")
    if len(mixtures) == 1:
        return mixtures[0]
    first = mixtures[0]
    if any(m.means.shape[1] != first.means.shape[1] or not np.array_equal(m.loc, first.loc)
           or not np.array_equal(m.scale, first.scale) for m in mixtures):
        raise ValueError("averaged mixtures must share their channels and background logistic")
    M = len(mixtures)
    weights = np.concatenate([[np.mean([m.weights[0] for m in mixtures])]] + [m.weights[1:] / M for m in mixtures])
    weights /= weights.sum()
    flats = [m.background for m in mixtures if m.background is not None]
    background = np.mean(flats, axis=0) if flats else None
    any_skew = any(m.skew is not None for m in mixtures)
    skew = np.concatenate([skew_arrays(m) for m in mixtures], axis=1) if any_skew else None
    return MixtureBase(weights, np.concatenate([m.means for m in mixtures]),
                       np.concatenate([m.covariances for m in mixtures]), first.loc, first.scale,
                       skew=skew, background=background)


def fit_averaged(fit_one, fits: int, rng, X_va, min_gain: float = 0.0) -> MixtureBase:
    """Up to ``fits`` mixtures from ``fit_one(rng)`` (a fit on the training
    share; the first with ``rng`` itself, so one fit is exactly the plain base,
    the others with seeds drawn from it), averaged by :func:`average_mixtures`.
    A further fit is kept only while the average gains more than ``min_gain``
    nats per event on the held-out events ``X_va`` (m, d); a cancelled fit ends
    the loop (the average so far is kept)."""
    first = fit_one(rng)
    members, best = [first], first
    if int(fits) <= 1 or first.cancelled or first.n_components == 0:
        return first
    best_ll = float(best.logpdf(X_va).mean())
    seeds = rng.integers(2 ** 31, size=int(fits) - 1)
    for seed in seeds:
        member = fit_one(np.random.default_rng(int(seed)))
        if member.cancelled or member.n_components == 0:
            best.cancelled = member.cancelled
            break
        merged = average_mixtures(members + [member])
        ll = float(merged.logpdf(X_va).mean())
        if ll <= best_ll + min_gain:
            break
        members.append(member)
        best, best_ll = merged, ll
    return best
