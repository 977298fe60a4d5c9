"""Between-unit heterogeneity of a rate (TPR, FPR) with its sampling noise removed.

A rate estimated at many small sites scatters even when every site has the
same true rate, so the range (max - min) of the observed rates mostly measures
the size of the smallest sites. This module gives the random-effects view:

- :func:`freeman_tukey` transforms counts ``x`` of ``n`` to the Freeman-Tukey
  double arcsine scale, whose sampling variance ``1 / (4 n + 2)`` does not
  depend on the true rate and which needs no continuity correction at rates of
  0 or 1;
- :func:`dersimonian_laird` gives Cochran's Q, the DerSimonian-Laird moment
  estimate of the between-unit variance tau^2 and I^2;
- :func:`q_profile_interval` gives the Q-profile confidence interval of tau^2
  (Viechtbauer 2007);
- :func:`rate_heterogeneity` puts these together for one rate across units,
  beside the plain variance and range of the observed rates, each against its
  null distribution under permutation of the unit labels within the class the
  rate is computed on (positives for TPR, negatives for FPR), and again
  without the units below a minimum count.

The DerSimonian-Laird estimate is written out here (vectorised over
permutations, which calling ``statsmodels.stats.meta_analysis.combine_effects``
a thousand times would not be); the tests check it against statsmodels.

References
----------
Cochran, W. G. (1954). The combination of estimates from different
experiments. Biometrics 10, 101-129.
DerSimonian, R. and Laird, N. (1986). Meta-analysis in clinical trials.
Controlled Clinical Trials 7, 177-188.
Freeman, M. F. and Tukey, J. W. (1950). Transformations related to the angular
and the square root. Annals of Mathematical Statistics 21, 607-611.
Higgins, J. P. T. and Thompson, S. G. (2002). Quantifying heterogeneity in a
meta-analysis. Statistics in Medicine 21, 1539-1558.
Viechtbauer, W. (2007). Confidence intervals for the amount of heterogeneity
in meta-analysis. Statistics in Medicine 26, 37-52.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Dict, Optional, Sequence, Tuple

import numpy as np
from scipy import optimize as _opt
from scipy import stats as _st

from sitecheck._records import fields_dict
from sitecheck._runtime import generator
from sitecheck.analyses.stats import finite_or_none
from sitecheck.errors import ParameterError
from sitecheck.analyses.stats import plain_permutation_pvalue_floor

Interval = Optional[Tuple[float, float]]

#: Default smallest count (positives for TPR, negatives for FPR) of a unit not flagged as small.
MIN_COUNT = 10

SCALE = ("Freeman-Tukey double arcsine t = (asin(sqrt(x/(n+1))) + asin(sqrt((x+1)/(n+1)))) / 2, "
         "sampling variance 1/(4n+2); defined at rates of 0 and 1, no continuity correction")


_f = finite_or_none


def _ci(pair: Interval) -> Optional[list]:
    if pair is None:
        return None
    return [_f(pair[0]), _f(pair[1])]


def freeman_tukey(x, n) -> Tuple[np.ndarray, np.ndarray]:
    """Freeman-Tukey double arcsine transform of ``x`` events in ``n`` trials.

    Parameters
    ----------
    x, n : array-like of int
        Events and trials, ``0 <= x <= n`` and ``n >= 1``.

    Returns
    -------
    t : ndarray
        ``(asin(sqrt(x / (n + 1))) + asin(sqrt((x + 1) / (n + 1)))) / 2``.
    v : ndarray
        Its sampling variance ``1 / (4 n + 2)``.

    References
    ----------
    Freeman, M. F. and Tukey, J. W. (1950). Annals of Mathematical Statistics
    21, 607-611.

    Examples
    --------
    >>> t, v = freeman_tukey([0, 5, 10], [10, 10, 10])
    >>> [round(float(a), 4) for a in t], round(float(v[0]), 5)
    ([0.1531, 0.7854, 1.4177], 0.02381)
    """
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    if np.any(n < 1) or np.any(x < 0) or np.any(x > n):
        raise ParameterError("freeman_tukey needs 0 <= x <= n and n >= 1")
    t = 0.5 * (np.arcsin(np.sqrt(x / (n + 1.0))) + np.arcsin(np.sqrt((x + 1.0) / (n + 1.0))))
    return t, 1.0 / (4.0 * n + 2.0)


@dataclass(frozen=True)
class MetaSummary:
    """Cochran's Q, the DerSimonian-Laird tau^2 and I^2 of one set of estimates."""

    mu_fixed: float
    mu_random: float
    q: float
    df: int
    q_p_value: float
    tau2: float
    i2: float
    typical_variance: float

    def to_dict(self) -> Dict[str, Any]:
        return {"mu_fixed": _f(self.mu_fixed), "mu_random": _f(self.mu_random), "q": _f(self.q),
                "df": self.df, "q_p_value": _f(self.q_p_value), "tau2": _f(self.tau2), "i2": _f(self.i2)}


def _check_yv(y, v) -> Tuple[np.ndarray, np.ndarray]:
    y = np.asarray(y, dtype=float).ravel()
    v = np.asarray(v, dtype=float).ravel()
    if len(y) != len(v):
        raise ParameterError(f"estimates and variances differ in length ({len(y)} and {len(v)})")
    if len(y) < 2:
        raise ParameterError(f"heterogeneity needs at least 2 estimates, got {len(y)}")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(v)) and np.all(v > 0)):
        raise ParameterError("estimates must be finite and variances finite and positive")
    return y, v


def dersimonian_laird(y, v) -> MetaSummary:
    """Cochran's Q, DerSimonian-Laird tau^2 and I^2 of estimates ``y`` with variances ``v``.

    ``w = 1 / v``, ``Q = sum w (y - mu_w)^2`` on ``k - 1`` degrees of freedom,
    ``tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w))`` and
    ``I^2 = max(0, (Q - (k - 1)) / Q)``, which equals ``tau^2 / (tau^2 + s^2)``
    with the typical within-unit variance
    ``s^2 = (k - 1) sum w / ((sum w)^2 - sum w^2)``.

    Parameters
    ----------
    y, v : array-like of float, shape (k,), k >= 2

    Returns
    -------
    MetaSummary

    References
    ----------
    DerSimonian, R. and Laird, N. (1986). Controlled Clinical Trials 7, 177-188.
    Higgins, J. P. T. and Thompson, S. G. (2002). Statistics in Medicine 21,
    1539-1558 (I^2 and s^2).

    Examples
    --------
    >>> s = dersimonian_laird([0.1, 0.3, 0.5, 0.2], [0.01, 0.02, 0.015, 0.03])
    >>> round(s.q, 3), s.df, round(s.tau2, 5), round(s.i2, 4)
    (6.6, 3, 0.02025, 0.5455)
    """
    y, v = _check_yv(y, v)
    w = 1.0 / v
    sw = w.sum()
    mu = float(np.dot(w, y) / sw)
    q = float(np.dot(w, (y - mu) ** 2))
    df = len(y) - 1
    c = sw - np.dot(w, w) / sw
    tau2 = max(0.0, (q - df) / c)
    i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
    wr = 1.0 / (v + tau2)
    return MetaSummary(mu_fixed=mu, mu_random=float(np.dot(wr, y) / wr.sum()), q=q, df=df,
                       q_p_value=float(_st.chi2.sf(q, df)), tau2=float(tau2), i2=float(i2),
                       typical_variance=float(df / c))


def rate_sd(mu: float, tau2: float) -> float:
    """Standard deviation of the true rates ``sin(t)^2`` when the true units' values
    ``t`` on the arcsine scale are normal with mean ``mu`` and variance ``tau2``.

    With ``sin(t)^2 = (1 - cos 2t) / 2`` and ``E cos(a t) = cos(a mu) exp(-a^2 tau2 / 2)``
    for normal ``t``: ``Var = (1 + cos(4 mu) e^{-8 tau2}) / 8 - cos(2 mu)^2 e^{-4 tau2} / 4``,
    computed as ``(1 - e^{-4 tau2}) (1 - cos(4 mu) e^{-4 tau2}) / 8`` (the same, and exactly 0 at 0).
    It grows with ``tau2`` and is about ``2 sqrt(p (1 - p)) tau`` for small ``tau2``
    (the delta method at ``p = sin(mu)^2``); it never exceeds 0.5. The Freeman-Tukey
    value is close to ``asin(sqrt(p))`` for all but the smallest counts.

    Examples
    --------
    >>> round(rate_sd(0.7854, 0.0), 6), round(rate_sd(0.7854, 0.01), 4)
    (0.0, 0.098)
    """
    e4 = math.exp(-4.0 * tau2)
    var = -math.expm1(-4.0 * tau2) * (1.0 - math.cos(4.0 * mu) * e4) / 8.0
    return math.sqrt(max(var, 0.0))


def generalised_q(tau2: float, y, v) -> float:
    """The generalised Q statistic ``sum (y - mu(tau2))^2 / (v + tau2)``, ``mu`` its weighted mean."""
    w = 1.0 / (np.asarray(v, dtype=float) + tau2)
    y = np.asarray(y, dtype=float)
    mu = np.dot(w, y) / w.sum()
    return float(np.dot(w, (y - mu) ** 2))


def q_profile_interval(y, v, *, alpha: float = 0.05) -> Tuple[float, float]:
    """Q-profile confidence interval of the between-unit variance tau^2.

    The generalised Q statistic is decreasing in tau^2 and follows a chi-square
    distribution on ``k - 1`` degrees of freedom at the true tau^2; the bounds
    solve ``Q(tau2) = chi2_{k-1}(1 - alpha / 2)`` (lower) and
    ``Q(tau2) = chi2_{k-1}(alpha / 2)`` (upper), and are 0 when ``Q(0)`` is
    already below the quantile.

    Parameters
    ----------
    y, v : array-like of float, shape (k,), k >= 2
    alpha : float in (0, 1), default 0.05

    Returns
    -------
    (low, high)

    References
    ----------
    Viechtbauer, W. (2007). Confidence intervals for the amount of
    heterogeneity in meta-analysis. Statistics in Medicine 26, 37-52.

    Examples
    --------
    >>> lo, hi = q_profile_interval([0.0, 0.1, -0.1, 0.05], [0.04, 0.04, 0.05, 0.03])
    >>> lo, round(hi, 4)
    (0.0, 0.0564)
    """
    y, v = _check_yv(y, v)
    if not (0.0 < alpha < 1.0):
        raise ParameterError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")
    df = len(y) - 1
    q0 = generalised_q(0.0, y, v)

    def bound(target: float) -> float:
        if q0 <= target:
            return 0.0
        hi = max(float(np.var(y)), float(np.max(v)), 1e-12)
        while generalised_q(hi, y, v) > target:
            hi *= 4.0
        return float(_opt.brentq(lambda t: generalised_q(t, y, v) - target, 0.0, hi, xtol=1e-14, rtol=1e-12))

    return bound(float(_st.chi2.ppf(1.0 - alpha / 2.0, df))), bound(float(_st.chi2.ppf(alpha / 2.0, df)))


# --------------------------------------------------------------------------
# one rate across units, against its permutation null
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class NullSummary:
    """Median and 95th percentile of a statistic over the permutations."""

    median: Optional[float]
    q95: Optional[float]

    def to_dict(self) -> Dict[str, Any]:
        return fields_dict(self, number=_f)


@dataclass(frozen=True)
class RateHeterogeneity:
    """Heterogeneity of one rate across units, with its permutation null.

    ``tau2`` is on the Freeman-Tukey scale; ``sd_rate`` is the standard
    deviation of the true rates it implies (:func:`rate_sd`).
    ``variance`` and ``spread`` are the unweighted variance (divisor k - 1)
    and the max - min of the observed rates. ``p_value`` is the permutation
    p-value of Q (equivalently of tau^2: the weights do not change under the
    permutation); ``variance_p_value`` and ``spread_p_value`` are those of the
    plain statistics. ``without_small`` repeats everything on the units with
    at least ``min_count`` trials (None when no unit is small).
    """

    units: Tuple[str, ...]
    small_units: Tuple[str, ...]
    empty_units: Tuple[str, ...]
    min_count: int
    pooled_rate: Optional[float]
    q: Optional[float]
    df: Optional[int]
    q_p_value: Optional[float]
    tau2: Optional[float]
    tau2_ci: Interval
    i2: Optional[float]
    i2_ci: Interval
    sd_rate: Optional[float]
    sd_rate_ci: Interval
    variance: Optional[float]
    spread: Optional[float]
    n_permutations: int
    p_value: Optional[float]
    variance_p_value: Optional[float]
    spread_p_value: Optional[float]
    null_tau2: NullSummary
    null_i2: NullSummary
    null_variance: NullSummary
    null_spread: NullSummary
    without_small: Optional["RateHeterogeneity"] = None

    @property
    def exceeds_noise(self) -> Optional[bool]:
        """True when the permutation p-value is below 0.05 (None when not computed)."""
        return None if self.p_value is None else bool(self.p_value < 0.05)

    def to_dict(self) -> Dict[str, Any]:
        return {
            "units_used": len(self.units), "small_units": list(self.small_units),
            "empty_units": list(self.empty_units), "min_count": self.min_count,
            "pooled_rate": _f(self.pooled_rate),
            "q": _f(self.q), "df": self.df, "q_p_value": _f(self.q_p_value),
            "tau2": _f(self.tau2), "tau2_ci": _ci(self.tau2_ci), "i2": _f(self.i2), "i2_ci": _ci(self.i2_ci),
            "sd_rate": _f(self.sd_rate), "sd_rate_ci": _ci(self.sd_rate_ci),
            "variance": _f(self.variance), "spread": _f(self.spread),
            "permutations": self.n_permutations, "p_value": _f(self.p_value),
            "p_value_floor": plain_permutation_pvalue_floor(self.n_permutations) if self.p_value is not None
            else None,
            "variance_p_value": _f(self.variance_p_value), "spread_p_value": _f(self.spread_p_value),
            "exceeds_noise": self.exceeds_noise,
            "null": {"tau2": self.null_tau2.to_dict(), "i2": self.null_i2.to_dict(),
                     "variance": self.null_variance.to_dict(), "spread": self.null_spread.to_dict()},
            "without_small": self.without_small.to_dict() if self.without_small is not None else None,
        }


_NO_NULL = NullSummary(None, None)


def _batch_stats(X: np.ndarray, n: np.ndarray, w: np.ndarray, c: float, df: int):
    """Q, tau^2, I^2, variance and spread of each row of counts ``X`` (B, k) out of ``n``."""
    t = 0.5 * (np.arcsin(np.sqrt(X / (n + 1.0))) + np.arcsin(np.sqrt((X + 1.0) / (n + 1.0))))
    mu = (t @ w) / w.sum()
    q = ((t - mu[:, None]) ** 2) @ w
    tau2 = np.maximum(0.0, (q - df) / c)
    with np.errstate(invalid="ignore", divide="ignore"):
        i2 = np.where(q > 0, np.maximum(0.0, (q - df) / np.where(q > 0, q, 1.0)), 0.0)
    r = X / n
    return q, tau2, i2, r.var(axis=1, ddof=1), r.max(axis=1) - r.min(axis=1)


def _null(v: np.ndarray) -> NullSummary:
    return NullSummary(float(np.median(v)), float(np.quantile(v, 0.95)))


def _perm_p(null: np.ndarray, obs: float) -> float:
    """(1 + #{null >= obs}) / (1 + B), with a relative tolerance for floating-point ties."""
    tol = 1e-10 * max(1.0, abs(obs))
    return float((1 + np.sum(null >= obs - tol)) / (1 + len(null)))


def _heterogeneity(x, n, labels, min_count, n_permutations, rng, alpha, split_small) -> RateHeterogeneity:
    has = n > 0
    small = has & (n < min_count)
    used = np.flatnonzero(has)
    base = dict(units=tuple(labels[i] for i in used), small_units=tuple(labels[i] for i in np.flatnonzero(small)),
                empty_units=tuple(labels[i] for i in np.flatnonzero(~has)), min_count=int(min_count),
                n_permutations=int(n_permutations))
    xs, ns = x[used].astype(float), n[used].astype(float)
    pooled = float(xs.sum() / ns.sum()) if len(used) else None
    if len(used) < 2:
        return RateHeterogeneity(pooled_rate=pooled, q=None, df=None, q_p_value=None, tau2=None, tau2_ci=None,
                                 i2=None, i2_ci=None, sd_rate=None, sd_rate_ci=None,
                                 variance=None, spread=None, p_value=None, variance_p_value=None,
                                 spread_p_value=None, null_tau2=_NO_NULL, null_i2=_NO_NULL,
                                 null_variance=_NO_NULL, null_spread=_NO_NULL, **base)
    t, v = freeman_tukey(xs, ns)
    s = dersimonian_laird(t, v)
    lo, hi = q_profile_interval(t, v, alpha=alpha)
    s2 = s.typical_variance

    def sd_at(tau2: float) -> float:
        wr = 1.0 / (v + tau2)
        return rate_sd(float(np.dot(wr, t) / wr.sum()), tau2)

    rates = xs / ns
    w = 1.0 / v
    c = float(w.sum() - np.dot(w, w) / w.sum())
    # the null: unit labels permuted within the class, so each unit keeps its count and the
    # events it receives are a multivariate hypergeometric draw from the pooled events
    if n_permutations > 0:
        Xn = rng.multivariate_hypergeometric(ns.astype(np.int64), int(round(xs.sum())), size=int(n_permutations),
                                             method="marginals").astype(float)
        nq, ntau, ni2, nvar, nspr = _batch_stats(Xn, ns, w, c, s.df)
        variance, spread = float(rates.var(ddof=1)), float(rates.max() - rates.min())
        perm = dict(p_value=_perm_p(nq, s.q), variance_p_value=_perm_p(nvar, variance),
                    spread_p_value=_perm_p(nspr, spread), null_tau2=_null(ntau), null_i2=_null(ni2),
                    null_variance=_null(nvar), null_spread=_null(nspr))
    else:
        perm = dict(p_value=None, variance_p_value=None, spread_p_value=None, null_tau2=_NO_NULL,
                    null_i2=_NO_NULL, null_variance=_NO_NULL, null_spread=_NO_NULL)
    without = None
    if split_small and small.any():
        keep = ~small
        without = _heterogeneity(x[keep], n[keep], [labels[i] for i in np.flatnonzero(keep)], min_count,
                                 n_permutations, rng, alpha, False)
    return RateHeterogeneity(
        pooled_rate=pooled, q=s.q, df=s.df, q_p_value=s.q_p_value, tau2=s.tau2, tau2_ci=(lo, hi),
        i2=s.i2, i2_ci=(lo / (lo + s2), hi / (hi + s2)), sd_rate=sd_at(s.tau2),
        sd_rate_ci=(sd_at(lo), sd_at(hi)),
        variance=float(rates.var(ddof=1)), spread=float(rates.max() - rates.min()),
        without_small=without, **perm, **base)


def rate_heterogeneity(x, n, labels: Sequence[str], *, min_count: int = MIN_COUNT, n_permutations: int = 999,
                       alpha: float = 0.05, random_state) -> RateHeterogeneity:
    """Heterogeneity of a rate ``x / n`` across units, against its permutation null.

    Parameters
    ----------
    x : array-like of int, shape (k,)
        Events per unit (true positives for TPR, false positives for FPR).
    n : array-like of int, shape (k,)
        Trials per unit (positives for TPR, negatives for FPR). Units with
        ``n == 0`` have no rate: they are listed in ``empty_units`` and left out.
    labels : sequence of str, shape (k,)
    min_count : int, default 10
        Units with ``0 < n < min_count`` are listed in ``small_units``; the
        result's ``without_small`` repeats the analysis without them.
    n_permutations : int, default 999
        Permutations of the unit labels within the class (0: no null).
    alpha : float, default 0.05
        The tau^2 and I^2 intervals have level ``1 - alpha``.
    random_state : int or numpy.random.Generator

    Returns
    -------
    RateHeterogeneity

    Notes
    -----
    Permuting the unit labels of the rows of one class keeps every unit's
    trial count and shuffles which rows' predictions it receives: its events
    are then a multivariate hypergeometric draw from the pooled events, which
    is drawn directly (numpy's ``multivariate_hypergeometric``). The Q-profile
    interval rests on the chi-square approximation of Q; the permutation
    p-value does not.

    References
    ----------
    DerSimonian, R. and Laird, N. (1986). Controlled Clinical Trials 7, 177-188.
    Viechtbauer, W. (2007). Statistics in Medicine 26, 37-52.
    Higgins, J. P. T. and Thompson, S. G. (2002). Statistics in Medicine 21, 1539-1558.
    Freeman, M. F. and Tukey, J. W. (1950). Annals of Mathematical Statistics 21, 607-611.

    Examples
    --------
    >>> h = rate_heterogeneity([30, 52], [50, 60], ["ward A", "ward B"], random_state=0)
    >>> round(h.spread, 3), round(h.tau2, 4), h.tau2_ci[0] > 0, h.p_value
    (0.267, 0.0418, True, 0.002)
    """
    x = np.asarray(x)
    n = np.asarray(n)
    if x.shape != n.shape or x.ndim != 1 or len(labels) != len(x):
        raise ParameterError("x, n and labels must be 1-D and of the same length")
    if np.any(n < 0) or np.any(x < 0) or np.any(x > n) or np.any(np.mod(x, 1) != 0) or np.any(np.mod(n, 1) != 0):
        raise ParameterError("x and n must be whole counts with 0 <= x <= n")
    if not isinstance(min_count, (int, np.integer)) or isinstance(min_count, bool) or min_count < 1:
        raise ParameterError(f"min_count must be a positive integer, got {min_count!r}")
    if not isinstance(n_permutations, (int, np.integer)) or isinstance(n_permutations, bool) or n_permutations < 0:
        raise ParameterError(f"n_permutations must be a non-negative integer, got {n_permutations!r}")
    rng = generator(random_state)
    return _heterogeneity(x.astype(np.int64), n.astype(np.int64), [str(s) for s in labels], int(min_count),
                          int(n_permutations), rng, float(alpha), True)
