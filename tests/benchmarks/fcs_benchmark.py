"""Speed of FCS reading and writing; prints a table (no assertions).

Run: python tests/benchmarks/fcs_benchmark.py [--events 1000000]

Rows: every readable file fcsparser ships (read in place) and synthetic float32
files of growing size written by write_fcs, each read by read_fcs and by
fcsparser.parse alone (the difference is our checks and $PnE/$PnG decoding).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import warnings

import fcsparser
import numpy as np

sys.path.insert(0, os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))

from core.errors import FcsFileError  # noqa: E402
from core.fcs import read_fcs, write_fcs  # noqa: E402


def _best_of(fn, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _fcsparser(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fcsparser.parse(path, channel_naming="$PnN", dtype=None, encoding="latin-1")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--events", type=int, default=1_000_000, help="largest synthetic file")
    args = parser.parse_args()

    rows = []
    root = os.path.join(os.path.dirname(fcsparser.__file__), "tests", "data")
    for folder, _, files in sorted(os.walk(root)):
        for name in sorted(files):
            if name.endswith(".txt"):
                continue
            path = os.path.join(folder, name)
            try:
                ef = read_fcs(path)
            except FcsFileError:
                continue
            rows.append((name[:38], ef.n_events, ef.n_channels, os.path.getsize(path),
                         _best_of(lambda: read_fcs(path)), _best_of(lambda: _fcsparser(path)),
                         float("nan")))

    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        n = 10_000
        while n <= args.events:
            data = rng.normal(1000.0, 300.0, size=(n, 12))
            path = os.path.join(tmp, f"synthetic_{n}.fcs")
            t_write = _best_of(lambda: write_fcs(path, data, [f"C{j}" for j in range(12)],
                                                 overwrite=True), repeat=2)
            rows.append((f"synthetic float32 {n} events", n, 12, os.path.getsize(path),
                         _best_of(lambda: read_fcs(path)), _best_of(lambda: _fcsparser(path)),
                         t_write))
            n *= 10

    head = f"{'file':40s} {'events':>9s} {'ch':>3s} {'MB':>7s} {'read_fcs s':>11s} " \
           f"{'fcsparser s':>12s} {'write_fcs s':>12s} {'read MB/s':>10s}"
    print(head)
    print("-" * len(head))
    for name, n_ev, n_ch, size, t_ours, t_ref, t_w in rows:
        print(f"{name:40s} {n_ev:9d} {n_ch:3d} {size / 1e6:7.2f} {t_ours:11.4f} {t_ref:12.4f} "
              f"{t_w:12.4f} {size / 1e6 / t_ours:10.1f}")


if __name__ == "__main__":
    main()
