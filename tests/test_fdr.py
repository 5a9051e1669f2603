"""Benjamini-Hochberg q-values (core.fdr).

References: scipy.stats.false_discovery_control (scipy >= 1.11, method "bh"),
and the step-up rule as stated in Benjamini & Hochberg (1995), applied by hand
to a small example below.
"""

import numpy as np
import pytest
from scipy import stats

from core.errors import EventDataError
from core.fdr import bh_qvalues, bh_reject


def test_hand_computed_example():
    # m = 5: sorted p = .001 .008 .039 .041 .6
    # m*p/i = .005 .02 .065 .05125 .6 ; running min from the right:
    # .005 .02 .05125 .05125 .6   (computed by hand, step-up rule)
    p = [0.039, 0.001, 0.6, 0.008, 0.041]
    q = bh_qvalues(p)
    np.testing.assert_allclose(q, [0.05125, 0.005, 0.6, 0.02, 0.05125])
    # at 5 % only the two smallest are rejected; at 6 % four are
    assert bh_reject(p, 0.05).tolist() == [False, True, False, True, False]
    assert bh_reject(p, 0.06).tolist() == [True, True, False, True, True]


def test_matches_scipy():
    # reference: scipy.stats.false_discovery_control(method="bh")
    rng = np.random.default_rng(3)
    p = np.concatenate([rng.uniform(size=400), rng.uniform(0, 1e-3, size=40)])
    np.testing.assert_allclose(bh_qvalues(p), stats.false_discovery_control(p, method="bh"), rtol=1e-12)


def test_nan_passes_through_and_does_not_count():
    q = bh_qvalues([0.01, np.nan, 0.02])
    assert np.isnan(q[1])
    np.testing.assert_allclose(q[[0, 2]], [0.02, 0.02])


def test_bad_values_refused():
    with pytest.raises(EventDataError):
        bh_qvalues([0.5, 1.5])
    with pytest.raises(EventDataError):
        bh_reject([0.5], 0)
