"""Small statistical building blocks shared by the analyses.

ROC AUC (binary and macro one-vs-rest), stratified bootstrap intervals
computed for many resamples at once, paired bootstrap differences, a
label-permutation p-value for cross-fitted predictions, Wilson intervals and
the Benjamini-Hochberg adjustment.

Every function is pure; randomness comes only from ``random_state`` (an int
seed or a :class:`numpy.random.Generator`).
"""
from __future__ import annotations

import math
from typing import List, Optional, Sequence, Tuple

import numpy as np
from scipy import stats as _st

from sitecheck._runtime import generator
from sitecheck.errors import ParameterError

#: Resamples handled per vectorised block (bounds memory at block x n floats).
_BLOCK = 64


_rng = generator


def _check_y_proba(y, proba) -> Tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y)
    if y.ndim != 1 or not np.issubdtype(y.dtype, np.integer):
        if y.ndim == 1 and np.all(np.mod(y, 1) == 0):
            y = y.astype(np.int64)
        else:
            raise ParameterError("y must be a 1-D array of integer class codes 0..k-1")
    proba = np.asarray(proba, dtype=float)
    if proba.ndim != 2 or proba.shape[0] != len(y):
        raise ParameterError(f"proba must have shape (n, k) with n = len(y) = {len(y)}, got {proba.shape}")
    k = proba.shape[1]
    if k < 2:
        raise ParameterError("proba needs at least two columns (classes)")
    if y.min(initial=0) < 0 or y.max(initial=0) >= k:
        raise ParameterError(f"class codes must lie in 0..{k - 1}")
    counts = np.bincount(y, minlength=k)
    if np.any(counts == 0) or np.any(counts == len(y)):
        raise ParameterError("every class needs at least one row, and at least two classes must be present")
    return y.astype(np.int64), proba


def _scored_columns(k: int) -> List[int]:
    """Columns whose one-vs-rest AUC enters the macro average (k = 2: class 1 only,
    as scikit-learn's binary ``roc_auc_score`` does)."""
    return [1] if k == 2 else list(range(k))


def binary_auc(y01, score) -> float:
    """ROC AUC of ``score`` for the positive class ``y01 == 1`` (Mann-Whitney form, ties count 1/2).

    References
    ----------
    Hanley, J. A. & McNeil, B. J. (1982). The meaning and use of the area under
    a receiver operating characteristic (ROC) curve. Radiology 143(1), 29-36.
    """
    y01 = np.asarray(y01).astype(bool)
    score = np.asarray(score, dtype=float)
    n1 = int(y01.sum())
    n0 = len(y01) - n1
    if n1 == 0 or n0 == 0:
        raise ParameterError("AUC needs both classes present")
    r = _st.rankdata(score)
    return float((r[y01].sum() - n1 * (n1 + 1) / 2.0) / (n1 * n0))


def ovr_aucs(y, proba) -> np.ndarray:
    """One-vs-rest ROC AUC of every class: column ``c`` of ``proba`` scores ``y == c``."""
    y, proba = _check_y_proba(y, proba)
    return np.array([binary_auc(y == c, proba[:, c]) for c in range(proba.shape[1])])


def macro_ovr_auc(y, proba) -> float:
    """Macro-averaged one-vs-rest ROC AUC.

    Equals ``sklearn.metrics.roc_auc_score(y, proba, multi_class="ovr",
    average="macro")`` for k > 2 and ``roc_auc_score(y, proba[:, 1])`` for
    k = 2.

    Parameters
    ----------
    y : array of int, shape (n,)
        Class codes 0..k-1.
    proba : array, shape (n, k)
        Scores (e.g. out-of-fold probabilities), one column per class.

    Returns
    -------
    float
    """
    y, proba = _check_y_proba(y, proba)
    cols = _scored_columns(proba.shape[1])
    return float(np.mean([binary_auc(y == c, proba[:, c]) for c in cols]))


class SortedScores:
    """Scores sorted once, for the weighted AUCs of many resamples (the one weighted AUC).

    :meth:`aucs` gives, for each row of a weight matrix, the area under the ROC curve with case
    weights and ties counted one half: the weighted Mann-Whitney probability
    P(score+ > score-) + P(tie) / 2 (Hanley & McNeil 1982), O(n) per resample after one sort.
    With ``G_i`` the weight of all rows scored below row i plus half the weight of its ties and
    ``P`` the positives' total weight, ``U = sum_{i pos} w_i G_i - P^2 / 2`` (the positives' pairs
    among themselves contribute exactly ``P^2 / 2``) and the AUC is ``U / (P N)``. Integer weights
    (bootstrap multiplicities) are summed in integers, so the result is exact; float weights in
    floating point.

    Parameters
    ----------
    score : array of shape (n,)
    y : array of shape (n,)
        1 (or True) for the positive class.

    Examples
    --------
    >>> import numpy as np
    >>> from sitecheck.analyses.stats import SortedScores
    >>> s = SortedScores(np.array([0.1, 0.4, 0.4, 0.8]), np.array([0, 0, 1, 1]))
    >>> s.aucs(np.array([[1, 1, 1, 1], [2, 0, 1, 1]])).tolist()
    [0.875, 1.0]
    """

    def __init__(self, score: np.ndarray, y: np.ndarray):
        score = np.asarray(score, dtype=float)
        order = np.argsort(score, kind="mergesort")
        s = score[order]
        self.order = order
        self.pos_rows = np.flatnonzero(np.asarray(y) == 1)
        where = np.empty(len(order), dtype=np.int64)
        where[order] = np.arange(len(order))
        self.pos_sorted = where[self.pos_rows]          # sorted position of each positive
        new = np.r_[True, s[1:] != s[:-1]]
        self.ties = not bool(new.all())
        if self.ties:
            gid = np.cumsum(new) - 1
            self.pos_gid = gid[self.pos_sorted]
            self.ends = np.r_[np.flatnonzero(new)[1:] - 1, len(s) - 1]
        self.n = len(order)

    def aucs(self, W: np.ndarray) -> np.ndarray:
        """AUC for each row of the weights ``W`` (B, n), in the original row order; NaN where a
        resample has no weight on one of the classes."""
        W = np.atleast_2d(np.asarray(W))
        if self.n == 0:
            return np.full(W.shape[0], np.nan)
        acc = np.int64 if np.issubdtype(W.dtype, np.integer) else np.float64
        Ws = np.take(W, self.order, axis=1)
        cum = np.cumsum(Ws, axis=1, dtype=acc)
        if self.ties:
            at_end = cum[:, self.ends]
            below = np.concatenate([np.zeros((W.shape[0], 1), dtype=acc), at_end[:, :-1]], axis=1)
            two_g = (below + at_end)[:, self.pos_gid]
        else:
            two_g = 2 * cum[:, self.pos_sorted] - Ws[:, self.pos_sorted]
        w_pos = W[:, self.pos_rows].astype(acc)
        num2 = np.einsum("bi,bi->b", w_pos, two_g)
        n1 = w_pos.sum(axis=1)
        den = n1 * (cum[:, -1] - n1)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(den > 0, (num2 / 2.0 - n1 * n1 / 2.0) / np.where(den > 0, den, 1), np.nan)


def stratified_bootstrap_weights(y, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """Integer multiplicities (n_boot, n) of a bootstrap that resamples rows within each class."""
    y = np.asarray(y)
    W = np.zeros((n_boot, len(y)), dtype=np.int64)
    for c in np.unique(y):
        idx = np.flatnonzero(y == c)
        W[:, idx] = resample_counts(len(idx), n_boot, rng)
    return W


def resample_counts(m: int, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """Multiplicities (n_boot, m) of ``n_boot`` bootstrap resamples of ``m`` rows.

    Each row of the result counts how often each of the ``m`` rows was drawn in ``m`` draws with
    replacement (a Multinomial(m, 1/m, ..., 1/m) vector), from ``m`` uniform integer draws and one
    bincount per resample: O(m) per resample.

    Examples
    --------
    >>> import numpy as np
    >>> from sitecheck.analyses.stats import resample_counts
    >>> W = resample_counts(5, 3, np.random.default_rng(0))
    >>> W.shape, W.sum(axis=1).tolist()
    ((3, 5), [5, 5, 5])
    """
    m, n_boot = int(m), int(n_boot)
    if m == 0 or n_boot == 0:
        return np.zeros((n_boot, m), dtype=np.int64)
    draws = rng.integers(0, m, size=(n_boot, m))
    draws += (np.arange(n_boot, dtype=np.int64) * m)[:, None]
    return np.bincount(draws.ravel(), minlength=n_boot * m).reshape(n_boot, m)


def bootstrap_class_aucs(y, probas: Sequence[np.ndarray], *, n_boot: int = 1000,
                         random_state) -> List[np.ndarray]:
    """Per-class one-vs-rest AUCs over stratified bootstrap resamples.

    The same resamples are applied to every array in ``probas`` (rows paired),
    so differences between them form a paired bootstrap.

    Parameters
    ----------
    y : array of int, shape (n,)
    probas : sequence of arrays, each (n, k)
    n_boot : int, default 1000
    random_state : int or Generator

    Returns
    -------
    list of arrays, each (n_boot, k): AUC of class c (column c) in resample b.
    """
    if not isinstance(n_boot, (int, np.integer)) or n_boot < 10:
        raise ParameterError(f"n_boot must be an integer of at least 10, got {n_boot!r}")
    probas = [_check_y_proba(y, p)[1] for p in probas]
    y = np.asarray(y).astype(np.int64)
    rng = _rng(random_state)
    sorted_ = [[SortedScores(p[:, c], y == c) for c in range(p.shape[1])] for p in probas]
    out = [np.empty((n_boot, p.shape[1])) for p in probas]
    for start in range(0, n_boot, _BLOCK):
        b = min(_BLOCK, n_boot - start)
        W = stratified_bootstrap_weights(y, b, rng)
        for a, classes in enumerate(sorted_):
            for c, sc in enumerate(classes):
                out[a][start:start + b, c] = sc.aucs(W)
    return out


def macro_from_class_aucs(class_aucs: np.ndarray) -> np.ndarray:
    """Macro average of per-class AUCs (k = 2: class 1 only), along the last axis."""
    k = class_aucs.shape[-1]
    return class_aucs[..., _scored_columns(k)].mean(axis=-1)


def percentile_ci(samples, alpha: float = 0.05) -> Tuple[float, float]:
    """Percentile interval of bootstrap samples (NaNs ignored)."""
    s = np.asarray(samples, dtype=float)
    s = s[np.isfinite(s)]
    if len(s) == 0:
        return (float("nan"), float("nan"))
    lo, hi = np.quantile(s, [alpha / 2.0, 1.0 - alpha / 2.0])
    return (float(lo), float(hi))


def bootstrap_auc_ci(y, proba, *, n_boot: int = 1000, alpha: float = 0.05,
                     random_state) -> Tuple[float, float]:
    """Percentile interval of the macro one-vs-rest AUC (stratified bootstrap of rows).

    The predictions are held fixed and rows are resampled with replacement
    within each class, for all resamples at once.

    References
    ----------
    Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap,
    ch. 13 (percentile intervals). Chapman & Hall.
    """
    (cls,) = bootstrap_class_aucs(y, [proba], n_boot=n_boot, random_state=random_state)
    return percentile_ci(macro_from_class_aucs(cls), alpha)


def binary_auc_ci(y01, score, *, n_boot: int = 1000, alpha: float = 0.05,
                  random_state) -> Tuple[float, Tuple[float, float]]:
    """Binary ROC AUC and its stratified-bootstrap percentile interval.

    Returns
    -------
    (auc, (lo, hi))
    """
    y01 = np.asarray(y01).astype(np.int64)
    score = np.asarray(score, dtype=float)
    auc = binary_auc(y01, score)
    proba = np.column_stack([1.0 - score, score])
    (cls,) = bootstrap_class_aucs(y01, [proba], n_boot=n_boot, random_state=random_state)
    return auc, percentile_ci(cls[:, 1], alpha)


def wilson_ci(k, n, alpha: float = 0.05) -> Tuple[float, float]:
    """Wilson score interval for a binomial proportion k/n.

    References
    ----------
    Wilson, E. B. (1927). Probable inference, the law of succession, and
    statistical inference. JASA 22(158), 209-212.
    """
    k = float(k)
    n = float(n)
    if n <= 0:
        return (float("nan"), float("nan"))
    z = float(_st.norm.ppf(1.0 - alpha / 2.0))
    p = k / n
    den = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return (float(max(0.0, centre - half)), float(min(1.0, centre + half)))


def finite_or_none(x) -> Optional[float]:
    """``x`` as a float; None for a missing, NaN or infinite value (what JSON can hold).

    Examples
    --------
    >>> from sitecheck.analyses.stats import finite_or_none
    >>> finite_or_none(0.25), finite_or_none(float("nan")), finite_or_none(None)
    (0.25, None, None)
    """
    if x is None:
        return None
    x = float(x)
    return None if math.isnan(x) or math.isinf(x) else x


def round_sig(x, digits: int = 6) -> Optional[float]:
    """``x`` to ``digits`` significant figures for stable JSON (same data and seed -> same bytes across
    platforms); None for missing or infinite values, 0.0 for -0.0.

    Examples
    --------
    >>> from sitecheck.analyses.stats import round_sig
    >>> round_sig(3.14159265, 3), round_sig(-0.0), round_sig(float("inf"))
    (3.14, 0.0, None)
    """
    if x is None:
        return None
    x = float(x)
    if not np.isfinite(x):
        return None
    if x == 0:
        return 0.0
    return float(f"{x:.{digits}g}")


def bh_adjust(pvalues) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (step-up, monotone, capped at 1).

    Missing p-values (NaN) stay missing and do not count among the tests.

    References
    ----------
    Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate.
    JRSS B 57(1), 289-300.
    """
    p = np.asarray(pvalues, dtype=float)
    if p.ndim != 1:
        raise ParameterError("pvalues must be 1-D")
    ok = ~np.isnan(p)
    if not ok.all():
        out = np.full(p.shape, np.nan)
        out[ok] = bh_adjust(p[ok])
        return out
    m = len(p)
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="mergesort")
    ranked = p[order] * m / np.arange(1, m + 1)
    adj = np.minimum.accumulate(ranked[::-1])[::-1]
    out = np.empty(m)
    out[order] = np.minimum(adj, 1.0)
    return out


def merge_pvalues_geometric(pvalues) -> float:
    """Merge p-values that may depend on each other arbitrarily: e times their geometric mean.

    References
    ----------
    Vovk, V. & Wang, R. (2020). Combining p-values via averaging. Biometrika
    107(4), 791-808 (the geometric mean times e is a valid merging function).
    """
    p = np.clip(np.asarray(pvalues, dtype=float), 1e-300, 1.0)
    return float(min(1.0, np.e * np.exp(np.mean(np.log(p)))))


def permutation_pvalue_floor(n_permutations: int) -> float:
    """The smallest p-value :func:`fold_permutation_pvalue` can return: every fold at
    1/(B+1) (Phipson & Smyth 2010), merged by e x geometric mean (Vovk & Wang 2020)."""
    return float(min(1.0, np.e / (int(n_permutations) + 1.0)))


def plain_permutation_pvalue_floor(n_permutations: int) -> Optional[float]:
    """The smallest value of the plain permutation p-value (1 + #{null >= observed}) / (1 + B):
    1 / (B + 1) (Phipson & Smyth 2010); None without permutations."""
    b = int(n_permutations)
    return None if b <= 0 else 1.0 / (b + 1.0)


def at_permutation_floor(p_value, floor) -> bool:
    """Whether a permutation p-value sits at its floor (the smallest value its test can give).

    The one rule every output uses (the summary on stdout, the HTML, findings.md): a p-value
    at its floor is reported as "p ≤ floor", never as if exact. A relative tolerance of
    1e-9 absorbs floating-point noise in the merged value.

    >>> at_permutation_floor(permutation_pvalue_floor(999), permutation_pvalue_floor(999))
    True
    >>> at_permutation_floor(0.01, permutation_pvalue_floor(999)), at_permutation_floor(0.01, None)
    (False, False)
    """
    num = (int, float, np.integer, np.floating)
    if isinstance(p_value, bool) or isinstance(floor, bool) or not isinstance(p_value, num) \
            or not isinstance(floor, num):
        return False
    return bool(p_value <= floor * (1 + 1e-9))


def _macro_from_rank_sums(S: np.ndarray, counts: np.ndarray, n: int, cols: List[int]) -> np.ndarray:
    n1 = counts[cols].astype(float)
    return ((S[..., cols] - n1 * (n1 + 1) / 2.0) / (n1 * (n - n1))).mean(axis=-1)


def fold_permutation_pvalue(y, proba, folds, *, n_permutations: int = 999,
                            random_state) -> Tuple[float, Tuple[float, ...]]:
    """Label-permutation p-value for cross-fitted (out-of-fold) predictions.

    Within each test fold the predictions come from a model that never saw the
    fold, so under the null hypothesis (features independent of the class)
    the fold's labels are exchangeable against its predictions: permuting them
    gives an exact p-value for the fold's macro AUC, with no refitting. The
    per-fold p-values depend on each other through shared training rows, so
    they are merged with a rule valid under any dependence
    (:func:`merge_pvalues_geometric`). The test is conservative.

    Parameters
    ----------
    y : array of int, shape (n,)
    proba : array, shape (n, k)
        Out-of-fold scores.
    folds : sequence of (train, test) index arrays
    n_permutations : int, default 999
    random_state : int or Generator

    Returns
    -------
    (p_value, per_fold_p_values)

    References
    ----------
    Phipson, B. & Smyth, G. K. (2010). Permutation p-values should never be
    zero. Stat. Appl. Genet. Mol. Biol. 9(1), Article 39.
    Vovk, V. & Wang, R. (2020). Combining p-values via averaging. Biometrika
    107(4), 791-808.
    """
    y, proba = _check_y_proba(y, proba)
    if not isinstance(n_permutations, (int, np.integer)) or n_permutations < 19:
        raise ParameterError(f"n_permutations must be an integer of at least 19, got {n_permutations!r}")
    rng = _rng(random_state)
    k = proba.shape[1]
    per_fold = []
    for _, test in folds:
        yt = y[test]
        present = np.unique(yt)
        if len(present) < 2:
            continue
        # restrict to classes present in the fold
        cols = [c for c in _scored_columns(k) if c in set(present.tolist())] if k > 2 else (
            [1] if 1 in present else [])
        if not cols:
            continue
        n = len(test)
        counts = np.bincount(yt, minlength=k)
        R = np.column_stack([_st.rankdata(proba[test, c]) for c in range(k)])  # (n, k)
        onehot = (yt[:, None] == np.arange(k)[None, :]).astype(float)
        obs = _macro_from_rank_sums(np.einsum("ic,ic->c", R, onehot), counts, n, cols)
        hits = 0
        done = 0
        rows = np.arange(n)[None, :]
        offsets = (np.arange(_BLOCK, dtype=np.int64) * k)[:, None]
        while done < n_permutations:
            b = min(_BLOCK, n_permutations - done)
            yp = rng.permuted(np.tile(yt, (b, 1)), axis=1)  # (b, n) permuted labels
            # rank sum of each class's permuted rows: one gather and one bincount for all classes
            picked = R[rows, yp]                            # rank of row i under its permuted label's column
            S = np.bincount((yp + offsets[:b]).ravel(), weights=picked.ravel(),
                            minlength=b * k).reshape(b, k)
            null = _macro_from_rank_sums(S, counts, n, cols)
            hits += int(np.sum(null >= obs - 1e-12))
            done += b
        per_fold.append((hits + 1.0) / (n_permutations + 1.0))
    if not per_fold:
        return float("nan"), ()
    return merge_pvalues_geometric(per_fold), tuple(float(p) for p in per_fold)


def fold_class_aucs(y, proba, folds) -> np.ndarray:
    """Per-fold one-vs-rest AUCs (K, k) on each test fold alone (NaN where a class is absent)."""
    y, proba = _check_y_proba(y, proba)
    k = proba.shape[1]
    out = np.full((len(folds), k), np.nan)
    for f, (_, te) in enumerate(folds):
        yt = y[te]
        for c in range(k):
            pos = yt == c
            if 0 < pos.sum() < len(yt):
                out[f, c] = binary_auc(pos, proba[te, c])
    return out


def fold_macro(fold_aucs: np.ndarray) -> np.ndarray:
    """Macro average of per-fold class AUCs (k = 2: class 1), ignoring absent classes."""
    k = fold_aucs.shape[-1]
    with np.errstate(invalid="ignore"):
        return np.nanmean(fold_aucs[..., _scored_columns(k)], axis=-1)


def cv_corrected_sd(fold_values, test_train_ratio: float) -> float:
    """Standard deviation of a K-fold estimate with the Nadeau-Bengio correction.

    ``sqrt((1/K + n_test/n_train) * s^2)`` where ``s^2`` is the sample variance of
    the K fold-wise estimates. The correction accounts for the overlap of the
    training sets, which makes fold estimates positively correlated.

    References
    ----------
    Nadeau, C. & Bengio, Y. (2003). Inference for the generalization error.
    Machine Learning 52(3), 239-281.
    """
    v = np.asarray(fold_values, dtype=float)
    v = v[np.isfinite(v)]
    if len(v) < 2:
        return float("nan")
    return float(np.sqrt((1.0 / len(v) + float(test_train_ratio)) * np.var(v, ddof=1)))


def widened_ci(point: float, ci: Tuple[float, float], boot_samples, fold_values, test_train_ratio: float,
               *, bounds: Tuple[float, float] = (0.0, 1.0), alpha: float = 0.05) -> Tuple[Tuple[float, float], float]:
    """Widen a bootstrap interval when the fold-to-fold spread says it is too narrow.

    The bootstrap of out-of-fold predictions holds the fitted models fixed and so
    misses the variability (and positive correlation) that cross-fitting adds.
    The Nadeau-Bengio corrected resampled-t interval has the half-width
    ``t(1 - alpha/2, K - 1) * cv_corrected_sd`` (Student t with K - 1 degrees of
    freedom, K folds); the bootstrap interval is stretched about ``point`` by
    ``max(1, t(1 - alpha/2, K - 1) / z(1 - alpha/2) * cv_corrected_sd / bootstrap_sd)``
    and clipped to ``bounds``; it is never narrowed. With 5 folds the t quantile is
    2.776 against the normal 1.960: a spread estimated from five fold values is itself
    uncertain.

    Returns
    -------
    ((lo, hi), factor)

    References
    ----------
    Nadeau, C. & Bengio, Y. (2003). Inference for the generalization error.
    Machine Learning 52(3), 239-281 (the corrected resampled t statistic, K - 1 df).
    Bouckaert, R. R. & Frank, E. (2004). Evaluating the replicability of significance
    tests for comparing learning algorithms. PAKDD, LNCS 3056, 3-12.
    """
    s = np.asarray(boot_samples, dtype=float)
    s = s[np.isfinite(s)]
    sd_b = float(np.std(s, ddof=1)) if len(s) > 1 else float("nan")
    sd_cv = cv_corrected_sd(fold_values, test_train_ratio)
    k = int(np.isfinite(np.asarray(fold_values, dtype=float)).sum())
    r = 1.0
    if np.isfinite(sd_cv) and np.isfinite(sd_b) and sd_b > 0 and k >= 2:
        t_over_z = float(_st.t.ppf(1.0 - alpha / 2.0, k - 1) / _st.norm.ppf(1.0 - alpha / 2.0))
        r = max(1.0, t_over_z * sd_cv / sd_b)
    lo, hi = ci
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return ci, r
    lo2 = max(bounds[0], point - r * (point - lo))
    hi2 = min(bounds[1], point + r * (hi - point))
    return (float(lo2), float(hi2)), float(r)


#: AUC of a classifier that cannot tell the classes apart.
CHANCE_AUC = 0.5


def reach_chance(ci: Tuple[float, float], chance: float = CHANCE_AUC) -> Tuple[float, float]:
    """An out-of-fold AUC interval that lies wholly below chance, extended up to chance.

    Separability is at least chance by definition (a model that ranks worse than chance
    would rank better with its scores reversed), but a cross-fitted AUC on data with no
    signal tends to fall below 0.5: each held-out fold is scored by a model fitted on
    the other folds, whose class-conditional quirks are the held-out fold's opposite
    (the bias described by Parker, Gunter & Bedo 2007, from memory). Such an interval
    says "no separation", and is reported as reaching chance instead of excluding it.
    An interval that reaches chance, or lies above it, is returned unchanged.

    References
    ----------
    Parker, B. J., Gunter, S. & Bedo, J. (2007). Stratification bias in low signal
    microarray studies. BMC Bioinformatics 8, 326 (cited from memory).
    """
    lo, hi = ci
    if np.isfinite(lo) and np.isfinite(hi) and hi < chance:
        return (float(lo), float(chance))
    return ci
