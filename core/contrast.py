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

Caveat: the test model is fitted to all test events and scores the same
events; early stopping on a held-out share limits how much it favours them, so
the false-pass rate on the test file's control-like events can be a little
above the nominal alpha.  The benchmark measures precision on our scenario.

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
from .progress import keep_going

DEFAULT_ALPHA = 0.001
DEFAULT_HELDOUT_FRACTION = 0.3


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
    test_model: Any = None
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
             model_factory: Callable | None = None, confidence_level: float = 0.95) -> ContrastResult:
    """Score test events by log f_test - log f_control and flag the enriched ones.

    ``test_model``: an already fitted density of the test events (reused when
    given).  ``model_factory(X, progress) -> fitted model``: how densities are
    fitted (default: AdditiveTreeDensity with ``engine`` keywords, seeded by
    ``random_state``).  ``progress(step, total, info)`` is passed to the fits;
    returning False raises :class:`Cancelled`.
    """
    if not 0.0 < alpha < 1.0:
        raise EventDataError(f"alpha (the share of control events allowed to pass) must be between 0 and 1; got {alpha}")
    T = np.asarray(test_values, dtype=np.float64)
    C = np.asarray(control_values, dtype=np.float64)
    if T.ndim != 2 or C.ndim != 2 or T.shape[1] != C.shape[1]:
        raise EventDataError(f"test and control need the same channels; got shapes {T.shape} and {C.shape}")
    t_ok = np.all(np.isfinite(T), axis=1)
    C = C[np.all(np.isfinite(C), axis=1)]
    fit = model_factory or _default_factory(engine, random_state)

    stopped = []

    def relay(step, total, info):
        go = keep_going(progress, step, total, info)
        if not go:
            stopped.append(True)
        return go

    if test_model is None:
        test_model = fit(T[t_ok], progress=relay)
        if stopped:
            raise Cancelled("contrast with the control was cancelled while fitting the test events")
    fit_idx, out_idx = split_heldout(C.shape[0], heldout_fraction, random_state)
    control_model = fit(C[fit_idx], progress=relay)
    if stopped:
        raise Cancelled("contrast with the control was cancelled while fitting the control events")

    held = C[out_idx]
    held_scores = np.asarray(test_model.score_samples(held), dtype=np.float64) - \
        np.asarray(control_model.score_samples(held), dtype=np.float64)
    thr = threshold_for_alpha(held_scores, alpha)
    score = np.full(T.shape[0], np.nan)
    score[t_ok] = np.asarray(test_model.score_samples(T[t_ok]), dtype=np.float64) - \
        np.asarray(control_model.score_samples(T[t_ok]), dtype=np.float64)
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
                          n_control_heldout=int(out_idx.size), expected_false=pass_share * n,
                          test_model=test_model, control_model=control_model,
                          info={"n_test": n, "n_control_fit": int(fit_idx.size)})
