"""Grown and shrunk populations: a test file's population shares against its control's."""

from __future__ import annotations

import numpy as np

from ..errors import EventDataError
from ..fdr import bh_qvalues
from .definition import PopulationDefinition
from .settings import CHANGE_RATE, DEFAULT_SETTINGS


def population_changes(control_labels, test_labels, definition: PopulationDefinition,
                       confidence_level: float = 0.95,
                       min_fold: float = DEFAULT_SETTINGS["change_fold"]) -> list:
    """Each population's share in control and test, fold change and exact test.

    ``control_labels``, ``test_labels``: population ids (-1 none) of the
    control's and the test's events under ONE ``definition`` (so population p
    is the same cells in both).  Per population (one dict each, by id):
    ``control_count``/``control_share``, ``test_count``/``test_share`` (shares
    of all events of that file), ``fold`` = test share / control share with a
    ``confidence_level`` interval (``fold_low``, ``fold_high``), ``p`` and
    ``q``.

    ``p``: two-sided Fisher exact test of the 2 x 2 table (in / not in the
    population) x (test / control) (``scipy.stats.fisher_exact``).  Fold
    interval: conditional on the population's events in both files
    ``m = c_test + c_control``, ``c_test`` is binomial with probability
    ``theta = n_test R / (n_control + n_test R)`` (R the fold; exact for Poisson
    counts, close for shares well below 1); the Clopper-Pearson interval of
    theta (``scipy.stats.binomtest``) mapped to R.  ``q``: Benjamini-Hochberg
    across the populations (:func:`core.fdr.bh_qvalues`); ``change`` is
    "grown" when q <= :data:`CHANGE_RATE` (5 %) and fold >= ``min_fold``,
    "shrunk" when q <= CHANGE_RATE and fold <= 1 / ``min_fold``, else "".
    The fold threshold (the recipe's populations ``change_fold``, default 1.5)
    keeps significant but small changes unlabelled: with tens of thousands of
    events a share that moves by 8 % is significant, and when one population
    grows ten-fold every other share falls by that much (common practice: a
    fold threshold beside the false discovery rate).  Rows stay in id order.
    """
    # imported here: scipy.stats adds ~1.3 s to importing core
    from scipy import stats

    cl = np.asarray(control_labels)
    tl = np.asarray(test_labels)
    n1, n2 = int(cl.size), int(tl.size)
    if n1 == 0 or n2 == 0:
        raise EventDataError("population changes need events in both the control and the test file")
    P = definition.n_populations if isinstance(definition, PopulationDefinition) else int(definition)
    c1 = np.bincount(cl[cl >= 0], minlength=P)
    c2 = np.bincount(tl[tl >= 0], minlength=P)
    rows, ps = [], []
    for p in range(P):
        a, b = int(c1[p]), int(c2[p])
        s1, s2 = a / n1, b / n2
        pval = float(stats.fisher_exact([[b, n2 - b], [a, n1 - a]])[1])
        m = a + b
        if m:
            ci = stats.binomtest(b, m).proportion_ci(confidence_level=confidence_level, method="exact")
            lo_t, hi_t = float(ci.low), float(ci.high)
            lo = lo_t * n1 / ((1 - lo_t) * n2) if lo_t < 1 else np.inf
            hi = hi_t * n1 / ((1 - hi_t) * n2) if hi_t < 1 else np.inf
        else:
            lo, hi = np.nan, np.nan
        fold = s2 / s1 if a else (np.inf if b else np.nan)
        rows.append({"id": p, "control_count": a, "control_share": s1, "test_count": b, "test_share": s2,
                     "fold": float(fold), "fold_low": float(lo), "fold_high": float(hi), "p": pval})
        ps.append(pval)
    q = bh_qvalues(np.array(ps)) if ps else np.array([])
    for r, qq in zip(rows, q):
        r["q"] = float(qq)
        big = r["fold"] >= min_fold or r["fold"] <= 1.0 / min_fold
        r["change"] = ("grown" if r["fold"] > 1 else "shrunk") if r["q"] <= CHANGE_RATE and big else ""
    return rows


def reading_order(rows: list) -> list:
    """``rows`` of :func:`population_changes` in the order to read them: the grown and
    shrunk first, the largest change (|log fold|) first, then the rest by q."""
    def key(r):
        fold = r["fold"]
        size = abs(np.log(fold)) if np.isfinite(fold) and fold > 0 else np.inf
        return (r["change"] == "", -size if r["change"] else r["q"], r["id"])
    return sorted(rows, key=key)
