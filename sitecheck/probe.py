"""The site probe: can the site (or a group) be told apart from the features?

A classifier two-sample test generalised to several sites: a held-out
classifier predicts the site from the features; its out-of-fold macro
one-vs-rest ROC AUC measures how much site signal the pooled data carries
(0.5: none; 1: the sites are perfectly separable).

The default probe is gradient boosting (:func:`sitecheck.models.make_booster`,
native missing values and categoricals); a regularised logistic regression
(:func:`sitecheck.models.make_linear`) gives a second opinion. Intervals come
from a stratified bootstrap of the out-of-fold predictions; the p-value from a
label-permutation test within the held-out folds
(:func:`sitecheck.stats.fold_permutation_pvalue`), which needs no refitting.

References
----------
Lopez-Paz, D. & Oquab, M. (2017). Revisiting classifier two-sample tests.
International Conference on Learning Representations (ICLR).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np
from sklearn.base import clone
from sklearn.model_selection import StratifiedKFold

from . import stats
from .errors import InputError, ParameterError
from .models import make_booster, make_linear

MODELS = ("boosting", "linear")

#: Verdict thresholds on the lower end of the AUC interval: our own convention.
#: strong: lower bound >= 0.80; moderate: >= 0.65; weak: above 0.50 (the interval
#: excludes chance); none: otherwise, or when the permutation p-value is >= 0.05.
VERDICT_THRESHOLDS = {"strong": 0.80, "moderate": 0.65, "weak": 0.50}

CAUTION = ("A low probe AUC does not prove the absence of site effects: the probe sees only the "
           "features given to it, a more flexible model or more rows might find signal it missed, "
           "and an effect confined to a few rows or to one feature's rare values can stay hidden.")

VERDICT_WORDS = {
    "strong": "The site can be predicted from the features with high accuracy.",
    "moderate": "The site can be predicted from the features clearly better than chance.",
    "weak": "The site can be predicted from the features slightly better than chance.",
    "none": "The site could not be predicted from the features better than chance.",
}


# ---------------------------------------------------------------- cross-fitting

@dataclass(frozen=True, eq=False)
class CrossFit:
    """Out-of-fold predictions of one model family.

    Attributes
    ----------
    proba : ndarray (n, k)
        Out-of-fold class probabilities (row i from the model that did not see it).
    models : tuple
        The fitted estimator of each fold (in ``folds`` order).
    folds : tuple of (train, test) index arrays
    classes : ndarray of int
        Class codes 0..k-1 (columns of ``proba``).
    model : str
        "boosting" or "linear".
    n_iter : tuple of int
        Boosting iterations used per fold (empty for linear).
    """

    proba: np.ndarray
    models: Tuple[Any, ...]
    folds: Tuple[Tuple[np.ndarray, np.ndarray], ...]
    classes: np.ndarray
    model: str
    n_iter: Tuple[int, ...] = ()


def _check_xy(X, y) -> Tuple[np.ndarray, np.ndarray]:
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ParameterError(f"X must be 2-D, got shape {X.shape}")
    y = np.asarray(y)
    if len(y) != X.shape[0]:
        raise ParameterError(f"y has {len(y)} rows, X has {X.shape[0]}")
    if not np.issubdtype(y.dtype, np.integer):
        raise ParameterError("y must hold integer class codes 0..k-1")
    return X, y.astype(np.int64)


def make_folds(y, n_splits: int, *, random_state) -> Tuple[Tuple[np.ndarray, np.ndarray], ...]:
    """Stratified K folds (shuffled with ``random_state``), reduced to the smallest class size (>= 2)."""
    y = np.asarray(y)
    smallest = int(np.bincount(y).min()) if len(y) else 0
    k = int(max(2, min(int(n_splits), smallest)))
    if smallest < 2:
        raise InputError("every class needs at least 2 rows for cross-fitting")
    seed = int(stats._rng(random_state).integers(2**31 - 1)) if isinstance(random_state, np.random.Generator) \
        else int(random_state)
    skf = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed)
    return tuple((tr, te) for tr, te in skf.split(np.zeros(len(y)), y))


def _estimator(model: str, categorical, k: int, n_train: int, *, random_state: int):
    if model == "boosting":
        # Many classes: multi-class boosting grows one tree per class per iteration, so
        # the cost scales with k; fewer leaves, a larger step and a tighter iteration cap
        # keep 30-100 sites fast (measured in tests/benchmarks/bench_probe.py).
        if k > 8:
            est = make_booster(categorical, random_state=random_state, max_iter=60, learning_rate=0.2)
            est.set_params(max_leaf_nodes=7, n_iter_no_change=5)
        else:
            est = make_booster(categorical, random_state=random_state, max_iter=150, learning_rate=0.15)
        if n_train < 200:
            est.set_params(early_stopping=False, max_iter=50, min_samples_leaf=5)
        return est
    if model == "linear":
        return make_linear(categorical, random_state=random_state, C=1.0)
    raise ParameterError(f"model must be one of {MODELS}, got {model!r}")


def cross_fit(X, y, categorical, folds, *, model: str = "boosting", random_state) -> CrossFit:
    """Fit one model per fold; return out-of-fold probabilities and the fold models.

    Parameters
    ----------
    X : array (n, p)
        Features; NaN for missing; categorical columns hold integer codes.
    y : array of int (n,)
        Class codes 0..k-1.
    categorical : array of bool (p,)
    folds : int or sequence of (train, test) index arrays
        An int makes stratified folds with ``random_state``.
    model : {"boosting", "linear"}, default "boosting"
    random_state : int

    Returns
    -------
    CrossFit
    """
    X, y = _check_xy(X, y)
    if model not in MODELS:
        raise ParameterError(f"model must be one of {MODELS}, got {model!r}")
    cat = np.asarray(categorical, dtype=bool)
    if cat.shape != (X.shape[1],):
        raise ParameterError(f"categorical must have one flag per column ({X.shape[1]}), got {cat.shape}")
    seed = int(random_state)
    if isinstance(folds, (int, np.integer)):
        folds = make_folds(y, int(folds), random_state=seed)
    folds = tuple((np.asarray(tr), np.asarray(te)) for tr, te in folds)
    k = int(y.max()) + 1
    proba = np.full((len(y), k), np.nan)
    fitted: List[Any] = []
    n_iter: List[int] = []
    for f, (tr, te) in enumerate(folds):
        est = _estimator(model, cat, k, len(tr), random_state=seed + 1000 * f)
        if model == "linear" and X.shape[1] == 0:
            raise InputError("no feature columns to probe")
        est.fit(X[tr], y[tr])
        p = est.predict_proba(X[te])
        cls = np.asarray(est.classes_, dtype=np.int64)
        block = np.zeros((len(te), k))
        block[:, cls] = p
        proba[te] = block
        fitted.append(est)
        if model == "boosting":
            n_iter.append(int(est.n_iter_))
    if np.isnan(proba).any():
        raise ParameterError("folds must cover every row exactly once as a test row")
    return CrossFit(proba=proba, models=tuple(fitted), folds=folds, classes=np.arange(k), model=model,
                    n_iter=tuple(n_iter))


# ---------------------------------------------------------------- scoring

@dataclass(frozen=True)
class ProbeScore:
    """Out-of-fold macro AUC of a probe, its interval, p-value and sample size.

    Attributes
    ----------
    auc : float
    auc_ci : (float, float)
        95% stratified-bootstrap percentile interval.
    p_value : float or None
        Label-permutation p-value (None when not computed).
    n : int
        Rows used.
    model : str
    n_boot : int
    n_permutations : int
    per_class_auc : tuple of float
    per_class_ci : tuple of (float, float)
    balanced_accuracy : float
    """

    auc: float
    auc_ci: Tuple[float, float]
    p_value: Optional[float]
    n: int
    model: str = "boosting"
    n_boot: int = 0
    n_permutations: int = 0
    per_class_auc: Tuple[float, ...] = ()
    per_class_ci: Tuple[Tuple[float, float], ...] = ()
    balanced_accuracy: float = float("nan")

    def to_dict(self) -> Dict[str, Any]:
        return {"auc": self.auc, "auc_ci": list(self.auc_ci), "p_value": self.p_value, "n": self.n,
                "model": self.model, "n_boot": self.n_boot, "n_permutations": self.n_permutations}


def _balanced_accuracy(y, proba) -> float:
    from sklearn.metrics import balanced_accuracy_score

    return float(balanced_accuracy_score(y, np.argmax(proba, axis=1)))


def score_crossfit(y, fit: CrossFit, *, n_boot: int = 500, n_permutations: int = 999,
                   random_state) -> ProbeScore:
    """Score out-of-fold predictions: macro AUC, bootstrap interval, permutation p-value.

    ``n_permutations=0`` skips the p-value.
    """
    y = np.asarray(y).astype(np.int64)
    rng = stats._rng(random_state)
    auc = stats.macro_ovr_auc(y, fit.proba)
    (cls,) = stats.bootstrap_class_aucs(y, [fit.proba], n_boot=n_boot, random_state=rng)
    ci = stats.percentile_ci(stats.macro_from_class_aucs(cls))
    p = None
    if n_permutations:
        p, _ = stats.fold_permutation_pvalue(y, fit.proba, fit.folds, n_permutations=n_permutations,
                                             random_state=rng)
    per = stats.ovr_aucs(y, fit.proba)
    per_ci = tuple(stats.percentile_ci(cls[:, c]) for c in range(cls.shape[1]))
    return ProbeScore(auc=float(auc), auc_ci=ci, p_value=p, n=int(len(y)), model=fit.model,
                      n_boot=int(n_boot), n_permutations=int(n_permutations),
                      per_class_auc=tuple(float(a) for a in per), per_class_ci=per_ci,
                      balanced_accuracy=_balanced_accuracy(y, fit.proba))


def probe_matrix(X, y, categorical, folds, *, random_state, n_boot: int = 500,
                 n_permutations: int = 999, model: str = "boosting") -> ProbeScore:
    """Probe one matrix: cross-fit ``model`` and score it (AUC, interval, p-value, n).

    Parameters
    ----------
    X : array (n, p)
    y : array of int (n,)
        Class codes 0..k-1 (site or group).
    categorical : array of bool (p,)
    folds : int or sequence of (train, test) index arrays
    random_state : int
    n_boot : int, default 500
    n_permutations : int, default 999
        0 skips the p-value.
    model : {"boosting", "linear"}

    Returns
    -------
    ProbeScore
    """
    fit = cross_fit(X, y, categorical, folds, model=model, random_state=random_state)
    return score_crossfit(y, fit, n_boot=n_boot, n_permutations=n_permutations,
                          random_state=np.random.default_rng([int(random_state), 77]))


def verdict(auc_ci: Sequence[float], p_value: Optional[float] = None) -> str:
    """Graded verdict from the AUC interval (thresholds: :data:`VERDICT_THRESHOLDS`, our own convention)."""
    lo = auc_ci[0]
    if lo is None or not np.isfinite(lo):
        return "none"
    if p_value is not None and np.isfinite(p_value) and p_value >= 0.05:
        return "none"
    if lo >= VERDICT_THRESHOLDS["strong"]:
        return "strong"
    if lo >= VERDICT_THRESHOLDS["moderate"]:
        return "moderate"
    if lo > VERDICT_THRESHOLDS["weak"]:
        return "weak"
    return "none"
