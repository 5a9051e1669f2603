"""Probe: a nearest-neighbour density ratio beside the comparison's density score (not used by the app).

    python tests/benchmarks/contrast_knn_probe.py [--k 10] [--parts demo,generator,null] [--null-seeds 5]

For each pair (demo tubes B, C, D against A; the contrast benchmark's generator,
test draw 202 at 0.05 % and 0.2 %) the comparison is run as usual
(:func:`core.contrast.contrast`), then, with the SAME parts, each event of part k
(test and control) also gets the k-nearest-neighbour log density ratio

    s_kNN(x) = d log(r_control(x) / r_test(x)) + log(n_control / n_test)

with r the distance to the k-th nearest training event of each tube outside part
k (n of them; d channels): the kNN density estimate's ratio (published method:
k-nearest-neighbour density estimation).  Fitted without part k's events, it keeps
the conformal p-values valid.  "kNN rw" subtracts the control's population-share
correction (:func:`core.contrast.reweighted_control`, the same factor the density
score uses); "min" is the smaller of the density score and kNN rw.  Each score goes
through the same conformal p-values, Benjamini-Hochberg and minimum fold; the
table gives enriched / precision / recall against the truth.  ``null``: the contrast
benchmark's null pairs (control and test drawn alike, 20,000 events each, fresh
fits per seed): events flagged by each score (target: none in most seeds).
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np
from scipy.spatial import cKDTree

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from contrast_benchmark import (ENGINE, TUBES, draw, remembering_factory, table)  # noqa: E402
from core.analysis import density_input  # noqa: E402
from core.contrast import conformal_pvalues, contrast, prepare_control, reweighted_control  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.fdr import bh_qvalues  # noqa: E402
from core.recipe import default_recipe  # noqa: E402


def knn_scores(T, C, t_part, c_part, k, folds=3):
    """(test scores, control scores): s_kNN of each event by the other parts' events of both tubes."""
    d = T.shape[1]
    st, sc = np.empty(T.shape[0]), np.empty(C.shape[0])
    for j in range(folds):
        Tt, Ct = T[t_part != j], C[c_part != j]
        tt, tc = cKDTree(Tt), cKDTree(Ct)
        for X, sel, out in ((T, t_part == j, st), (C, c_part == j, sc)):
            rt = tt.query(X[sel], k=k)[0][:, -1]
            rc = tc.query(X[sel], k=k)[0][:, -1]
            out[sel] = d * np.log(np.maximum(rc, 1e-12) / np.maximum(rt, 1e-12)) + np.log(Ct.shape[0] / Tt.shape[0])
    return st, sc


def share_factors(T, pc, t_part):
    """The control's population-share correction (log factor) of each test and control event."""
    ft, fc = np.zeros(T.shape[0]), np.zeros(pc.n_events)
    for j in range(pc.folds):
        factor = reweighted_control(pc.models[j], T[t_part != j])
        if factor is not None:
            ft[t_part == j] = factor(T[t_part == j])
            fc[pc.part == j] = factor(pc.events[pc.part == j])
    return ft, fc


def rates(st, sc, truth, rate=0.05, min_fold=2.0):
    q = bh_qvalues(conformal_pvalues(st, sc))
    enr = (q <= rate) & (st >= np.log(min_fold))
    n, tp = int(enr.sum()), int(np.sum(enr & truth))
    return f"{n} / {tp / n:.3f} / {tp / truth.sum():.3f}" if n else f"0 / - / {0:.3f}"


def probe(label, T, C, truth, factory, k, random_state=0):
    pc = prepare_control(C, model_factory=factory, random_state=random_state)
    res = contrast(T, None, prepared_control=pc, model_factory=factory, random_state=random_state)
    t_part = res.info["part"]
    st, sc = knn_scores(T, pc.events, t_part, pc.part, k)
    ft, fc = share_factors(T, pc, t_part)
    row = [label, rates(res.score, res.control_scores, truth), rates(st, sc, truth),
           rates(st - ft, sc - fc, truth),
           rates(np.minimum(res.score, st - ft), np.minimum(res.control_scores, sc - fc), truth),
           f"{np.max(sc):.2f}", f"{np.min(st[truth]):.2f}"]
    print(table(HEADER, [row]).splitlines()[-1], file=sys.stderr, flush=True)
    return row


HEADER = ["pair", "density score", "kNN", "kNN rw", "min(density, kNN rw)", "top control kNN",
          "lowest new kNN"]


def null_row(seed, k, n=20_000):
    C, _ = draw(n, seed=1000 + seed)
    T, _ = draw(n, seed=2000 + seed)
    factory = remembering_factory(ENGINE)
    pc = prepare_control(C, model_factory=factory, random_state=seed)
    res = contrast(T, None, prepared_control=pc, model_factory=factory, random_state=seed)
    t_part = res.info["part"]
    st, sc = knn_scores(T, pc.events, t_part, pc.part, k)
    ft, fc = share_factors(T, pc, t_part)

    def flagged(a, b):
        q = bh_qvalues(conformal_pvalues(a, b))
        return int(np.sum((q <= 0.05) & (a >= np.log(2.0))))
    row = [f"null seed {seed}", flagged(res.score, res.control_scores), flagged(st, sc), flagged(st - ft, sc - fc),
           flagged(np.minimum(res.score, st - ft), np.minimum(res.control_scores, sc - fc)),
           f"{np.max(sc):.2f}", ""]
    print(table(HEADER, [row]).splitlines()[-1], file=sys.stderr, flush=True)
    return row


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--k", type=int, default=10)
    ap.add_argument("--parts", default="demo,generator")
    ap.add_argument("--null-seeds", type=int, default=5)
    ap.add_argument("--folder", default=os.path.join(os.path.dirname(os.path.dirname(HERE)), "sample_events"))
    args = ap.parse_args(argv)
    rows = []
    if "generator" in args.parts:
        C, _ = draw(60_000, seed=101)
        factory = remembering_factory(ENGINE)
        for share in (0.0005, 0.002):
            T, truth = draw(60_000, seed=202, new_share=share)
            rows.append(probe(f"generator {100 * share:g} %, draw 202", T, C, truth, factory, args.k))
    if "demo" in args.parts:
        control = read_fcs(os.path.join(args.folder, "tube_A_control.fcs"))
        recipe = default_recipe(control)
        c_prep, _ = density_input(control, recipe)
        engine = recipe.engine_arguments()
        factory = remembering_factory(engine)
        for key, stem in TUBES.items():
            prep, _ = density_input(read_fcs(os.path.join(args.folder, stem + ".fcs")), recipe)
            truth = np.load(os.path.join(args.folder, "truth", stem + ".npz"), allow_pickle=False)
            new = np.asarray(truth["rare"], bool)[prep.kept]
            rows.append(probe(f"tube {key}", prep.matrix, c_prep.matrix, new, factory, args.k,
                              random_state=engine["random_state"]))
    if "null" in args.parts:
        rows += [null_row(seed, args.k) for seed in range(args.null_seeds)]
    print(f"\nenriched / precision / recall at FDR 5 %, minimum fold 2 (null rows: events flagged); k = {args.k}")
    print(table(HEADER, rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
