#!/usr/bin/env python3
"""Time and peak memory of preparing the density's events (core.analysis.density_input)
on a made-up acquisition of 1,000,000 events x 30 channels.

Channels: 2 scatter, 26 fluorescence, Time, one width; 20 fluorescence channels
hold whole numbers (a grid of step 1, as float files store them), the others are
continuous.  Recipe: the 26 fluorescence channels, logicle on them, linear on the
rest; without and with a 10-detector spillover matrix.  First prints the logicle's
time per value against numpy's arcsinh (core.transforms, same 1,000,000 values,
best of 9 alternated runs), then one row per case:
seconds (best of ``--repeat``) and the peak of numpy's allocations during the call
(tracemalloc), beyond the event file itself.

    python tests/benchmarks/prepare_benchmark.py [--events 1000000] [--repeat 2] [--dtype float32]

``--dtype``: the type the event matrix is held in (float64, what read_fcs gave
before it kept float files as float32; float32, what it gives for a float file
now).  The whole-number channels are exact in both.

Runs with whatever ``core`` is first on PYTHONPATH, so the same script measures an
older checkout too (it only uses EventFile's first fields, Recipe and density_input).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import tracemalloc

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
if ROOT not in sys.path:
    sys.path.append(ROOT)

from core.analysis import density_input  # noqa: E402
from core.transforms import arcsinh, logicle  # noqa: E402
from core.fcs import EventFile  # noqa: E402
from core.recipe import Recipe  # noqa: E402


def make_file(n: int, seed: int = 0, dtype=np.float64):
    rng = np.random.default_rng(seed)
    names = ["FSC-A", "SSC-A"] + [f"FL{i}-A" for i in range(1, 27)] + ["Time", "FL1-W"]
    data = np.empty((n, len(names)))
    data[:, 0] = rng.gamma(4.0, 15000.0, n)
    data[:, 1] = rng.gamma(3.0, 8000.0, n)
    for j in range(2, 28):
        x = rng.lognormal(6.0, 1.2, n) - rng.gamma(2.0, 60.0, n)
        data[:, j] = np.round(x) if j < 22 else x
    data[:, 28] = np.sort(rng.uniform(0, 3600, n))
    data[:, 29] = rng.normal(80.0, 9.0, n)
    np.clip(data, -5000.0, 262143.0, out=data)
    kw = {}
    det = names[2:12]
    S = np.eye(10) + np.triu(rng.uniform(0.0, 0.08, (10, 10)), 1)
    kw["$SPILLOVER"] = ",".join([str(len(det))] + det + [f"{v:.6g}" for v in S.ravel()])
    return EventFile(path="made-up.fcs", data=data.astype(dtype, copy=False), channel_names=names,
                     channel_labels=[""] * len(names),
                     channel_ranges=np.full(len(names), 262144.0), keywords=kw, version="FCS3.1")


def recipe(names, compensate: bool) -> Recipe:
    fl = [c for c in names if c.startswith("FL") and c.endswith("-A")]
    tr = {c: {"kind": "logicle", "T": 262144.0, "W": 0.5, "M": 4.5, "A": 0.0} for c in fl}
    tr.update({c: {"kind": "linear", "scale": 1 / 262144.0, "offset": 0.0} for c in names if c not in fl})
    return Recipe(channels=fl, transforms=tr,
                  compensation={"source": "file" if compensate else "none", "csv_path": None})


def logicle_against_arcsinh(n: int = 1_000_000, repeat: int = 9) -> tuple[float, float]:
    """Nanoseconds per value of core.transforms' logicle (T 262144, W 0.5, M 4.5) and arcsinh
    (cofactor 150) on the same n fluorescence-like values, best of ``repeat`` runs of each, alternated."""
    x = np.random.default_rng(1).lognormal(6.0, 1.5, n) - 200.0
    logicle(x[:100], 262144.0, 0.5)   # compile / warm up
    best_l = best_a = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        arcsinh(x, 150.0)
        best_a = min(best_a, time.perf_counter() - t)
        t = time.perf_counter()
        logicle(x, 262144.0, 0.5, 4.5, 0.0)
        best_l = min(best_l, time.perf_counter() - t)
    return best_l * 1e9 / n, best_a * 1e9 / n


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--events", type=int, default=1_000_000)
    p.add_argument("--repeat", type=int, default=2)
    p.add_argument("--dtype", default="float64", choices=("float64", "float32"))
    args = p.parse_args(argv)
    ef = make_file(args.events, dtype=np.dtype(args.dtype))
    import core

    print(f"core from {os.path.dirname(core.__file__)}; {args.events:,} events x {ef.n_channels} channels "
          f"{ef.data.dtype} ({ef.data.nbytes / 1e6:.0f} MB)")
    ns_l, ns_a = logicle_against_arcsinh()
    print(f"logicle {ns_l:.1f} ns per value, arcsinh {ns_a:.1f} ns per value: ratio {ns_l / ns_a:.2f}")
    print(f"{'case':<22} {'seconds':>8} {'peak MB':>8} {'kept':>9} {'d':>3}")
    for comp in (False, True):
        r = recipe(ef.channel_names, comp)
        best, peak = np.inf, 0.0
        for _ in range(args.repeat):
            tracemalloc.start()
            t = time.perf_counter()
            prepared, values = density_input(ef, r)
            best = min(best, time.perf_counter() - t)
            peak = max(peak, tracemalloc.get_traced_memory()[1] / 1e6)
            tracemalloc.stop()
            del values
        print(f"{'compensated' if comp else 'not compensated':<22} {best:8.2f} {peak:8.0f} "
              f"{prepared.n_kept:9,} {prepared.matrix.shape[1]:3d}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
