"""Synthetic cytometry-like event data with an exactly known log density.

Used by ``density_benchmark.py`` (held-out log-likelihood against the truth)
and checked by ``tests/test_density_scenarios.py``.

Every scenario is a finite mixture of populations whose densities are known
in closed form (change of variables, conditional products), plus a uniform
"debris" background over a box (5 % of events) and a rare population
(0.5 % of events).  Values look like transformed cytometry data: most
events lie in 0..5 (arcsinh-like units); tails may leave that range.

Shapes are always events x channels; all density math is float64; log
densities are natural logarithms (nats) with respect to Lebesgue measure
in the transformed units.

The *structure* of a scenario (population centres, spreads, correlations,
weights) depends only on its name and the number of channels ``d`` (fixed
internal seeds), so samples drawn with different seeds share one exact
density.  ``seed`` only drives the sampling.

Public entry points
-------------------
``build_<name>(d) -> Scenario`` and ``make_<name>(n, d, seed) -> (X, logpdf, labels)``
for ``name`` in ``SCENARIOS`` ("skewed", "heavy_tailed", "banana", "fan", "panel", and
"cyto": ten skewed fanning populations, for wide panels of 16-40 channels);
``make_scenario(name, n, d, seed)``; component classes ``JohnsonSUCopula``,
``Gaussian``, ``MultivariateT``, ``Banana``, ``Fan``, ``SkewWarp``, ``UniformBox``; ``Mixture``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import special, stats

#: Bumped whenever a scenario's distribution changes (invalidates cached baselines).
SCENARIO_VERSION = 1

BACKGROUND_WEIGHT = 0.05   # uniform debris share
RARE_WEIGHT = 0.005        # rare population share
BOX_LOW, BOX_HIGH = 0.0, 5.0   # debris box, per channel (transformed units)

_LOG_2PI = math.log(2.0 * math.pi)


# --------------------------------------------------------------------------- helpers

def _as_events(X: np.ndarray, d: int) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[1] != d:
        raise ValueError(f"expected events x {d} channels, got shape {X.shape}")
    return X


def _gauss_logpdf_std(Z: np.ndarray, chol: np.ndarray) -> np.ndarray:
    """log N(z; 0, L L^T) for rows z of Z (n x k), with L lower-triangular Cholesky factor."""
    from scipy.linalg import solve_triangular

    k = chol.shape[0]
    W = solve_triangular(chol, Z.T, lower=True)          # k x n
    maha = np.einsum("ij,ij->j", W, W)
    logdet = 2.0 * np.sum(np.log(np.diag(chol)))
    return -0.5 * (k * _LOG_2PI + logdet + maha)


def random_correlation(k: int, rng: np.random.Generator, strength: float = 0.6) -> np.ndarray:
    """A random k x k correlation matrix; ``strength`` in [0, 1) scales off-diagonal size."""
    A = rng.normal(size=(k, max(2, k // 2)))
    S = A @ A.T
    s = np.sqrt(np.diag(S))
    C = S / np.outer(s, s)
    R = strength * C + (1.0 - strength) * np.eye(k)
    return R


def _expect_normal(mean: float, sd: float, func, order: int = 96):
    """E[func(T)] for T ~ N(mean, sd^2) by Gauss-Hermite quadrature (probabilists' weight).

    ``func`` maps a (order,) array of nodes to an (order, m) array; returns (m,).
    """
    nodes, weights = np.polynomial.hermite_e.hermegauss(order)
    weights = weights / math.sqrt(2.0 * math.pi)
    return weights @ func(mean + sd * nodes)


# Cytometry-like levels per channel: negative, dim, positive, bright (common practice
# to think of markers this way; the numbers are ours).
_LEVELS = np.array([0.7, 1.7, 2.8, 3.8])


def _centre(d: int, rng: np.random.Generator) -> np.ndarray:
    return _LEVELS[rng.integers(0, len(_LEVELS), size=d)] + rng.uniform(-0.15, 0.15, size=d)


# --------------------------------------------------------------------------- components

class Component:
    """A population with exact ``logpdf`` (n,) and ``sample(n, rng)`` (n x d)."""

    d: int

    def logpdf(self, X: np.ndarray) -> np.ndarray:  # pragma: no cover - interface
        raise NotImplementedError

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def marginal_cdf(self, j: int) -> Callable[[np.ndarray], np.ndarray] | None:
        """Exact CDF of channel ``j`` when known in closed form, else None."""
        return None


class JohnsonSUCopula(Component):
    """Skewed, correlated population: Gaussian copula with Johnson SU margins.

    Z ~ N(0, R) (R a correlation matrix); X_j = loc_j + scale_j * sinh((Z_j - gamma_j) / delta_j).
    Inverse: Z_j = gamma_j + delta_j * arcsinh((X_j - loc_j) / scale_j), so
    log p(x) = log N(z; 0, R) + sum_j [log delta_j - log scale_j - 0.5 log(1 + y_j^2)]
    with y_j = (x_j - loc_j) / scale_j.  Margin j is scipy.stats.johnsonsu(gamma_j, delta_j, loc_j, scale_j).
    gamma = 0 and delta -> infinity give a Gaussian; |gamma| > 0 skews.
    """

    def __init__(self, loc, scale, gamma, delta, corr):
        self.loc = np.asarray(loc, dtype=np.float64)
        self.scale = np.asarray(scale, dtype=np.float64)
        self.gamma = np.asarray(gamma, dtype=np.float64)
        self.delta = np.asarray(delta, dtype=np.float64)
        self.corr = np.asarray(corr, dtype=np.float64)
        self.d = self.loc.size
        self._chol = np.linalg.cholesky(self.corr)

    def logpdf(self, X):
        X = _as_events(X, self.d)
        y = (X - self.loc) / self.scale
        Z = self.gamma + self.delta * np.arcsinh(y)
        logjac = np.sum(np.log(self.delta) - np.log(self.scale) - 0.5 * np.log1p(y * y), axis=1)
        return _gauss_logpdf_std(Z, self._chol) + logjac

    def sample(self, n, rng):
        Z = rng.normal(size=(n, self.d)) @ self._chol.T
        return self.loc + self.scale * np.sinh((Z - self.gamma) / self.delta)

    def marginal_cdf(self, j):
        dist = stats.johnsonsu(self.gamma[j], self.delta[j], loc=self.loc[j], scale=self.scale[j])
        return dist.cdf


class Gaussian(Component):
    """Multivariate normal N(mean, cov)."""

    def __init__(self, mean, cov):
        self.mean = np.asarray(mean, dtype=np.float64)
        self.cov = np.asarray(cov, dtype=np.float64)
        self.d = self.mean.size
        self._chol = np.linalg.cholesky(self.cov)

    def logpdf(self, X):
        X = _as_events(X, self.d)
        return _gauss_logpdf_std(X - self.mean, self._chol)

    def sample(self, n, rng):
        return self.mean + rng.normal(size=(n, self.d)) @ self._chol.T

    def marginal_cdf(self, j):
        return stats.norm(self.mean[j], math.sqrt(self.cov[j, j])).cdf


class MultivariateT(Component):
    """Heavy-tailed population: multivariate Student t (location, shape matrix, df).

    log p(x) = lnG((df+d)/2) - lnG(df/2) - d/2 ln(df pi) - 1/2 ln|S| - (df+d)/2 ln(1 + m/df),
    m the Mahalanobis distance in S.  Sampling: loc + N(0, S) / sqrt(chi2_df / df).
    """

    def __init__(self, loc, shape, df):
        self.loc = np.asarray(loc, dtype=np.float64)
        self.shape = np.asarray(shape, dtype=np.float64)
        self.df = float(df)
        self.d = self.loc.size
        self._chol = np.linalg.cholesky(self.shape)

    def logpdf(self, X):
        from scipy.linalg import solve_triangular

        X = _as_events(X, self.d)
        d, nu = self.d, self.df
        W = solve_triangular(self._chol, (X - self.loc).T, lower=True)
        maha = np.einsum("ij,ij->j", W, W)
        logdet = 2.0 * np.sum(np.log(np.diag(self._chol)))
        return (special.gammaln(0.5 * (nu + d)) - special.gammaln(0.5 * nu)
                - 0.5 * d * math.log(nu * math.pi) - 0.5 * logdet
                - 0.5 * (nu + d) * np.log1p(maha / nu))

    def sample(self, n, rng):
        Z = rng.normal(size=(n, self.d)) @ self._chol.T
        w = rng.chisquare(self.df, size=n) / self.df
        return self.loc + Z / np.sqrt(w)[:, None]

    def marginal_cdf(self, j):
        return stats.t(self.df, loc=self.loc[j], scale=math.sqrt(self.shape[j, j])).cdf


class Banana(Component):
    """Curved population: a Gaussian bent by a volume-preserving shear.

    Z ~ N(mean, cov); X = Z except X_j = Z_j + bend_j * (Z_i - mean_i)^2 for j in ``bent``
    (i = ``driver`` not in ``bent``).  The map is triangular with unit diagonal
    (Jacobian 1), so log p(x) = log N(z; mean, cov) with z_j = x_j - bend_j (x_i - mean_i)^2.
    """

    def __init__(self, mean, cov, driver: int, bent, bend):
        self.gauss = Gaussian(mean, cov)
        self.d = self.gauss.d
        self.driver = int(driver)
        self.bent = np.asarray(bent, dtype=int)
        self.bend = np.asarray(bend, dtype=np.float64)
        if self.driver in set(self.bent.tolist()):
            raise ValueError("the driver channel cannot be bent")

    def _shift(self, driver_values):
        c = self.gauss.mean[self.driver]
        return np.outer((driver_values - c) ** 2, self.bend)

    def logpdf(self, X):
        X = _as_events(X, self.d)
        Z = X.copy()
        Z[:, self.bent] -= self._shift(X[:, self.driver])
        return self.gauss.logpdf(Z)

    def sample(self, n, rng):
        X = self.gauss.sample(n, rng)
        X[:, self.bent] += self._shift(X[:, self.driver])
        return X

    def marginal_cdf(self, j):
        """Exact for unbent channels; bent channels by 1-D Gauss-Hermite quadrature over the driver."""
        bent = self.bent.tolist()
        if j not in bent:
            return self.gauss.marginal_cdf(j)
        i, b = self.driver, float(self.bend[bent.index(j)])
        mu, cov = self.gauss.mean, self.gauss.cov
        sd_i = math.sqrt(cov[i, i])
        beta = cov[j, i] / cov[i, i]
        sd_c = math.sqrt(cov[j, j] - beta * cov[j, i])

        def cdf(x):
            x = np.atleast_1d(np.asarray(x, dtype=np.float64))

            def inner(zi):
                t = (zi - mu[i])[:, None]
                return special.ndtr((x[None, :] - b * t ** 2 - mu[j] - beta * t) / sd_c)
            return _expect_normal(mu[i], sd_i, inner)
        return cdf


class Fan(Component):
    """Spread that widens with signal level, as a conditional product.

    Level L = X_driver ~ N(level_mean, level_sd^2).  The other channels given L:
    X_rest | L ~ N(base + slope * (L - level_mean), D(L) R D(L)), with
    D(L) = diag(spread0 * exp(growth * (L - level_mean))).  Exact density:
    log p(x) = log N(L) + log N(u; 0, R) - sum_j log D_j(L), u = (x_rest - m(L)) / D(L).
    """

    def __init__(self, level_mean, level_sd, driver: int, base, slope, spread0, growth, corr):
        self.level_mean = float(level_mean)
        self.level_sd = float(level_sd)
        self.driver = int(driver)
        self.base = np.asarray(base, dtype=np.float64)
        self.slope = np.asarray(slope, dtype=np.float64)
        self.spread0 = np.asarray(spread0, dtype=np.float64)
        self.growth = np.asarray(growth, dtype=np.float64)
        self.corr = np.asarray(corr, dtype=np.float64)
        self.d = self.base.size + 1
        self.rest = np.array([j for j in range(self.d) if j != self.driver], dtype=int)
        self._chol = np.linalg.cholesky(self.corr)

    def _cond(self, L):
        t = (L - self.level_mean)[:, None]
        mean = self.base + self.slope * t
        spread = self.spread0 * np.exp(self.growth * t)
        return mean, spread

    def logpdf(self, X):
        X = _as_events(X, self.d)
        L = X[:, self.driver]
        mean, spread = self._cond(L)
        U = (X[:, self.rest] - mean) / spread
        lp_level = stats.norm.logpdf(L, self.level_mean, self.level_sd)
        return lp_level + _gauss_logpdf_std(U, self._chol) - np.sum(np.log(spread), axis=1)

    def sample(self, n, rng):
        L = self.level_mean + self.level_sd * rng.normal(size=n)
        mean, spread = self._cond(L)
        U = rng.normal(size=(n, self.d - 1)) @ self._chol.T
        X = np.empty((n, self.d))
        X[:, self.driver] = L
        X[:, self.rest] = mean + spread * U
        return X

    def marginal_cdf(self, j):
        """Exact for the level channel; others by 1-D Gauss-Hermite quadrature over the level."""
        if j == self.driver:
            return stats.norm(self.level_mean, self.level_sd).cdf
        k = int(np.flatnonzero(self.rest == j)[0])

        def cdf(x):
            x = np.atleast_1d(np.asarray(x, dtype=np.float64))

            def inner(L):
                t = (L - self.level_mean)[:, None]
                mean = self.base[k] + self.slope[k] * t
                spread = self.spread0[k] * np.exp(self.growth[k] * t)
                return special.ndtr((x[None, :] - mean) / spread)
            return _expect_normal(self.level_mean, self.level_sd, inner)
        return cdf


class SkewWarp(Component):
    """A population pushed through a per-channel sinh-arcsinh warp (skews each
    channel while keeping the inner population's dependence and fan-out).

    X_j = c_j + s_j sinh(asinh((Y_j - c_j) / s_j) + eps_j) with Y ~ ``inner``; exact
    density by change of variables: log p(x) = log p_Y(y) + sum_j log dy_j/dx_j,
    y_j = c_j + s_j sinh(asinh(t_j) - eps_j), t_j = (x_j - c_j) / s_j,
    dy_j/dx_j = cosh(asinh(t_j) - eps_j) / sqrt(1 + t_j^2).
    """

    def __init__(self, inner, centre, scale, eps):
        self.inner = inner
        self.centre = np.asarray(centre, dtype=np.float64)
        self.scale = np.asarray(scale, dtype=np.float64)
        self.eps = np.asarray(eps, dtype=np.float64)
        self.d = inner.d

    def _unwarp(self, X):
        a = np.arcsinh((X - self.centre) / self.scale)
        Y = self.centre + self.scale * np.sinh(a - self.eps)
        logjac = np.sum(np.log(np.cosh(a - self.eps)) - np.log(np.cosh(a)), axis=1)
        return Y, logjac

    def logpdf(self, X):
        X = _as_events(X, self.d)
        Y, logjac = self._unwarp(X)
        return self.inner.logpdf(Y) + logjac

    def sample(self, n, rng):
        Y = self.inner.sample(n, rng)
        return self.centre + self.scale * np.sinh(np.arcsinh((Y - self.centre) / self.scale) + self.eps)

    def marginal_cdf(self, j):
        inner = self.inner.marginal_cdf(j)
        if inner is None:
            return None
        c, s, e = self.centre[j], self.scale[j], self.eps[j]

        def cdf(x):
            x = np.asarray(x, dtype=np.float64)
            return inner(c + s * np.sinh(np.arcsinh((x - c) / s) - e))
        return cdf


class UniformBox(Component):
    """Debris background: uniform over the box [low, high] per channel."""

    def __init__(self, low, high):
        self.low = np.asarray(low, dtype=np.float64)
        self.high = np.asarray(high, dtype=np.float64)
        self.d = self.low.size
        self._logvol = float(np.sum(np.log(self.high - self.low)))

    def logpdf(self, X):
        X = _as_events(X, self.d)
        inside = np.all((X >= self.low) & (X <= self.high), axis=1)
        return np.where(inside, -self._logvol, -np.inf)

    def sample(self, n, rng):
        return rng.uniform(self.low, self.high, size=(n, self.d))

    def marginal_cdf(self, j):
        return stats.uniform(self.low[j], self.high[j] - self.low[j]).cdf


# --------------------------------------------------------------------------- mixture

@dataclass
class Mixture:
    """Finite mixture with exact log density (logsumexp of log w_k + log p_k).

    ``labels[k]`` is the population id reported for events of component k
    (-1 for the debris background).  ``names[k]`` describes component k.
    """

    components: list
    weights: np.ndarray
    labels: list
    names: list
    name: str = "mixture"
    d: int = field(init=False)

    def __post_init__(self):
        self.weights = np.asarray(self.weights, dtype=np.float64)
        if not np.isclose(self.weights.sum(), 1.0) or np.any(self.weights <= 0):
            raise ValueError("mixture weights must be positive and sum to 1")
        ds = {c.d for c in self.components}
        if len(ds) != 1:
            raise ValueError(f"components disagree on the number of channels: {sorted(ds)}")
        self.d = ds.pop()

    def component_logpdfs(self, X) -> np.ndarray:
        """log w_k + log p_k(x), shape (n, K)."""
        X = _as_events(X, self.d)
        with np.errstate(divide="ignore"):
            return np.column_stack([math.log(w) + c.logpdf(X)
                                    for w, c in zip(self.weights, self.components)])

    def logpdf(self, X) -> np.ndarray:
        """Exact log density (nats), shape (n,)."""
        return special.logsumexp(self.component_logpdfs(X), axis=1)

    def sample(self, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """``n`` events (n x d float64, shuffled) and their population labels (n,) int."""
        counts = rng.multinomial(n, self.weights)
        parts, labs = [], []
        for c, m, lab in zip(self.components, counts, self.labels):
            if m:
                parts.append(c.sample(int(m), rng))
                labs.append(np.full(int(m), lab, dtype=int))
        X = np.concatenate(parts, axis=0)
        y = np.concatenate(labs)
        order = rng.permutation(n)
        return np.ascontiguousarray(X[order], dtype=np.float64), y[order]

    def marginal_cdf(self, j: int) -> Callable[[np.ndarray], np.ndarray] | None:
        """Exact CDF of channel ``j`` when every component has one, else None."""
        cdfs = [c.marginal_cdf(j) for c in self.components]
        if any(f is None for f in cdfs):
            return None
        w = self.weights

        def cdf(x):
            x = np.asarray(x, dtype=np.float64)
            return sum(wk * f(x) for wk, f in zip(w, cdfs))
        return cdf


# --------------------------------------------------------------------------- builders

_NAME_SEEDS = {"skewed": 11, "heavy_tailed": 23, "banana": 37, "fan": 41, "panel": 53, "cyto": 61}


def _structure_rng(name: str, d: int) -> np.random.Generator:
    return np.random.default_rng([20261201, _NAME_SEEDS[name], d])


def _spreads(d, rng, lo=0.15, hi=0.35):
    return rng.uniform(lo, hi, size=d)


def johnson_population(d, rng, skew=1.0) -> JohnsonSUCopula:
    """A skewed correlated population (spread ~0.15-0.35 per channel)."""
    delta = rng.uniform(1.3, 3.0, size=d)
    gamma = skew * rng.uniform(-1.5, 1.5, size=d)
    target = _spreads(d, rng)
    return JohnsonSUCopula(_centre(d, rng), target * delta, gamma, delta,
                           random_correlation(d, rng, 0.6))


def t_population(d, rng, df) -> MultivariateT:
    s = _spreads(d, rng, 0.15, 0.3)
    R = random_correlation(d, rng, 0.5)
    return MultivariateT(_centre(d, rng), R * np.outer(s, s), df)


def banana_population(d, rng) -> Banana:
    s = _spreads(d, rng, 0.2, 0.3)
    driver = int(rng.integers(0, d))
    s[driver] = rng.uniform(0.45, 0.6)
    others = [j for j in range(d) if j != driver]
    bent = rng.choice(others, size=min(2, len(others)), replace=False)
    bend = rng.choice([-1.0, 1.0], size=bent.size) * rng.uniform(0.8, 1.3, size=bent.size)
    R = random_correlation(d, rng, 0.3)
    return Banana(_centre(d, rng), R * np.outer(s, s), driver, bent, bend)


def fan_population(d, rng) -> Fan:
    driver = int(rng.integers(0, d))
    c = _centre(d, rng)
    level_mean = float(rng.uniform(2.0, 3.0))
    base = np.delete(c, driver)
    slope = rng.uniform(-0.3, 0.5, size=d - 1)
    spread0 = rng.uniform(0.12, 0.22, size=d - 1)
    growth = rng.uniform(0.5, 0.9, size=d - 1)
    return Fan(level_mean, rng.uniform(0.5, 0.7), driver, base, slope, spread0, growth,
               random_correlation(d - 1, rng, 0.4))


def rare_population(d, rng) -> Gaussian:
    """The rare population: tight, away from the main ones (bright on a few channels)."""
    c = _LEVELS[rng.integers(0, 2, size=d)] + rng.uniform(-0.1, 0.1, size=d)
    bright = rng.choice(d, size=max(2, d // 3), replace=False)
    c[bright] = 4.3 + rng.uniform(-0.1, 0.1, size=bright.size)
    s = _spreads(d, rng, 0.1, 0.16)
    return Gaussian(c, random_correlation(d, rng, 0.3) * np.outer(s, s))


def _assemble(name, d, pops, pop_names, rng) -> Mixture:
    main = 1.0 - BACKGROUND_WEIGHT - RARE_WEIGHT
    raw = rng.uniform(1.0, 3.0, size=len(pops))
    w_main = main * raw / raw.sum()
    comps = list(pops) + [rare_population(d, rng), UniformBox(np.full(d, BOX_LOW), np.full(d, BOX_HIGH))]
    weights = np.concatenate([w_main, [RARE_WEIGHT, BACKGROUND_WEIGHT]])
    labels = list(range(len(pops))) + [len(pops), -1]
    names = list(pop_names) + ["rare", "debris"]
    return Mixture(comps, weights, labels, names, name=name)


def _check_d(name, d, lo=2):
    if int(d) != d or d < lo:
        raise ValueError(f"scenario {name!r} needs at least {lo} channels, got d={d}")
    return int(d)


def build_skewed(d: int = 6) -> Mixture:
    """Four skewed, correlated populations + debris + rare."""
    d = _check_d("skewed", d)
    rng = _structure_rng("skewed", d)
    pops = [johnson_population(d, rng) for _ in range(4)]
    return _assemble("skewed", d, pops, [f"skewed {k}" for k in range(4)], rng)


def build_heavy_tailed(d: int = 4) -> Mixture:
    """Two multivariate t populations (df 3 and 5), one skewed + debris + rare."""
    d = _check_d("heavy_tailed", d)
    rng = _structure_rng("heavy_tailed", d)
    pops = [t_population(d, rng, 3.0), t_population(d, rng, 5.0), johnson_population(d, rng)]
    return _assemble("heavy_tailed", d, pops, ["t df=3", "t df=5", "skewed"], rng)


def build_banana(d: int = 5) -> Mixture:
    """Two curved populations, one skewed + debris + rare."""
    d = _check_d("banana", d)
    rng = _structure_rng("banana", d)
    pops = [banana_population(d, rng), banana_population(d, rng), johnson_population(d, rng)]
    return _assemble("banana", d, pops, ["banana 0", "banana 1", "skewed"], rng)


def build_fan(d: int = 6) -> Mixture:
    """Two fans (spread grows with level), one skewed + debris + rare."""
    d = _check_d("fan", d)
    rng = _structure_rng("fan", d)
    pops = [fan_population(d, rng), fan_population(d, rng), johnson_population(d, rng)]
    return _assemble("fan", d, pops, ["fan 0", "fan 1", "skewed"], rng)


def build_panel(d: int = 8) -> Mixture:
    """Everything together: two skewed, one t (df 4), one banana, one fan + debris + rare."""
    d = _check_d("panel", d)
    rng = _structure_rng("panel", d)
    pops = [johnson_population(d, rng), johnson_population(d, rng), t_population(d, rng, 4.0),
            banana_population(d, rng), fan_population(d, rng)]
    return _assemble("panel", d, pops, ["skewed 0", "skewed 1", "t df=4", "banana", "fan"], rng)


def skewed_fan_population(d, rng) -> SkewWarp:
    """A fan (spread of every channel grows with a driver channel's level, as
    compensated data spread with intensity) whose channels are then skewed by
    a sinh-arcsinh warp (|skew| 0.2-0.8, scale ~ the channel's spread)."""
    fan = fan_population(d, rng)
    centre = fan.sample(2000, rng).mean(axis=0)
    scale = rng.uniform(0.2, 0.4, size=d)
    eps = rng.choice([-1.0, 1.0], size=d) * rng.uniform(0.2, 0.8, size=d)
    return SkewWarp(fan, centre, scale, eps)


def build_cyto(d: int = 24) -> Mixture:
    """A wide panel: ten skewed fanning populations + debris + rare (meant for 16-40 channels)."""
    d = _check_d("cyto", d)
    rng = _structure_rng("cyto", d)
    pops = [skewed_fan_population(d, rng) for _ in range(10)]
    return _assemble("cyto", d, pops, [f"skewed fan {k}" for k in range(10)], rng)


SCENARIOS: dict[str, Callable[[int], Mixture]] = {
    "skewed": build_skewed,
    "heavy_tailed": build_heavy_tailed,
    "banana": build_banana,
    "fan": build_fan,
    "panel": build_panel,
    "cyto": build_cyto,
}


def make_scenario(name: str, n: int, d: int, seed: int):
    """(X (n x d float64), logpdf callable X -> (n,), labels (n,) int; -1 = debris)."""
    if name not in SCENARIOS:
        raise ValueError(f"unknown scenario {name!r}; known: {', '.join(SCENARIOS)}")
    mix = SCENARIOS[name](d)
    X, labels = mix.sample(int(n), np.random.default_rng(seed))
    return X, mix.logpdf, labels


def make_skewed(n: int, d: int = 6, seed: int = 0):
    return make_scenario("skewed", n, d, seed)


def make_heavy_tailed(n: int, d: int = 4, seed: int = 0):
    return make_scenario("heavy_tailed", n, d, seed)


def make_banana(n: int, d: int = 5, seed: int = 0):
    return make_scenario("banana", n, d, seed)


def make_fan(n: int, d: int = 6, seed: int = 0):
    return make_scenario("fan", n, d, seed)


def make_panel(n: int, d: int = 8, seed: int = 0):
    return make_scenario("panel", n, d, seed)


def make_cyto(n: int, d: int = 24, seed: int = 0):
    return make_scenario("cyto", n, d, seed)
