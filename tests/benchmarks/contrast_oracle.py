"""What precision can a comparison reach at a false discovery rate, with a PERFECT score?

    python tests/benchmarks/contrast_oracle.py [--seeds 200] [--rate 0.05] [--min-fold 2]
        [--observed "B:3/37,C:12/117,D:14/193"] [--cases B,C,D] [--markdown OUT.md]

Control and test events are drawn from a known model (scipy.stats): the
control from f0, a mixture of four 6-channel clouds (Gaussian and Student-t,
``scipy.stats.multivariate_normal`` / ``multivariate_t``); the test from
(1 - pi) f0 + pi g, with g a compact new population away from f0 (pi = new /
n_test).  Every event is scored by the TRUE log density ratio

    s(x) = log f_test(x) - log f0(x) = log((1 - pi) + pi g(x) / f0(x))

(what a density estimate can at best give), then exactly as
:func:`core.contrast.contrast` does: conformal p-value of each test event
against the control events' scores (:func:`core.contrast.conformal_pvalues`)
and Benjamini-Hochberg q-values (:func:`core.fdr.bh_qvalues`), enriched =
q <= rate (and s >= log(min fold) where said).  Rules (columns "rule"):

* ``true score``: the new population is far from f0, so g / f0 underflows at
  every control-like event and all of them score exactly log(1 - pi): tied,
  their conformal p-values are about 1 and none passes.  Precision 1, but no
  fitted density gives control-like events one common value.
* ``score + N(0, sigma), fold``: the true score plus independent Gaussian noise
  of sigma nats per event (test and control alike: fitted densities err by a
  few tenths of a nat near the data, by nats in the tails), then BH and the
  minimum fold on the noisy score.  The new events still rank above every
  control-like event, but the control-like events' order is now random, so
  their p-values are uniform and about rate x (discoveries) of them reach
  BH's threshold (Benjamini-Hochberg's bound is an average: FDR = rate x
  n_null / n_test).  The minimum fold removes them only while the noise
  stays below log(min fold) at the top of the control's scores
  (sigma x ~4.3 for 30,000-60,000 events).
* ``score + N(0, sigma), BH alone``: the same without the minimum fold: the
  precision a perfect ranking of the new events gets from BH, whatever the
  noise.

Cases: the demo tubes' sizes (control 30,000 events; test 30,000 / 35,000 /
40,000 with 35 / 105 / 179 new, like tubes B / C / D) and the benchmark
generator's (60,000 each, 30 / 120 / 600 new).  Per case over ``--seeds``
draws: mean recall, precision's mean, 10th percentile and share of draws below
0.93, and the false discoveries' mean and 90th percentile.  ``--observed``:
our tubes' false / enriched counts; for each, the share of oracle draws of the
same case (rule ``score + N(0, 0.5), BH alone``) with at least that many false
discoveries: how unusual the tube's count would be for a score that ranks
every new event first.
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np
from scipy import stats

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from core.contrast import conformal_pvalues  # noqa: E402
from core.fdr import bh_qvalues  # noqa: E402
from contrast_benchmark import markdown, table  # noqa: E402  (the sibling script's tables)

D = 6
#: (name, control events, test events, new events)
CASES = [("B-like", 30_000, 30_000, 35), ("C-like", 30_000, 35_000, 105), ("D-like", 30_000, 40_000, 179),
         ("generator 0.05 %", 60_000, 60_000, 30), ("generator 0.2 %", 60_000, 60_000, 120),
         ("generator 1 %", 60_000, 60_000, 600)]
#: noise levels (nats) of the noisy-score rules
NOISES = (0.1, 0.5)


def _cov(scales, rho):
    c = np.full((D, D), rho)
    np.fill_diagonal(c, 1.0)
    s = np.asarray(scales, dtype=np.float64)
    return c * np.outer(s, s)


#: f0: (weight, frozen scipy.stats distribution)
BACKGROUND = [
    (0.45, stats.multivariate_normal(mean=np.zeros(D), cov=_cov([0.5] * D, 0.2))),
    (0.25, stats.multivariate_normal(mean=[3, 2, 0, 0, 0, 0], cov=_cov([0.4, 0.6, 0.3, 0.3, 0.3, 0.3], 0.5))),
    (0.20, stats.multivariate_t(loc=[0, 0, 3, 2.5, 0, 0], shape=_cov([0.3] * D, 0.3), df=3)),
    (0.10, stats.multivariate_normal(mean=[0, 0, 0, 0, 2.5, 2.5], cov=_cov([0.4, 0.4, 0.4, 0.4, 0.8, 0.8], 0.6))),
]
#: g: the new population (bright channels 2 and 5, where f0 has almost nothing)
NEW = stats.multivariate_normal(mean=[0, 3.5, 0, 0, 3.0, 0], cov=_cov([0.15] * D, 0.1))


def draw_background(n, rng):
    counts = rng.multinomial(n, [w for w, _ in BACKGROUND])
    X = np.vstack([dist.rvs(size=k, random_state=rng).reshape(k, D) for (_, dist), k in zip(BACKGROUND, counts)
                   if k])
    return X[rng.permutation(n)]


def log_f0(X):
    return np.logaddexp.reduce(np.column_stack([np.log(w) + dist.logpdf(X) for w, dist in BACKGROUND]), axis=1)


def true_score(X, pi):
    """log f_test - log f0 (nats), f_test = (1 - pi) f0 + pi g."""
    return np.logaddexp(np.log1p(-pi), np.log(pi) + NEW.logpdf(X) - log_f0(X))


def one_draw(n_control, n_test, n_new, seed, rate, min_fold):
    """Per enriched rule: (false, enriched, recall)."""
    rng = np.random.default_rng(seed)
    C = draw_background(n_control, rng)
    T = np.vstack([draw_background(n_test - n_new, rng), NEW.rvs(size=n_new, random_state=rng).reshape(n_new, D)])
    truth = np.zeros(n_test, bool)
    truth[n_test - n_new:] = True
    pi = n_new / n_test
    s_c, s_t = true_score(C, pi), true_score(T, pi)
    out = {}
    lf = np.log(min_fold)
    q = bh_qvalues(conformal_pvalues(s_t, s_c))
    out["true score"] = (q <= rate) & (s_t >= lf)
    for sigma in NOISES:
        nc_, nt_ = s_c + rng.normal(0, sigma, n_control), s_t + rng.normal(0, sigma, n_test)
        qn = bh_qvalues(conformal_pvalues(nt_, nc_))
        out[f"score + N(0, {sigma:g}), fold"] = (qn <= rate) & (nt_ >= lf)
        out[f"score + N(0, {sigma:g}), BH alone"] = qn <= rate
    for name, enr in out.items():
        out[name] = (int(np.sum(enr & ~truth)), int(enr.sum()), float(np.mean(enr[truth])))
    return out


RULES = ["true score"] + [f"score + N(0, {s:g}), {how}" for s in NOISES for how in ("fold", "BH alone")]
#: the rule our tubes are compared with (a perfect ranking of the new events, BH's share of control-like events)
REFERENCE = f"score + N(0, {NOISES[-1]:g}), BH alone"
HEADER = ["case", "control / test / new", "rule", "recall (mean)", "precision mean", "precision 10th pct",
          "share of draws with precision < 0.93", "false: mean", "false: 90th pct"]


def run(seeds, rate, min_fold, cases=None):
    results = {}
    for name, nc, nt, nn in CASES:
        if cases and not any(name.startswith(c) for c in cases):
            continue
        per = {r: [] for r in RULES}
        for seed in range(seeds):
            got = one_draw(nc, nt, nn, 10_000 + seed, rate, min_fold)
            for r in RULES:
                per[r].append(got[r])
        results[name] = (nc, nt, nn, {r: np.array(v, dtype=np.float64) for r, v in per.items()})
        print(f"{name} done", file=sys.stderr, flush=True)
    return results


def rows_of(results):
    rows = []
    for name, (nc, nt, nn, per) in results.items():
        for r in RULES:
            a = per[r]
            false, enr, rec = a[:, 0], a[:, 1], a[:, 2]
            prec = np.where(enr > 0, (enr - false) / np.maximum(enr, 1), np.nan)
            rows.append([name, f"{nc:,} / {nt:,} / {nn}", r, f"{np.mean(rec):.3f}", f"{np.nanmean(prec):.3f}",
                         f"{np.nanpercentile(prec, 10):.3f}", f"{np.mean(prec < 0.93):.2f}",
                         f"{np.mean(false):.2f}", f"{np.percentile(false, 90):.0f}"])
    return rows


def observed_rows(results, observed):
    """``observed``: "B:3/37,C:12/117" -> share of the matching case's BH draws with >= that many false."""
    rows = []
    for item in filter(None, (s.strip() for s in observed.split(","))):
        key, counts = item.split(":")
        false, enr = (int(v) for v in counts.split("/"))
        case = next(n for n in results if n.startswith(key + "-") or n == key)
        a = results[case][3][REFERENCE]
        rows.append([key, case, f"{false} / {enr}", f"{(enr - false) / enr:.3f}",
                     f"{np.mean(a[:, 0] >= false):.3f}"])
    return rows


OBS_HEADER = ["ours", "oracle case", "false / enriched", "precision", "share of oracle draws (perfect ranking, BH) with >= as many false"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=200)
    ap.add_argument("--rate", type=float, default=0.05)
    ap.add_argument("--min-fold", type=float, default=2.0)
    ap.add_argument("--observed", default="", help='our tubes, e.g. "B:3/37,C:12/117,D:14/193"')
    ap.add_argument("--cases", default="", help='only the cases whose names start so, e.g. "B,C,D"')
    ap.add_argument("--markdown")
    args = ap.parse_args(argv)
    results = run(args.seeds, args.rate, args.min_fold, [c.strip() for c in args.cases.split(",") if c.strip()])
    rows = rows_of(results)
    print(f"\nOracle score, {args.seeds} draws per case, FDR {100 * args.rate:g} %, minimum fold {args.min_fold:g}")
    print(table(HEADER, rows))
    md = [markdown(HEADER, rows)]
    if args.observed:
        obs = observed_rows(results, args.observed)
        print()
        print(table(OBS_HEADER, obs))
        md += ["", markdown(OBS_HEADER, obs)]
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write("\n".join(md) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
