#!/usr/bin/env python3
"""Populations (modes of the fitted density, core/populations.py) against known truth.

    python tests/benchmarks/populations_benchmark.py [--folder sample_events] [--parts demo,scenarios,real,assign]
                                                     [--markdown OUT.md]

Tables:

1. **Demo tubes** (``sample_events``, truth in ``truth/<stem>.npz`` ``labels``):
   each tube's default recipe, density fitted as ``core.analysis`` does
   (``density_input``, the recipe's engine), populations found without any
   control.  Adjusted Rand index (``sklearn.metrics.adjusted_rand_score``)
   between found and true labels over the kept events (all labels, and without
   debris and aggregates), the largest relative share error over the true
   populations above 1 % (each true population matched to the found
   population holding most of its events), and the rare CD34+ population:
   recall and precision of the found population holding most of its events,
   and whether that population is flagged rare.  Targets: ARI >= 0.9, share
   error <= 10 %, rare recall and precision >= 0.9.
2. **Grown populations**: populations found on the control tube A (its model
   and kept events) counted in A and in B, C, D
   (:func:`core.populations.population_changes`); the row of the population
   holding most of the activated CD8 T cells: fold (95 % interval), q, and the
   true fold (true share in the tube / true share in A).  Target: q < 0.01 and
   fold within 20 % of the truth.
3. **Scenarios with known components** (``density_scenarios.py``, 30,000
   events, seed 0): ARI with and without the debris background, true and found
   populations, rare component (0.5 %) recall/precision, seconds to fit and to
   find.
4. **Real files** (fcsparser's ``tests/data``, prepared as
   ``density_benchmark.prepare_file``; named by FCS version, events and
   channels): populations found, rare ones, seconds to fit and to find.
5. **Assigning 10^6 events** with a stored definition (tube D's), seconds,
   and whether a second run gives identical labels.
"""

from __future__ import annotations

import argparse
import glob
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
for _p in (HERE, ROOT):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from sklearn.metrics import adjusted_rand_score  # noqa: E402

from core.analysis import _channel_labels, _engine_kwargs, density_input  # noqa: E402
from core.density import AdditiveTreeDensity  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.populations import assign_populations, find_populations, population_changes  # noqa: E402
from core.recipe import default_recipe  # noqa: E402
from core.scenario import RARE_POPULATION  # noqa: E402
from contrast_benchmark import markdown, table  # noqa: E402  (the sibling script's tables)

ACTIVATED = "T CD8 activated"
IGNORED = ("debris", "aggregates")


def best_match(found, truth_mask):
    """The found population holding most of the true population's events."""
    ids, counts = np.unique(found[truth_mask & (found >= 0)], return_counts=True)
    return int(ids[np.argmax(counts)]) if ids.size else -1


def fit_tube(path, recipe=None):
    ef = read_fcs(path)
    recipe = recipe or default_recipe(ef)
    prepared, _ = density_input(ef, recipe)
    t = time.perf_counter()
    model = AdditiveTreeDensity(**_engine_kwargs(recipe)).fit(prepared.matrix)
    fit_s = time.perf_counter() - t
    return ef, recipe, prepared, model, fit_s


def find(model, prepared, ef, recipe):
    chans = list(recipe.channels)
    t = time.perf_counter()
    P = find_populations(model, prepared.matrix, chans, _channel_labels(ef, chans), recipe.transforms,
                         recipe.populations)
    return P, time.perf_counter() - t


def demo(folder):
    rows, grown_rows, fitted = [], [], {}
    for path in sorted(glob.glob(os.path.join(folder, "tube_*.fcs"))):
        stem = os.path.splitext(os.path.basename(path))[0]
        truth = np.load(os.path.join(folder, "truth", stem + ".npz"), allow_pickle=False)
        ef, recipe, prepared, model, fit_s = fit_tube(path)
        P, find_s = find(model, prepared, ef, recipe)
        lab = truth["labels"][prepared.kept]
        fitted[stem[:6]] = (ef, recipe, prepared, model, lab)
        ok = ~np.isin(lab, IGNORED)
        worst = 0.0
        for name in np.unique(lab):
            m = lab == name
            if m.mean() <= 0.01:
                continue
            p = best_match(P.labels, m)
            worst = max(worst, abs(np.mean(P.labels == p) - m.mean()) / m.mean())
        rare_truth = lab == RARE_POPULATION
        if rare_truth.any():
            p = best_match(P.labels, rare_truth)
            found = P.labels == p
            rec = (found & rare_truth).sum() / rare_truth.sum()
            prec = (found & rare_truth).sum() / max(1, found.sum())
            flagged = next(r["rare"] for r in P.table if r["id"] == p)
            rare_cols = [int(rare_truth.sum()), f"{rec:.3f}", f"{prec:.3f}", "yes" if flagged else "NO"]
        else:
            rare_cols = [0, "-", "-", "-"]
        rows.append([stem, int(prepared.kept.sum()), len(np.unique(lab)), len(P.table),
                     sum(r["rare"] for r in P.table), f"{adjusted_rand_score(lab, P.labels):.3f}",
                     f"{adjusted_rand_score(lab[ok], P.labels[ok]):.3f}", f"{100 * worst:.1f}", *rare_cols,
                     f"{fit_s:.1f}", f"{find_s:.1f}"])
    if "tube_A" in fitted:
        ef, recipe, prepared, model, lab_a = fitted["tube_A"]
        P, _ = find(model, prepared, ef, recipe)
        for key in ("tube_B", "tube_C", "tube_D"):
            if key not in fitted:
                continue
            _, _, prep_t, _, lab_t = fitted[key]
            t_labels = assign_populations(P.definition, prep_t.matrix)
            changes = population_changes(P.labels, t_labels, P.definition)
            p = best_match(t_labels, lab_t == ACTIVATED)
            c = changes[p]
            true_fold = np.mean(lab_t == ACTIVATED) / np.mean(lab_a == ACTIVATED)
            grown_rows.append([key, c["control_count"], c["test_count"], f"{c['fold']:.2f}",
                               f"{c['fold_low']:.2f}-{c['fold_high']:.2f}", f"{c['q']:.2g}",
                               f"{true_fold:.2f}", f"{100 * (c['fold'] / true_fold - 1):+.1f}",
                               sum(1 for r in changes if r["change"])])
    return rows, grown_rows, fitted


DEMO_HEADER = ["tube", "kept", "true pops", "found", "rare found", "ARI", "ARI w/o debris",
               "worst share err %", "CD34+ events", "recall", "precision", "flagged rare", "fit s", "find s"]
GROWN_HEADER = ["tube vs A", "control count", "test count", "fold", "95 % interval", "q", "true fold",
                "fold error %", "populations changed (q<=0.05)"]


def scenarios():
    import density_scenarios as S

    rows = []
    for name, d in [("heavy_tailed", 4), ("banana", 5), ("skewed", 6), ("fan", 6), ("panel", 8)]:
        X, _, lab = S.make_scenario(name, 30_000, d, 0)
        t = time.perf_counter()
        model = AdditiveTreeDensity(random_state=0).fit(X)
        fit_s = time.perf_counter() - t
        t = time.perf_counter()
        P = find_populations(model, X, [f"c{j}" for j in range(d)])
        find_s = time.perf_counter() - t
        ok = lab >= 0
        ids, counts = np.unique(lab[ok], return_counts=True)
        rare_id = ids[np.argmin(counts)]
        rare_truth = lab == rare_id
        p = best_match(P.labels, rare_truth)
        found = P.labels == p
        rows.append([f"{name}-{d}d", len(ids), len(P.table), sum(r["rare"] for r in P.table),
                     f"{adjusted_rand_score(lab, P.labels):.3f}", f"{adjusted_rand_score(lab[ok], P.labels[ok]):.3f}",
                     f"{(found & rare_truth).sum() / rare_truth.sum():.3f}",
                     f"{(found & rare_truth).sum() / max(1, found.sum()):.3f}", f"{fit_s:.1f}", f"{find_s:.1f}"])
    return rows


SCEN_HEADER = ["scenario", "true pops", "found", "rare found", "ARI", "ARI w/o debris", "rare recall",
               "rare precision", "fit s", "find s"]


def real_files():
    import density_benchmark as DB

    rows, seen = [], set()
    for _, path in DB.fcs_files():
        try:
            prepared = DB.prepare_file(path, 0)
        except Exception:  # noqa: BLE001 - fcsparser ships files meant to fail
            continue
        if prepared is None:
            continue
        M = prepared[0]
        key = (M.shape, float(np.round(M[:50], 6).sum()))
        if key in seen:
            continue
        seen.add(key)
        try:
            version = read_fcs(path).version
        except Exception:  # noqa: BLE001
            version = "?"
        t = time.perf_counter()
        model = AdditiveTreeDensity(random_state=0).fit(M)
        fit_s = time.perf_counter() - t
        t = time.perf_counter()
        P = find_populations(model, M, [f"c{j}" for j in range(M.shape[1])])
        find_s = time.perf_counter() - t
        shares = sorted((r["share"] for r in P.table), reverse=True)
        rows.append([str(version).replace("FCS", "FCS "), M.shape[0], M.shape[1], model.base_, len(P.table),
                     sum(r["rare"] for r in P.table), f"{100 * shares[0]:.1f}",
                     f"{100 * float(np.mean(P.labels < 0)):.2f}", f"{fit_s:.1f}", f"{find_s:.1f}"])
        print("  ".join(map(str, rows[-1])), flush=True)
    return rows


REAL_HEADER = ["file", "events", "channels", "base", "populations", "rare", "largest %", "none %",
               "fit s", "find s"]


def assign_million(fitted):
    ef, recipe, prepared, model, _ = fitted.get("tube_D") or next(iter(fitted.values()))
    P, _ = find(model, prepared, ef, recipe)
    X = model.sample(1_000_000, random_state=1)
    t = time.perf_counter()
    a = assign_populations(P.definition, X)
    s = time.perf_counter() - t
    b = assign_populations(P.definition, X)
    return [[f"{X.shape[0]:,} x {X.shape[1]}", P.definition.n_populations, len(P.definition.groups),
             f"{s:.2f}", "yes" if np.array_equal(a, b) else "NO"]]


ASSIGN_HEADER = ["events", "populations", "components", "seconds", "identical on rerun"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", default=os.path.join(ROOT, "sample_events"))
    ap.add_argument("--parts", default="demo,scenarios,real,assign")
    ap.add_argument("--markdown", default="")
    args = ap.parse_args(argv)
    parts = set(args.parts.split(","))
    out = []

    def show(title, header, rows):
        print(f"\n{title}\n" + table(header, rows), flush=True)
        out.append(f"**{title}**\n\n" + markdown(header, rows))

    fitted = {}
    if "demo" in parts or "assign" in parts:
        rows, grown, fitted = demo(args.folder)
        if "demo" in parts:
            show("Demo tubes: populations without a control", DEMO_HEADER, rows)
            show("Grown population (activated CD8 T cells), populations of tube A counted in both", GROWN_HEADER,
                 grown)
    if "scenarios" in parts:
        show("Scenarios with known components (30,000 events)", SCEN_HEADER, scenarios())
    if "real" in parts:
        show("fcsparser's real files", REAL_HEADER, real_files())
    if "assign" in parts:
        show("Assigning events with a stored definition", ASSIGN_HEADER, assign_million(fitted))
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write("\n\n".join(out) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
