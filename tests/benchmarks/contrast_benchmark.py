"""Contrast with a control on our sample scenario; optionally, pairwise contour accuracy.

    python tests/benchmarks/contrast_benchmark.py [--folder sample_events] [--tubes B,C,D]
                                                  [--folds 3] [--contours] [--markdown OUT.md]

Contrast table: each treated tube of the scenario against ``tube_A_control``
with the default recipe of the control tube; the truth (``truth/<stem>.npz``,
``rare``) marks the spiked rare population.  Columns: events, spiked events,
ROC AUC of the contrast score for the spiked population (reference:
sklearn.metrics.roc_auc_score), enriched events at the default alpha (0.1 %),
precision and recall of the enriched events for the spiked population, the
precision counting also populations the treatment grew at least 2-fold (the
scenario's treated tubes expand an activated subset as well: those events are
truly enriched, not false passes), share of held-out control events that
passed, seconds.  Targets: AUC >= 0.95, precision >= 0.8.  ``--folds 0,2,4``
compares cross-fitting in that many parts (0: off, one test model scoring its
own events).

Contour table (``--contours``): on the control tube, for a few channel pairs,
the two ways to get a pairwise density (see core/contours.py): a 2-D fit of the
pair vs marginalising the full model by its sampler; the share of held-out
events inside the 50/90/99 % contours (nominal minus measured, points) and
seconds.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)

from core.analysis import density_input  # noqa: E402
from core.contrast import contrast  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.recipe import default_recipe  # noqa: E402

TUBES = {"B": "tube_B_treated_low", "C": "tube_C_treated_mid", "D": "tube_D_treated_high"}


def table(header, rows):
    widths = [max(len(str(h)), *(len(str(r[i])) for r in rows)) for i, h in enumerate(header)]
    line = "  ".join(str(h).rjust(w) for h, w in zip(header, widths))
    out = [line, "-" * len(line)]
    out += ["  ".join(str(v).rjust(w) for v, w in zip(r, widths)) for r in rows]
    return "\n".join(out)


def markdown(header, rows):
    out = ["| " + " | ".join(map(str, header)) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(map(str, r)) + " |" for r in rows]
    return "\n".join(out)


def contrast_rows(folder, tubes, folds_list):
    from sklearn.metrics import roc_auc_score

    control = read_fcs(os.path.join(folder, "tube_A_control.fcs"))
    recipe = default_recipe(control)
    c_prep, _ = density_input(control, recipe)
    c_truth = np.load(os.path.join(folder, "truth", "tube_A_control.npz"), allow_pickle=False)
    c_labels = np.asarray(c_truth["labels"]).astype(str)[c_prep.kept]
    engine = recipe.engine_arguments()
    rows = []
    for key in tubes:
        stem = TUBES[key]
        ef = read_fcs(os.path.join(folder, stem + ".fcs"))
        truth = np.load(os.path.join(folder, "truth", stem + ".npz"), allow_pickle=False)
        prep, _ = density_input(ef, recipe)
        spiked = np.asarray(truth["rare"], bool)[prep.kept]
        for cross in folds_list:
            t0 = time.perf_counter()
            res = contrast(prep.matrix, c_prep.matrix, engine=engine, random_state=engine["random_state"],
                           cross_fit=cross)
            sec = time.perf_counter() - t0
            auc = roc_auc_score(spiked, res.score[np.isfinite(res.score)]) if spiked.any() else float("nan")
            tp = int(np.sum(res.enriched & spiked))
            prec = tp / res.count if res.count else float("nan")
            rec = tp / spiked.sum() if spiked.any() else float("nan")
            labels = np.asarray(truth["labels"]).astype(str)[prep.kept]
            grown = enriched_populations(labels, c_labels)
            hit = np.isin(labels, grown) | spiked
            prec_any = float(np.mean(hit[res.enriched])) if res.count else float("nan")
            rows.append([stem, cross if cross >= 2 else "off", ef.n_events, int(spiked.sum()), f"{auc:.4f}", res.count,
                         f"{prec:.3f}", f"{rec:.3f}", f"{prec_any:.3f}", f"{100 * res.control_pass_share:.3f}",
                         f"{sec:.1f}"])
            grown_note[stem] = grown
            print(table(CONTRAST_HEADER, rows[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    return rows


CONTRAST_HEADER = ["tube", "cross-fit parts", "events", "spiked", "ROC AUC", "enriched", "precision", "recall",
                   "precision (grown)", "control pass %", "seconds"]
grown_note: dict = {}


def enriched_populations(test_labels, control_labels, factor=2.0):
    """Populations whose share of the test events is at least ``factor`` x their share in the control."""
    out = []
    for name in np.unique(test_labels):
        t = np.mean(test_labels == name)
        c = np.mean(control_labels == name)
        if t >= factor * c:
            out.append(str(name))
    return out


def contour_rows(folder, n_pairs=3):
    from core.contours import pair_density, pair_density_from_model
    from core.density import AdditiveTreeDensity

    control = read_fcs(os.path.join(folder, "tube_A_control.fcs"))
    recipe = default_recipe(control)
    prep, _ = density_input(control, recipe)
    X = prep.matrix
    rng = np.random.default_rng(0)
    perm = rng.permutation(X.shape[0])
    train, held = X[perm[: X.shape[0] // 2]], X[perm[X.shape[0] // 2:]]
    t0 = time.perf_counter()
    full = AdditiveTreeDensity(**recipe.engine_arguments()).fit(train)
    t_full = time.perf_counter() - t0
    pairs = [(0, 1), (1, 3), (2, 3), (4, 8), (0, 9)][:n_pairs]
    rows = []
    for i, j in pairs:
        name = f"{recipe.channels[i]} x {recipe.channels[j]}"
        for how in ("2-D fit of the pair", "full model's sampler"):
            t0 = time.perf_counter()
            if how.startswith("2-D"):
                pdn = pair_density(train[:, [i, j]], grid_size=128, random_state=0)
            else:
                pdn = pair_density_from_model(full, i, j, n_samples=train.shape[0], grid_size=128)
            sec = time.perf_counter() - t0
            inside = pdn.share_inside(held[:, [i, j]])
            errs = [f"{100 * (inside[m] - m):+.2f}" for m in (0.5, 0.9, 0.99)]
            rows.append([name, how, *errs, f"{sec:.1f}"])
            print(table(CONTOUR_HEADER, rows[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    return rows, t_full


CONTOUR_HEADER = ["pair", "pairwise density from", "50 % (pts)", "90 % (pts)", "99 % (pts)", "seconds"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", default=os.path.join(ROOT, "sample_events"))
    ap.add_argument("--tubes", default="B,C,D")
    ap.add_argument("--folds", default="3", help="cross-fitting parts to compare, e.g. 0,2,4 (0 = off)")
    ap.add_argument("--contours", action="store_true", help="also the pairwise contour table")
    ap.add_argument("--no-contrast", action="store_true")
    ap.add_argument("--markdown", help="also write the tables as markdown here")
    args = ap.parse_args(argv)
    md = []
    if not args.no_contrast:
        rows = contrast_rows(args.folder, [t.strip() for t in args.tubes.split(",") if t.strip()], [int(f) for f in args.folds.split(",")])
        print("\nContrast with tube_A_control (default recipe; alpha 0.1 %; targets: AUC >= 0.95, precision >= 0.8)")
        print(table(CONTRAST_HEADER, rows))
        print("precision: share of enriched events in the spiked rare population; precision (grown): share in"
              " any population at least 2 x more frequent than in the control (truth labels): "
              + "; ".join(f"{k}: {', '.join(v)}" for k, v in grown_note.items()))
        md += ["### Contrast with the control", "", markdown(CONTRAST_HEADER, rows), ""]
    if args.contours:
        rows, t_full = contour_rows(args.folder)
        print("\nHeld-out events inside the HDR contours, measured minus nominal (control tube, half for fitting)")
        print(table(CONTOUR_HEADER, rows))
        print(f"(the full {len(default_recipe(read_fcs(os.path.join(args.folder, 'tube_A_control.fcs'))).channels)}"
              f"-channel model took {t_full:.1f} s to fit; not included above)")
        md += ["### Pairwise contours", "", markdown(CONTOUR_HEADER, rows), ""]
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write("\n".join(md))
    return 0


if __name__ == "__main__":
    sys.exit(main())
