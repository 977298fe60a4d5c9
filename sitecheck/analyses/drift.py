"""Drift within each site over the collection period: when and where did a site's measurements change?

With a time column (``--time``), every site's rows are grouped by calendar period (months, or
quarters, half-years or years where a site has too few rows per month; the period used is
reported) and each feature gets a series of summaries per period: the median, a robust spread
(interquartile range), the missing share and the share of values on each artefact a
fingerprint found or a coarser recording grid (the code, the limit, the grid).

Change points
-------------
Each series is turned into one standardised value per period whose squares sum to a published
homogeneity statistic of the periods, so that under "no change" every period's value has unit
variance, whatever the units, rounding or outliers:

* level: mid-ranks of the site's values; ``z_t = sqrt(n_t) (Rbar_t - Rbar) sqrt((N-1) / (N V))``
  with ``V`` the tie-corrected variance of the ranks, so that ``sum z_t^2`` is the Kruskal-Wallis
  H of the periods (Kruskal & Wallis 1952);
* spread: normal scores of the ranks of ``|x - period median|``, standardised the same way, so that
  ``sum z_t^2`` is the Fligner-Killeen statistic (Conover, Johnson & Johnson 1981);
* missing and artefact shares: ``z_t = (k_t - n_t p) / sqrt(n_t p (1 - p))``, whose squares sum to
  Pearson's chi-square of the 2 x T table (searched only where the table meets Cochran's rule for
  the chi-square approximation).

Each standardised series is divided by an estimate of its own period-to-period noise (the root mean
square difference of neighbouring periods over ``sqrt 2``, von Neumann 1941, leaving out the largest
difference, never below 1, so that seasonal or case-mix wobble that is not a step does not raise
alarms) and segmented with PELT
(Killick, Fearnhead & Eckley 2012) as implemented by ``ruptures``, with a squared-error cost and
one penalty per change.

Penalty calibration: for a series of ``T`` periods with ``S = T - 2 m + 1`` admissible split
points (``m`` periods at least per segment), the penalty is the chi-square(1) quantile at
``1 - alpha / S`` (``alpha`` = 0.05): under no change, the gain of any single split is
chi-square(1), so by Bonferroni over the split points a series without a change yields one
with probability at most about ``alpha``. The measured rate on null series is in the
contributor guide and in ``tests/test_drift.py``.

Each change point gets a p-value: the larger of the series' scan test (its largest single-split gain,
Bonferroni over all split points; valid whatever segmentation PELT chose) and the gain at the change
point within its segment (Bonferroni over that segment's split points). P-values are adjusted by
Benjamini-Hochberg over every series searched (series without a change point count as p = 1);
a change point is a finding when the adjusted p-value is below ``alpha`` and its size is of
practical weight (0.2 SD for a level, a spread ratio of 1.25, 5 percentage points for a share).
Sizes come with 95% intervals: the difference of 20% trimmed means after minus before with
Yuen's interval (Yuen 1974) and its robust standardised form (Algina, Keselman & Penfield 2005);
a share difference with Newcombe's hybrid score interval (Newcombe 1998, method 10).

Where the change happened: a change point at one site is compared with the same series at the
other sites at the same date. When every other site covering that date changed the same way at
once, the change is network-wide (a new guideline, a shared coding change) and is not counted
as a site effect.

Period probe: within each site, a cheap linear score (ridge regression, fitted on half the rows and
scored on the other half) predicts the later half of the site's collection period from the
features, beside one from the covariates alone; the AUC
increment (with DeLong's interval for two correlated AUCs) says whether the features tell the
period apart beyond a trend in case mix. Features with a network-wide change are left out of it.

References
----------
von Neumann, J. (1941). Distribution of the ratio of the mean square successive difference to the
variance. Annals of Mathematical Statistics 12(4), 367-395.
Kruskal, W. H. & Wallis, W. A. (1952). Use of ranks in one-criterion variance analysis. JASA 47, 583-621.
Conover, W. J., Johnson, M. E. & Johnson, M. M. (1981). A comparative study of tests for homogeneity of
variances. Technometrics 23(4), 351-361.
Killick, R., Fearnhead, P. & Eckley, I. A. (2012). Optimal detection of changepoints with a linear
computational cost. JASA 107(500), 1590-1598.
Truong, C., Oudre, L. & Vayatis, N. (2020). Selective review of offline change point detection methods.
Signal Processing 167, 107299 (the ``ruptures`` library).
Yuen, K. K. (1974). The two-sample trimmed t for unequal population variances. Biometrika 61(1), 165-170.
Algina, J., Keselman, H. J. & Penfield, R. D. (2005). An alternative to Cohen's standardized mean
difference effect size. Psychological Methods 10(3), 317-328.
Newcombe, R. G. (1998). Interval estimation for the difference between independent proportions:
comparison of eleven methods. Statistics in Medicine 17, 873-890.
Cochran, W. G. (1954). Some methods for strengthening the common chi-square tests. Biometrics 10(4),
417-451.
Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate. JRSS B 57(1), 289-300.
DeLong, E. R., DeLong, D. M. & Clarke-Pearson, D. L. (1988). Comparing the areas under two or more
correlated ROC curves: a nonparametric approach. Biometrics 44(3), 837-845.

Examples
--------
>>> from sitecheck.demo import generate_demo
>>> from sitecheck.reading.intake import frame_to_raw
>>> from sitecheck.table.roles import RoleSpec, assign_roles
>>> d = generate_demo(6000, seed=7)
>>> table = assign_roles(frame_to_raw(d.frame), RoleSpec(site="hospital", time="arrival_date",
...                      covariates=("age", "sex"), identifiers=("attendance_id",), outcome="admitted_hdu"))
>>> result = drift_check(table, random_state=0)
>>> [(c.site, c.feature, c.period) for c in result.findings]
[('Aldermoor', 'potassium', '2026-04')]
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import stats as _st

from sitecheck._records import fields_dict
from sitecheck._runtime import stream
from sitecheck.errors import ParameterError

from .stats import bh_adjust, wilson_ci

#: Period units, finest first, with their length in months.
UNITS = (("month", 1), ("quarter", 3), ("half-year", 6), ("year", 12))
ASPECTS = ("level", "spread", "missing", "artefact")
SCOPES = ("site", "several_sites", "network")
#: Robust standardised mean difference: 0.642 makes it equal Cohen's d under normality with 20% trimming
#: (Algina, Keselman & Penfield 2005).
_AKP = 0.642
#: Consistency constant of the median absolute deviation for the normal distribution (common practice).
_MAD = 0.6744897501960817


from sitecheck.analyses.stats import round_sig as _r  # noqa: E402  (stable JSON rounding, shared)


# ---------------------------------------------------------------------------------------- statistics


def yuen(before: np.ndarray, after: np.ndarray, *, trim: float = 0.2, level: float = 0.95) -> Dict[str, float]:
    """Difference of trimmed means (after - before) with Yuen's interval and the robust effect size.

    Returns a dict with ``difference``, ``ci``, ``statistic``, ``df``, ``p_value`` and ``sd_units``
    (``0.642 * difference / pooled winsorised SD``, Algina et al. 2005). The statistic and degrees
    of freedom are those of ``scipy.stats.ttest_ind(after, before, trim=trim)``.
    """
    out = {}
    parts = []
    for a in (np.sort(np.asarray(before, float)), np.sort(np.asarray(after, float))):
        n = len(a)
        g = int(math.floor(trim * n))
        h = n - 2 * g
        if h < 2:
            return {"difference": None, "ci": [None, None], "statistic": None, "df": None, "p_value": None,
                    "sd_units": None}
        tm = float(a[g:n - g].mean())
        w = np.clip(a, a[g], a[n - g - 1])
        sw2 = float(w.var(ddof=1))
        d = (n - 1) * sw2 / (h * (h - 1))
        parts.append((tm, d, h, sw2, n))
    (t0, d0, h0, s0, n0), (t1, d1, h1, s1, n1) = parts
    diff = t1 - t0
    se = math.sqrt(d0 + d1)
    pooled = math.sqrt(((n0 - 1) * s0 + (n1 - 1) * s1) / (n0 + n1 - 2)) if n0 + n1 > 2 else 0.0
    if se == 0:
        return {"difference": diff, "ci": [diff, diff], "statistic": None, "df": None,
                "p_value": 1.0 if diff == 0 else 0.0, "sd_units": None if pooled == 0 else _AKP * diff / pooled}
    df = (d0 + d1) ** 2 / (d0 ** 2 / (h0 - 1) + d1 ** 2 / (h1 - 1))
    tq = float(_st.t.ppf(0.5 + level / 2, df))
    stat = diff / se
    out = {"difference": diff, "ci": [diff - tq * se, diff + tq * se], "statistic": stat, "df": df,
           "p_value": float(2 * _st.t.sf(abs(stat), df)), "sd_units": None if pooled == 0 else _AKP * diff / pooled}
    return out


def newcombe_diff(k0: int, n0: int, k1: int, n1: int, *, alpha: float = 0.05) -> Tuple[float, Tuple[float, float]]:
    """Difference of proportions ``k1/n1 - k0/n0`` with Newcombe's hybrid score interval (method 10).

    Built from the two Wilson intervals; equals
    ``statsmodels.stats.proportion.confint_proportions_2indep(k1, n1, k0, n0, method="newcomb")``.
    """
    p0, p1 = k0 / n0, k1 / n1
    l0, u0 = wilson_ci(k0, n0, alpha)
    l1, u1 = wilson_ci(k1, n1, alpha)
    d = p1 - p0
    lo = d - math.sqrt((p1 - l1) ** 2 + (u0 - p0) ** 2)
    hi = d + math.sqrt((u1 - p1) ** 2 + (p0 - l0) ** 2)
    return d, (lo, hi)


def delong(y01, scores: Sequence[np.ndarray]) -> Tuple[np.ndarray, np.ndarray]:
    """ROC AUCs of several scores of the same rows and their covariance matrix (DeLong, DeLong &
    Clarke-Pearson 1988), by mid-ranks as in Sun & Xu (2014); ties count 1/2.

    Returns ``(aucs, cov)``; ``cov[a, a] - 2 cov[a, b] + cov[b, b]`` is the variance of the
    difference of two AUCs of the same rows.

    References
    ----------
    DeLong, E. R., DeLong, D. M. & Clarke-Pearson, D. L. (1988). Comparing the areas under two or
    more correlated receiver operating characteristic curves: a nonparametric approach.
    Biometrics 44(3), 837-845.
    Sun, X. & Xu, W. (2014). Fast implementation of DeLong's algorithm for comparing the areas under
    correlated receiver operating characteristic curves. IEEE Signal Processing Letters 21(11), 1389-1393.
    """
    y = np.asarray(y01).astype(bool)
    m, n = int(y.sum()), int((~y).sum())
    if m < 2 or n < 2:
        raise ParameterError("DeLong's variance needs at least two rows of each class")
    k = len(scores)
    aucs = np.empty(k)
    V10 = np.empty((k, m))
    V01 = np.empty((k, n))
    for a, sc in enumerate(scores):
        sc = np.asarray(sc, dtype=float)
        x, z = sc[y], sc[~y]
        tx, tz = _st.rankdata(x), _st.rankdata(z)
        t_all = _st.rankdata(np.concatenate([x, z]))
        aucs[a] = (t_all[:m].sum() - m * (m + 1) / 2.0) / (m * n)
        V10[a] = (t_all[:m] - tx) / n
        V01[a] = 1.0 - (t_all[m:] - tz) / m
    cov = np.atleast_2d(np.cov(V10)) / m + np.atleast_2d(np.cov(V01)) / n
    return aucs, cov


def period_scores_level(X: np.ndarray, starts: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """Standardised mean mid-rank per period (rows sorted by period, ``starts`` = first row of each).

    Returns ``(Z, n)``: Z (T, p) with ``sum_t Z[t, j]^2`` the tie-corrected Kruskal-Wallis H of
    column j over the periods (NaN where a column has no variation), n (T, p) present values.
    """
    present = ~np.isnan(X)
    R = _ranks(X, present)
    n_t = np.add.reduceat(present.astype(np.int64), starts, axis=0).astype(float)
    S_t = np.add.reduceat(R, starts, axis=0)
    N = present.sum(axis=0).astype(float)
    ties = np.zeros(X.shape[1])
    for j in range(X.shape[1]):
        v = X[present[:, j], j]
        if len(v):
            _, c = np.unique(v, return_counts=True)
            c = c.astype(float)
            ties[j] = float(((c ** 3) - c).sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        V = (N ** 3 - N - ties) / (12.0 * N)
        scale = np.sqrt((N - 1) / (N * V))
        Z = (S_t - n_t * (N + 1) / 2.0) / np.sqrt(n_t) * scale
    Z[:, ~(V > 0)] = np.nan
    Z[n_t == 0] = np.nan
    return Z, n_t


def _ranks(X: np.ndarray, present: np.ndarray) -> np.ndarray:
    """Mid-ranks of the present values of each column (0 where missing): missing values are ranked
    last as +inf, which leaves the present values' ranks as they are."""
    R = _st.rankdata(np.where(present, X, np.inf), axis=0)
    return np.where(present, R, 0.0)


def period_scores_spread(X: np.ndarray, starts: np.ndarray, medians: np.ndarray) -> np.ndarray:
    """Standardised mean Fligner-Killeen score per period: ``sum_t Z[t, j]^2`` is the Fligner-Killeen
    statistic (deviations from each period's median), as ``scipy.stats.fligner(center="median")``."""
    present = ~np.isnan(X)
    counts = np.diff(np.append(starts, len(X)))
    D = np.abs(X - np.repeat(medians, counts, axis=0))
    R = _ranks(D, present)
    N = present.sum(axis=0).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        A = _st.norm.ppf(R / (2.0 * (N + 1.0)) + 0.5)
    A = np.where(present, A, np.nan)
    n_t = np.add.reduceat(present.astype(np.int64), starts, axis=0).astype(float)
    A0 = np.where(present, A, 0.0)
    S_t = np.add.reduceat(A0, starts, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = A0.sum(axis=0) / N
        var = (np.where(present, (A - mean) ** 2, 0.0)).sum(axis=0) / (N - 1)
        Z = (S_t - n_t * mean) / np.sqrt(n_t) / np.sqrt(var)
    Z[:, ~(var > 0)] = np.nan
    Z[n_t == 0] = np.nan
    return Z


def period_scores_share(k_t: np.ndarray, n_t: np.ndarray) -> np.ndarray:
    """Standardised count per period ``(k_t - n_t p) / sqrt(n_t p (1 - p))``; ``sum_t`` of squares is
    Pearson's chi-square of the 2 x T table. Columns with p = 0 or 1 are NaN, and so are columns whose
    table fails Cochran's rule for the chi-square approximation (every expected count at least 1, at
    most 20% of them below 5; Cochran 1954): rare events in small periods are not searched."""
    k_t = np.asarray(k_t, float)
    n_t = np.asarray(n_t, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = k_t.sum(axis=0) / n_t.sum(axis=0)
        Z = (k_t - n_t * p) / np.sqrt(n_t * p * (1 - p))
        used = n_t > 0
        e = np.concatenate([n_t * p, n_t * (1 - p)], axis=0)
        cells = np.concatenate([used, used], axis=0)
        small = ((e < 5) & cells).sum(axis=0) / np.maximum(cells.sum(axis=0), 1)
        tiny = ((e < 1) & cells).any(axis=0)
    Z[:, ~((p > 0) & (p < 1)) | tiny | (small > 0.2)] = np.nan
    Z[n_t == 0] = np.nan
    return Z


def noise_scale(Z: np.ndarray) -> np.ndarray:
    """Period-to-period noise of each row of ``Z`` (series x periods, no NaN), never below 1: the root
    mean square of the differences of neighbouring periods over ``sqrt 2`` (von Neumann's mean square
    successive difference), leaving out the largest difference so that one step does not inflate it."""
    d2 = np.sort(np.diff(Z, axis=1) ** 2, axis=1)[:, :-1]
    return np.maximum(1.0, np.sqrt(d2.mean(axis=1) / 2.0))


def penalty(n_periods: int, *, alpha: float = 0.05, min_segment: int = 2) -> float:
    """PELT penalty for a unit-variance series of ``n_periods``: the chi-square(1) quantile at
    ``1 - alpha / S``, S = admissible split points (Bonferroni over the splits)."""
    splits = max(1, n_periods - 2 * min_segment + 1)
    return float(_st.chi2.isf(alpha / splits, 1))


def split_gains(Z: np.ndarray, min_segment: int = 2) -> np.ndarray:
    """Cost reduction of splitting each row of ``Z`` in two at every admissible point (squared-error
    cost), shape (series, T - 2 m + 1); column i is the split before period ``m + i``."""
    T = Z.shape[1]
    cs = np.cumsum(Z, axis=1)
    S = cs[:, -1:]
    k = np.arange(min_segment, T - min_segment + 1)
    left = cs[:, k - 1]
    return left ** 2 / k + (S - left) ** 2 / (T - k) - S ** 2 / T


def pair_gains_max(Z: np.ndarray, min_segment: int = 2) -> np.ndarray:
    """Largest cost reduction of splitting each row of ``Z`` in three (two change points)."""
    T = Z.shape[1]
    cs = np.concatenate([np.zeros((Z.shape[0], 1)), np.cumsum(Z, axis=1)], axis=1)
    S = cs[:, -1]
    best = np.full(Z.shape[0], -np.inf)
    for a in range(min_segment, T - 2 * min_segment + 1):
        b = np.arange(a + min_segment, T - min_segment + 1)
        s1 = cs[:, a][:, None]
        s2 = cs[:, b] - s1
        s3 = S[:, None] - cs[:, b]
        g = s1 ** 2 / a + s2 ** 2 / (b - a) + s3 ** 2 / (T - b) - (S ** 2 / T)[:, None]
        best = np.maximum(best, g.max(axis=1))
    return best


def segment(z: np.ndarray, *, alpha: float = 0.05, min_segment: int = 2) -> Tuple[List[int], float]:
    """Change points of one unit-variance series with ruptures' PELT (``model="l2"``, ``jump=1``)
    at the calibrated penalty; returns (indices of the first period after each change, penalty)."""
    import ruptures as rpt

    pen = penalty(len(z), alpha=alpha, min_segment=min_segment)
    if len(z) < 2 * min_segment:
        return [], pen
    bkps = rpt.Pelt(model="l2", min_size=min_segment, jump=1).fit(np.asarray(z, float).reshape(-1, 1)).predict(pen=pen)
    return [int(b) for b in bkps[:-1]], pen


def local_pvalue(z: np.ndarray, a: int, t: int, b: int, min_segment: int = 2) -> Tuple[float, float]:
    """Gain of splitting ``z[a:b]`` at ``t`` and its p-value, Bonferroni over the segment's admissible
    split points (the split was chosen from them)."""
    seg = z[a:b]
    n = len(seg)
    k = t - a
    s1, s = seg[:k].sum(), seg.sum()
    gain = s1 ** 2 / k + (s - s1) ** 2 / (n - k) - s ** 2 / n
    splits = max(1, n - 2 * min_segment + 1)
    return float(gain), float(min(1.0, splits * _st.chi2.sf(gain, 1)))


# ---------------------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ChangePoint:
    """One change in one site's series of one feature.

    Attributes
    ----------
    site, feature : str
    aspect : str
        ``level``, ``spread``, ``missing`` or ``artefact``.
    artefact : str or None
        The artefact whose share changed (aspect ``artefact``), e.g. "values on a 0.5 grid".
    date : str
        First day of the first period after the change (YYYY-MM-DD).
    period : str
        Its label (``2026-01``, ``2026-Q1``, ``2026-H1``, ``2026``).
    before, after : dict
        Summaries of the segments either side (rows, median or share).
    size : float
        Level: difference of 20% trimmed means (after - before, the feature's units); spread: ratio
        of winsorised SDs; shares: difference of shares.
    size_ci : list
        95% interval of ``size`` (Yuen; Newcombe for shares; none for the spread ratio).
    size_sd : float or None
        Level only: the robust standardised difference (Algina et al. 2005).
    p_value, p_adj : float
        Bonferroni over the segment's split points; Benjamini-Hochberg over every series searched.
    scope : str
        ``site`` (no other site changed at that date), ``several_sites`` or ``network`` (every other
        site covering the date changed the same way at once).
    other_sites : dict
        Site -> ``{"changed", "p_value", "direction"}`` at the same date (or ``{"covered": False}``).
    artefacts : list
        Artefacts that appeared or vanished across this change point.
    finding : bool
        Significant after adjustment, of practical size, and not network-wide.
    detail : str
    """

    site: str
    feature: str
    aspect: str
    artefact: Optional[str]
    date: str
    period: str
    before: Dict[str, Any]
    after: Dict[str, Any]
    size: Optional[float]
    size_ci: List[Optional[float]]
    size_sd: Optional[float]
    p_value: float
    p_adj: float
    scope: str
    other_sites: Dict[str, Any]
    artefacts: List[Dict[str, Any]]
    finding: bool
    detail: str
    practical: bool = True
    gain: float = 0.0
    noise: float = 1.0

    def to_dict(self) -> dict:
        return {"site": self.site, "feature": self.feature, "aspect": self.aspect, "artefact": self.artefact,
                "date": self.date, "period": self.period, "before": self.before, "after": self.after,
                "size": _r(self.size), "size_ci": [_r(v) for v in self.size_ci], "size_sd": _r(self.size_sd),
                "p_value": _r(self.p_value), "p_adj": _r(self.p_adj), "scope": self.scope,
                "other_sites": self.other_sites, "artefacts": self.artefacts, "finding": bool(self.finding),
                "practical": bool(self.practical), "detail": self.detail}


@dataclass(frozen=True)
class SiteSeries:
    """One site's periods and per-feature summaries.

    ``features`` maps a feature to ``{"median", "spread", "q1", "q3", "missing", "n", "level_sd",
    "artefacts"}`` lists over ``periods`` (None where a period has fewer than ``min_values`` values);
    ``spread`` is the interquartile range ``q3 - q1``; ``level_sd`` is ``(median_t - site median) /
    site robust SD`` (IQR / 1.349; for the heatmap).
    """

    site: str
    unit: str
    periods: Tuple[str, ...]
    starts: Tuple[str, ...]
    n: Tuple[int, ...]
    dropped: Dict[str, int]
    features: Dict[str, Dict[str, Any]]
    assessed: bool = True
    reason: str = ""

    def to_dict(self) -> dict:
        return {"site": self.site, "unit": self.unit, "assessed": self.assessed, "reason": self.reason,
                "periods": list(self.periods), "starts": list(self.starts), "n": [int(v) for v in self.n],
                "dropped_periods": dict(self.dropped), "features": self.features}


@dataclass(frozen=True)
class PeriodProbe:
    """Can a site's later half of the collection period be told from the earlier from its features,
    beyond the covariates?"""

    site: str
    n: int
    split_date: str
    auc: Optional[float]
    auc_ci: List[Optional[float]]
    covariate_auc: Optional[float]
    covariate_auc_ci: List[Optional[float]]
    increment: Optional[float]
    increment_ci: List[Optional[float]]
    increment_ci_adjusted: List[Optional[float]]
    flagged: bool
    left_out: Tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return fields_dict(self, number=_r)


@dataclass(frozen=True)
class DriftResult:
    """Drift within each site over the collection period (see the module docstring).

    Attributes
    ----------
    time_column : str
    sites : tuple of SiteSeries
    change_points : tuple of ChangePoint
        Every change point PELT found (findings and the rest), sorted by p-value.
    network : list of dict
        Network-wide changes: feature, aspect, date and the sites that changed together.
    probes : tuple of PeriodProbe
    n_series : int
        Series searched (the Benjamini-Hochberg family).
    calibration : dict
        How the penalty was set (the statement the report prints).
    params : dict
    time_notes : dict
        Per site: rows, rows with and without a usable date, first and last date.
    """

    time_column: str
    sites: Tuple[SiteSeries, ...]
    change_points: Tuple[ChangePoint, ...]
    network: List[Dict[str, Any]]
    probes: Tuple[PeriodProbe, ...]
    n_series: int
    calibration: Dict[str, Any]
    params: Dict[str, Any]
    time_notes: Dict[str, Any] = field(default_factory=dict)
    top_features: Tuple[str, ...] = ()

    @property
    def findings(self) -> List[ChangePoint]:
        return [c for c in self.change_points if c.finding]

    def to_dict(self) -> dict:
        return {"time_column": self.time_column, "n_series": int(self.n_series),
                "findings": [c.to_dict() for c in self.findings],
                "change_points": [c.to_dict() for c in self.change_points],
                "network": self.network, "period_probe": [p.to_dict() for p in self.probes],
                "sites": [s.to_dict() for s in self.sites], "top_features": list(self.top_features),
                "calibration": self.calibration, "params": self.params,
                "time_notes": {site: {"counts": {k: note[k] for k in ("rows", "dated", "without_date", "implausible")
                                                 if k in note},
                                      **{k: v for k, v in note.items()
                                         if k not in ("rows", "dated", "without_date", "implausible")}}
                               for site, note in self.time_notes.items()}}


# ---------------------------------------------------------------------------------------- periods


def _label(code: int, unit: str) -> str:
    months = dict(UNITS)[unit]
    m0 = code * months
    year, month = divmod(m0, 12)
    if unit == "month":
        return f"{year:04d}-{month + 1:02d}"
    if unit == "quarter":
        return f"{year:04d}-Q{month // 3 + 1}"
    if unit == "half-year":
        return f"{year:04d}-H{month // 6 + 1}"
    return f"{year:04d}"


def _start(code: int, unit: str) -> str:
    year, month = divmod(code * dict(UNITS)[unit], 12)
    return f"{year:04d}-{month + 1:02d}-01"


def choose_unit(month_codes: np.ndarray, *, min_period_rows: int = 30, min_periods: int = 6,
                unit: str = "auto") -> Tuple[Optional[str], str]:
    """The finest period unit with at least ``min_period_rows`` rows per period on average over the
    site's span and at least ``min_periods`` periods; (None, reason) when none has."""
    if len(month_codes) == 0:
        return None, "no dated rows"
    units = UNITS if unit == "auto" else [u for u in UNITS if u[0] == unit]
    for name, months in units:
        codes = month_codes // months
        span = int(codes.max() - codes.min() + 1)
        if span < min_periods:
            continue
        if len(month_codes) / span >= min_period_rows:
            return name, ""
    span_m = int(month_codes.max() - month_codes.min() + 1)
    return None, (f"{len(month_codes)} dated rows over {span_m} month(s): fewer than {min_period_rows} rows per "
                  f"period with at least {min_periods} periods")


# ---------------------------------------------------------------------------------------- artefacts


def _on_grid(X: np.ndarray, step: float) -> np.ndarray:
    r = X / step
    return np.abs(r - np.round(r)) < 1e-6 + 1e-9 * np.abs(r)


def _artefacts_for(values: np.ndarray, feature: str, fingerprints) -> List[Tuple[str, str, float]]:
    """(key, label, value) of the artefacts whose share is followed for one feature: two coarser
    grids than the feature's finest common one, and each fingerprint's code, limit or grid."""
    from sitecheck.analyses.fingerprints import grid_step

    out: List[Tuple[str, str, float]] = []
    v = values[~np.isnan(values)]
    g = grid_step(v) if len(v) else None
    if g is not None:
        for k in (5, 10):
            out.append((f"grid:{g * k:g}", f"values on a {g * k:g} grid", float(g * k)))
    for f in (getattr(fingerprints, "findings", None) or ()):
        if f.feature != feature:
            continue
        ev = f.evidence or {}
        if f.kind == "missing_code" and ev.get("value") is not None:
            out.append((f"code:{float(ev['value']):g}", f"code {float(ev['value']):g}", float(ev["value"])))
        elif f.kind in ("floor", "ceiling") and ev.get("limit") is not None:
            word = "lower" if f.kind == "floor" else "upper"
            out.append((f"{f.kind}:{float(ev['limit']):g}", f"values at the {word} limit {float(ev['limit']):g}",
                        float(ev["limit"])))
        elif f.kind == "precision" and ev.get("grid") is not None:
            out.append((f"grid:{float(ev['grid']):g}", f"values on a {float(ev['grid']):g} grid", float(ev["grid"])))
    seen, uniq = set(), []
    for a in out:
        if a[0] not in seen:
            seen.add(a[0])
            uniq.append(a)
    return uniq


def _artefact_mask(X: np.ndarray, key: str, value: float) -> np.ndarray:
    kind = key.split(":", 1)[0]
    if kind == "grid":
        return _on_grid(X, value)
    return np.isclose(X, value, rtol=0, atol=1e-9 * max(1.0, abs(value)))


# ---------------------------------------------------------------------------------------- main


@dataclass
class _Series:
    site: str
    feature: str
    aspect: str
    artefact: Optional[str]
    label: Optional[str]
    z: np.ndarray            # over the site's kept periods (NaN where excluded)
    col: int                 # column in the site's matrix
    value: float = float("nan")


def _table_of(data):
    return getattr(data, "table", data)


def drift_check(data, *, fingerprints=None, unit: str = "auto", min_period_rows: int = 30,
                min_periods: int = 6, min_values: int = 5, min_segment: int = 2, alpha: float = 0.05,
                min_smd: float = 0.2, min_sd_ratio: float = 1.25, min_share_change: float = 0.05,
                probe: bool = True, probe_max_rows: int = 10_000, random_state=0) -> DriftResult:
    """Find when and where each site's measurements changed over the collection period.

    Parameters
    ----------
    data : Prepared or Table
        A table with a time column (``RoleSpec(time=...)``).
    fingerprints : FingerprintResult, optional
        Its codes, limits and grids are followed over time too.
    unit : {"auto", "month", "quarter", "half-year", "year"}, default "auto"
        "auto": months, or the finest coarser unit where a site has fewer than
        ``min_period_rows`` rows per month.
    min_period_rows : int, default 30
    min_periods : int, default 6
        Sites with fewer periods are not assessed.
    min_values : int, default 5
        A period with fewer values of a feature is left out of that feature's series.
    min_segment : int, default 2
        Fewest periods on either side of a change point.
    alpha : float, default 0.05
        Penalty calibration (per-series false-alarm bound) and the Benjamini-Hochberg level.
    min_smd, min_sd_ratio, min_share_change : float
        Practical size of a level change (robust SD units), a spread ratio, a share change.
    probe : bool, default True
        Run the period probe.
    probe_max_rows : int, default 10000
        Rows per site for the period probe (a seeded subsample above it).
    random_state : int
        Seed of the period probe's folds and subsample (the change points use no randomness).

    Returns
    -------
    DriftResult

    Raises
    ------
    ParameterError
        Invalid parameters, or a table without a time column.

    Examples
    --------
    See the module docstring.
    """
    table = _table_of(data)
    if getattr(table, "time", None) is None:
        raise ParameterError("drift_check needs a table with a time column (RoleSpec(time=...))")
    if unit not in ("auto",) + tuple(u for u, _ in UNITS):
        raise ParameterError(f"unit must be 'auto' or one of {[u for u, _ in UNITS]}, got {unit!r}")
    for nm, val, lo in (("min_period_rows", min_period_rows, 1), ("min_periods", min_periods, 4),
                        ("min_values", min_values, 2), ("min_segment", min_segment, 1),
                        ("probe_max_rows", probe_max_rows, 100)):
        if not isinstance(val, (int, np.integer)) or isinstance(val, bool) or val < lo:
            raise ParameterError(f"{nm} must be an integer of at least {lo}, got {val!r}")
    if not (0 < alpha < 1):
        raise ParameterError(f"alpha must lie in (0, 1), got {alpha!r}")
    if isinstance(random_state, bool) or not isinstance(random_state, (int, np.integer)):
        raise ParameterError("random_state must be an integer seed")
    frame = table.frame
    tcol = table.time
    feats = list(table.features)
    kinds = {f: table.kind(f) for f in feats}
    num = [f for f in feats if kinds[f] in ("numeric", "binary")]
    cat = [f for f in feats if kinds[f] == "categorical"]
    Xall = frame[num].to_numpy(dtype=float, na_value=np.nan) if num else np.empty((len(frame), 0))
    Mcat = frame[cat].isna().to_numpy() if cat else np.empty((len(frame), 0), dtype=bool)
    site_all = frame[table.site].to_numpy(dtype=object)
    t = pd.to_datetime(frame[tcol])
    dated = t.notna().to_numpy()
    month_code = np.full(len(frame), -1, dtype=np.int64)
    month_code[dated] = (t[dated].dt.year.to_numpy() * 12 + t[dated].dt.month.to_numpy() - 1).astype(np.int64)
    artefacts = {f: _artefacts_for(Xall[:, j], f, fingerprints) for j, f in enumerate(num)}

    import warnings

    sites: List[SiteSeries] = []
    series: List[_Series] = []
    ctx: Dict[str, Dict[str, Any]] = {}
    with warnings.catch_warnings():  # a feature never recorded at a site has all-NaN summaries there
        warnings.simplefilter("ignore", RuntimeWarning)
        _site_series(table, Xall, Mcat, num, cat, kinds, site_all, dated, month_code, artefacts, unit,
                     min_period_rows, min_periods, min_values, sites, series, ctx)
    return _search(table, t, Xall, num, site_all, dated, artefacts, sites, series, ctx, unit=unit,
                   min_period_rows=min_period_rows, min_periods=min_periods, min_values=min_values,
                   min_segment=min_segment, alpha=alpha, min_smd=min_smd, min_sd_ratio=min_sd_ratio,
                   min_share_change=min_share_change, probe=probe, probe_max_rows=probe_max_rows,
                   random_state=random_state)


def _site_series(table, Xall, Mcat, num, cat, kinds, site_all, dated, month_code, artefacts, unit,
                 min_period_rows, min_periods, min_values, sites, series, ctx) -> None:
    """Periods and per-period summaries and standardised scores of every site (fills the lists)."""
    for lab in table.site_labels:
        idx = np.flatnonzero((site_all == lab) & dated)
        unit_s, reason = choose_unit(month_code[idx], min_period_rows=min_period_rows, min_periods=min_periods,
                                     unit=unit)
        if unit_s is None:
            sites.append(SiteSeries(lab, "", (), (), (), {}, {}, assessed=False, reason=reason))
            continue
        months = dict(UNITS)[unit_s]
        codes = month_code[idx] // months
        order = np.argsort(codes, kind="stable")
        idx, codes = idx[order], codes[order]
        uniq, first, counts = np.unique(codes, return_index=True, return_counts=True)
        keep_p = counts >= max(min_values, min_period_rows // 3)
        dropped = {_label(int(c), unit_s): int(n) for c, n, k in zip(uniq, counts, keep_p) if not k}
        rows_keep = np.repeat(keep_p, counts)
        idx, codes = idx[rows_keep], codes[rows_keep]
        uniq, first, counts = np.unique(codes, return_index=True, return_counts=True)
        if len(uniq) < min_periods:
            sites.append(SiteSeries(lab, unit_s, (), (), (), dropped, {}, assessed=False,
                                    reason=f"{len(uniq)} periods with enough rows (fewer than {min_periods})"))
            continue
        X = Xall[idx]
        starts = first.astype(np.int64)
        T = len(uniq)
        present = ~np.isnan(X)
        n_pres = np.add.reduceat(present.astype(np.int64), starts, axis=0) if num else np.zeros((T, 0))
        few = n_pres < min_values
        # summaries for the report (pandas' cythonised group medians and quantiles)
        g = pd.DataFrame(X, columns=num).groupby(np.repeat(np.arange(T), counts))
        med = g.median().to_numpy() if num else np.zeros((T, 0))
        q1 = g.quantile(0.25).to_numpy() if num else np.zeros((T, 0))
        q3 = g.quantile(0.75).to_numpy() if num else np.zeros((T, 0))
        site_med = np.nanmedian(X, axis=0) if num and len(X) else np.zeros(0)
        with np.errstate(invalid="ignore"):
            site_iqr = (np.nanquantile(X, 0.75, axis=0) - np.nanquantile(X, 0.25, axis=0)) if num else np.zeros(0)
            site_sd = np.nanstd(X, axis=0) if num else np.zeros(0)
        robust_sd = np.where(site_iqr > 0, site_iqr / 1.349, site_sd)
        Zl, _ = period_scores_level(X, starts) if num else (np.zeros((T, 0)), None)
        is_num = np.array([kinds[f] == "numeric" for f in num], dtype=bool)
        Zs = period_scores_spread(X, starts, med) if num else np.zeros((T, 0))
        miss_k = np.add.reduceat((~present).astype(np.int64), starts, axis=0) if num else np.zeros((T, 0))
        Zm = period_scores_share(miss_k, np.repeat(counts[:, None], len(num), axis=1)) if num else np.zeros((T, 0))
        Mc = Mcat[idx]
        miss_c = np.add.reduceat(Mc.astype(np.int64), starts, axis=0) if cat else np.zeros((T, 0))
        Zmc = period_scores_share(miss_c, np.repeat(counts[:, None], len(cat), axis=1)) if cat else np.zeros((T, 0))
        art_k: Dict[Tuple[int, str], np.ndarray] = {}
        feat_doc: Dict[str, Dict[str, Any]] = {}
        for j, f in enumerate(num):
            ok = ~few[:, j]
            fd = {"n": [int(v) for v in n_pres[:, j]],
                  "median": [_r(v, 5) if o else None for v, o in zip(med[:, j], ok)],
                  "spread": [_r(v, 5) if o else None for v, o in zip(q3[:, j] - q1[:, j], ok)],
                  "q1": [_r(v, 5) if o else None for v, o in zip(q1[:, j], ok)],
                  "q3": [_r(v, 5) if o else None for v, o in zip(q3[:, j], ok)],
                  "missing": [_r(v, 4) for v in miss_k[:, j] / counts],
                  "level_sd": [(_r((v - site_med[j]) / robust_sd[j], 4) if o and robust_sd[j] > 0 else None)
                               for v, o in zip(med[:, j], ok)],
                  "artefacts": {}}
            z = np.where(ok, Zl[:, j], np.nan)
            series.append(_Series(lab, f, "level", None, None, z, j))
            if is_num[j]:
                series.append(_Series(lab, f, "spread", None, None, np.where(ok, Zs[:, j], np.nan), j))
            series.append(_Series(lab, f, "missing", None, None, Zm[:, j], j))
            for key, label, value in artefacts[f]:
                on = _artefact_mask(X[:, j], key, value) & present[:, j]
                k_t = np.add.reduceat(on.astype(np.int64), starts)
                art_k[(j, key)] = k_t
                with np.errstate(invalid="ignore", divide="ignore"):
                    share = k_t / n_pres[:, j]
                fd["artefacts"][label] = [_r(v, 4) if o else None for v, o in zip(share, ok)]
                zk = period_scores_share(np.where(ok, k_t, 0)[:, None], np.where(ok, n_pres[:, j], 0)[:, None])[:, 0]
                series.append(_Series(lab, f, "artefact", key, label, np.where(ok, zk, np.nan), j, value))
            feat_doc[f] = fd
        for j, f in enumerate(cat):
            feat_doc[f] = {"n": [int(v) for v in counts - miss_c[:, j]],
                           "missing": [_r(v, 4) for v in miss_c[:, j] / counts]}
            series.append(_Series(lab, f, "missing", None, None, Zmc[:, j], len(num) + j))
        sites.append(SiteSeries(lab, unit_s, tuple(_label(int(c), unit_s) for c in uniq),
                                tuple(_start(int(c), unit_s) for c in uniq), tuple(int(c) for c in counts),
                                dropped, feat_doc))
        ctx[lab] = {"X": X, "Mc": Mc, "starts": starts, "counts": counts, "codes": uniq, "unit": unit_s,
                    "present": present, "n_pres": n_pres, "art_k": art_k}



def _search(table, t, Xall, num, site_all, dated, artefacts, sites, series, ctx, *, unit, min_period_rows,
            min_periods, min_values, min_segment, alpha, min_smd, min_sd_ratio, min_share_change, probe,
            probe_max_rows, random_state) -> DriftResult:
    """Screen every series at once, run PELT where a change could be, describe and scope the changes."""
    tcol = table.time
    cand: List[Dict[str, Any]] = []
    fitted: Dict[int, Dict[str, Any]] = {}
    by_len: Dict[Tuple[str, int], List[int]] = {}
    for i, s in enumerate(series):
        valid = np.flatnonzero(np.isfinite(s.z))
        if len(valid) < max(min_periods, 2 * min_segment):
            continue
        by_len.setdefault((s.site, len(valid)), []).append(i)
    n_series = sum(len(v) for v in by_len.values())
    for (lab, T), members in by_len.items():
        Z = np.vstack([series[i].z[np.isfinite(series[i].z)] for i in members])
        sig = noise_scale(Z)
        Zn = Z / sig[:, None]
        pen = penalty(T, alpha=alpha, min_segment=min_segment)
        g1 = split_gains(Zn, min_segment).max(axis=1)
        g2 = pair_gains_max(Zn, min_segment) if T >= 3 * min_segment else np.full(len(members), -np.inf)
        for r, i in enumerate(members):
            fitted[i] = {"z": Zn[r], "noise": float(sig[r]), "valid": np.flatnonzero(np.isfinite(series[i].z)),
                         "penalty": pen}
            if g1[r] <= pen and g2[r] <= 2 * pen:
                continue
            bkps, _ = segment(Zn[r], alpha=alpha, min_segment=min_segment)
            bounds = [0] + bkps + [T]
            # the series' own scan test (largest single split, Bonferroni over the splits) is valid
            # whatever PELT chose; each change point's p-value is at least that
            p_series = float(min(1.0, (T - 2 * min_segment + 1) * _st.chi2.sf(g1[r], 1)))
            for k, b in enumerate(bkps):
                gain, p = local_pvalue(Zn[r], bounds[k], b, bounds[k + 2], min_segment)
                cand.append({"series": i, "t": b, "a": bounds[k], "b": bounds[k + 2], "gain": gain,
                             "p": max(p, p_series)})
    pvals = np.array([c["p"] for c in cand] + [1.0] * max(0, n_series - len(cand)))
    padj = bh_adjust(pvals)[:len(cand)] if len(cand) else np.array([])

    # -- describe each change point ---------------------------------------------------------------
    described: List[Dict[str, Any]] = []
    for c, pa in zip(cand, padj):
        s = series[c["series"]]
        info = ctx[s.site]
        fit = fitted[c["series"]]
        valid = fit["valid"]
        pa_, pt, pb = valid[c["a"]], valid[c["t"]], valid[c["b"] - 1] + 1  # period indices [pa_, pt) and [pt, pb)
        starts, counts = info["starts"], info["counts"]
        r0, r1, r2 = starts[pa_], starts[pt], (starts[pb] if pb < len(starts) else len(info["X"]))
        d = _describe(s, info, r0, r1, r2, artefacts, num, min_share_change)
        code = int(info["codes"][pt])
        d.update({"series": c["series"], "p": c["p"], "p_adj": float(pa), "gain": c["gain"],
                  "date": _start(code, info["unit"]), "period": _label(code, info["unit"]),
                  "direction": float(np.sign(fit["z"][c["t"]:c["b"]].mean() - fit["z"][c["a"]:c["t"]].mean()))})
        if s.aspect == "level":
            d["practical"] = d["size_sd"] is not None and abs(d["size_sd"]) >= min_smd
        elif s.aspect == "spread":
            d["practical"] = d["size"] is not None and (d["size"] >= min_sd_ratio or d["size"] <= 1 / min_sd_ratio)
        else:
            d["practical"] = d["size"] is not None and abs(d["size"]) >= min_share_change
        described.append(d)

    # -- one site or the whole network? -----------------------------------------------------------
    index = {(s.site, s.feature, s.aspect, s.artefact): i for i, s in enumerate(series)}
    change_points: List[ChangePoint] = []
    for d in described:
        s = series[d["series"]]
        others: Dict[str, Any] = {}
        for lab in table.site_labels:
            if lab == s.site:
                continue
            j = index.get((lab, s.feature, s.aspect, s.artefact))
            if j is None or j not in fitted:
                others[lab] = {"covered": False}
                continue
            others[lab] = _same_date(series[j], fitted[j], ctx[lab], d, described, series, min_segment)
        covering = [o for o in others.values() if o.get("covered")]
        changed = [o for o in covering if o.get("changed")]
        if covering and len(changed) == len(covering):
            scope = "network"  # every other site covering the date changed the same way (each p < 0.05)
        elif any(o.get("own_change_point") or (o.get("p_value") or 1.0) < 0.05 / len(covering) for o in changed):
            scope = "several_sites"  # some did (Bonferroni over the other sites)
        else:
            scope = "site"
        finding = bool(d["p_adj"] < alpha and d["practical"] and scope != "network")
        change_points.append(ChangePoint(
            site=s.site, feature=s.feature, aspect=s.aspect, artefact=s.label, date=d["date"], period=d["period"],
            before=d["before"], after=d["after"], size=d["size"], size_ci=d["size_ci"], size_sd=d["size_sd"],
            p_value=d["p"], p_adj=d["p_adj"], scope=scope, other_sites=others, artefacts=d["artefacts"],
            finding=finding, detail=_detail(s, d, scope), practical=d["practical"], gain=d["gain"],
            noise=fitted[d["series"]]["noise"]))
    change_points.sort(key=lambda c: (c.p_adj, c.p_value, c.site, c.feature, c.aspect, c.artefact or "", c.date))
    network = _network_groups(change_points, alpha)
    net_feats = sorted({c.feature for c in change_points if c.scope == "network" and c.p_adj < alpha})
    probes = tuple(_period_probes(table, idx_by_site={lab: np.flatnonzero((site_all == lab) & dated)
                                                      for lab in ctx}, num=num, t=t, alpha=alpha,
                                  max_rows=probe_max_rows, seed=int(random_state),
                                  left_out=net_feats)) if probe else ()
    top = _top_features(change_points, series, fitted, num)
    calibration = {
        "penalty": "chi-square(1) quantile at 1 - alpha / S for S admissible split points (Bonferroni over the "
                   "splits of a unit-variance series)",
        "alpha": float(alpha),
        "noise": "each standardised series divided by max(1, root mean square difference of neighbouring "
                 "periods (largest left out) / sqrt 2)",
        "family": f"Benjamini-Hochberg over {n_series} series searched",
        "penalty_by_periods": {str(T): _r(penalty(T, alpha=alpha, min_segment=min_segment))
                               for T in sorted({T for _, T in by_len})},
    }
    params = {"unit": unit, "min_period_rows": int(min_period_rows), "min_periods": int(min_periods),
              "min_values": int(min_values), "min_segment": int(min_segment), "alpha": float(alpha),
              "min_smd": float(min_smd), "min_sd_ratio": float(min_sd_ratio),
              "min_share_change": float(min_share_change), "probe_max_rows": int(probe_max_rows),
              "search": "ruptures.Pelt(model='l2', jump=1)"}
    return DriftResult(time_column=tcol, sites=tuple(sites), change_points=tuple(change_points), network=network,
                       probes=probes, n_series=int(n_series), calibration=calibration, params=params,
                       time_notes=dict(getattr(table, "time_notes", {}) or {}), top_features=tuple(top))


def _describe(s: _Series, info: Dict[str, Any], r0: int, r1: int, r2: int, artefacts, num, min_share_change):
    """Sizes either side of a change point (rows [r0, r1) before, [r1, r2) after)."""
    out: Dict[str, Any] = {"size_sd": None, "size_ci": [None, None], "artefacts": []}
    if s.aspect == "missing":
        M = (np.isnan(info["X"][:, s.col]) if s.col < len(num) else info["Mc"][:, s.col - len(num)])
        k0, n0 = int(M[r0:r1].sum()), r1 - r0
        k1, n1 = int(M[r1:r2].sum()), r2 - r1
        diff, ci = newcombe_diff(k0, n0, k1, n1)
        out.update(size=diff, size_ci=[ci[0], ci[1]], before={"n": n0, "share": _r(k0 / n0, 4)},
                   after={"n": n1, "share": _r(k1 / n1, 4)})
        return out
    x = info["X"][:, s.col]
    b, a = x[r0:r1], x[r1:r2]
    b, a = b[~np.isnan(b)], a[~np.isnan(a)]
    out["before"] = {"n": int(len(b)), "median": _r(np.median(b)) if len(b) else None}
    out["after"] = {"n": int(len(a)), "median": _r(np.median(a)) if len(a) else None}
    if s.aspect == "level":
        y = yuen(b, a)
        out.update(size=y["difference"], size_ci=list(y["ci"]), size_sd=y["sd_units"])
    elif s.aspect == "spread":
        wb, wa = _winsorised_sd(b), _winsorised_sd(a)
        out.update(size=(wa / wb) if wb > 0 else None)
        out["before"]["spread"] = _r(wb)
        out["after"]["spread"] = _r(wa)
    else:
        ob, oa = _artefact_mask(b, s.artefact, s.value), _artefact_mask(a, s.artefact, s.value)
        diff, ci = newcombe_diff(int(ob.sum()), len(b), int(oa.sum()), len(a))
        out.update(size=diff, size_ci=[ci[0], ci[1]])
        out["before"]["share"] = _r(ob.mean(), 4)
        out["after"]["share"] = _r(oa.mean(), 4)
    # artefacts that appeared or vanished across this change point
    if s.col < len(num):
        for key, label, value in artefacts[num[s.col]]:
            ob, oa = _artefact_mask(b, key, value), _artefact_mask(a, key, value)
            if len(b) == 0 or len(a) == 0:
                continue
            diff, ci = newcombe_diff(int(ob.sum()), len(b), int(oa.sum()), len(a))
            if abs(diff) >= min_share_change and (ci[0] > 0 or ci[1] < 0):
                out["artefacts"].append({"artefact": label, "change": "appeared" if diff > 0 else "vanished",
                                         "before": _r(ob.mean(), 4), "after": _r(oa.mean(), 4),
                                         "difference_ci": [_r(ci[0], 4), _r(ci[1], 4)]})
    return out


def _winsorised_sd(a: np.ndarray, trim: float = 0.2) -> float:
    a = np.sort(a)
    n = len(a)
    if n < 3:
        return float("nan")
    g = int(math.floor(trim * n))
    return float(np.clip(a, a[g], a[n - g - 1]).std(ddof=1))


def _fmt(v) -> str:
    return "–" if v is None else f"{v:.3g}"


def _detail(s: _Series, d: Dict[str, Any], scope: str) -> str:
    when = d["period"]
    if s.aspect == "level":
        word = "up" if (d["size"] or 0) > 0 else "down"
        text = (f"level {word} by {d['size']:+.3g} ({_fmt(d['size_sd'])} SD; median {_fmt(d['before'].get('median'))}"
                f" -> {_fmt(d['after'].get('median'))}) from {when}") if d["size"] is not None else f"level change from {when}"
    elif s.aspect == "spread":
        text = f"spread x{_fmt(d['size'])} from {when}"
    elif s.aspect == "missing":
        text = f"missing share {d['before']['share']:.0%} -> {d['after']['share']:.0%} from {when}"
    else:
        rose = (d["size"] or 0) > 0
        text = (f"{s.label} from {when}" if rose else f"{s.label} until the period before {when}") + \
            f" ({d['before']['share']:.0%} -> {d['after']['share']:.0%} of values)"
    extra = [f"{a['artefact']} {a['change']}" for a in d["artefacts"] if a["artefact"] != s.label]
    if extra:
        text += "; " + ", ".join(extra)
    if scope == "network":
        text += "; every other site changed at the same time (network-wide)"
    elif scope == "several_sites":
        text += "; some other sites changed at the same time"
    return text


def _same_date(s2: _Series, fit: Dict[str, Any], info: Dict[str, Any], d: Dict[str, Any], described, series,
               min_segment: int) -> Dict[str, Any]:
    """Did the same series at another site change at the same date, the same way?"""
    date = pd.Timestamp(d["date"])
    valid = fit["valid"]
    starts = [pd.Timestamp(_start(int(c), info["unit"])) for c in info["codes"][valid]]
    b = int(np.searchsorted(np.array(starts, dtype="datetime64[ns]"), np.datetime64(date), side="left"))
    if b < min_segment or len(valid) - b < min_segment:
        return {"covered": False}
    # its own change point within one period of the date, same direction
    unit_days = 31 * dict(UNITS)[info["unit"]]
    for e in described:
        s3 = series[e["series"]]
        if (s3.site, s3.feature, s3.aspect, s3.artefact) == (s2.site, s2.feature, s2.aspect, s2.artefact):
            if abs((pd.Timestamp(e["date"]) - date).days) <= unit_days and e["direction"] == d["direction"]:
                return {"covered": True, "changed": True, "p_value": _r(e["p"]), "direction": _dir(e["direction"]),
                        "own_change_point": e["period"]}
    z = fit["z"]
    s1, s = z[:b].sum(), z.sum()
    n = len(z)
    gain = s1 ** 2 / b + (s - s1) ** 2 / (n - b) - s ** 2 / n
    p = float(_st.chi2.sf(gain, 1))
    direction = float(np.sign(z[b:].mean() - z[:b].mean()))
    return {"covered": True, "changed": bool(p < 0.05 and direction == d["direction"]), "p_value": _r(p),
            "direction": _dir(direction)}


def _dir(x: float) -> str:
    return "up" if x > 0 else "down" if x < 0 else "none"


def _network_groups(cps: Sequence[ChangePoint], alpha: float) -> List[Dict[str, Any]]:
    groups: Dict[Tuple, Dict[str, Any]] = {}
    for c in cps:
        if c.scope != "network" or c.p_adj >= alpha:
            continue
        key = (c.feature, c.aspect, c.artefact)
        g = groups.get(key)
        if g is None or pd.Timestamp(c.date) - pd.Timestamp(g["date"]) > pd.Timedelta(days=92):
            g = groups.setdefault(key, {"feature": c.feature, "aspect": c.aspect, "artefact": c.artefact,
                                        "date": c.date, "period": c.period, "sites": []})
        if c.site not in g["sites"]:
            g["sites"].append(c.site)
    out = list(groups.values())
    for g in out:
        g["sites"].sort()
        g["detail"] = (f"{g['feature']}: {g['aspect'] if g['artefact'] is None else g['artefact']} changed at every "
                       f"site at once from about {g['period']}; a network-wide change, not a site effect")
    return out


def _top_features(cps: Sequence[ChangePoint], series: List[_Series], fitted, num: Sequence[str], k: int = 6):
    """Features for the heatmap: those with findings first, then the largest level gains."""
    out: List[str] = []
    for c in cps:
        if c.finding and c.feature in num and c.feature not in out:
            out.append(c.feature)
    score: Dict[str, float] = {}
    for i, s in enumerate(series):
        if s.aspect == "level" and i in fitted:
            z = fitted[i]["z"]
            score[s.feature] = max(score.get(s.feature, 0.0), float(split_gains(z[None, :]).max()))
    for f in sorted(score, key=lambda f: (-score[f], f)):
        if f not in out:
            out.append(f)
    return out[:k]


def _period_probes(table, *, idx_by_site, num, t, alpha, max_rows, seed, left_out=()) -> List[PeriodProbe]:
    """Per site: ridge scores for "later half" from covariates alone and from covariates plus features
    (less ``left_out``, the features with a network-wide change), fitted on one half of the rows and
    scored on the other; AUCs and the increment with DeLong intervals (the increment's also
    Bonferroni-adjusted over the sites)."""
    from sklearn.linear_model import Ridge
    from sklearn.model_selection import train_test_split

    frame = table.frame
    num = [f for f in num if f not in left_out]
    covs = list(table.covariates)
    out: List[PeriodProbe] = []
    k_sites = max(1, len(idx_by_site))
    for s_i, (lab, idx) in enumerate(sorted(idx_by_site.items())):
        rng = stream(seed, "drift.probe", s_i)
        if len(idx) > max_rows:
            idx = np.sort(rng.choice(idx, size=max_rows, replace=False))
        tt = t.to_numpy()[idx]
        split = np.sort(tt)[len(tt) // 2]
        y = (tt >= split).astype(np.int64)
        if y.min() == y.max() or min(y.sum(), len(y) - y.sum()) < 20:
            continue
        C = _design(frame.iloc[idx], covs, table)
        F = _design(frame.iloc[idx], list(num), table)
        full = np.hstack([C, F])
        # one split in halves: the models are fitted on one half and scored on the other, so that
        # DeLong's variance applies to the held-out half as it stands (cross-fitted scores are not
        # independent rows)
        tr, te = train_test_split(np.arange(len(y)), test_size=0.5, stratify=y,
                                  random_state=int(rng.integers(2 ** 31 - 1)))
        p_full = Ridge(alpha=1.0).fit(full[tr], y[tr]).predict(full[te])
        p_cov = Ridge(alpha=1.0).fit(C[tr], y[tr]).predict(C[te]) if C.shape[1] else np.full(len(te), 0.5)
        y_te = y[te]
        (auc_f, auc_c), cov = delong(y_te, [p_full, p_cov])
        if not C.shape[1]:
            auc_c, cov[1, :], cov[:, 1] = 0.5, 0.0, 0.0
        z95, z_adj = _st.norm.isf(0.025), _st.norm.isf(alpha / (2 * k_sites))
        se_f, se_c = math.sqrt(max(cov[0, 0], 0.0)), math.sqrt(max(cov[1, 1], 0.0))
        se_d = math.sqrt(max(cov[0, 0] + cov[1, 1] - 2 * cov[0, 1], 0.0))
        inc = auc_f - auc_c
        ci_adj = [inc - z_adj * se_d, inc + z_adj * se_d]
        out.append(PeriodProbe(
            site=lab, n=int(len(te)), split_date=f"{pd.Timestamp(split):%Y-%m-%d}", auc=auc_f,
            auc_ci=[max(0.0, auc_f - z95 * se_f), min(1.0, auc_f + z95 * se_f)], covariate_auc=auc_c,
            covariate_auc_ci=[max(0.0, auc_c - z95 * se_c), min(1.0, auc_c + z95 * se_c)],
            increment=inc, increment_ci=[inc - z95 * se_d, inc + z95 * se_d], increment_ci_adjusted=ci_adj,
            left_out=tuple(left_out), flagged=bool(ci_adj[0] > 0 and inc >= 0.05)))
    return out


def _design(sub: pd.DataFrame, cols: Sequence[str], table) -> np.ndarray:
    """Standardised numeric columns (median-imputed, with missing indicators) and one-hot categories."""
    parts = []
    for c in cols:
        kind = table.kind(c)
        v = sub[c]
        if kind in ("numeric", "binary"):
            x = pd.to_numeric(v, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            miss = np.isnan(x)
            if miss.all():
                continue
            x = np.where(miss, np.nanmedian(x), x)
            sd = x.std()
            parts.append(((x - x.mean()) / sd if sd > 0 else x * 0.0)[:, None])
            if miss.any() and not miss.all():
                parts.append((miss - miss.mean())[:, None].astype(float))
        elif kind == "categorical":
            d = pd.get_dummies(v.astype(object).where(v.notna(), "(missing)").astype(str), dtype=float)
            if d.shape[1] > 1:
                parts.append(d.to_numpy()[:, 1:] - d.to_numpy()[:, 1:].mean(axis=0))
    return np.hstack(parts) if parts else np.empty((len(sub), 0))
