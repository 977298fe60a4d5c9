"""Outcome shortcut and transport risk: could a model use the site as a
shortcut to the outcome?

When an outcome column is given, :func:`outcome_risk` measures, before anyone
trains the real model,

- the outcome prevalence by site (Wilson intervals) and a chi-square test of
  equal prevalence;
- the outcome AUC reachable from the site label alone (the shortcut ceiling):
  each held-out row is scored by its site's outcome prevalence in the
  training folds;
- a baseline outcome model of the probe's family
  (:func:`sitecheck.analyses.models.make_booster`) on the features and covariates: the
  pooled cross-validated AUC against the leave-one-site-out (LOSO) AUC of each
  held-out site, and the transport gap (pooled AUC minus the row-weighted mean
  LOSO AUC) with a bootstrap interval;
- shortcut candidates: features that rank high both as site leakers and as
  outcome drivers (held-out permutation importance of the outcome model);
- per-site (and per-group) true and false positive rates of the baseline model
  at one stated threshold (equalized odds), and whether they differ across
  sites by more than sampling noise: the between-unit variance tau^2 of each
  rate (DerSimonian-Laird, Q-profile interval, I^2), the variance and range of
  the observed rates, each beside its null distribution with the unit labels
  permuted within the outcome class and a permutation p-value, and the same
  without the units that have fewer than ``min_rate_count`` positives
  (negatives) (:mod:`sitecheck.analyses.heterogeneity`). The range (max - min) is kept
  but is not the headline: across many small units it is large even when every
  unit has the same true rates.

Rows with a missing outcome are left out; how many is stated.

References
----------
Wilson, E. B. (1927). Probable inference, the law of succession, and
statistical inference. JASA 22, 209-212.
Hanley, J. A. and McNeil, B. J. (1982). The meaning and use of the area under a
receiver operating characteristic (ROC) curve. Radiology 143, 29-36.
Youden, W. J. (1950). Index for rating diagnostic tests. Cancer 3, 32-35.
Breiman, L. (2001). Random forests. Machine Learning 45, 5-32 (permutation
importance).
Hardt, M., Price, E. and Srebro, N. (2016). Equality of opportunity in
supervised learning. Advances in Neural Information Processing Systems 29.
Efron, B. and Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
Chapman & Hall (percentile intervals).
DerSimonian, R. and Laird, N. (1986). Meta-analysis in clinical trials.
Controlled Clinical Trials 7, 177-188.
Viechtbauer, W. (2007). Confidence intervals for the amount of heterogeneity
in meta-analysis. Statistics in Medicine 26, 37-52.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
from scipy import stats as sps
from sklearn.base import clone
from sklearn.metrics import roc_curve
from sklearn.model_selection import StratifiedKFold

from sitecheck._runtime import derived_seed, generator, native_threads, stream, thread_limit
from sitecheck.errors import InputError, ParameterError
from sitecheck.analyses.heterogeneity import MIN_COUNT, SCALE, RateHeterogeneity, rate_heterogeneity
from sitecheck.analyses.leakage import LeakageResult, grouped_permutation_importance
from sitecheck.analyses.models import fit_classifier, make_booster
from sitecheck.table.prepare import Prepared
from sitecheck.analyses.probe import cross_fit
from sitecheck.analyses import stats
from sitecheck.analyses.stats import SortedScores, finite_or_none

#: Bootstrap resamples handled per vectorised block (bounds memory at block x n floats).
BOOT_BLOCK = 32

Interval = Optional[Tuple[float, float]]


_f = finite_or_none


def _ci(pair: Any) -> Optional[List[Optional[float]]]:
    if pair is None:
        return None
    lo, hi = _f(pair[0]), _f(pair[1])
    if lo is None and hi is None:
        return None
    return [lo, hi]


# --------------------------------------------------------------------------
# small statistics (shared ones come from sitecheck.analyses.stats)
# --------------------------------------------------------------------------

def _wilson(k: int, n: int) -> Interval:
    from sitecheck.analyses.stats import wilson_ci

    if n <= 0:
        return None
    return wilson_ci(int(k), int(n))


def _auc_ci(y: np.ndarray, score: np.ndarray, *, n_boot: int, random_state: int):
    """AUC and bootstrap interval (None, None when only one class is present)."""
    from sitecheck.analyses.stats import binary_auc_ci

    y = np.asarray(y, dtype=float)
    if len(y) == 0 or y.min() == y.max():
        return None, None
    auc, (lo, hi) = binary_auc_ci(y, score, n_boot=n_boot, random_state=random_state)
    return _f(auc), (_f(lo), _f(hi))


def youden_threshold(y: np.ndarray, score: np.ndarray) -> float:
    """Threshold maximising Youden's J = TPR - FPR (predict positive when score >= t).

    Reference: Youden (1950); the ROC points are scikit-learn's ``roc_curve``.
    """
    fpr, tpr, thr = roc_curve(y, score)
    j = tpr - fpr
    k = int(np.argmax(j[1:])) + 1 if len(j) > 1 else 0  # skip the +inf point
    return float(thr[k])


def site_association(X: np.ndarray, site: np.ndarray, categorical: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """A simple per-feature site-association score in [0, 1] and its p-value.

    The score is the larger of (a) the effect size of the site on the observed
    values -- epsilon-squared of the Kruskal-Wallis H for numeric columns,
    Cramer's V squared of the site x level table for categorical ones -- and
    (b) phi-squared (chi2 / n) of the site x missing table. The p-value is that
    of the larger component. Used when the leak ranking is not available.

    References: Kruskal & Wallis (1952); Tomczak & Tomczak (2014) for
    epsilon-squared = H / (n - 1); Cramer (1946).
    """
    n, p = X.shape
    score = np.zeros(p)
    pval = np.ones(p)
    labels = np.unique(site)
    for j in range(p):
        x = X[:, j]
        miss = np.isnan(x)
        best, best_p = 0.0, 1.0
        if miss.any() and not miss.all():
            tab = np.array([[np.sum(miss & (site == s)), np.sum(~miss & (site == s))] for s in labels])
            tab = tab[tab.sum(axis=1) > 0]
            if len(tab) > 1:
                chi2, pv, _, _ = sps.chi2_contingency(tab, correction=False)
                best, best_p = float(chi2 / tab.sum()), float(pv)
        obs = ~miss
        xs, ss = x[obs], site[obs]
        present = [s for s in labels if np.any(ss == s)]
        if len(present) > 1 and len(np.unique(xs)) > 1:
            if categorical[j]:
                lv = np.unique(xs)
                tab = np.array([[np.sum((ss == s) & (xs == v)) for v in lv] for s in present])
                chi2, pv, _, _ = sps.chi2_contingency(tab, correction=False)
                e = float(chi2 / (tab.sum() * (min(tab.shape) - 1)))
            else:
                h, pv = sps.kruskal(*[xs[ss == s] for s in present])
                e = float(h / (len(xs) - 1))
            if e > best:
                best, best_p = e, float(pv)
        score[j], pval[j] = min(max(best, 0.0), 1.0), best_p
    return score, pval


def _leak_from_result(leakage: Optional[LeakageResult],
                      names: Sequence[str]) -> Optional[Tuple[np.ndarray, np.ndarray]]:
    """Per-feature leak scores and interval lower bounds from the leak ranking, if it ranked any."""
    if leakage is None or not leakage.entries:
        return None
    found = {e.feature: (float(e.score), float(e.score_ci[0]) if e.score_ci[0] is not None else np.nan)
             for e in leakage.entries}
    miss = (np.nan, np.nan)
    return (np.array([found.get(n, miss)[0] for n in names], dtype=float),
            np.array([found.get(n, miss)[1] for n in names], dtype=float))


# --------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class SitePrevalence:
    """Outcome prevalence of one site: k positives of n rows, Wilson interval."""

    site: str
    k: int
    n: int
    p: Optional[float]
    ci: Interval

    def to_dict(self) -> Dict[str, Any]:
        return {"p": _f(self.p), "ci": _ci(self.ci), "n": self.n, "k": self.k}


@dataclass(frozen=True)
class HeldOutAUC:
    """AUC of the baseline model on one held-out site (trained on the others)."""

    site: str
    auc: Optional[float]
    ci: Interval
    n: int
    n_pos: int
    n_train: int

    def to_dict(self) -> Dict[str, Any]:
        return {"auc": _f(self.auc), "ci": _ci(self.ci), "n": self.n, "n_pos": self.n_pos,
                "n_train": self.n_train}


@dataclass(frozen=True)
class FeatureRisk:
    """One feature's site-leak score and outcome importance."""

    feature: str
    role: str
    leak_score: Optional[float]
    leak_rank: Optional[int]
    leak_significant: bool
    importance: float
    importance_ci: Interval
    importance_rank: int
    shortcut: bool

    def to_dict(self) -> Dict[str, Any]:
        return {"feature": self.feature, "role": self.role, "leak_score": _f(self.leak_score),
                "leak_rank": self.leak_rank,
                "leak_significant": bool(self.leak_significant), "importance": _f(self.importance),
                "importance_ci": _ci(self.importance_ci), "importance_rank": self.importance_rank,
                "shortcut": bool(self.shortcut)}


@dataclass(frozen=True)
class Rates:
    """TPR and FPR of one site or group level at the stated threshold."""

    label: str
    tpr: Optional[float]
    tpr_ci: Interval
    fpr: Optional[float]
    fpr_ci: Interval
    n: int
    n_pos: int
    n_neg: int
    tp: int
    fp: int

    def to_dict(self) -> Dict[str, Any]:
        return {"tpr": _f(self.tpr), "tpr_ci": _ci(self.tpr_ci), "fpr": _f(self.fpr),
                "fpr_ci": _ci(self.fpr_ci), "n": self.n, "n_pos": self.n_pos, "n_neg": self.n_neg}


@dataclass(frozen=True)
class EqualizedOdds:
    """Per-unit rates at one threshold, their heterogeneity against its permutation
    null (``tpr_heterogeneity``, ``fpr_heterogeneity``; None when not computed) and
    their spreads (max - min across units, with a bootstrap interval)."""

    threshold: float
    threshold_rule: str
    per_unit: Tuple[Rates, ...]
    tpr_spread: Optional[float]
    tpr_spread_ci: Interval
    fpr_spread: Optional[float]
    fpr_spread_ci: Interval
    n: int
    n_missing: int = 0
    tpr_heterogeneity: Optional[RateHeterogeneity] = None
    fpr_heterogeneity: Optional[RateHeterogeneity] = None

    def to_dict(self, key: str = "per_site") -> Dict[str, Any]:
        out = {"threshold": _f(self.threshold), "threshold_rule": self.threshold_rule,
               key: {r.label: r.to_dict() for r in self.per_unit},
               "tpr_spread": _f(self.tpr_spread), "tpr_spread_ci": _ci(self.tpr_spread_ci),
               "fpr_spread": _f(self.fpr_spread), "fpr_spread_ci": _ci(self.fpr_spread_ci),
               "spread_method": ("max - min of the observed rates over units with positives (TPR) or "
                                 "negatives (FPR); percentile interval from a site-stratified bootstrap "
                                 "(biased upward when units are small: read the heterogeneity instead)"),
               "n": self.n, "n_missing": self.n_missing}
        if self.tpr_heterogeneity is not None and self.fpr_heterogeneity is not None:
            h = self.tpr_heterogeneity
            out["heterogeneity"] = {
                "method": ("between-unit variance tau2 of each rate: DerSimonian-Laird estimate with a "
                           "Q-profile 95% interval (Viechtbauer 2007) and I2 (Higgins & Thompson 2002); "
                           "sd_rate is the standard deviation of the true rates tau2 implies; variance "
                           "(divisor k - 1) and spread (max - min) of the observed rates; null: unit labels "
                           "permuted within the outcome class (positives for TPR, negatives for FPR), "
                           "p-values (1 + #null >= observed) / (1 + permutations), p_value from Q"),
                "scale": SCALE,
                "min_count": h.min_count,
                "small_rule": (f"units with fewer than {h.min_count} positives (TPR) or negatives (FPR) are "
                               "flagged small; without_small repeats the analysis without them"),
                "permutations": h.n_permutations,
                "tpr": h.to_dict(), "fpr": self.fpr_heterogeneity.to_dict()}
        return out


@dataclass(frozen=True)
class OutcomeRisk:
    """Result of :func:`outcome_risk` (the ``report.json`` ``outcome`` section).

    ``rows`` (indices into ``prep.rows`` of the rows with an outcome),
    ``pooled_scores`` (out-of-fold probabilities) and ``loso_scores``
    (leave-one-site-out probabilities) are kept for figures; they are not part
    of ``to_dict()``.
    """

    outcome: str
    n: int
    n_missing_outcome: int
    n_positive: int
    prevalence: Tuple[SitePrevalence, ...]
    prevalence_chi2: Optional[float]
    prevalence_df: Optional[int]
    prevalence_p: Optional[float]
    site_only_auc: Optional[float]
    site_only_auc_ci: Interval
    pooled_auc: Optional[float]
    pooled_auc_ci: Interval
    loso: Tuple[HeldOutAUC, ...]
    loso_mean_auc: Optional[float]
    transport_gap: Optional[float]
    transport_gap_ci: Interval
    features: Tuple[FeatureRisk, ...]
    leak_source: str
    top_k: int
    min_importance: float
    equalized_odds: EqualizedOdds
    equalized_odds_by_group: Dict[str, EqualizedOdds]
    n_splits: int
    n_boot: int
    n_repeats: int
    importance_rows: int
    importance_n: int
    seed: int
    rows: np.ndarray = field(default=None, compare=False, repr=False)
    pooled_scores: np.ndarray = field(default=None, compare=False, repr=False)
    loso_scores: np.ndarray = field(default=None, compare=False, repr=False)

    @property
    def shortcut_candidates(self) -> Tuple[FeatureRisk, ...]:
        return tuple(f for f in self.features if f.shortcut)

    def to_dict(self) -> Dict[str, Any]:
        sites_used = sum(1 for s in self.prevalence if s.n > 0)
        return {
            "outcome": self.outcome,
            "n": self.n,
            "n_missing": self.n_missing_outcome,
            "n_pos": self.n_positive,
            "prevalence": {s.site: s.to_dict() for s in self.prevalence},
            "prevalence_test": {"method": "chi-square test of equal prevalence (sites x outcome)",
                                "chi2": _f(self.prevalence_chi2), "df": self.prevalence_df,
                                "p_value": _f(self.prevalence_p), "n": self.n, "sites": sites_used},
            "site_only_auc": _f(self.site_only_auc),
            "site_only_auc_ci": _ci(self.site_only_auc_ci),
            "site_only_n": self.n,
            "pooled_auc": _f(self.pooled_auc),
            "pooled_auc_ci": _ci(self.pooled_auc_ci),
            "pooled_n": self.n,
            "loso": {h.site: h.to_dict() for h in self.loso},
            "loso_mean_auc": _f(self.loso_mean_auc),
            "transport_gap": _f(self.transport_gap),
            "transport_gap_ci": _ci(self.transport_gap_ci),
            "transport_gap_method": ("pooled out-of-fold AUC minus the row-weighted mean of the "
                                     "leave-one-site-out AUCs; percentile interval from a "
                                     "site-stratified bootstrap of the held-out predictions"),
            "shortcut_candidates": [f.to_dict() for f in self.shortcut_candidates],
            "shortcut_rule": (f"feature in the top {self.top_k} by site-leak score (significant) and by "
                              f"outcome importance (at least {self.min_importance} AUC, interval above 0)"),
            "feature_risk": [f.to_dict() for f in self.features],
            "leak_source": self.leak_source,
            "leak_significance": ("interval of the leak score above 0" if self.leak_source == "leakage"
                                  else "Benjamini-Hochberg adjusted p-value below 0.05"),
            "equalized_odds": self.equalized_odds.to_dict("per_site"),
            "equalized_odds_by_group": {g: e.to_dict("per_group")
                                        for g, e in self.equalized_odds_by_group.items()},
            "model": "gradient boosting on features and covariates",
            "n_splits": self.n_splits,
            "n_boot": self.n_boot,
            "importance": {"method": "held-out permutation importance (AUC drop), mean over folds, "
                                     "t interval over folds",
                           "n_repeats": self.n_repeats, "rows_per_fold": self.importance_rows,
                           "n": self.importance_n, "n_folds": self.n_splits},
            "seed": self.seed,
        }


# --------------------------------------------------------------------------
# pieces
# --------------------------------------------------------------------------

def prevalence_by_site(y: np.ndarray, site: np.ndarray, labels: Sequence[str]
                       ) -> Tuple[Tuple[SitePrevalence, ...], Optional[float], Optional[int], Optional[float]]:
    """Prevalence per site with Wilson intervals, and the chi-square test of equality.

    Sites with no rows are reported with n = 0 and left out of the test. The
    test is :func:`scipy.stats.chi2_contingency` on the sites x {0, 1} table
    (no continuity correction).
    """
    y = np.asarray(y, dtype=float)
    out = []
    tab = []
    for i, lab in enumerate(labels):
        m = site == i
        n = int(m.sum())
        k = int(y[m].sum())
        out.append(SitePrevalence(site=str(lab), k=k, n=n, p=(k / n if n else None),
                                  ci=_wilson(k, n) if n else None))
        if n:
            tab.append([k, n - k])
    chi2 = df = pv = None
    t = np.array(tab)
    if len(t) > 1 and t.sum(axis=0).min() > 0:
        res = sps.chi2_contingency(t, correction=False)
        chi2, pv, df = float(res[0]), float(res[1]), int(res[2])
    return tuple(out), chi2, df, pv


def outcome_folds(y: np.ndarray, site: np.ndarray, n_splits: int, *, random_state: int):
    """Stratified folds by outcome and site (by outcome alone when a cell is too small)."""
    y = np.asarray(y).astype(int)
    strata = site.astype(np.int64) * 2 + y
    _, counts = np.unique(strata, return_counts=True)
    if counts.min() < n_splits:
        strata = y
    skf = StratifiedKFold(n_splits=n_splits, shuffle=True, random_state=random_state)
    return tuple((tr, te) for tr, te in skf.split(np.zeros(len(y)), strata))


def site_only_scores(y: np.ndarray, site: np.ndarray, folds) -> np.ndarray:
    """Out-of-fold score of each row: its site's outcome prevalence in the training folds."""
    score = np.empty(len(y))
    for tr, te in folds:
        overall = float(y[tr].mean())
        n_s = np.bincount(site[tr], minlength=int(site.max()) + 1).astype(float)
        k_s = np.bincount(site[tr], weights=y[tr], minlength=int(site.max()) + 1)
        prev = np.where(n_s > 0, k_s / np.maximum(n_s, 1), overall)
        score[te] = prev[site[te]]
    return score


def rates_at(y: np.ndarray, pred: np.ndarray, unit: np.ndarray, labels: Sequence[str], *,
             threshold: float, rule: str, spread_ci: Optional[Tuple[Interval, Interval]] = None,
             n_missing: int = 0, min_count: int = MIN_COUNT, n_permutations: Optional[int] = None,
             random_state: Any = None) -> EqualizedOdds:
    """TPR and FPR per unit (site or group level) of 0/1 predictions ``pred``.

    TPR = TP / (TP + FN) and FPR = FP / (FP + TN) per unit, Wilson intervals;
    the spreads are max - min over units with positives (TPR) or negatives
    (FPR): the equalized-odds gaps of Hardt, Price & Srebro (2016).

    With ``n_permutations`` (0 or more) and ``random_state`` (an int or a
    Generator), the heterogeneity of each rate across units is added
    (:func:`sitecheck.analyses.heterogeneity.rate_heterogeneity` on the TP and FP
    counts, ``min_count`` flagging small units); the TPR null is drawn first,
    then the FPR null, from one generator.
    """
    per = []
    for i, lab in enumerate(labels):
        m = unit == i
        yy, pp = y[m], pred[m]
        P = int(yy.sum())
        N = int(m.sum()) - P
        tp = int(np.sum((yy == 1) & (pp == 1)))
        fp = int(np.sum((yy == 0) & (pp == 1)))
        per.append(Rates(label=str(lab), tpr=tp / P if P else None, tpr_ci=_wilson(tp, P) if P else None,
                         fpr=fp / N if N else None, fpr_ci=_wilson(fp, N) if N else None,
                         n=int(m.sum()), n_pos=P, n_neg=N, tp=tp, fp=fp))
    tprs = [r.tpr for r in per if r.tpr is not None]
    fprs = [r.fpr for r in per if r.fpr is not None]
    ts = max(tprs) - min(tprs) if len(tprs) > 1 else None
    fs = max(fprs) - min(fprs) if len(fprs) > 1 else None
    tci, fci = spread_ci if spread_ci is not None else (None, None)
    th = fh = None
    if n_permutations is not None:
        rng = generator(random_state)  # a ParameterError for None: the permutation null is always seeded
        labs = [r.label for r in per]
        th = rate_heterogeneity([r.tp for r in per], [r.n_pos for r in per], labs, min_count=min_count,
                                n_permutations=n_permutations, random_state=rng)
        fh = rate_heterogeneity([r.fp for r in per], [r.n_neg for r in per], labs, min_count=min_count,
                                n_permutations=n_permutations, random_state=rng)
    return EqualizedOdds(threshold=float(threshold), threshold_rule=rule, per_unit=tuple(per),
                         tpr_spread=ts, tpr_spread_ci=tci if ts is not None else None,
                         fpr_spread=fs, fpr_spread_ci=fci if fs is not None else None,
                         n=int(len(y)), n_missing=int(n_missing), tpr_heterogeneity=th, fpr_heterogeneity=fh)


def _spreads(y, pred, unit, n_units, W) -> np.ndarray:
    """TPR and FPR spreads (max - min over units) for each row of case weights ``W``: (B, 2)."""
    U = np.zeros((len(unit), n_units))
    U[np.arange(len(unit)), unit] = 1.0
    P = (W * y) @ U
    N = (W * (1.0 - y)) @ U
    TP = (W * (y * pred)) @ U
    FP = (W * ((1.0 - y) * pred)) @ U
    out = np.full((W.shape[0], 2), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(P > 0, TP / np.where(P > 0, P, 1.0), np.nan)
        f = np.where(N > 0, FP / np.where(N > 0, N, 1.0), np.nan)
    for col, r in ((0, t), (1, f)):
        ok = np.sum(~np.isnan(r), axis=1) > 1
        if ok.any():
            out[ok, col] = np.nanmax(r[ok], axis=1) - np.nanmin(r[ok], axis=1)
    return out


def _pct(v: np.ndarray) -> Interval:
    v = v[~np.isnan(v)]
    if len(v) < 10:
        return None
    return (float(np.quantile(v, 0.025)), float(np.quantile(v, 0.975)))


def _level_label(value: Any, binary: Optional[Tuple[str, str]]) -> Optional[str]:
    """A group level as the user wrote it (binary columns were recoded to 0/1)."""
    from sitecheck.table.roles import value_label

    if binary is not None and isinstance(value, (int, float, np.integer, np.floating)) and value in (0, 1):
        return str(binary[int(value)])
    return value_label(value)


# --------------------------------------------------------------------------
# the analysis
# --------------------------------------------------------------------------

def outcome_risk(prep: Prepared, *, leakage: Optional[LeakageResult] = None, threshold: Optional[float] = None,
                 n_boot: int = 500, n_repeats: int = 3, importance_rows: int = 4000,
                 top_k: Optional[int] = None, min_importance: float = 0.01, max_iter: int = 200,
                 min_rate_count: int = MIN_COUNT, n_permutations: int = 999,
                 random_state: Optional[int] = None) -> OutcomeRisk:
    """Measure how far a model could use the site as a shortcut to the outcome.

    Parameters
    ----------
    prep : Prepared
        Must have an outcome.
    leakage : LeakageResult, optional
        The leak-ranking result (``objects["leakage"]``); its per-feature scores
        rank the site leakers. Without it, :func:`site_association` is used.
    threshold : float in (0, 1), optional
        Decision threshold on the predicted probability for the equalized-odds
        rates; default the pooled Youden point of the out-of-fold predictions.
    n_boot : int, default 500
        Bootstrap replicates for the intervals.
    n_repeats : int, default 3
        Permutations per feature and fold for the permutation importance.
    importance_rows : int, default 4000
        Held-out rows per fold used for the permutation importance (a random
        subset when a fold is larger).
    top_k : int, optional
        How high a feature must rank on both lists to be a shortcut candidate;
        default ``max(3, ceil(features / 5))``. A candidate's leak score must
        also be significant (its interval above 0, or a Benjamini-Hochberg
        adjusted p below 0.05 for the fallback score).
    min_importance : float, default 0.01
        Smallest mean drop in held-out outcome AUC for an outcome driver.
    max_iter : int, default 200
        Boosting iterations of the fallback leave-one-site-out fits (the
        cross-fits use the probe's settings, :func:`sitecheck.analyses.probe.cross_fit`).
    min_rate_count : int, default 10
        Sites (group levels) with fewer positives than this are flagged small
        for the TPR, with fewer negatives for the FPR; the heterogeneity is
        also given without them.
    n_permutations : int, default 999
        Permutations of the site (group) labels within each outcome class for
        the null of the TPR and FPR heterogeneity.
    random_state : int, optional
        Defaults to ``prep.seed``.

    Returns
    -------
    OutcomeRisk

    Notes
    -----
    The intervals of the AUCs are stratified-bootstrap percentile intervals
    with the predictions held fixed (evaluation uncertainty, not refitting).
    The transport gap and the rate spreads share one bootstrap that resamples
    rows within each site. Whether the TPR and FPR differ across sites beyond
    sampling noise is read from their heterogeneity (tau^2, Q-profile interval,
    I^2) and its permutation null, computed on the fixed out-of-fold
    predictions (no refitting). Tables with fewer than ``sitecheck._runtime.SINGLE_THREAD_BELOW`` rows
    are modelled on one thread (results do not depend on it).

    References
    ----------
    Hardt, M., Price, E. and Srebro, N. (2016). Equality of opportunity in
    supervised learning. NeurIPS 29.
    DerSimonian, R. and Laird, N. (1986). Controlled Clinical Trials 7, 177-188.
    Viechtbauer, W. (2007). Statistics in Medicine 26, 37-52.
    Youden, W. J. (1950). Index for rating diagnostic tests. Cancer 3, 32-35.
    Wilson, E. B. (1927). JASA 22, 209-212.
    Breiman, L. (2001). Random forests. Machine Learning 45, 5-32.
    """
    rows = 0 if prep.outcome is None else int(np.sum(~np.isnan(prep.outcome)))
    with thread_limit(native_threads(rows) if prep.outcome is not None else None, user_api="openmp"):
        return _outcome_risk(prep, leakage=leakage, threshold=threshold, n_boot=n_boot, n_repeats=n_repeats,
                             importance_rows=importance_rows, top_k=top_k, min_importance=min_importance,
                             max_iter=max_iter, min_rate_count=min_rate_count, n_permutations=n_permutations,
                             random_state=random_state)


def _outcome_risk(prep, *, leakage, threshold, n_boot, n_repeats, importance_rows, top_k, min_importance,
                  max_iter, min_rate_count, n_permutations, random_state) -> OutcomeRisk:
    name = prep.table.outcome or "outcome"
    if prep.outcome is None:
        raise InputError("the outcome analysis needs an outcome column; none was given", option="outcome")
    if threshold is not None:
        if not isinstance(threshold, (int, float)) or not (0.0 < float(threshold) < 1.0):
            raise ParameterError(f"threshold must be a number strictly between 0 and 1, got {threshold!r}")
    for opt, val, lo in (("n_boot", n_boot, 50), ("n_repeats", n_repeats, 1), ("importance_rows", importance_rows, 50),
                         ("min_rate_count", min_rate_count, 1), ("n_permutations", n_permutations, 0)):
        if not isinstance(val, (int, np.integer)) or isinstance(val, bool) or val < lo:
            raise ParameterError(f"{opt} must be an integer of at least {lo}, got {val!r}")
    seed = int(prep.seed if random_state is None else random_state)

    keep = ~np.isnan(prep.outcome)
    n_missing = int((~keep).sum())
    idx = np.flatnonzero(keep)
    y = prep.outcome[keep].astype(float)
    site = prep.site[keep]
    labels = prep.site_labels
    n = int(len(y))
    n_pos = int(y.sum())
    k = int(min(prep.n_splits, n_pos, n - n_pos))
    if k < 2:
        raise InputError(f"outcome column {name!r} needs at least 2 rows of each class among the "
                         f"{n} rows with an outcome; it has {n_pos} positive and {n - n_pos} negative")

    # design: features, then covariates
    X = prep.features.X[idx]
    cat = np.asarray(prep.features.categorical, dtype=bool)
    names = list(prep.features.names)
    roles = ["feature"] * len(names)
    if prep.covariates is not None:
        X = np.hstack([X, prep.covariates.X[idx]])
        cat = np.concatenate([cat, np.asarray(prep.covariates.categorical, dtype=bool)])
        names += list(prep.covariates.names)
        roles += ["covariate"] * prep.covariates.n_features
    n_feat = prep.features.n_features

    prevalence, chi2, df, pv = prevalence_by_site(y, site, labels)
    folds = outcome_folds(y, site, k, random_state=seed)

    # the shortcut ceiling: site label alone
    s_score = site_only_scores(y, site, folds)
    so_auc, so_ci = _auc_ci(y, s_score, n_boot=n_boot, random_state=derived_seed(seed, "outcome.site_only_ci"))

    # baseline model (the probe's family and settings), pooled cross-fit
    yi = y.astype(np.int64)
    pooled = cross_fit(X, yi, cat, folds, model="boosting", random_state=seed)
    X = pooled.transform(X)  # as its fold models saw it (identical unless a categorical had too many levels)
    oof = pooled.proba[:, 1]
    fold_models = pooled.models
    pooled_auc, pooled_ci = _auc_ci(y, oof, n_boot=n_boot, random_state=derived_seed(seed, "outcome.pooled"))

    # leave one site out
    loso_pred = np.full(n, np.nan)
    loso_rows = []
    site_folds = [(np.flatnonzero(site != i), np.flatnonzero(site == i)) for i in range(len(labels))]
    trainable = [len(te) > 0 and len(tr) > 0 and 0 < y[tr].sum() < len(tr) for tr, te in site_folds]
    if all(trainable):
        loso_pred = cross_fit(X, yi, cat, site_folds, model="boosting", random_state=derived_seed(seed, "outcome.pooled")).proba[:, 1]
    else:  # a held-out site whose complement has one class only: fit the others one by one
        model = make_booster(cat, random_state=derived_seed(seed, "outcome.pooled"), max_iter=max_iter)
        for i, (tr, te) in enumerate(site_folds):
            if trainable[i]:
                loso_pred[te] = fit_classifier(clone(model), X[tr], yi[tr]).predict_proba(X[te])[:, 1]
    for i, lab in enumerate(labels):
        tr, te = site_folds[i]
        if not trainable[i]:
            loso_rows.append(HeldOutAUC(site=str(lab), auc=None, ci=None, n=int(len(te)),
                                        n_pos=int(y[te].sum()), n_train=int(len(tr))))
            continue
        p = loso_pred[te]
        a, aci = _auc_ci(y[te], p, n_boot=n_boot, random_state=derived_seed(seed, "outcome.site_ci", i))
        loso_rows.append(HeldOutAUC(site=str(lab), auc=a, ci=aci, n=int(len(te)),
                                    n_pos=int(y[te].sum()), n_train=int(len(tr))))
    ok_sites = [i for i, h in enumerate(loso_rows) if h.auc is not None]
    wts = np.array([loso_rows[i].n for i in ok_sites], dtype=float)
    loso_mean = float(np.dot(wts, [loso_rows[i].auc for i in ok_sites]) / wts.sum()) if ok_sites else None
    gap = (pooled_auc - loso_mean) if (pooled_auc is not None and loso_mean is not None) else None

    # threshold and 0/1 predictions
    if threshold is None:
        thr, rule = youden_threshold(y, oof), "pooled Youden point of the out-of-fold predictions"
    else:
        thr, rule = float(threshold), "given (threshold option)"
    pred = (oof >= thr).astype(float)

    # per-group units (levels coded 0..L-1, missing -1)
    group_units: Dict[str, Tuple[np.ndarray, List[str]]] = {}
    for gname, gvals in prep.groups.items():
        gv = np.asarray(gvals, dtype=object)[idx]
        shown = np.array([_level_label(v, prep.table.binary_levels.get(gname)) for v in gv], dtype=object)
        levels = sorted({v for v in shown if v is not None})
        if not levels:
            continue
        code = {v: j for j, v in enumerate(levels)}
        group_units[str(gname)] = (np.array([code[v] if v is not None else -1 for v in shown],
                                            dtype=np.int64), levels)

    # joint site-stratified bootstrap of the held-out predictions: gap and rate spreads
    rng = stream(seed, "outcome")
    members = [np.flatnonzero(site == i) for i in range(len(labels))]
    s_oof = SortedScores(oof, y)
    s_site = {i: SortedScores(loso_pred[members[i]], y[members[i]]) for i in ok_sites}
    gaps = np.full(n_boot, np.nan)
    sp_site = np.full((n_boot, 2), np.nan)
    sp_group = {g: np.full((n_boot, 2), np.nan) for g in group_units}
    for start in range(0, n_boot, BOOT_BLOCK):
        nb = min(BOOT_BLOCK, n_boot - start)
        blk = slice(start, start + nb)
        W = np.zeros((nb, n))
        for mem in members:
            if len(mem):
                W[:, mem] = stats.resample_counts(len(mem), nb, rng)
        sp_site[blk] = _spreads(y, pred, site, len(labels), W)
        for g, (unit, levels) in group_units.items():
            sel = unit >= 0
            sp_group[g][blk] = _spreads(y[sel], pred[sel], unit[sel], len(levels), W[:, sel])
        if gap is None:
            continue
        pa = s_oof.aucs(W)
        la = np.column_stack([s_site[i].aucs(W[:, members[i]]) for i in ok_sites])  # (nb, sites)
        ww = np.column_stack([W[:, members[i]].sum(axis=1) for i in ok_sites])
        ww = np.where(np.isnan(la), 0.0, ww)
        with np.errstate(invalid="ignore", divide="ignore"):
            gaps[blk] = pa - np.nansum(la * ww, axis=1) / ww.sum(axis=1)
    gap_ci = _pct(gaps) if gap is not None else None
    # heterogeneity nulls: their own generators, so the bootstrap above is unchanged
    eo = rates_at(y, pred, site, labels, threshold=thr, rule=rule,
                  spread_ci=(_pct(sp_site[:, 0]), _pct(sp_site[:, 1])), min_count=int(min_rate_count),
                  n_permutations=int(n_permutations), random_state=stream(seed, "outcome", 2))
    eo_groups: Dict[str, EqualizedOdds] = {}
    for gi, (g, (unit, levels)) in enumerate(group_units.items()):
        sel = unit >= 0
        eo_groups[g] = rates_at(y[sel], pred[sel], unit[sel], levels, threshold=thr, rule=rule,
                                spread_ci=(_pct(sp_group[g][:, 0]), _pct(sp_group[g][:, 1])),
                                n_missing=int((~sel).sum()), min_count=int(min_rate_count),
                                n_permutations=int(n_permutations),
                                random_state=stream(seed, "outcome", 3, gi))

    # outcome drivers: held-out permutation importance per fold
    imp = np.zeros((len(folds), X.shape[1]))
    n_imp = 0
    sub_rng = stream(seed, "outcome", 1)
    singletons = [[j] for j in range(X.shape[1])]
    for f, ((tr, te), m) in enumerate(zip(folds, fold_models)):
        rows = te
        if len(rows) > importance_rows:
            rows = np.sort(sub_rng.choice(rows, size=importance_rows, replace=False))
        if y[rows].min() == y[rows].max():
            rows = te
        # scikit-learn's permutation scheme with the probe's tree-wise re-prediction (equal results)
        _, drops = grouped_permutation_importance(m, X[rows], y[rows].astype(np.int64), singletons,
                                                  n_repeats=n_repeats, random_state=derived_seed(seed, "leakage.fold_repeats", f))
        imp[f] = drops.mean(axis=1)
        n_imp += int(len(rows))
    mean_imp = imp.mean(axis=0)
    if len(folds) > 1:
        half = sps.t.ppf(0.975, len(folds) - 1) * imp.std(axis=0, ddof=1) / np.sqrt(len(folds))
    else:  # pragma: no cover - folds >= 2 always
        half = np.full(X.shape[1], np.nan)

    # site leakers
    from sitecheck.analyses.stats import bh_adjust

    got = _leak_from_result(leakage, names[:n_feat])
    if got is not None and not np.all(np.isnan(got[0])):
        leak, leak_lo = got
        leak_sig = np.nan_to_num(leak_lo, nan=-1.0) > 0
        source = "leakage"
    else:
        leak, leak_p = site_association(prep.features.X[idx], site, prep.features.categorical)
        leak_sig = bh_adjust(leak_p) < 0.05
        source = "site_association"
    K = int(top_k) if top_k is not None else max(3, math.ceil(n_feat / 5))
    leak_order = np.argsort(-np.nan_to_num(leak, nan=-np.inf), kind="stable")
    leak_rank = np.empty(n_feat, dtype=int)
    leak_rank[leak_order] = np.arange(1, n_feat + 1)
    imp_order = np.argsort(-mean_imp, kind="stable")
    imp_rank = np.empty(len(names), dtype=int)
    imp_rank[imp_order] = np.arange(1, len(names) + 1)
    feat_imp_rank = np.empty(n_feat, dtype=int)  # rank among features only (covariates are not candidates)
    fo = np.argsort(-mean_imp[:n_feat], kind="stable")
    feat_imp_rank[fo] = np.arange(1, n_feat + 1)
    risks = []
    for j, nm in enumerate(names):
        lo, hi = mean_imp[j] - half[j], mean_imp[j] + half[j]
        if j < n_feat:
            driver = bool(feat_imp_rank[j] <= K and mean_imp[j] >= min_importance and lo > 0)
            leaker = bool(leak_rank[j] <= K and leak_sig[j])
            short, ls, lr, sig = driver and leaker, _f(leak[j]), int(leak_rank[j]), bool(leak_sig[j])
        else:
            short, ls, lr, sig = False, None, None, False
        risks.append(FeatureRisk(feature=nm, role=roles[j], leak_score=ls, leak_rank=lr, leak_significant=sig,
                                 importance=float(mean_imp[j]), importance_ci=(float(lo), float(hi)),
                                 importance_rank=int(imp_rank[j]), shortcut=short))
    risks.sort(key=lambda r: (not r.shortcut, max(r.leak_rank or 10**9, r.importance_rank), r.importance_rank))

    return OutcomeRisk(
        outcome=str(name), n=n, n_missing_outcome=n_missing, n_positive=n_pos,
        prevalence=prevalence, prevalence_chi2=chi2, prevalence_df=df, prevalence_p=pv,
        site_only_auc=so_auc, site_only_auc_ci=so_ci, pooled_auc=pooled_auc, pooled_auc_ci=pooled_ci,
        loso=tuple(loso_rows), loso_mean_auc=loso_mean, transport_gap=gap, transport_gap_ci=gap_ci,
        features=tuple(risks), leak_source=source, top_k=K, min_importance=float(min_importance),
        equalized_odds=eo,
        equalized_odds_by_group=eo_groups, n_splits=k, n_boot=int(n_boot), n_repeats=int(n_repeats),
        importance_rows=int(importance_rows), importance_n=n_imp, seed=seed, rows=idx, pooled_scores=oof, loso_scores=loso_pred,
    )
