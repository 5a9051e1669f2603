"""Contrast a test file with a control: events new in the test sample, at a controlled false discovery rate.

Method
------
"New" means absent from the control: a population the control lacks, not one
whose share changed (grown and shrunk populations are the question of
:mod:`core.populations.changes`).  Both samples are described by the same
channels (same recipe: compensation, transforms, cleaning).  Each event x gets
the score

    s(x) = log f_test(x) - log f_control'(x)        (natural log, nats)

from a density fitted to test events (f_test) and one fitted to control events
(f_control), the latter given the test's population shares (f_control'); s is
large where the test sample has events the control lacks.

Population shares (``reweight``, default on).  The control's density is a
mixture base of K components (the populations) and a broad background, maybe
corrected by trees.  Its component weights are re-estimated on the test events
the test model of the same part was fitted on, by EM on the weights alone
(shapes kept; :func:`population_shares`), and the control's density becomes

    f_control'(x) = f_control(x) sum_k (w'_k / w_k) r_k(x)

with r_k the posteriors under the control's mixture (:func:`reweighted_control`;
:func:`reweighted_log_density` scores log f_control' of the test events in one pass):
exactly the mixture with the new weights when the model kept no tree (most fits),
the base reweighted under the trees' correction otherwise.  The background keeps
the control's weight: events no control population explains (a new population)
must not raise the control's density where they sit.  Without this step a
population that grew 6-10x (the demo's activated CD8 T cells) scored log 6-10
over its whole extent and, at its edges (where the control's part models learn
its tails from ~190 events and the test's from thousands), 5-10 nats: enough to
pass Benjamini-Hochberg beside the truly new cells, and 58 of 244 enriched
events of demo tube D were such edges.  Limits: a grown population that the
control's mixture leaves to its background (no component of its own: a small
population in a small control) is not reweighted; where the two fits' shapes of
a shared population differ, its edges can still score above log(min_fold).  A
model without a mixture base (the logistic base) is scored as fitted.

Cross-fitting (``folds`` = K parts, default 3).  The test events are split into
K seeded parts, and so are the control events.  Model pair k -- f_test fitted
on the test events outside part k, f_control on the control events outside
part k -- scores the test events AND the control events of part k; the
control's shares are re-estimated on the test events outside part k.  So every
event, test or control, is scored by a score function fitted without it: under the null
(test drawn like the control), a test event and a control event of the same
part are exchangeable.  (A density scores its own training events too high:
without cross-fitting, control-like test events looked more unusual than
control events and passed too often.)

Conformal p-value of each test event against the control scores (all control
events serve as the reference, each scored by its own part's pair):

    p(x) = (1 + #{control scores >= s(x)}) / (n_control + 1)

Under the null p is (close to) uniform, so the Benjamini-Hochberg q-values of
the test events' p (:func:`core.fdr.bh_qvalues`) control the false discovery
rate (published method: conformal p-values for outlier detection with
Benjamini-Hochberg).  Enriched = q <= ``rate`` (default 5 %) AND
s >= log(``min_fold``).  Pooling the K parts' control scores (instead of
comparing a test event only with the control events of its own part) makes the
reference K times larger -- the smallest p is 1 / (n_control + 1), and BH can
only accept R events if 1 / (n_control + 1) <= rate x R / n_test, i.e. a new
population of R events needs n_control >= n_test / (rate x R): 20,000 control
events for 30 new events among 30,000 at 5 %.  The K pairs are fitted alike on
(K - 1)/K of the events, so their score scales agree, but pooling is an
approximation: within a part a test event and the control events are exactly
exchangeable, while the other parts' control scores come from models fitted
on the test event's own part (as in cross-validation conformal methods).
Measured (``tests/benchmarks/contrast_benchmark.py``, 20 null runs of 20,000
events each): no event flagged; the two-sample KS test tells the pooled test
and control scores apart (p < 0.05) in 5 runs, while the exact comparison
within each part does so in 3 (at 0.05 / 3; with a Gaussian mixture as the
density: 3 and 2).  What Benjamini-Hochberg uses is the tail, and there the
pooled p-values are calibrated: over the 400,000 null test events the share
with p <= 0.001 / 0.01 / 0.05 is 0.0008 / 0.0103 / 0.0501.  Averaging exact
per-part p-values instead (test event x of part k against control part j with
the pair (f_test^k, f_control^j), which saw neither) was tried: it is
conservative (a share of 0.8-4.7 % at p <= 0.05 on small fits), so it costs
power for no gain in calibration.  (Those measurements were made with the
score before the population shares; with them, 10 null runs of 20,000 events:
no event flagged, tail shares 0.0010 / 0.0104 / 0.0505, the KS test within every
part above 0.05 / 3.)

Local score (``smallest``, default 30 events: the recipe's
``comparison.smallest_population``; 0 = off).  Beside the density score every
event, test and control alike, gets a local neighbour score from the events
outside its part (:mod:`core.contrast_local`: how unlikely so many test events
are among its 5..k nearest, k = floor(smallest (K - 1) / K)), and the p-value
becomes one conformal p-value of both (:func:`core.contrast_local.min_rank_pvalues`:
the test event ranked with the control events by each score, the smaller rank
first): an event first by either score gets the smallest p.  Why: a heavy-tailed
control event whose two fitted tails differ scored 14 nats, above all 30 cells of
a new population (generator draw 202 of the benchmark); by neighbour counts the 30
cells rank first.  Measured (``tests/benchmarks/contrast_benchmark.py``): see
tests/benchmarks/README.md, "Contrast benchmark".

Minimum fold (``min_fold``, default 2): an enriched event must also be at
least twice as dense in the test sample as in the control given the test's
population shares (s >= log 2 = 0.69 nats).  With tens of thousands of events a tiny, systematic difference
can be statistically significant; an event whose estimated density ratio is
below 2 is not "new" in any sense a user cares about (the density estimates
themselves are uncertain by a few tenths of a nat).  With the local score the
neighbour count ratio over its expectation (``local_fold``) must reach it too: an
event is new only when both estimates of the ratio say so (events beside a new or
grown population, and control-like events that one score ranks high by chance,
usually fail one of them).

Reported (:class:`ContrastResult`): per test event the score, the local score
and local fold, p and q, the enriched mask; the count with its share of the test
events and a 95 % Clopper-Pearson interval (``scipy.stats.binomtest``); the
expected number of false discoveries (n_test x the share of control events as
extreme as the weakest enriched event -- by the density score alone, the control
scores at or above the lowest enriched score -- that pass the minimum fold too:
control-like events expected to pass; Benjamini-Hochberg bounds it by about rate x count); and the whole-sample shift check
(:func:`shift_check`).

Whole-sample shift.  When the two tubes differ as a whole (compensation,
voltages, staining), a density ratio flags large parts of the file.
:func:`shift_check` says so: a warning when more than ``max_share`` (10 %) of
the test events are enriched, or when a channel's marginal distributions differ
by a two-sample Kolmogorov-Smirnov test (``scipy.stats.ks_2samp``) with
p < 1e-6 AND statistic D >= ``ks_min`` (0.02).  With 60,000 events a second
draw of the same distribution gives D of 0.006-0.009 while a 5 % gain change
on one channel gives 0.024-0.026 (measured on the benchmark's generator): the
effect-size floor keeps trivial differences of huge files from flagging, and
the small p (many channels, many files) keeps chance from flagging smaller
files (a second draw of 20,000 events reached D = 0.021, p = 4e-4, on one
channel of 60 tried).  The channels that moved most
are named, with the KS statistic and their medians.

The control's part (its K part models and every control event's log density
under the model that did not see it) depends on the control alone;
:func:`prepare_control` computes it once (:class:`PreparedControl`) and
``contrast(..., prepared_control=...)`` reuses it for any number of test files
with the same result as passing the control's values (a batch does so).

Shapes: ``test_values`` (n_test, d), ``control_values`` (n_control, d) float,
the values the density sees (transformed, cleaned).  Rows with NaN are scored
NaN, get p = q = NaN and are never enriched.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from scipy import stats

from .density import AdditiveTreeDensity
from .errors import Cancelled, EventDataError
from .contrast_local import DEFAULT_SMALLEST, MIN_SCAN, TIE_BREAK, as_extreme, local_scores, min_rank_pvalues, neighbours_for
from .fdr import bh_qvalues
from .progress import stop_relay
from .recipe.records import Comparison

#: False discovery rate of the enriched events (Benjamini-Hochberg): core.recipe.Comparison's default.
DEFAULT_RATE = Comparison().rate
#: Smallest density ratio f_test / f_control of an enriched event (see the module docstring):
#: core.recipe.Comparison's default.
DEFAULT_MIN_FOLD = Comparison().min_fold
#: Range of the false discovery rate offered in the app (the check accepts any 0 < rate < 1).
MIN_RATE, MAX_RATE = 0.0001, 0.5
#: Largest minimum fold offered in the app (the check accepts any finite fold >= 1).
MAX_MIN_FOLD = 100.0
#: Parts for cross-fitting (see the module docstring).
DEFAULT_FOLDS = 3
#: Shift warning: share of enriched test events above which the whole sample is suspect.
SHIFT_MAX_SHARE = 0.10
#: Shift warning: smallest two-sample KS statistic that counts as a moved channel.
SHIFT_KS_MIN = 0.02
#: Shift warning: largest KS p-value that counts as a moved channel.
SHIFT_KS_P = 1e-6
#: Test events scored at least, per part, for a usable cross-fit.
MIN_EVENTS_PER_PART = 50
#: Reweighting the control's populations: EM on the weights stops when the mean log
#: likelihood gains less than this (nats per event) or after SHARE_EM_MAX_ITER steps.
SHARE_EM_TOL = 1e-9
SHARE_EM_MAX_ITER = 2000


@dataclass
class ShiftReport:
    """Outcome of :func:`shift_check`.

    ``warn``: True when the whole sample looks shifted; ``text``: a plain
    sentence for people ("" when no warning); ``channels``: one dict per
    channel, largest KS statistic first, with ``channel``, ``ks`` (D),
    ``pvalue``, ``median_test``, ``median_control`` (in the units given, see
    :func:`shift_check`) and ``moved`` (bool); ``enriched_share``: share of test
    events enriched.
    """

    warn: bool
    text: str
    channels: list
    enriched_share: float

    @property
    def moved(self) -> list:
        """Names of the channels that moved (largest KS statistic first)."""
        return [c["channel"] for c in self.channels if c["moved"]]


def _fmt(v: float) -> str:
    if not math.isfinite(v):
        return "nan"
    a = abs(v)
    if a >= 1000:
        return f"{v:,.0f}"
    if a >= 10:
        return f"{v:.1f}"
    return f"{v:.3g}"


def shift_check(test_values: np.ndarray, control_values: np.ndarray, channel_names: Sequence[str] | None = None,
                enriched_share: float = 0.0, to_units: Sequence[Callable | None] | None = None,
                max_share: float = SHIFT_MAX_SHARE, ks_min: float = SHIFT_KS_MIN,
                ks_p: float = SHIFT_KS_P) -> ShiftReport:
    """Does the test sample differ from the control as a whole?  (See the module docstring.)

    ``test_values`` (n_test, d), ``control_values`` (n_control, d): finite
    rows only are used.  ``channel_names``: d names (default "channel 1"...).
    ``enriched_share``: share of test events found enriched.  ``to_units``:
    optional d callables mapping the given values to instrument units (e.g.
    the inverse transforms); medians are reported through them (a median
    commutes with a monotone map; the KS statistic is unchanged by one).
    """
    T = np.asarray(test_values, dtype=np.float64)
    C = np.asarray(control_values, dtype=np.float64)
    d = T.shape[1]
    names = list(channel_names) if channel_names is not None else [f"channel {j + 1}" for j in range(d)]
    if len(names) != d or C.shape[1] != d:
        raise EventDataError(f"shift check: {d} test channels, {C.shape[1]} control channels and "
                             f"{len(names)} names")
    T = T[np.all(np.isfinite(T), axis=1)]
    C = C[np.all(np.isfinite(C), axis=1)]
    rows = []
    for j, name in enumerate(names):
        if T.shape[0] < 2 or C.shape[0] < 2:
            break
        res = stats.ks_2samp(T[:, j], C[:, j])
        mt, mc = float(np.median(T[:, j])), float(np.median(C[:, j]))
        f = to_units[j] if to_units is not None else None
        if f is not None:
            mt, mc = (float(np.asarray(f(np.array([m], dtype=np.float64)))[0]) for m in (mt, mc))
        rows.append({"channel": str(name), "ks": float(res.statistic), "pvalue": float(res.pvalue),
                     "median_test": mt, "median_control": mc,
                     "moved": bool(res.statistic >= ks_min and res.pvalue < ks_p)})
    rows.sort(key=lambda r: -r["ks"])
    moved = [r for r in rows if r["moved"]]
    many = enriched_share > max_share
    warn = bool(moved) or many
    text = ""
    if warn:
        parts = []
        if many:
            parts.append(f"{100 * enriched_share:.1f} % of the events differ from the control (more than "
                         f"{100 * max_share:.0f} %): the whole sample looks shifted rather than a new population "
                         "having appeared.")
        if moved:
            desc = "; ".join(f"{r['channel']} (KS D = {r['ks']:.3f}, median {_fmt(r['median_control'])} -> "
                             f"{_fmt(r['median_test'])})" for r in moved[:3])
            more = f" and {len(moved) - 3} more" if len(moved) > 3 else ""
            parts.append(f"Channel distributions differ from the control: {desc}{more}.")
        parts.append("Unless a large population is expected to change, check compensation, detector voltages "
                     "and staining before reading the enriched events as new cells.")
        text = " ".join(parts)
    return ShiftReport(warn=warn, text=text, channels=rows, enriched_share=float(enriched_share))


@dataclass
class ContrastResult:
    """Outcome of :func:`contrast` (see the module docstring).  Per-event arrays are (n_test,)."""

    score: np.ndarray          # log f_test - log f_control' (nats, see the module docstring); NaN for removed rows
    pvalue: np.ndarray         # conformal p-value against the control scores (both scores' when the local
    #                            score is on: core.contrast_local.min_rank_pvalues); NaN for removed rows
    qvalue: np.ndarray         # Benjamini-Hochberg q-value; NaN for removed rows
    enriched: np.ndarray       # bool: q <= rate, score >= log(min_fold) and (local score on) local_fold too
    count: int
    share: float               # count / n_scored test events
    share_ci: tuple            # (low, high) 95 % Clopper-Pearson
    rate: float                # false discovery rate
    min_fold: float
    threshold: float           # lowest score of an enriched event (inf when none)
    control_pass_share: float  # share of control events as extreme as the weakest enriched event that
    #                            pass the minimum fold too
    n_control: int             # control events in the reference
    expected_false: float      # control_pass_share x n_scored test events
    folds: int = DEFAULT_FOLDS
    shift: ShiftReport | None = None
    test_model: Any = None     # list of the K test part models
    control_model: Any = None  # list of the K control part models
    control_scores: np.ndarray | None = None   # (n_control,) the reference scores
    info: dict = field(default_factory=dict)   # n_test, control_prepared, part (the scored test events' parts),
    #                                            reweighted (per part: the control's shares were re-estimated),
    #                                            neighbours (k of the local score; 0: none)
    local_score: np.ndarray | None = None      # (n_test,) local neighbour score, nats (core.contrast_local)
    local_fold: np.ndarray | None = None       # (n_test,) local log fold (neighbour count ratio / expected)
    local_control_scores: np.ndarray | None = None   # (n_control,) the local score's reference
    local_control_fold: np.ndarray | None = None     # (n_control,) the control events' local log fold

    def summary(self) -> dict:
        """JSON-able numbers for tables and reports."""
        return {"enriched": self.count, "enriched_share": self.share,
                "enriched_share_ci_low": self.share_ci[0], "enriched_share_ci_high": self.share_ci[1],
                "false_discovery_rate": self.rate, "min_fold": self.min_fold,
                "expected_false_discoveries": self.expected_false, "threshold": self.threshold,
                "control_events": self.n_control,
                "shift_warning": self.shift.text if self.shift is not None else ""}


def contrast_keywords(res: ContrastResult, control: str | None) -> dict:
    """FCS TEXT keywords recording a contrast in an export: ``BOSCAGE_CONTROL`` (the control's
    file name), ``BOSCAGE_FDR``, ``BOSCAGE_MIN_FOLD``, ``BOSCAGE_ENRICHED``,
    ``BOSCAGE_CONTRAST_SCORES`` (the scores behind p: the density ratio, and the local
    neighbour counts with their k when used) and, when raised, ``BOSCAGE_SHIFT_WARNING``."""
    kw = {"BOSCAGE_CONTROL": os.path.basename(str(control or "")) or "unknown",
          "BOSCAGE_FDR": repr(float(res.rate)), "BOSCAGE_MIN_FOLD": repr(float(res.min_fold)),
          "BOSCAGE_ENRICHED": f"{res.count} of {res.info.get('n_test', '')} kept events; about "
                              f"{res.expected_false:.1f} expected false discoveries"}
    k = int(res.info.get("neighbours", 0) or 0)
    kw["BOSCAGE_CONTRAST_SCORES"] = (f"density ratio and local neighbour counts (k = {k}), one conformal p-value"
                                     if k else "density ratio")
    if res.shift is not None and res.shift.warn:
        kw["BOSCAGE_SHIFT_WARNING"] = res.shift.text
    return kw


def _default_factory(engine: Mapping | None, random_state: int) -> Callable:
    def fit(X, progress=None):
        kwargs = dict(engine or {})
        kwargs.setdefault("random_state", random_state)
        return AdditiveTreeDensity(**kwargs).fit(X, progress=progress)
    return fit


def assign_parts(n: int, folds: int, seed) -> np.ndarray:
    """Seeded, balanced assignment of ``n`` events to ``folds`` parts: int array (n,) in [0, folds)."""
    if folds < 2:
        raise EventDataError(f"cross-fitting needs at least 2 parts; got {folds}")
    rng = np.random.default_rng(seed)
    return (rng.permutation(n) % folds).astype(np.int64)


def _staged(progress, stage: str):
    """Relay a fit's progress with ``info = {"stage": "<stage>[ -- <the fit's own stage>]",
    "heldout_loglik": ...}``: which model is being fitted, and how far."""
    if progress is None:
        return None

    def relay(step, total, info=None):
        inner = info.get("stage") if isinstance(info, dict) else None
        ll = info.get("heldout_loglik") if isinstance(info, dict) else info
        return progress(step, total, {"stage": f"{stage} -- {inner}" if inner else stage, "heldout_loglik": ll})
    return relay


def _check_values(X: np.ndarray, what: str) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2:
        raise EventDataError(f"{what} events must be a 2-D array (events x channels); got shape {X.shape}")
    return X


@dataclass
class PreparedControl:
    """The control's part of a contrast, shared by every test file (see :func:`prepare_control`).

    ``events`` (n_control, d) float64: the control's finite events; ``part``
    (n_control,) int: each event's part; ``models``: the K part models (model k
    fitted without part k); ``log_control`` (n_control,): each event's natural-log
    density under the model that did not see it; ``folds`` and ``random_state``:
    the split's settings (a contrast must use the same); ``source``: where the
    control events came from (e.g. the file's path); ``info``: free-form
    provenance (the batch records the folder and checksums it was loaded from).
    """

    models: list
    events: np.ndarray
    part: np.ndarray
    log_control: np.ndarray
    folds: int = DEFAULT_FOLDS
    random_state: int = 0
    source: str = ""
    info: dict = field(default_factory=dict)

    @property
    def n_features(self) -> int:
        return int(self.events.shape[1])

    @property
    def n_events(self) -> int:
        return int(self.events.shape[0])


def prepare_control(control_values: np.ndarray, folds: int = DEFAULT_FOLDS, engine: Mapping | None = None,
                    random_state: int = 0, progress=None, model_factory: Callable | None = None,
                    source: str = "") -> PreparedControl:
    """Fit the control's K part models once, for contrasting any number of test files with it.

    ``control_values`` (n_control, d): the values the density sees; rows with
    NaN/inf are dropped.  The parts are seeded by ``random_state``;
    ``contrast(T, None, prepared_control=prepare_control(C, ...))`` gives the
    same result as ``contrast(T, C, ...)`` with the same settings.
    ``progress(step, total, info)`` receives ``info = {"stage": "control model,
    part k of K", "heldout_loglik": ...}``; returning False raises :class:`Cancelled`.
    """
    C = _check_values(control_values, "control")
    C = C[np.all(np.isfinite(C), axis=1)]
    folds = int(folds)
    if C.shape[0] < MIN_EVENTS_PER_PART * folds:
        raise EventDataError(f"the control has {C.shape[0]} usable events; cross-fitting in {folds} parts "
                             f"needs at least {MIN_EVENTS_PER_PART * folds}")
    part = assign_parts(C.shape[0], folds, [int(random_state), 2])
    fit = model_factory or _default_factory(engine, random_state)
    relay, stopped = stop_relay(progress)
    models = []
    log_control = np.empty(C.shape[0])
    for k in range(folds):
        models.append(fit(C[part != k], progress=_staged(relay, f"Control model, part {k + 1} of {folds}")))
        if stopped:
            raise Cancelled("contrast with the control was cancelled while fitting the control events")
        log_control[part == k] = models[k].score_samples(C[part == k])
    return PreparedControl(models=models, events=C, part=part, log_control=log_control, folds=folds,
                           random_state=int(random_state), source=str(source))


def conformal_pvalues(scores: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """p = (1 + #{reference >= s}) / (n_reference + 1) for each score s (NaN stays NaN).

    ``reference``: finite scores of events drawn like the null (here: the
    control events, each scored by models that did not see it).
    """
    ref = np.sort(np.asarray(reference, dtype=np.float64))
    ref = ref[np.isfinite(ref)]
    if ref.size == 0:
        raise EventDataError("no control scores to compare the test events with")
    s = np.asarray(scores, dtype=np.float64)
    p = np.full(s.shape, np.nan)
    ok = ~np.isnan(s)
    at_or_above = ref.size - np.searchsorted(ref, s[ok], side="left")
    p[ok] = (1.0 + at_or_above) / (ref.size + 1.0)
    return p


def mixture_posteriors(model, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, int] | None:
    """The components of a fitted model's mixture as seen by events X (n, d):
    ``(R, weights, n_fixed)`` with R (n, m) the posterior component probabilities,
    ``weights`` (m,) the mixture weights and ``n_fixed`` how many leading components
    keep their weight when the shares are re-estimated (:func:`population_shares`).

    An :class:`AdditiveTreeDensity` with a mixture base: its background first
    (kept: see the module docstring), then the K components.  A model with
    ``weights_`` and ``predict_proba`` (e.g. scikit-learn's GaussianMixture): its
    components, none kept.  None for any other model (a logistic base)."""
    chain = getattr(model, "chain_", None)
    mix = getattr(chain, "mixture", None)
    if mix is not None:
        C = np.clip(np.asarray(X, dtype=np.float64), *chain.far_limits())  # as score_samples clips
        return mix.posteriors(np.ascontiguousarray(C[:, ~chain.constant])), mix.weights, 1
    if chain is None and hasattr(model, "weights_") and hasattr(model, "predict_proba"):
        return (np.asarray(model.predict_proba(np.asarray(X, dtype=np.float64)), dtype=np.float64),
                np.asarray(model.weights_, dtype=np.float64), 0)
    return None


def population_shares(R: np.ndarray, weights: np.ndarray, n_fixed: int = 1, tol: float = SHARE_EM_TOL,
                      max_iter: int = SHARE_EM_MAX_ITER) -> np.ndarray:
    """Mixture weights re-estimated on other events, the components' shapes kept
    (EM on the weights only).

    ``R`` (n, m): posteriors of the n events under the mixture with weights
    ``weights`` (m,).  Component k's density at event i is proportional to
    R[i, k] / weights[k], so under weights w' its posterior is proportional to
    (w'_k / w_k) R[i, k]; each EM step sets w'_k to the mean of those posteriors
    for every component after the first ``n_fixed`` (which keep their weight),
    scaled so all sum to 1.  A component keeps at least min(w_k, 0.5 / n).
    Returns w' (m,)."""
    R = np.asarray(R, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    n, f = R.shape[0], int(n_fixed)
    free = 1.0 - float(w[:f].sum())
    floor = np.minimum(w[f:], 0.5 / max(n, 1))
    ratio = np.ones_like(w)
    prev = -np.inf
    for _ in range(int(max_iter)):
        mix = np.maximum(R @ ratio, 1e-300)
        ll = float(np.mean(np.log(mix)))
        if ll - prev < tol:
            break
        prev = ll
        nw = ((R[:, f:] * ratio[f:]) / mix[:, None]).mean(axis=0)
        nw = np.maximum(nw * (free / max(nw.sum(), 1e-300)), floor)
        ratio[f:] = nw * (free / nw.sum()) / w[f:]
    return w * ratio


def share_ratio(model, train: np.ndarray) -> np.ndarray | None:
    """w' / w (m,): the control part model's mixture weights re-estimated on ``train``
    (n_train, d; the test events the part's test model was fitted on) by
    :func:`population_shares`, over the fitted weights; None when the model has no
    mixture (:func:`mixture_posteriors`)."""
    got = mixture_posteriors(model, train)
    if got is None:
        return None
    R, w, n_fixed = got
    return population_shares(R, w, n_fixed) / w


def _log_factor(model, X: np.ndarray, ratio: np.ndarray) -> np.ndarray:
    return np.log(np.maximum(mixture_posteriors(model, X)[0] @ ratio, 1e-300))


def reweighted_control(model, train: np.ndarray) -> Callable | None:
    """The control part model's correction for the test's population shares: returns
    ``log_factor(X) -> (n,)`` with log f_c'(x) = log f_c(x) + log_factor(x), where
    f_c' is the control's density with its mixture's weights re-estimated on
    ``train`` (n_train, d; the test events the part's test model was fitted on) by
    :func:`population_shares`; None when the model has no mixture
    (:func:`mixture_posteriors`).

    f_c'(x) = f_c(x) sum_k (w'_k / w_k) r_k(x), r_k the posteriors under the control's
    mixture: exact for a model that is its mixture alone (then f_c' = sum_k w'_k f_k);
    with trees, the trees' correction is kept and the base reweighted.
    :func:`reweighted_log_density` gives log f_c' in one pass."""
    ratio = share_ratio(model, train)
    if ratio is None:
        return None
    return lambda X: _log_factor(model, X, ratio)


def reweighted_log_density(model, X: np.ndarray, ratio: np.ndarray | None) -> np.ndarray:
    """log f_c'(x) (n,) of events X (n, d): the model's log density plus the log of
    sum_k ratio_k r_k(x) (:func:`reweighted_control`; ``ratio`` from :func:`share_ratio`,
    None: the model's log density alone).  When the model is a skewed mixture alone,
    the posteriors come from the same compiled pass as the log density
    (``score_samples(posteriors=...)``); otherwise, and for chunks holding a value
    beyond the far-value clip, from a second pass (:func:`mixture_posteriors`)."""
    log_f, factor = reweighted_terms(model, X, ratio)
    return log_f + factor


def reweighted_terms(model, X: np.ndarray, ratio: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """(log f_c(x), log factor(x)), both (n,), of events X (n, d): the two terms of
    :func:`reweighted_log_density` (the factor is 0 when ``ratio`` is None)."""
    X = np.asarray(X, dtype=np.float64)
    if ratio is None:
        return np.asarray(model.score_samples(X), dtype=np.float64), np.zeros(X.shape[0])
    if not getattr(model, "scores_with_posteriors", False):
        return np.asarray(model.score_samples(X), dtype=np.float64), _log_factor(model, X, ratio)
    factor = np.empty(X.shape[0])

    def take(a, b, R):
        if R is None:
            factor[a:b] = _log_factor(model, X[a:b], ratio)
        else:
            factor[a:b] = np.log(np.maximum(R @ ratio, 1e-300))
    return np.asarray(model.score_samples(X, posteriors=take), dtype=np.float64), factor


def check_settings(rate: float, min_fold: float, smallest: float = 0.0) -> None:
    """Raise :class:`EventDataError` unless 0 < ``rate`` < 1, ``min_fold`` is a finite number >= 1
    and ``smallest`` (the local score's smallest population, events) is 0 (off) or >= MIN_SCAN."""
    if not 0.0 < rate < 1.0:
        raise EventDataError(f"the false discovery rate must be between 0 and 1 (0.05 = 5 %); got {rate}")
    if not (math.isfinite(min_fold) and min_fold >= 1.0):
        raise EventDataError(f"the minimum fold (density ratio) must be a number of at least 1; got {min_fold}")
    if not (math.isfinite(smallest) and (smallest == 0 or smallest >= MIN_SCAN)):
        raise EventDataError(f"the smallest population to look for must be 0 (no local score) or at least "
                             f"{MIN_SCAN} events; got {smallest}")


def contrast(test_values: np.ndarray, control_values: np.ndarray | None, rate: float = DEFAULT_RATE,
             min_fold: float = DEFAULT_MIN_FOLD, folds: int = DEFAULT_FOLDS, engine: Mapping | None = None,
             random_state: int = 0, progress=None, model_factory: Callable | None = None,
             confidence_level: float = 0.95, prepared_control: PreparedControl | None = None,
             channel_names: Sequence[str] | None = None, to_units: Sequence[Callable | None] | None = None,
             reweight: bool = True, smallest: float = DEFAULT_SMALLEST) -> ContrastResult:
    """Score test events by log f_test - log f_control; flag the enriched ones at false discovery rate ``rate``.

    ``rate``: Benjamini-Hochberg false discovery rate (0 < rate < 1);
    ``min_fold`` (>= 1): smallest density ratio of an enriched event;
    ``folds``: cross-fitting parts K >= 2 (see the module docstring).
    ``model_factory(X, progress) -> fitted model``: how densities are fitted
    (default: AdditiveTreeDensity with ``engine`` keywords, seeded by
    ``random_state``).  ``progress(step, total, info)`` receives
    ``info = {"stage": ..., "heldout_loglik": ...}`` naming the model being
    fitted; returning False raises :class:`Cancelled`.
    ``prepared_control``: the control's part from :func:`prepare_control` (same
    ``folds`` and ``random_state``); ``control_values`` is then not used.
    ``channel_names``, ``to_units``: for the shift check's text (see :func:`shift_check`).
    ``reweight``: give each control part model the test's population shares first
    (:func:`reweighted_control`; see the module docstring); False scores against the
    control's density as fitted (the former score).
    ``smallest``: the smallest new population (events) the local neighbour score is
    sized for (:mod:`core.contrast_local`, k = floor(smallest (folds - 1) / folds));
    0 scores by the density alone (the score before the local score).
    """
    check_settings(rate, min_fold, smallest)
    folds = int(folds)
    T = _check_values(test_values, "test")
    pc = prepared_control
    if pc is not None:
        if pc.folds != folds or pc.random_state != int(random_state):
            raise EventDataError(
                f"the prepared control was split into {pc.folds} parts with seed {pc.random_state}, but this "
                f"contrast asks for {folds} parts and seed {random_state}; prepare the control again with the "
                "same settings")
        d_control = pc.n_features
    else:
        d_control = _check_values(control_values, "control").shape[1]
    if T.shape[1] != d_control:
        raise EventDataError(f"test and control need the same channels; got {T.shape[1]} and {d_control}")
    t_ok = np.all(np.isfinite(T), axis=1)
    Tk = T[t_ok]
    if Tk.shape[0] < MIN_EVENTS_PER_PART * folds:
        raise EventDataError(f"cross-fitting in {folds} parts needs at least {MIN_EVENTS_PER_PART * folds} "
                             f"test events; got {Tk.shape[0]}")
    fit = model_factory or _default_factory(engine, random_state)
    relay, stopped = stop_relay(progress)
    if pc is None:
        pc = prepare_control(control_values, folds=folds, random_state=random_state, progress=relay,
                             model_factory=fit)
        shared = False
    else:
        shared = True
    part_t = assign_parts(Tk.shape[0], folds, [int(random_state), 1])
    test_models, reweighted = [], []
    s_test = np.empty(Tk.shape[0])
    s_control = np.empty(pc.n_events)
    k_local = neighbours_for(smallest, folds) if smallest else 0
    l_test, f_test = np.empty(Tk.shape[0]), np.empty(Tk.shape[0])
    l_control, f_control = np.empty(pc.n_events), np.empty(pc.n_events)
    for k in range(folds):
        model = fit(Tk[part_t != k], progress=_staged(relay, f"Test model, part {k + 1} of {folds}"))
        if stopped:
            raise Cancelled("contrast with the control was cancelled while fitting the test events")
        test_models.append(model)
        sel = part_t == k
        csel = pc.part == k
        ratio = share_ratio(pc.models[k], Tk[part_t != k]) if reweight else None
        reweighted.append(ratio is not None)
        log_c, factor_t = reweighted_terms(pc.models[k], Tk[sel], ratio)
        s_test[sel] = np.asarray(model.score_samples(Tk[sel]), dtype=np.float64) - log_c - factor_t
        s_control[csel] = np.asarray(model.score_samples(pc.events[csel]), dtype=np.float64) - pc.log_control[csel]
        factor_c = np.zeros(int(csel.sum()))
        if ratio is not None:
            factor_c = _log_factor(pc.models[k], pc.events[csel], ratio)
            s_control[csel] -= factor_c
        if k_local:
            if not relay(k, folds, {"stage": f"Neighbour counts, part {k + 1} of {folds}", "heldout_loglik": None}):
                raise Cancelled("contrast with the control was cancelled while counting neighbours")
            # the part's test and control events in one call: one tree, and on large files one
            # choice of the events searched exactly for both (core.contrast_local, "Large files")
            m = int(sel.sum())
            ls, lf = local_scores(Tk[part_t != k], pc.events[pc.part != k], np.vstack([Tk[sel], pc.events[csel]]),
                                  np.concatenate([factor_t, factor_c]), k_local, eps=None)
            l_test[sel], f_test[sel], l_control[csel], f_control[csel] = ls[:m], lf[:m], ls[m:], lf[m:]

    score = np.full(T.shape[0], np.nan)
    score[t_ok] = s_test
    log_fold = score
    if k_local:
        # the local score takes few distinct values (neighbour counts): break its ties at random, the
        # same way for test and control events (seeded), so its conformal p-values are uniform, not
        # merely valid (TIE_BREAK nats is far below any difference between distinct counts)
        jitter = np.random.default_rng([int(random_state), 3])
        l_test = l_test + TIE_BREAK * jitter.random(l_test.size)
        l_control = l_control + TIE_BREAK * jitter.random(l_control.size)
        local = np.full(T.shape[0], np.nan)
        local[t_ok] = l_test
        local_fold = np.full(T.shape[0], np.nan)
        local_fold[t_ok] = f_test
        pvalue = min_rank_pvalues(score, s_control, local, l_control)
        log_fold = np.minimum(score, local_fold)   # both estimates of the ratio must reach the minimum fold
    else:
        local = local_fold = l_control = f_control = None
        pvalue = conformal_pvalues(score, s_control)
    qvalue = bh_qvalues(pvalue)
    with np.errstate(invalid="ignore"):
        enriched = (qvalue <= rate) & (log_fold >= math.log(min_fold))
    n = int(t_ok.sum())
    count = int(enriched.sum())
    ci = stats.binomtest(count, n).proportion_ci(confidence_level=confidence_level, method="exact")
    threshold = float(np.min(score[enriched])) if count else float("inf")
    # control events as extreme as the weakest enriched event (those its p counts) that also pass
    # the minimum fold: the control-like events expected to pass
    pass_share = 0.0
    if count:
        fold_ok = s_control >= math.log(min_fold)
        if k_local:
            weakest = int(np.flatnonzero(enriched)[np.argmax(pvalue[enriched])])
            extreme = as_extreme(score[weakest], s_control, local[weakest], l_control)
            fold_ok &= f_control >= math.log(min_fold)
        else:
            extreme = s_control >= threshold
        pass_share = float(np.mean(extreme & fold_ok))
    shift = shift_check(Tk, pc.events, channel_names, enriched_share=count / n, to_units=to_units)
    return ContrastResult(score=score, pvalue=pvalue, qvalue=qvalue, enriched=enriched, count=count,
                          share=count / n, share_ci=(float(ci.low), float(ci.high)), rate=float(rate),
                          min_fold=float(min_fold), threshold=threshold, control_pass_share=pass_share,
                          n_control=int(pc.n_events), expected_false=pass_share * n, folds=folds, shift=shift,
                          test_model=test_models, control_model=list(pc.models), control_scores=s_control,
                          local_score=local, local_fold=local_fold, local_control_scores=l_control,
                          local_control_fold=f_control,
                          info={"n_test": n, "control_prepared": shared, "part": part_t,
                                "reweighted": reweighted, "neighbours": k_local})
