"""Model factories shared by the analyses (probe, harmonisation, outcome).

One place decides how the default gradient-boosting model and the linear
second opinion are configured, so that every analysis uses the same family.
"""
from __future__ import annotations

import numpy as np
from sklearn.compose import ColumnTransformer
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, RobustScaler, StandardScaler


#: Above this many classes the probe grows smaller trees on fewer bins (see ``probe._estimator``).
MANY_CLASSES = 8


def booster_max_bins(n_classes: int) -> int:
    """Histogram bins of the boosting probe for ``n_classes`` classes.

    HistGradientBoosting accepts a categorical feature with at most this many levels,
    so :func:`sitecheck.prepare.prepare` keeps at most this many per column (the most
    frequent, the rest pooled into one level) and :func:`sitecheck.analyses.probe.cross_fit`
    pools further for a model with fewer bins (a group probe with many levels).
    """
    return 63 if int(n_classes) > MANY_CLASSES else 255


def make_booster(categorical: np.ndarray, *, random_state: int, max_iter: int = 200,
                 learning_rate: float = 0.1, early_stopping: bool = True) -> HistGradientBoostingClassifier:
    """HistGradientBoostingClassifier with native missing values and categoricals.

    Early stopping holds out 10% of the training rows; ``max_leaf_nodes`` and
    ``min_samples_leaf`` are moderate so small sites do not overfit.
    """
    cat = np.asarray(categorical, dtype=bool)
    return HistGradientBoostingClassifier(
        learning_rate=learning_rate,
        max_iter=max_iter,
        max_leaf_nodes=15,
        min_samples_leaf=20,
        l2_regularization=1.0,
        categorical_features=cat if cat.any() else None,
        early_stopping=early_stopping,
        validation_fraction=0.1,
        n_iter_no_change=10,
        random_state=random_state,
    )


def early_stopping_split_ok(y, validation_fraction) -> bool:
    """Whether HistGradientBoosting's stratified early-stopping hold-out can be drawn from ``y``.

    scikit-learn's stratified split needs at least 2 rows of every class and at least as many
    rows as classes on each side (``ceil(fraction * n)`` held out; ``train_test_split``'s rules).
    """
    import math

    y = np.asarray(y)
    n = len(y)
    _, counts = np.unique(y, return_counts=True)
    k = len(counts)
    if n == 0 or k == 0:
        return False
    if isinstance(validation_fraction, (int, np.integer)) and not isinstance(validation_fraction, bool):
        n_test = int(validation_fraction)
    else:
        n_test = int(math.ceil(float(validation_fraction) * n))
    return bool(counts.min() >= 2 and n_test >= k and n - n_test >= k)


def fit_classifier(est, X, y):
    """Fit ``est`` on ``(X, y)``; return it.

    For a :class:`~sklearn.ensemble.HistGradientBoostingClassifier`, two shapes of small or sparse
    data that scikit-learn refuses are fitted instead (every other fit is unchanged):

    - a column with no recorded value in ``X`` (scikit-learn 1.9 cannot bin it): it is given one
      constant value, so no tree can split on it, as on a column without information;
    - early stopping whose stratified hold-out cannot be drawn (a class with one training row, as
      at a site of two or three rows in a fold, or fewer held-out rows than classes), or whose
      hold-out takes every recorded value of a sparse column: fitted without early stopping, up to
      its iteration cap.
    """
    if not isinstance(est, HistGradientBoostingClassifier):
        return est.fit(X, y)
    X = np.asarray(X, dtype=float)
    empty = np.isnan(X).all(axis=0) if len(X) else np.zeros(X.shape[1], dtype=bool)
    if empty.any():
        X = X.copy()
        X[:, empty] = 0.0
    stops = est.validation_fraction is not None and (
        est.early_stopping is True or (est.early_stopping == "auto" and len(y) > 10_000))
    if stops and not early_stopping_split_ok(y, est.validation_fraction):
        est.set_params(early_stopping=False)
        return est.fit(X, y)
    try:
        return est.fit(X, y)
    except ValueError:
        if not stops:
            raise
        # the hold-out may have taken every recorded value of a sparse column
        vf = est.validation_fraction
        n_val = int(vf) if isinstance(vf, (int, np.integer)) else int(np.ceil(float(vf) * len(y)))
        recorded = (~np.isnan(X)).sum(axis=0)
        if not np.any((recorded > 0) & (recorded <= n_val)):
            raise
        est.set_params(early_stopping=False)
        return est.fit(X, y)


def linear_preprocessor(categorical: np.ndarray, *, robust: bool = False) -> ColumnTransformer:
    """Median imputation with missing indicators and scaling for numeric columns;
    one-hot encoding (missing as its own level) for categorical code columns."""
    cat = np.flatnonzero(np.asarray(categorical, dtype=bool))
    num = np.flatnonzero(~np.asarray(categorical, dtype=bool))
    scaler = RobustScaler() if robust else StandardScaler()
    parts = []
    if len(num):
        parts.append(("num", make_pipeline(SimpleImputer(strategy="median", add_indicator=True,
                                                         keep_empty_features=True), scaler), num))
    if len(cat):
        parts.append(("cat", make_pipeline(SimpleImputer(strategy="constant", fill_value=-1.0),
                                           OneHotEncoder(handle_unknown="ignore", min_frequency=5,
                                                         sparse_output=False)), cat))
    return ColumnTransformer(parts, remainder="drop", sparse_threshold=0.0)


def make_linear(categorical: np.ndarray, *, random_state: int, C: float = 1.0):
    """L2-regularised logistic regression on the :func:`linear_preprocessor` design."""
    return make_pipeline(
        linear_preprocessor(categorical),
        LogisticRegression(C=C, max_iter=2000, random_state=random_state),
    )
