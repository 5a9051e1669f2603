"""Contrast a test file with a control: events enriched in the test sample.

Method
------
Both samples are described by the same channels (same recipe: compensation,
transforms, cleaning).  A density is fitted to the test events (f_test) and one
to the control events (f_control), except for a held-out share of the control
events (default 30 %, seeded) that the control model never sees.  Each test
event gets the score

    s(x) = log f_test(x) - log f_control(x)        (natural log, nats)

which is large where the test sample has events the control lacks.  The
threshold t is set on the HELD-OUT control events, scored the same way, so that
at most ``alpha`` of them (default 0.1 %) have s > t: events of the control's
kind pass with probability about alpha, measured on events that did not shape
the control model (scoring the control's own training events would make them
look more typical than new control-like events are, and the threshold too low).
Test events with s > t are "enriched".

Reported: the enriched mask, their count and share of the test events with a
95 % Clopper-Pearson (exact binomial) interval (``scipy.stats.binomtest``), the
share of held-out control events that passed, and the expected number of
control-like events among the enriched ones (alpha_observed x n_test), so the
excess over the control is visible.

Cross-fitting (default, ``cross_fit=3``): a density fitted to the test
events scores those same events higher than new events of the same kind
(in-sample optimism), which lets control-like test events pass more often
than alpha (measured on a 3-channel normal background with a 0.5 % spike:
0.3 % instead of 0.1 %, precision 0.61; on the scenario's low-dose tube 0.15 %).
So the test events are split into K seeded parts; the model fitted without
part k scores the events of part k, and the held-out control events are
assigned to parts the same way and scored by the same models.  Test events and
held-out control events are then scored alike -- by models that did not see
them -- and alpha holds for both.  K = 3 is the default: each model sees 2/3
of the test events, so a small population keeps most of its events (with
halves, a 35-event population of the scenario's low-dose tube was found with
recall 0.03-0.51 depending on the split, with 3 parts 0.80, with 4 parts 0.83,
without cross-fitting 1.00 but at 1.5 x the false-pass rate).  The cost is K
fits on (K-1)/K of the test events.  ``cross_fit=0`` uses one f_test
(``test_model``, e.g. the file's own fitted model): faster, optimistic.

The control's part -- the held-out split, the control density fitted on the
fit share and its log density at the held-out events -- depends on the control
alone, so :func:`prepare_control` computes it once (:class:`PreparedControl`)
and ``contrast(..., prepared_control=...)`` reuses it for any number of test
files with the same result as passing the control's values (a batch does so).
What involves the test file (its densities, the parts of the cross-fitting,
the held-out events' part assignment, the threshold) is computed per file.

Shapes: ``test_values`` (n_test, d), ``control_values`` (n_control, d) float,
the values the density sees (transformed, cleaned).  Rows with NaN are scored
NaN and are never enriched.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np
from scipy import stats

from .errors import Cancelled, EventDataError
from .progress import stop_relay

DEFAULT_ALPHA = 0.001
DEFAULT_HELDOUT_FRACTION = 0.3
#: Parts for cross-fitting the test density (see the module docstring).
DEFAULT_FOLDS = 3


@dataclass
class ContrastResult:
    """Outcome of :func:`contrast` (see the module docstring)."""

    score: np.ndarray          # (n_test,) log f_test - log f_control; NaN for removed rows
    threshold: float           # enriched: score > threshold
    enriched: np.ndarray       # (n_test,) bool
    count: int
    share: float               # count / n_scored test events
    share_ci: tuple            # (low, high) 95 % Clopper-Pearson
    alpha: float
    control_pass_share: float  # share of held-out control events above the threshold
    n_control_heldout: int
    expected_false: float      # control_pass_share x n_scored test events
    test_model: Any = None     # fitted test density, or the list of K part models when cross-fitted
    control_model: Any = None
    info: dict = field(default_factory=dict)

    def summary(self) -> dict:
        """JSON-able numbers for tables and reports."""
        return {"enriched": self.count, "enriched_share": self.share,
                "enriched_share_ci_low": self.share_ci[0], "enriched_share_ci_high": self.share_ci[1],
                "threshold": self.threshold, "alpha": self.alpha,
                "control_heldout_pass_share": self.control_pass_share,
                "control_heldout_events": self.n_control_heldout,
                "expected_control_like": self.expected_false}


def _default_factory(engine: Mapping | None, random_state: int) -> Callable:
    def fit(X, progress=None):
        from .density import AdditiveTreeDensity

        kwargs = dict(engine or {})
        kwargs.setdefault("random_state", random_state)
        return AdditiveTreeDensity(**kwargs).fit(X, progress=progress)
    return fit


def split_heldout(n: int, fraction: float, random_state: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Seeded split of ``range(n)`` into (fit indices, held-out indices), both sorted."""
    if not 0.0 < fraction < 1.0:
        raise EventDataError(f"the held-out share of control events must be between 0 and 1; got {fraction}")
    rng = np.random.default_rng(random_state)
    perm = rng.permutation(n)
    n_out = int(round(fraction * n))
    return np.sort(perm[n_out:]), np.sort(perm[:n_out])


@dataclass
class PreparedControl:
    """The control's part of a contrast, shared by every test file (see :func:`prepare_control`).

    ``model``: density fitted to the control's fit share; ``heldout``
    (n_heldout, d) float64: the held-out control events (finite rows only);
    ``heldout_log_control`` (n_heldout,): ``model``'s natural-log density at
    them; ``n_fit``: events the model was fitted on; ``heldout_fraction`` and
    ``random_state``: the split's settings (a contrast must use the same).
    ``source``: where the control events came from (e.g. the file's path).
    ``info``: free-form provenance (the batch records the folder and checksums
    it was loaded from).
    """

    model: Any
    heldout: np.ndarray
    heldout_log_control: np.ndarray
    n_fit: int
    heldout_fraction: float = DEFAULT_HELDOUT_FRACTION
    random_state: int = 0
    source: str = ""
    info: dict = field(default_factory=dict)   # e.g. where it was loaded from

    @property
    def n_features(self) -> int:
        return int(self.heldout.shape[1])


def _control_split(control_values: np.ndarray, heldout_fraction: float, random_state: int):
    """Finite control rows split into (fit share, held-out events), as :func:`contrast` does."""
    C = np.asarray(control_values, dtype=np.float64)
    if C.ndim != 2:
        raise EventDataError(f"control events must be a 2-D array (events x channels); got shape {C.shape}")
    C = C[np.all(np.isfinite(C), axis=1)]
    fit_idx, out_idx = split_heldout(C.shape[0], heldout_fraction, random_state)
    return C[fit_idx], C[out_idx]


def prepare_control(control_values: np.ndarray, heldout_fraction: float = DEFAULT_HELDOUT_FRACTION,
                    engine: Mapping | None = None, random_state: int = 0, progress=None,
                    model_factory: Callable | None = None, source: str = "") -> PreparedControl:
    """Fit the control's density once, for contrasting any number of test files with it.

    ``control_values`` (n_control, d): the values the density sees; rows with
    NaN/inf are dropped.  The held-out share (seeded by ``random_state``) is
    set aside and scored by the model fitted on the rest -- exactly what
    :func:`contrast` does with ``control_values``, so
    ``contrast(T, None, prepared_control=prepare_control(C, ...))`` gives the
    same result as ``contrast(T, C, ...)`` with the same settings.
    ``progress(step, total, info)`` is passed to the fit; returning False
    raises :class:`Cancelled`.
    """
    fit_part, held = _control_split(control_values, heldout_fraction, random_state)
    fit = model_factory or _default_factory(engine, random_state)
    relay, stopped = stop_relay(progress)
    model = fit(fit_part, progress=relay)
    if stopped:
        raise Cancelled("contrast with the control was cancelled while fitting the control events")
    return PreparedControl(model=model, heldout=held,
                           heldout_log_control=np.asarray(model.score_samples(held), dtype=np.float64),
                           n_fit=int(fit_part.shape[0]), heldout_fraction=float(heldout_fraction),
                           random_state=int(random_state), source=str(source))


def threshold_for_alpha(heldout_scores: np.ndarray, alpha: float) -> float:
    """Smallest threshold t with at most ``alpha`` of the scores strictly above t.

    ``heldout_scores``: finite scores of held-out control events.
    """
    s = np.sort(np.asarray(heldout_scores, dtype=np.float64))[::-1]
    if s.size == 0:
        raise EventDataError("no held-out control events to set the contrast threshold")
    k = int(np.floor(alpha * s.size))
    return float(s[min(k, s.size - 1)])


def contrast(test_values: np.ndarray, control_values: np.ndarray, alpha: float = DEFAULT_ALPHA,
             heldout_fraction: float = DEFAULT_HELDOUT_FRACTION, engine: Mapping | None = None,
             random_state: int = 0, progress=None, test_model: Any = None,
             model_factory: Callable | None = None, confidence_level: float = 0.95,
             cross_fit: int | bool = 3, prepared_control: PreparedControl | None = None
             ) -> ContrastResult:
    """Score test events by log f_test - log f_control and flag the enriched ones.

    ``cross_fit``: number of parts K >= 2 for cross-fitting the test density
    (True = 3; 0 or False = off; see the module docstring).  ``test_model``: an
    already fitted density of all test events, used only when cross-fitting is off.
    ``model_factory(X, progress) -> fitted model``: how densities are fitted (default: AdditiveTreeDensity with ``engine`` keywords, seeded by
    ``random_state``).  ``progress(step, total, info)`` is passed to the fits;
    returning False raises :class:`Cancelled`.
    ``prepared_control``: the control's part computed once by
    :func:`prepare_control` (same ``heldout_fraction`` and ``random_state``);
    ``control_values`` is then not used and may be None.
    """
    if not 0.0 < alpha < 1.0:
        raise EventDataError(f"alpha (the share of control events allowed to pass) must be between 0 and 1; got {alpha}")
    T = np.asarray(test_values, dtype=np.float64)
    if prepared_control is not None:
        pc = prepared_control
        if pc.heldout_fraction != float(heldout_fraction) or pc.random_state != int(random_state):
            raise EventDataError(
                f"the prepared control was split with held-out share {pc.heldout_fraction} and seed "
                f"{pc.random_state}, but this contrast asks for {heldout_fraction} and {random_state}; "
                "prepare the control again with the same settings")
        C_shape = (int(pc.n_fit) + pc.heldout.shape[0], pc.heldout.shape[1])
    else:
        C = np.asarray(control_values, dtype=np.float64)
        C_shape = C.shape
    if T.ndim != 2 or len(C_shape) != 2 or T.shape[1] != C_shape[1]:
        raise EventDataError(f"test and control need the same channels; got shapes {T.shape} and {C_shape}")
    t_ok = np.all(np.isfinite(T), axis=1)
    fit = model_factory or _default_factory(engine, random_state)
    relay, stopped = stop_relay(progress)

    Tk = T[t_ok]
    # only the held-out events' count is needed before the test fits (part assignment)
    held = (prepared_control.heldout if prepared_control is not None
            else _control_split(C, heldout_fraction, random_state)[1])
    rng = np.random.default_rng([random_state, 1])
    folds = DEFAULT_FOLDS if cross_fit is True else int(cross_fit or 0)
    if folds >= 2:
        fold_t = rng.integers(folds, size=Tk.shape[0])
        fold_h = rng.integers(folds, size=held.shape[0])
        if Tk.shape[0] < 50 * folds:
            raise EventDataError(f"cross-fitting in {folds} parts needs at least {50 * folds} test events; "
                                 f"got {Tk.shape[0]}")
        models = []
        for k in range(folds):
            models.append(fit(Tk[fold_t != k], progress=relay))
            if stopped:
                raise Cancelled("contrast with the control was cancelled while fitting the test events")
        test_model = models
    else:
        fold_t = fold_h = None
        if test_model is None:
            test_model = fit(Tk, progress=relay)
            if stopped:
                raise Cancelled("contrast with the control was cancelled while fitting the test events")
    if prepared_control is None:  # the per-file path: the control's part, fitted here
        prepared_control = prepare_control(C, heldout_fraction=heldout_fraction, random_state=random_state,
                                           progress=progress, model_factory=fit)
        shared = False
    else:
        shared = True
    control_model = prepared_control.model
    held_log_control = np.asarray(prepared_control.heldout_log_control, dtype=np.float64)
    n_fit = int(prepared_control.n_fit)

    def log_test(X, fold):
        if fold is None:
            return np.asarray(test_model.score_samples(X), dtype=np.float64)
        out = np.empty(X.shape[0])
        # events of part k are scored by the model fitted without part k
        for k, model in enumerate(test_model):
            sel = fold == k
            if sel.any():
                out[sel] = model.score_samples(X[sel])
        return out

    held_scores = log_test(held, fold_h) - held_log_control
    thr = threshold_for_alpha(held_scores, alpha)
    score = np.full(T.shape[0], np.nan)
    score[t_ok] = log_test(Tk, fold_t) - \
        np.asarray(control_model.score_samples(Tk), dtype=np.float64)
    with np.errstate(invalid="ignore"):
        enriched = score > thr
    n = int(t_ok.sum())
    count = int(enriched.sum())
    ci = stats.binomtest(count, n).proportion_ci(confidence_level=confidence_level, method="exact") if n else None
    pass_share = float(np.mean(held_scores > thr))
    return ContrastResult(score=score, threshold=thr, enriched=enriched, count=count,
                          share=count / n if n else float("nan"),
                          share_ci=(float(ci.low), float(ci.high)) if ci else (float("nan"),) * 2,
                          alpha=float(alpha), control_pass_share=pass_share,
                          n_control_heldout=int(held.shape[0]), expected_false=pass_share * n,
                          test_model=test_model, control_model=control_model,
                          info={"n_test": n, "n_control_fit": n_fit,
                                "control_prepared": shared})
