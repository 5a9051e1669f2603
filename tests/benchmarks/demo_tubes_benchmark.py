#!/usr/bin/env python3
"""Our four demo tubes through the default recipe and analyse(): kept events, events set
aside, held-out log-likelihood, and the rare events (0.5 % share) against the generator's
truth (sample_events/truth).  Saves per-event log densities and rare flags, and compares
with an earlier run's file:

    python tests/benchmarks/demo_tubes_benchmark.py --save after.npz [--compare before.npz]

Runs with whatever ``core`` is first on PYTHONPATH, so the same script measures an older
checkout too.  "Within noise" reads: held-out log-likelihood within a few hundredths of a
nat, rare-event precision and the rare set's overlap as between two seeds.
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
if ROOT not in sys.path:
    sys.path.append(ROOT)

from core.analysis import analyse  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.recipe import default_recipe  # noqa: E402
from core.scenario import load_truth  # noqa: E402

STEMS = ("tube_A_control", "tube_B_treated_low", "tube_C_treated_mid", "tube_D_treated_high")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--save", required=True)
    p.add_argument("--compare", default=None)
    p.add_argument("--seed", type=int, default=0, help="the recipe's random_state (jitter and fit)")
    args = p.parse_args(argv)
    folder = os.path.join(ROOT, "sample_events")
    before = dict(np.load(args.compare, allow_pickle=False)) if args.compare else None
    out = {}
    print(f"{'tube':<22} {'kept':>7} {'set aside':>10} {'held-out':>9} {'rare':>5} {'precision':>9}"
          + ("  vs earlier: d held-out, rare overlap (Jaccard), log-density rank corr." if before else ""))
    for stem in STEMS:
        ef = read_fcs(os.path.join(folder, stem + ".fcs"))
        recipe = default_recipe(ef)
        recipe.engine = {"random_state": args.seed}
        an = analyse(ef, recipe)
        truth = load_truth(folder, stem)
        prec = float(truth["rare"][an.rare].mean()) if an.rare.any() else float("nan")
        out[stem + ":log_density"] = an.log_density
        out[stem + ":rare"] = an.rare
        out[stem + ":heldout"] = np.array(an.heldout_loglik)
        line = (f"{stem:<22} {an.n_kept:7,} {an.n_events - an.n_kept:10,} {an.heldout_loglik:9.3f} "
                f"{an.n_rare:5,} {prec:9.3f}")
        if before is not None:
            from scipy.stats import spearmanr

            r0 = before[stem + ":rare"]
            jac = (r0 & an.rare).sum() / max(1, (r0 | an.rare).sum())
            both = np.isfinite(before[stem + ":log_density"]) & np.isfinite(an.log_density)
            rho = spearmanr(before[stem + ":log_density"][both], an.log_density[both]).correlation
            line += f"  {an.heldout_loglik - float(before[stem + ':heldout']):+.3f}, {jac:.3f}, {rho:.4f}"
        print(line, flush=True)
    np.savez(args.save, **out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
