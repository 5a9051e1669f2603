"""Contrast with a control: new events at a false discovery rate; null calibration; shift warning.

    python tests/benchmarks/contrast_benchmark.py [--folder sample_events] [--tubes B,C,D]
        [--parts demo,generator,null,shift,real] [--gen-seeds 5] [--real-seeds 10] [--null-seeds 10] [--null-events 20000]
        [--rate 0.05] [--min-fold 2] [--approx] [--contours] [--markdown OUT.md]

``--approx``: the neighbour counts use the large-file search (approximate, then exact for
the top 5 % of each part: core/contrast_local.py, "Large files") at every size, not only
beyond ``EXACT_POOL`` pooled events, and without the EXACT_MIN floor: what a file of a
million events gets, on these tubes.

Tables (each printed as it finishes):

* ``demo``: each treated tube of ``sample_events`` against ``tube_A_control``
  with the control's default recipe; the truth (``truth/<stem>.npz``, ``rare``)
  marks the spiked new population.  Recall and precision of the enriched events
  (q <= rate, fold >= min fold) against it; "precision (grown)" also counts as
  correct the populations the treatment grew >= 2-fold (truth labels).
* ``generator``: a control/test pair of our own, made here and NOT by
  core/scenario.py (other shapes: a banana, a heavy-tailed Student-t cloud, a
  continuum smear, gamma-skewed cells, a ring; values in instrument units with
  detector noise, mixed by a spillover matrix, compensated and arcsinh-scaled
  like a real tube), 60,000 events each, a new population at 0.05 %, 0.2 % and
  1 % of the test events, ``--gen-seeds`` test draws each (one control).  Targets: recall >= 0.95 and precision >= 0.93 where
  the new population has >= 30 events.
* ``null``: the generator's control against a second draw of the same
  distribution (``--null-events`` each, fresh control and test per seed):
  events flagged per seed; target: no event flagged in at least 9 of 10 seeds.
  Also the two-sample KS test of test vs control scores pooled over the parts
  and within each part, and the share of test events with p <= 0.001 / 0.01 /
  0.05 (under the null about that share; a last row pools the seeds).
* ``shift``: the same draw with one channel's gain 5 % higher, or with a
  slightly different spillover (ch1 -> ch2 0.12 instead of 0.08) compensated
  with the control's matrix: the shift warning must name that channel.

* ``real`` (fcsparser's bundled files, chosen by what they are: the FCS 3.1
  float files of 10,000 events x 19 channels, one panel, three acquisitions;
  the default recipe gives the density 3 fluorescence channels).  No bundled
  pair is a control and a treated sample, so two checks are built from them.
  Null: one file's events split at random into two halves (control, test),
  ``--real-seeds`` splits over the files in turn; target: nothing flagged in
  at least 9 of 10.  Spike: a random split, then a region far from the bulk
  (a ball around a test event beyond the 95th percentile of the robust
  distance from the medians, radius = its k-th nearest test neighbour, k =
  30 / 100) is removed from the control half: the test events in the ball
  are new.  (Events spiked from another of the three files would not be new:
  the acquisitions differ by KS statistics of 0.01-0.05 per channel only.)
  Recall and precision of the enriched events against the ball's events.

Contour table (``--contours``): on the control tube, for a few channel pairs,
a 2-D fit of the pair vs marginalising the full model by its sampler; the
share of held-out events inside the 50/90/99 % contours (measured minus
nominal, points) and seconds.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, ROOT)

import core.contrast_local as contrast_local  # noqa: E402
from core.analysis import density_input  # noqa: E402
from core.contrast import DEFAULT_MIN_FOLD, DEFAULT_RATE, contrast, prepare_control  # noqa: E402
from core.density import AdditiveTreeDensity  # noqa: E402
from core.fcs import read_fcs  # noqa: E402
from core.recipe import default_recipe  # noqa: E402

TUBES = {"B": "tube_B_treated_low", "C": "tube_C_treated_mid", "D": "tube_D_treated_high"}
ENGINE = {"random_state": 0}


def remembering_factory(engine):
    """A model factory that fits each distinct event matrix once: a second contrast of the
    same test file (by the density score alone, ``smallest=0``) reuses the same fitted models."""
    fitted = {}

    def fit(X, progress=None):
        key = (X.shape, hashlib.sha1(np.ascontiguousarray(X).tobytes()).hexdigest())
        if key not in fitted:
            fitted[key] = AdditiveTreeDensity(**engine).fit(X, progress=progress)
        return fitted[key]
    return fit


def both_scores(T, pc, factory, **kw):
    """(contrast with the density and the local neighbour score, the contrast by the density score
    alone -- the score before the local score, ``smallest=0``) on the same fits."""
    return (contrast(T, None, prepared_control=pc, model_factory=factory, **kw),
            contrast(T, None, prepared_control=pc, model_factory=factory, smallest=0, **kw))


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


def _pr(enriched, truth):
    tp = int(np.sum(enriched & truth))
    n = int(enriched.sum())
    return (tp / n if n else float("nan")), (tp / truth.sum() if truth.any() else float("nan"))


def _f(v, d=3):
    return "nan" if not np.isfinite(v) else f"{v:.{d}f}"


# ---------------------------------------------------------------------------
# the demo tubes
# ---------------------------------------------------------------------------

DEMO_HEADER = ["tube", "events", "new (truth)", "enriched", "recall", "precision", "precision (grown)",
               "expected false", "max q of new", "shift warning", "density alone: enriched / recall / precision",
               "seconds"]


def grown_populations(test_labels, control_labels, factor=2.0):
    """Populations whose share of the test events is at least ``factor`` x their share in the control."""
    return [str(n) for n in np.unique(test_labels)
            if np.mean(test_labels == n) >= factor * np.mean(control_labels == n)]


def demo_rows(folder, tubes, rate, min_fold):
    control = read_fcs(os.path.join(folder, "tube_A_control.fcs"))
    recipe = default_recipe(control)
    c_prep, _ = density_input(control, recipe)
    c_labels = np.asarray(np.load(os.path.join(folder, "truth", "tube_A_control.npz"),
                                  allow_pickle=False)["labels"]).astype(str)[c_prep.kept]
    engine = recipe.engine_arguments()
    t0 = time.perf_counter()
    factory = remembering_factory(engine)
    pc = prepare_control(c_prep.matrix, model_factory=factory, random_state=engine["random_state"])
    print(f"control prepared in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    rows = []
    for key in tubes:
        stem = TUBES[key]
        ef = read_fcs(os.path.join(folder, stem + ".fcs"))
        truth = np.load(os.path.join(folder, "truth", stem + ".npz"), allow_pickle=False)
        prep, _ = density_input(ef, recipe)
        new = np.asarray(truth["rare"], bool)[prep.kept]
        labels = np.asarray(truth["labels"]).astype(str)[prep.kept]
        t0 = time.perf_counter()
        res, former = both_scores(prep.matrix, pc, factory, rate=rate, min_fold=min_fold,
                                  random_state=engine["random_state"], channel_names=recipe.channels)
        sec = time.perf_counter() - t0
        f_prec, f_rec = _pr(former.enriched, new)
        prec, rec = _pr(res.enriched, new)
        hit = np.isin(labels, grown_populations(labels, c_labels)) | new
        prec_g = float(np.mean(hit[res.enriched])) if res.count else float("nan")
        wrong = labels[res.enriched & ~hit]
        note = ", ".join(f"{n} {c}" for n, c in zip(*np.unique(wrong, return_counts=True)))
        rows.append([stem, prep.matrix.shape[0], int(new.sum()), res.count, _f(rec), _f(prec), _f(prec_g),
                     _f(res.expected_false, 1), f"{np.nanmax(res.qvalue[new]):.2g}" if new.any() else "",
                     ", ".join(res.shift.moved[:3]) or ("many events" if res.shift.warn else "none"),
                     f"{former.count} / {_f(f_rec)} / {_f(f_prec)}", f"{sec:.1f}"])
        print(table(DEMO_HEADER, rows[-1:]).splitlines()[-1] + (f"   (false: {note})" if note else ""),
              file=sys.stderr, flush=True)
    return rows


# ---------------------------------------------------------------------------
# a generator of our own (not core/scenario.py)
# ---------------------------------------------------------------------------

CHANNELS = ["ch1", "ch2", "ch3", "ch4", "ch5", "ch6"]
COFACTOR = 150.0
SPILL = np.eye(6)
for _i, _j, _v in ((0, 1, 0.08), (1, 2, 0.05), (2, 3, 0.10), (3, 4, 0.04), (4, 5, 0.06), (0, 5, 0.02)):
    SPILL[_i, _j] = _v


def _background(n, rng):
    """True signals (n, 6), instrument units: five populations of shapes unlike the demo's."""
    share = np.array([0.38, 0.24, 0.16, 0.12, 0.10])
    counts = rng.multinomial(n, share)
    parts = []
    # 1. negatives: autofluorescence only, a little correlated
    k = counts[0]
    af = rng.gamma(4.0, 15.0, size=k)
    parts.append(np.column_stack([af * rng.uniform(0.5, 1.5, size=k) for _ in range(6)]))
    # 2. a banana in ch1/ch2 (log10 units), dim ch3-ch6
    k = counts[1]
    u = rng.uniform(-1, 1, size=k)
    l1 = 3.2 + 0.6 * u + rng.normal(0, 0.06, size=k)
    l2 = 2.4 + 0.9 * u ** 2 + rng.normal(0, 0.06, size=k)
    parts.append(np.column_stack([10 ** l1, 10 ** l2] + [rng.gamma(3.0, 20.0, size=k) for _ in range(4)]))
    # 3. a heavy-tailed Student-t cloud (df 3) in ch3/ch4 log units
    k = counts[2]
    t = rng.standard_t(3, size=(k, 2)) * 0.12
    parts.append(np.column_stack([rng.gamma(3.0, 20.0, size=k), rng.gamma(3.0, 20.0, size=k),
                                  10 ** (3.0 + t[:, 0]), 10 ** (2.7 + 0.7 * t[:, 0] + 0.5 * t[:, 1]),
                                  rng.gamma(3.0, 20.0, size=k), rng.gamma(3.0, 20.0, size=k)]))
    # 4. a continuum smear: ch5 from dim to bright, ch6 following it
    k = counts[3]
    s = rng.uniform(1.6, 3.6, size=k)
    parts.append(np.column_stack([rng.gamma(3.0, 20.0, size=k) for _ in range(4)]
                                 + [10 ** s, 10 ** (0.8 * s + 0.3 + rng.normal(0, 0.1, size=k))]))
    # 5. gamma-skewed bright cells on ch1 and ch6, plus a ring in ch3/ch5 (log units)
    k = counts[4]
    ang = rng.uniform(0, 2 * np.pi, size=k)
    r = 0.35 + rng.normal(0, 0.04, size=k)
    parts.append(np.column_stack([rng.gamma(2.0, 2500.0, size=k), rng.gamma(3.0, 20.0, size=k),
                                  10 ** (2.6 + r * np.cos(ang)), rng.gamma(3.0, 20.0, size=k),
                                  10 ** (2.6 + r * np.sin(ang)), rng.gamma(2.5, 1200.0, size=k)]))
    X = np.vstack(parts)
    return X[rng.permutation(n)]


def _new_population(k, rng):
    """A compact population the background lacks: bright ch2 and ch5 with dim ch1 (log units)."""
    return np.column_stack([rng.gamma(3.0, 20.0, size=k), 10 ** rng.normal(3.5, 0.05, size=k),
                            rng.gamma(3.0, 20.0, size=k), rng.gamma(3.0, 20.0, size=k),
                            10 ** rng.normal(3.3, 0.05, size=k), rng.gamma(3.0, 20.0, size=k)])


def draw(n, seed, new_share=0.0, gain=None, spill=None):
    """Observed -> compensated (with SPILL) -> arcsinh(x / 150) values (n, 6), and the truth mask.

    ``gain``: (channel index, factor) applied to the observed values;
    ``spill``: the spillover matrix that mixed the signals (default SPILL).
    """
    rng = np.random.default_rng(seed)
    n_new = int(round(new_share * n))
    X = _background(n - n_new, rng)
    truth = np.zeros(n, bool)
    if n_new:
        X = np.vstack([X, _new_population(n_new, rng)])
        truth[n - n_new:] = True
        order = rng.permutation(n)
        X, truth = X[order], truth[order]
    observed = X @ (SPILL if spill is None else spill) + rng.normal(0, 40.0, size=X.shape)  # detector noise
    if gain is not None:
        observed[:, gain[0]] *= gain[1]
    compensated = observed @ np.linalg.inv(SPILL)
    return np.arcsinh(compensated / COFACTOR), truth


def _to_units():
    return [lambda v: COFACTOR * np.sinh(v)] * len(CHANNELS)


GEN_HEADER = ["new share", "test draw", "events", "new (truth)", "enriched", "false", "recall", "precision",
              "expected false", "shift warning", "density alone: recall / precision", "seconds"]


def generator_rows(rate, min_fold, seeds=1, n=60_000):
    """One control; per share, ``seeds`` test draws and, with several, a mean row."""
    C, _ = draw(n, seed=101)
    t0 = time.perf_counter()
    factory = remembering_factory(ENGINE)
    pc = prepare_control(C, model_factory=factory)
    print(f"generator control prepared in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    rows = []
    for share in (0.0005, 0.002, 0.01):
        precs, recs, f_precs, f_recs = [], [], [], []
        for seed in range(202, 202 + seeds):
            T, truth = draw(n, seed=seed, new_share=share)
            t0 = time.perf_counter()
            res, former = both_scores(T, pc, factory, rate=rate, min_fold=min_fold, channel_names=CHANNELS,
                                      to_units=_to_units())
            prec, rec = _pr(res.enriched, truth)
            f_prec, f_rec = _pr(former.enriched, truth)
            precs.append(prec)
            recs.append(rec)
            f_precs.append(f_prec)
            f_recs.append(f_rec)
            rows.append([f"{100 * share:g} %", seed, n, int(truth.sum()), res.count, int(np.sum(res.enriched & ~truth)),
                         _f(rec), _f(prec), _f(res.expected_false, 1), ", ".join(res.shift.moved[:3]) or "none",
                         f"{_f(f_rec)} / {_f(f_prec)}", f"{time.perf_counter() - t0:.1f}"])
            print(table(GEN_HEADER, rows[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
        if seeds > 1:
            rows.append([f"{100 * share:g} %", "mean", "", "", "", "", _f(np.nanmean(recs)), _f(np.nanmean(precs)),
                         "", "", f"{_f(np.nanmean(f_recs))} / {_f(np.nanmean(f_precs))}", ""])
    return rows, pc


NULL_HEADER = ["seed", "events (each)", "flagged", "flagged (density alone)", "smallest p", "smallest q", "KS p, pooled scores",
               "KS p, within parts (smallest of 3)", "p <= 0.001", "p <= 0.01", "p <= 0.05", "shift warning",
               "seconds"]


def null_rows(rate, min_fold, seeds, n):
    """Per seed: flags, the two-sample KS of test vs control scores pooled over the parts and
    within each part (exact there), and the share of test events with p at or below 0.001 /
    0.01 / 0.05 (nominal under the null: the share itself); a last row pools the seeds."""
    from scipy import stats

    rows, tails = [], []
    for seed in range(seeds):
        C, _ = draw(n, seed=1000 + seed)
        T, _ = draw(n, seed=2000 + seed)
        t0 = time.perf_counter()
        factory = remembering_factory(ENGINE)
        pc = prepare_control(C, model_factory=factory, random_state=seed)
        res, former = both_scores(T, pc, factory, rate=rate, min_fold=min_fold, random_state=seed,
                                  channel_names=CHANNELS, to_units=_to_units())
        ok = np.isfinite(res.score)
        p, s, part = res.pvalue[ok], res.score[ok], res.info["part"]
        # reference: scipy.stats.ks_2samp -- under the null, test and control scores are exchangeable
        # within a part (same model pair, unseen by both); pooling the parts is the approximation.
        # Both scores: the density score's and the local score's smallest p-value
        ks = min(stats.ks_2samp(s, res.control_scores).pvalue,
                 stats.ks_2samp(res.local_score[ok], res.local_control_scores).pvalue)
        ks_part = min(min(stats.ks_2samp(s[part == k], res.control_scores[pc.part == k]).pvalue,
                          stats.ks_2samp(res.local_score[ok][part == k],
                                         res.local_control_scores[pc.part == k]).pvalue)
                      for k in range(res.folds))
        tail = [float(np.mean(p <= t)) for t in (0.001, 0.01, 0.05)]
        tails.append(tail)
        rows.append([seed, n, res.count, former.count, f"{p.min():.2g}", f"{np.nanmin(res.qvalue):.3f}", f"{ks:.3f}",
                     f"{ks_part:.3f}", *(f"{v:.4f}" for v in tail),
                     ", ".join(res.shift.moved) or ("many events" if res.shift.warn else "none"),
                     f"{time.perf_counter() - t0:.1f}"])
        print(table(NULL_HEADER, rows[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    if seeds > 1:
        mean = np.mean(tails, axis=0)
        rows.append(["all", n * seeds, sum(r[2] for r in rows), sum(r[3] for r in rows), "", "",
                     f"{sum(float(r[6]) < 0.05 for r in rows)} < 0.05",
                     f"{sum(float(r[7]) < 0.05 for r in rows)} < 0.05", *(f"{v:.4f}" for v in mean), "", ""])
    return rows


SHIFT_HEADER = ["test tube differs by", "enriched", "shift warning names", "KS D (top channel)",
                "median control -> test (top channel)", "seconds"]


def shift_rows(rate, min_fold, pc, n=60_000):
    spill = SPILL.copy()
    spill[0, 1] = 0.12
    cases = [("gain of ch3 x 1.05", {"gain": (2, 1.05)}), ("gain of ch5 x 1.05", {"gain": (4, 1.05)}),
             ("spillover ch1 -> ch2 0.12 (compensated with 0.08)", {"spill": spill}),
             ("nothing (second draw)", {})]
    rows = []
    for name, kw in cases:
        T, _ = draw(n, seed=303, **kw)
        t0 = time.perf_counter()
        res = contrast(T, None, rate=rate, min_fold=min_fold, engine=ENGINE, prepared_control=pc,
                       channel_names=CHANNELS, to_units=_to_units())
        top = res.shift.channels[0]
        rows.append([name, res.count, ", ".join(res.shift.moved) or ("many events" if res.shift.warn else "none"),
                     f"{top['channel']} {top['ks']:.3f}",
                     f"{top['median_control']:.1f} -> {top['median_test']:.1f}",
                     f"{time.perf_counter() - t0:.1f}"])
        print(table(SHIFT_HEADER, rows[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    return rows


# ---------------------------------------------------------------------------
# fcsparser's real files: random halves (null) and a region removed from the control (spike)
# ---------------------------------------------------------------------------

def real_files():
    """(path, values the density sees (n, d), channel names) of the FCS 3.1 float files of 10,000
    events x 19 channels (one panel, several acquisitions), chosen by properties, never by name."""
    from tests.bundled_files import bundled

    out = []
    for f in bundled():
        if f["version"] == "FCS3.1" and f["datatype"] == "F" and f["events"] == 10_000 and f["channels"] == 19:
            ef = read_fcs(f["path"])
            recipe = default_recipe(ef)
            prep, _ = density_input(ef, recipe)
            out.append((f["path"], prep.matrix, list(recipe.channels)))
    if not out:
        raise SystemExit("fcsparser ships no FCS 3.1 float file of 10,000 events x 19 channels")
    return out


def halves(n, seed):
    """Random split of n events into (control indices, test indices)."""
    perm = np.random.default_rng(seed).permutation(n)
    return perm[: n // 2], perm[n // 2:]


def far_ball(T, k, seed):
    """A region of the test half far from the bulk: (centre index, radius), in robust units
    (per channel (x - median) / (1.4826 MAD)); the ball holds the centre's k nearest test events."""
    from scipy.spatial import cKDTree

    med = np.median(T, axis=0)
    mad = 1.4826 * np.median(np.abs(T - med), axis=0)
    Z = (T - med) / np.where(mad > 0, mad, 1.0)
    dist = np.linalg.norm(Z, axis=1)
    far = np.flatnonzero(dist >= np.quantile(dist, 0.95))
    centre = int(np.random.default_rng(seed).choice(far))
    r = cKDTree(Z).query(Z[centre], k=k)[0][-1]
    return Z, med, mad, centre, float(r)


REAL_NULL_HEADER = ["split", "file (events, channels seen)", "control / test", "flagged", "smallest q",
                    "shift warning", "seconds"]
REAL_SPIKE_HEADER = ["split", "file (events, channels seen)", "control / test", "new (ball)", "enriched", "false",
                     "recall", "precision", "shift warning", "seconds"]


def _file_label(path, X):
    return f"FCS 3.1 #{_FILE_IDX[path]}, {X.shape[0]:,} x {X.shape[1]}"


_FILE_IDX: dict = {}   # path -> 1, 2, 3 (the files in the order fcsparser's folder lists them)


def real_rows(rate, min_fold, seeds, ks=(30, 100)):
    files = real_files()
    for i, (path, _, _) in enumerate(files):
        _FILE_IDX[path] = i + 1
    null, spike = [], []
    for s in range(seeds):
        path, X, names = files[s % len(files)]
        ci, ti = halves(X.shape[0], 500 + s)
        t0 = time.perf_counter()
        res = contrast(X[ti], X[ci], rate=rate, min_fold=min_fold, engine=ENGINE, random_state=s,
                       channel_names=names)
        null.append([s, _file_label(path, X), f"{ci.size} / {ti.size}", res.count, f"{np.nanmin(res.qvalue):.3f}",
                     ", ".join(res.shift.moved) or ("many events" if res.shift.warn else "none"),
                     f"{time.perf_counter() - t0:.1f}"])
        print(table(REAL_NULL_HEADER, null[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
    s = 0
    for k in ks:
        for path, X, names in files:
            ci, ti = halves(X.shape[0], 700 + s)
            T, C = X[ti], X[ci]
            Z, med, mad, centre, r = far_ball(T, k, 900 + s)
            zc = (C - med) / np.where(mad > 0, mad, 1.0)
            C = C[np.linalg.norm(zc - Z[centre], axis=1) > r]
            new = np.linalg.norm(Z - Z[centre], axis=1) <= r
            t0 = time.perf_counter()
            res = contrast(T, C, rate=rate, min_fold=min_fold, engine=ENGINE, random_state=s, channel_names=names)
            prec, rec = _pr(res.enriched, new)
            spike.append([s, _file_label(path, X), f"{C.shape[0]} / {T.shape[0]}", int(new.sum()), res.count,
                          int(np.sum(res.enriched & ~new)), _f(rec), _f(prec),
                          ", ".join(res.shift.moved) or ("many events" if res.shift.warn else "none"),
                          f"{time.perf_counter() - t0:.1f}"])
            print(table(REAL_SPIKE_HEADER, spike[-1:]).splitlines()[-1], file=sys.stderr, flush=True)
            s += 1
    return null, spike


# ---------------------------------------------------------------------------
# pairwise contours (unchanged)
# ---------------------------------------------------------------------------

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
    return rows, t_full


CONTOUR_HEADER = ["pair", "pairwise density from", "50 % (pts)", "90 % (pts)", "99 % (pts)", "seconds"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--folder", default=os.path.join(ROOT, "sample_events"))
    ap.add_argument("--tubes", default="B,C,D")
    ap.add_argument("--parts", default="demo,generator,null,shift")
    ap.add_argument("--gen-seeds", type=int, default=5, help="test draws per share of the generator's table")
    ap.add_argument("--null-seeds", type=int, default=10)
    ap.add_argument("--null-events", type=int, default=20_000)
    ap.add_argument("--real-seeds", type=int, default=10, help="random halves of the real files (null)")
    ap.add_argument("--rate", type=float, default=DEFAULT_RATE)
    ap.add_argument("--min-fold", type=float, default=DEFAULT_MIN_FOLD)
    ap.add_argument("--approx", action="store_true",
                    help="large-file neighbour search at every size (core.contrast_local.EXACT_POOL = EXACT_MIN = 0)")
    ap.add_argument("--contours", action="store_true", help="also the pairwise contour table")
    ap.add_argument("--markdown", help="also write the tables as markdown here")
    args = ap.parse_args(argv)
    if args.approx:
        contrast_local.EXACT_POOL = contrast_local.EXACT_MIN = 0
    parts = {p.strip() for p in args.parts.split(",") if p.strip()}
    md = []
    head = f"false discovery rate {100 * args.rate:g} %, minimum fold {args.min_fold:g}, 3 cross-fitting parts"

    def show(title, header, rows):
        print(f"\n{title} ({head})")
        print(table(header, rows), flush=True)
        md.extend([f"### {title}", "", markdown(header, rows), ""])

    if "demo" in parts:
        rows = demo_rows(args.folder, [t.strip() for t in args.tubes.split(",") if t.strip()], args.rate,
                         args.min_fold)
        show("Demo tubes against tube_A_control (targets: recall >= 0.95, precision >= 0.93)", DEMO_HEADER, rows)
    pc = None
    if "generator" in parts:
        rows, pc = generator_rows(args.rate, args.min_fold, args.gen_seeds)
        show("Our generator, new population in 60,000 events (targets where >= 30 new events: recall >= 0.95, "
             "precision >= 0.93)", GEN_HEADER, rows)
    if "null" in parts:
        rows = null_rows(args.rate, args.min_fold, args.null_seeds, args.null_events)
        clean = sum(r[2] == 0 for r in rows if r[0] != "all")
        show(f"Null: control vs a second draw ({clean} of {args.null_seeds} seeds flag nothing; target >= 9 of 10)",
             NULL_HEADER, rows)
    if "shift" in parts:
        if pc is None:
            pc = prepare_control(draw(60_000, seed=101)[0], engine=ENGINE)
        rows = shift_rows(args.rate, args.min_fold, pc)
        show("Instrument-like shifts of the generator's test tube (target: the warning names the channel)",
             SHIFT_HEADER, rows)
    if "real" in parts:
        null, spike = real_rows(args.rate, args.min_fold, args.real_seeds)
        clean = sum(r[3] == 0 for r in null)
        show(f"fcsparser's real files, random halves ({clean} of {len(null)} splits flag nothing; target >= 9 of 10)",
             REAL_NULL_HEADER, null)
        show("fcsparser's real files, a far region removed from the control half (the test's events there are new)",
             REAL_SPIKE_HEADER, spike)
    if args.contours:
        rows, t_full = contour_rows(args.folder)
        show("Held-out events inside the HDR contours, measured minus nominal", CONTOUR_HEADER, rows)
        print(f"(the full model took {t_full:.1f} s to fit; not included above)")
    if args.markdown:
        with open(args.markdown, "w", encoding="utf-8") as fh:
            fh.write("\n".join(md))
    return 0


if __name__ == "__main__":
    sys.exit(main())
