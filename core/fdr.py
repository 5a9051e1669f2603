"""False discovery rate: Benjamini-Hochberg adjusted p-values (q-values).

One implementation serves every multiple-testing question in Boscage (new
events against a control, populations that grew or shrank).

Method (Benjamini-Hochberg step-up): with m p-values sorted ascending,
p_(1) <= ... <= p_(m), the adjusted value of the i-th smallest is

    q_(i) = min over j >= i of  min(1, m * p_(j) / j)

and rejecting every hypothesis with q <= rate controls the false discovery
rate at ``rate`` for independent (or positively dependent) tests.  NaN
p-values are not tests: they get q = NaN and do not count in m.
"""

from __future__ import annotations

import numpy as np

from .errors import EventDataError


def bh_qvalues(pvalues) -> np.ndarray:
    """Benjamini-Hochberg q-values, same shape as ``pvalues`` (float64).

    ``pvalues`` must lie in [0, 1] (NaN allowed, passed through as NaN).
    """
    p = np.asarray(pvalues, dtype=np.float64)
    shape = p.shape
    p = p.ravel()
    finite = ~np.isnan(p)
    if np.any((p[finite] < 0) | (p[finite] > 1)):
        raise EventDataError("p-values must lie between 0 and 1")
    q = np.full(p.shape, np.nan)
    pv = p[finite]
    m = pv.size
    if m:
        order = np.argsort(pv, kind="stable")
        ranked = pv[order] * m / np.arange(1, m + 1)
        ranked = np.minimum.accumulate(ranked[::-1])[::-1]
        out = np.empty(m)
        out[order] = np.minimum(ranked, 1.0)
        q[finite] = out
    return q.reshape(shape)


def bh_reject(pvalues, rate: float) -> np.ndarray:
    """Boolean mask of the hypotheses rejected at false discovery rate ``rate``."""
    if not 0 < rate < 1:
        raise EventDataError(f"the false discovery rate must lie between 0 and 1, not {rate}")
    q = bh_qvalues(pvalues)
    return np.nan_to_num(q, nan=np.inf) <= rate
