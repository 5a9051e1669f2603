"""Gaussian-mixture EM for the mixture base (float64): k-means++ starts, splits
of a fitted mixture, and EM iterations whose pass over the events is one
compiled kernel (:func:`core.density.kernels.em_stats`).  A mixture here is
(weights (K + 1,) background first, means (K, d), covariances (K, d, d))."""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from . import kernels
from .correlation_prior import shrink_correlations

#: Smallest weight of the broad background component.
MIN_BACKGROUND = 1e-4
#: A count that must reach a held-out target is abandoned once its held-out
#: value plus this many times its latest gain per EM step stays below the target
#: (successive gains shrink by about a third a step, so what is left is about
#: twice the latest: EXPERIMENTS.md sections 24 and 26).
ABANDON_GAP = 3.0


class HeldOut(NamedTuple):
    """Held-out events followed during EM: X (m, d), their background log density
    bg (m,), and ``target``, the mean log-likelihood (nats per event) the mixture
    must reach for its count to be kept (-inf: always run to the end)."""
    X: np.ndarray
    bg: np.ndarray
    target: float


def nearest(X, C):
    """Index of the nearest centre for each event (squared Euclidean distance)."""
    return np.argmin((C * C).sum(axis=1)[None, :] - 2.0 * X @ C.T, axis=1)


def kmeanspp(X, k, rng):
    """k-means++ seeding (first centre uniform, then proportional to squared distance)."""
    n = X.shape[0]
    centres = [X[rng.integers(n)]]
    d2 = np.sum((X - centres[0]) ** 2, axis=1)
    for _ in range(1, k):
        tot = d2.sum()
        i = rng.integers(n) if tot <= 0 else rng.choice(n, p=d2 / tot)
        centres.append(X[i])
        d2 = np.minimum(d2, np.sum((X - X[i]) ** 2, axis=1))
    return np.array(centres)


def split_components(w, mu, cov):
    """Twice the components: each Gaussian split in two along its principal axis
    (means at +-sqrt(lambda)/2 along it, that axis's variance reduced by lambda/4,
    weights halved); the background weight is kept.  Returns (w, mu, cov)."""
    k, d = mu.shape
    w2 = [w[0]]
    mu2, cov2 = [], []
    for c in range(k):
        lam, vec = np.linalg.eigh(cov[c])
        v, lv = vec[:, -1], max(float(lam[-1]), 0.0)
        off = 0.5 * math.sqrt(lv) * v
        narrowed = cov[c] - 0.25 * lv * np.outer(v, v)
        for sign in (1.0, -1.0):
            w2.append(0.5 * w[c + 1])
            mu2.append(mu[c] + sign * off)
            cov2.append(narrowed)
    return np.array(w2), np.array(mu2), np.array(cov2)


def em_from_kmeans(X, bg, k, reg, rng, max_iter, tol, going=None, heldout=None):
    """EM for background + k Gaussians from a k-means++ start; returns (mean
    log-lik, weights, means, covs).

    Start: k-means++ seeding and 5 Lloyd steps, the first M step using the hard
    labels with the background at 0.1 %; then :func:`em_iterations`.
    """
    n, d = X.shape
    C = kmeanspp(X, k, rng)
    for _ in range(5):  # a few Lloyd steps
        lab = nearest(X, C)
        for c in range(k):
            if (lab == c).any():
                C[c] = X[lab == c].mean(axis=0)
    lab = nearest(X, C)
    # The background starts small (0.1 %): EM grows it where the data need it,
    # but from a large start its weight shrinks too slowly to settle before
    # ``tol`` stops EM, leaving spurious mass in the tails (a 2-component normal
    # mixture kept 0.8 % background, which put its 99 % HDR level 23 % low).
    counts = np.bincount(lab, minlength=k).astype(np.float64)
    w = np.concatenate([[0.001], 0.999 * counts / n])
    w = np.maximum(w, 1e-12)
    w[0] = max(w[0], MIN_BACKGROUND)
    w /= w.sum()
    mu = np.empty((k, d))
    cov = np.empty((k, d, d))
    for c in range(k):
        Xc = X[lab == c]
        mu[c] = Xc.mean(axis=0) if Xc.shape[0] else C[c]
        D = Xc - mu[c]
        cov[c] = D.T @ D / max(1, Xc.shape[0]) + np.diag(reg)
    return em_iterations(X, bg, w, mu, cov, reg, max_iter, tol, going, heldout=heldout)


def em_iterations(X, bg, w, mu, cov, reg, max_iter, tol, going, shrink=None, heldout=None):
    """EM from the mixture (w, mu, cov) until the mean log-likelihood rises by less
    than tol; returns (mean log-lik, weights, means, covs, abandoned).  Each
    iteration is one compiled pass over the events (E step and the M step's
    weighted moments, :func:`core.density.kernels.em_stats`), then the M step in
    numpy.  ``going()`` is asked after each iteration; False ends EM there.

    With ``heldout`` (:class:`HeldOut`) the held-out mean log-likelihood of each
    iterate is followed (E step only, :func:`core.density.kernels.em_loglik`),
    and EM is abandoned (``abandoned`` True, the mixture unusable for the
    count search) as soon as that value plus ``ABANDON_GAP`` times its latest
    rise stays below ``heldout.target``: a count that will not be kept is not
    run to convergence.  ``shrink`` (groups (K,) int, pseudo-events): each M step
    pulls the correlations toward the group's (:func:`shrink_correlations`); None:
    plain EM."""
    n = X.shape[0]
    prev = -np.inf
    ll = -np.inf
    X = np.ascontiguousarray(X)
    bg = np.ascontiguousarray(bg)
    hint = np.zeros(n, np.int64)
    follow = heldout is not None and np.isfinite(heldout.target)
    if follow:
        hint_va = np.zeros(heldout.X.shape[0], np.int64)
        prev_va = None
    for _ in range(max_iter):
        chol = np.ascontiguousarray(np.linalg.cholesky(cov))
        log_det = np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
        logw = np.log(w)
        mu = np.ascontiguousarray(mu)
        if follow:
            va = kernels.em_loglik(heldout.X, heldout.bg, logw, mu, chol, log_det, hint=hint_va) \
                / heldout.X.shape[0]
            if prev_va is not None and va + ABANDON_GAP * max(va - prev_va, 0.0) < heldout.target:
                return ll, w, mu, cov, True
            prev_va = va
        total, N, S, M = kernels.em_stats(X, bg, logw, mu, chol, log_det, hint=hint)
        ll = total / n
        # M step (moments were taken about the current means)
        Nk = N + 1e-12
        w = Nk / n
        w[0] = max(w[0], MIN_BACKGROUND)
        w[1:] = np.maximum(w[1:], 1e-12)
        w /= w.sum()
        delta = S / Nk[1:, None]
        mu = mu + delta
        cov = M / Nk[1:, None, None] - delta[:, :, None] * delta[:, None, :]
        cov = 0.5 * (cov + np.swapaxes(cov, 1, 2)) + np.diag(reg)[None]
        if shrink is not None:  # after the floor: every correlation matrix is then positive definite
            cov = shrink_correlations(cov, Nk[1:], *shrink)
        if ll - prev < tol or (going is not None and not going()):
            break
        prev = ll
    return ll, w, mu, cov, False


# ------------------------------------------------------------ skewed components
