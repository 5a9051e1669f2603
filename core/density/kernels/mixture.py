"""The mixture base's kernels (compiled, parallel over events): its background
component, the per-component sinh-arcsinh transforms, the Rosenblatt map
with the mixture's log density, and the density alone with components
innermost (the skewed mixture's scoring and E step).  The inverse map is in
:mod:`.mixture_inverse`.

A mixture travels as two records: :class:`Components` (or
:class:`ComponentsInner`, the same numbers laid out with the component index
innermost) and :class:`Background`.

The mixture kernels use numpy's error model (IEEE results, no Python
ZeroDivisionError checks) so their loops over components can be vectorised;
no division in them can meet a zero divisor (scales and sds are positive).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numba import njit, prange

from .common import (BLOCK, _LOG_SQRT_2PI, correlation_bound, log_sigmoid_pair, logistic_cdf, ndtr, parallel,
                     scaled_sq_distances, softplus)


class Background(NamedTuple):
    """The mixture's background component, per channel (every array (d,)).

    ``flat`` False: the logistic of ``loc``, ``scale`` (``tail_log`` = log scale;
    the flat-top fields are unused).  ``flat`` True: share 1 - eta a flat top
    with soft edges, the uniform on [a, b] convolved with a logistic of scale
    ``soft``, and share ``eta`` the logistic of ``loc``, ``scale``, which bounds
    the penalty of an event beyond a thin edge.  Constants: ``top_log`` =
    log(1 - exp(-(b - a)/soft)) - log(b - a) + log(1 - eta), ``top`` =
    exp(top_log), ``tail_log`` = log scale - log eta, ``tail`` = eta / scale."""
    flat: bool
    a: np.ndarray
    b: np.ndarray
    soft: np.ndarray
    top_log: np.ndarray
    top: np.ndarray
    loc: np.ndarray
    scale: np.ndarray
    tail_log: np.ndarray
    eta: np.ndarray
    tail: np.ndarray


class Components(NamedTuple):
    """K Gaussian components (optionally on skew transforms), as the map kernels read them.

    logw (K + 1,) log weights, background first; means (K, d); chol (K, d, d)
    lower Cholesky factors; sd, log_sd (d, K) their diagonals (log_sd includes
    log of the transform's scale when skewed); ``skewed`` and ``skew`` (4, d, K):
    per component and channel the transform's centre, 1/scale, cosh(eps) and
    sinh(eps) (see :func:`skew_y`; a (4, 1, 1) placeholder when not skewed)."""
    logw: np.ndarray
    means: np.ndarray
    chol: np.ndarray
    sd: np.ndarray
    log_sd: np.ndarray
    skewed: bool
    skew: np.ndarray


class ComponentsInner(NamedTuple):
    """The same mixture laid out with the component index innermost (so the
    compiler vectorises over components): logw (K + 1,), means_t (d, K),
    chol_t (d, d, K) (chol_t[j, q, k] = L_k[j, q]), inv_sd, log_sd (d, K) and
    skew (4, d, K) (plain Gaussians: centre 0, 1/scale 1, cosh 1, sinh 0)."""
    logw: np.ndarray
    means_t: np.ndarray
    chol_t: np.ndarray
    inv_sd: np.ndarray
    log_sd: np.ndarray
    skew: np.ndarray


#: ``skew`` of :class:`Components` for a mixture without skew transforms.
NO_SKEW = np.zeros((4, 1, 1))


#: |(x - centre) / scale| is clipped here before a skew transform, so its square stays finite.
_SKEW_XT_MAX = 1e150


@njit(cache=True, error_model="numpy")
def bg_logpdf(x, j, bg, z_max):
    """Log density of the mixture's background component in channel j at x.

    ``bg`` a :class:`Background`.  The flat top
    (sigma((x - a)/s) - sigma((x - b)/s)) / (b - a) is computed in linear
    space where it is not tiny, else as
    log sigma(u_a) + log sigma(-u_b) + log(1 - exp(-(b - a)/s)) - log(b - a)
    (no cancellation), then mixed with its logistic share."""
    if bg.flat:
        ua = min(max((x - bg.a[j]) / bg.soft[j], -z_max), z_max)
        ub = min(max((x - bg.b[j]) / bg.soft[j], -z_max), z_max)
        zb = min(max((x - bg.loc[j]) / bg.scale[j], -z_max), z_max)
        # in linear space first (one exp and one log where the density is not
        # tiny; sigma(u) is taken as 1 beyond u = 40, a change below 4e-18)
        sa = 1.0 if ua > 40.0 else 1.0 / (1.0 + math.exp(-ua))
        sb = 1.0 if ub < -40.0 else 1.0 / (1.0 + math.exp(ub))
        e = math.exp(-abs(zb))
        dens = bg.top[j] * sa * sb + bg.tail[j] * e / ((1.0 + e) * (1.0 + e))
        if dens > 1e-280:
            return math.log(dens)
        # far tails: in log space
        lf = bg.top_log[j] - softplus(-ua) - softplus(ub)
        ll = log_sigmoid_pair(zb) - bg.tail_log[j]
        if lf >= ll:
            return lf + math.log1p(math.exp(ll - lf))
        return ll + math.log1p(math.exp(lf - ll))
    zb = min(max((x - bg.loc[j]) / bg.scale[j], -z_max), z_max)
    return log_sigmoid_pair(zb) - bg.tail_log[j]


@njit(cache=True, error_model="numpy")
def bg_cdf(x, j, bg, z_max):
    """CDF of the background component in channel j at x (see :func:`bg_logpdf`);
    the flat top's is s / (b - a) (softplus(u_a) - softplus(u_b))."""
    if bg.flat:
        ua = min(max((x - bg.a[j]) / bg.soft[j], -z_max), z_max)
        ub = min(max((x - bg.b[j]) / bg.soft[j], -z_max), z_max)
        c = bg.soft[j] / (bg.b[j] - bg.a[j]) * (softplus(ua) - softplus(ub))
        c = min(max(c, 0.0), 1.0)
        zb = min(max((x - bg.loc[j]) / bg.scale[j], -z_max), z_max)
        return (1.0 - bg.eta[j]) * c + bg.eta[j] * logistic_cdf(zb)
    return logistic_cdf(min(max((x - bg.loc[j]) / bg.scale[j], -z_max), z_max))


@njit(cache=True, error_model="numpy")
def skew_y(x, skew, j, k):
    """Component k's sinh-arcsinh transform of channel j at x:
    ``y = sinh(asinh(t) - eps)`` with ``t = (x - centre) / scale``, and
    ``J = scale * dy/dx = cosh(eps) - t sinh(eps) / sqrt(1 + t^2)`` (in
    [exp(-|eps|), exp(|eps|)], always positive).  ``skew`` (4, d, K) holds centre,
    1/scale, cosh(eps) and sinh(eps).  Returns (y, J)."""
    t = (x - skew[0, j, k]) * skew[1, j, k]
    t = min(max(t, -_SKEW_XT_MAX), _SKEW_XT_MAX)
    r = math.sqrt(1.0 + t * t)
    return t * skew[2, j, k] - r * skew[3, j, k], skew[2, j, k] - t * skew[3, j, k] / r


@njit(cache=True, error_model="numpy")
def skew_x(y, skew, j, k):
    """Inverse of :func:`skew_y`: the x whose transform is y."""
    return skew[0, j, k] + (y * skew[2, j, k] + math.sqrt(1.0 + y * y) * skew[3, j, k]) / skew[1, j, k]


@njit(cache=True, error_model="numpy")
def conditional_means(m, means_t, chol_t, z, j):
    """Each component's mean of channel j's whitened input given channels < j, into m (K).

    means_t (d x K), chol_t (d x d x K) and z (d x K) are laid out component-innermost.
    """
    for k in range(m.shape[0]):
        m[k] = means_t[j, k]
    for q in range(j):
        for k in range(m.shape[0]):
            m[k] += chol_t[j, q, k] * z[q, k]


@njit(cache=True, error_model="numpy")
def _gmm_forward_rows(start, stop, X, U, logd, comp, bg, u_clip, z_max, want_u):
    """Rosenblatt map of background + K Gaussians (see core.density.gaussian_base).

    X: (n, d) events; U: (n, d) output in [u_clip, 1 - u_clip]; logd: (n,) the
    mixture's log density is added.  comp: the :class:`Components`; bg: the
    :class:`Background` (:func:`bg_logpdf`).
    ``want_u=False`` skips the CDFs (U is not touched): the mixture's log
    density alone, bit-identical to the log-Jacobian of the full map (skewed
    mixtures score with :func:`_skew_logpdf_rows` instead).
    ``comp.skewed``: each component's Gaussian is on its own sinh-arcsinh transform
    of the channels (``comp.skew``, see :func:`skew_y`; means and chol are then in
    the transformed units and log_sd includes log(scale)); else ``skew`` is unused.
    """
    logw, means, chol, sd, log_sd = comp.logw, comp.means, comp.chol, comp.sd, comp.log_sd
    skewed, skew = comp.skewed, comp.skew
    K, d = means.shape
    lw = np.empty(K + 1)
    z = np.empty((K, d))
    lj = np.zeros(K)
    for i in range(start, stop):
        for k in range(K + 1):
            lw[k] = logw[k]
        for j in range(d):
            x = X[i, j]
            lbg = bg_logpdf(x, j, bg, z_max)
            for k in range(K):
                m = means[k, j]
                for q in range(j):
                    m += chol[k, j, q] * z[k, q]
                y = x
                if skewed:
                    y, jac = skew_y(x, skew, j, k)
                    lj[k] = math.log(jac)
                z[k, j] = min(max((y - m) / sd[j, k], -z_max), z_max)
            if not want_u:
                lw[0] += lbg
                for k in range(K):
                    lw[k + 1] += -0.5 * z[k, j] * z[k, j] - _LOG_SQRT_2PI - log_sd[j, k] + lj[k]
                continue
            mx = lw[0]
            for k in range(1, K + 1):
                mx = max(mx, lw[k])
            # posterior-weighted conditional CDFs; a component whose weight is below
            # exp(-40) ~ 4e-18 of the largest changes u by less than float64 resolution
            s = 0.0
            acc = 0.0
            for k in range(K + 1):
                g = lw[k] - mx
                if g < -40.0:
                    continue
                p = math.exp(g)
                s += p
                if k == 0:
                    c = bg_cdf(x, j, bg, z_max)
                else:
                    c = ndtr(z[k - 1, j])
                acc += p * c
            u = acc / s
            U[i, j] = min(max(u, u_clip), 1.0 - u_clip)
            lw[0] += lbg
            for k in range(K):
                lw[k + 1] += -0.5 * z[k, j] * z[k, j] - _LOG_SQRT_2PI - log_sd[j, k] + lj[k]
        mx = lw[0]
        for k in range(1, K + 1):
            mx = max(mx, lw[k])
        s = 0.0
        for k in range(K + 1):
            s += math.exp(lw[k] - mx)
        logd[i] += mx + math.log(s)


@njit(cache=True, error_model="numpy")
def _skew_logpdf_rows(start, stop, X, logd, comp, bg, z_max, R):
    """Log density of a mixture with skewed components (added to logd), laid out
    with the component index innermost so the compiler can vectorise over
    components (``comp``, a :class:`ComponentsInner`).  The same density as :func:`_gmm_forward_rows` with
    ``want_u=False`` (to ~1e-14; the per-channel factors dy/dx are multiplied,
    each within exp(+-|eps|), and one log is taken per component).  When R
    has rows (n, K + 1), each event's posterior component probabilities
    (background first) are written there too: the E step of the fit."""
    logw, means_t, chol_t, inv_sd, log_sd, skew = (comp.logw, comp.means_t, comp.chol_t, comp.inv_sd,
                                                   comp.log_sd, comp.skew)
    d, K = means_t.shape
    want_r = R.shape[0] > 0
    lw = np.empty(K)
    m = np.empty(K)
    jp = np.empty(K)
    z = np.empty((d, K))
    start_k = np.empty(K)  # log weight minus the normal constants and log sds of all channels
    for k in range(K):
        start_k[k] = logw[k + 1] - d * _LOG_SQRT_2PI
        for j in range(d):
            start_k[k] -= log_sd[j, k]
    for i in range(start, stop):
        lw0 = logw[0]
        for k in range(K):
            lw[k] = start_k[k]
            jp[k] = 1.0
        for j in range(d):
            x = X[i, j]
            lw0 += bg_logpdf(x, j, bg, z_max)
            conditional_means(m, means_t, chol_t, z, j)
            for k in range(K):
                y, jac = skew_y(x, skew, j, k)
                jp[k] *= jac
                zz = min(max((y - m[k]) * inv_sd[j, k], -z_max), z_max)
                z[j, k] = zz
                lw[k] -= 0.5 * zz * zz
        mx = lw0
        for k in range(K):
            lw[k] += math.log(jp[k])
            mx = max(mx, lw[k])
        acc = math.exp(lw0 - mx)
        for k in range(K):
            lw[k] = math.exp(lw[k] - mx)
            acc += lw[k]
        logd[i] += mx + math.log(acc)
        if want_r:
            inv = 1.0 / acc
            R[i, 0] = math.exp(lw0 - mx) * inv
            for k in range(K):
                R[i, k + 1] = lw[k] * inv


@njit(cache=True, parallel=True, error_model="numpy")
def _skew_logpdf_par(X, logd, comp, bg, z_max, R):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _skew_logpdf_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, logd, comp, bg, z_max, R)


def skew_logpdf(X, logd, comp, bg, z_max, R=None):
    """Log density of the skewed-component mixture added to logd; with R (n, K + 1)
    also the posterior component probabilities; see :func:`_skew_logpdf_rows`.
    Beyond ``SKEW_VECTOR_MAX_CHANNELS`` channels by the pruned pass
    (:func:`skew_logpdf_pruned`, the same values to ~1e-14)."""
    d, K = comp.means_t.shape
    if d > SKEW_VECTOR_MAX_CHANNELS and K > 0:
        skew_logpdf_pruned(X, logd, outer_layout(comp), bg, z_max, R)
        return
    if R is None:
        R = np.empty((0, comp.means_t.shape[1] + 1))
    args = (X, logd, comp, bg, float(z_max), R)
    if parallel(X.shape[0], (K + 1) * d * (d + 10)):
        _skew_logpdf_par(*args)
    else:
        _skew_logpdf_rows(0, X.shape[0], *args)


#: Up to this many channels the skewed density pass runs component-innermost and
#: unpruned (:func:`_skew_logpdf_rows`); beyond, pruned component by component
#: (EXPERIMENTS.md section 29).
SKEW_VECTOR_MAX_CHANNELS = 12


def outer_layout(comp: "ComponentsInner") -> "ComponentsOuter":
    """The :class:`ComponentsOuter` of a :class:`ComponentsInner` (same mixture)."""
    d, K = comp.means_t.shape
    c0 = comp.logw[1:] - d * _LOG_SQRT_2PI - comp.log_sd.sum(axis=0)
    eps = np.arcsinh(comp.skew[3])  # (d, K)
    jac_max = np.abs(eps).sum(axis=0)
    chol = np.ascontiguousarray(np.transpose(comp.chol_t, (2, 0, 1)))
    # the bound of the pruned pass (see ComponentsOuter): each channel's transform has slope
    # >= exp(-|eps|) in (x - centre) / scale, so |y - mean| >= exp(-|eps|) / scale |x - x*|, x* its preimage
    full = np.tril(chol, -1) + np.einsum("kj,jl->kjl", 1.0 / comp.inv_sd.T, np.eye(d))
    inv_marg_sd, inv_top = correlation_bound(full)
    centre, inv_scale = comp.skew[0], comp.skew[1]
    x_star = centre + np.sinh(np.arcsinh(comp.means_t) + eps) / inv_scale
    slope = np.exp(-np.abs(eps)) * inv_scale * inv_marg_sd.T
    return ComponentsOuter(np.ascontiguousarray(comp.logw), np.ascontiguousarray(c0),
                           np.ascontiguousarray(comp.means_t.T), chol,
                           np.ascontiguousarray(comp.inv_sd.T), np.ascontiguousarray(np.transpose(comp.skew, (2, 1, 0))),
                           np.ascontiguousarray(jac_max), np.ascontiguousarray(x_star), np.ascontiguousarray(slope),
                           np.ascontiguousarray(inv_top))


class ComponentsOuter(NamedTuple):
    """A skewed mixture laid out component by component for the pruned density
    pass (:func:`skew_logpdf_pruned`): logw (K + 1,) log weights, background first;
    c0 (K,) log weight minus d log sqrt(2 pi) minus the log sds of all channels;
    means (K, d), chol (K, d, d) lower Cholesky factors (transformed units),
    inv_sd (K, d) their inverse diagonals; skew (K, d, 4) per component and channel
    the transform's centre, 1/scale, cosh(eps), sinh(eps); jac_max (K,) the sum over
    channels of |eps| (the log Jacobian of a component never exceeds it); and a lower
    bound of each component's squared whitened distance q >= bound_top[k] sum_j
    (bound_slope[j, k] (x_j - bound_centre[j, k]))^2: bound_centre (d, K) the event
    values whose transforms are the means, bound_slope (d, K) exp(-|eps|) / scale over
    the marginal standard deviation (transformed units), bound_top (K,) a lower bound of
    1 / lambda_max of the correlation matrix (:func:`core.density.kernels.common.correlation_bound`;
    valid while |x - centre| / scale stays below the transform's clip, 1e150)."""
    logw: np.ndarray
    c0: np.ndarray
    means: np.ndarray
    chol: np.ndarray
    inv_sd: np.ndarray
    skew: np.ndarray
    jac_max: np.ndarray
    bound_centre: np.ndarray
    bound_slope: np.ndarray
    bound_top: np.ndarray


#: A component whose partial log term (its squared whitened distance so far, plus
#: the largest log Jacobian it could still have) lies this far below the best one
#: seen for the event is left out of the pruned density pass (its share is below
#: exp(-40) ~ 4e-18; as :data:`core.density.kernels.em.EM_PRUNE`).
SKEW_PRUNE = 40.0


@njit(cache=True, error_model="numpy")
def _skew_logpdf_pruned_rows(start, stop, X, logd, comp, bg, z_max, R, hint):
    """:func:`_skew_logpdf_rows` component by component with pruning: components
    are visited from ``hint[i]`` (updated to the event's most probable one), and a
    component is abandoned as soon as c0 - q / 2 + jac_max (q the squared whitened
    distance over the channels so far, which only grows) lies ``SKEW_PRUNE`` nats
    below the best term so far.  The same density to ~1e-14; the posteriors of
    abandoned components (below 4e-18) are written as 0.  Before its channels, each
    component is tested against the cheaper bound of :class:`ComponentsOuter` (summed
    for all components at once, component index innermost); an event whose ``hint``
    is negative starts at the component that bound ranks first."""
    logw, c0, means, chol, inv_sd, sk, jac_max = (comp.logw, comp.c0, comp.means, comp.chol, comp.inv_sd,
                                                   comp.skew, comp.jac_max)
    b_centre, b_slope, b_top = comp.bound_centre, comp.bound_slope, comp.bound_top
    K, d = means.shape
    want_r = R.shape[0] > 0
    lp = np.empty(K)
    live = np.zeros(K, np.bool_)
    z = np.empty(d)
    e2 = np.empty(K)
    for i in range(start, stop):
        scaled_sq_distances(X, i, b_centre, b_slope, e2)
        for k in range(K):
            e2[k] = c0[k] + jac_max[k] - 0.5 * e2[k] * b_top[k]  # upper bound of the component's term
        lw0 = logw[0]
        for j in range(d):
            lw0 += bg_logpdf(X[i, j], j, bg, z_max)
        mx = lw0
        k0 = hint[i]
        if k0 < 0:
            k0 = 0
            for k in range(1, K):
                if e2[k] > e2[k0]:
                    k0 = k
        best = k0
        for t in range(K):
            k = k0 + t
            if k >= K:
                k -= K
            top = c0[k] + jac_max[k]
            floor = mx - SKEW_PRUNE
            if e2[k] < floor:
                live[k] = False
                continue
            q = 0.0
            jp = 1.0
            ok = True
            for j in range(d):
                tt = (X[i, j] - sk[k, j, 0]) * sk[k, j, 1]
                tt = min(max(tt, -_SKEW_XT_MAX), _SKEW_XT_MAX)
                r = math.sqrt(1.0 + tt * tt)
                y = tt * sk[k, j, 2] - r * sk[k, j, 3]
                jp *= sk[k, j, 2] - tt * sk[k, j, 3] / r
                m = means[k, j]
                for a in range(j):
                    m += chol[k, j, a] * z[a]
                zz = min(max((y - m) * inv_sd[k, j], -z_max), z_max)
                z[j] = zz
                q += zz * zz
                if top - 0.5 * q < floor:
                    ok = False
                    break
            live[k] = ok
            if ok:
                lp[k] = c0[k] - 0.5 * q + math.log(jp)
                if lp[k] > mx:
                    mx = lp[k]
                    best = k
        e0 = math.exp(lw0 - mx)
        acc = e0
        for k in range(K):
            if live[k]:
                lp[k] = math.exp(lp[k] - mx)
                acc += lp[k]
        hint[i] = best
        logd[i] += mx + math.log(acc)
        if want_r:
            inv = 1.0 / acc
            R[i, 0] = e0 * inv
            for k in range(K):
                R[i, k + 1] = lp[k] * inv if live[k] else 0.0


@njit(cache=True, parallel=True, error_model="numpy")
def _skew_logpdf_pruned_par(X, logd, comp, bg, z_max, R, hint):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _skew_logpdf_pruned_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, logd, comp, bg, z_max, R, hint)


def skew_logpdf_pruned(X, logd, comp, bg, z_max, R=None, hint=None):
    """:func:`skew_logpdf` by the pruned pass (:func:`_skew_logpdf_pruned_rows`);
    ``comp`` a :class:`ComponentsOuter`; ``hint`` (n,) int64 each event's most
    probable component from an earlier call (updated in place; None: start at the
    component the bound ranks first)."""
    K, d = comp.means.shape
    if R is None:
        R = np.empty((0, K + 1))
    if hint is None or hint.shape[0] != X.shape[0]:
        hint = np.full(X.shape[0], -1, np.int64)
    np.minimum(hint, max(K - 1, 0), out=hint)
    args = (X, logd, comp, bg, float(z_max), R, hint)
    if parallel(X.shape[0], (K + 1) * d * (d + 10)):
        _skew_logpdf_pruned_par(*args)
    else:
        _skew_logpdf_pruned_rows(0, X.shape[0], *args)


#: The skewed map folds its running Jacobian products into log space every this many channels
#: (each factor is within exp(+-MAX_SKEW), so a product of 32 stays far from overflow).
_FOLD_CHANNELS = 32


@njit(cache=True, error_model="numpy")
def _skew_forward_rows(start, stop, X, U, logd, comp, bg, u_clip, z_max, eps_abs):
    """Rosenblatt map of background + K skewed components laid out with the
    component index innermost (``comp``, a :class:`ComponentsInner`): the same
    map and log density as :func:`_gmm_forward_rows` with ``comp.skewed``, to
    rounding (~1e-14).

    Instead of one log per channel and component for the transforms' Jacobians,
    their running product is kept per component and its log taken only for the
    components that can weigh in a channel's CDF: ``eps_abs`` (d, K), each
    transform's |skew| (+ a margin), bounds each factor's log, so a component
    whose bound lies more than 40 nats below the best's lower bound is left out
    without its log, as :func:`_gmm_forward_rows` leaves it out after it."""
    logw, means_t, chol_t, inv_sd, log_sd, skew = (comp.logw, comp.means_t, comp.chol_t, comp.inv_sd,
                                                   comp.log_sd, comp.skew)
    d, K = means_t.shape
    lwg = np.empty(K)    # log weight + the Gaussian terms so far (no Jacobians since the last fold)
    jp = np.empty(K)     # product of the Jacobian factors since the last fold
    bnd = np.empty(K)    # bound of |log jp|
    lw = np.empty(K)
    m = np.empty(K)
    z = np.empty((d, K))
    for i in range(start, stop):
        lw0 = logw[0]
        for k in range(K):
            lwg[k] = logw[k + 1]
            jp[k] = 1.0
            bnd[k] = 0.0
        for j in range(d):
            x = X[i, j]
            lbg = bg_logpdf(x, j, bg, z_max)
            # the CDF weights given the channels before j
            lo = lw0
            for k in range(K):
                lo = max(lo, lwg[k] - bnd[k])
            mx = lw0
            for k in range(K):
                if lwg[k] + bnd[k] - lo >= -40.0:
                    lw[k] = lwg[k] + math.log(jp[k])
                    mx = max(mx, lw[k])
                else:
                    lw[k] = -np.inf
            s = 0.0
            acc = 0.0
            g = lw0 - mx
            if g >= -40.0:
                p = math.exp(g)
                s += p
                acc += p * bg_cdf(x, j, bg, z_max)
            conditional_means(m, means_t, chol_t, z, j)
            for k in range(K):
                y, jac = skew_y(x, skew, j, k)
                zz = min(max((y - m[k]) * inv_sd[j, k], -z_max), z_max)
                z[j, k] = zz
                lwg[k] += -0.5 * zz * zz - _LOG_SQRT_2PI - log_sd[j, k]
                jp[k] *= jac
                bnd[k] += eps_abs[j, k]
            for k in range(K):
                g = lw[k] - mx
                if g < -40.0:
                    continue
                p = math.exp(g)
                s += p
                acc += p * ndtr(z[j, k])
            u = acc / s
            U[i, j] = min(max(u, u_clip), 1.0 - u_clip)
            lw0 += lbg
            if (j + 1) % _FOLD_CHANNELS == 0:
                for k in range(K):
                    lwg[k] += math.log(jp[k])
                    jp[k] = 1.0
                    bnd[k] = 0.0
        mx = lw0
        for k in range(K):
            lw[k] = lwg[k] + math.log(jp[k])
            mx = max(mx, lw[k])
        acc = math.exp(lw0 - mx)
        for k in range(K):
            acc += math.exp(lw[k] - mx)
        logd[i] += mx + math.log(acc)


@njit(cache=True, parallel=True, error_model="numpy")
def _skew_forward_par(X, U, logd, comp, bg, u_clip, z_max, eps_abs):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _skew_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, U, logd, comp, bg, u_clip, z_max, eps_abs)


def skew_forward(X, U, logd, comp, bg, u_clip, z_max):
    """Rosenblatt map of a skewed-component mixture (``comp`` a :class:`ComponentsInner`):
    U (n, d) written, its log density added to logd (n,); see :func:`_skew_forward_rows`."""
    d, K = comp.means_t.shape
    # |log J| <= |eps| for J = cosh(eps) - u sinh(eps), |u| < 1; the margin covers rounding
    eps_abs = np.ascontiguousarray(np.arcsinh(np.abs(comp.skew[3])) + 1e-9)
    args = (X, U, logd, comp, bg, float(u_clip), float(z_max), eps_abs)
    if parallel(X.shape[0], 4 * (K + 1) * d * (d + 10)):
        _skew_forward_par(*args)
    else:
        _skew_forward_rows(0, X.shape[0], *args)


@njit(cache=True, parallel=True, error_model="numpy")
def _gmm_forward_par(X, U, logd, comp, bg, u_clip, z_max, want_u):
    n = X.shape[0]
    nb = (n + BLOCK - 1) // BLOCK
    for b in prange(nb):
        _gmm_forward_rows(b * BLOCK, min(n, (b + 1) * BLOCK), X, U, logd, comp, bg, u_clip, z_max, want_u)


def gmm_forward(X, U, logd, comp, bg, u_clip, z_max, want_u=True):
    """Rosenblatt map of the mixture base; see :func:`_gmm_forward_rows`.
    ``want_u=False``: only the log density (U is not touched, its CDFs not computed)."""
    args = (X, U, logd, comp, bg, float(u_clip), float(z_max), bool(want_u))
    K, d = comp.means.shape
    cost = (4 if want_u else 1) * (K + 1) * d * (d + 2 + (8 if comp.skewed else 0))
    if parallel(X.shape[0], cost):
        _gmm_forward_par(*args)
    else:
        _gmm_forward_rows(0, X.shape[0], *args)


def gmm_logpdf(X, logd, comp, bg, z_max):
    """Log density of the mixture base (Gaussian components) added to logd:
    :func:`gmm_forward` without its CDFs."""
    gmm_forward(X, np.empty((0, X.shape[1])), logd, comp, bg, 0.0, z_max, want_u=False)
