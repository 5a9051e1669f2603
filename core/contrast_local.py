"""The comparison's second, local score: how many of an event's nearest neighbours come from the test tube.

Why a second score.  The density score of :mod:`core.contrast` (log f_test -
log f_control') rests on two fitted densities; far from the data their tails
differ by chance, so one control event can score higher than a small new
population whose own test density is poorly fitted (generator draw 202 of the
contrast benchmark: one heavy-tailed control event at 14 nats, the 30 new cells
below it, nothing found).  Counting neighbours needs no tail: a new population
of m cells is, around each of its cells, a neighbourhood of test events only.

Local score of an event x, scored (test AND control events alike) by part k of
the cross-fitting only with events outside part k, so exchangeability is kept:

* pool the test and control events outside part k, scale each channel by the
  pool's robust spread (1.4826 x median absolute deviation; 1 where 0), and find
  x's ``k`` nearest pooled events (``scipy.spatial.cKDTree``, Euclidean);
* under "x is not new" a neighbour is a test event with probability
  pi0 = n_t e^phi / (n_t e^phi + n_c), n_t / n_c the pool's test / control
  events and phi(x) the control's population-share correction at x (the log
  factor of :func:`core.contrast.reweighted_control`: a population that grew 6x
  is expected to give 6x more test neighbours; 0 when the model has no mixture);
* with a_j the test events among the j nearest, the score is the scan statistic

      s_local(x) = max over j = MIN_SCAN..k of  -ln P(Binomial(j, pi0) >= a_j)   (nats)

  (``scipy.stats.binom.logsf``): the most surprising run of test neighbours, so
  a population of fewer than k training cells still scores by the j it fills.

``k`` comes from the smallest population the user wants found (recipe setting
``comparison.smallest_population``, default 30 events): a population of m
events leaves about m (K - 1) / K of them outside an event's part, so
k = floor(m (K - 1) / K) (20 for 30 events in 3 parts), at least MIN_SCAN.
The scan needs its all-test neighbourhoods to be rarer than one in n_control
under the null: a run of 17 test neighbours at pi0 = 1/2 has probability
7.6e-6, about 0.5 of 60,000 control events.

The local fold (for the minimum fold) is the neighbour count ratio over its
expectation at k: ln((a_k + 0.5) / (k - a_k + 0.5)) - ln(pi0 / (1 - pi0)).

Large files.  An exact search for the k nearest of 12-30 robust-scaled
channels costs 0.2-0.9 ms per event on 2 cores at 200,000-1,000,000 events
(kd-trees prune poorly in that many dimensions), and every event, test and
control, is searched once: minutes for a million events.  When a part's pool
holds more than EXACT_POOL training events (100,000: two tubes of more than
about 75,000 events each in 3 parts; the demo tubes and the contrast benchmark's
60,000-event tubes stay below it, searched exactly), :func:`local_scores`
searches in two stages, scoring the part's test and control events in one call:
first every event approximately (``cKDTree.query(eps=APPROX_EPS)``, each
returned neighbour within 1 + eps times the true k-th distance: 3-6 times faster
per event at 1,000,000 events), then the EXACT_SHARE (5 %, at least EXACT_MIN)
of the events with the highest approximate score exactly, within their
approximate k-th distance (an upper bound of the exact one).  The events whose
local score can make their p-value small -- the top of the test events and the
control events they are ranked against -- so get the exact score; the others
keep an approximate one (measured: identical for every event at or above the
control's 99 % point; see tests/benchmarks/README.md, "Contrast benchmark",
large files).  Validity is kept: the score is one function for every event of
the part, test or control (the choice of the exact 5 % is a symmetric function
of the part's test and control events), fitted without them.

Combining the two scores: :func:`min_rank_pvalues` (one conformal p-value of
the smaller of an event's two ranks).  Bonferroni (p = 2 min(p1, p2)) was
measured and rejected: its smallest p is 2 / (n_control + 1), and
Benjamini-Hochberg accepts R events at that p only if R >= 2 n_test / (rate x
n_control) = 40 at 60,000 / 60,000 and 5 %: a 30-event population can never be
found.

Shapes: events x channels (n, d) float64; scores (n,) float64.
"""

from __future__ import annotations

import math

import numpy as np
from numba import get_num_threads, njit
from scipy import stats
from scipy.spatial import cKDTree

from .recipe.records import Comparison

#: The smallest population (events) the local score is sized for: core.recipe.Comparison's default.
DEFAULT_SMALLEST = Comparison().smallest_population
#: The scan starts at this many neighbours (a shorter all-test run is not rare: 2^-5 = 3 %).
MIN_SCAN = 5
#: Events scored per neighbour query (bounds memory to ~ CHUNK x k indices).
CHUNK = 50_000
#: Large files: neighbour searches beyond this many pooled training events start approximate
#: (see "Large files" in the module docstring); at or below it every search is exact.
EXACT_POOL = 100_000
#: Large files: the approximate search's eps (each neighbour within (1 + eps) x the k-th distance).
APPROX_EPS = 0.5
#: Large files: share of a part's events (highest approximate local score) searched again exactly.
EXACT_SHARE = 0.05
#: Large files: at least this many of a part's events are searched again exactly.
EXACT_MIN = 5000
#: Large files: events per exact search (sorted by approximate k-th distance, one bound each).
BOUND_BATCH = 1024
#: Random tie-break added to local scores (nats; uniform on [0, TIE_BREAK), seeded, test and control alike).
TIE_BREAK = 1e-6
#: Test events whose smaller rank is at most this get the exact tie-break (see :func:`min_rank_pvalues`).
EXACT_TOP = 2000


def neighbours_for(smallest: float, folds: int) -> int:
    """k of the local score: floor(smallest x (folds - 1) / folds), at least MIN_SCAN."""
    return max(MIN_SCAN, int(math.floor(float(smallest) * (folds - 1) / folds)))


def robust_scale(X: np.ndarray) -> np.ndarray:
    """Per channel 1.4826 x median absolute deviation of X (n, d); 1 where it is 0: (d,)."""
    med = np.median(X, axis=0)
    mad = 1.4826 * np.median(np.abs(X - med), axis=0)
    return np.where(mad > 0, mad, 1.0)


def _scan(idx: np.ndarray, nt: int, pi0: np.ndarray, odds0: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """(scan score, local log fold) of events whose k nearest pooled indices are ``idx`` (m, k)
    (index < nt: a test event), under the null shares ``pi0`` (m,) / odds ``odds0`` (m,)."""
    j = np.arange(1, k + 1)
    first = min(MIN_SCAN, k) - 1
    hits = np.cumsum(idx < nt, axis=1)
    surprise = -stats.binom.logsf(hits[:, first:] - 1, j[None, first:], pi0[:, None])
    ak = hits[:, -1]
    return np.max(surprise, axis=1), np.log((ak + 0.5) / (k - ak + 0.5)) - np.log(odds0)


def local_scores(train_test: np.ndarray, train_control: np.ndarray, X: np.ndarray, log_factor: np.ndarray,
                 k: int, eps: float | None = 0.0, exact_share: float = EXACT_SHARE) -> tuple[np.ndarray, np.ndarray]:
    """(s_local, local log fold) of events X (n, d) against the pooled training events of one part.

    ``train_test`` (n_t, d), ``train_control`` (n_c, d): the events outside the
    part; ``log_factor`` (n,): the control's population-share correction phi at X
    (zeros: none); ``k``: neighbours (see the module docstring).  Both outputs (n,)
    in nats.

    ``eps`` > 0 (see "Large files" in the module docstring): every event is first
    scored from an approximate neighbour search (``cKDTree.query(eps=eps)``: each
    returned neighbour within (1 + eps) times the true k-th distance); the events
    whose approximate score is among the highest ``exact_share`` of X (at least
    EXACT_MIN events; ties included) are scored again from their exact k nearest
    (searched within the approximate k-th distance, which bounds the true one).
    The result is a function of each event and the training events plus the
    order statistics of X's approximate scores, the same for every event of X: pass
    the part's test AND control events together as X so they stay exchangeable.
    ``eps`` = 0: exact for every event; None: APPROX_EPS when the pool holds more than
    EXACT_POOL events, else 0.
    """
    nt, nc = train_test.shape[0], train_control.shape[0]
    if eps is None:
        eps = APPROX_EPS if nt + nc > EXACT_POOL else 0.0
    k = int(min(k, nt + nc))
    pool = np.vstack([train_test, train_control])
    scale = robust_scale(pool)
    tree = cKDTree(pool / scale)
    del pool
    odds0 = (nt / max(nc, 1)) * np.exp(np.asarray(log_factor, dtype=np.float64))
    pi0 = np.clip(odds0 / (1.0 + odds0), 1e-12, 1.0 - 1e-12)
    n = X.shape[0]
    score = np.empty(n)
    fold = np.empty(n)
    far = np.empty(n)
    # threads: numba's budget (the batch sets it per worker), so both stay within the cores
    workers = get_num_threads()
    for a in range(0, n, CHUNK):
        b = min(a + CHUNK, n)
        dist, idx = tree.query(X[a:b] / scale, k=k, workers=workers, eps=float(eps))
        idx = idx.reshape(b - a, k)
        far[a:b] = dist.reshape(b - a, k)[:, -1]
        score[a:b], fold[a:b] = _scan(idx, nt, pi0[a:b], odds0[a:b], k)
    if eps > 0:
        m = min(n, max(EXACT_MIN, int(math.ceil(exact_share * n))))
        cut = np.partition(score, n - m)[n - m] if 0 < m < n else (-np.inf if m else np.inf)
        redo = np.flatnonzero(score >= cut)
        redo = redo[np.argsort(far[redo], kind="stable")]
        for a in range(0, redo.size, BOUND_BATCH):
            r = redo[a:a + BOUND_BATCH]
            # an approximate k-th distance bounds the exact one: search within the batch's largest
            # (events sorted by it), a little beyond (relative 1e-9) to keep neighbours at that distance
            bound = float(far[r[-1]]) * (1.0 + 1e-9)
            _, idx = tree.query(X[r] / scale, k=k, workers=workers, distance_upper_bound=bound)
            score[r], fold[r] = _scan(idx.reshape(r.size, k), nt, pi0[r], odds0[r], k)
    return score, fold


@njit(cache=True)
def _dominance(x, y, qx, qy, order_points, order_queries, size):
    out = np.zeros(qx.size, dtype=np.int64)
    tree = np.zeros(size + 1, dtype=np.int64)
    j = 0
    for t in order_queries:
        while j < order_points.size and x[order_points[j]] <= qx[t]:
            i = y[order_points[j]]
            while i <= size:
                tree[i] += 1
                i += i & (-i)
            j += 1
        i = min(qy[t], size)
        c = 0
        while i > 0:
            c += tree[i]
            i -= i & (-i)
        out[t] = c
    return out


def dominance_counts(x: np.ndarray, y: np.ndarray, qx: np.ndarray, qy: np.ndarray) -> np.ndarray:
    """For each query t: #{i : x_i <= qx_t and y_i <= qy_t}; x, y (n,) integers >= 1, qx, qy (m,)
    integers (a binary indexed tree swept along x): (m,) int64."""
    x, y = np.asarray(x, dtype=np.int64), np.asarray(y, dtype=np.int64)
    qx, qy = np.asarray(qx, dtype=np.int64), np.asarray(qy, dtype=np.int64)
    size = int(max(y.max(initial=0), 1))
    return _dominance(x, y, qx, qy, np.argsort(x, kind="stable"), np.argsort(qx, kind="stable"), size)


def _ranks(ref_sorted: np.ndarray, s: np.ndarray) -> np.ndarray:
    """#{ref >= s} for each s (ref sorted ascending)."""
    return ref_sorted.size - np.searchsorted(ref_sorted, s, side="left")


def _at_most(k1, v1, k2, v2, t1, t2, R1, R2) -> np.ndarray:
    """Which reference events, of ranks ``k1``, ``k2`` among the reference and scores ``v1``,
    ``v2`` (m,), have a statistic at most a test event's among the n + 1 (the test event
    scoring ``t1``, ``t2`` with ranks ``R1``, ``R2`` there; see :func:`min_rank_pvalues`):
    bool (m,).  A reference event's rank gains 1 where the test event scores at least as high."""
    q1 = k1 + (v1 <= t1)
    q2 = k2 + (v2 <= t2)
    lo, hi = np.minimum(q1, q2), np.maximum(q1, q2)
    R = min(R1, R2)
    return (lo < R) | ((lo == R) & (hi <= max(R1, R2)))


def min_rank_pvalues(s1: np.ndarray, ref1: np.ndarray, s2: np.ndarray, ref2: np.ndarray,
                     exact_top: int = EXACT_TOP) -> np.ndarray:
    """Conformal p-value of each test event under two scores at once (NaN stays NaN).

    ``s1``, ``s2`` (n_test,): the test events' two scores; ``ref1``, ``ref2``
    (n,): the same two scores of the n reference (control) events, finite.  For
    one test event, rank it and the n reference events together, by each score
    (rank = how many of the n + 1 score at least as high, so the highest is 1);
    each of the n + 1 gets the statistic (smaller rank, larger rank), compared
    lexicographically (smaller is more extreme), and

        p = #{of the n + 1 with a statistic at most the test event's} / (n + 1).

    It is a function of the n + 1 ranks that treats every event alike, so when
    the test event is exchangeable with the reference events p is a valid
    conformal p-value (P(p <= u) <= u).  An event above every reference event
    in either score gets p = 1 / (n + 1) unless a reference event is above all
    others in one score and ranks higher than the test event in the other.
    Test events whose smaller rank exceeds ``exact_top`` are compared on the
    smaller rank alone (ties counted against them: p can only be larger, so
    still valid); below it the tie-break is exact.
    """
    r1v, r2v = (np.asarray(r, dtype=np.float64) for r in (ref1, ref2))
    ok_ref = np.isfinite(r1v) & np.isfinite(r2v)
    r1v, r2v = r1v[ok_ref], r2v[ok_ref]
    n = r1v.size
    a1, a2 = np.sort(r1v), np.sort(r2v)
    c1, c2 = _ranks(a1, r1v), _ranks(a2, r2v)          # reference ranks among the reference (itself counted)
    t1, t2 = (np.asarray(s, dtype=np.float64) for s in (s1, s2))
    p = np.full(t1.shape, np.nan)
    ok = ~(np.isnan(t1) | np.isnan(t2))
    T1, T2 = t1[ok], t2[ok]
    R1, R2 = 1 + _ranks(a1, T1), 1 + _ranks(a2, T2)  # the test event's ranks among the n + 1
    R = np.minimum(R1, R2)
    # Among the n + 1, reference event i's rank in score m is c_m,i + 1 when the test event scores
    # at least as high (v_m,i <= s_m), else c_m,i.  So "rank_m,i <= R" is c_m,i <= cut_m with
    # cut_m = R_m - 1 when R_m == R (those scoring >= s_m), else min(R, #{reference > s_m}).
    G1, G2 = a1.size - np.searchsorted(a1, T1, side="right"), a2.size - np.searchsorted(a2, T2, side="right")
    cut1 = np.where(R1 == R, R1 - 1, np.minimum(R, G1))
    cut2 = np.where(R2 == R, R2 - 1, np.minimum(R, G2))
    size = n + 2
    le1 = np.cumsum(np.bincount(c1, minlength=size))
    le2 = np.cumsum(np.bincount(c2, minlength=size))
    count = le1[cut1] + le2[cut2] - dominance_counts(c1, c2, cut1, cut2)   # smaller rank <= R
    # exact tie-break (larger rank) where it matters: the smallest p-values
    top = np.flatnonzero(R <= exact_top)
    if top.size:
        cand = np.flatnonzero(np.minimum(c1, c2) <= exact_top)
        order = np.argsort(np.minimum(c1, c2)[cand], kind="stable")
        cand = cand[order]
        cmin = np.minimum(c1, c2)[cand]
        v1, v2, k1, k2 = r1v[cand], r2v[cand], c1[cand], c2[cand]
        for t in top:
            m = np.searchsorted(cmin, R[t], side="right")  # only these can reach a smaller rank <= R
            count[t] = np.sum(_at_most(k1[:m], v1[:m], k2[:m], v2[:m], T1[t], T2[t], R1[t], R2[t]))
    p[ok] = (1.0 + count) / (n + 1.0)
    return p


def as_extreme(s1: float, ref1: np.ndarray, s2: float, ref2: np.ndarray) -> np.ndarray:
    """Which reference events count against one test event in :func:`min_rank_pvalues` (its
    statistic at most the test event's, among the n + 1): bool (n,), so that the test event's
    p = (1 + sum) / (n + 1) (exact tie-break; finite reference events only, as there)."""
    r1v, r2v = (np.asarray(r, dtype=np.float64) for r in (ref1, ref2))
    ok = np.isfinite(r1v) & np.isfinite(r2v)
    a1, a2 = np.sort(r1v[ok]), np.sort(r2v[ok])
    R1, R2 = 1 + _ranks(a1, np.array([s1]))[0], 1 + _ranks(a2, np.array([s2]))[0]
    out = np.zeros(r1v.shape, dtype=bool)
    out[ok] = _at_most(_ranks(a1, r1v[ok]), r1v[ok], _ranks(a2, r2v[ok]), r2v[ok], s1, s2, R1, R2)
    return out
