"""Fitting the mixture base: the component-count search by held-out
log-likelihood (Gaussian components by EM), then skewed components
(:mod:`core.density.skew_fit`); its settings in one record
(:class:`MixtureSettings`)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..progress import keep_going
from . import kernels
from .correlation_prior import split_groups
from .em import HeldOut, em_from_kmeans, em_iterations, split_components
from .mixture_average import blend_pair
from .mixture_base import MixtureBase, background_logpdf
from .skew_fit import SkewFit, initial_flat_background

#: Component counts tried in turn (held-out log-likelihood picks one).
DEFAULT_COMPONENTS = (1, 2, 4, 8, 16, 32, 64)
#: From this count on, a doubled count always starts from the split of the
#: previous mixture, even a split one (a fresh k-means++ start costs more
#: EM iterations there and was no better: EXPERIMENTS.md section 22).
SPLIT_SPLIT_FROM = 64
#: From ``SPLIT_SPLIT_FROM`` components on, a larger count must beat the
#: smaller by this many standard errors of the paired held-out difference.
COUNT_SE = 2.0
#: Held-out events followed during each count's EM (evenly spread over the
#: held-out subsample): a count is abandoned once it projects short of the best
#: count's value on the same events plus ``min_gain`` (:func:`core.density.em.em_iterations`).
FOLLOW_EVENTS = 4096


@dataclass(frozen=True)
class MixtureSettings:
    """How the mixture base is fitted (see :func:`fit_mixture`).

    components: counts tried in turn; random_state: seed; max_em_events: most
    events EM runs on; max_iter, tol: EM stops after max_iter steps or when the
    training mean log-likelihood rises by less than tol (nats per event);
    n_init: k-means++ restarts per count; min_gain: least held-out gain (nats
    per event) of a larger count or of the skewed refit; skew: refit with skewed
    components; flat_background: a flat-top background instead of the logistic;
    corr_prior: from ``SPLIT_SPLIT_FROM`` components on, pseudo-events of the
    pooled correlation of the components split from one ancestor (the last
    k-means++ start) that each component's correlation is pulled toward, in the
    Gaussian and the skewed EM (:mod:`core.density.correlation_prior`); 0: none;
    blend_race: when two skewed fits race (from ``SPLIT_SPLIT_FROM`` components
    on), the candidate is their blend with the held-out share's weight
    (:func:`core.density.mixture_average.blend_pair`) when it scores better;
    final_em_events: when larger than max_em_events, the count search runs on
    max_em_events events and the skewed refit of the chosen count(s) on up to
    this many (EXPERIMENTS.md section 32); 0: max_em_events for both;
    final_per_component: with final_em_events, the refit's events are at most this
    many per component of the chosen Gaussian count (never fewer than the
    search's); 0: no such limit."""
    components: tuple = DEFAULT_COMPONENTS
    random_state: int | None = None
    max_em_events: int = 50_000
    max_iter: int = 100
    tol: float = 1e-3
    n_init: int = 1
    min_gain: float = 2e-3
    skew: bool = True
    flat_background: bool = False
    corr_prior: float = 0.0
    blend_race: bool = False
    final_em_events: int = 0
    final_per_component: int = 0


def clearly_better(new, old, min_gain, strict):
    """True when per-event held-out log densities ``new`` (m,) beat ``old`` (m,) by
    more than ``min_gain`` nats per event on average; with ``strict`` also by more
    than ``COUNT_SE`` standard errors of the paired difference (a count with many
    parameters per held-out event can win on noise: EXPERIMENTS.md section 22)."""
    diff = new - old
    gain = float(diff.mean())
    if strict and diff.size > 1:
        return gain > max(min_gain, COUNT_SE * float(diff.std(ddof=1)) / math.sqrt(diff.size))
    return gain > min_gain


def _em_sample(X, validation, max_em_events, rng):
    """(training events, held-out events) for the search: at most ``max_em_events``
    training events; without ``validation`` an 80/20 split of them, else at most
    ``max_em_events // 4`` of the validation events."""
    X = np.asarray(X, dtype=np.float64)
    if X.shape[0] > max_em_events:
        X = X[np.sort(rng.choice(X.shape[0], max_em_events, replace=False))]
    if validation is None:
        perm = rng.permutation(X.shape[0])
        n_va = max(1, X.shape[0] // 5)
        return X[np.sort(perm[n_va:])], X[np.sort(perm[:n_va])]
    Xva = np.ascontiguousarray(validation, dtype=np.float64)
    if Xva.shape[0] > max_em_events // 4:
        Xva = Xva[np.sort(rng.choice(Xva.shape[0], max_em_events // 4, replace=False))]
    return X, Xva


class _Stop:
    """The progress callback's answer, remembered: once False, it stays False."""

    def __init__(self, progress):
        self.progress = progress
        self.stopped = False

    def going(self, step, total, stage) -> bool:
        self.stopped = self.stopped or not keep_going(self.progress, step, total, stage)
        return not self.stopped


def fit_mixture(X, loc, scale, settings: MixtureSettings | None = None, validation=None, progress=None,
                cls=MixtureBase) -> MixtureBase:
    """Fit by EM (float64) and choose the number of Gaussian components by
    held-out log-likelihood.

    X : (n, d) events in the units of the channels; loc, scale : (d,) the
    background logistic's location and scale.  A seeded random subsample of
    at most ``settings.max_em_events`` events is split 80/20: EM runs on the 80 %
    for each count in ``settings.components`` (increasing), the 20 % scores it
    (given ``validation`` (m, d), EM runs on the whole subsample and a
    subsample of at most ``max_em_events // 4`` validation events scores); the
    search stops at the first count that does not beat the best so far by
    more than ``settings.min_gain`` nats per event, and the best is kept.  A count
    that doubles a k-means++-started one starts from that mixture with each
    component split in two along its principal axis (1, 4, 16 start from
    k-means++, 2, 8, 32 from the split): better and faster than a fresh
    start, while splitting a split compounds poor starts (EXPERIMENTS.md
    section 17); from ``SPLIT_SPLIT_FROM`` (64) on a count starts from the
    split of the previous one whichever way that one started.  EM stops
    when the training mean log-likelihood rises by less than ``settings.tol`` nats
    per event (or after ``settings.max_iter`` steps).  ``settings.n_init`` seeded
    k-means++ restarts per count (best training log-likelihood kept).
    Covariances get ``1e-6 x`` the channel variance added on the diagonal
    (floor).  With ``settings.skew``, the chosen mixture is then refitted with a
    sinh-arcsinh transform per component and channel (:class:`core.density.skew_fit.SkewFit`),
    kept only if it beats it on the held-out events by ``settings.min_gain``; when
    the chosen count is ``SPLIT_SPLIT_FROM`` (64) or more, the count before
    it is refitted with skewed components too and the larger skewed
    mixture is the candidate only when it beats the smaller clearly
    (:func:`clearly_better`; counts from 64 on must also beat the one
    before by ``COUNT_SE`` standard errors of the held-out difference).
    With ``settings.flat_background`` the background component is a flat top with
    soft edges per channel (:func:`core.density.skew_fit.initial_flat_background`), whose
    edges and softness the skewed-component fit also updates
    (:func:`core.density.skew_fit.flat_background_step`); else the logistic of ``loc``, ``scale``.

    ``progress(step, total, info)`` (:mod:`core.progress`) is called before
    each component count and after each EM iteration, with ``info`` a dict
    whose "stage" says what runs; returning False stops the search: the
    best mixture so far is kept (a count interrupted mid-EM is used only
    when no count has finished).
    """
    s = settings or MixtureSettings()
    rng = np.random.default_rng(s.random_state)
    X, Xva = _em_sample(X, validation, max(s.max_em_events, s.final_em_events), rng)
    X_final = X
    if s.final_em_events > s.max_em_events:  # the search on a subsample, the skewed refit on all
        X, Xva = _em_sample(X, Xva, s.max_em_events, rng)
    loc = np.asarray(loc, np.float64)
    scale = np.asarray(scale, np.float64)
    stop = _Stop(progress)
    reg = _regularisation(X, scale)
    best, best_scores, runner_up = _search_count(cls, X, Xva, loc, scale, reg, s, rng, stop)
    if s.skew and not stop.stopped and best.n_components:
        X_final = _refit_events(X_final, X, best.n_components, s, rng)
        best = _skewed_candidate(X_final, Xva, best, best_scores, runner_up, reg, s, stop)
    best.cancelled = stop.stopped
    return best


def _refit_events(X_final, X, k, s, rng):
    """The events (m, d) the skewed refit of a ``k``-component choice runs on: the
    search's X when ``X_final`` is X, else a seeded subsample of ``X_final`` of at most
    ``s.final_per_component`` x k events (all of them without that limit), and X
    when that would be no more events than the search's."""
    if X_final is X or not s.final_per_component:
        return X_final
    m = min(X_final.shape[0], int(s.final_per_component) * int(k))
    if m <= X.shape[0]:
        return X
    if m < X_final.shape[0]:
        X_final = X_final[np.sort(rng.choice(X_final.shape[0], m, replace=False))]
    return X_final


def _regularisation(X, scale):
    """Diagonal covariance floor (d,): 1e-6 x each channel's variance (scale^2 where constant)."""
    var = X.var(axis=0)
    return 1e-6 * np.where(var > 0, var, scale ** 2)


def _search_count(cls, X, Xva, loc, scale, reg, s, rng, stop):
    """Gaussian components for each count in turn; returns (best mixture, its
    held-out log densities, the count before it)."""
    n, d = X.shape
    components = s.components
    bgr = initial_flat_background(X) if s.flat_background else None
    bg = background_logpdf(X, loc, scale, bgr)
    # the held-out events an EM run follows (every other count's target is taken on the same ones)
    follow = np.linspace(0, Xva.shape[0] - 1, min(Xva.shape[0], FOLLOW_EVENTS)).astype(np.int64)
    bg_all = background_logpdf(Xva, loc, scale, bgr)
    bg_va = np.ascontiguousarray(bg_all[follow])
    best, best_scores, runner_up = None, None, None
    prev_fit, prev_fresh, groups = None, False, None
    for step, k in enumerate(components):
        if best is not None and k * (d + 1) > n:
            break  # too few events for this many components (k = 1 is always fitted)
        stage = {"stage": f"Fitting the Gaussian-mixture base: {k} component{'s' if k > 1 else ''}"}

        def going(step=step, stage=stage):
            return stop.going(step, len(components), stage)

        if best is not None and not going():
            break
        parent = None  # split a k-means++-started mixture, never a split one
        if prev_fit is not None and (prev_fresh or k >= SPLIT_SPLIT_FROM) \
                and k == 2 * prev_fit[2].shape[0]:
            parent = split_components(prev_fit[1], prev_fit[2], prev_fit[3])
        shrink = None  # components split from one k-means++ start share a group
        if parent is not None and s.corr_prior > 0 and k >= SPLIT_SPLIT_FROM:
            shrink = (split_groups(groups), float(s.corr_prior))
        # no abandonment under the correlation prior: its pull can lower the held-out value for
        # a few steps before the count wins (50,000 x 30: 64 abandoned, then 32 + 6 trees kept,
        # 0.31 nats worse than with 64)
        target = -np.inf if best is None or shrink is not None else \
            float(best_scores[follow].mean()) + s.min_gain
        fit_k, fit_fresh = _fit_count(X, bg, k, parent, reg, rng, s, going, stop,
                                      HeldOut(np.ascontiguousarray(Xva[follow]), bg_va, target), shrink)
        if fit_k[4] or (stop.stopped and best is not None):
            break  # abandoned: it would not have reached the held-out gain it needs
        prev_fit, prev_fresh = fit_k, fit_fresh
        groups = np.arange(k) if fit_fresh else split_groups(groups)
        _, w, mu, cov, _ = fit_k
        model = cls(w, mu, cov, loc, scale, background=bgr)
        model.shrink_groups = groups if shrink is not None else None
        scores = heldout_logpdf(model, Xva, bg_all)
        if best is not None and not clearly_better(scores, best_scores, s.min_gain, k >= SPLIT_SPLIT_FROM):
            break
        runner_up = best
        best, best_scores = model, scores
        if stop.stopped:
            break
    return best, best_scores, runner_up


def heldout_logpdf(model: MixtureBase, X, bg) -> np.ndarray:
    """Log density (n,) of events X (n, d) under a Gaussian ``model`` whose background
    log density on them is ``bg`` (n,), by the EM's pruned E step
    (:func:`core.density.kernels.em_logpdf`): :meth:`MixtureBase.logpdf` to ~1e-13
    nats, 3-6x faster from 16 channels on (EXPERIMENTS.md section 29)."""
    log_det = np.log(np.diagonal(model.chol, axis1=1, axis2=2)).sum(axis=1)
    return kernels.em_logpdf(np.ascontiguousarray(X), bg, model.log_weights, model.means, model.chol, log_det)


def _fit_count(X, bg, k, parent, reg, rng, s, going, stop, heldout=None, shrink=None):
    """EM for k components, ``n_init`` times (the first from ``parent``, the split
    of the previous mixture, when given, with the correlation prior ``shrink``
    (groups, pseudo-events) or None); returns (best fit, started fresh).  With
    ``heldout`` (:class:`core.density.em.HeldOut`) an attempt that cannot reach
    its target is abandoned (:func:`core.density.em.em_iterations`); the fit is
    marked abandoned (its fifth entry) only when every attempt was."""
    fit_k, fit_fresh = None, False
    for attempt in range(max(1, int(s.n_init))):
        split_start = parent is not None and attempt == 0
        if split_start:
            cand = em_iterations(X, bg, *parent, reg, s.max_iter, s.tol, going, shrink, heldout)
        else:
            cand = em_from_kmeans(X, bg, k, reg, rng, s.max_iter, s.tol, going, heldout)
        if fit_k is not None and cand[4]:
            continue
        if fit_k is None or fit_k[4] or cand[0] > fit_k[0]:
            fit_k, fit_fresh = cand, not split_start
        if stop.stopped:
            break
    return fit_k, fit_fresh


def _skewed_candidate(X, Xva, best, best_scores, runner_up, reg, s, stop):
    """The chosen Gaussian mixture refitted with skewed components, kept when it
    beats it on the held-out events by ``min_gain``.  From ``SPLIT_SPLIT_FROM``
    components on, the Gaussian count's gain may be skew that fewer skewed
    components capture better: the count before is skewed too, side by side
    (:func:`_race`), and the larger is the candidate only when it beats the
    smaller clearly (EXPERIMENTS.md sections 22 and 24)."""
    n_steps = len(s.components)
    starts = [best]
    if best.n_components >= SPLIT_SPLIT_FROM and runner_up is not None and runner_up.n_components:
        starts.append(runner_up)
    fits = [SkewFit(X, start, reg, s.max_iter, s.tol, Xva, _shrink(start, s)) for start in starts]
    stage = {"stage": "Fitting the mixture base: skewed components "
                      f"({' and '.join(str(f.n_components) for f in fits)})"}
    if not stop.going(n_steps - 1, n_steps, stage):
        return best
    _race(fits, lambda: stop.going(n_steps - 1, n_steps, stage))
    fits = [(f.best, f.best_scores) for f in fits if f.best is not None]
    blend = blend_pair(*fits, s.min_gain) if len(fits) == 2 and s.blend_race else None
    if blend is not None:
        fits = [blend]
    if len(fits) == 2 and not clearly_better(fits[0][1], fits[1][1], s.min_gain, True):
        fits = fits[1:]   # the larger count must beat the smaller clearly
    if fits and float(fits[0][1].mean()) > float(best_scores.mean()) + s.min_gain:
        return fits[0][0]
    return best


def _shrink(model, s):
    """The correlation prior (groups, pseudo-events) a Gaussian mixture of the
    search was fitted with, for its skewed refit; None when it had none."""
    groups = getattr(model, "shrink_groups", None)
    return None if groups is None else (groups, float(s.corr_prior))


#: Two skewed fits run side by side; the one behind is dropped once the gap
#: exceeds this many times its latest held-out gain per step (successive gains
#: shrink by about a third a step, so all that is left to it is about twice the
#: latest: EXPERIMENTS.md section 24).
RACE_GAP = 3.0


def _race(fits, going):
    """Step the skewed fits in turn until each is done; a fit that trails another
    clearly (:func:`clearly_better`) by more than ``RACE_GAP`` times its own latest
    held-out gain stops there (the larger count is then the smaller's loss, or the
    reverse, without paying for every step of both)."""
    live = list(fits)
    while live:
        for f in list(live):
            if not f.step(going):
                live.remove(f)
        if len(fits) == 2 and all(f.best_scores is not None for f in fits):
            a, b = sorted(fits, key=lambda f: f.best_heldout)
            gap = b.best_heldout - a.best_heldout
            if a in live and gap > RACE_GAP * max(a.last_gain, 0.0) and \
                    clearly_better(b.best_scores, a.best_scores, 0.0, True):
                a.done = True
                live.remove(a)
