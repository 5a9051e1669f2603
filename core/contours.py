"""Pairwise density grids and highest-density-region (HDR) contour levels.

For a pair of channels (x, y) the plots show the density of the pair on a grid
and the contours of the highest-density regions holding 50, 90 and 99 % of the
probability mass: the region {f >= t_p} with P(f(X, Y) >= t_p) = p.

Where the pairwise density comes from (design decision)
-------------------------------------------------------
We fit a separate two-channel :class:`~core.density.AdditiveTreeDensity` to the
pair's values (the default), rather than marginalising the full d-channel model.

* A 2-D additive tree density is an exact, normalised density of the pair: the
  grid is its log density evaluated at the cell centres, and the HDR levels
  are exact for it up to Monte Carlo error, taken as quantiles of its log density
  over its own draws (:func:`core.rare.hdr_levels`, re-exported here).
* The full model has no closed-form margin: marginalising it needs its sampler
  (draw many events, keep the two columns) followed by a second density
  estimate of the pair from those draws -- the same 2-D fit, on simulated
  events that carry the full model's errors.  :func:`pair_density_from_model`
  does that, for comparison.

Measured 2026-12-02 (``python tests/benchmarks/contrast_benchmark.py
--no-contrast --contours``; control tube of the sample scenario, 10 channels,
15,000 training and 15,000 held-out events; engine of that night, pair fits
with :data:`PAIR_ENGINE`, Sobol levels): held-out events inside the
50 / 90 / 99 % contours minus nominal, in points --

=============  ====================  ====================
pair           2-D fit of the pair   full model's sampler
=============  ====================  ====================
FL1-A x FL2-A  +0.03 -0.22 +0.05     +0.68 -0.56 -0.31
FL2-A x FL4-A  -1.51 -0.05 -0.07     -0.49 +0.51 +0.11
FL3-A x FL4-A  -0.93 -0.50 -0.01     -1.16 -0.15 +0.12
=============  ====================  ====================

mean absolute error 0.37 points for the 2-D fit vs 0.45 for the sampler
(0.50 / 0.61 on 2026-12-01 with plain Monte Carlo levels); 2.9-3.1 s vs
2.2-4.4 s per pair on a loaded machine, and the sampler also needs the full
10-channel model (6.6 s to fit here).  So :func:`pair_density` fits the pair
(default), which also works before or without a full fit.

HDR levels against the true density (2026-12-02; test mixture of
``tests/test_contours.py``, 20,000 training events per data seed, pair fit
with ``random_state=0``, true levels by quadrature of the scipy.stats
density; level error = fitted / true density level - 1, in %):

====  ===============  ==========================  ==========  ===============
data  99 %, 100,000    50 / 90 / 99 %,             99 %, the   held-out inside
seed  pseudo-random    2**17 Sobol draws (kept)    model's     minus nominal,
      draws, seed 0                                exact level  points
====  ===============  ==========================  ==========  ===============
5     -6.26            +1.64 +1.16 -1.29           -1.09       -0.26 -0.38 -0.05
11    -4.62            +1.76 +1.66 -0.36           +0.17       -1.37 -0.50 -0.08
12    -5.17            +0.85 +0.65 -1.05           -0.78       -0.01 +0.13 -0.01
13    -7.91            -1.32 -1.45 -2.23           -2.66       -0.45 -0.05 +0.00
14    -6.27            +1.08 +0.67 -1.66           -1.83       -0.07 -0.10 +0.03
15    -5.15            +2.22 +1.97 +0.39           +0.14       -0.18 -0.54 -0.11
16    -5.26            +1.44 +1.17 +0.06           -0.34       -0.38 -0.28 -0.10
17    -8.00            -1.85 -1.94 -3.66           -3.42       +0.79 +0.54 +0.22
====  ===============  ==========================  ==========  ===============

(the model's exact level: 2**20 Sobol draws of another seed, whose spread
is below 0.1 %.)  What made the 99 % level miss 5 %:

* Monte Carlo error of the quantile (most of it): with 100,000 pseudo-random
  draws the 99 % level's spread over the seed of the draws is 4.3 % (sd, mean
  over the data seeds), and seed 0 happens to sit about 5 % low for every
  model (mean -6.1 %, so the "6.6 % low" of 2026-12-01 was mostly that seed).
  Scrambled Sobol points through the model's exact inverse map (quasi-Monte
  Carlo) cut the spread to 0.7 % at 2**17 draws (0.1 % at 2**20), at the
  same cost (0.3-0.5 s for 2**17 here).
* The mixture's broad background component: EM stops with its weight near
  its 0.1 % start (6.6e-4 to 9.2e-4 here), which spreads that mass into the
  tails and lowers the 99 % level of the model itself by 1.2 % on average
  (-3.4 % at worst); started at its 1e-4 floor (an engine experiment, not
  in the engine) the weight ends at 1.1e-4 and the mean error is 0.0 % (sd
  1.2 %, worst -2.0 %).
* Not the cause (measured the same night with the engine of 00:30, 99 %
  level of the model itself, mean over the 8 data seeds; -1.7 % with the
  defaults of then): the component count (2, the truth, on every seed), the
  held-out share (0.1 instead of 0.2: -2.3 %), the marginal stage (without
  it: -1.8 %; the engine has since turned it off after the mixture base),
  the number of training events (40,000: -2.7 %, no better: the background
  weight, not the sample size, sets the bias).

Units and shapes
----------------
``values_xy``: (n_events, 2) float, transformed channel values (NaN rows are
ignored).  The grid is ``log_density[ix, iy]`` (natural log, per unit of x per
unit of y) at ``(x_centres[ix], y_centres[iy])`` -- x first, the order
pyqtgraph's ImageItem uses by default.  ``levels`` maps each mass (0.5, 0.9,
0.99) to a *log*-density level in the same units as the grid;
``density_levels`` gives them as densities.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from .density import AdditiveTreeDensity
from .errors import EventDataError
# The levels are computed in core.rare (one implementation for the contours and
# the rare rule "mass"); re-exported here.
from .rare import DEFAULT_LEVEL_SAMPLES, hdr_levels

__all__ = ["DEFAULT_LEVELS", "DEFAULT_LEVEL_SAMPLES", "PAIR_ENGINE", "PairDensity", "fit_pair_model",
           "grid_edges", "hdr_levels", "pair_density", "pair_density_from_model"]

DEFAULT_LEVELS = (0.5, 0.9, 0.99)
#: Engine settings for a pair (empty: the engine defaults).  Before the
#: engine started from a fitted Gaussian mixture, its defaults over-fitted two
#: channels and small trees with slow learning were used here (lr 0.1, depth 5,
#: min_leaf 20, 32 bins, no per-node shrinkage).  With the mixture base both
#: give the same levels on the test mixture, so the defaults are used (the
#: 99 % level: see the module docstring).  Keywords the engine does not know
#: are dropped (see :func:`fit_pair_model`).
PAIR_ENGINE: dict = {}


@dataclass
class PairDensity:
    """Density of one pair of channels on a grid plus HDR levels (see module docstring)."""

    x_edges: np.ndarray      # (grid_size + 1,)
    y_edges: np.ndarray      # (grid_size + 1,)
    x_centres: np.ndarray    # (grid_size,)
    y_centres: np.ndarray    # (grid_size,)
    log_density: np.ndarray  # (grid_size, grid_size), [ix, iy]
    levels: dict             # mass -> log-density level
    model: Any = None
    n_events: int = 0
    info: dict = field(default_factory=dict)

    @property
    def density_levels(self) -> dict:
        """``levels`` as densities (exp of the log levels)."""
        return {m: float(np.exp(v)) for m, v in self.levels.items()}

    def share_inside(self, values_xy: np.ndarray) -> dict:
        """Share of the given events (n x 2) inside each HDR contour, by mass.

        Uses the model's exact log density at the events (not the grid).
        """
        xy = _finite_rows(values_xy)
        ld = np.asarray(self.model.score_samples(xy), dtype=np.float64)
        return {m: float(np.mean(ld >= v)) for m, v in self.levels.items()}


def _finite_rows(values_xy) -> np.ndarray:
    xy = np.asarray(values_xy, dtype=np.float64)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise EventDataError(f"a density pair needs values of shape (events, 2); got {xy.shape}")
    return xy[np.all(np.isfinite(xy), axis=1)]


def grid_edges(values: np.ndarray, grid_size: int, lo_q: float = 0.001, hi_q: float = 0.999,
               pad: float = 0.05) -> np.ndarray:
    """Evenly spaced edges covering the ``lo_q``..``hi_q`` quantiles of ``values`` plus ``pad`` each side."""
    lo, hi = np.quantile(values, [lo_q, hi_q])
    if not hi > lo:
        lo, hi = float(np.min(values)), float(np.max(values))
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    span = hi - lo
    return np.linspace(lo - pad * span, hi + pad * span, int(grid_size) + 1)


def fit_pair_model(xy: np.ndarray, engine: Mapping | None = None, random_state: int = 0,
                   progress=None):
    """Fit a two-channel AdditiveTreeDensity to ``xy`` (n x 2, finite).

    Settings: :data:`PAIR_ENGINE` (those the engine accepts), overridden by ``engine``.
    """
    known = set(AdditiveTreeDensity.param_names())
    kwargs = {k: v for k, v in PAIR_ENGINE.items() if k in known}
    kwargs.update(engine or {})
    kwargs.setdefault("random_state", random_state)
    model = AdditiveTreeDensity(**kwargs)
    model.fit(xy, progress=progress)
    return model


def pair_density(values_xy: np.ndarray, model: Any = None, grid_size: int = 128,
                 levels: Sequence[float] = DEFAULT_LEVELS, random_state: int = 0,
                 engine: Mapping | None = None, n_level_samples: int = DEFAULT_LEVEL_SAMPLES,
                 x_range: tuple | None = None, y_range: tuple | None = None) -> PairDensity:
    """Density grid and HDR levels for one pair of channels.

    ``values_xy``: (n_events, 2) transformed values; rows with NaN/inf are ignored.
    ``model``: a fitted 2-channel density (``score_samples``/``sample``); when
    None a 2-D AdditiveTreeDensity is fitted to the pair (``engine`` keyword
    arguments, seeded by ``random_state``).  ``x_range``/``y_range``: (lo, hi)
    of the grid; default from the data's 0.1-99.9 % quantiles plus 5 % margin.
    Levels come from ``n_level_samples`` draws of the model (see :func:`hdr_levels`).
    """
    xy = _finite_rows(values_xy)
    if xy.shape[0] < 2:
        raise EventDataError(f"a density pair needs events with finite values; got {xy.shape[0]}")
    if model is None:
        model = fit_pair_model(xy, engine=engine, random_state=random_state)
    grid_size = int(grid_size)
    x_edges = np.linspace(*x_range, grid_size + 1) if x_range else grid_edges(xy[:, 0], grid_size)
    y_edges = np.linspace(*y_range, grid_size + 1) if y_range else grid_edges(xy[:, 1], grid_size)
    xc = 0.5 * (x_edges[:-1] + x_edges[1:])
    yc = 0.5 * (y_edges[:-1] + y_edges[1:])
    gx, gy = np.meshgrid(xc, yc, indexing="ij")
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    grid = np.asarray(model.score_samples(pts), dtype=np.float64).reshape(grid_size, grid_size)
    masses = [float(m) for m in levels]
    lv = hdr_levels(model, masses, n_samples=n_level_samples, random_state=random_state)
    return PairDensity(x_edges=x_edges, y_edges=y_edges, x_centres=xc, y_centres=yc,
                       log_density=grid, levels={m: float(v) for m, v in zip(masses, lv)},
                       model=model, n_events=int(xy.shape[0]))


def pair_density_from_model(full_model: Any, i: int, j: int, n_samples: int = 50_000,
                            random_state: int = 0, **kwargs) -> PairDensity:
    """Marginalise a fitted d-channel model onto channels (i, j) by its sampler.

    Draws ``n_samples`` events from ``full_model``, keeps columns i and j and
    fits a 2-D density to them (the margin has no closed form).  Kept for
    comparison with :func:`pair_density`; see the module docstring.
    """
    draws = np.asarray(full_model.sample(int(n_samples), random_state=random_state), dtype=np.float64)
    return pair_density(draws[:, [i, j]], random_state=random_state, **kwargs)
