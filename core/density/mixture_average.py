"""Averaged mixture bases: several skewed mixtures fitted to the same training
share from different seeds, merged into one mixture with equal shares.

With many channels the chosen mixture has about as many parameters as events
(128 components x 16-24 channels for 40,000 events), so two fits from
different starts differ mostly in their estimation noise, and their average
is closer to the truth than either (EXPERIMENTS.md section 28: on cyto-16d and
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


def average_mixtures(mixtures, shares=None) -> MixtureBase:
    """One mixture holding every component of ``mixtures`` (a list of
    :class:`MixtureBase` on the same channels and background logistic) with
    each fit's weights multiplied by its share (``shares`` (M,) summing to 1;
    None: 1 / M each): the share-weighted average of their densities.  The
    background weight is the share-weighted mean of the fits'; a flat-top
    background takes the share-weighted mean of their edges and softness (the
    backgrounds differ little; the merged model's density is exact for what it
    holds).  Skewed and Gaussian fits can be mixed (:func:`skew_arrays`)."""
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
    shares = np.full(M, 1.0 / M) if shares is None else np.asarray(shares, np.float64)
    weights = np.concatenate([[float(np.dot(shares, [m.weights[0] for m in mixtures]))]]
                             + [m.weights[1:] * a for m, a in zip(mixtures, shares)])
    weights /= weights.sum()
    flats = [(m.background, a) for m, a in zip(mixtures, shares) if m.background is not None]
    background = (sum(b * a for b, a in flats) / sum(a for _, a in flats)) if flats else None
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


def blend_share(a, b, iterations: int = 60) -> float:
    """The share w in [0, 1] that maximises the mean of log(w exp(a) + (1 - w) exp(b))
    over events, for per-event log densities a, b (m,) of two densities on the same
    held-out events: the mixing weight of a two-density mixture by maximum
    likelihood (the objective is concave in w; bisection on its derivative)."""
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    top = np.maximum(a, b)
    ea, eb = np.exp(a - top), np.exp(b - top)

    def slope(w):
        return float(np.mean((ea - eb) / (w * ea + (1.0 - w) * eb)))
    if slope(0.0) <= 0.0:
        return 0.0
    if slope(1.0) >= 0.0:
        return 1.0
    lo, hi = 0.0, 1.0
    for _ in range(int(iterations)):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if slope(mid) > 0.0 else (lo, mid)
    return 0.5 * (lo + hi)


def blend_pair(first, second, min_gain: float = 0.0):
    """Two mixtures fitted to the same events with their held-out log densities,
    ``first`` and ``second`` as (mixture, scores (m,)), blended with the share of
    :func:`blend_share`: returns (mixture, scores) of the blend when it beats the
    better of the two by more than ``min_gain`` nats per event on those events,
    else None (EXPERIMENTS.md section 30: the two skewed fits of
    the mixture stage's count race, blended, closed 0.04-0.08 nats of estimation
    noise at 16-24 channels for no extra fitting)."""
    (m1, s1), (m2, s2) = first, second
    w = blend_share(s1, s2)
    if not 0.0 < w < 1.0:
        return None
    scores = np.logaddexp(np.log(w) + s1, np.log1p(-w) + s2)
    if float(scores.mean()) <= max(float(s1.mean()), float(s2.mean())) + min_gain:
        return None
    return average_mixtures([m1, m2], [w, 1.0 - w]), scores
