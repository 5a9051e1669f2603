"""A prior on the mixture base's correlations for wide panels: the components
split from one ancestor share a pooled correlation matrix that each
component's own is pulled toward (a MAP M step), while each keeps its own
means and variances.  Populations that fan out (spread growing with
intensity, as compensated data do) need several components each; those
differ in scale but share their correlation, and with many channels a
component's own correlations (d (d - 1) / 2 of them) are mostly noise
(EXPERIMENTS.md section 25)."""

from __future__ import annotations

import numpy as np

#: Pseudo-events of the group's pooled correlation (section 25: 200 and 1000
#: gave the same held-out gain at 24 channels, 5000 less).
CORR_PRIOR = 1000.0
#: Component counts tried by the mixture base with the prior on: the usual
#: doublings and 128 (without the prior 128 over-fits 40,000 events at 24
#: channels; with it, it wins there).
PRIOR_COMPONENTS = (1, 2, 4, 8, 16, 32, 64, 128)


def split_groups(groups: np.ndarray) -> np.ndarray:
    """Groups (2K,) of the components after each of K is split in two (children
    2k and 2k + 1 of :func:`core.density.em.split_components` keep k's group)."""
    return np.repeat(np.asarray(groups, np.int64), 2)


def shrink_correlations(cov, weight, groups, prior):
    """Covariances (K, d, d) whose correlation matrices are pulled toward their
    group's pooled one: C_k <- (n_k C_k + prior C_g) / (n_k + prior), with C_g the
    ``weight``-weighted mean correlation of the components in group g; each
    component keeps its own variances.  weight (K,) events per component,
    groups (K,) int, prior: pseudo-events of the pooled correlation (a prior
    centred on the group's correlation; the result is a mean of correlation
    matrices, so a valid covariance).  A group of one component is unchanged."""
    sd = np.sqrt(np.maximum(np.einsum("kii->ki", cov), 1e-300))
    C = cov / (sd[:, :, None] * sd[:, None, :])
    weight = np.maximum(np.asarray(weight, np.float64), 0.0)
    groups = np.asarray(groups)
    pooled = np.empty_like(C)
    for g in np.unique(groups):
        m = groups == g
        wg = weight[m]
        pooled[m] = np.einsum("k,kij->ij", wg, C[m]) / max(float(wg.sum()), 1e-300)
    C = (weight[:, None, None] * C + prior * pooled) / (weight[:, None, None] + prior)
    cov = C * (sd[:, :, None] * sd[:, None, :])
    return 0.5 * (cov + np.swapaxes(cov, 1, 2))
