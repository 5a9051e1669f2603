#!/usr/bin/env python3
"""Scale benchmark: fit time and held-out log-likelihood of the density engine
against scikit-learn's GaussianMixture(16), timed in the same run, and the
stages of ``core.analysis.analyse`` on a generated FCS file.

Run from the repository root (prefix with ``nice`` on a shared machine)::

    python tests/benchmarks/scale_benchmark.py [--sizes 50000,200000] [--channels 8,16,30]
        [--repeats 3] [--analyse 12,30] [--analyse-events 1000000] [--analyse-repeats 3]
        [--count-reference [--count-seed 0]] [--markdown PATH]

Data: a synthetic panel of 16 populations that are log-normal in raw
intensity (correlated, per-channel log-spread 0.15-0.45 decades) plus 2 %
debris, with additive Gaussian noise of sd 30 in raw units, then arcsinh with
cofactor 150 (common practice for fluorescence): the spread of each
population fans out with intensity as in compensated data.  Events to fit and
as many held-out events come from one seeded draw.

Fit table: for each (n, d) the median over ``--repeats`` runs of the fit
seconds of ``AdditiveTreeDensity(random_state=r)`` and of
``GaussianMixture(n_components=16, covariance_type="full", random_state=r)``,
their ratio (ours / GaussianMixture; <= 1 meets the issue's target; each run's
ratio and the median ratio of process CPU seconds, less sensitive to the other
jobs on the machine, beside it) and the
held-out mean log-likelihood of each (nats per event, natural log; higher is
better).  The machine is shared: compare the ratios measured in the same run.

Analyse table (``--analyse``): ``core.analysis.analyse`` on an FCS file of
``--analyse-events`` events x d channels written by ``core.fcs.write_fcs``
(two scatter channels, the rest fluorescence; float32) in one subprocess, then
read and analysed with the default recipe in a fresh subprocess: the stages of
``Analysis.timing`` plus the read, the peak resident memory of that process
(``resource.getrusage``; the file's generation is not in it) in MiB (2^20 bytes)
and in MB (10^6 bytes, the unit of the issue's "under 1 GB"), the resident
memory after the imports ("base MiB") and the highest resident memory seen
during each stage (sampled every 20 ms; "peak MiB by stage").

With ``--analyse-repeats R`` the file is written once and analysed in R fresh
processes: the table holds the median of each stage and of the memory columns,
with each run's peak, read + total seconds and the load average at its start and end.

Count reference (``--count-reference``, replaces the fit table; one run per
cell): our fit searches the component count and adds skew, GaussianMixture(16)
is one fit at a fixed count.  So on the same events (training and held-out as
in the fit table) the table also times scikit-learn's usual way to choose the
count -- GaussianMixture(full covariance) at K = 1, 2, 4, 8, 16, 32, 64, the
lowest BIC on the training events kept ("GMM-BIC"; its time is the whole
sweep's) -- and the smallest K of that grid whose held-out mean
log-likelihood reaches ours ("GMM at equal accuracy"; the time of that one
fit), if any.  Fits that stop at scikit-learn's max_iter (100) unconverged
are listed.

``core`` is imported from PYTHONPATH when it is set (else from this checkout),
so the same script measures an older checkout in the same run.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
if ROOT not in sys.path:
    sys.path.append(ROOT)

N_POPULATIONS = 16
DEBRIS_SHARE = 0.02
NOISE_SD = 30.0
COFACTOR = 150.0
REFERENCE_K = 16


def raw_panel(n: int, d: int, seed: int = 0) -> np.ndarray:
    """Raw intensities (n, d) float64 of the 16-population log-normal panel (see module docstring).

    The populations' structure depends only on d (fixed seed); ``seed`` drives the draw."""
    srng = np.random.default_rng([20261202, d])
    centres = srng.uniform(1.0, 4.5, size=(N_POPULATIONS, d))           # log10 intensity
    spreads = srng.uniform(0.15, 0.45, size=(N_POPULATIONS, d))         # decades
    weights = srng.uniform(1.0, 4.0, size=N_POPULATIONS)
    weights = (1.0 - DEBRIS_SHARE) * weights / weights.sum()
    chols = []
    for _ in range(N_POPULATIONS):
        A = srng.normal(size=(d, d)) * 0.35 + np.eye(d)
        C = A @ A.T
        s = 1.0 / np.sqrt(np.diag(C))
        chols.append(np.linalg.cholesky(C * np.outer(s, s)))
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(n, np.append(weights, DEBRIS_SHARE))
    parts = []
    for k in range(N_POPULATIONS):
        Z = rng.normal(size=(counts[k], d)) @ chols[k].T
        parts.append(10.0 ** (centres[k] + spreads[k] * Z))
    parts.append(10.0 ** rng.uniform(0.0, 5.0, size=(counts[-1], d)))
    X = np.concatenate(parts)
    X += rng.normal(scale=NOISE_SD, size=X.shape)
    return X[rng.permutation(n)]


def panel(n: int, d: int, seed: int = 0) -> np.ndarray:
    """Transformed events (n, d): arcsinh(raw / 150) of :func:`raw_panel`."""
    return np.arcsinh(raw_panel(n, d, seed) / COFACTOR)


def _gmm16(X, seed):
    from sklearn.mixture import GaussianMixture
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return GaussianMixture(n_components=REFERENCE_K, covariance_type="full", random_state=seed).fit(X)


def fit_rows(sizes, channels, repeats, log=print):
    from core.density import AdditiveTreeDensity
    rows = []
    for d in channels:
        for n in sizes:
            X = panel(2 * n, d, seed=n + d)
            Xtr, Xte = X[:n], X[n:]
            ours_t, ref_t, ours_ll, ref_ll, info, ours_cpu, ref_cpu = [], [], [], [], [], [], []
            for r in range(repeats):
                t, c = time.perf_counter(), time.process_time()
                m = AdditiveTreeDensity(random_state=r).fit(Xtr)
                ours_t.append(time.perf_counter() - t)
                ours_cpu.append(time.process_time() - c)
                ours_ll.append(m.score(Xte))
                k = m._gmm.n_components if getattr(m, "_gmm", None) is not None else 0
                info.append(f"{m.base_} K={k} trees={m.n_trees_}")
                t, c = time.perf_counter(), time.process_time()
                g = _gmm16(Xtr, r)
                ref_t.append(time.perf_counter() - t)
                ref_cpu.append(time.process_time() - c)
                ref_ll.append(float(g.score(Xte)))
                log(f"  n={n} d={d} run {r}: ours {ours_t[-1]:.1f} s ({info[-1]}) ll {ours_ll[-1]:.3f} | "
                    f"GMM16 {ref_t[-1]:.1f} s ll {ref_ll[-1]:.3f} | CPU s ours {ours_cpu[-1]:.1f} GMM16 {ref_cpu[-1]:.1f} "
                    f"(load {_load()})")
            ratio = float(np.median(np.array(ours_t) / np.array(ref_t)))
            rows.append(dict(n=n, d=d, ours_s=float(np.median(ours_t)), ref_s=float(np.median(ref_t)),
                             ratio=ratio, ours_ll=float(np.median(ours_ll)), ref_ll=float(np.median(ref_ll)),
                             info=info[int(np.argsort(ours_t)[len(ours_t) // 2])],
                             cpu_ratio=float(np.median(np.array(ours_cpu) / np.array(ref_cpu))),
                             ratios=[a / b for a, b in zip(ours_t, ref_t)]))
    return rows


def _write_child(n: int, d: int, path: str) -> None:
    """Write the n x d panel (float32) as an FCS file (a process of its own: its memory is not measured)."""
    from core.fcs import write_fcs
    raw = raw_panel(n, d, seed=7)
    names = ["FSC-A", "SSC-A"] + [f"FL{j}-A" for j in range(1, d - 1)]
    raw[:, :2] = np.abs(raw[:, :2]) * 5.0
    write_fcs(path, raw.astype(np.float32), names, channel_ranges=np.full(d, 262144.0))


def _rss_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2 ** 20


def _analyse_child(path: str) -> dict:
    """Read ``path`` and run analyse() on it: stage seconds, peak memory, memory per stage."""
    import resource
    import threading

    from core.analysis import analyse
    from core.fcs import read_fcs
    from core.recipe import default_recipe
    base = _rss_mb()
    samples, done = [], threading.Event()

    def sample():
        while not done.is_set():
            samples.append((time.perf_counter(), _rss_mb()))
            time.sleep(0.02)
    thread = threading.Thread(target=sample, daemon=True)
    thread.start()
    t = time.perf_counter()
    ef = read_fcs(path)
    read_s = time.perf_counter() - t
    t_recipe = time.perf_counter()
    recipe = default_recipe(ef)
    t_analyse = time.perf_counter()
    a = analyse(ef, recipe)
    done.set()
    thread.join()
    timing = {"read": read_s, **{k: float(v) for k, v in a.timing.items()}}
    bounds = [("read", t, t_recipe), ("recipe", t_recipe, t_analyse)]
    at = t_analyse
    for k, v in a.timing.items():
        if k != "total":
            bounds.append((k, at, at + float(v)))
            at += float(v)
    by_stage = {k: max([m for s, m in samples if lo <= s <= hi] or [float("nan")]) for k, lo, hi in bounds}
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB -> MB (Linux)
    gmm = getattr(a.model, "_gmm", None)
    model = f"{a.model.base_} K={gmm.n_components if gmm is not None else 0} trees={a.model.n_trees_}"
    return {"n": ef.n_events, "d": ef.n_channels, "timing": timing, "peak_mb": peak, "base_mb": base, "model": model,
            "stage_mb": by_stage, "dtype": str(ef.data.dtype)}


def _load() -> str:
    """The 1-minute load average (Linux; '?' elsewhere): the machine is shared."""
    try:
        return f"{os.getloadavg()[0]:.1f}"
    except OSError:
        return "?"


def _median_row(runs: list) -> dict:
    """One row from repeated analyse() runs of one file: the median of each stage and of the peak."""
    row = dict(runs[0])
    row["timing"] = {k: float(np.median([r["timing"][k] for r in runs])) for k in runs[0]["timing"]}
    for key in ("peak_mb", "base_mb"):
        row[key] = float(np.median([r[key] for r in runs]))
    row["stage_mb"] = {k: float(np.median([r["stage_mb"][k] for r in runs])) for k in runs[0]["stage_mb"]}
    row["totals"] = [r["timing"].get("total", float("nan")) + r["timing"]["read"] for r in runs]
    row["peaks"] = [r["peak_mb"] for r in runs]
    row["loads"] = [r["load"] for r in runs]
    row["models"] = sorted({r.get("model", "?") for r in runs})
    return row


def analyse_rows(channels, n, repeats=1, log=print):
    """analyse() of one generated file per channel count, ``repeats`` fresh processes each (medians)."""
    rows = []
    for d in channels:
        runs = []
        with tempfile.TemporaryDirectory() as tmp:
            path = os.path.join(tmp, f"panel_{n}x{d}.fcs")
            subprocess.run([sys.executable, os.path.abspath(__file__), "--write", f"{n},{d},{path}"],
                           check=True, cwd=ROOT)
            for r in range(repeats):
                load = _load()
                out = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", path],
                                     capture_output=True, text=True, cwd=ROOT)
                if out.returncode != 0:
                    log(out.stderr[-2000:])
                    continue
                run = json.loads(out.stdout.strip().splitlines()[-1])
                run["load"] = f"{load}-{_load()}"
                log(f"  analyse {n} x {d} run {r} (load {run['load']}): {run}")
                runs.append(run)
        if runs:
            rows.append(_median_row(runs))
    return rows


COUNT_GRID = (1, 2, 4, 8, 16, 32, 64)


def count_rows(sizes, channels, seed=0, log=print):
    """Ours against scikit-learn's usual count choice, on the fit table's events (one run per cell).

    For each (n, d): ``AdditiveTreeDensity(random_state=seed)``; GaussianMixture(16);
    GaussianMixture(full covariance, random_state=seed) at every K of ``COUNT_GRID`` fitted
    on the training events, the one of lowest BIC (on the training events) kept
    ("GMM-BIC": its time is the whole sweep's); and the smallest K of the grid whose
    held-out mean log-likelihood reaches ours ("GMM at equal accuracy": the time of
    that one fit), if any.  Held-out: the same n held-out events for every model."""
    # imported here: only this mode needs scikit-learn, and core is found on the path set above
    from sklearn.mixture import GaussianMixture

    from core.density import AdditiveTreeDensity  # imported here: after ROOT is on sys.path
    rows = []
    for d in channels:
        for n in sizes:
            X = panel(2 * n, d, seed=n + d)
            Xtr, Xte = X[:n], X[n:]
            load0 = _load()
            t = time.perf_counter()
            m = AdditiveTreeDensity(random_state=seed).fit(Xtr)
            ours_s = time.perf_counter() - t
            ours_ll = float(m.score(Xte))
            k = m._gmm.n_components if getattr(m, "_gmm", None) is not None else 0
            log(f"  n={n} d={d}: ours {ours_s:.1f} s ({m.base_} K={k} trees={m.n_trees_}) ll {ours_ll:.3f} "
                f"(load {load0}-{_load()})")
            sweep = []
            for K in COUNT_GRID:
                t = time.perf_counter()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    g = GaussianMixture(n_components=K, covariance_type="full", random_state=seed).fit(Xtr)
                sec = time.perf_counter() - t
                sweep.append(dict(K=K, s=sec, bic=float(g.bic(Xtr)), ll=float(g.score(Xte)),
                                  converged=bool(g.converged_), n_iter=int(g.n_iter_)))
                log(f"    GMM K={K}: {sec:.1f} s, BIC {sweep[-1]['bic']:.0f}, held-out {sweep[-1]['ll']:.3f}, "
                    f"{'converged' if g.converged_ else 'NOT converged'} in {g.n_iter_} iterations (load {_load()})")
            best = min(sweep, key=lambda r: r["bic"])
            g16 = next(r for r in sweep if r["K"] == REFERENCE_K)
            equal = next((r for r in sweep if r["ll"] >= ours_ll), None)
            rows.append(dict(n=n, d=d, ours_s=ours_s, ours_ll=ours_ll, ours_model=f"{m.base_} K={k} trees={m.n_trees_}",
                             g16_s=g16["s"], g16_ll=g16["ll"], bic_s=sum(r["s"] for r in sweep), bic_K=best["K"],
                             bic_ll=best["ll"], eq_K=equal["K"] if equal else None,
                             eq_s=equal["s"] if equal else None, eq_ll=equal["ll"] if equal else None,
                             best_ll=max(r["ll"] for r in sweep), best_K=max(sweep, key=lambda r: r["ll"])["K"],
                             unconverged=[r["K"] for r in sweep if not r["converged"]],
                             load=f"{load0}-{_load()}", sweep=sweep))
    return rows


def table_lines(head, rows, markdown=False) -> str:
    """Rows of cell strings under ``head``: markdown (with its rule line) or joined by two spaces."""
    if markdown:
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        lines += ["| " + " | ".join(vals) + " |" for vals in rows]
    else:
        lines = ["  ".join(head)] + ["  ".join(vals) for vals in rows]
    return "\n".join(lines)


def format_count(rows, markdown=False) -> str:
    head = ["n", "d", "ours s", "ours held-out", "GMM(16) s", "GMM(16) held-out", "GMM-BIC s (sweep)",
            "GMM-BIC K", "GMM-BIC held-out", "ours / GMM-BIC time", "GMM at equal accuracy: K", "its s",
            "its held-out", "best GMM held-out (K)", "not converged K", "load"]
    cells = []
    for r in rows:
        eq = r["eq_K"] is not None
        cells.append([f"{r['n']:,}", str(r["d"]), f"{r['ours_s']:.1f}", f"{r['ours_ll']:.3f}", f"{r['g16_s']:.1f}",
                f"{r['g16_ll']:.3f}", f"{r['bic_s']:.1f}", str(r["bic_K"]), f"{r['bic_ll']:.3f}",
                f"{r['ours_s'] / r['bic_s']:.2f}", str(r["eq_K"]) if eq else "none <= 64",
                f"{r['eq_s']:.1f}" if eq else "-", f"{r['eq_ll']:.3f}" if eq else "-",
                f"{r['best_ll']:.3f} ({r['best_K']})", ",".join(map(str, r["unconverged"])) or "-", r["load"]])
    return table_lines(head, cells, markdown)


def format_fit(rows, markdown=False) -> str:
    head = ["n", "d", "ours s", "GMM(16) s", "ours / GMM(16)", "per-run ratios", "CPU s ratio", "ours held-out",
            "GMM(16) held-out", "ours: model"]
    cells = [[f"{r['n']:,}", str(r["d"]), f"{r['ours_s']:.1f}", f"{r['ref_s']:.1f}", f"{r['ratio']:.2f}",
              ", ".join(f"{v:.2f}" for v in r["ratios"]), f"{r['cpu_ratio']:.2f}", f"{r['ours_ll']:.3f}",
              f"{r['ref_ll']:.3f}", r["info"]] for r in rows]
    return table_lines(head, cells, markdown)


def format_analyse(rows, markdown=False) -> str:
    stages = []
    for r in rows:
        for k in r["timing"]:
            if k not in stages:
                stages.append(k)
    head = ["events x channels"] + [f"{s} s" for s in stages] + ["peak MiB", "peak MB (10^6 B)", "peak MiB, each run",
                                                               "base MiB", "peak MiB by stage",
                                                               "read + total s, each run", "load each run", "model"]
    cells = []
    for r in rows:
        cells.append([f"{r['n']:,} x {r['d']}"] + [f"{r['timing'].get(s, float('nan')):.1f}" for s in stages] \
            + [f"{r['peak_mb']:.0f}", f"{r['peak_mb'] * 2 ** 20 / 1e6:.0f}",
               ", ".join(f"{v:.0f}" for v in r.get("peaks", [r["peak_mb"]])), f"{r.get('base_mb', float('nan')):.0f}",
               ", ".join(f"{k} {v:.0f}" for k, v in r.get("stage_mb", {}).items()),
               ", ".join(f"{v:.1f}" for v in r.get("totals", [])), ", ".join(r.get("loads", [])),
               "; ".join(r.get("models", []))])
    return table_lines(head, cells, markdown)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="50000,200000")
    ap.add_argument("--channels", default="8,16,30")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--analyse", default="", help="channel counts for analyse(), e.g. 12,30")
    ap.add_argument("--analyse-events", type=int, default=1_000_000)
    ap.add_argument("--analyse-repeats", type=int, default=1, help="fresh analyse() processes per file (medians)")
    ap.add_argument("--count-reference", action="store_true",
                    help="instead of the fit table: ours, GMM(16), GMM-BIC over K in 1..64, GMM at equal accuracy")
    ap.add_argument("--count-seed", type=int, default=0, help="random_state of every fit in --count-reference")
    ap.add_argument("--markdown", default="")
    ap.add_argument("--child", default="", help=argparse.SUPPRESS)
    ap.add_argument("--write", default="", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.write:
        n, d, path = a.write.split(",", 2)
        _write_child(int(n), int(d), path)
        return 0
    if a.child:
        print(json.dumps(_analyse_child(a.child)))
        return 0
    out = []
    sizes = [int(v) for v in a.sizes.split(",") if v]
    channels = [int(v) for v in a.channels.split(",") if v]
    if sizes and channels and a.count_reference:
        rows = count_rows(sizes, channels, a.count_seed)
        print(format_count(rows))
        out.append(format_count(rows, markdown=True))
    elif sizes and channels:
        rows = fit_rows(sizes, channels, a.repeats)
        print(format_fit(rows))
        out.append(format_fit(rows, markdown=True))
    if a.analyse:
        rows = analyse_rows([int(v) for v in a.analyse.split(",")], a.analyse_events, a.analyse_repeats)
        print(format_analyse(rows))
        out.append(format_analyse(rows, markdown=True))
    if a.markdown:
        from core.atomic import atomic_write
        with atomic_write(a.markdown, "w", overwrite=True) as fh:
            fh.write("\n\n".join(out) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
