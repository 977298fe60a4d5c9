"""Leak ranking: which features carry the site signature.

The score of a feature (or a group of features) is the drop in the probe's
macro one-vs-rest ROC AUC when its values are permuted in the held-out rows of
each cross-validation fold, scored with that fold's fitted probe model
(permutation importance computed out of sample, never in-sample). Features
that are strongly correlated (Spearman) are clustered and permuted together,
as are user-declared panels, so that redundancy cannot hide a leaking group.

References
----------
Breiman, L. (2001). Random forests. Machine Learning 45, 5-32 (permutation importance).
Strobl, C. et al. (2008). Conditional variable importance for random forests.
BMC Bioinformatics 9, 307 (correlated predictors share importance).
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
from scipy import stats as sps
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform

from sitecheck._records import fields_dict
from sitecheck._runtime import derived_seed, native_threads, stream, thread_limit
from sitecheck.errors import InputError
from sitecheck.table.prepare import Prepared
from sitecheck.analyses.univariate import covariate_design, missing_by_site, univariate_gaps


def macro_auc_scorer(estimator, X, y) -> float:
    """Macro one-vs-rest ROC AUC of ``estimator`` on (X, y) (binary: plain AUC).

    Computed with :func:`sitecheck.analyses.stats.macro_ovr_auc` (rank form, equal to
    scikit-learn's ``roc_auc_score(multi_class="ovr")``, measured 3-5x faster; this
    scorer runs once per permutation)."""
    from sitecheck.analyses.stats import macro_ovr_auc

    proba = estimator.predict_proba(X)
    return macro_ovr_auc(np.asarray(y), proba)


class _TreeParts:
    """The per-tree predictions of a fitted ``HistGradientBoostingClassifier`` on fixed rows.

    A permutation of some columns changes only the trees that split on one of them, so the
    others' outputs are computed once and reused. The raw prediction is then summed tree by
    tree in scikit-learn's own order (baseline, then iteration by iteration) and passed through
    the model's own link, so the probabilities are bit-for-bit those of ``predict_proba``.

    Built by :meth:`build`, which returns None when the estimator is not a fitted
    histogram gradient-boosting classifier whose internals have the expected form (the
    caller then predicts in full).
    """

    def __init__(self, estimator, Xpre, colmap, parts, trees, n_threads, bitsets):
        self.estimator = estimator
        self.Xpre = Xpre            # rows as the tree predictors see them (validated, remapped)
        self.colmap = colmap        # original column -> column of Xpre
        self.parts = parts          # (n_iter, n, k) output of each tree on the unpermuted rows
        self.trees = trees          # list of (iteration, class, predictor, columns of Xpre it splits on)
        self.n_threads = n_threads
        self._bitsets = bitsets     # (known category bitsets, feature index map) of the predictors

    @classmethod
    def build(cls, estimator, X: np.ndarray):
        from sklearn.ensemble import HistGradientBoostingClassifier

        if not isinstance(estimator, HistGradientBoostingClassifier):
            return None
        try:
            Xpre = np.ascontiguousarray(estimator._preprocess_X(X, reset=False), dtype=np.float64)
            colmap = _preprocessed_columns(estimator, X.shape[1])
            if colmap is None or Xpre.shape != X.shape:
                return None
            bitsets, f_idx_map = estimator._bin_mapper.make_known_categories_bitsets()
            n_threads = native_threads(X.shape[0]) or (os.cpu_count() or 1)
            predictors = estimator._predictors
            k = estimator.n_trees_per_iteration_
            parts = np.empty((len(predictors), X.shape[0], k))
            trees = []
            for it, of_iteration in enumerate(predictors):
                for c, predictor in enumerate(of_iteration):
                    parts[it, :, c] = predictor.predict(Xpre, bitsets, f_idx_map, n_threads)
                    nodes = predictor.nodes
                    split_on = np.unique(nodes["feature_idx"][nodes["is_leaf"] == 0])
                    trees.append((it, c, predictor, frozenset(int(v) for v in split_on)))
            obj = cls(estimator, Xpre, colmap, parts, trees, n_threads, (bitsets, f_idx_map))
            # The sum must reproduce predict_proba exactly, or the fast path is not used.
            if not np.array_equal(obj.proba(parts), estimator.predict_proba(X)):
                return None
            return obj
        except (AttributeError, TypeError, ValueError, KeyError, IndexError):  # pragma: no cover - other versions
            return None

    def proba(self, parts: np.ndarray) -> np.ndarray:
        est = self.estimator
        raw = np.zeros((parts.shape[1], parts.shape[2]), dtype=est._baseline_prediction.dtype, order="F")
        raw += est._baseline_prediction
        for it in range(parts.shape[0]):
            raw += parts[it]
        return est._loss.predict_proba(raw)

    def trees_using(self, cols) -> list:
        pre = {int(self.colmap[c]) for c in cols}
        return [t for t in self.trees if t[3] & pre]

    def predict_tree(self, predictor, Xpre: np.ndarray) -> np.ndarray:
        return predictor.predict(Xpre, self._bitsets[0], self._bitsets[1], self.n_threads)


def _preprocessed_columns(estimator, p: int):
    """Where each original column lands in the matrix the tree predictors read
    (scikit-learn >= 1.4 moves categorical columns first), or None when unknown."""
    pre = getattr(estimator, "_preprocessor", None)
    if pre is None:
        return np.arange(p)
    colmap = np.full(p, -1)
    for name, trans, cols in pre.transformers_:
        if isinstance(trans, str) and trans == "drop":
            continue
        idx = np.arange(p)[np.asarray(cols)] if np.asarray(cols).dtype == bool else np.asarray(cols, dtype=int)
        out = pre.output_indices_[name]
        if out.stop - out.start != len(idx):
            return None
        colmap[idx] = np.arange(out.start, out.stop)
    return colmap if (colmap >= 0).all() else None


def grouped_permutation_importance(estimator, X: np.ndarray, y: np.ndarray, groups: Sequence[Sequence[int]], *,
                                   scoring=macro_auc_scorer, n_repeats: int = 5, random_state: int = 0):
    """Permutation importance of column groups, each group's columns shuffled jointly.

    Follows the permutation scheme of :func:`sklearn.inspection.permutation_importance`
    (one seed drawn from ``random_state``, the same shuffle sequence for every group,
    cumulative in-place shuffles across repeats), so that for singleton groups the
    result equals scikit-learn's on the same rows.

    For a histogram gradient-boosting classifier scored by :func:`macro_auc_scorer`, a
    permutation re-predicts only the trees that split on the permuted columns (the
    other trees' outputs are unchanged, and a group no tree uses has a drop of exactly
    0); the probabilities are bit-for-bit those of ``predict_proba``, so the result is
    the same as predicting every tree anew, at a fraction of the cost.

    Returns
    -------
    baseline : float
    drops : ndarray (n_groups, n_repeats)
        Baseline score minus permuted score.
    """
    from sitecheck.analyses.stats import macro_ovr_auc

    rs = np.random.RandomState(random_state) if not isinstance(random_state, np.random.RandomState) else random_state
    seed = rs.randint(np.iinfo(np.int32).max + 1)
    y = np.asarray(y)
    # Many small predictions: OpenMP start-up and spin-waiting cost more than they save
    # (measured 30x slower per call on a busy 2-core machine), so score single-threaded.
    with thread_limit(native_threads(X.shape[0]), user_api="openmp"):
        fast = _TreeParts.build(estimator, X) if scoring is macro_auc_scorer else None
        if fast is not None:
            baseline = macro_ovr_auc(y, fast.proba(fast.parts))
        else:
            baseline = scoring(estimator, X, y)
        drops = np.empty((len(groups), n_repeats))
        # one working copy of the rows (and of the tree outputs), restored after each group
        Xw = (X if fast is None else fast.Xpre).copy()
        Pw = None if fast is None else fast.parts.copy()
        for g, cols in enumerate(groups):
            cols = np.asarray(cols, dtype=int)
            r = np.random.RandomState(seed)
            idx = np.arange(X.shape[0])
            if fast is None:
                for rep in range(n_repeats):
                    r.shuffle(idx)
                    Xw[:, cols] = Xw[np.ix_(idx, cols)]
                    drops[g, rep] = baseline - scoring(estimator, Xw, y)
                Xw[:, cols] = X[:, cols]
                continue
            trees = fast.trees_using(cols)
            if not trees:
                drops[g] = 0.0
                continue
            pre_cols = fast.colmap[cols]
            for rep in range(n_repeats):
                r.shuffle(idx)
                Xw[:, pre_cols] = Xw[np.ix_(idx, pre_cols)]
                for it, c, predictor, _ in trees:
                    Pw[it, :, c] = fast.predict_tree(predictor, Xw)
                drops[g, rep] = baseline - macro_ovr_auc(y, fast.proba(Pw))
            Xw[:, pre_cols] = fast.Xpre[:, pre_cols]
            for it, c, _, _ in trees:
                Pw[it, :, c] = fast.parts[it, :, c]
    return baseline, drops


def spearman_matrix(X: np.ndarray, *, min_periods: int = 10) -> np.ndarray:
    """Spearman correlations between the columns of ``X`` (NaN = missing), pairwise over the
    rows where both columns are present.

    Each column is ranked once over its own observed values (average ranks for ties), and
    the Pearson correlation of the ranks is taken over the rows the two columns share, for
    all pairs at once by matrix products. Without missing values this is Spearman's rho
    exactly (equal to ``pandas.DataFrame.corr(method="spearman")``). With missing values
    pandas re-ranks every pair on its shared rows: two sorts per pair, measured 26 s for
    10,000 rows x 200 columns against well under a second here. The difference is small
    (see ``tests/test_leakage.py``: at most about 0.01 on R's ``airquality``, whose Ozone
    column is a quarter missing) and does not change the clusters there.

    Pairs sharing fewer than ``min_periods`` rows, and constant columns, get NaN.
    """
    import pandas as pd

    X = np.asarray(X, dtype=float)
    R = pd.DataFrame(X).rank(method="average").to_numpy()
    M = ~np.isnan(R)
    Mf = M.astype(float)
    # centre each column's ranks on its own mean rank to keep the sums small (the shift cancels)
    R0 = np.where(M, R - (M.sum(axis=0) + 1) / 2.0, 0.0)
    n = Mf.T @ Mf                    # rows shared by i and j
    sx = R0.T @ Mf                   # sum of i's ranks over the rows shared with j
    sxx = (R0 * R0).T @ Mf
    sxy = R0.T @ R0
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = n * sxy - sx * sx.T
        var = n * sxx - sx * sx
        rho = cov / np.sqrt(var * var.T)
    rho[(n < min_periods) | ~np.isfinite(rho)] = np.nan
    return np.clip(rho, -1.0, 1.0)


def correlation_clusters(X: np.ndarray, categorical: np.ndarray, *, threshold: float = 0.7) -> np.ndarray:
    """Cluster ids of columns by hierarchical (average-linkage) clustering on
    1 - |Spearman rho| (:func:`spearman_matrix`) cut at 1 - ``threshold``; categorical
    columns stay single."""
    p = X.shape[1]
    labels = np.arange(p)
    num = np.flatnonzero(~np.asarray(categorical, dtype=bool))
    if len(num) < 2:
        return labels
    rho = np.nan_to_num(spearman_matrix(X[:, num]), nan=0.0)
    dist = 1.0 - np.abs(rho)
    np.fill_diagonal(dist, 0.0)
    dist = np.clip((dist + dist.T) / 2, 0, None)
    Z = hierarchy.linkage(squareform(dist, checks=False), method="average")
    cl = hierarchy.fcluster(Z, t=1.0 - threshold, criterion="distance")
    out = labels.copy()
    base = p
    for c in np.unique(cl):
        members = num[cl == c]
        if len(members) > 1:
            out[members] = base + c
    # renumber 0..m-1 in order of first appearance
    _, first = np.unique(out, return_index=True)
    order = {v: i for i, v in enumerate(out[np.sort(first)])}
    return np.array([order[v] for v in out])


def _t_interval(values: np.ndarray, alpha: float = 0.05) -> Tuple[float, float]:
    v = np.asarray(values, dtype=float)
    if len(v) < 2:
        return float(v.mean()), float(v.mean())
    m, s = v.mean(), v.std(ddof=1)
    h = sps.t.ppf(1 - alpha / 2, len(v) - 1) * s / np.sqrt(len(v))
    return float(m - h), float(m + h)


@dataclass(frozen=True)
class LeakEntry:
    feature: str
    score: float
    score_ci: Tuple[float, float]
    rank: int
    cluster: int
    univariate: dict
    missing_by_site: dict

    def to_dict(self) -> dict:
        return fields_dict(self)


@dataclass(frozen=True)
class ClusterEntry:
    id: int
    members: Tuple[str, ...]
    score: float
    score_ci: Tuple[float, float]
    source: str

    def to_dict(self) -> dict:
        return fields_dict(self)


@dataclass(frozen=True)
class LeakageResult:
    """The leak ranking.

    ``entries`` are sorted by score (largest drop in AUC first). ``clusters`` holds
    every group permuted together (correlation clusters of two or more features
    and declared panels). ``missingness`` is the probe on missing-value indicators
    alone. Scores are means over folds of the mean drop over repeats; intervals are
    t intervals over the fold means.
    """

    entries: Tuple[LeakEntry, ...]
    clusters: Tuple[ClusterEntry, ...]
    missingness: Optional[dict]
    baseline_auc: float
    n_folds: int
    n_repeats: int
    n_rows_per_fold: int
    threshold: float
    n_rows_clustered: int = 0

    def top(self, k: int = 8) -> List[str]:
        return [e.feature for e in self.entries[:k]]

    def score_of(self, feature: str) -> float:
        for e in self.entries:
            if e.feature == feature:
                return e.score
        raise KeyError(feature)

    def sections(self) -> dict:
        """The report.json sections: ``leakage`` (sorted list), ``clusters`` (list),
        ``missingness`` (probe on missing-value indicators) and ``leakage_method``."""
        d = self.to_dict()
        return {"leakage": d["features"], "clusters": d["clusters"], "missingness": d["missingness_probe"],
                "leakage_method": {k: v for k, v in d.items() if k not in ("features", "clusters", "missingness_probe")}}

    def to_dict(self) -> dict:
        return {
            "features": [e.to_dict() for e in self.entries],
            "clusters": [c.to_dict() for c in self.clusters],
            "missingness_probe": self.missingness,
            "baseline_auc": self.baseline_auc,
            "score": "drop in held-out macro one-vs-rest ROC AUC when permuted",
            "n_folds": self.n_folds,
            "n_repeats": self.n_repeats,
            "n_rows_per_fold": self.n_rows_per_fold,
            "cluster_threshold": self.threshold,
            "n_rows_clustered": self.n_rows_clustered,
        }


def rank_leakage(prep: Prepared, crossfit, *, n_repeats: Optional[int] = None, max_rows_per_fold: int = 4000,
                 cluster_threshold: float = 0.7, max_cluster_rows: int = 100_000,
                 panels: Optional[Dict[str, Sequence[str]]] = None,
                 missingness_probe=None, random_state: Optional[int] = None) -> LeakageResult:
    """Rank features by held-out permutation importance of the site probe.

    Parameters
    ----------
    prep : Prepared
    crossfit : CrossFit
        The probe's cross-fit (fitted model per fold and the folds), reused: no refit.
    n_repeats : int, optional
        Permutations per group and fold; default 5, or 3 with more than 8 sites
        (each prediction of a many-class model costs about k times more).
    max_rows_per_fold : int, default 4000
        Held-out rows scored per fold (a site-stratified subset when there are more).
    cluster_threshold : float, default 0.7
        |Spearman rho| above which features are clustered and permuted together.
    max_cluster_rows : int, default 100000
        Rows (a site-stratified subset when there are more) on which the Spearman
        correlations are estimated (:func:`spearman_matrix`: 2 s for 100,000 rows x 100
        columns, measured).
    panels : dict, optional
        Declared panels (name -> feature names), permuted together.
    missingness_probe : callable, optional
        ``f(M, y) -> dict`` probing site from the missing-value indicator matrix ``M``.
    random_state : int, optional (default: prep.seed)

    Returns
    -------
    LeakageResult
    """
    if not 0 < cluster_threshold <= 1:
        raise InputError(f"cluster_threshold must be in (0, 1], got {cluster_threshold!r}")
    if not isinstance(max_cluster_rows, (int, np.integer)) or max_cluster_rows < 100:
        raise InputError(f"max_cluster_rows must be an integer of at least 100, got {max_cluster_rows!r}")
    if n_repeats is None:
        n_repeats = 5 if len(prep.site_labels) <= 8 else 3
    if n_repeats < 1:
        raise InputError(f"n_repeats must be at least 1, got {n_repeats!r}")
    seed = prep.seed if random_state is None else int(random_state)
    enc = prep.features
    X, names = enc.X, list(enc.names)
    Xm = crossfit.transform(X) if hasattr(crossfit, "transform") else X  # as the fold models saw it
    y = prep.site
    p = X.shape[1]
    from sitecheck.table.prepare import stratified_subsample

    rng = stream(seed, "leakage.permutations")
    corr_rows = stratified_subsample(y, int(max_cluster_rows), stream(seed, "leakage.cluster_rows"))
    cl = correlation_clusters(X[corr_rows], enc.categorical, threshold=cluster_threshold)
    groups: List[Tuple[str, List[int]]] = [(f"feature:{n}", [j]) for j, n in enumerate(names)]
    for c in np.unique(cl):
        members = np.flatnonzero(cl == c)
        if len(members) > 1:
            groups.append((f"cluster:{int(c)}", members.tolist()))
    for pname, members in (panels or {}).items():
        idx = [names.index(m) for m in members if m in names]
        if idx:
            groups.append((f"panel:{pname}", idx))
    fold_drops = np.zeros((len(crossfit.models), len(groups)))
    base_scores = []
    n_rows = 0
    for f, ((tr, te), model) in enumerate(zip(crossfit.folds, crossfit.models)):
        te = np.asarray(te)
        if len(te) > max_rows_per_fold:
            te = te[stratified_subsample(y[te], max_rows_per_fold, rng)]
        n_rows = max(n_rows, len(te))
        base, drops = grouped_permutation_importance(model, Xm[te], y[te], [g[1] for g in groups],
                                                     n_repeats=n_repeats, random_state=derived_seed(seed, "leakage.fold_repeats", f))
        base_scores.append(base)
        fold_drops[f] = drops.mean(axis=1)
    score = fold_drops.mean(axis=0)
    cis = [_t_interval(fold_drops[:, g]) for g in range(len(groups))]

    C = None
    if prep.covariates is not None:
        C = covariate_design(prep.covariates.X, prep.covariates.categorical)
    uni = {g.feature: g.to_dict() for g in univariate_gaps(X, names, enc.kinds, y, prep.site_labels, covariates=C)}
    miss = {m.feature: m.to_dict() for m in missing_by_site(X, names, y, prep.site_labels)}

    order = np.argsort(-score[:p], kind="stable")
    entries = tuple(LeakEntry(feature=names[j], score=float(score[j]), score_ci=cis[j], rank=r + 1,
                              cluster=int(cl[j]), univariate=uni[names[j]], missing_by_site=miss[names[j]])
                    for r, j in enumerate(order))
    clusters = []
    for g in range(p, len(groups)):
        label, idx = groups[g]
        kind, _, key = label.partition(":")
        clusters.append(ClusterEntry(id=int(key) if kind == "cluster" else -1, members=tuple(names[i] for i in idx),
                                     score=float(score[g]), score_ci=cis[g],
                                     source="correlation" if kind == "cluster" else f"panel {key}"))
    clusters.sort(key=lambda c: -c.score)

    missing_doc = None
    M = np.isnan(X)
    has = M.any(axis=0) & ~M.all(axis=0)
    if missingness_probe is not None and has.any():
        missing_doc = dict(missingness_probe(M[:, has].astype(float), y))
        missing_doc["features"] = [n for n, h in zip(names, has) if h]
    return LeakageResult(entries=entries, clusters=tuple(clusters), missingness=missing_doc,
                         baseline_auc=float(np.mean(base_scores)), n_folds=len(crossfit.models),
                         n_repeats=int(n_repeats), n_rows_per_fold=int(n_rows), threshold=float(cluster_threshold),
                         n_rows_clustered=int(len(corr_rows)))
