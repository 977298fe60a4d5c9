"""Univariate site gaps per feature: effect sizes and tests, raw and adjusted
for covariates, with Benjamini-Hochberg adjusted p-values.

- Numeric features: standardised mean difference (SMD) of each site against the
  rest, Kruskal-Wallis H across sites with epsilon-squared.
- Binary and categorical features: chi-square test of the site x level table with
  Cramer's V; for binary features the SMD of proportions.
- Missingness: each feature's missing rate by site with a chi-square test.

|SMD| > 0.1 is flagged, a common-practice threshold from the propensity-score
literature (Austin, Statistics in Medicine 2009).

References
----------
Kruskal, W. H. and Wallis, W. A. (1952). Use of ranks in one-criterion variance
analysis. JASA 47, 583-621.
Tomczak, M. and Tomczak, E. (2014). The need to report effect size estimates
revisited. Trends in Sport Sciences 21(1), 19-25 (epsilon-squared for H).
Cramer, H. (1946). Mathematical Methods of Statistics. Princeton.
Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery rate.
JRSS B 57, 289-300.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
from scipy import stats as sps

SMD_FLAG = 0.1


from sitecheck.analyses.stats import bh_adjust  # noqa: E402  (one Benjamini-Hochberg, NaN-aware)


def smd(a: np.ndarray, b: np.ndarray, *, binary: bool = False) -> float:
    """Standardised mean difference of ``a`` against ``b`` (pooled SD of the two groups)."""
    a = a[~np.isnan(a)]
    b = b[~np.isnan(b)]
    if len(a) < 2 or len(b) < 2:
        return float("nan")
    if binary:
        pa, pb = a.mean(), b.mean()
        den = np.sqrt((pa * (1 - pa) + pb * (1 - pb)) / 2)
    else:
        den = np.sqrt((a.var(ddof=1) + b.var(ddof=1)) / 2)
    if den == 0:
        return 0.0 if a.mean() == b.mean() else float(np.sign(a.mean() - b.mean()) * np.inf)
    return float((a.mean() - b.mean()) / den)


def epsilon_squared(h: float, n: int) -> float:
    """Epsilon-squared effect size of a Kruskal-Wallis H over n observations:
    H / ((n^2 - 1) / (n + 1)) (Tomczak & Tomczak 2014)."""
    return float(h / ((n * n - 1) / (n + 1))) if n > 1 else float("nan")


def cramers_v(table: np.ndarray) -> Tuple[float, float, float]:
    """Chi-square test of a contingency table; returns (chi2, p, Cramer's V)."""
    table = np.asarray(table, dtype=float)
    table = table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]
    if min(table.shape) < 2:
        return 0.0, 1.0, 0.0
    chi2, p, _, _ = sps.chi2_contingency(table, correction=False)
    n = table.sum()
    v = np.sqrt(chi2 / (n * (min(table.shape) - 1)))
    return float(chi2), float(p), float(v)


def residualise(y: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Residuals of ``y`` after a pooled least-squares fit on covariates ``C``
    (with intercept), plus the mean of ``y`` so values keep their scale.
    Rows with a missing ``y`` or covariate give NaN."""
    ok = ~np.isnan(y) & ~np.isnan(C).any(axis=1)
    out = np.full(len(y), np.nan)
    if ok.sum() <= C.shape[1] + 1:
        return y.copy()
    A = np.column_stack([np.ones(ok.sum()), C[ok]])
    beta, *_ = np.linalg.lstsq(A, y[ok], rcond=None)
    out[ok] = y[ok] - A @ beta + y[ok].mean()
    return out


def covariate_design(cov_X: np.ndarray, cov_categorical: np.ndarray) -> np.ndarray:
    """Numeric design from encoded covariates: numeric columns as they are
    (median-imputed), categorical codes one-hot (first level dropped)."""
    cols = []
    for j in range(cov_X.shape[1]):
        x = cov_X[:, j]
        if cov_categorical[j]:
            codes = np.unique(x[~np.isnan(x)])
            for c in codes[1:]:
                cols.append((x == c).astype(float))
        else:
            med = np.nanmedian(x) if np.isfinite(x).any() else 0.0
            cols.append(np.where(np.isnan(x), med, x))
    return np.column_stack(cols) if cols else np.zeros((cov_X.shape[0], 0))


@dataclass(frozen=True)
class FeatureGap:
    """Univariate site gap of one feature."""

    feature: str
    kind: str
    test: str
    statistic: float
    p_value: float
    p_adj: float
    effect_name: str
    effect: float
    smd: Dict[str, float]
    max_abs_smd: float
    flagged: bool
    n: int
    adjusted: Optional[Dict[str, float]] = None

    def to_dict(self) -> dict:
        d = {"feature": self.feature, "kind": self.kind, "test": self.test, "statistic": self.statistic,
             "p_value": self.p_value, "p_adj": self.p_adj, self.effect_name: self.effect,
             "smd": dict(self.smd), "max_abs_smd": self.max_abs_smd, "smd_flagged": self.flagged, "n": self.n}
        if self.adjusted is not None:
            d["adjusted_for_covariates"] = dict(self.adjusted)
        return d


@dataclass(frozen=True)
class MissingBySite:
    """A feature's missing rate by site with a chi-square test of equal rates."""

    feature: str
    rate: Dict[str, float]
    n: Dict[str, int]
    chi2: float
    p_value: float
    p_adj: float
    cramers_v: float

    def to_dict(self) -> dict:
        return {"rate": dict(self.rate), "n": dict(self.n), "chi2": self.chi2, "p_value": self.p_value,
                "p_adj": self.p_adj, "cramers_v": self.cramers_v}


def _numeric_gap(x: np.ndarray, site: np.ndarray, labels: Sequence[str], binary: bool):
    ok = ~np.isnan(x)
    groups = [x[ok & (site == k)] for k in range(len(labels))]
    groups_nz = [g for g in groups if len(g) > 0]
    smds = {lab: smd(x[site == k], x[site != k], binary=binary) for k, lab in enumerate(labels)}
    n = int(ok.sum())
    if len(groups_nz) < 2 or np.nanstd(x) == 0:
        h, p = 0.0, 1.0
    else:
        try:
            h, p = sps.kruskal(*groups_nz)
        except ValueError:
            h, p = 0.0, 1.0
    return float(h), float(p), epsilon_squared(h, n), smds, n


def univariate_gaps(X: np.ndarray, names: Sequence[str], kinds: Sequence[str], site: np.ndarray,
                    labels: Sequence[str], *, covariates: Optional[np.ndarray] = None) -> List[FeatureGap]:
    """Univariate site gaps of every column of ``X``.

    Parameters
    ----------
    X : ndarray (n, p)
        Encoded features (categorical columns as codes).
    names, kinds : sequences of str
    site : ndarray of int (n,)
    labels : site labels indexed by ``site``
    covariates : ndarray (n, q), optional
        Numeric covariate design (see :func:`covariate_design`); numeric features
        are then also tested after residualising on it.

    Returns
    -------
    list of FeatureGap, in column order, with BH-adjusted p-values across columns.
    """
    raw = []
    for j, (name, kind) in enumerate(zip(names, kinds)):
        x = X[:, j]
        if kind == "categorical" or kind == "binary":
            ok = ~np.isnan(x)
            levels = np.unique(x[ok])
            table = np.array([[np.sum((site == k) & (x == lv)) for lv in levels] for k in range(len(labels))])
            chi2, p, v = cramers_v(table)
            smds = ({lab: smd(x[site == k], x[site != k], binary=True) for k, lab in enumerate(labels)}
                    if kind == "binary" else {})
            raw.append((name, kind, "chi_square", chi2, p, "cramers_v", v, smds, int(ok.sum()), None))
        else:
            h, p, eps, smds, n = _numeric_gap(x, site, labels, binary=False)
            adj = None
            if covariates is not None and covariates.shape[1] > 0:
                r = residualise(x, covariates)
                ha, pa, epsa, smda, _ = _numeric_gap(r, site, labels, binary=False)
                adj = {"statistic": ha, "p_value": pa, "epsilon_squared": epsa,
                       "max_abs_smd": float(np.nanmax(np.abs(list(smda.values())))) if smda else float("nan"),
                       "smd": smda}
            raw.append((name, kind, "kruskal_wallis", h, p, "epsilon_squared", eps, smds, n, adj))
    padj = bh_adjust([r[4] for r in raw])
    if covariates is not None:
        adj_p = [r[9]["p_value"] if r[9] else np.nan for r in raw]
        adj_padj = bh_adjust(adj_p)
        for r, q in zip(raw, adj_padj):
            if r[9]:
                r[9]["p_adj"] = float(q)
    out = []
    for r, q in zip(raw, padj):
        vals = [abs(v) for v in r[7].values() if np.isfinite(v)]
        m = float(max(vals)) if vals else float("nan")
        out.append(FeatureGap(feature=r[0], kind=r[1], test=r[2], statistic=float(r[3]), p_value=float(r[4]),
                              p_adj=float(q), effect_name=r[5], effect=float(r[6]), smd={k: float(v) for k, v in r[7].items()},
                              max_abs_smd=m, flagged=bool(vals and m > SMD_FLAG), n=r[8], adjusted=r[9]))
    return out


def missing_by_site(X: np.ndarray, names: Sequence[str], site: np.ndarray, labels: Sequence[str]) -> List[MissingBySite]:
    """Missing rate of each column by site, chi-square test of equal rates, BH across columns."""
    rows = []
    for j, name in enumerate(names):
        miss = np.isnan(X[:, j])
        n = {lab: int(np.sum(site == k)) for k, lab in enumerate(labels)}
        k_miss = {lab: int(np.sum(miss & (site == k))) for k, lab in enumerate(labels)}
        rate = {lab: (k_miss[lab] / n[lab] if n[lab] else float("nan")) for lab in labels}
        if miss.any() and not miss.all():
            table = np.array([[k_miss[lab], n[lab] - k_miss[lab]] for lab in labels])
            chi2, p, v = cramers_v(table)
        else:
            chi2, p, v = 0.0, 1.0, 0.0
        rows.append((name, rate, n, chi2, p, v))
    padj = bh_adjust([r[4] for r in rows])
    return [MissingBySite(feature=r[0], rate=r[1], n=r[2], chi2=float(r[3]), p_value=float(r[4]), p_adj=float(q),
                          cramers_v=float(r[5])) for r, q in zip(rows, padj)]
