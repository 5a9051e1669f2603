"""A fitted parametric base measure for the additive tree density: a
full-covariance Gaussian mixture (plus one broad fixed "background"
component) and its Rosenblatt map onto the unit cube.

Mixture (events x channels, float64 throughout)::

    f(x) = w_0 prod_j s'((x_j - loc_j) / scale_j) / scale_j      (background)
         + sum_k w_k N(x; mu_k, Sigma_k)                          (k = 1..K)

``s`` is the logistic CDF; the background is the per-channel logistic of the
robust location/scale the logistic base uses, with a learned weight floored
at ``MIN_BACKGROUND``.  It gives the density exponential (not Gaussian) tails,
so an event far outside the data keeps a finite log density like the
logistic base (no -inf even at 1e300).

Rosenblatt map ``R: R^d -> (0, 1)^d``::

    u_1 = F(x_1),  u_j = F(x_j | x_1 .. x_{j-1})

The conditional of a mixture is a mixture of the components' conditionals
with posterior weights ``p_k(x_<j) ~ w_k f_k(x_<j)``.  With the Cholesky
factor ``Sigma_k = L_k L_k^T`` and ``z_k = L_k^{-1}(x - mu_k)`` (forward
substitution), component k's conditional of x_j is normal with mean
``mu_kj + sum_{i<j} L_k[j, i] z_ki`` and standard deviation ``L_k[j, j]``, and
``log f_k(x_<=j) = sum_{i<=j} (log phi(z_ki) - log L_k[i, i])``.  So

    log |det dR/dx| = sum_j log f(x_j | x_<j) = log f(x)     (exactly)

and the log-Jacobian is computed as the mixture's log density by logsumexp.

Skewed components (``skew``, the model's default ``"skewed"`` base): each
Gaussian lives on its own monotone transform of the channels,

    y_kj = sinh(asinh((x_j - c_kj) / s_kj) - eps_kj),   y_k ~ N(mu_k, Sigma_k),

so ``log f_k(x) = log N(y_k; mu_k, Sigma_k) + sum_j log dy_kj/dx_j`` (a
Gaussian copula with sinh-arcsinh margins; eps_kj = 0 is the plain Gaussian
after standardising).  ``means`` and ``covariances`` are then mu_k and Sigma_k
in the transformed units.  The map keeps its form: component k's conditional
CDF of x_j is ``Phi((y_kj(x_j) - m_kj) / L_k[j, j])`` and its conditional
density gains the factor dy_kj/dx_j, which lies in
[exp(-|eps|) / s, exp(|eps|) / s], so the log density stays exact and finite.
Fitted by generalised EM from the chosen Gaussian mixture (:func:`_skew_em`).

Flat-top background (``background``, with the skewed components in the model's
default): per channel 99.9 % the uniform on [a, b] convolved with a logistic of
scale s and 0.1 % the logistic of loc, scale, so debris spread over the
measured range has its own component while an event beyond a thin edge keeps
a bounded penalty; a product over channels like the logistic one, so its
conditional CDFs are its marginal CDFs (:func:`core.density.kernels._bg_cdf`).

Numerics: u is clipped to ``[U_CLIP, 1 - U_CLIP]`` (U_CLIP = 1e-15): a float64
CDF near 1 cannot resolve 1 - u below ~1e-16, so the map is a bijection only
between the two clip levels (mass outside them ~2e-15 per channel, far
below any quadrature or test tolerance).  The inverse solves each
coordinate in turn by a safeguarded Newton iteration (bracket from the
components' own quantiles, which always enclose the mixture quantile;
false position (Illinois rule) or bisection whenever Newton leaves the
bracket), compiled and parallel over
events (:func:`core.density.kernels.gmm_inverse`), to a relative step of
1e-13 (well inside 1e-10).  Both directions leave out components whose
posterior weight is below exp(-40) ~ 4e-18 of the largest at that coordinate
(their share of u is below float64 resolution), so forward and inverse stay
consistent.  ``z`` is clipped to +-1e100 so
``z**2`` cannot overflow (those components then have log weight ~ -5e199,
i.e. exactly zero after logsumexp with the finite background term).
"""

from __future__ import annotations

import math

import numpy as np

from ..progress import keep_going
from . import kernels

#: Choices of the density model's first map into the cube (``base``); the
#: last two fit this module's mixture, "skewed" with skewed components.
BASES = ("logistic", "gmm", "skewed")
MIXTURE_BASES = ("gmm", "skewed")
#: Values of the model's ``base`` parameter: a map, or "auto" (the model picks one).
BASE_CHOICES = BASES + ("auto",)
U_CLIP = 1e-15
#: Smallest weight of the broad background component.
MIN_BACKGROUND = 1e-4
#: Component counts tried in turn (held-out log-likelihood picks one).
DEFAULT_COMPONENTS = (1, 2, 4, 8, 16, 32, 64)
#: From this count on, a doubled count always starts from the split of the
#: previous mixture, even a split one (a fresh k-means++ start costs more
#: EM iterations there and was no better: EXPERIMENTS.md section 22).
SPLIT_SPLIT_FROM = 64
_Z_MAX = 1e100
#: Largest |skew| of a component's sinh-arcsinh transform.
MAX_SKEW = 2.0
#: Skews tried for each channel in a generalised-EM step: a fixed grid plus
#: small moves from the current value (the best of them is taken).
_SKEW_GRID = np.linspace(-1.5, 1.5, 13)
_SKEW_MOVES = np.array([-0.12, -0.06, -0.03, -0.015, 0.0, 0.015, 0.03, 0.06, 0.12])


def _logistic_logpdf(z: np.ndarray) -> np.ndarray:
    """log s'(z) = -|z| - 2 log(1 + exp(-|z|)), finite for every finite z."""
    a = np.abs(z)
    return -a - 2.0 * np.log1p(np.exp(-a))


class GaussianMixtureBase:
    """Gaussian mixture + background with its exact Rosenblatt map.

    Attributes
    ----------
    weights : ndarray (K + 1,)
        Background weight first, then the K Gaussian weights (sum 1).
    means : ndarray (K, d)
    covariances : ndarray (K, d, d)
    loc, scale : ndarray (d,)
        Background component's logistic location and scale (units of X).
    background : ndarray (3, d) or None
        When given, the background is instead, per channel, a flat top with
        soft edges: rows a, b, s (the uniform on [a, b] convolved with a
        logistic of scale s), with share ``BACKGROUND_LOGISTIC_SHARE`` of the
        logistic of loc, scale mixed in, so an event beyond a thin edge keeps
        a bounded penalty (:func:`core.density.kernels._bg_logpdf`).
    """

    def __init__(self, weights, means, covariances, loc, scale, skew=None, background=None):
        self.weights = np.ascontiguousarray(weights, dtype=np.float64)
        self.means = np.ascontiguousarray(means, dtype=np.float64)
        self.covariances = np.ascontiguousarray(covariances, dtype=np.float64)
        self.loc = np.ascontiguousarray(loc, dtype=np.float64)
        self.scale = np.ascontiguousarray(scale, dtype=np.float64)
        K, d = self.means.shape
        if self.weights.shape != (K + 1,) or self.covariances.shape != (K, d, d) \
                or self.loc.shape != (d,) or self.scale.shape != (d,):
            raise ValueError("inconsistent Gaussian mixture array shapes")
        if not (np.isfinite(self.weights).all() and (self.weights > 0).all()
                and abs(self.weights.sum() - 1.0) < 1e-9):
            raise ValueError("mixture weights must be positive and sum to 1")
        if not (np.isfinite(self.means).all() and np.isfinite(self.covariances).all()
                and np.isfinite(self.loc).all() and np.isfinite(self.scale).all()
                and (self.scale > 0).all()):
            raise ValueError("mixture parameters must be finite (scales positive)")
        if not np.allclose(self.covariances, np.swapaxes(self.covariances, 1, 2), rtol=1e-12, atol=0):
            raise ValueError("mixture covariances must be symmetric")
        try:
            self.chol = np.linalg.cholesky(self.covariances) if K else np.zeros((0, d, d))
        except np.linalg.LinAlgError as exc:
            raise ValueError("a mixture covariance is not positive definite") from exc
        self.chol = np.ascontiguousarray(self.chol)
        self.log_weights = np.log(self.weights)
        diag = np.diagonal(self.chol, axis1=1, axis2=2)  # (K, d)
        self._sd = np.ascontiguousarray(diag.T)          # (d, K): conditional sd of x_j (or y_j)
        self._log_sd = np.log(self._sd)
        self.skew = None
        self._skew = None
        if skew is not None:
            skew = np.ascontiguousarray(skew, dtype=np.float64)
            if skew.shape != (3, K, d):
                raise ValueError("inconsistent skew-transform array shape")
            centre, sc, eps = skew
            if not (np.isfinite(skew).all() and (sc > 0).all() and (np.abs(eps) <= MAX_SKEW).all()):
                raise ValueError(f"skew transforms need finite centres, positive scales and "
                                 f"|skew| <= {MAX_SKEW}")
            self.skew = skew
            self._skew = np.ascontiguousarray(np.stack([centre.T, 1.0 / sc.T, np.cosh(eps).T, np.sinh(eps).T]))
            self._log_sd = self._log_sd + np.log(sc.T)   # density of x_j adds -log(scale)
            # layout of the density-only kernel: component index innermost
            self._means_t = np.ascontiguousarray(self.means.T)
            self._chol_t = np.ascontiguousarray(np.transpose(self.chol, (1, 2, 0)))
            self._inv_sd = 1.0 / self._sd
        self._log_scale = np.log(self.scale)
        self.background = None
        if background is None:
            self._bgp = np.ascontiguousarray(np.stack([self.loc, self.scale, self._log_scale, np.zeros(d)]))
        else:
            bgr = np.ascontiguousarray(background, dtype=np.float64)
            if bgr.shape != (3, d):
                raise ValueError("inconsistent background array shape")
            a, b, soft = bgr
            if not (np.isfinite(bgr).all() and (b > a).all() and (soft > 0).all()):
                raise ValueError("a flat background needs finite edges a < b and positive softness")
            self.background = bgr
            eta = BACKGROUND_LOGISTIC_SHARE
            const = _flat_top_log_norm(a, b, soft) + math.log1p(-eta)
            self._bgp = np.ascontiguousarray(np.stack([a, b, soft, const, self.loc, self.scale,
                                                       self._log_scale - math.log(eta), np.full(d, eta),
                                                       np.exp(const), eta / self.scale]))
        self._flat = self.background is not None
        #: True when :meth:`fit` was stopped through its progress callback.
        self.cancelled = False

    @property
    def n_components(self) -> int:
        return self.means.shape[0]

    @property
    def n_features(self) -> int:
        return self.means.shape[1]

    # ------------------------------------------------------------ densities
    def logpdf(self, X) -> np.ndarray:
        """Mixture log density of events X (n, d), natural log per unit volume of X
        (the log-Jacobian of :meth:`forward` without its CDFs: bit-identical for
        Gaussian components, equal to ~1e-14 with skewed ones)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        logd = np.zeros(X.shape[0])
        if self._skew is not None:
            kernels.skew_logpdf(X, logd, self.log_weights, self._means_t, self._chol_t, self._inv_sd,
                                self._log_sd, self._bgp, self._flat, _Z_MAX, self._skew)
            return logd
        kernels.gmm_logpdf(X, logd, self.log_weights, self.means, self.chol, self._sd, self._log_sd,
                           self._bgp, self._flat, _Z_MAX)
        return logd

    def forward(self, X) -> tuple[np.ndarray, np.ndarray]:
        """Rosenblatt map: U (n, d) in [U_CLIP, 1 - U_CLIP] and log|det dU/dX| (n,)
        (compiled kernel, parallel over events for large n)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        n, d = X.shape
        U = np.empty((n, d))
        logd = np.zeros(n)
        kernels.gmm_forward(X, U, logd, self.log_weights, self.means, self.chol, self._sd,
                            self._log_sd, self._bgp, self._flat, U_CLIP, _Z_MAX,
                            skew=self._skew)
        return U, logd

    # ------------------------------------------------------------ inverse
    def inverse(self, U) -> np.ndarray:
        """Inverse Rosenblatt map: U (n, d) in [0, 1] (clipped to [U_CLIP, 1 - U_CLIP])
        back to events (n, d) (compiled kernel, parallel over events for large n)."""
        U = np.ascontiguousarray(U, dtype=np.float64)
        X = np.empty(U.shape)
        kernels.gmm_inverse(U, X, self.log_weights, self.means, self.chol, self._sd, self._log_sd,
                            self._bgp, self._flat, U_CLIP, _Z_MAX, skew=self._skew)
        return X

    # ------------------------------------------------------------ fitting
    @classmethod
    def fit(cls, X, loc, scale, components=DEFAULT_COMPONENTS, random_state=None,
            max_em_events: int = 50_000, max_iter: int = 100, tol: float = 1e-3,
            n_init: int = 1, min_gain: float = 2e-3, skew: bool = True,
            flat_background: bool = False, validation=None, progress=None) -> "GaussianMixtureBase":
        """Fit by EM (float64) and choose the number of Gaussian components by
        held-out log-likelihood.

        X : (n, d) events in the units of the channels; loc, scale : (d,) the
        background logistic's location and scale.  A seeded random subsample of
        at most ``max_em_events`` events is split 80/20: EM runs on the 80 %
        for each count in ``components`` (increasing), the 20 % scores it
        (given ``validation`` (m, d), EM runs on the whole subsample and a
        subsample of at most ``max_em_events // 4`` validation events scores); the
        search stops at the first count that does not beat the best so far by
        more than ``min_gain`` nats per event, and the best is kept.  A count
        that doubles a k-means++-started one starts from that mixture with each
        component split in two along its principal axis (1, 4, 16 start from
        k-means++, 2, 8, 32 from the split): better and faster than a fresh
        start, while splitting a split compounds poor starts (EXPERIMENTS.md
        section 17); from ``SPLIT_SPLIT_FROM`` (64) on a count starts from the
        split of the previous one whichever way that one started.  EM stops
        when the training mean log-likelihood rises by less than ``tol`` nats
        per event (or after ``max_iter`` steps).  ``n_init`` seeded
        k-means++ restarts per count (best training log-likelihood kept).
        Covariances get ``1e-6 x`` the channel variance added on the diagonal
        (floor).  With ``skew``, the chosen mixture is then refitted with a
        sinh-arcsinh transform per component and channel (:func:`_skew_em`),
        kept only if it beats it on the held-out events by ``min_gain``; when
        the chosen count is ``SPLIT_SPLIT_FROM`` (64) or more, the count before
        it is refitted with skewed components too and the larger skewed
        mixture is the candidate only when it beats the smaller clearly
        (:func:`_clearly_better`; counts from 64 on must also beat the one
        before by ``COUNT_SE`` standard errors of the held-out difference).
        With ``flat_background`` the background component is a flat top with
        soft edges per channel (:func:`_initial_flat_background`), whose
        edges and softness the skewed-component fit also updates
        (:func:`_flat_background_step`); else the logistic of ``loc``, ``scale``.

        ``progress(step, total, info)`` (:mod:`core.progress`) is called before
        each component count and after each EM iteration, with ``info`` a dict
        whose "stage" says what runs; returning False stops the search: the
        best mixture so far is kept (a count interrupted mid-EM is used only
        when no count has finished).
        """
        rng = np.random.default_rng(random_state)
        X = np.asarray(X, dtype=np.float64)
        if X.shape[0] > max_em_events:
            X = X[np.sort(rng.choice(X.shape[0], max_em_events, replace=False))]
        loc = np.asarray(loc, np.float64)
        scale = np.asarray(scale, np.float64)
        if validation is None:
            perm = rng.permutation(X.shape[0])
            n_va = max(1, X.shape[0] // 5)
            Xva, X = X[np.sort(perm[:n_va])], X[np.sort(perm[n_va:])]
        else:
            Xva = np.ascontiguousarray(validation, dtype=np.float64)
            if Xva.shape[0] > max_em_events // 4:
                Xva = Xva[np.sort(rng.choice(Xva.shape[0], max_em_events // 4, replace=False))]
        n, d = X.shape
        var = X.var(axis=0)
        reg = 1e-6 * np.where(var > 0, var, scale ** 2)
        bgr = _initial_flat_background(X) if flat_background else None
        bg = _background_logpdf(X, loc, scale, bgr)
        best, best_ll, best_scores, runner_up = None, -np.inf, None, None
        prev_fit, prev_fresh = None, False
        stopped = [False]
        for step, k in enumerate(components):
            if best is not None and k * (d + 1) > n:
                break  # too few events for this many components (k = 1 is always fitted)
            stage = {"stage": f"Fitting the Gaussian-mixture base: {k} component{'s' if k > 1 else ''}"}

            def going(step=step, stage=stage):
                stopped[0] = stopped[0] or not keep_going(progress, step, len(components), stage)
                return not stopped[0]

            if best is not None and not going():
                break
            fit_k = None
            parent = None  # split a k-means++-started mixture, never a split one
            if prev_fit is not None and (prev_fresh or k >= SPLIT_SPLIT_FROM) \
                    and k == 2 * prev_fit[2].shape[0]:
                parent = _split_components(prev_fit[1], prev_fit[2], prev_fit[3])
            for attempt in range(max(1, int(n_init))):
                split_start = parent is not None and attempt == 0
                if split_start:
                    cand = _em_iterations(X, bg, *parent, reg, max_iter, tol, going)
                else:
                    cand = _em(X, bg, k, reg, rng, max_iter, tol, going)
                if fit_k is None or cand[0] > fit_k[0]:
                    fit_k, fit_fresh = cand, not split_start
                if stopped[0]:
                    break
            if stopped[0] and best is not None:
                break
            prev_fit, prev_fresh = fit_k, fit_fresh
            _, w, mu, cov = fit_k
            model = cls(w, mu, cov, loc, scale, background=bgr)
            scores = model.logpdf(Xva)
            ll = float(scores.mean())
            if best is not None and not _clearly_better(scores, best_scores, min_gain, k >= SPLIT_SPLIT_FROM):
                break
            runner_up = best
            best, best_ll, best_scores = model, ll, scores
            if stopped[0]:
                break
        if skew and not stopped[0] and best.n_components:
            # from SPLIT_SPLIT_FROM components on, the Gaussian count's gain may be
            # skew that fewer skewed components capture better: skew both, keep the
            # better on the held-out events (EXPERIMENTS.md section 22)
            starts = [best]
            if best.n_components >= SPLIT_SPLIT_FROM and runner_up is not None and runner_up.n_components:
                starts.append(runner_up)
            fits = []
            for start in starts:
                stage = {"stage": f"Fitting the mixture base: skewed components ({start.n_components})"}

                def going_skew(stage=stage):
                    stopped[0] = stopped[0] or not keep_going(progress, len(components) - 1, len(components), stage)
                    return not stopped[0]

                if not going_skew():
                    break
                skewed = _skew_em(X, start, reg, max_iter, tol, going_skew)
                if skewed is not None:
                    fits.append((skewed, skewed.logpdf(Xva)))
            if len(fits) == 2 and not _clearly_better(fits[0][1], fits[1][1], min_gain, True):
                fits = fits[1:]   # the larger count must beat the smaller clearly
            if fits and float(fits[0][1].mean()) > best_ll + min_gain:
                best = fits[0][0]
        best.cancelled = stopped[0]
        return best


#: From ``SPLIT_SPLIT_FROM`` components on, a larger count must beat the
#: smaller by this many standard errors of the paired held-out difference.
COUNT_SE = 2.0


def _clearly_better(new, old, min_gain, strict):
    """True when per-event held-out log densities ``new`` (m,) beat ``old`` (m,) by
    more than ``min_gain`` nats per event on average; with ``strict`` also by more
    than ``COUNT_SE`` standard errors of the paired difference (a count with many
    parameters per held-out event can win on noise: EXPERIMENTS.md section 22)."""
    diff = new - old
    gain = float(diff.mean())
    if strict and diff.size > 1:
        return gain > max(min_gain, COUNT_SE * float(diff.std(ddof=1)) / math.sqrt(diff.size))
    return gain > min_gain


def _flat_top_log_norm(a, b, soft):
    """log(1 - exp(-(b - a)/s)) - log(b - a): the flat top's density is
    sigma((x - a)/s) sigma(-(x - b)/s) times exp of this (arrays broadcast)."""
    return np.log(-np.expm1(-(b - a) / soft)) - np.log(b - a)


def _background_logpdf(X, loc, scale, flat=None):
    """Log density (n,) of events X (n, d) under the background component alone:
    the logistic of loc, scale (d,), or the flat top ``flat`` (3, d) (rows a, b,
    s) with its logistic share, scored by the mixture kernel as a mixture of
    the background only."""
    d = X.shape[1]
    alone = GaussianMixtureBase(np.ones(1), np.zeros((0, d)), np.zeros((0, d, d)), loc, scale, background=flat)
    return alone.logpdf(X)


#: Share of the logistic in each channel of a flat-top background.
BACKGROUND_LOGISTIC_SHARE = 0.001
#: Starting flat-top background: edges at these quantiles of each channel,
#: softness this share of the width between them.
FLAT_EDGE_QUANTILE = 0.002
FLAT_SOFTNESS = 0.03


def _initial_flat_background(X):
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


def _flat_background_step(X, r0, bgr):
    """One generalised-EM step of the flat-top background: per channel, the
    edges a, b and the softness s in turn (``_BG_ROUNDS`` rounds), each the best of a few moves by the
    responsibility-weighted log likelihood (over a 2048-bin weighted
    histogram of the channel; it only ranks the moves).  X (n, d), r0 (n,) the
    background responsibilities, bgr (3, d).  Returns the new (3, d)."""
    bgr = bgr.copy()
    if r0.sum() <= 0:
        return bgr
    for j in range(X.shape[1]):
        x = X[:, j]
        lo, hi = float(x.min()), float(x.max())
        if hi <= lo:
            continue
        h = np.histogram(x, bins=_BG_BINS, range=(lo, hi), weights=r0)[0]
        hx = np.histogram(x, bins=_BG_BINS, range=(lo, hi), weights=r0 * x)[0]
        keep = h > 0
        w, c = h[keep], hx[keep] / h[keep]

        def score(a, b, soft):
            ok = (b > a) & (soft > 0)
            a, b, soft = np.where(ok, a, 0.0), np.where(ok, b, 1.0), np.where(ok, soft, 1.0)
            ll = (-np.logaddexp(0.0, -(c[:, None] - a) / soft) - np.logaddexp(0.0, (c[:, None] - b) / soft)) \
                + _flat_top_log_norm(a, b, soft)
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


def _nearest(X, C):
    """Index of the nearest centre for each event (squared Euclidean distance)."""
    return np.argmin((C * C).sum(axis=1)[None, :] - 2.0 * X @ C.T, axis=1)


def _kmeanspp(X, k, rng):
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


def _split_components(w, mu, cov):
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


def _em(X, bg, k, reg, rng, max_iter, tol, going=None):
    """EM for background + k Gaussians from a k-means++ start; returns (mean
    log-lik, weights, means, covs).

    Start: k-means++ seeding and 5 Lloyd steps, the first M step using the hard
    labels with the background at 0.1 %; then :func:`_em_iterations`.
    """
    n, d = X.shape
    C = _kmeanspp(X, k, rng)
    for _ in range(5):  # a few Lloyd steps
        lab = _nearest(X, C)
        for c in range(k):
            if (lab == c).any():
                C[c] = X[lab == c].mean(axis=0)
    lab = _nearest(X, C)
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
    return _em_iterations(X, bg, w, mu, cov, reg, max_iter, tol, going)


def _em_iterations(X, bg, w, mu, cov, reg, max_iter, tol, going):
    """EM from the mixture (w, mu, cov) until the mean log-likelihood rises by less
    than tol; returns (mean log-lik, weights, means, covs).  Each iteration is one
    compiled pass over the events (E step and the M step's weighted moments,
    :func:`core.density.kernels.em_stats`), then the M step in numpy.
    ``going()`` is asked after each iteration; False ends EM there."""
    n = X.shape[0]
    prev = -np.inf
    ll = -np.inf
    X = np.ascontiguousarray(X)
    bg = np.ascontiguousarray(bg)
    hint = np.zeros(n, np.int64)
    for _ in range(max_iter):
        chol = np.ascontiguousarray(np.linalg.cholesky(cov))
        log_det = np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
        total, N, S, M = kernels.em_stats(X, bg, np.log(w), np.ascontiguousarray(mu), chol, log_det, hint=hint)
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
        if ll - prev < tol or (going is not None and not going()):
            break
        prev = ll
    return ll, w, mu, cov


# ------------------------------------------------------------ skewed components

#: Bins of u = t / sqrt(1 + t^2) in (-1, 1) for the Jacobian term of the skew search.
_SKEW_JAC_BINS = 512


def _component_shape(T, rs, eps, reg):
    """One generalised-EM step of a component's shape: each channel's skew in
    turn (coordinate-wise), then the transformed mean and covariance.

    T (n, d): the component's events standardised by its transform centres and
    scales; rs (n,) their responsibilities; eps (d,) the current skews (updated
    in place); reg (d,) diagonal floor.  Returns (mean (d,), covariance (d, d)).

    y_j = t_j cosh(eps_j) - r_j sinh(eps_j) with r_j = sqrt(1 + t_j^2) is linear
    in (t_j, r_j), so every candidate skew's weighted moments come from one
    weighted covariance of [t, r] (2d x 2d).  With the Gaussian's mean and
    covariance at their closed-form maximum, channel j's share of the log
    likelihood is -n_k/2 log(residual variance of y_j on the other y) +
    sum rs log(cosh eps - u sinh eps), u = t / r; that sum is taken over a
    512-bin weighted histogram of u (bin means; it only ranks the candidates,
    the density itself is exact).  The best of a fixed grid and small moves
    from the current value is kept."""
    n, d = T.shape
    n_k = float(rs.sum())
    wk = rs / n_k
    Rt = np.sqrt(1.0 + T * T)
    Z = np.hstack([T, Rt])
    mz = wk @ Z
    Zc = Z - mz
    CZ = (Zc * wk[:, None]).T @ Zc
    Uq = T / Rt
    nb = _SKEW_JAC_BINS
    idx = np.clip(((Uq + 1.0) * (0.5 * nb)).astype(np.int64), 0, nb - 1)
    diag = np.arange(d)
    B = np.zeros((2 * d, d))
    B[diag, diag] = np.cosh(eps)
    B[d + diag, diag] = -np.sinh(eps)
    # every channel's weighted histogram in one pass (bin j * nb + b)
    flat = (idx + nb * diag[None, :]).ravel()
    HW = np.bincount(flat, weights=np.repeat(rs, d), minlength=nb * d).reshape(d, nb)
    HU = np.bincount(flat, weights=(Uq * rs[:, None]).ravel(), minlength=nb * d).reshape(d, nb)
    for j in range(d):
        hw = HW[j]
        keep = hw > 0
        hu = HU[j][keep] / hw[keep]
        hw = hw[keep]
        cand = np.unique(np.clip(np.concatenate([_SKEW_GRID, eps[j] + _SKEW_MOVES]), -MAX_SKEW, MAX_SKEW))
        ch, sh = np.cosh(cand), np.sinh(cand)
        var = kernels.skew_residual_variance(CZ, B[diag, diag], B[d + diag, diag], j, ch, sh)
        if not np.isfinite(var).all():
            continue  # the other channels' covariance is singular here: keep this skew
        jac = hw @ np.log(ch[None, :] - hu[:, None] * sh[None, :])
        score = -0.5 * n_k * np.log(np.maximum(var, 1e-300)) + jac
        g = int(np.argmax(score))
        eps[j] = cand[g]
        B[j, j], B[d + j, j] = ch[g], -sh[g]
    mean = mz @ B
    cov = B.T @ CZ @ B
    return mean, 0.5 * (cov + cov.T) + np.diag(reg)


def _skew_em(X, gauss, reg, max_iter, tol, going):
    """Generalised EM for background + K Gaussian copulas with sinh-arcsinh margins,
    started from the Gaussian mixture ``gauss`` (each transform centred and scaled
    by its component's mean and standard deviation, skew 0: the same mixture).

    Component k's density is N(y; m_k, S_k) prod_j dy_j/dx_j with
    y_j = sinh(asinh((x_j - c_kj) / s_kj) - eps_kj).  Each step: E step
    (:func:`core.density.kernels.skew_logpdf` with its posterior output), then
    per component :func:`_component_shape` (each channel's skew in turn by the
    profile likelihood over m_k and S_k, then m_k and S_k in closed form).
    Stops when the training
    mean log-likelihood rises by less than ``tol``; returns the best mixture
    seen (None if ``going()`` said stop before any E step finished).  A flat-top
    background's edges and softness are updated in each step too
    (:func:`_flat_background_step`)."""
    K, d = gauss.means.shape
    n = X.shape[0]
    w = gauss.weights.copy()
    centre = gauss.means.copy()
    scale = np.sqrt(np.diagonal(gauss.covariances, axis1=1, axis2=2)).copy()
    eps = np.zeros((K, d))
    mu = np.zeros((K, d))
    cov = gauss.covariances / (scale[:, :, None] * scale[:, None, :])
    reg_y = reg[None, :] / scale ** 2                               # (K, d)
    bgr = gauss.background
    best, prev = None, -np.inf
    for _ in range(max_iter):
        model = GaussianMixtureBase(w, mu, cov, gauss.loc, gauss.scale, skew=np.stack([centre, scale, eps]),
                                    background=bgr)
        R = np.empty((n, K + 1))
        ll_rows = np.zeros(n)
        kernels.skew_logpdf(X, ll_rows, model.log_weights, model._means_t, model._chol_t, model._inv_sd,
                            model._log_sd, model._bgp, model._flat, _Z_MAX, model._skew, R)
        ll = float(ll_rows.mean())
        if ll <= prev:
            break
        best = model
        if ll - prev < tol or not going():
            break
        prev = ll
        Nk = R.sum(axis=0) + 1e-12
        w = Nk / n
        w[0] = max(w[0], MIN_BACKGROUND)
        w[1:] = np.maximum(w[1:], 1e-12)
        w /= w.sum()
        mu, cov, eps = mu.copy(), cov.copy(), eps.copy()
        if bgr is not None:
            bgr = _flat_background_step(X, R[:, 0], bgr)
        for k in range(K):
            rk = R[:, k + 1]
            sel = rk > 1e-3 * max(rk.max(), 1e-300)
            n_k = float(rk[sel].sum())
            if n_k < 2 * (d + 1):
                continue  # too little weight to move this component's shape
            mu[k], cov[k] = _component_shape((X[sel] - centre[k]) / scale[k], rk[sel], eps[k], reg_y[k])
    return best
