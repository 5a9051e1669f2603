"""A fitted parametric base measure for the additive tree density: a mixture
of full-covariance Gaussian components, or of Gaussian copulas with skewed
(sinh-arcsinh) margins, plus one broad "background" component, and its
Rosenblatt map onto the unit cube (:class:`MixtureBase`).  Fitting:
:mod:`core.density.mixture_fit` (component count), :mod:`core.density.em`
(Gaussian EM), :mod:`core.density.skew_fit` (skewed components).

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
Fitted by generalised EM from the chosen Gaussian mixture (:class:`core.density.skew_fit.SkewFit`).

Flat-top background (``background``, with the skewed components in the model's
default): per channel 99.9 % the uniform on [a, b] convolved with a logistic of
scale s and 0.1 % the logistic of loc, scale, so debris spread over the
measured range has its own component while an event beyond a thin edge keeps
a bounded penalty; a product over channels like the logistic one, so its
conditional CDFs are its marginal CDFs (:func:`core.density.kernels.mixture.bg_cdf`).

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

from . import kernels

#: Choices of the density model's first map into the cube (``base``); the
#: last two fit this module's mixture, "skewed" with skewed components.
BASES = ("logistic", "gmm", "skewed")
MIXTURE_BASES = ("gmm", "skewed")
#: Values of the model's ``base`` parameter: a map, or "auto" (the model picks one).
BASE_CHOICES = BASES + ("auto",)
U_CLIP = 1e-15
_Z_MAX = 1e100
#: Largest |skew| of a component's sinh-arcsinh transform.
MAX_SKEW = 2.0
#: Share of the logistic in each channel of a flat-top background.
BACKGROUND_LOGISTIC_SHARE = 0.001


def flat_top_log_norm(a, b, soft):
    """log(1 - exp(-(b - a)/s)) - log(b - a): the flat top's density is
    sigma((x - a)/s) sigma(-(x - b)/s) times exp of this (arrays broadcast)."""
    return np.log(-np.expm1(-(b - a) / soft)) - np.log(b - a)


def _background_record(loc, scale, log_scale, flat):
    """The kernels' :class:`~core.density.kernels.Background` of the logistic of
    loc, scale (d,), or of the flat top ``flat`` (3, d) (rows a, b, s) with its logistic share."""
    d = loc.shape[0]
    if flat is None:
        zero, one = np.zeros(d), np.ones(d)
        return kernels.Background(False, zero, one, one, zero, one, loc, scale, log_scale, one, 1.0 / scale)
    a, b, soft = (np.ascontiguousarray(r) for r in flat)
    eta = BACKGROUND_LOGISTIC_SHARE
    const = flat_top_log_norm(a, b, soft) + math.log1p(-eta)
    return kernels.Background(True, a, b, soft, const, np.exp(const), loc, scale, log_scale - math.log(eta),
                              np.full(d, eta), eta / scale)


class MixtureBase:
    """Mixture of Gaussian or skewed components + background, with its exact Rosenblatt map.

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
        a bounded penalty (:func:`core.density.kernels.mixture.bg_logpdf`).
    skew : ndarray (3, K, d) or None
        Skewed components: per component and channel the transform's centre,
        scale and skew (None: Gaussian components).
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
        if background is not None:
            bgr = np.ascontiguousarray(background, dtype=np.float64)
            if bgr.shape != (3, d):
                raise ValueError("inconsistent background array shape")
            a, b, soft = bgr
            if not (np.isfinite(bgr).all() and (b > a).all() and (soft > 0).all()):
                raise ValueError("a flat background needs finite edges a < b and positive softness")
            self.background = bgr
        self._bg = _background_record(self.loc, self.scale, self._log_scale, self.background)
        self._components = kernels.Components(self.log_weights, self.means, self.chol, self._sd, self._log_sd,
                                              self.skew is not None,
                                              kernels.NO_SKEW if self._skew is None else self._skew)
        if self._skew is not None:
            self._inner = kernels.ComponentsInner(self.log_weights, self._means_t, self._chol_t, self._inv_sd,
                                                  self._log_sd, self._skew)
        #: True when the fit that made it was stopped through its progress callback.
        self.cancelled = False

    @property
    def n_components(self) -> int:
        return self.means.shape[0]

    @property
    def n_features(self) -> int:
        return self.means.shape[1]

    @property
    def is_skewed(self) -> bool:
        """True for skewed (sinh-arcsinh) components, False for Gaussian ones."""
        return self.skew is not None

    # ------------------------------------------------------------ densities
    def logpdf(self, X) -> np.ndarray:
        """Mixture log density of events X (n, d), natural log per unit volume of X
        (the log-Jacobian of :meth:`forward` without its CDFs: bit-identical for
        Gaussian components, equal to ~1e-14 with skewed ones)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        logd = np.zeros(X.shape[0])
        if self._skew is not None:
            kernels.skew_logpdf(X, logd, self._inner, self._bg, _Z_MAX)
            return logd
        kernels.gmm_logpdf(X, logd, self._components, self._bg, _Z_MAX)
        return logd

    def logpdf_and_posteriors(self, X) -> tuple[np.ndarray, np.ndarray]:
        """Log density (n,) and posterior component probabilities (n, K + 1),
        background first, of events X (n, d) (plain Gaussian components are scored
        as skewed ones with the identity transform)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        logd = np.zeros(X.shape[0])
        R = np.empty((X.shape[0], self.n_components + 1))
        kernels.skew_logpdf(X, logd, self._inner_layout(), self._bg, _Z_MAX, R)
        return logd, R

    def posteriors(self, X) -> np.ndarray:
        """Posterior component probabilities (n, K + 1), background first, of events X (n, d)."""
        return self.logpdf_and_posteriors(X)[1]

    def _inner_layout(self):
        """:class:`~core.density.kernels.ComponentsInner` (identity transforms for Gaussian components)."""
        if self._skew is not None:
            return self._inner
        K, d = self.means.shape
        skew = np.ascontiguousarray(np.stack([np.zeros((d, K)), np.ones((d, K)), np.ones((d, K)),
                                              np.zeros((d, K))]))
        return kernels.ComponentsInner(self.log_weights, np.ascontiguousarray(self.means.T),
                                       np.ascontiguousarray(np.transpose(self.chol, (1, 2, 0))),
                                       1.0 / self._sd, self._log_sd, skew)

    def forward(self, X) -> tuple[np.ndarray, np.ndarray]:
        """Rosenblatt map: U (n, d) in [U_CLIP, 1 - U_CLIP] and log|det dU/dX| (n,)
        (compiled kernel, parallel over events for large n)."""
        X = np.ascontiguousarray(X, dtype=np.float64)
        n, d = X.shape
        U = np.empty((n, d))
        logd = np.zeros(n)
        if self._skew is not None:   # components innermost, one log per component and event
            kernels.skew_forward(X, U, logd, self._inner, self._bg, U_CLIP, _Z_MAX)
            return U, logd
        kernels.gmm_forward(X, U, logd, self._components, self._bg, U_CLIP, _Z_MAX)
        return U, logd

    def inverse(self, U) -> np.ndarray:
        """Inverse Rosenblatt map: U (n, d) in [0, 1] (clipped to [U_CLIP, 1 - U_CLIP])
        back to events (n, d) (compiled kernel, parallel over events for large n)."""
        U = np.ascontiguousarray(U, dtype=np.float64)
        X = np.empty(U.shape)
        kernels.gmm_inverse(U, X, self._components, self._bg, U_CLIP, _Z_MAX)
        return X


def background_logpdf(X, loc, scale, flat=None):
    """Log density (n,) of events X (n, d) under the background component alone:
    the logistic of loc, scale (d,), or the flat top ``flat`` (3, d) (rows a, b,
    s) with its logistic share, scored by the mixture kernel as a mixture of
    the background only."""
    d = X.shape[1]
    alone = MixtureBase(np.ones(1), np.zeros((0, d)), np.zeros((0, d, d)), loc, scale, background=flat)
    return alone.logpdf(X)
