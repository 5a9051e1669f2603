"""Pairwise density grids and HDR contour levels (core/contours.py).

Reference density: a two-component bivariate normal mixture from scipy.stats.
Its true HDR levels are computed here independently of core/: by quadrature on
a fine grid (sort the cells by density, accumulate mass x cell area, read the
density where the cumulated mass reaches p).
"""

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from core.contours import hdr_levels, pair_density, pair_density_from_model
from core.errors import EventDataError

W = np.array([0.7, 0.3])
MEANS = [np.array([1.0, 2.0]), np.array([3.0, 0.5])]
COVS = [np.array([[0.30, 0.12], [0.12, 0.20]]), np.array([[0.15, -0.05], [-0.05, 0.40]])]
MASSES = (0.5, 0.9, 0.99)


class MixtureModel:
    """The reference mixture with the density-model interface (scipy.stats)."""

    comps = [stats.multivariate_normal(m, c) for m, c in zip(MEANS, COVS)]

    def sample(self, n, random_state=None):
        rng = np.random.default_rng(random_state)
        k = rng.choice(2, size=n, p=W)
        out = np.empty((n, 2))
        for j, comp in enumerate(self.comps):
            sel = k == j
            out[sel] = comp.rvs(size=int(sel.sum()), random_state=rng).reshape(-1, 2)
        return out

    def score_samples(self, X):
        X = np.asarray(X, dtype=float)
        return np.atleast_1d(logsumexp([np.log(w) + np.atleast_1d(c.logpdf(X)) for w, c in zip(W, self.comps)], axis=0))


def grid_truth_levels(model, masses, lo=(-1.5, -2.5), hi=(5.5, 4.5), n=1200):
    # reference: quadrature of the true density on a fine grid (midpoint rule)
    xs = np.linspace(lo[0], hi[0], n + 1)
    ys = np.linspace(lo[1], hi[1], n + 1)
    xc, yc = 0.5 * (xs[1:] + xs[:-1]), 0.5 * (ys[1:] + ys[:-1])
    gx, gy = np.meshgrid(xc, yc, indexing="ij")
    dens = np.exp(model.score_samples(np.column_stack([gx.ravel(), gy.ravel()])))
    area = (xs[1] - xs[0]) * (ys[1] - ys[0])
    order = np.sort(dens)[::-1]
    cum = np.cumsum(order) * area
    assert abs(cum[-1] - 1) < 1e-3  # the grid holds the whole mass
    return {m: float(np.log(order[np.searchsorted(cum, m)])) for m in masses}


@pytest.fixture(scope="module")
def truth():
    model = MixtureModel()
    return model, grid_truth_levels(model, MASSES)


# Data seeds of the fitted-pair tests: 5, then the two of 5, 11..17 whose fitted
# 99 % level was furthest from the truth (measured 2026-12-02: -3.66 % and
# -2.23 % with Sobol levels), so a pass is not one lucky draw.
FIT_SEEDS = (5, 13, 17)


@pytest.fixture(scope="module", params=FIT_SEEDS)
def fitted(truth, request):
    model, _ = truth
    data = model.sample(40_000, random_state=request.param)
    train, held = data[:20_000], data[20_000:]
    return pair_density(train, grid_size=64, random_state=0), held


def test_levels_of_the_true_density_match_quadrature(truth):
    model, true_levels = truth
    pdn = pair_density(model.sample(2000, random_state=1), model=model, n_level_samples=400_000)
    for m in MASSES:
        # within 5 % in density (Monte Carlo error of a quantile of 400,000 draws)
        assert abs(np.exp(pdn.levels[m] - true_levels[m]) - 1) < 0.05, (m, pdn.levels[m], true_levels[m])
    assert list(pdn.density_levels) == list(MASSES)


def test_grid_is_x_first_and_holds_the_model_density(truth):
    model, _ = truth
    pdn = pair_density(model.sample(5000, random_state=2), model=model, grid_size=40)
    assert pdn.log_density.shape == (40, 40)
    assert pdn.x_edges.shape == (41,) and pdn.x_centres.shape == (40,)
    np.testing.assert_allclose(pdn.x_centres, 0.5 * (pdn.x_edges[1:] + pdn.x_edges[:-1]))
    for ix, iy in [(0, 0), (5, 30), (39, 12), (20, 20)]:
        want = model.score_samples(np.array([[pdn.x_centres[ix], pdn.y_centres[iy]]]))[0]
        assert pdn.log_density[ix, iy] == pytest.approx(want, rel=1e-12)
    # the grid covers the data (0.1-99.9 % quantiles plus margin)
    assert pdn.x_edges[0] < 0.0 and pdn.x_edges[-1] > 3.8


def test_mass_in_grid_cells_above_each_level_is_nominal(truth):
    model, _ = truth
    pdn = pair_density(model.sample(20_000, random_state=3), model=model, grid_size=256,
                       x_range=(-1.5, 5.5), y_range=(-2.5, 4.5), n_level_samples=400_000)
    area = np.diff(pdn.x_edges)[0] * np.diff(pdn.y_edges)[0]
    dens = np.exp(pdn.log_density)
    for m, lv in pdn.levels.items():
        # reference: midpoint-rule integral of the density over {f >= level}
        assert abs(dens[pdn.log_density >= lv].sum() * area - m) < 0.01


@pytest.mark.parametrize("mass", MASSES)
def test_fitted_pair_levels_match_the_true_levels(fitted, truth, mass):
    # measured 2026-12-02 (n = 20,000, 8 data seeds, Sobol levels of 2**17 draws):
    # 99 % level -1.2 % on average (-3.7 % at worst), 50 % / 90 % within 2.3 %
    _, true_levels = truth
    pdn, _ = fitted
    rel = abs(np.exp(pdn.levels[mass] - true_levels[mass]) - 1)
    assert rel < 0.05, (mass, np.exp(pdn.levels[mass]), np.exp(true_levels[mass]))


def test_levels_of_a_fitted_model_match_quadrature_of_its_own_density(truth):
    # The levels are quantiles over the model's own draws; here they are checked
    # against the fitted model's exact density integrated on a fine grid
    # (reference: midpoint-rule quadrature, as for the true levels above), which
    # isolates the Monte Carlo error from the model's error.  Measured spread of
    # the 99 % level over seeds of the draws (2026-12-02): 0.7 % with 2**17 Sobol
    # points, 3.5 % with as many pseudo-random draws.
    model, _ = truth
    pdn = pair_density(model.sample(20_000, random_state=5), grid_size=16, random_state=0)
    exact = grid_truth_levels(pdn.model, MASSES, n=1000)
    for m in MASSES:
        assert abs(np.exp(pdn.levels[m] - exact[m]) - 1) < 0.015, (m, pdn.levels[m], exact[m])
    # another seed of the draws gives the same levels within the same tolerance
    again = hdr_levels(pdn.model, MASSES, random_state=1)
    for m, v in zip(MASSES, again):
        assert abs(np.exp(v - exact[m]) - 1) < 0.015, (m, v, exact[m])
    # Over several seeds, the Sobol levels are much closer to the quadrature
    # than levels from as many pseudo-random draws (the model's ``sample``):
    # rms error in density over 6 seeds of the draws, 2**15 each.
    class SamplerOnly:  # the model seen through sample / score_samples only
        sample = staticmethod(pdn.model.sample)
        score_samples = staticmethod(pdn.model.score_samples)

    truth_levels = np.array([exact[m] for m in MASSES])
    seeds = range(10, 16)
    sob = np.array([hdr_levels(pdn.model, MASSES, 1 << 15, random_state=s) for s in seeds])
    rnd = np.array([hdr_levels(SamplerOnly(), MASSES, 1 << 15, random_state=s) for s in seeds])
    err_sob = np.sqrt(np.mean((np.exp(sob - truth_levels) - 1) ** 2, axis=0))
    err_rnd = np.sqrt(np.mean((np.exp(rnd - truth_levels) - 1) ** 2, axis=0))
    # measured 2026-12-02 (four blocks of 6 seeds): 0.03-0.06 / 0.08-0.34 /
    # 0.4-1.6 % at 50 / 90 / 99 % (Sobol) vs 0.4-0.8 / 1.0-2.0 / 2.4-6.3 %
    # (random), ratio 0.04-0.33
    assert np.all(err_sob < 0.6 * err_rnd), (err_sob, err_rnd)


def test_heldout_events_inside_each_contour_share_nominal(fitted):
    pdn, held = fitted
    inside = pdn.share_inside(held)
    for m in MASSES:
        assert abs(inside[m] - m) < 0.015, (m, inside[m])


def test_bad_input_and_nan_rows():
    with pytest.raises(EventDataError, match="shape"):
        pair_density(np.zeros((10, 3)), model=MixtureModel())
    model = MixtureModel()
    xy = model.sample(1000, random_state=4)
    xy[:10, 0] = np.nan
    pdn = pair_density(xy, model=model, grid_size=16, n_level_samples=1000)
    assert pdn.n_events == 990


def test_marginalising_a_model_by_its_sampler_recovers_the_pair():
    # a 3-channel model whose first two channels are the mixture and the third independent noise
    class Padded(MixtureModel):
        def sample(self, n, random_state=None):
            xy = super().sample(n, random_state)
            z = np.random.default_rng(99).normal(size=(n, 1))
            return np.hstack([xy, z])

    pdn = pair_density_from_model(Padded(), 0, 1, n_samples=20_000, grid_size=32, random_state=0)
    held = MixtureModel().sample(20_000, random_state=7)
    inside = pdn.share_inside(held)
    for m in MASSES:
        assert abs(inside[m] - m) < 0.02, (m, inside[m])
