"""Measurement for the next base measure: a mixture of Gaussian copulas with
per-component, per-channel sinh-arcsinh (skew) margins, fitted by generalised
EM from the engine's Gaussian mixture; prints held-out log-likelihoods.

    python tests/benchmarks/skewed_base_experiment.py SCENARIO D K [EM_ITERATIONS]
    e.g.  python tests/benchmarks/skewed_base_experiment.py panel 8 32 10

Not part of the engine: a plain-numpy measurement (minutes per run) recorded in
core/density/EXPERIMENTS.md section 16.  Density of component k:
log N(y; mu_k, Sigma_k) + sum_j log dy_j/dx_j with
y_j = sinh(asinh((x_j - c_kj) / s_kj) - eps_kj).
"""
import os
import sys
import time

import numpy as np
from scipy import stats
from scipy.special import logsumexp

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

import density_scenarios as S  # noqa: E402
from core.density import gaussian_base as gb  # noqa: E402

EPS_GRID = np.array([-1.2, -0.8, -0.5, -0.3, -0.15, 0.0, 0.15, 0.3, 0.5, 0.8, 1.2])

def transform(X, c, s, eps):
    """y = sinh(asinh((x - c)/s) - eps) and log dy/dx, per channel (n, d)."""
    xt = (X - c) / s
    a = np.arcsinh(xt) - eps
    y = np.sinh(a)
    logjac = np.log(np.cosh(a)) - 0.5 * np.log1p(xt * xt) - np.log(s)
    return y, logjac

def comp_logpdf(X, p):
    y, lj = transform(X, p["c"], p["s"], p["eps"])
    D = y - p["mu"]
    L = np.linalg.cholesky(p["cov"])
    z = np.linalg.solve(L, D.T).T
    d = X.shape[1]
    return -0.5 * (z * z).sum(1) - np.log(np.diag(L)).sum() - 0.5 * d * np.log(2 * np.pi) + lj.sum(1)

def fit_gauss_in_y(y, r, reg):
    w = r / r.sum()
    mu = w @ y
    D = y - mu
    cov = (D * w[:, None]).T @ D + np.diag(reg)
    return mu, cov

def fit(X, K, bg_logpdf_fn, iters=25, skew=True):
    n, d = X.shape
    loc = np.median(X, 0); scale = (np.percentile(X, 75, 0) - np.percentile(X, 25, 0)) / (2 * np.log(3))
    g = gb.GaussianMixtureBase.fit(X, loc, scale, components=(K,), random_state=0, skew=False)
    reg = 1e-6 * X.var(0)
    comps = []
    for k in range(g.n_components):
        sd = np.sqrt(np.diag(g.covariances[k]))
        comps.append(dict(c=g.means[k].copy(), s=sd.copy(), eps=np.zeros(d)))
        # with eps 0, y = (x - c) / s: the Gaussian component, standardised
        comps[-1]["mu"] = np.zeros(d)
        comps[-1]["cov"] = g.covariances[k] / np.outer(sd, sd) + np.diag(1e-9 * np.ones(d))
    w = g.weights.copy()
    bg = bg_logpdf_fn(X)
    for it in range(iters):
        lp = np.column_stack([np.log(w[0]) + bg] + [np.log(w[k + 1]) + comp_logpdf(X, comps[k]) for k in range(len(comps))])
        tot = logsumexp(lp, axis=1)
        R = np.exp(lp - tot[:, None])
        Nk = R.sum(0)
        w = np.maximum(Nk / n, 1e-12); w[0] = max(w[0], 1e-4); w /= w.sum()
        for k, p in enumerate(comps):
            r = R[:, k + 1]
            sel = r > 1e-4
            Xs, rs = X[sel], r[sel]
            if rs.sum() < 5 * d:
                continue
            if skew:
                # coordinate-wise grid search of each channel's skew, mu/cov re-fitted in closed form
                for j in range(d):
                    best = None
                    for e in EPS_GRID * (1.0 if it < 5 else 0.5) + (p["eps"][j] if it >= 5 else 0.0):
                        eps = p["eps"].copy(); eps[j] = e
                        y, lj = transform(Xs, p["c"], p["s"], eps)
                        mu, cov = fit_gauss_in_y(y, rs, 1e-6 * np.ones(d))
                        q = dict(c=p["c"], s=p["s"], eps=eps, mu=mu, cov=cov)
                        ll = rs @ comp_logpdf(Xs, q)
                        if best is None or ll > best[0]:
                            best = (ll, eps, mu, cov)
                    p["eps"], p["mu"], p["cov"] = best[1], best[2], best[3]
            else:
                y, _ = transform(Xs, p["c"], p["s"], p["eps"])
                p["mu"], p["cov"] = fit_gauss_in_y(y, rs, 1e-6 * np.ones(d))
        print(f"  iter {it} train ll {tot.mean():.4f}", flush=True)
    def logpdf(Z):
        lpz = np.column_stack([np.log(w[0]) + bg_logpdf_fn(Z)] + [np.log(w[k + 1]) + comp_logpdf(Z, comps[k]) for k in range(len(comps))])
        return logsumexp(lpz, axis=1)
    return logpdf, g


def main(argv):
    if len(argv) < 3:
        print(__doc__)
        return 2
    name, d, K = argv[0], int(argv[1]), int(argv[2])
    iters = int(argv[3]) if len(argv) > 3 else 10
    mix = S.SCENARIOS[name](d)
    X, _ = mix.sample(50_000, np.random.default_rng(0))
    Xt, _ = mix.sample(50_000, np.random.default_rng(1))
    tr = X[:40000]
    loc = np.median(tr, 0)
    scale = (np.percentile(tr, 75, 0) - np.percentile(tr, 25, 0)) / (2 * np.log(3))

    def bgf(Z):
        return np.sum(stats.logistic.logpdf((Z - loc) / scale) - np.log(scale), axis=1)

    t = time.perf_counter()
    lp, g = fit(tr, K, bgf, iters=iters)
    print(f"\n{'scenario':<14} {'k':>3} {'truth':>8} {'Gaussian mixture':>17} {'skewed components':>18} {'seconds':>8}")
    print(f"{name + '-' + str(d) + 'd':<14} {K:>3} {mix.logpdf(Xt).mean():>8.4f} {g.logpdf(Xt).mean():>17.4f} "
          f"{lp(Xt).mean():>18.4f} {time.perf_counter() - t:>8.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
