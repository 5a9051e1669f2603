"""Populations as modes of the fitted density (core/populations.py).

References: scipy.stats.norm (the exact density of a two-normal mixture and its
saddle), scipy.stats.skewnorm (a unimodal skewed population), scipy.stats
fisher_exact / binomtest / false_discovery_control (the grown/shrunk statistics),
sklearn.metrics.adjusted_rand_score (agreement with the true labels).  The
"CD3+ CD4dim" notation is common practice.
"""

import json

import numpy as np
import pytest
from scipy import stats

from core.density import AdditiveTreeDensity
from core.errors import RecipeError
from core.populations import (DEFAULT_SETTINGS, PopulationDefinition, assign_populations,
                              channel_splits, find_populations, marker_level, population_changes,
                              profile_text)
from core.recipe import Recipe, load_recipe, save_recipe
from core.regions import RegionSet

ENGINE = {"n_trees": 40, "patience": 5, "random_state": 0}
adjusted_rand_score = pytest.importorskip("sklearn.metrics").adjusted_rand_score


def fit(X):
    return AdditiveTreeDensity(**ENGINE).fit(X)


def two_normals(sep, n=6000, seed=1):
    """Equal mixture of N((-sep, 0), I) and N((+sep, 0), I): labels and events."""
    rng = np.random.default_rng(seed)
    lab = (rng.random(n) < 0.5).astype(int)
    X = rng.standard_normal((n, 2))
    X[:, 0] += np.where(lab == 1, sep, -sep)
    return X, lab


def saddle_ratio(sep):
    """Exact f(saddle) / f(peak) of the mixture above along the x axis (scipy.stats.norm)."""
    x = np.linspace(-sep - 1, sep + 1, 20001)
    f = 0.5 * stats.norm.pdf(x, -sep) + 0.5 * stats.norm.pdf(x, sep)
    return f[np.argmin(np.abs(x))] / f.max()


def test_two_populations_with_a_deep_saddle_are_split():
    sep = 2.5
    assert saddle_ratio(sep) < 0.5 * DEFAULT_SETTINGS["merge_ratio"]   # ~0.088: a deep dip
    X, lab = two_normals(sep)
    P = find_populations(fit(X), X, ["a", "b"])
    assert len(P.table) == 2
    assert adjusted_rand_score(lab, P.labels) > 0.9
    for row in P.table:   # modes near (+-sep, 0)
        assert min(abs(row["mode"][0] - sep), abs(row["mode"][0] + sep)) < 0.5


def test_two_close_normals_without_a_dip_stay_one():
    sep = 0.75   # separation 1.5 sd < 2 sd: the mixture is unimodal (its saddle ratio is 1)
    assert saddle_ratio(sep) == pytest.approx(1.0)
    X, _ = two_normals(sep)
    assert len(find_populations(fit(X), X, ["a", "b"]).table) == 1


def test_a_unimodal_skewed_population_is_not_split():
    rng = np.random.default_rng(2)
    x = stats.skewnorm.rvs(8.0, size=6000, random_state=rng)
    X = np.column_stack([x, 0.6 * x + 0.5 * rng.standard_normal(x.size)])
    P = find_populations(fit(X), X, ["a", "b"])
    assert len(P.table) == 1
    assert np.mean(P.labels == P.table[0]["id"]) > 0.99


def test_a_small_population_far_from_the_rest_is_found_as_rare():
    rng = np.random.default_rng(3)
    n, n_rare = 20000, 40     # 0.2 %
    X = np.vstack([rng.normal([0, 0, 0], 0.5, (n // 2, 3)), rng.normal([3, 0, 1], 0.6, (n // 2 - n_rare, 3)),
                   rng.normal([1.5, 6, 6], 0.2, (n_rare, 3))])   # about 8 sd from the nearest population
    truth = np.r_[np.zeros(n - n_rare, bool), np.ones(n_rare, bool)]
    P = find_populations(fit(X), X, ["a", "b", "c"])
    rare = [r for r in P.table if r["rare"]]
    assert P.table[0]["rare"]           # rare populations are listed first
    assert len(rare) == 1
    found = P.labels == rare[0]["id"]
    recall = (found & truth).sum() / truth.sum()
    precision = (found & truth).sum() / found.sum()
    assert recall >= 0.9 and precision >= 0.9
    assert rare[0]["share"] == pytest.approx(found.mean())
    ci = stats.binomtest(int(found.sum()), n).proportion_ci(method="exact")   # Clopper-Pearson
    assert rare[0]["share_low"] == pytest.approx(ci.low) and rare[0]["share_high"] == pytest.approx(ci.high)
    assert rare[0]["caution"] is False


def runt_layout(seed=5):
    """1-D layout with an exact density (scipy.stats.norm): a large population
    N(0, 1) of 10,000 events, a tight bump N(3, 0.01) of 10 events in its
    shoulder and a 40-event cluster N(8, 0.2) far away.  Returns the arguments
    of the merge rule: mode peaks, the (i, j, saddle) joins (log density minima
    on a fine grid between the modes) and ``above(nodes, level)``, the events of
    those modes' basins whose log density exceeds ``level``."""
    from core.populations import _merge  # noqa: F401  (the rule under test)

    rng = np.random.default_rng(seed)
    comps = [(0.0, 1.0, 10_000), (3.0, 0.01, 10), (8.0, 0.2, 40)]
    n = sum(c for _, _, c in comps)
    x = np.concatenate([rng.normal(m, s, c) for m, s, c in comps])

    def logf(v):
        return np.log(sum(c / n * stats.norm.pdf(v, m, s) for m, s, c in comps))

    grid = np.linspace(-5.0, 10.0, 300_001)
    lg = logf(grid)
    modes = [grid[np.argmax(np.where(np.abs(grid - m) < 4 * s, lg, -np.inf))] for m, s, _ in comps]
    peaks = logf(np.array(modes))
    pairs = [(0, 1), (0, 2), (1, 2)]
    saddle = np.array([lg[(grid > modes[i]) & (grid < modes[j])].min() for i, j in pairs])
    iu, ju = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    cut01 = grid[(grid > modes[0]) & (grid < modes[1])][np.argmin(lg[(grid > modes[0]) & (grid < modes[1])])]
    basin = np.where(x < cut01, 0, np.where(x < 5.0, 1, 2))     # basins split at the saddles
    fx = logf(x)

    def above(nodes, level):
        return int(np.sum(np.isin(basin, nodes) & (fx > level)))

    return peaks, (iu, ju, saddle), above


def test_a_tiny_bump_merges_but_a_small_far_cluster_stays_apart():
    from core.populations import _merge

    peaks, edges, above = runt_layout()
    # both the bump and the far cluster lie behind a deep dip (saddle far below
    # 0.3 x their peak): the depth rule alone keeps all three apart
    assert np.all(edges[2][:2] < peaks[1:] + np.log(0.3))
    assert len(set(_merge(peaks, edges, DEFAULT_SETTINGS["merge_ratio"]).tolist())) == 3
    # runt size: the bump has 10 events above its saddle (< 20) and joins the large
    # population; the far cluster's 40 keep it a population of its own
    assert above([1], edges[2][0]) < DEFAULT_SETTINGS["min_events"] <= above([2], edges[2][1])
    g = _merge(peaks, edges, DEFAULT_SETTINGS["merge_ratio"], above, DEFAULT_SETTINGS["min_events"])
    assert g[0] == g[1] != g[2]


def test_marker_profile_of_a_known_layout():
    # four populations of 500 events; medians per channel (transformed units), sd 0.1
    rng = np.random.default_rng(4)
    medians = np.array([[0.0, 0.0, 0.10], [1.5, 0.0, 0.0], [3.0, 3.0, 0.05], [4.5, 3.0, 0.0]])
    labels = np.repeat(np.arange(4), 500)
    X = medians[labels] + 0.1 * rng.standard_normal((2000, 3))
    splits = channel_splits(X, labels, 4)
    assert splits[2]["threshold"] is None          # no population stands apart on the third channel
    names = ["CD45", "FL2-A", "CD8"]               # $PnS where present, else $PnN
    got = [profile_text([marker_level(float(np.median(X[labels == p, j])), splits[j]) for j in range(3)],
                        names) for p in range(4)]
    assert got == ["CD45\u2212 FL2-A\u2212", "CD45dim FL2-A\u2212", "CD45+ FL2-A+", "CD45bright FL2-A+"]


@pytest.fixture(scope="module")
def found():
    rng = np.random.default_rng(5)
    X = np.vstack([rng.normal([0, 0], 0.4, (3000, 2)), rng.normal([3, 1], 0.5, (2000, 2))])
    return X, find_populations(fit(X), X, ["CD3", "CD4"], transforms={"CD3": {"kind": "arcsinh",
                                                                              "cofactor": 5.0}})


def test_definition_round_trips_through_a_recipe_and_assigns_another_file_identically(found, tmp_path):
    X, P = found
    assert np.array_equal(assign_populations(P.definition, X), P.labels)   # same events, same labels
    r = Recipe(channels=["CD3", "CD4"], populations={"rare_share": 0.02, "definition": P.definition.to_dict()})
    path = save_recipe(r, tmp_path / "r.json")
    json.loads(open(path, encoding="utf-8").read())                            # plain JSON
    back = load_recipe(path)
    assert back.populations["rare_share"] == 0.02
    other = np.random.default_rng(6).normal([1.5, 0.5], 1.5, (4000, 2))     # another file
    d2 = PopulationDefinition.from_dict(back.populations["definition"])
    assert np.array_equal(assign_populations(d2, other), assign_populations(P.definition, other))
    # original units: the arcsinh inverse of the transformed median (numpy.sinh)
    row = P.table[0]
    assert row["median_original"]["CD3"] == pytest.approx(5.0 * np.sinh(row["median"]["CD3"]))
    assert row["median_original"]["CD4"] == row["median"]["CD4"]


def test_a_definition_on_other_channels_or_from_the_future_is_refused(found):
    _, P = found
    with pytest.raises(RecipeError, match="channels"):
        Recipe.from_dict({"schema_version": 1, "channels": ["X", "Y"],
                          "populations": {"definition": P.definition.to_dict()}})
    newer = dict(P.definition.to_dict(), version=99)
    with pytest.raises(RecipeError, match="version 99"):
        PopulationDefinition.from_dict(newer)
    with pytest.raises(RecipeError, match="rare_share"):
        Recipe.from_dict({"schema_version": 1, "channels": ["X"], "populations": {"rare_share": 2}})


def test_population_region_selects_the_assigned_events(found):
    X, P = found
    pid = P.table[-1]["id"]
    regs = RegionSet.from_dict([{"name": "kept", "kind": "population", "population": pid,
                                 "definition": P.definition.to_dict(),
                                 "transforms": {"CD3": None, "CD4": None}}])
    again = RegionSet.from_dict(json.loads(json.dumps(regs.to_dict())))
    masks = again.evaluate({"CD3": X[:, 0], "CD4": X[:, 1]})
    assert np.array_equal(masks["kept"], P.labels == pid)


def test_grown_and_shrunk_statistics_follow_scipy():
    rng = np.random.default_rng(7)
    control = rng.choice([-1, 0, 1, 2], size=5000, p=[0.01, 0.6, 0.38, 0.01])
    test = rng.choice([-1, 0, 1, 2], size=4000, p=[0.01, 0.6, 0.29, 0.10])
    rows = population_changes(control, test, 3)
    ps = []
    for r in rows:
        a, b = int((control == r["id"]).sum()), int((test == r["id"]).sum())
        assert r["control_count"] == a and r["test_count"] == b
        assert r["fold"] == pytest.approx((b / 4000) / (a / 5000))
        p = stats.fisher_exact([[b, 4000 - b], [a, 5000 - a]])[1]
        assert r["p"] == pytest.approx(p)
        ci = stats.binomtest(b, a + b).proportion_ci(method="exact")
        to_fold = lambda t: t * 5000 / ((1 - t) * 4000)   # noqa: E731  theta -> fold
        assert r["fold_low"] == pytest.approx(to_fold(ci.low)) and r["fold_high"] == pytest.approx(to_fold(ci.high))
        ps.append(p)
    # Benjamini-Hochberg q-values: scipy.stats.false_discovery_control
    assert [r["q"] for r in rows] == pytest.approx(stats.false_discovery_control(ps))
    assert rows[2]["change"] == "grown" and rows[2]["fold_low"] > 5
    assert rows[0]["change"] == ""
    # population 1 shrank to 0.76 of its share, significantly (q < 0.05), but less than the
    # default change fold (1 / 1.5): unlabelled; labelled "shrunk" with no fold threshold
    assert rows[1]["q"] < 0.05 and 1 / 1.5 < rows[1]["fold"] < 1 and rows[1]["change"] == ""
    assert population_changes(control, test, 3, min_fold=1.0)[1]["change"] == "shrunk"
    # reading order: the labelled change first, the others by q
    from core.populations import reading_order

    assert [r["id"] for r in reading_order(rows)] == [2, 1, 0]
    # the threshold is a recipe setting, checked where recipes are read
    from core.errors import RecipeError
    from core.populations import check_settings

    assert check_settings({"change_fold": 2.0})["change_fold"] == 2.0
    with pytest.raises(RecipeError, match="change_fold"):
        check_settings({"change_fold": 0.5})


def test_a_recipe_with_kept_populations_counts_another_file_with_them(tmp_path):
    """analyse() on file 1, populations kept in the recipe (saved, loaded), analyse() on
    file 2 counts file 2 with them: same labels as assign_populations on its events."""
    from core.analysis import analyse
    from core.fcs import read_fcs
    from tests.test_analysis import make_file, recipe

    make_file(tmp_path / "one.fcs", n=3000, seed=1, spike=40)
    make_file(tmp_path / "two.fcs", n=3000, seed=2, spike=60)
    rec = recipe(regions=[], engine={"n_trees": 30, "random_state": 0})
    first = analyse(read_fcs(str(tmp_path / "one.fcs")), rec)
    rec.populations = {"definition": first.populations.definition.to_dict()}
    back = load_recipe(save_recipe(rec, tmp_path / "kept.json"))
    second = analyse(read_fcs(str(tmp_path / "two.fcs")), back)
    assert second.populations.info["matched"]
    expected = assign_populations(first.populations.definition, second.prepared.matrix)
    assert np.array_equal(second.populations.labels, expected)
    assert np.array_equal(second.population_labels[second.kept], expected)
    assert (second.population_labels[~second.kept] == -1).all()       # removed events belong to none
    assert [r["id"] for r in second.populations.table] != [] and \
        sorted(r["id"] for r in second.populations.table) == list(range(first.populations.definition.n_populations))


def test_a_model_without_a_mixture_gets_one_fitted_for_the_populations():
    X, lab = two_normals(2.5, n=4000)
    model = AdditiveTreeDensity(base="logistic", n_trees=40, random_state=0).fit(X)
    assert getattr(model, "_gmm", None) is None
    P = find_populations(model, X, ["a", "b"])
    assert P.info["mixture"] == "fitted here"
    assert len(P.table) == 2 and adjusted_rand_score(lab, P.labels) > 0.9
    again = find_populations(model, X, ["a", "b"])           # deterministic for the seed
    assert np.array_equal(again.labels, P.labels)
