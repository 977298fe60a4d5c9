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
