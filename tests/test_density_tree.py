"""Tests of the building blocks of the additive tree density: one tree measure,
its tree-CDF, the composed one-channel maps and the normal CDF / inverse used
by the rotations.  References: scipy.stats.kstest / chisquare, scipy.special.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from core.density import kernels
from core.density.marginals import PiecewiseLinearMap, compose_1d
from core.density.tree import Forest, fit_tree


def _tree_leaves(f: Forest, d: int):
    """Leaves of a one-tree forest by walking its definition: (box lo, box hi, probability)."""
    leaves = []

    def walk(node, lo, hi, p):
        j, c, th = f.dim[node], f.cut[node], f.theta[node]
        for side, child, q in ((0, f.left[node], th), (1, f.right[node], 1.0 - th)):
            clo, chi = lo.copy(), hi.copy()
            if side == 0:
                chi[j] = c
            else:
                clo[j] = c
            if child >= 0:
                walk(child, clo, chi, p * q)
            else:
                leaves.append((clo, chi, p * q))

    walk(int(f.roots[0]), np.zeros(d), np.ones(d), 1.0)
    return leaves


@pytest.fixture(scope="module")
def tree3():
    rng = np.random.default_rng(0)
    R = np.ascontiguousarray(np.column_stack([rng.beta(2, 5, 20000), rng.beta(5, 2, 20000),
                                              rng.uniform(size=20000)]))
    return fit_tree(R, 0.5, 4, 16, 30)


def test_tree_probabilities_sum_to_one_and_density_matches_definition(tree3):
    f = tree3
    leaves = _tree_leaves(f, 3)
    assert len(leaves) >= 4
    assert sum(p for _, _, p in leaves) == pytest.approx(1.0, abs=1e-12)
    # log g at a point = log(P(leaf) / vol(leaf)): the product of the local slopes
    rng = np.random.default_rng(1)
    for lo, hi, p in leaves[:8]:
        pts = lo + (hi - lo) * rng.uniform(0.01, 0.99, size=(5, 3))
        ld = np.zeros(5)
        f.forward(np.ascontiguousarray(pts), ld)
        np.testing.assert_allclose(ld, np.log(p / np.prod(hi - lo)), rtol=0, atol=1e-12)


def test_tree_cdf_pushes_tree_measure_to_uniform(tree3):
    f = tree3
    leaves = _tree_leaves(f, 3)
    rng = np.random.default_rng(2)
    probs = np.array([p for _, _, p in leaves])
    k = rng.choice(len(leaves), size=20000, p=probs / probs.sum())
    lo = np.array([l for l, _, _ in leaves])[k]
    hi = np.array([h for _, h, _ in leaves])[k]
    pts = np.ascontiguousarray(lo + (hi - lo) * rng.uniform(size=(20000, 3)))
    U = pts.copy()
    f.forward(U, np.zeros(20000))
    for j in range(3):
        # reference: scipy.stats.kstest against uniform(0, 1)
        assert stats.kstest(U[:, j], "uniform").pvalue > 1e-3
    # and the inverse undoes it
    f.inverse(U)
    np.testing.assert_allclose(U, pts, rtol=0, atol=1e-12)


def test_composed_one_channel_map_equals_sequential_trees():
    rng = np.random.default_rng(3)
    col = np.ascontiguousarray(rng.beta(2, 6, size=(5000, 1)))
    f = Forest()
    work = col.copy()
    for _ in range(6):
        t = fit_tree(work, 0.3, 5, 32, 20)
        t.forward(work, np.zeros(len(work)))
        f.append(t)
    xs, ys, sl = compose_1d(f)
    seq = col.copy()
    ld_seq = np.zeros(len(col))
    f.forward(seq, ld_seq)
    one = col.copy()
    ld_one = np.zeros(len(col))
    pwl = PiecewiseLinearMap.from_channels([(xs, ys, sl)])
    pwl.forward(one, ld_one)
    np.testing.assert_allclose(one, seq, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ld_one, ld_seq, rtol=0, atol=1e-9)
    pwl.inverse(one)
    np.testing.assert_allclose(one, col, rtol=0, atol=1e-12)


def test_normal_cdf_and_inverse_match_scipy():
    p = np.concatenate([np.logspace(-16, -1, 300), np.linspace(0.01, 0.99, 999), 1 - np.logspace(-15, -1, 300)])
    z = np.array([kernels.ndtri(x) for x in p])
    # reference: scipy.special.ndtri
    np.testing.assert_allclose(z, special.ndtri(p), rtol=1e-13, atol=1e-14)
    zz = np.linspace(-8, 8, 801)
    # reference: scipy.special.ndtr
    np.testing.assert_allclose([kernels.ndtr(x) for x in zz], special.ndtr(zz), rtol=1e-14, atol=1e-16)


def test_rotation_round_trip_and_keeps_uniform():
    rng = np.random.default_rng(4)
    Q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    U = np.ascontiguousarray(rng.uniform(size=(20000, 3)))
    V = U.copy()
    kernels.rotate(V, Q)
    for j in range(3):
        # an orthogonal map of standard normal coordinates keeps them standard
        # normal, so uniform stays uniform (reference: scipy.stats.kstest)
        assert stats.kstest(V[:, j], "uniform").pvalue > 1e-3
    kernels.rotate(V, np.ascontiguousarray(Q.T))
    np.testing.assert_allclose(V, U, rtol=0, atol=1e-10)
