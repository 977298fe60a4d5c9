import numpy as np
import pytest
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.inspection import permutation_importance

from sitecheck.leakage import correlation_clusters, grouped_permutation_importance, macro_auc_scorer


def test_singleton_groups_reproduce_sklearn_permutation_importance():
    # Reference: sklearn.inspection.permutation_importance on the same held-out rows.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(600, 4))
    y = (X[:, 0] + 0.5 * X[:, 1] + rng.normal(size=600) > 0).astype(int) + (X[:, 2] > 1).astype(int)
    model = HistGradientBoostingClassifier(max_iter=30, random_state=0).fit(X[:400], y[:400])
    Xte, yte = X[400:], y[400:]
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


def test_correlation_clusters():
    rng = np.random.default_rng(3)
    a = rng.normal(size=300)
    X = np.column_stack([a, a + rng.normal(0, 0.1, 300), rng.normal(size=300), np.exp(a) ** 2, rng.integers(0, 3, 300)])
    cl = correlation_clusters(X, np.array([False, False, False, False, True]), threshold=0.7)
    assert cl[0] == cl[1] == cl[3]            # monotone transforms: Spearman |rho| ~ 1
    assert len({cl[0], cl[2], cl[4]}) == 3    # independent and categorical columns stay single
