#!/usr/bin/env python3
"""Which first map ("base") gives the best held-out log-likelihood on the real
files fcsparser ships: AdditiveTreeDensity with each ``base`` and otherwise
default settings, on the same prepared events and the same random half split
as ``density_benchmark.py``.  Prints a table (nats per event, higher is
better; the default base is marked) and the fit seconds.

    python tests/benchmarks/base_choice_benchmark.py [--bases logistic,gmm,skewed]
        [--files SUBSTRING] [--synthetic]

``--synthetic`` adds the benchmark's synthetic scenarios (50,000 / 50,000).
No truth on the files: atoms and grids give them large positive values
(see density_benchmark.py's notes), so compare within a row only.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
for _p in (HERE, ROOT):
    if _p not in sys.path:
        sys.path.insert(0, _p)

import density_benchmark as DB  # noqa: E402
import density_scenarios as S  # noqa: E402
from core.density import AdditiveTreeDensity  # noqa: E402

DEFAULT_BASE = AdditiveTreeDensity().base


def _cases(args):
    if args.synthetic:
        for name, d in DB.CASES:
            mix = S.SCENARIOS[name](d)
            X, _ = mix.sample(50_000, np.random.default_rng(0))
            Xt, _ = mix.sample(50_000, np.random.default_rng(1))
            yield f"{name}-{d}d (truth {mix.logpdf(Xt).mean():.3f})", X, Xt
    seen = set()
    for rel, path in DB.fcs_files():
        if args.files and args.files not in rel:
            continue
        try:
            prepared = DB.prepare_file(path, 0)
        except Exception:  # noqa: BLE001 - fcsparser ships files meant to fail
            continue
        if prepared is None:
            continue
        M = prepared[0]
        digest = f"{M.shape}|{np.round(M[:50], 6).sum():.6f}"
        if digest in seen:
            continue
        seen.add(digest)
        order = np.random.default_rng(0).permutation(M.shape[0])
        half = M.shape[0] // 2
        yield DB.file_label(path), M[order[:half]], M[order[half:]]


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--bases", default="logistic,gmm,skewed,auto")
    p.add_argument("--files", default="", help="only files whose path contains this")
    p.add_argument("--synthetic", action="store_true")
    args = p.parse_args(argv)
    bases = [b for b in args.bases.split(",") if b]
    rows = []
    for name, Xtr, Xte in _cases(args):
        row = [name, Xtr.shape[1]]
        secs = []
        for base in bases:
            t = time.perf_counter()
            model = AdditiveTreeDensity(base=base, random_state=0).fit(Xtr)
            secs.append(time.perf_counter() - t)
            row.append(float(model.score_samples(Xte).mean()))
        vals = np.array(row[2:])
        # a tie (the default picked the same map as another option) counts for the default
        best = DEFAULT_BASE if DEFAULT_BASE in bases and vals[bases.index(DEFAULT_BASE)] >= vals.max() - 1e-9 \
            else bases[int(np.argmax(vals))]
        row += [best] + secs
        rows.append(row)
        print(f"  {name}: " + ", ".join(f"{b} {v:.3f}" for b, v in zip(bases, row[2:2 + len(bases)])),
              flush=True)
    head = ["case", "d"] + [b + (" (default)" if b == DEFAULT_BASE else "") for b in bases] + ["best"] + \
        [f"fit s {b}" for b in bases]
    widths = [max(len(head[0]), *(len(r[0]) for r in rows))] + [max(len(h), 8) for h in head[1:]]
    print()
    print("  ".join(h.ljust(w) if i == 0 else h.rjust(w) for i, (h, w) in enumerate(zip(head, widths))))
    print("  ".join("-" * w for w in widths))
    for r in rows:
        cells = [r[0], str(r[1])] + [f"{v:.3f}" for v in r[2:2 + len(bases)]] + [r[2 + len(bases)]] + \
            [f"{v:.1f}" for v in r[3 + len(bases):]]
        print("  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(cells, widths))))
    wins = sum(r[2 + len(bases)] == DEFAULT_BASE for r in rows)
    print(f"\nDefault base ({DEFAULT_BASE}) best on {wins} of {len(rows)} cases.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
