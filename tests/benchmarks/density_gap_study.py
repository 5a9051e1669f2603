#!/usr/bin/env python3
"""Where the gap to the truth comes from on the wide scenarios: estimation
variance (train against held-out, and the gap as the training events grow)
against the bias of the model family.

Run from the repository root (heavy: run under ``nice``)::

    python tests/benchmarks/density_gap_study.py --d 16 --n 50000,200000,500000
        [--cache /tmp/density_gap] [--test 50000] [--out results.jsonl]

For each training size n it draws n events of the "cyto" scenario (seed 0) and
``--test`` held-out events (seed 1, the density benchmark's held-out draw), fits
``AdditiveTreeDensity(random_state=0, max_fit_events=n)`` with the mixture
stage's EM allowed all n training events (the estimator's ``max_em_events``;
the default rule would cap it), and prints per event (nats): the model's mean
log-likelihood on its fitting share, on its internal held-out share and on the
test events, the truth's on the same events, and the gaps (truth minus model).
Fitted models are saved in ``--cache`` (the project's model files) and reused.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
for _p in (HERE, ROOT):
    if _p not in sys.path:
        sys.path.insert(0, _p)

import density_scenarios as S  # noqa: E402
from core.density import fitting  # noqa: E402
from core.density.model import AdditiveTreeDensity  # noqa: E402
from core.density.storage import load_model, save_model  # noqa: E402


def study(d: int, n: int, n_test: int, cache: str, log=print) -> dict:
    mix = S.build_cyto(d)
    X, _ = mix.sample(n, np.random.default_rng(0))
    X_test, _ = mix.sample(n_test, np.random.default_rng(1))
    path = os.path.join(cache, f"cyto-{d}d-n{n}.npz")
    secs = None
    if os.path.exists(path):
        model = load_model(AdditiveTreeDensity, path)
    else:
        model = AdditiveTreeDensity(random_state=0, max_fit_events=max(n, 200_000),
                                    max_em_events=max(n, 1000))
        t0 = time.perf_counter()
        model.fit(X)
        secs = time.perf_counter() - t0
        save_model(model, path)
    # the fit's own split (no subsample below max_fit_events): same generator as fit_with_base
    va, tr = fitting.heldout_split(n, model.validation_fraction, np.random.default_rng(0))
    out = {"d": d, "n": n, "fit_s": secs, "K": int(model.mixture_.n_components) if model.mixture_ else None,
           "trees": int(model.n_trees_), "load": os.getloadavg()[0]}
    for name, rows in (("fit_share", X[tr]), ("heldout_share", X[va]), ("test", X_test)):
        ours = model.score_samples(rows)
        truth = mix.logpdf(rows)
        out[f"ours_{name}"] = float(ours.mean())
        out[f"truth_{name}"] = float(truth.mean())
        out[f"gap_{name}"] = float((truth - ours).mean())
        out[f"gap_se_{name}"] = float((truth - ours).std() / np.sqrt(rows.shape[0]))
    log(json.dumps(out))
    return out


# --------------------------------------------------------------- the truth's own family

def _unpack(theta, d):
    m = d - 1
    base, slope, growth = theta[:m], theta[m:2 * m], theta[2 * m:3 * m]
    centre, log_scale, eps = theta[3 * m:3 * m + d], theta[3 * m + d:3 * m + 2 * d], theta[3 * m + 2 * d:]
    return base, slope, growth, centre, np.exp(log_scale), eps


def _profile(theta, X, driver, rest, grad=False):
    """Mean log-likelihood (nats per event) of a skewed fan (density_scenarios.SkewWarp
    of a Fan) whose level mean / sd and rest covariance are profiled out (their
    maximum-likelihood values given the others), those values, and (``grad``)
    its gradient in ``theta`` (derived by hand; a test-free benchmark helper,
    checked against finite differences when written)."""
    n, d = X.shape
    base, slope, growth, centre, scale, eps = _unpack(theta, d)
    u = (X - centre) / scale
    a = np.arcsinh(u)
    b = a - eps
    Y = centre + scale * np.sinh(b)
    logjac = np.sum(np.log(np.cosh(b)) - np.log(np.cosh(a)), axis=1).mean()
    L = Y[:, driver]
    mu, sd = float(L.mean()), float(L.std())
    t = (L - mu)[:, None]
    w = np.exp(-growth * t)
    E = (Y[:, rest] - base - slope * t) * w
    cov = E.T @ E / n
    sign, logdet = np.linalg.slogdet(cov)
    if sign <= 0 or not np.isfinite(logdet) or sd <= 0:
        return -np.inf, None, None
    m = d - 1
    # mean over events of log N(L; mu, sd) + log N(E; 0, cov) - sum_j growth_j t (the last is 0: t has mean 0)
    ll = -0.5 * (1.0 + np.log(2 * np.pi * sd * sd)) - 0.5 * (m * np.log(2 * np.pi) + logdet + m) + logjac
    if not grad:
        return float(ll), (mu, sd, cov), None
    G = -np.linalg.solve(cov, E.T).T / n                      # d ll / d E
    g_base = -(G * w).sum(axis=0)
    g_slope = -(G * w * t).sum(axis=0)
    g_growth = -(G * E * t).sum(axis=0)
    Gt = (G * (-slope * w - growth * E)).sum(axis=1)
    GY = np.empty_like(Y)
    GY[:, rest] = G * w
    GY[:, driver] = Gt - Gt.mean() - t[:, 0] / (n * sd * sd)
    ch = np.cosh(b)
    da_common = 1.0 / (scale * np.sqrt(1.0 + u * u))
    A = GY * scale * ch + (np.tanh(b) - np.tanh(a)) / n      # d ll / d a
    g_eps = (-GY * scale * ch - np.tanh(b) / n).sum(axis=0)
    g_centre = (GY - A * da_common).sum(axis=0)
    g_logscale = scale * (GY * np.sinh(b) - A * u * da_common).sum(axis=0)
    return float(ll), (mu, sd, cov), np.concatenate([g_base, g_slope, g_growth, g_centre, g_logscale, g_eps])


def refit_skewed_fan(true_pop, X, maxiter: int = 5000):
    """The truth's family (a sinh-arcsinh-warped fan, density_scenarios.SkewWarp
    of a Fan, driver channel known) refitted by maximum likelihood to one
    population's events X (n x d): L-BFGS (scipy.optimize, numerical gradient)
    over means, slopes, growths and the warp (analytic gradient), started at the true values; level
    mean / sd and the covariance of the rest profiled out.  Returns the fitted
    SkewWarp."""
    from scipy.optimize import minimize  # benchmark-only dependency, loaded when used

    fan = true_pop.inner
    d = fan.d
    driver, rest = fan.driver, fan.rest
    theta0 = np.concatenate([fan.base, fan.slope, fan.growth, true_pop.centre,
                             np.log(true_pop.scale), true_pop.eps])

    def loss(theta):
        ll, _, g = _profile(theta, X, driver, rest, grad=True)
        return (-ll, -g) if np.isfinite(ll) else (1e10, np.zeros_like(theta))

    res = minimize(loss, theta0, jac=True, method="L-BFGS-B", options={"maxiter": int(maxiter), "maxfun": 4 * int(maxiter)})
    _, (mu, sd, cov), _ = _profile(res.x, X, driver, rest)
    base, slope, growth, centre, scale, eps = _unpack(res.x, d)
    spread0 = np.sqrt(np.diag(cov))
    inner = S.Fan(mu, sd, driver, base, slope, spread0, growth, cov / np.outer(spread0, spread0))
    return S.SkewWarp(inner, centre, scale, eps), res


def family_floor(d: int, n: int, n_test: int, log=print) -> dict:
    """Held-out gap of the truth's own family with its parameters re-estimated
    from n events given their true labels (each skewed fan by
    :func:`refit_skewed_fan`, the rare population's mean and covariance, the
    weights by label counts; the debris box kept): what any method could reach
    from n events with the generator's form known."""
    mix = S.build_cyto(d)
    X, lab = mix.sample(n, np.random.default_rng(0))
    X_test, lab_test = mix.sample(n_test, np.random.default_rng(1))
    comps, weights, rows = [], [], []
    t0 = time.perf_counter()
    for k, (pop, label) in enumerate(zip(mix.components, mix.labels)):
        Xk = X[lab == label]
        weights.append(Xk.shape[0] / n)
        if isinstance(pop, S.SkewWarp):
            fitted, res = refit_skewed_fan(pop, Xk)
            Tk = X_test[lab_test == label]
            row = {"pop": k, "events": int(Xk.shape[0]), "params": int(res.x.size + 2 + d * (d - 1) // 2),
                   "iters": int(res.nit), "train_gain": float(fitted.logpdf(Xk).mean() - pop.logpdf(Xk).mean()),
                   "test_gap": float(pop.logpdf(Tk).mean() - fitted.logpdf(Tk).mean())}
            rows.append(row)
            log(json.dumps(row))
        elif isinstance(pop, S.Gaussian):
            fitted = S.Gaussian(Xk.mean(axis=0), np.cov(Xk.T, bias=True))
        else:
            fitted = pop   # the debris box: known bounds, nothing to estimate
        comps.append(fitted)
    refit = S.Mixture(comps, np.asarray(weights), mix.labels, mix.names, name="refit")
    truth_test = mix.logpdf(X_test)
    gap = truth_test - refit.logpdf(X_test)
    n_params = sum(r["params"] for r in rows) + d + d * (d + 1) // 2 + len(comps) - 1
    out = {"d": d, "n": n, "floor_gap_test": float(gap.mean()), "floor_gap_se": float(gap.std() / np.sqrt(n_test)),
           "floor_gap_train": float((mix.logpdf(X) - refit.logpdf(X)).mean()),
           "params": n_params, "params_over_2n": n_params / (2.0 * n), "secs": time.perf_counter() - t0}
    log(json.dumps(out))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--d", type=int, default=16)
    ap.add_argument("--n", default="50000,200000,500000")
    ap.add_argument("--test", type=int, default=50_000)
    ap.add_argument("--cache", default="/tmp/density_gap")
    ap.add_argument("--out", default=None)
    ap.add_argument("--floor", action="store_true",
                    help="the truth's own family refitted from n events instead of our model")
    args = ap.parse_args(argv)
    os.makedirs(args.cache, exist_ok=True)
    for n in (int(v) for v in args.n.split(",")):
        res = family_floor(args.d, n, args.test) if args.floor else study(args.d, n, args.test, args.cache)
        if args.out:
            with open(args.out, "a") as fh:
                fh.write(json.dumps(res) + "\n")


if __name__ == "__main__":
    main()
