"""Rare events: the events of a file where the fitted density is lowest.

Two rules, both stored in the recipe's ``rare`` entry:

``{"rule": "share", "share": 0.005}``
    The lowest ``share`` of the kept events by log density (default 0.5 %).
    The count is ``round(share * n_kept)``; ties at the boundary are broken by
    event order (a stable sort), so the count is exact.

``{"rule": "mass", "mass": 0.995}``
    The events *outside* the highest-density region (HDR) that holds ``mass``
    of the probability: {x : f(x) >= t} with P_f(f(X) >= t) = mass.  The level
    ``t`` is the (1 - mass) quantile of log f over draws **from the model
    itself**, not over the training events: the training events sit where the
    fit made the density high, so their quantile is optimistic and flags too
    few events.  With the model's own draws the level is exact for the model
    up to the error of the quantile (:func:`hdr_levels`).
    It is only as right as the model's tails: measured on a 4-D normal
    (20,000 training events, engine of 2026-12-01), new events fell outside
    the model's 50 / 90 / 99 % regions 50.1 / 9.8 / 0.55 % of the time (the
    training events' quantiles: 51.4 / 11.0 / 1.15 %) -- the fitted tails are
    heavier than the truth, so at high masses this rule flags fewer events
    than nominal.  ``tests/test_rare.py`` tracks it.

The model's own draws (one implementation, used here and by
:mod:`core.contours` for its contour levels)
--------------------------------------------------------------------------
For a model with an exact inverse map from the unit cube (``inverse_transform``
and ``n_features_in_``, as :class:`~core.density.AdditiveTreeDensity`) the
draws are scrambled Sobol points (``scipy.stats.qmc.Sobol``, a power-of-two
count, seeded by ``random_state``) pushed through that map: each point is
still an exact draw from the model (the model's ``sample`` is the same map of
pseudo-random uniforms, at the same cost), but the set covers the cube more
evenly, so the quantile has a much smaller error (quasi-Monte Carlo).  Other
models (anything with ``sample`` / ``score_samples``) use their ``sample``.

Measured 2026-12-02, error of the density level exp(level) in % (sd over
seeds of the draws, or rms against the exact level where it is known):

============================  =========  ========================  ========================
model                         draws      pseudo-random             scrambled Sobol
                                         50 / 90 / 99 / 99.5 %     50 / 90 / 99 / 99.5 %
============================  =========  ========================  ========================
10-D normal, exact chi2       2**17      0.67 1.17 5.18 6.90       0.26 0.50 2.18 3.68
level, rms over 16 seeds
10-D fit of tube A of the     200,000    1.08 0.94 4.22 5.29
sample scenario (30,000       2**17      1.09 1.72 5.35 9.57       0.35 1.24 2.03 4.04
events), sd over 6 seeds
the same, other 10 seeds      200,000    0.72 1.43 2.79 5.73
                              2**17                                0.33 0.75 2.52 5.05
2-D fitted model, 99.5 %      200,000    2.83
                              2**18                                0.51
============================  =========  ========================  ========================

(the 2-D row: the fit of :mod:`core.contours`' test mixture.)  The gain
shrinks with the dimension: 4-30 times smaller errors on a 2-D normal (2**15
to 2**17 points), about 2 times on the 10-D normal and on the 10-D fit at
equal counts.  On the 10-D fit, 2**17 Sobol points give the 99 / 99.5 %
levels about as precisely as 200,000 pseudo-random draws (slightly better,
within the noise of 6-10 seeds) and the lower masses twice as precisely, for
two thirds of the cost: the same inverse map per point, ``rare_by_mass`` on
that fit in 6.6-7.9 s with 2**17 Sobol points against 10.3-11.6 s with
200,000 draws (shared 2-core machine; the Sobol points themselves take
0.1 s).  So the default is 2**17 (:data:`DEFAULT_LEVEL_SAMPLES`), below the
200,000 draws used before; callers wanting a tighter 99.5 % level in many
dimensions can pass ``n_samples=2**18`` or more.

Units: log densities are natural logs in the units of the values the model saw
(transformed channels).  Shapes: per-event arrays have length n_events; removed
events carry NaN log density and are never rare.

The rarity percentile of an event is the share (0-100) of the file's kept events
with strictly lower density: 0 for the rarest event, close to 100 for the most
typical one; NaN for removed events.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import EventDataError, RecipeError
from .recipe.records import RareRule

#: Default rule (stored form of :class:`core.recipe.RareRule`'s defaults): the lowest 0.5 % of events by density.
DEFAULT_RARE_RULE = RareRule().to_dict()

#: Number of the model's own draws used to find a probability-mass level (a
#: power of two: scrambled Sobol points; see the module docstring).  Used by
#: the rare rule "mass" and by the contour levels of :mod:`core.contours`.
DEFAULT_LEVEL_SAMPLES = 1 << 17


@dataclass
class RareResult:
    """Which events are rare and why.

    ``mask``: bool (n_events,); ``rule``: the rule dict used;
    ``log_level``: log-density threshold (events below it are rare; NaN when
    no events are kept); ``count``: number of rare events.
    """

    mask: np.ndarray
    rule: dict
    log_level: float
    count: int


def rarity_percentile(log_density: np.ndarray, order: np.ndarray | None = None) -> np.ndarray:
    """Share (0-100) of finite entries of ``log_density`` strictly below each entry.

    ``log_density``: (n_events,) float; NaN marks removed events, which get NaN.
    ``order``: :func:`share_order` of the same array when already computed (one
    sort serves the rarity and the rare rule).  Returns float64 (n_events,).
    An entry's count of strictly lower entries is the position of the first
    of its ties in the sorted order (one pass over the order, no search).
    """
    ld = np.asarray(log_density, dtype=np.float64).ravel()
    out = np.full(ld.shape, np.nan)
    if order is None:
        order = share_order(ld)
    n = int(order.size)
    if n == 0:
        return out
    srt = ld[order]
    first = np.empty(n, dtype=np.int64)
    first[0] = 0
    new = srt[1:] != srt[:-1]                      # where a run of ties starts
    first[1:] = np.where(new, np.arange(1, n), 0)
    np.maximum.accumulate(first, out=first)        # position of the run's first entry
    out[order] = 100.0 * first / n
    return out


def share_order(log_density: np.ndarray) -> np.ndarray:
    """Indices of the finite entries of ``log_density`` from the lowest up
    (ties by event order): the ranking :func:`rare_by_share` takes its first
    ``round(share * n_kept)`` from.  Sorting once and keeping the order lets a
    viewer move the share without sorting again (:func:`share_mask`)."""
    ld = np.asarray(log_density, dtype=np.float64).ravel()
    ok = np.flatnonzero(np.isfinite(ld))
    return ok[np.argsort(ld[ok], kind="stable")]


def share_mask(order: np.ndarray, share: float, n_events: int) -> np.ndarray:
    """Rare events at ``share`` from an ordering by :func:`share_order`:
    bool (n_events,), the same mask :func:`rare_by_share` gives."""
    mask = np.zeros(int(n_events), dtype=bool)
    mask[order[:int(round(float(share) * order.size))]] = True
    return mask


def rare_by_share(log_density: np.ndarray, share: float = RareRule.share,
                  order: np.ndarray | None = None) -> RareResult:
    """The ``round(share * n_kept)`` events with the lowest finite log density.

    ``share`` is a fraction in [0, 1] (0.005 = 0.5 %); ``order``: :func:`share_order`
    of the same array when already computed.
    """
    share = float(share)
    if not (0.0 <= share <= 1.0):
        raise RecipeError(f"rare share must be a fraction between 0 and 1 (0.005 = 0.5 %); got {share}")
    ld = np.asarray(log_density, dtype=np.float64).ravel()
    ok = np.flatnonzero(np.isfinite(ld))
    mask = np.zeros(ld.shape, dtype=bool)
    k = int(round(share * ok.size))
    level = float("nan")
    if k > 0:
        if order is None:
            order = share_order(ld)
        mask[order[:k]] = True
        level = float(ld[order[k]]) if k < ok.size else float("inf")
    elif ok.size:
        level = float(np.min(ld[ok]))
    return RareResult(mask=mask, rule={"rule": "share", "share": share}, log_level=level, count=int(k))


def sobol_draws(model: Any, n_samples: int, random_state: int | None = 0) -> np.ndarray:
    """``n_samples`` exact draws (n_samples, d) from ``model``: scrambled Sobol
    points of [0, 1]^d pushed through ``model.inverse_transform``.

    ``n_samples`` must be a power of two (the balance properties of a Sobol
    set hold for 2**m points); ``random_state`` seeds the scrambling.
    """
    # imported here: scipy.stats adds ~1.3 s to importing core
    from scipy.stats import qmc

    n = int(n_samples)
    m = n.bit_length() - 1
    if n < 1 or n != 1 << m:
        raise EventDataError(f"Sobol draws need a power-of-two count; got {n}")
    d = int(model.n_features_in_)
    try:
        sobol = qmc.Sobol(d, scramble=True, rng=random_state)
    except TypeError:  # scipy < 1.15 names the seed ``seed``
        sobol = qmc.Sobol(d, scramble=True, seed=random_state)
    U = sobol.random_base2(m)
    tiny = 2.0 ** -53  # as the model's own sampler clips its uniforms
    np.clip(U, tiny, 1.0 - tiny, out=U)
    return np.asarray(model.inverse_transform(U), dtype=np.float64)


def hdr_levels(model: Any, masses: Sequence[float], n_samples: int = DEFAULT_LEVEL_SAMPLES,
               random_state: int | None = 0) -> np.ndarray:
    """Log-density levels (float64 array, natural log, in the model's units) of
    the highest-density regions holding ``masses`` (fractions strictly between
    0 and 1; 0.995 = 99.5 %).

    The level for mass p is the (1 - p) quantile of ``model.score_samples``
    over ``n_samples`` of the model's own draws, all masses from one set of
    draws.  A model with an exact inverse map gets scrambled Sobol points
    (:func:`sobol_draws`; ``n_samples`` rounded up to a power of two); other
    models use ``model.sample(n_samples, random_state)``.  See the module
    docstring for the measured gain.
    """
    masses = np.asarray(masses, dtype=np.float64).ravel()
    if np.any(~(masses > 0.0) | ~(masses < 1.0)):
        raise RecipeError(f"probability mass must be strictly between 0 and 1 (0.995 = 99.5 %); got {masses.tolist()}")
    if n_samples < 100:
        raise EventDataError(f"at least 100 draws from the model are needed to find a density level; got {n_samples}")
    if hasattr(model, "inverse_transform") and hasattr(model, "n_features_in_"):
        n = 1 << (int(n_samples) - 1).bit_length()
        draws = sobol_draws(model, n, random_state=random_state)
    else:
        draws = np.asarray(model.sample(int(n_samples), random_state=random_state), dtype=np.float64)
    ld = np.asarray(model.score_samples(draws), dtype=np.float64)
    ld = ld[np.isfinite(ld)]
    if ld.size == 0:
        raise EventDataError("the model's own draws have no finite density; cannot set a density level")
    return np.quantile(ld, 1.0 - masses)


#: Former name of :func:`hdr_levels` (same function).
mass_levels = hdr_levels


def mass_level(model: Any, mass: float, n_samples: int = DEFAULT_LEVEL_SAMPLES,
               random_state: int | None = 0) -> float:
    """Log-density level of the highest-density region holding ``mass`` of the
    model: :func:`hdr_levels` for one mass (a float, natural log)."""
    return float(hdr_levels(model, [mass], n_samples, random_state)[0])


def rare_by_mass(log_density: np.ndarray, model: Any, mass: float = RareRule.mass,
                 n_samples: int = DEFAULT_LEVEL_SAMPLES, random_state: int | None = 0) -> RareResult:
    """Events whose log density is below the level of the HDR holding ``mass``.

    ``log_density``: (n_events,) from ``model.score_samples`` (NaN = removed).
    The level comes from ``n_samples`` of the model's own draws (:func:`hdr_levels`).
    """
    level = mass_level(model, mass, n_samples=n_samples, random_state=random_state)
    ld = np.asarray(log_density, dtype=np.float64).ravel()
    with np.errstate(invalid="ignore"):
        mask = np.isfinite(ld) & (ld < level)
    return RareResult(mask=mask, rule={"rule": "mass", "mass": float(mass)}, log_level=level,
                      count=int(mask.sum()))


def rare_events(log_density: np.ndarray, rule: RareRule | Mapping | None = None, model: Any = None,
                random_state: int | None = 0, n_samples: int = DEFAULT_LEVEL_SAMPLES,
                order: np.ndarray | None = None) -> RareResult:
    """Apply a recipe's rare rule (see module docstring); ``model`` is needed for "mass".

    ``rule``: a :class:`core.recipe.RareRule` (its stored-form dict is checked into
    one; None: the default rule); ``order``: :func:`share_order` of ``log_density``
    when already computed (the share rule then does not sort again)."""
    if not isinstance(rule, RareRule):
        rule = RareRule() if rule is None else RareRule.from_dict(rule)
    if rule.rule == "share":
        return rare_by_share(log_density, rule.share, order=order)
    if model is None:
        raise RecipeError("the rare rule 'mass' needs the fitted density model")
    return rare_by_mass(log_density, model, rule.mass, n_samples=n_samples, random_state=random_state)
