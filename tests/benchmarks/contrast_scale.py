#!/usr/bin/env python3
"""Contrast scale benchmark: ``core.analysis.analyse(test, recipe, control=...)`` on large
generated files, with the time of each stage of the comparison and the peak memory.

Run from the repository root (prefix with ``nice`` on a shared machine)::

    python tests/benchmarks/contrast_scale.py [--sizes 200000,1000000] [--channels 12]
        [--threads 2] [--exact] [--markdown PATH]

``--exact``: every neighbour search exact (``core.contrast_local.EXACT_POOL`` raised
above any pool): the comparison as it was before the large-file search.

Data: the scale benchmark's panel (``tests/benchmarks/scale_benchmark.py``:
16 log-normal populations plus debris, arcsinh-scaled by the default recipe),
written as two FCS files of n events x d channels (float32): the control (seed 7)
and the test (seed 8: a second draw of the same distribution -- the time of a
comparison depends little on what it finds).  Both are written in a process of
their own; a fresh process reads the test file and runs ``analyse`` with the
control file and the default recipe (local score on: ``smallest_population`` 30,
k = 20), with numba's thread count set to ``--threads``.

Stages (seconds, exclusive: a stage inside another is not counted twice):
``prepare``/``fit``/``score``... of the test file's own analysis (``Analysis.timing``
outside the comparison), then within the comparison: ``fit`` (the 3 + 3 part models),
``density scoring`` (score_samples of the part models, the control's population shares
and their factor), ``neighbour counts`` (``core.contrast_local.local_scores``: trees
and queries), ``p-values`` (``min_rank_pvalues`` and BH), ``shift check``, the
remainder of ``contrast`` (``other``), and ``population changes``.  Peak MB: the
process's peak resident memory (``resource.getrusage``).

``core`` is imported from PYTHONPATH when it is set, so the same script measures an
older checkout in the same run.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
if ROOT not in sys.path:
    sys.path.append(ROOT)

STAGES = ["read", "prepare", "fit (own)", "score (own)", "other (own)", "contrast: fit", "contrast: density scoring",
          "contrast: neighbour counts", "contrast: p-values", "contrast: shift check", "contrast: other",
          "population changes", "total"]


def _write_child(n: int, d: int, seed: int, path: str) -> None:
    import numpy as np
    from core.fcs import write_fcs
    from scale_benchmark import raw_panel
    raw = raw_panel(n, d, seed=seed)
    names = ["FSC-A", "SSC-A"] + [f"FL{j}-A" for j in range(1, d - 1)]
    raw[:, :2] = np.abs(raw[:, :2]) * 5.0
    write_fcs(path, raw.astype(np.float32), names, channel_ranges=np.full(d, 262144.0))


class _Clock:
    """Exclusive time per label: a wrapped call's time minus that of wrapped calls inside it."""

    def __init__(self):
        self.total, self.stack = {}, []

    def wrap(self, fn, label):
        def timed(*args, **kwargs):
            self.stack.append(0.0)
            t = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                dt = time.perf_counter() - t
                inner = self.stack.pop()
                self.total[label] = self.total.get(label, 0.0) + dt - inner
                if self.stack:
                    self.stack[-1] += dt
        return timed


def _analyse_child(test_path: str, control_path: str, threads: int, exact: bool = False) -> dict:
    import resource

    import numba

    import core.contrast as contrast
    from core.analysis import analyse
    from core.density import AdditiveTreeDensity
    from core.fcs import read_fcs
    from core.recipe import default_recipe
    numba.set_num_threads(threads)
    if exact:
        import core.contrast_local as local
        local.EXACT_POOL = 10 ** 12
    clock = _Clock()
    in_contrast = {"on": False, "fit": False}
    fit0, score0 = AdditiveTreeDensity.fit, AdditiveTreeDensity.score_samples
    fit_t, score_t = clock.wrap(fit0, "contrast: fit"), clock.wrap(score0, "contrast: density scoring")

    def fit(self, *a, **k):
        if not in_contrast["on"]:
            return fit0(self, *a, **k)
        in_contrast["fit"] = True
        try:
            return fit_t(self, *a, **k)
        finally:
            in_contrast["fit"] = False
    AdditiveTreeDensity.fit = fit
    AdditiveTreeDensity.score_samples = lambda self, *a, **k: (
        score_t if in_contrast["on"] and not in_contrast["fit"] else score0)(self, *a, **k)
    for name, label in (("share_ratio", "contrast: density scoring"), ("_log_factor", "contrast: density scoring"),
                        ("local_scores", "contrast: neighbour counts"), ("min_rank_pvalues", "contrast: p-values"),
                        ("bh_qvalues", "contrast: p-values"), ("as_extreme", "contrast: p-values"),
                        ("shift_check", "contrast: shift check")):
        setattr(contrast, name, clock.wrap(getattr(contrast, name), label))
    whole = clock.wrap(contrast.contrast, "contrast: other")

    def in_whole(*a, **k):
        in_contrast["on"] = True
        try:
            return whole(*a, **k)
        finally:
            in_contrast["on"] = False
    contrast.contrast = in_whole
    t = time.perf_counter()
    ef = read_fcs(test_path)
    read_s = time.perf_counter() - t
    recipe = default_recipe(ef)
    a = analyse(ef, recipe, control=control_path)
    timing = {"read": read_s}
    own = {k: float(v) for k, v in a.timing.items()}
    timing["prepare"] = own.get("prepare", 0.0)
    timing["fit (own)"] = own.get("fit", 0.0)
    timing["score (own)"] = own.get("score", 0.0)
    timing["other (own)"] = own["total"] - own.get("contrast", 0.0) - own.get("population changes", 0.0) \
        - timing["prepare"] - timing["fit (own)"] - timing["score (own)"]
    timing.update(clock.total)
    timing["population changes"] = own.get("population changes", 0.0)
    timing["total"] = read_s + own["total"]
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    res = a.contrast
    return {"n": ef.n_events, "d": ef.n_channels, "threads": threads, "exact": exact, "timing": timing, "peak_mb": peak,
            "enriched": int(res.count), "k": int(res.info.get("neighbours", 0)),
            "stage_names": sorted(own)}


def run(n: int, d: int, threads: int, exact: bool = False, log=print) -> dict | None:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([p for p in (env.get("PYTHONPATH", ""), HERE) if p])
    with tempfile.TemporaryDirectory() as tmp:
        paths = [os.path.join(tmp, f"{w}_{n}x{d}.fcs") for w in ("control", "test")]
        for seed, path in zip((7, 8), paths):
            subprocess.run([sys.executable, os.path.abspath(__file__), "--write", f"{n},{d},{seed},{path}"],
                           check=True, cwd=ROOT, env=env)
        out = subprocess.run([sys.executable, os.path.abspath(__file__), "--child",
                              f"{paths[1]},{paths[0]},{threads},{int(exact)}"],
                             capture_output=True, text=True, cwd=ROOT, env=env)
    if out.returncode != 0:
        log(out.stderr[-3000:])
        return None
    row = json.loads(out.stdout.strip().splitlines()[-1])
    row["load"] = os.getloadavg()
    log(f"  {n} x {d}, {threads} threads: {row}")
    return row


def format_rows(rows, markdown=False) -> str:
    head = ["events x channels", "search", "threads"] + [f"{s} s" for s in STAGES] \
        + ["peak MB", "enriched", "load (1 min)"]
    from scale_benchmark import table_lines  # imported here, as raw_panel above: a sibling script (its folder is on sys.path)
    cells = [[f"{r['n']:,} x {r['d']}", "exact" if r.get("exact") else "default", str(r["threads"])]
             + [f"{r['timing'].get(s, 0.0):.1f}" for s in STAGES]
             + [f"{r['peak_mb']:.0f}", str(r["enriched"]), f"{r['load'][0]:.1f}"] for r in rows]
    return table_lines(head, cells, markdown)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="200000,1000000")
    ap.add_argument("--channels", default="12")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--exact", action="store_true", help="every neighbour search exact (the former search)")
    ap.add_argument("--markdown", default="")
    ap.add_argument("--child", default="", help=argparse.SUPPRESS)
    ap.add_argument("--write", default="", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.write:
        n, d, seed, path = a.write.split(",", 3)
        _write_child(int(n), int(d), int(seed), path)
        return 0
    if a.child:
        test, control, threads, exact = a.child.split(",")
        print(json.dumps(_analyse_child(test, control, int(threads), bool(int(exact)))))
        return 0
    rows = []
    for d in [int(v) for v in a.channels.split(",") if v]:
        for n in [int(v) for v in a.sizes.split(",") if v]:
            row = run(n, d, a.threads, a.exact)
            if row is not None:
                rows.append(row)
    print(format_rows(rows))
    if a.markdown:
        from core.atomic import atomic_write
        with atomic_write(a.markdown, "w", overwrite=True) as fh:
            fh.write(format_rows(rows, markdown=True) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
