"""Skewed components for the mixture base: generalised EM from a fitted
Gaussian mixture to Gaussian copulas with sinh-arcsinh margins (each channel's
skew by a profile-likelihood search, then the transformed mean and covariance
in closed form), and the flat-top background's moves."""

from __future__ import annotations

import numpy as np

from . import kernels
from .correlation_prior import shrink_correlations
from .em import MIN_BACKGROUND
from .mixture_base import MAX_SKEW, flat_top_log_norm

#: Skews tried for each channel in a generalised-EM step: a fixed grid plus
#: small moves from the current value (the best of them is taken).
_SKEW_GRID = np.linspace(-1.5, 1.5, 13)
_SKEW_MOVES = np.array([-0.12, -0.06, -0.03, -0.015, 0.0, 0.015, 0.03, 0.06, 0.12])
#: Starting flat-top background: edges at these quantiles of each channel,
#: softness this share of the width between them.
FLAT_EDGE_QUANTILE = 0.002
FLAT_SOFTNESS = 0.03


def initial_flat_background(X):
    """(3, d) rows a, b, s: each channel's 0.2 % and 99.8 % quantiles and 3 % of
    their distance (a channel whose quantiles coincide gets a width of 1e-6 of
    its magnitude, at least 1e-12)."""
    a, b = np.quantile(X, [FLAT_EDGE_QUANTILE, 1.0 - FLAT_EDGE_QUANTILE], axis=0)
    width = np.maximum(b - a, 1e-6 * np.maximum(1e-6, np.abs(a)))
    b = a + width
    return np.stack([a, b, FLAT_SOFTNESS * width])


#: Moves of a flat-top edge (shares of the width) and factors of its softness
#: tried by one background step.
_EDGE_MOVES = np.array([-0.05, -0.02, -0.01, -0.005, -0.002, 0.0, 0.002, 0.005, 0.01, 0.02, 0.05])
_SOFT_FACTORS = np.array([0.3, 0.5, 0.7, 0.85, 1.0, 1.2, 1.5, 2.0])
#: Rounds of edge and softness moves per generalised-EM step.
_BG_ROUNDS = 1
_BG_BINS = 2048


def channel_bins(X):
    """Per channel j, the index (n,) int of each event's bin among ``_BG_BINS`` equal
    bins from the channel's min to its max (numpy's histogram rule: a bin holds its
    left edge, the last bin its right edge too), or None for a constant channel.
    The events of a skewed fit do not change between its steps, so
    :func:`flat_background_step` reuses these instead of binning again."""
    out = []
    for j in range(X.shape[1]):
        x = X[:, j]
        lo, hi = float(x.min()), float(x.max())
        if hi <= lo:
            out.append(None)
            continue
        edges = np.linspace(lo, hi, _BG_BINS + 1)
        idx = np.searchsorted(edges, x, side="right") - 1
        idx[idx == _BG_BINS] = _BG_BINS - 1
        out.append(idx)
    return out


def _binned(idx, weights):
    """Weighted histogram (``_BG_BINS``,) from bin indices, summed in numpy's
    histogram blocks of 65,536 events (the same sums as ``np.histogram``)."""
    h = np.zeros(_BG_BINS)
    for i in range(0, idx.size, 65536):
        h += np.bincount(idx[i:i + 65536], weights=weights[i:i + 65536], minlength=_BG_BINS)
    return h


def flat_background_step(X, r0, bgr, bins=None):
    """One generalised-EM step of the flat-top background: per channel, the
    edges a, b and the softness s in turn (``_BG_ROUNDS`` rounds), each the best of a few moves by the
    responsibility-weighted log likelihood (over a 2048-bin weighted
    histogram of the channel; it only ranks the moves).  X (n, d), r0 (n,) the
    background responsibilities, bgr (3, d); ``bins``: :func:`channel_bins` of X
    (computed here when None).  Returns the new (3, d)."""
    bgr = bgr.copy()
    if r0.sum() <= 0:
        return bgr
    if bins is None:
        bins = channel_bins(X)
    for j in range(X.shape[1]):
        if bins[j] is None:
            continue
        x = X[:, j]
        h = _binned(bins[j], r0)
        hx = _binned(bins[j], r0 * x)
        keep = h > 0
        w, c = h[keep], hx[keep] / h[keep]

        def score(a, b, soft):
            ok = (b > a) & (soft > 0)
            a, b, soft = np.where(ok, a, 0.0), np.where(ok, b, 1.0), np.where(ok, soft, 1.0)
            ll = (-np.logaddexp(0.0, -(c[:, None] - a) / soft) - np.logaddexp(0.0, (c[:, None] - b) / soft)) \
                + flat_top_log_norm(a, b, soft)
            return np.where(ok, w @ ll, -np.inf)

        a, b, soft = bgr[:, j]
        for _ in range(_BG_ROUNDS):
            width = b - a
            cand = a + width * _EDGE_MOVES
            a = cand[int(np.argmax(score(cand, np.full_like(cand, b), np.full_like(cand, soft))))]
            cand = b + width * _EDGE_MOVES
            b = cand[int(np.argmax(score(np.full_like(cand, a), cand, np.full_like(cand, soft))))]
            cand = soft * _SOFT_FACTORS
            soft = cand[int(np.argmax(score(np.full_like(cand, a), np.full_like(cand, b), cand)))]
        bgr[:, j] = a, b, soft
    return bgr



#: Bins of u = t / sqrt(1 + t^2) in (-1, 1) for the Jacobian term of the skew search.
_SKEW_JAC_BINS = 512


class SkewFit:
    """Generalised EM for background + K Gaussian copulas with sinh-arcsinh margins,
    started from the Gaussian mixture ``gauss`` (each transform centred and scaled
    by its component's mean and standard deviation, skew 0: the same mixture),
    one iteration per :meth:`step` (so two fits can run side by side).

    Component k's density is N(y; m_k, S_k) prod_j dy_j/dx_j with
    y_j = sinh(asinh((x_j - c_kj) / s_kj) - eps_kj).  Each step: E step
    (:meth:`MixtureBase.logpdf_and_posteriors`), then per component
    :func:`core.density.kernels.component_shapes` (each channel's skew in turn by the profile
    likelihood over m_k and S_k, then m_k and S_k in closed form); a flat-top
    background's edges and softness are updated too (:func:`flat_background_step`).

    Stops when the training mean log-likelihood rises by less than ``tol``, after
    ``max_iter`` steps or, given held-out events ``Xva`` (m, d), as soon as their
    mean log-likelihood rises by less than ``tol`` (held-out values peak several
    steps before training values settle, then fall: EXPERIMENTS.md section 24).
    ``best``: the mixture with the best held-out (else training) value so far,
    ``best_scores`` its held-out log densities (m,) (None without ``Xva``).
    ``shrink`` (groups (K,), pseudo-events): each M step pulls the components'
    correlations toward their group's (:func:`core.density.correlation_prior.shrink_correlations`)."""

    def __init__(self, X, gauss, reg, max_iter, tol, Xva=None, shrink=None):
        self.X, self.Xva, self.tol, self.max_iter = X, Xva, float(tol), int(max_iter)
        self.shrink = shrink
        K, d = gauss.means.shape
        self.gauss = gauss
        self.w = gauss.weights.copy()
        self.centre = gauss.means.copy()
        self.scale = np.sqrt(np.diagonal(gauss.covariances, axis1=1, axis2=2)).copy()
        self.eps = np.zeros((K, d))
        self.mu = np.zeros((K, d))
        self.cov = gauss.covariances / (self.scale[:, :, None] * self.scale[:, None, :])
        self.reg_y = reg[None, :] / self.scale ** 2                     # (K, d)
        self.bgr = gauss.background
        self.best, self.best_scores, self.best_heldout = None, None, -np.inf
        self.prev = -np.inf
        self.steps = 0
        self.done = False
        self.last_gain = np.inf  # held-out gain of the latest step
        self._bins = None  # channel_bins(X), for the flat-top background's steps

    @property
    def n_components(self) -> int:
        return self.centre.shape[0]

    def step(self, going) -> bool:
        """One E step and, unless the fit has converged, one M step; ``going()`` is
        asked after the E step (False ends the fit).  Returns False once done."""
        if self.done or self.steps >= self.max_iter:
            self.done = True
            return False
        self.steps += 1
        g = self.gauss
        model = type(g)(self.w, self.mu, self.cov, g.loc, g.scale, skew=np.stack([self.centre, self.scale, self.eps]),
                        background=self.bgr)
        ll_rows, R = model.logpdf_and_posteriors(self.X)
        ll = float(ll_rows.mean())
        if ll <= self.prev:
            self.done = True
            return False
        stop = ll - self.prev < self.tol
        if self.Xva is None:
            self.best = model
        else:
            scores = model.logpdf(self.Xva)
            heldout = float(scores.mean())
            if heldout > self.best_heldout:
                self.best, self.best_scores = model, scores
            stop = stop or heldout < self.best_heldout + self.tol
            self.last_gain = heldout - self.best_heldout
            self.best_heldout = max(self.best_heldout, heldout)
        if stop or not going():
            self.done = True
            return False
        self.prev = ll
        self._m_step(R)
        return True

    def _m_step(self, R):
        X = self.X
        n, d = X.shape
        Nk = R.sum(axis=0) + 1e-12
        w = Nk / n
        w[0] = max(w[0], MIN_BACKGROUND)
        w[1:] = np.maximum(w[1:], 1e-12)
        self.w = w / w.sum()
        self.mu, self.cov, self.eps = self.mu.copy(), self.cov.copy(), self.eps.copy()
        if self.bgr is not None:
            if self._bins is None:
                self._bins = channel_bins(X)
            self.bgr = flat_background_step(X, R[:, 0], self.bgr, self._bins)
        # each component's events: responsibility above 1e-3 of its largest
        thr = 1e-3 * np.maximum(R[:, 1:].max(axis=0), 1e-300)
        kernels.component_shapes(X, R, thr, self.centre, self.scale, self.eps, self.reg_y, _SKEW_GRID,
                                 _SKEW_MOVES, MAX_SKEW, _SKEW_JAC_BINS, self.mu, self.cov)
        if self.shrink is not None:
            self.cov = shrink_correlations(self.cov, Nk[1:], *self.shrink)


def skew_em(X, gauss, reg, max_iter, tol, going, Xva=None):
    """The skewed mixture fitted from ``gauss`` by :class:`SkewFit` run to its end;
    returns its best mixture (None if ``going()`` said stop before any E step finished)."""
    fit = SkewFit(X, gauss, reg, max_iter, tol, Xva)
    while fit.step(going):
        pass
    return fit.best
