"""Harmonisation of site effects, and what each method leaves behind.

Four methods, each a fit/apply pair over a numeric feature matrix ``X``
(rows x features, NaN = missing), integer site codes and an optional design of
protected covariates ``D`` (rows x q, see :func:`protected_design`):

``centre``
    Per-site location removed on the covariate-adjusted scale.
``scale``
    Per-site location and scale removed (location/scale adjustment without
    shrinkage).
``quantile``
    Per-site quantile mapping of the covariate-adjusted residual onto the
    pooled residual distribution: piecewise linear between the site's
    quantiles, one knot per 20 fitting values of the site, from 1/(n+1) to
    n/(n+1); beyond them values keep their distance to that end.
``combat``
    Parametric empirical-Bayes location/scale adjustment (ComBat), written
    here from the published equations of Johnson, Li & Rabinovic (2007).

All four share ComBat's first step (the standardisation): for each feature
``g``, an ordinary least-squares fit on the observed rows of
``Y = B a_site + D beta + e`` with one indicator column per site and the
protected covariates, the grand mean ``alpha_g = sum_i (n_i / N) a_ig``, the
pooled variance ``sigma_g^2 = mean(e^2)`` and the standardised data
``Z = (Y - alpha_g - D beta_g) / sigma_g``. Because the covariate part
``D beta_g`` is added back unchanged, the protected covariates' coefficients
survive harmonisation.

Harmonised values are put back on the feature's common recording grid
(:func:`recording_grid`: the coarsest step any site records in, found with
:func:`sitecheck.analyses.fingerprints.grid_step`) and kept inside the range of values
recorded in the fitting rows (:func:`apply_harmoniser`). A site shifted by a
fraction of the grid step would otherwise sit on its own offset grid, and that
offset alone identifies the site to any classifier.

Missing cells are left missing; every estimate uses the observed cells of its
feature only. Columns flagged categorical (or binary) are left unchanged and
listed as such in the fit. A fit is a frozen dataclass whose ``to_dict()`` is
JSON and whose :meth:`HarmonisationFit.from_dict` restores it, so parameters
fitted on training rows can be applied to new rows from the same sites.

:func:`surviving_gaps` tests each feature for a remaining between-site
difference after harmonisation and gives a reason from simple diagnostics;
:func:`harmonisation_check` runs every method inside a scan, re-probes the site
and reports the outcome AUC before and after.

References
----------
Johnson, W. E., Li, C. and Rabinovic, A. (2007). Adjusting batch effects in
microarray expression data using empirical Bayes methods. Biostatistics 8(1),
118-127.
Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery rate.
JRSS B 57, 289-300.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from sitecheck._runtime import derived_seed, native_threads, stream, stream_key, thread_limit
from sitecheck.errors import InputError, ParameterError

METHODS = ("centre", "scale", "quantile", "combat")

#: Fingerprint kinds that make harmonisation unsafe until the values are repaired: the values
#: of one site are not the same quantity as the others' (another unit, a code standing for
#: "missing", a censored limit standing for an unknown value below or above it, a number
#: written in another format), so a per-site location/scale or quantile map would spread the
#: error over every value of that site. ``censored_below``, ``censored_above`` and
#: ``number_format`` are the names the censoring and number-format detectors use (issue 17);
#: a kind no detector produces yet simply never matches.
BLOCKING_KINDS = ("unit_ratio", "missing_code", "censored_below", "censored_above", "number_format")

#: Version tag written into saved parameter files.
PARAMS_FORMAT = "sitecheck.harmonise/1"

#: Keys of :meth:`HarmonisationFit.to_dict` (any other key of a saved file is kept in ``saved_with``).
_PARAMETER_KEYS = ("format", "method", "features", "adjusted", "unchanged", "site_labels", "protect", "alpha",
                   "sigma", "n_design", "beta", "gamma", "delta", "n", "combat", "grid", "lower", "upper",
                   "site_grid", "log_offset", "quantiles", "pooled_quantiles")


# ---------------------------------------------------------------------------
# protected covariates -> design matrix
# ---------------------------------------------------------------------------

def protected_design(frame: pd.DataFrame, names: Sequence[str], *,
                     spec: Optional[Sequence[dict]] = None) -> Tuple[np.ndarray, Tuple[dict, ...]]:
    """Design matrix of protected covariates, and the spec to rebuild it.

    Numeric columns enter as values; missing values are replaced by the
    fitted mean and flagged by an extra 0/1 indicator column when the fitting
    rows had any. Text columns enter as indicators of every level but the
    first (sorted); a missing value is its own indicator when the fitting
    rows had any.

    Parameters
    ----------
    frame : DataFrame
    names : sequence of str
        Protected columns of ``frame``.
    spec : sequence of dict, optional
        The spec returned by an earlier call; when given, the design is built
        with its means and levels (new rows of known sites).

    Returns
    -------
    D : ndarray of shape (n_rows, q)
    spec : tuple of dict
        JSON-serialisable description of each column's encoding.

    Raises
    ------
    InputError
        A named column is absent, or (with ``spec``) a text column holds a
        level not seen when fitting.
    """
    names = list(names)
    for name in names:
        if name not in frame.columns:
            raise InputError(f"protected column {name!r} is not in the table")
    n = len(frame)
    blocks: List[np.ndarray] = []
    out_spec: List[dict] = []
    by_name = {s["name"]: s for s in spec} if spec is not None else None
    if by_name is not None:
        missing = [s["name"] for s in spec if s["name"] not in names]
        if missing:
            raise InputError(f"protected column {missing[0]!r} is not in the table")
        names = [s["name"] for s in spec]
    for name in names:
        col = frame[name]
        s = by_name[name] if by_name is not None else None
        is_num = pd.api.types.is_numeric_dtype(col.dtype) or pd.api.types.is_bool_dtype(col.dtype)
        kind = s["kind"] if s is not None else ("numeric" if is_num else "categorical")
        if kind == "numeric":
            v = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            miss = np.isnan(v)
            if s is None:
                if miss.all():
                    raise InputError(f"protected column {name!r} has no values")
                s = {"name": name, "kind": "numeric", "mean": float(np.nanmean(v)), "indicator": bool(miss.any())}
            filled = np.where(miss, s["mean"], v)
            cols = [filled]
            if s["indicator"]:
                cols.append(miss.astype(float))
            blocks.append(np.column_stack(cols))
        else:
            vals = col.astype(object).where(col.notna(), None).to_numpy(dtype=object)
            txt = np.array([None if v is None else str(v) for v in vals], dtype=object)
            miss = np.array([v is None for v in txt])
            if s is None:
                levels = sorted({v for v in txt if v is not None})
                if not levels:
                    raise InputError(f"protected column {name!r} has no values")
                s = {"name": name, "kind": "categorical", "levels": levels, "indicator": bool(miss.any())}
            else:
                known = set(s["levels"])
                unknown = sorted({v for v in txt if v is not None and v not in known})
                if unknown:
                    raise InputError(f"protected column {name!r}: level {unknown[0]!r} was not seen when fitting")
            cols = [(txt == lev).astype(float) for lev in s["levels"][1:]]
            if s["indicator"]:
                cols.append(miss.astype(float))
            blocks.append(np.column_stack(cols) if cols else np.zeros((n, 0)))
        out_spec.append(s)
    D = np.column_stack(blocks) if blocks else np.zeros((n, 0))
    return D.astype(float), tuple(out_spec)


def _design_owner(spec: Sequence[dict]) -> List[str]:
    """Column name of each design column, in order."""
    owner: List[str] = []
    for s in spec:
        k = 1 if s["kind"] == "numeric" else len(s["levels"]) - 1
        owner += [s["name"]] * (k + int(s["indicator"]))
    return owner


def check_confounding(site: np.ndarray, D: np.ndarray, n_sites: int, *,
                      owners: Optional[Sequence[str]] = None) -> None:
    """Raise InputError when a protected covariate is collinear with site.

    The site effect and a covariate effect cannot be told apart when the
    design ``[site indicators, D]`` is rank deficient; the first covariate
    column that makes it so is named.
    """
    B = np.eye(n_sites)[site]
    base = B
    r = np.linalg.matrix_rank(base)
    for j in range(D.shape[1]):
        nxt = np.column_stack([base, D[:, j]])
        rn = np.linalg.matrix_rank(nxt)
        if rn == r:
            who = owners[j] if owners is not None else f"design column {j}"
            raise InputError(f"protected column {who!r} is confounded with site (or constant); "
                             "its effect cannot be separated from the site effect")
        base, r = nxt, rn


# ---------------------------------------------------------------------------
# the shared first step: standardisation by pooled OLS
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Standardisation:
    """ComBat's first step for every feature (Johnson et al. 2007, section 3.1).

    Attributes
    ----------
    site_coef : ndarray (n_sites, p)
        OLS coefficients of the site indicators (NaN for a site with no
        observed value of the feature).
    alpha : ndarray (p,)
        Grand mean ``sum_i n_ig / N_g * site_coef_ig``.
    beta : ndarray (q, p)
        OLS coefficients of the protected covariates.
    sigma : ndarray (p,)
        Square root of the mean squared OLS residual over observed cells.
    n : ndarray (n_sites, p) of int
        Observed cells per site and feature.
    """

    site_coef: np.ndarray
    alpha: np.ndarray
    beta: np.ndarray
    sigma: np.ndarray
    n: np.ndarray

    def location(self, D: np.ndarray) -> np.ndarray:
        """``alpha + D beta``: the standardising mean of each row and feature."""
        return self.alpha[None, :] + D @ self.beta


def standardise_fit(X: np.ndarray, site: np.ndarray, D: np.ndarray, n_sites: int) -> Standardisation:
    """Pooled OLS fit per feature on its observed rows (see :class:`Standardisation`)."""
    n_rows, p = X.shape
    q = D.shape[1]
    B = np.eye(n_sites)[site]
    site_coef = np.full((n_sites, p), np.nan)
    beta = np.zeros((q, p))
    alpha = np.full(p, np.nan)
    sigma = np.full(p, np.nan)
    counts = np.zeros((n_sites, p), dtype=np.int64)
    obs = ~np.isnan(X)
    if n_rows == 0 or p == 0:
        return Standardisation(site_coef=site_coef, alpha=alpha, beta=beta, sigma=sigma, n=counts)
    M = obs.astype(float)
    # Centre covariates and features for well-conditioned normal equations; the
    # site coefficients are converted back afterwards (a = a_c + m_y - mean(D) b).
    mu = D.mean(axis=0)
    full = np.column_stack([B, D - mu])
    r = full.shape[1]
    cnt_all = np.rint((M.T @ B).T).astype(np.int64)           # (n_sites, p)
    tot = cnt_all.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        my = np.where(tot > 0, np.nansum(X, axis=0) / np.maximum(tot, 1), 0.0)
    Y0 = np.where(obs, X - my, 0.0)
    # A' diag(m_j) A for every feature j in one product: (p, r*r).
    outer = (full[:, :, None] * full[:, None, :]).reshape(n_rows, r * r)
    AtA = (M.T @ outer).reshape(p, r, r)
    del outer
    Aty = (Y0.T @ full).T                                      # (r, p); this order is much faster with OpenBLAS
    yty = (Y0 ** 2).sum(axis=0)
    for j in range(p):
        cnt = cnt_all[:, j]
        if tot[j] == 0:
            continue
        present = cnt > 0
        keep = np.concatenate([present, np.ones(q, dtype=bool)])
        G = AtA[j][np.ix_(keep, keep)]
        h = Aty[keep, j]
        coef = np.linalg.lstsq(G, h, rcond=None)[0]
        rss = max(float(yty[j] - 2 * coef @ h + coef @ G @ coef), 0.0)
        npres = int(present.sum())
        bj = coef[npres:]
        sc = np.full(n_sites, np.nan)
        sc[present] = coef[:npres] + my[j] - mu @ bj
        site_coef[:, j] = sc
        beta[:, j] = bj
        alpha[j] = float((cnt[present] / tot[j] * sc[present]).sum())
        sigma[j] = math.sqrt(rss / tot[j])
        counts[:, j] = cnt
    return Standardisation(site_coef=site_coef, alpha=alpha, beta=beta, sigma=sigma, n=counts)


def _standardised(X: np.ndarray, D: np.ndarray, st: Standardisation) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return (X - st.location(D)) / st.sigma[None, :]


# ---------------------------------------------------------------------------
# ComBat: per-site location/scale with empirical-Bayes shrinkage
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class CombatEstimates:
    """Per-site estimates of ComBat before and after shrinkage.

    Attributes
    ----------
    gamma_hat, delta2_hat : ndarray (n_sites, p)
        Per-site mean and variance (``ddof=1``) of the standardised data
        (equations of section 3.1 of Johnson et al. 2007); NaN where a site
        has too few observed cells.
    gamma_bar, tau2 : ndarray (n_sites,)
        Normal prior of the location: mean and variance of ``gamma_hat``
        over features.
    lambda_bar, theta_bar : ndarray (n_sites,)
        Inverse-gamma prior of the scale by the method of moments:
        ``lambda = (V^2 + 2 S^2) / S^2``, ``theta = (V^3 + V S^2) / S^2``
        with ``V``, ``S^2`` the mean and variance of ``delta2_hat``.
    gamma_star, delta2_star : ndarray (n_sites, p)
        Empirical-Bayes estimates (posterior means, iterated to convergence).
    iterations : ndarray (n_sites,) of int
    shrunk : ndarray (n_sites,) of bool
        False where the priors could not be estimated (fewer than two
        features) and the unshrunk estimates are used.
    """

    gamma_hat: np.ndarray
    delta2_hat: np.ndarray
    gamma_bar: np.ndarray
    tau2: np.ndarray
    lambda_bar: np.ndarray
    theta_bar: np.ndarray
    gamma_star: np.ndarray
    delta2_star: np.ndarray
    iterations: np.ndarray
    shrunk: np.ndarray


def _site_moments(Z: np.ndarray, site: np.ndarray, n_sites: int) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    obs = ~np.isnan(Z)
    Z0 = np.where(obs, Z, 0.0)
    n = np.zeros((n_sites, Z.shape[1]))
    s1 = np.zeros_like(n)
    s2 = np.zeros_like(n)
    for i in range(n_sites):
        r = site == i
        n[i] = obs[r].sum(axis=0)
        s1[i] = Z0[r].sum(axis=0)
        s2[i] = (Z0[r] ** 2).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(n > 0, s1 / n, np.nan)
        ss = np.maximum(s2 - n * g ** 2, 0.0)  # sum of squares about the site mean
        d2 = np.where(n > 1, ss / (n - 1), np.nan)
    return n, g, d2


def combat_estimates(Z: np.ndarray, site: np.ndarray, n_sites: int, *, tol: float = 1e-4,
                     max_iter: int = 1000) -> CombatEstimates:
    """Empirical-Bayes location and scale per site from standardised data.

    Parameters
    ----------
    Z : ndarray (n_rows, p)
        Standardised data (NaN = missing), from :func:`standardise_fit`.
    site : ndarray of int
    n_sites : int
    tol : float, default 1e-4
        Convergence: the largest relative change of ``gamma_star`` and
        ``delta2_star`` between iterations.
    max_iter : int, default 1000

    Returns
    -------
    CombatEstimates

    Notes
    -----
    The conditional posterior means (Johnson et al. 2007, section 3.2) are

    ``gamma* = (n tau2 gamma_hat + delta2* gamma_bar) / (n tau2 + delta2*)``

    ``delta2* = (theta + sum_j (Z_j - gamma*)^2 / 2) / (n / 2 + lambda - 1)``

    solved by iterating from ``delta2* = delta2_hat``. ``n`` counts the
    observed cells of the site and feature, so missing cells drop out.

    References
    ----------
    Johnson, W. E., Li, C. and Rabinovic, A. (2007). Biostatistics 8(1), 118-127.
    """
    p = Z.shape[1]
    n, g_hat, d2_hat = _site_moments(Z, site, n_sites)
    obs = ~np.isnan(Z)
    Z0 = np.where(obs, Z, 0.0)
    sq_sum = np.zeros((n_sites, p))
    for i in range(n_sites):
        sq_sum[i] = (Z0[site == i] ** 2).sum(axis=0)
    g_bar = np.full(n_sites, np.nan)
    tau2 = np.full(n_sites, np.nan)
    lam = np.full(n_sites, np.nan)
    theta = np.full(n_sites, np.nan)
    g_star = np.where(n > 0, g_hat, 0.0)
    d_star = np.where(n > 1, d2_hat, 1.0)
    iters = np.zeros(n_sites, dtype=np.int64)
    shrunk = np.zeros(n_sites, dtype=bool)
    for i in range(n_sites):
        gi = g_hat[i][n[i] > 0]
        di = d2_hat[i][n[i] > 1]
        if len(gi) < 2 or len(di) < 2:
            continue
        gb, t2 = float(gi.mean()), float(gi.var(ddof=1))
        V, S2 = float(di.mean()), float(di.var(ddof=1))
        if not (t2 > 0 and S2 > 0):
            continue
        g_bar[i], tau2[i] = gb, t2
        lam[i] = (V ** 2 + 2 * S2) / S2
        theta[i] = (V ** 3 + V * S2) / S2
        ok = n[i] > 0
        ni = n[i][ok]
        gh = g_hat[i][ok]
        sq = sq_sum[i][ok]
        d_old = np.where(n[i][ok] > 1, d2_hat[i][ok], V)
        g_old = gh.copy()
        it = 0
        while True:
            it += 1
            g_new = (ni * t2 * gh + d_old * gb) / (ni * t2 + d_old)
            # sum_j (Z_j - g)^2 = sum Z^2 - 2 g sum Z + n g^2, with sum Z = n gamma_hat
            ss = np.maximum(sq - 2 * g_new * ni * gh + ni * g_new ** 2, 0.0)
            d_new = (theta[i] + 0.5 * ss) / (ni / 2.0 + lam[i] - 1.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                change = max(np.nanmax(np.abs(g_new - g_old) / np.maximum(np.abs(g_old), 1e-12)),
                             np.nanmax(np.abs(d_new - d_old) / np.maximum(np.abs(d_old), 1e-12)))
            g_old, d_old = g_new, d_new
            if change < tol or it >= max_iter:
                break
        g_star[i, ok] = g_old
        d_star[i, ok] = d_old
        iters[i] = it
        shrunk[i] = True
    return CombatEstimates(gamma_hat=g_hat, delta2_hat=d2_hat, gamma_bar=g_bar, tau2=tau2,
                           lambda_bar=lam, theta_bar=theta, gamma_star=g_star, delta2_star=d_star,
                           iterations=iters, shrunk=shrunk)


# ---------------------------------------------------------------------------
# quantile mapping
# ---------------------------------------------------------------------------

def _quantile_grid(v: np.ndarray, probs: np.ndarray) -> Optional[np.ndarray]:
    v = v[~np.isnan(v)]
    if len(v) == 0:
        return None
    return np.quantile(v, probs)


#: Fewest fitting values of a site per interval of its quantile map (our own choice, measured on
#: null tables: with a knot every 1/200 of the distribution, the map of a site with 100 values
#: copies that sample's noise onto every new row of the site, and a leak-free re-probe found
#: AUC 0.54-0.57 on single rounded labs; with 20 values per interval, 0.50-0.52).
QUANTILE_ROWS_PER_KNOT = 20


def _map_quantiles(v: np.ndarray, site_q: np.ndarray, pooled_q: np.ndarray, probs: np.ndarray,
                   n_site: Optional[int] = None) -> np.ndarray:
    """Map a site's values onto the pooled distribution through their quantiles.

    Without ``n_site``: F_site(v) by interpolation in the site's grid (ties share
    their mid probability), then the pooled quantile function at that probability.

    With ``n_site`` (the site's fitting values): a monotone piecewise-linear map
    from the site's quantiles to the pooled quantiles at ``K + 1`` probabilities
    evenly spaced from ``10/n`` to ``1 - 10/n``, ``K = n // 20``
    (:data:`QUANTILE_ROWS_PER_KNOT`, at most the grid's own resolution; a site
    with 20 values or fewer is shifted by its median); beyond the end knots a
    value keeps its distance to the end (slope 1). A map with a
    knot per 1/200 of the distribution copies a small site's sampling noise onto
    its new rows, and stretches its extreme values to the pooled extremes (its
    minimum became the pooled minimum): a site signal of the map's own making.
    """
    if n_site is None or n_site < 2:
        u, inv = np.unique(site_q, return_inverse=True)
        pm = np.bincount(inv, weights=probs) / np.bincount(inv)
        prob = np.full(v.shape, 0.5) if len(u) == 1 else np.interp(v, u, pm)
        out = np.interp(prob, probs, pooled_q)
        return np.where(np.isnan(v), np.nan, out)
    K = int(min(max(n_site // QUANTILE_ROWS_PER_KNOT, 1), len(probs) - 1))
    # The end knots keep half an interval's values beyond them: extreme order statistics of a small site are
    # too noisy to set the slope of the map's end pieces.
    p_lo = min(0.5, 0.5 * QUANTILE_ROWS_PER_KNOT / n_site)
    pk = np.linspace(p_lo, 1.0 - p_lo, K + 1) if p_lo < 0.5 else np.array([0.5])
    sk = np.interp(pk, probs, site_q)
    qk = np.interp(pk, probs, pooled_q)
    # ties in the site's knots (a point mass): keep the first of each value, so the map stays a function
    sk, first = np.unique(sk, return_index=True)
    qk = qk[first]
    if len(sk) == 1:
        out = v - sk[0] + qk[0]
    else:
        out = np.interp(v, sk, qk)
        out = np.where(v < sk[0], qk[0] + (v - sk[0]), out)
        out = np.where(v > sk[-1], qk[-1] + (v - sk[-1]), out)
    return np.where(np.isnan(v), np.nan, out)


# ---------------------------------------------------------------------------
# the recording grid
# ---------------------------------------------------------------------------

def recording_grid(x: np.ndarray, site: np.ndarray, n_sites: int, *, min_count: int = 10) -> Optional[float]:
    """The feature's common recording grid: the coarsest step any site records in.

    Each site's step is :func:`sitecheck.analyses.fingerprints.grid_step` of its
    observed values (the coarsest of
    :data:`sitecheck.analyses.fingerprints.GRID_STEPS` holding 98% of them), for sites
    with at least ``min_count`` observed values. The common grid is the
    coarsest of these steps, or, when the steps do not divide it (0.2 and
    0.25), the finest candidate step that every site's step divides.

    Returns None when no site records on a grid (continuous values, or finer
    than 0.001): nothing to return to.

    Why the coarsest: a harmonised value can hide its site only on a grid that
    every site's values can reach. On a finer grid, the values of a coarser
    site, moved by its own fractional shift, would still share one last digit.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.r_[np.arange(20) / 10, np.arange(20) / 2]   # steps of 0.1 and of 0.5
    >>> recording_grid(x, np.repeat([0, 1], 20), 2)
    0.5
    """
    x = np.asarray(x, dtype=float)
    return common_step(site_steps(x[:, None], np.asarray(site), n_sites, min_count=min_count)[:, 0])


def common_step(steps: Sequence[float]) -> Optional[float]:
    """The common grid of per-site steps (NaN: none): the coarsest, or the finest
    candidate step of :data:`sitecheck.analyses.fingerprints.GRID_STEPS` that every step divides."""
    from sitecheck.analyses.fingerprints import GRID_STEPS

    steps = [float(g) for g in steps if g is not None and np.isfinite(g)]
    if not steps:
        return None
    G = max(steps)

    def divides(g, G):
        r = G / g
        return abs(r - round(r)) < 1e-6

    if all(divides(g, G) for g in steps):
        return float(G)
    for cand in GRID_STEPS:
        if cand >= G and all(divides(g, cand) for g in steps):
            return float(cand)
    return None  # pragma: no cover - GRID_STEPS ends with 100, a multiple of every step


def recording_grids(X: np.ndarray, site: np.ndarray, n_sites: int, *,
                    skip: Optional[np.ndarray] = None) -> np.ndarray:
    """:func:`recording_grid` of every column of ``X`` (NaN: none, or a column in ``skip``)."""
    out = np.full(X.shape[1], np.nan)
    for j in range(X.shape[1]):
        if skip is not None and skip[j]:
            continue
        g = recording_grid(X[:, j], site, n_sites)
        if g is not None:
            out[j] = g
    return out


def site_steps(X: np.ndarray, site: np.ndarray, n_sites: int, *, min_count: int = 10) -> np.ndarray:
    """Each site's own recording step per column (:func:`sitecheck.analyses.fingerprints.grid_step`),
    shape (n_sites, p); NaN where a site has fewer than ``min_count`` values or none."""
    from sitecheck.analyses.fingerprints import grid_step

    out = np.full((n_sites, X.shape[1]), np.nan)
    for j in range(X.shape[1]):
        col = X[:, j]
        for i in range(n_sites):
            v = col[(site == i) & ~np.isnan(col)]
            if len(v) >= min_count:
                g = grid_step(v)
                if g is not None:
                    out[i, j] = g
    return out


def _mix64(z: np.ndarray) -> np.ndarray:
    """SplitMix64's finaliser (Steele, Lea & Flood 2014), element-wise on uint64 (wrapping)."""
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def within_cell_uniforms(X: np.ndarray, site: np.ndarray, random_state) -> np.ndarray:
    """One uniform number in [0, 1) per cell, a function of the seed, the row's values
    (every column, and its site), the column, and which copy of an identical row it is.

    A row gets the same numbers in any order or subset of the table (as long as it has
    no identical copy before it): applying saved parameters to some rows again gives the
    values they got when the whole table was harmonised. Identical rows are spread: the
    k-th copy gets the k-th number. Rows are hashed with SplitMix64's finaliser over the
    bits of their values; different rows give practically independent numbers.
    """
    key = np.random.SeedSequence(random_state).generate_state(1, np.uint64)[0]
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    bits = np.where(np.isnan(X), np.nan, X + 0.0).view(np.uint64)   # one NaN pattern, -0.0 as 0.0
    with np.errstate(over="ignore"):
        h = _mix64(np.full(n, key, dtype=np.uint64) ^ np.asarray(site, dtype=np.uint64))
        for j in range(p):
            h = _mix64(h ^ bits[:, j])
        # Identical rows (same site, same values) are told apart by their occurrence: the k-th copy of a row
        # gets the k-th number, so ties are spread while a row kept alone still gets its first number.
        order = np.argsort(h, kind="stable")
        hs = h[order]
        start = np.r_[0, np.flatnonzero(hs[1:] != hs[:-1]) + 1]
        occ_sorted = np.arange(n) - np.repeat(start, np.diff(np.r_[start, n]))
        occ = np.empty(n, dtype=np.uint64)
        occ[order] = occ_sorted.astype(np.uint64)
        h = _mix64(h ^ _mix64(occ * np.uint64(0xD1B54A32D192ED03) + np.uint64(1)))
        cols = (np.arange(1, p + 1, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15))[None, :]
        u = _mix64(h[:, None] ^ cols)
    return (u >> np.uint64(11)).astype(np.float64) * (1.0 / 9007199254740992.0)


def dither(X: np.ndarray, site: np.ndarray, steps: np.ndarray, random_state) -> np.ndarray:
    """Read every recorded value as a uniform draw from its recording cell.

    Adds ``(u - 1/2) x step`` to each cell, with ``step`` the recording step of
    the row's site and column (``steps``, shape (n_sites, p); NaN: no noise)
    and ``u`` from :func:`within_cell_uniforms` (a function of the seed and the
    row's values: the same rows give the same values in any order or subset).

    References
    ----------
    Machado, J. A. F. and Santos Silva, J. M. C. (2005). Quantiles for counts. JASA
    100(472), 1226-1237 (adding uniform noise to discrete values, "jittering", so that
    quantile methods for continuous data apply).
    """
    U = within_cell_uniforms(X, site, random_state) - 0.5
    step = np.nan_to_num(np.asarray(steps, dtype=float)[site], nan=0.0)
    return X + U * step


def _log_offset(v: np.ndarray, step: Optional[float]) -> float:
    """Offset ``c`` of the log scale for a right-skewed non-negative feature, else NaN.

    The rule (our own cut-offs): every value >= 0, sample skewness above 1, and
    ``log(x + c)`` less skewed than ``x`` in absolute value; ``c`` = 0 when
    every value is positive, else the recording step (else the smallest
    positive value).
    """
    from scipy.stats import skew

    v = v[~np.isnan(v)]
    if len(v) < 20 or v.min() < 0:
        return float("nan")
    sk = float(skew(v))
    if not sk > 1.0:
        return float("nan")
    if v.min() > 0:
        c = 0.0
    elif step is not None and np.isfinite(step) and step > 0:
        c = float(step)
    else:
        pos = v[v > 0]
        if not len(pos):
            return float("nan")
        c = float(pos.min())
    return c if abs(float(skew(np.log(v + c)))) < sk else float("nan")


def grid_decimals(step: float) -> int:
    """Decimals needed to write multiples of ``step`` exactly (0.25 -> 2, 0.5 -> 1, 5 -> 0)."""
    for d in range(0, 10):
        if abs(step * 10 ** d - round(step * 10 ** d)) < 1e-9 * max(1.0, step * 10 ** d):
            return d
    return 10  # pragma: no cover


def snap_to_grid(x: np.ndarray, step: float) -> np.ndarray:
    """Round to the nearest multiple of ``step`` (halves upwards), written with
    :func:`grid_decimals` decimals so that 0.1 + 0.2 reads 0.3. NaN stays NaN."""
    x = np.asarray(x, dtype=float)
    # Halves go up rather than to the even multiple: half-to-even would send a site shifted
    # by exactly half a step to the even multiples only, a grid of its own.
    return np.round(np.floor(x / step + 0.5) * step, grid_decimals(step))


# ---------------------------------------------------------------------------
# the fit
# ---------------------------------------------------------------------------

def _arr(a) -> list:
    a = np.asarray(a, dtype=float)
    return [[None if not math.isfinite(x) else float(x) for x in row] for row in a] if a.ndim == 2 else \
        [None if not math.isfinite(x) else float(x) for x in a]


def _unarr(v) -> np.ndarray:
    return np.array([[np.nan if x is None else x for x in row] for row in v] if v and isinstance(v[0], list)
                    else [np.nan if x is None else x for x in v], dtype=float)


@dataclass(frozen=True, eq=False)
class HarmonisationFit:
    """Fitted harmonisation parameters (serialisable with :meth:`to_dict`).

    Attributes
    ----------
    method : str
    features : tuple of str
        Every column of the matrix, in order.
    adjusted : tuple of bool
        Whether each column is adjusted (False: left unchanged, see
        ``unchanged``).
    unchanged : dict
        Column -> why it was left unchanged (categorical, binary, no
        variation, too few values).
    site_labels : tuple of str
    protect : tuple of dict
        The protected-design spec from :func:`protected_design`.
    alpha, sigma : ndarray (p,)
    beta : ndarray (q, p)
    gamma, delta : ndarray (n_sites, p)
        Location (standardised units) and scale (standard deviation ratio)
        removed per site (``centre``: delta = 1; ``quantile``: unused).
    quantiles : ndarray (n_sites, K, p) or None
        Site grids of the covariate-adjusted residual (``quantile``).
    pooled_quantiles : ndarray (K, p) or None
    n : ndarray (n_sites, p)
        Observed cells per site and feature in the fitting rows.
    combat : dict
        Priors and convergence of ComBat (empty for other methods).
    grid : ndarray (p,)
        Common recording grid of each feature (:func:`recording_grid`) that
        harmonised values are rounded to; NaN: none (continuous values, an
        unadjusted column, or a fit made with ``on_grid=False``).
    lower, upper : ndarray (p,)
        Smallest and largest value of each feature in the fitting rows (all
        sites pooled): the range harmonised values are kept in.
    site_grid : ndarray (n_sites, p)
        Each site's own recording step (the cell :func:`dither` spreads a
        value over); NaN: none.
    log_offset : ndarray (p,)
        ``c`` of the log scale ``log(x + c)`` the feature was fitted on; NaN:
        fitted on its own scale.
    saved_with : dict
        Keys saved beside the parameters (:meth:`save`'s ``extra``, such as the site column of
        the table it was fitted on), as :meth:`load` and :meth:`from_dict` found them; not part of
        :meth:`to_dict`.

    Examples
    --------
    Parameters save as JSON and load again, so new rows from the same sites can be harmonised
    alike (``sitecheck harmonise --apply``):

    >>> import numpy as np
    >>> from sitecheck import HarmonisationFit, apply_harmoniser, fit_harmoniser
    >>> site = np.array([0, 0, 0, 1, 1, 1])
    >>> X = np.array([[4.0], [5.0], [6.0], [8.0], [9.0], [10.0]])
    >>> fit = fit_harmoniser(X, site, method="scale", site_labels=["Ashby", "Brill"])
    >>> _ = fit.save("sodium.params.json")
    >>> again = HarmonisationFit.load("sodium.params.json")
    >>> again.method, bool(np.array_equal(apply_harmoniser(again, X, site), apply_harmoniser(fit, X, site)))
    ('scale', True)
    """

    method: str
    features: Tuple[str, ...]
    adjusted: Tuple[bool, ...]
    unchanged: Dict[str, str]
    site_labels: Tuple[str, ...]
    protect: Tuple[dict, ...]
    alpha: np.ndarray
    sigma: np.ndarray
    beta: np.ndarray
    gamma: np.ndarray
    delta: np.ndarray
    quantiles: Optional[np.ndarray]
    pooled_quantiles: Optional[np.ndarray]
    n: np.ndarray
    combat: Dict[str, Any] = field(default_factory=dict)
    grid: Optional[np.ndarray] = None
    lower: Optional[np.ndarray] = None
    upper: Optional[np.ndarray] = None
    site_grid: Optional[np.ndarray] = None
    log_offset: Optional[np.ndarray] = None
    saved_with: Dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    def __post_init__(self):
        p = len(self.features)
        for name in ("grid", "lower", "upper", "log_offset"):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.full(p, np.nan))
        if self.site_grid is None:
            object.__setattr__(self, "site_grid", np.full((len(self.site_labels), p), np.nan))

    @property
    def n_sites(self) -> int:
        return len(self.site_labels)

    def to_dict(self) -> dict:
        d = {
            "format": PARAMS_FORMAT,
            "method": self.method,
            "features": list(self.features),
            "adjusted": [bool(a) for a in self.adjusted],
            "unchanged": dict(self.unchanged),
            "site_labels": list(self.site_labels),
            "protect": [dict(s) for s in self.protect],
            "alpha": _arr(self.alpha),
            "sigma": _arr(self.sigma),
            "n_design": int(self.beta.shape[0]),
            "beta": _arr(self.beta) if self.beta.size else [],
            "gamma": _arr(self.gamma),
            "delta": _arr(self.delta),
            "n": [[int(x) for x in row] for row in self.n],
            "combat": self.combat,
            "grid": _arr(self.grid),
            "lower": _arr(self.lower),
            "upper": _arr(self.upper),
            "site_grid": _arr(self.site_grid),
            "log_offset": _arr(self.log_offset),
        }
        if self.quantiles is not None:
            d["quantiles"] = [_arr(self.quantiles[i]) for i in range(self.n_sites)]
            d["pooled_quantiles"] = _arr(self.pooled_quantiles)
        return d

    def save(self, path: str, **extra) -> str:
        """Write the parameters (:meth:`to_dict`, then :attr:`saved_with` and ``extra`` keys) as JSON
        to ``path``, atomically (a temporary file beside it, then a rename); return the path."""
        import json

        from sitecheck._files import atomic_write_path

        doc = {**self.to_dict(), **self.saved_with, **extra}
        clash = sorted(set(extra) & set(_PARAMETER_KEYS))
        if clash:
            raise ParameterError(f"extra must not use the parameters' own keys, got {clash}")
        atomic_write_path(path, json.dumps(doc, indent=1, allow_nan=False) + "\n")
        return path

    @classmethod
    def load(cls, path: str) -> "HarmonisationFit":
        """Read parameters written by :meth:`save` (or ``sitecheck harmonise``), with the keys saved
        beside them in :attr:`saved_with`; InputError naming the file if it cannot be read or is not
        a parameters file."""
        import json

        try:
            with open(path, encoding="utf-8") as fh:
                doc = json.load(fh)
        except OSError as exc:
            raise InputError(f"parameters file {path}: cannot be read ({exc.strerror})") from None
        except json.JSONDecodeError as exc:
            raise InputError(f"parameters file {path}: not JSON ({exc.msg} at line {exc.lineno})") from None
        if not isinstance(doc, dict):
            raise InputError(f"parameters file {path}: not a parameters file")
        return cls.from_dict(doc)

    @classmethod
    def from_dict(cls, d: dict) -> "HarmonisationFit":
        """Restore a fit from :meth:`to_dict` output (other keys go to :attr:`saved_with`);
        InputError if malformed."""
        try:
            if d.get("format") != PARAMS_FORMAT:
                raise InputError(f"parameters file: format {d.get('format')!r} is not {PARAMS_FORMAT!r}")
            if d.get("method") not in METHODS:
                raise InputError(f"parameters file: method {d.get('method')!r} is not one of {', '.join(METHODS)}")
            p = len(d["features"])
            q = int(d["n_design"])
            beta = _unarr(d["beta"]).reshape(q, p) if q else np.zeros((0, p))
            quant = pooled = None
            if "quantiles" in d:
                quant = np.stack([_unarr(x) for x in d["quantiles"]])
                pooled = _unarr(d["pooled_quantiles"])
            return cls(method=str(d["method"]), features=tuple(d["features"]), adjusted=tuple(d["adjusted"]),
                       unchanged=dict(d["unchanged"]), site_labels=tuple(d["site_labels"]),
                       protect=tuple(d["protect"]), alpha=_unarr(d["alpha"]), sigma=_unarr(d["sigma"]),
                       beta=beta, gamma=_unarr(d["gamma"]).reshape(-1, p), delta=_unarr(d["delta"]).reshape(-1, p),
                       quantiles=quant, pooled_quantiles=pooled,
                       n=np.asarray(d["n"], dtype=np.int64).reshape(-1, p), combat=dict(d.get("combat", {})),
                       # files written before the grid and range were stored: neither is applied
                       grid=_unarr(d["grid"]) if "grid" in d else None,
                       lower=_unarr(d["lower"]) if "lower" in d else None,
                       upper=_unarr(d["upper"]) if "upper" in d else None,
                       site_grid=_unarr(d["site_grid"]).reshape(-1, p) if "site_grid" in d else None,
                       log_offset=_unarr(d["log_offset"]) if "log_offset" in d else None,
                       saved_with={k: v for k, v in d.items() if k not in _PARAMETER_KEYS})
        except InputError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise InputError(f"parameters file is malformed ({type(exc).__name__}: {exc})") from None


def _check_inputs(X, site, D, n_sites):
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ParameterError("X must be a 2-D matrix of features")
    site = np.asarray(site)
    if site.shape != (X.shape[0],):
        raise ParameterError("site must have one code per row of X")
    if not np.issubdtype(site.dtype, np.integer):
        raise ParameterError("site must hold integer codes")
    if len(site) and (site.min() < 0 or site.max() >= n_sites):
        raise InputError(f"site code {int(site.max()) if site.max() >= n_sites else int(site.min())} "
                         f"is not one of the {n_sites} fitted sites")
    D = np.zeros((X.shape[0], 0)) if D is None else np.asarray(D, dtype=float)
    if D.ndim != 2 or D.shape[0] != X.shape[0]:
        raise ParameterError("the protected design must have one row per row of X")
    if np.isnan(D).any():
        raise ParameterError("the protected design must not hold missing values (see protected_design)")
    return X, site.astype(np.int64), D


def fit_harmoniser(X: np.ndarray, site: np.ndarray, *, method: str, site_labels: Sequence[str],
                   feature_names: Optional[Sequence[str]] = None, design: Optional[np.ndarray] = None,
                   protect_spec: Sequence[dict] = (), categorical: Optional[np.ndarray] = None,
                   unchanged_reason: Optional[Dict[str, str]] = None, n_quantiles: int = 201,
                   tol: float = 1e-4, max_iter: int = 1000, on_grid: bool = True, log_skewed: bool = False,
                   random_state=None, steps: Optional[np.ndarray] = None) -> HarmonisationFit:
    """Fit one harmonisation method.

    Parameters
    ----------
    X : ndarray (n_rows, p)
        Features (NaN = missing). Columns flagged in ``categorical`` are left
        unchanged.
    site : ndarray of int
        Site codes indexing ``site_labels``.
    method : {"centre", "scale", "quantile", "combat"}
    site_labels : sequence of str
    feature_names : sequence of str, optional
    design : ndarray (n_rows, q), optional
        Protected covariates (see :func:`protected_design`); their linear
        effect on each feature is kept.
    protect_spec : sequence of dict
        The spec of ``design`` (stored so that new rows can be encoded alike).
    categorical : ndarray of bool (p,), optional
        Columns to leave unchanged.
    unchanged_reason : dict, optional
        Column -> reason text for columns in ``categorical`` (default
        "categorical").
    n_quantiles : int, default 201
        Grid size of the ``quantile`` method.
    tol, max_iter
        Convergence of the ComBat iteration.
    on_grid : bool, default True
        Store each adjusted feature's common recording grid
        (:func:`recording_grid` of the fitting rows), which
        :func:`apply_harmoniser` rounds to. False: no grid (the published
        equations' continuous output).
    log_skewed : bool, default False
        Fit right-skewed non-negative features on the log scale
        (``log(x + c)``, rule in :func:`_log_offset`); :func:`apply_harmoniser`
        transforms back. ``sitecheck harmonise`` and the scan's check set it:
        a heavy right tail makes a site's standard deviation so noisy that
        removing it on the raw scale moves the site's lowest values (a site
        with no site effect loses its zeros).
    random_state : None, int or Generator
        With a seed, the fit reads each recorded value as a uniform draw from
        its site's recording cell (:func:`dither`); None fits the values as
        they are.
    steps : ndarray (n_sites, p), optional
        ``site_steps(X, site, n_sites)`` when already computed for these rows
        (the scan's check fits four methods on the same rows); only the
        numeric columns' steps are read.

    Returns
    -------
    HarmonisationFit

    References
    ----------
    Johnson, W. E., Li, C. and Rabinovic, A. (2007). Adjusting batch effects
    in microarray expression data using empirical Bayes methods.
    Biostatistics 8(1), 118-127.

    Examples
    --------
    Two sites whose sodium, reported in whole mmol/L, differs by about 4 mmol/L:

    >>> import numpy as np
    >>> from sitecheck import apply_harmoniser, fit_harmoniser
    >>> rng = np.random.default_rng(0)
    >>> site = np.repeat([0, 1], 200)
    >>> X = np.round(rng.normal(140, 3, (400, 1)) + np.where(site == 1, 4, 0)[:, None])
    >>> fit = fit_harmoniser(X, site, method="centre", site_labels=["Ashby", "Brill"],
    ...                      feature_names=["sodium"])
    >>> Y = apply_harmoniser(fit, X, site)
    >>> gap = lambda M: M[site == 1, 0].mean() - M[site == 0, 0].mean()
    >>> round(float(gap(X)), 1), abs(float(gap(Y))) < 0.5   # the gap is gone ...
    (3.7, True)
    >>> float(fit.grid[0]), bool(np.all(Y == np.round(Y)))  # ... and values stay whole mmol/L
    (1.0, True)
    """
    if method not in METHODS:
        raise ParameterError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if not isinstance(n_quantiles, (int, np.integer)) or n_quantiles < 3:
        raise ParameterError(f"n_quantiles must be an integer of at least 3, got {n_quantiles!r}")
    k = len(site_labels)
    given_steps = steps
    X, site, D = _check_inputs(X, site, design, k)
    n_rows, p = X.shape
    names = tuple(feature_names) if feature_names is not None else tuple(f"x{j}" for j in range(p))
    if len(names) != p:
        raise ParameterError("feature_names must name every column of X")
    cat = np.zeros(p, dtype=bool) if categorical is None else np.asarray(categorical, dtype=bool)
    unchanged: Dict[str, str] = {}
    reasons = unchanged_reason or {}
    for j in np.flatnonzero(cat):
        unchanged[names[j]] = reasons.get(names[j], "categorical")
    if D.shape[1]:
        check_confounding(site, D, k, owners=_design_owner(protect_spec) if protect_spec else None)
    num = np.flatnonzero(~cat)
    # The recording grid, each site's step, the recorded range and the log scale, from the raw values.
    grid = np.full(p, np.nan)
    lower = np.full(p, np.nan)
    upper = np.full(p, np.nan)
    log_offset = np.full(p, np.nan)
    steps = np.full((k, p), np.nan)
    if len(num):
        if given_steps is not None:
            given_steps = np.asarray(given_steps, dtype=float)
            if given_steps.shape != (k, p):
                raise ParameterError(f"steps must have shape ({k}, {p}), got {given_steps.shape}")
            steps[:, num] = given_steps[:, num]
        else:
            steps[:, num] = site_steps(X[:, num], site, k)
    for j in num:
        v = X[:, j]
        ok = ~np.isnan(v)
        if not ok.any():
            continue
        lower[j], upper[j] = float(v[ok].min()), float(v[ok].max())
        g = common_step(steps[:, j])
        if on_grid and g is not None:
            grid[j] = g
        if log_skewed:
            log_offset[j] = _log_offset(v, g)
    if not on_grid:
        steps[:] = np.nan
    if random_state is not None:
        X = dither(X, site, steps, random_state)
    X = _to_working(X, log_offset, lower)
    st = standardise_fit(X[:, num], site, D, k) if len(num) else None
    alpha = np.full(p, np.nan)
    sigma = np.full(p, np.nan)
    beta = np.zeros((D.shape[1], p))
    gamma = np.zeros((k, p))
    delta = np.ones((k, p))
    counts = np.zeros((k, p), dtype=np.int64)
    adjusted = ~cat
    if st is not None:
        alpha[num], sigma[num], beta[:, num], counts[:, num] = st.alpha, st.sigma, st.beta, st.n
        for jj, j in enumerate(num):
            nobs = int(st.n[:, jj].sum())
            if nobs < 2:
                adjusted[j] = False
                unchanged[names[j]] = "fewer than 2 values"
            elif not (st.sigma[jj] > 1e-12 * max(1.0, abs(st.alpha[jj]))):
                adjusted[j] = False
                unchanged[names[j]] = "no variation after the covariates"
    adj = np.flatnonzero(adjusted)
    quant = pooled = None
    combat_info: Dict[str, Any] = {}
    if len(adj):
        sub = np.searchsorted(num, adj)
        st_a = Standardisation(site_coef=st.site_coef[:, sub], alpha=st.alpha[sub], beta=st.beta[:, sub],
                               sigma=st.sigma[sub], n=st.n[:, sub])
        Z = _standardised(X[:, adj], D, st_a)
        if method in ("centre", "scale"):
            n_, g_hat, d2_hat = _site_moments(Z, site, k)
            gamma[:, adj] = np.where(n_ > 0, g_hat, 0.0)
            if method == "scale":
                delta[:, adj] = np.where(n_ > 1, np.sqrt(np.where(np.isnan(d2_hat), 1.0, d2_hat)), 1.0)
                delta[:, adj] = np.where(delta[:, adj] > 0, delta[:, adj], 1.0)
        elif method == "combat":
            est = combat_estimates(Z, site, k, tol=tol, max_iter=max_iter)
            gamma[:, adj] = est.gamma_star
            delta[:, adj] = np.sqrt(np.where(est.delta2_star > 0, est.delta2_star, 1.0))
            combat_info = {
                "gamma_bar": _arr(est.gamma_bar), "tau2": _arr(est.tau2),
                "lambda_bar": _arr(est.lambda_bar), "theta_bar": _arr(est.theta_bar),
                "iterations": [int(i) for i in est.iterations], "shrunk": [bool(s) for s in est.shrunk],
            }
        else:
            probs = np.linspace(0.0, 1.0, int(n_quantiles))
            R = X[:, adj] - D @ st_a.beta
            quant = np.full((k, len(probs), p), np.nan)
            pooled = np.full((len(probs), p), np.nan)
            for jj, j in enumerate(adj):
                pooled[:, j] = _quantile_grid(R[:, jj], probs)
                for i in range(k):
                    g = _quantile_grid(R[site == i, jj], probs)
                    if g is not None:
                        quant[i, :, j] = g
    off = ~np.asarray(adjusted, dtype=bool)
    grid[off], lower[off], upper[off], log_offset[off] = np.nan, np.nan, np.nan, np.nan
    steps[:, off] = np.nan
    return HarmonisationFit(method=method, features=names, adjusted=tuple(bool(a) for a in adjusted),
                            unchanged=unchanged, site_labels=tuple(str(s) for s in site_labels),
                            protect=tuple(protect_spec), alpha=alpha, sigma=sigma, beta=beta, gamma=gamma,
                            delta=delta, quantiles=quant, pooled_quantiles=pooled, n=counts, combat=combat_info,
                            grid=grid, lower=lower, upper=upper, site_grid=steps, log_offset=log_offset)


def _to_working(X: np.ndarray, log_offset: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """``log(x + c)`` in the columns with a log offset (values kept above half the lowest recorded
    ``x + c``, so a dithered zero stays in the domain); other columns as they are."""
    cols = np.flatnonzero(np.isfinite(log_offset))
    if not len(cols):
        return X
    X = np.array(X, dtype=float, copy=True)
    for j in cols:
        c = float(log_offset[j])
        floor = 0.5 * (float(lower[j]) + c) if np.isfinite(lower[j]) and lower[j] + c > 0 else 1e-12
        X[:, j] = np.log(np.maximum(X[:, j] + c, floor))
    return X


def _from_working(X: np.ndarray, log_offset: np.ndarray) -> np.ndarray:
    cols = np.flatnonzero(np.isfinite(log_offset))
    if not len(cols):
        return X
    X = np.array(X, dtype=float, copy=True)
    for j in cols:
        X[:, j] = np.exp(X[:, j]) - float(log_offset[j])
    return X


def clip_to_range(fit: HarmonisationFit, X: np.ndarray) -> Tuple[np.ndarray, np.ndarray]:
    """Keep harmonised values inside the range recorded in the fitting rows.

    A value below the smallest (above the largest) value recorded for the
    feature at any site in the fitting rows is set to that value (moved
    inwards to the feature's grid, when it has one). Such values are
    extrapolations: a per-site shift or stretch can carry a site's extreme
    values past anything recorded, e.g. below zero for a concentration.

    Returns
    -------
    X : ndarray
        A new matrix.
    counts : ndarray (p, 2) of int
        Values raised to the lower end and lowered to the upper end, per
        feature.
    """
    X = np.array(X, dtype=float, copy=True)
    p = X.shape[1]
    counts = np.zeros((p, 2), dtype=np.int64)
    for j in range(p):
        lo, hi, g = fit.lower[j], fit.upper[j], fit.grid[j]
        if not (np.isfinite(lo) and np.isfinite(hi)):
            continue
        if np.isfinite(g):
            d = grid_decimals(g)
            lo2, hi2 = round(math.ceil(lo / g - 1e-9) * g, d), round(math.floor(hi / g + 1e-9) * g, d)
            if lo2 <= hi2:
                lo, hi = lo2, hi2
        v = X[:, j]
        below, above = v < lo, v > hi
        counts[j] = (int(below.sum()), int(above.sum()))
        v[below] = lo
        v[above] = hi
    return X, counts


def apply_harmoniser(fit: HarmonisationFit, X: np.ndarray, site: np.ndarray, *,
                     design: Optional[np.ndarray] = None, on_grid: bool = True,
                     clip: bool = False, random_state=None) -> np.ndarray:
    """Apply a fitted harmonisation to rows of known sites.

    ``centre``/``scale``/``combat``: ``Y* = sigma / delta_i (Z - gamma_i) +
    alpha + D beta`` with ``Z = (Y - alpha - D beta) / sigma`` (Johnson et al.
    2007, equation 3.3 of the adjustment). ``quantile``: the pooled quantile
    function at the site's empirical CDF of ``Y - D beta``, plus ``D beta``.
    Missing cells stay missing; unadjusted columns are copied. A site with no
    observed value of a feature when fitting keeps its values unchanged.

    Then, for every adjusted feature, the values are rounded to the fit's
    common recording grid (``fit.grid``, see :func:`recording_grid`; with
    ``on_grid``, default True) and, with ``clip`` (default False), kept inside
    the range recorded in the fitting rows (:func:`clip_to_range`, which
    counts the values it moves: ``sitecheck harmonise`` and the scan's check
    clip and say how many). Without either, the published equations alone.

    With ``random_state``, each recorded value is first read as a uniform draw
    from its site's recording cell (:func:`dither`): rounding a per-site map
    of tied values back to the grid would otherwise leave each site its own
    pattern of merged and skipped grid values. Features fitted on the log
    scale (``log_skewed``) are transformed there and back.

    Parameters
    ----------
    fit : HarmonisationFit
        From :func:`fit_harmoniser` (or :meth:`HarmonisationFit.from_dict` of saved parameters).
    X : ndarray (n_rows, p)
        The same columns as the fit, in the same order (NaN = missing).
    site : ndarray of int
        Site codes indexing ``fit.site_labels``.
    design : ndarray (n_rows, q), optional
        The protected covariates, encoded as when fitting (required when the fit has any).
    on_grid : bool, default True
        Round adjusted features to the fit's common recording grid.
    clip : bool, default False
        Keep values inside the range recorded in the fitting rows.
    random_state : None, int or Generator
        Within-cell draws before mapping (see above); None maps the values as they are.

    Returns
    -------
    ndarray (n_rows, p)
        A new matrix; the input is not modified.

    References
    ----------
    Johnson, W. E., Li, C. and Rabinovic, A. (2007). Adjusting batch effects
    in microarray expression data using empirical Bayes methods.
    Biostatistics 8(1), 118-127.

    Examples
    --------
    >>> import numpy as np
    >>> from sitecheck import apply_harmoniser, fit_harmoniser
    >>> site = np.array([0, 0, 0, 1, 1, 1])
    >>> X = np.array([[4.0], [5.0], [6.0], [8.0], [9.0], [10.0]])
    >>> fit = fit_harmoniser(X, site, method="centre", site_labels=["Ashby", "Brill"])
    >>> apply_harmoniser(fit, X, site).ravel().tolist()
    [6.0, 7.0, 8.0, 6.0, 7.0, 8.0]
    """
    X, site, D = _check_inputs(X, site, design, fit.n_sites)
    if X.shape[1] != len(fit.features):
        raise ParameterError(f"X has {X.shape[1]} columns; the fit has {len(fit.features)}")
    if D.shape[1] != fit.beta.shape[0]:
        raise ParameterError(f"the protected design has {D.shape[1]} columns; the fit has {fit.beta.shape[0]}")
    W = X
    if random_state is not None:
        W = dither(W, site, fit.site_grid, random_state)
    W = _to_working(W, fit.log_offset, fit.lower)
    out = _from_working(_apply_equations(fit, W, site, D), fit.log_offset)
    adj = np.flatnonzero(np.asarray(fit.adjusted, dtype=bool))
    keep = np.setdiff1d(np.arange(X.shape[1]), adj)
    out[:, keep] = X[:, keep]
    if on_grid:
        for j in adj:
            if np.isfinite(fit.grid[j]):
                out[:, j] = snap_to_grid(out[:, j], float(fit.grid[j]))
    if clip:
        out = clip_to_range(fit, out)[0]
    return out


def _apply_equations(fit: HarmonisationFit, X: np.ndarray, site: np.ndarray, D: np.ndarray) -> np.ndarray:
    out = X.copy()
    adj = np.flatnonzero(np.asarray(fit.adjusted, dtype=bool))
    if not len(adj):
        return out
    cov = D @ fit.beta[:, adj]
    Y = X[:, adj]
    if fit.method == "quantile":
        R = Y - cov
        res = Y.copy()
        for jj, j in enumerate(adj):
            for i in range(fit.n_sites):
                r = site == i
                if not r.any() or fit.n[i, j] == 0 or np.isnan(fit.quantiles[i, 0, j]):
                    continue
                res[r, jj] = _map_quantiles(R[r, jj], fit.quantiles[i, :, j], fit.pooled_quantiles[:, j],
                                            np.linspace(0.0, 1.0, fit.quantiles.shape[1]),
                                            n_site=int(fit.n[i, j])) + cov[r, jj]
        out[:, adj] = res
        return out
    res = X[:, adj]
    cov += fit.alpha[adj][None, :]          # the standardising location
    res -= cov
    sig = fit.sigma[adj]
    res /= sig
    res -= fit.gamma[:, adj][site]
    res /= fit.delta[:, adj][site]
    res *= sig
    res += cov
    out[:, adj] = res
    return out


def harmonise(X: np.ndarray, site: np.ndarray, *, method: str, site_labels: Sequence[str], clip: bool = False,
              random_state=None, **kwargs) -> Tuple[np.ndarray, HarmonisationFit]:
    """Fit and apply in one call: ``(harmonised X, fit)`` (see :func:`fit_harmoniser`;
    ``clip`` as in :func:`apply_harmoniser`; with ``random_state`` the fit and the
    application each dither from their own stream of that seed)."""
    design = kwargs.get("design")
    rs_fit = rs_apply = None
    if random_state is not None:
        rs_fit, rs_apply = _streams(random_state)
    fit = fit_harmoniser(X, site, method=method, site_labels=site_labels, random_state=rs_fit, **kwargs)
    return apply_harmoniser(fit, X, site, design=design, clip=clip, random_state=rs_apply), fit


def _streams(random_state) -> Tuple[Any, Any]:
    """Two independent seeds (fit, apply) from an int, a sequence of ints or a Generator."""
    if isinstance(random_state, np.random.Generator):
        a, b = random_state.integers(0, 2**62, size=2)
        return int(a), int(b)
    base = list(np.atleast_1d(random_state).astype(np.int64))
    return base + [1], base + [2]


# ---------------------------------------------------------------------------
# what survives: a between-site test per feature after harmonisation
# ---------------------------------------------------------------------------

REASONS = ("missingness", "case mix (protected)", "floor or ceiling", "unit mixture", "precision",
           "shape difference", "categorical, left unchanged")


@dataclass(frozen=True)
class SurvivingGap:
    """A feature whose between-site difference survives harmonisation.

    Attributes
    ----------
    feature : str
    reason : str
        One of :data:`REASONS`, from simple diagnostics of the raw values of
        ``site`` against the other sites.
    detail : str
    site : str
        The site the reason refers to: the site with the largest one-vs-rest
        statistic among those whose raw values show a specific cause, else
        the site that differs most.
    statistic : float
        Kolmogorov-Smirnov D of that site against the rest beyond what the
        recording grid explains (:func:`grid_ks_distance`; numeric), the
        difference in missing share (missingness) or Cramer's V (categorical).
    p_value, p_adj : float
        Feature p-value and its Benjamini-Hochberg adjustment over the
        features tested.
    n : int
        Observed cells of the feature.
    """

    feature: str
    reason: str
    detail: str
    site: str
    statistic: float
    p_value: float
    p_adj: float
    n: int

    def to_dict(self) -> dict:
        return {"feature": self.feature, "reason": self.reason, "p_adj": self.p_adj, "p_value": self.p_value,
                "site": self.site, "statistic": self.statistic, "detail": self.detail, "n": self.n}


def grid_ks_distance(a: np.ndarray, b: np.ndarray, step: Optional[float]) -> float:
    """Kolmogorov-Smirnov distance left once the recording grid has explained what it can.

    ``max(sup_x F_a(x) - F_b(x + step), sup_x F_b(x) - F_a(x + step), 0)``:
    each recorded value stands for any value within half a step of it, so
    two samples whose distribution functions are less than one step apart
    everywhere can come from one distribution. With ``step`` None or 0 this
    is the two-sample KS statistic (:func:`scipy.stats.ks_2samp`).

    Examples
    --------
    >>> import numpy as np
    >>> a = np.array([1.0, 2.0, 3.0]); b = a + 0.5          # half a step apart on a grid of 1
    >>> grid_ks_distance(a, b, 1.0), round(grid_ks_distance(a, b, None), 3)
    (0.0, 0.333)
    """
    a = np.sort(np.asarray(a, dtype=float))
    b = np.sort(np.asarray(b, dtype=float))
    if len(a) == 0 or len(b) == 0:
        return float("nan")
    g = float(step) if step is not None and np.isfinite(step) and step > 0 else 0.0
    eps = 1e-9 * max(1.0, float(np.abs(a).max()), float(np.abs(b).max())) + 1e-6 * g
    d = 0.0
    for x, y in ((a, b), (b, a)):
        u = np.unique(x)
        fx = np.searchsorted(x, u, side="right") / len(x)
        fy = np.searchsorted(y, u + g + (eps if g else 0.0), side="right") / len(y)
        d = max(d, float((fx - fy).max()))
    return max(d, 0.0)


def _ks_one_vs_rest(v: np.ndarray, site: np.ndarray, k: int, min_rows: int,
                    step: Optional[float] = None) -> Tuple[np.ndarray, float, np.ndarray]:
    """One-vs-rest two-sample KS D of every site (NaN when untested), the
    smallest p-value, Bonferroni-adjusted over the sites tested, and the
    distance the grid cannot explain (:func:`grid_ks_distance`) per site."""
    D = np.full(k, np.nan)
    Dg = np.full(k, np.nan)
    en = np.full(k, np.nan)
    ok = ~np.isnan(v)
    for i in range(k):
        a = v[ok & (site == i)]
        b = v[ok & (site != i)]
        if len(a) < min_rows or len(b) < min_rows:
            continue
        D[i], en[i] = ks_statistic(a, b)
        Dg[i] = grid_ks_distance(a, b, step) if step else D[i]
    tested = np.isfinite(D)
    if not tested.any():
        return D, float("nan"), Dg
    p = ks_asymptotic_pvalue(D[tested], en[tested])
    return D, min(1.0, float(p.min()) * int(tested.sum())), Dg


def ks_statistic(a: np.ndarray, b: np.ndarray) -> Tuple[float, float]:
    """Two-sample Kolmogorov-Smirnov statistic D of ``a`` against ``b`` and the effective size
    ``m n / (m + n)``, computed as ``scipy.stats.ks_2samp`` computes them (searchsorted on the sorted
    samples), without its per-call overhead: the harmonisation check calls it once per site, feature
    and method."""
    a, b = np.sort(a), np.sort(b)
    n1, n2 = a.shape[0], b.shape[0]
    both = np.concatenate([a, b])
    diffs = np.searchsorted(a, both, side="right") / n1 - np.searchsorted(b, both, side="right") / n2
    d = max(float(np.clip(-diffs.min(), 0, 1)), float(diffs.max()))
    m, n = sorted([float(n1), float(n2)], reverse=True)
    return d, m * n / (m + n)


def ks_asymptotic_pvalue(d, en) -> np.ndarray:
    """Two-sided asymptotic p-values of two-sample KS statistics ``d`` with effective sizes ``en``,
    as ``scipy.stats.ks_2samp(method="asymp")`` gives them (the Kolmogorov distribution of
    ``scipy.stats.kstwo`` at the rounded effective size), for many statistics in one call."""
    from scipy.stats import kstwo

    return np.clip(kstwo.sf(np.asarray(d, dtype=float), np.round(np.asarray(en, dtype=float))), 0, 1)


def _fisher_p(a: int, b: int, c: int, d: int) -> float:
    """Two-sided Fisher exact p-value of the 2 x 2 table [[a, b], [c, d]] (scipy.stats.fisher_exact)."""
    from scipy.stats import fisher_exact

    return float(fisher_exact([[a, b], [c, d]], alternative="two-sided").pvalue)


def _missing_test(v: np.ndarray, site: np.ndarray, k: int) -> Tuple[float, float, int]:
    """Missing share of each site against the rest: the smallest two-sided Fisher
    exact p-value, Bonferroni-adjusted over the sites, and the site with the
    largest |missing share - rest| with that difference.

    Fisher's exact test rather than the chi-square test of the site x missing
    table: small sites with a handful of missing cells have expected counts far
    below 5, where the chi-square p-value is much too small (measured on null
    tables with 25-row sites).
    """
    miss = np.isnan(v)
    if not miss.any():
        return 1.0, 0.0, -1
    n = np.bincount(site, minlength=k).astype(np.int64)
    m = np.bincount(site, weights=miss, minlength=k).round().astype(np.int64)
    N, M = int(n.sum()), int(m.sum())
    best, tested = 1.0, 0
    for i in range(k):
        if n[i] == 0 or n[i] == N:
            continue
        tested += 1
        best = min(best, _fisher_p(int(m[i]), int(n[i] - m[i]), M - int(m[i]), N - M - int(n[i] - m[i])))
    if tested == 0:
        return 1.0, 0.0, -1
    share = np.where(n > 0, m / np.maximum(n, 1), np.nan)
    rest = np.array([(M - m[i]) / max(N - n[i], 1) for i in range(k)])
    diff = np.abs(share - rest)
    i = int(np.nanargmax(diff))
    return min(1.0, best * tested), float(diff[i]), i


def _point_mass_test(v: np.ndarray, site: np.ndarray, k: int, min_rows: int) -> Tuple[float, float, int, str]:
    """A point mass at one site's minimum or maximum that the other sites lack.

    For each site and each extreme value ``e`` of its raw values: the share of
    the site's values equal to ``e`` against the rest's share at ``e``
    (two-sided Fisher exact test of the 2 x 2 table), considered when at least
    ``min_rows`` of the site's values sit at ``e``, the site's share is at
    least 5% and twice the rest's (our own cut-offs; a censored limit that the
    other sites also record as a value, the demo's troponin '<5' read as 5
    against real 5s elsewhere, shows about three times). Returns the
    smallest p-value, Bonferroni-adjusted over every site and extreme examined
    (not only those that pass the cut-offs, which are chosen after looking),
    the share difference, the site and a detail text; p = NaN without a
    candidate. A detection limit loses the information below it, which no
    harmonisation restores, even when a method spreads the tied values so that
    the distributions match. On rounded values a small site's largest value is
    often tied a few times by chance: hence the count at ``e``.
    """
    ok = ~np.isnan(v)
    best = (float("nan"), 0.0, -1, "")
    examined = 0
    for i in range(k):
        a = v[ok & (site == i)]
        b = v[ok & (site != i)]
        if len(a) < min_rows or len(b) < min_rows:
            continue
        for side, e in (("floor", a.min()), ("ceiling", a.max())):
            examined += 1
            ca, cb = int((a == e).sum()), int((b == e).sum())
            sa, sb = ca / len(a), cb / len(b)
            if ca < min_rows or sa < 0.05 or sa < 2 * sb:
                continue
            pval = _fisher_p(ca, len(a) - ca, cb, len(b) - cb)
            if not np.isfinite(best[0]) or pval < best[0]:
                best = (pval, sa - sb, i, f"{sa:.0%} of the site's values sit at its {side} {e:g} "
                        f"(other sites: {sb:.0%} at that value)")
    if not np.isfinite(best[0]):
        return best
    return (min(1.0, best[0] * examined),) + best[1:]


def _grain(x: np.ndarray) -> float:
    u = np.unique(x)
    if len(u) < 2:
        return float("nan")
    d = np.diff(u)
    d = d[d > 1e-9 * max(1.0, float(np.abs(u).max()))]
    return float(d.min()) if len(d) else float("nan")


def _on_grid(x: np.ndarray, g: float) -> float:
    """Share of values that are whole multiples of ``g`` (to rounding error)."""
    r = x / g
    return float(np.mean(np.abs(r - np.round(r)) < 1e-6 * np.maximum(1.0, np.abs(r)) + 1e-9))


def _log_gap(x: np.ndarray) -> float:
    """Largest gap in log10 between consecutive positive values with >= 5% on each side."""
    x = np.sort(x[x > 0])
    if len(x) < 40:
        return 0.0
    lo, hi = int(0.05 * len(x)), int(0.95 * len(x))
    lx = np.log10(x[lo:hi])
    return float(np.diff(lx).max()) if len(lx) > 1 else 0.0


def diagnose(a: np.ndarray, b: np.ndarray) -> Tuple[str, str]:
    """Why do the raw values ``a`` of one site differ from ``b`` of the rest?

    Simple diagnostics, in this order: a floor or ceiling (a point mass at the
    site's minimum or maximum of at least 5% of its values and at least three
    times the rest's share at their own extreme), a unit mixture (medians of
    positive values a factor of 3 or more apart, or a gap of half a decade in
    the site's log values), precision (the site's smallest step between
    distinct values at least twice the rest's, with at least 95% of its values
    on that grid against at most 60% elsewhere), else a shape difference.
    The cut-offs are our own conventions.
    """
    a = a[~np.isnan(a)]
    b = b[~np.isnan(b)]
    if len(a) == 0 or len(b) == 0:
        return "missingness", "no values at one side"
    for side, fa, fb in (("floor", a.min(), b.min()), ("ceiling", a.max(), b.max())):
        sa = float(np.mean(a == fa))
        sb = float(np.mean(b == fb))
        if sa >= 0.05 and sa >= 3 * sb:
            return "floor or ceiling", f"{sa:.0%} of the site's values sit at its {side} {fa:g} (rest: {sb:.0%} at {fb:g})"
    pa, pb = a[a > 0], b[b > 0]
    if len(pa) >= 10 and len(pb) >= 10:
        ratio = float(np.median(pa) / np.median(pb))
        if ratio >= 3 or ratio <= 1 / 3:
            return "unit mixture", f"median ratio {ratio:.3g} against the other sites"
        gap = _log_gap(a)
        if gap >= 0.5 and _log_gap(b) < 0.5:
            return "unit mixture", f"the site's values split into two clusters a factor {10 ** gap:.3g} apart"
    ga, gb = _grain(a), _grain(b)
    if np.isfinite(ga) and np.isfinite(gb) and ga >= 2 * gb:
        on_a, on_b = _on_grid(a, ga), _on_grid(b, ga)
        if on_a >= 0.95 and on_b <= 0.6:
            return "precision", (f"the site records in steps of {ga:g} ({on_a:.0%} of its values on that grid, "
                                 f"{on_b:.0%} elsewhere; smallest step elsewhere {gb:g})")
    return "shape difference", "the distributions still differ after harmonisation"


def surviving_gaps(X_raw: np.ndarray, X_harm: np.ndarray, site: np.ndarray, *, names: Sequence[str],
                   site_labels: Sequence[str], categorical: Optional[np.ndarray] = None,
                   alpha: float = 0.05, min_effect: float = 0.05, min_rows: int = 10,
                   case_mix: Optional[np.ndarray] = None,
                   grid: Optional[Sequence[float]] = None,
                   raw_tests: Optional[Dict[int, tuple]] = None) -> Tuple[Tuple[SurvivingGap, ...], int]:
    """Features whose site gap survives harmonisation, with a reason.

    Numeric features: the two-sample Kolmogorov-Smirnov test of each site
    against the rest on the harmonised values (asymptotic p-values,
    Bonferroni over sites), combined with a test of missingness by site
    (Fisher's exact test, each site against the rest, Bonferroni over sites)
    and a test for a point mass at one site's extreme in the raw values
    (a detection limit, see :func:`_point_mass_test`), Bonferroni over the
    tests made; categorical features (left unchanged): a
    chi-square test of the site x level table. The feature p-values are
    Benjamini-Hochberg adjusted over all features tested. A feature survives
    when ``p_adj < alpha`` and its effect reaches ``min_effect`` (KS D,
    difference in missing share, or Cramer's V), so that trivial differences
    in very large tables are not listed.

    The recording grid: a gap between harmonised values survives only when it
    is larger than what the feature's recording grid explains. Its effect is
    then not the KS D but :func:`grid_ks_distance` with the feature's common
    grid step ``G`` (``grid``, default :func:`recording_grid` of the raw
    values): the part of the gap between the distribution functions that
    remains after one of them is moved by up to one step ``G`` in the
    direction that closes it. Every recorded value stands for anything within
    half a step of it, so sites whose values differ by a fraction of the step
    (a per-site offset grid, a shift smaller than the rounding) do not survive.
    For continuous values (no grid) this is the KS D.

    ``case_mix`` (rows x features), the protected covariates' part of each
    harmonised value (``D beta``), lets a gap be attributed to case mix: when
    the test on ``X_harm - case_mix`` finds no gap (Bonferroni p >= alpha or
    D below ``min_effect``), the reason is "case mix (protected)", a real
    difference kept on purpose.

    ``raw_tests``, a dict shared by calls with the same ``X_raw`` and ``site``
    (the check calls this once per method), keeps each feature's missingness
    and point-mass tests, which read the raw values only, so that they run once.

    Returns
    -------
    (gaps, n_tested)

    References
    ----------
    Massey, F. J. (1951). The Kolmogorov-Smirnov test for goodness of fit.
    JASA 46, 68-78.
    Benjamini, Y. and Hochberg, Y. (1995). JRSS B 57, 289-300.
    """
    from scipy.stats import chi2_contingency

    from sitecheck.analyses.stats import bh_adjust

    k = len(site_labels)
    p = X_raw.shape[1]
    cat = np.zeros(p, dtype=bool) if categorical is None else np.asarray(categorical, dtype=bool)
    if grid is None:
        steps = [None if cat[j] else recording_grid(X_raw[:, j], site, k) for j in range(p)]
    else:
        steps = [None if g is None or not np.isfinite(g) else float(g) for g in grid]
    rows: List[Tuple[int, float, float, str, str, int]] = []  # j, p, effect, reason, detail, site
    for j in range(p):
        v = X_harm[:, j]
        if cat[j]:
            ok = ~np.isnan(v)
            if ok.sum() < min_rows:
                continue
            tab = pd.crosstab(site[ok], v[ok]).to_numpy(dtype=float)
            if tab.shape[0] < 2 or tab.shape[1] < 2:
                continue
            res = chi2_contingency(tab, correction=False)
            V = math.sqrt(res.statistic / (tab.sum() * (min(tab.shape) - 1)))
            resid = (tab - res.expected_freq) ** 2 / res.expected_freq
            worst = int(pd.crosstab(site[ok], v[ok]).index[int(np.argmax(resid.sum(axis=1)))])
            rows.append((j, float(res.pvalue), V, "categorical, left unchanged",
                         f"Cramer's V {V:.2f} across sites", worst))
            continue
        _, p_ks, D_sites = _ks_one_vs_rest(v, site, k, min_rows, steps[j])
        # the missingness and point-mass tests read the raw values only: shared by every method
        raw = raw_tests.get(j) if raw_tests is not None else None
        if raw is None:
            raw = (_missing_test(X_raw[:, j], site, k), _point_mass_test(X_raw[:, j], site, k, min_rows))
            if raw_tests is not None:
                raw_tests[j] = raw
        (p_m, diff_m, i_m), (p_f, eff_f, i_f, det_f) = raw
        if not np.isfinite(p_ks) and i_m < 0:
            continue
        has_miss = i_m >= 0
        has_floor = np.isfinite(p_f)
        p_ks_v = p_ks if np.isfinite(p_ks) else 1.0
        tests = [p_ks_v] + ([p_m] if has_miss else []) + ([p_f] if has_floor else [])
        p_feat = min(1.0, len(tests) * min(tests))
        if has_miss and (p_m < p_ks_v or not np.isfinite(p_ks)) and diff_m >= min_effect:
            rows.append((j, p_feat, diff_m, "missingness",
                         f"missing share differs by {diff_m:.0%} from the other sites", i_m))
            continue
        if has_floor and p_f < alpha and eff_f >= min_effect:
            rows.append((j, p_feat, float(eff_f), "floor or ceiling", det_f, i_f))
            continue
        if not np.isfinite(p_ks):
            continue
        # The reason: the first site, by KS D, whose raw values show a specific cause
        # (floor or ceiling, unit mixture, precision); else the worst site's shape.
        order = [i for i in np.argsort(-np.nan_to_num(D_sites, nan=-1.0), kind="stable") if np.isfinite(D_sites[i])]
        pick = None
        for i in order:
            if D_sites[i] < min_effect:
                break
            reason, detail = diagnose(X_raw[site == i, j], X_raw[site != i, j])
            if reason != "shape difference":
                pick = (reason, detail, int(i))
                break
        if pick is None and case_mix is not None and case_mix[:, j].any():
            _, p_res, D_res = _ks_one_vs_rest(v - case_mix[:, j], site, k, min_rows)
            if np.isfinite(p_res) and (p_res >= alpha or np.nanmax(D_res) < min_effect):
                pick = ("case mix (protected)", "the gap disappears once the protected columns' effect is "
                        "removed: a difference in case mix, kept on purpose", int(order[0]))
        if pick is None:
            i = int(order[0])
            pick = ("shape difference", "the distributions still differ after harmonisation", i)
        rows.append((j, p_feat, float(D_sites[pick[2]]), pick[0], pick[1], pick[2]))
    if not rows:
        return (), 0
    padj = bh_adjust(np.array([r[1] for r in rows]))
    out = []
    for r, pa in zip(rows, padj):
        j, pv, eff, reason, detail, i = r
        if pa < alpha and eff >= min_effect:
            out.append(SurvivingGap(feature=str(names[j]), reason=reason, detail=detail,
                                    site=str(site_labels[i]) if i >= 0 else "", statistic=float(eff),
                                    p_value=float(pv), p_adj=float(pa), n=int((~np.isnan(X_raw[:, j])).sum())))
    out.sort(key=lambda g: (g.p_adj, -g.statistic, g.feature))
    return tuple(out), len(rows)


# ---------------------------------------------------------------------------
# the scan's harmonisation check
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class MethodCheck:
    """One method's result: site signal left, surviving gaps, outcome signal kept.

    Attributes
    ----------
    method : str
    probe_auc : float
    probe_auc_ci : (float, float)
    probe_p_value : float or None
    n : int
        Rows used for the re-probe (the scan's modelling rows, or a
        site-stratified subsample of them).
    surviving : tuple of SurvivingGap
    n_tested : int
        Features tested for a surviving gap.
    outcome_auc_before, outcome_auc_after : float or None
        Cross-validated outcome AUC from the features, on the same folds,
        before and after harmonisation (None without an outcome).
    outcome_auc_before_ci, outcome_auc_after_ci : (float, float) or None
    outcome_n : int
        Rows with a known outcome.
    protected : tuple of str
    unchanged : dict
        Feature -> why it was left unchanged.
    warnings : tuple of str
    grid : dict
        Feature -> the common recording grid step its harmonised values were
        rounded to (features without a grid are not listed).
    """

    method: str
    probe_auc: float
    probe_auc_ci: Tuple[float, float]
    probe_p_value: Optional[float]
    n: int
    surviving: Tuple[SurvivingGap, ...]
    n_tested: int
    outcome_auc_before: Optional[float]
    outcome_auc_before_ci: Optional[Tuple[float, float]]
    outcome_auc_after: Optional[float]
    outcome_auc_after_ci: Optional[Tuple[float, float]]
    outcome_n: int
    protected: Tuple[str, ...]
    unchanged: Dict[str, str]
    warnings: Tuple[str, ...]
    model: str = "boosting"
    n_splits: int = 3
    outcome_protected: bool = False
    #: the smallest p-value the probe's permutation test could give
    probe_p_value_floor: Optional[float] = None
    grid: Dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "probe_auc": self.probe_auc,
            "probe_auc_ci": list(self.probe_auc_ci),
            "probe_p_value": self.probe_p_value,
            "probe_p_value_floor": self.probe_p_value_floor,
            "n": self.n,
            "model": self.model,
            "folds": self.n_splits,
            "surviving": [g.to_dict() for g in self.surviving],
            "n_tested": self.n_tested,
            "outcome_auc_before": self.outcome_auc_before,
            "outcome_auc_before_ci": None if self.outcome_auc_before_ci is None else list(self.outcome_auc_before_ci),
            "outcome_auc_after": self.outcome_auc_after,
            "outcome_auc_after_ci": None if self.outcome_auc_after_ci is None else list(self.outcome_auc_after_ci),
            "outcome_n": self.outcome_n,
            "outcome_protected": self.outcome_protected,
            "protected": list(self.protected),
            "unchanged": dict(self.unchanged),
            "warnings": list(self.warnings),
            "reprobe": "fitted within each training fold, applied to the held-out rows",
            "grid": dict(self.grid),
        }


@dataclass(frozen=True)
class HarmonisationCheck:
    """Every method's :class:`MethodCheck`; ``to_dict()`` is keyed by method name."""

    methods: Tuple[MethodCheck, ...]

    def __getitem__(self, method: str) -> MethodCheck:
        for m in self.methods:
            if m.method == method:
                return m
        raise KeyError(method)

    def to_dict(self) -> dict:
        return {m.method: m.to_dict() for m in self.methods}


def merge_checks(*checks: "HarmonisationCheck") -> "HarmonisationCheck":
    """One check from checks of disjoint sets of methods (run apart, e.g. in two processes), in
    :data:`METHODS` order. Each method's result does not depend on which others were checked with it."""
    found = [m for c in checks if c is not None for m in c.methods]
    names = [m.method for m in found]
    if len(set(names)) != len(names):
        raise ParameterError(f"a method was checked twice: {names}")
    return HarmonisationCheck(methods=tuple(sorted(found, key=lambda m: METHODS.index(m.method))))


def _sub_folds(folds, keep: np.ndarray):
    """Restrict (train, test) folds to the rows in boolean mask ``keep``, renumbered."""
    new = np.cumsum(keep) - 1
    out = []
    for tr, te in folds:
        tr2, te2 = tr[keep[tr]], te[keep[te]]
        out.append((new[tr2], new[te2]))
    return tuple(out)


def _prevalence_warning(outcome: np.ndarray, site: np.ndarray, labels: Sequence[str]) -> Optional[str]:
    from scipy.stats import chi2_contingency

    ok = ~np.isnan(outcome)
    k = len(labels)
    n = np.bincount(site[ok], minlength=k).astype(float)
    pos = np.bincount(site[ok], weights=outcome[ok], minlength=k)
    keep = n > 0
    tab = np.column_stack([pos[keep], n[keep] - pos[keep]])
    if tab.shape[0] < 2 or (tab.sum(axis=0) == 0).any():
        return None
    pval = float(chi2_contingency(tab, correction=False).pvalue)
    if pval >= 0.05:
        return None
    prev = ", ".join(f"{labels[i]} {pos[i] / n[i]:.1%}" for i in range(k) if n[i] > 0)
    return (f"outcome prevalence differs by site (chi-square p = {pval:.2g}; {prev}) and the outcome is not "
            "protected: harmonisation may remove real outcome signal along with the site effect")


def _outcome_design_columns(spec: Sequence[dict], outcome: Optional[str]) -> List[int]:
    """Design columns that encode the outcome (value and missing indicator)."""
    if not outcome:
        return []
    owners = _design_owner(spec)
    return [j for j, o in enumerate(owners) if o == outcome]


def outcome_auc_cv(X: np.ndarray, y: np.ndarray, site: np.ndarray, cat: np.ndarray, folds, *, seed: int,
                   n_boot: int, model: str = "boosting", method: Optional[str] = None,
                   site_labels: Sequence[str] = (), design: Optional[np.ndarray] = None,
                   protect_spec: Sequence[dict] = (), outcome_cols: Sequence[int] = (),
                   leave: Optional[np.ndarray] = None, reasons: Optional[Dict[str, str]] = None,
                   names: Optional[Sequence[str]] = None) -> Tuple[float, Tuple[float, float], int]:
    """Cross-validated outcome AUC from the features, optionally harmonised inside each fold.

    With ``method``, the harmonisation is fitted on each training fold and
    applied to its held-out rows, whose outcome columns in the protected
    design are set to the training mean (a deployed model does not know the
    outcome), so the AUC is not inflated by protecting the outcome. The model
    is the probe's (:mod:`sitecheck.analyses.probe`), fitted per fold with the same
    seeds. Returns ``(auc, (lo, hi), n)`` with a stratified-bootstrap interval.
    """
    from sitecheck.analyses import stats
    from sitecheck.analyses.probe import _estimator
    from sitecheck.analyses.models import fit_classifier

    y = np.asarray(y).astype(np.int64)
    score = np.full(len(y), np.nan)
    D = np.zeros((len(y), 0)) if design is None else design
    with thread_limit(native_threads(len(y))):
        for f, (tr, te) in enumerate(folds):
            Xtr, Xte = X[tr], X[te]
            if method is not None:
                key = stream_key(seed, "harmonise", METHODS.index(method), f, 7)
                fit = fit_harmoniser(Xtr, site[tr], method=method, site_labels=site_labels, feature_names=names,
                                     design=D[tr], protect_spec=protect_spec, categorical=leave,
                                     unchanged_reason=reasons, log_skewed=True, random_state=key + [1])
                Dte = D[te].copy()
                for c in outcome_cols:
                    Dte[:, c] = D[tr, c].mean()
                Xtr = apply_harmoniser(fit, Xtr, site[tr], design=D[tr], clip=True, random_state=key + [2])
                Xte = apply_harmoniser(fit, Xte, site[te], design=Dte, clip=True, random_state=key + [3])
            est = _estimator(model, cat, 2, len(tr), random_state=derived_seed(seed, "probe.fold_model", f))
            fit_classifier(est, Xtr, y[tr])
            proba = est.predict_proba(Xte)
            cls = list(np.asarray(est.classes_))
            score[te] = proba[:, cls.index(1)] if 1 in cls else 0.0
    auc, ci = stats.binary_auc_ci(y, score, n_boot=n_boot, random_state=stream(seed, "harmonise.outcome_ci"))
    return float(auc), (float(ci[0]), float(ci[1])), int(len(y))


def site_reprobe_cv(X: np.ndarray, site: np.ndarray, cat: np.ndarray, folds, *, method: str, seed: int,
                    n_boot: int, n_permutations: int, model: str = "boosting", site_labels: Sequence[str] = (),
                    design: Optional[np.ndarray] = None, protect_spec: Sequence[dict] = (),
                    leave: Optional[np.ndarray] = None, reasons: Optional[Dict[str, str]] = None,
                    names: Optional[Sequence[str]] = None, steps_cache: Optional[Dict[int, np.ndarray]] = None):
    """The site probe on harmonised features, leak-free.

    In each fold the harmonisation (``method``, grid and range included) is
    fitted on the training rows only and applied to the training and the
    held-out rows; the probe's model (the factory of :mod:`sitecheck.analyses.models`
    through :mod:`sitecheck.analyses.probe`, same seeds as the scan's probe) is fitted
    on the harmonised training rows and scores the held-out rows. No scored
    row shaped the harmonisation that was applied to it. The out-of-fold
    probabilities are scored as the scan's probe is
    (:func:`sitecheck.analyses.probe.score_crossfit`: macro one-vs-rest AUC, bootstrap
    interval, fold-permutation p-value).

    Returns
    -------
    ProbeScore
    """
    from sitecheck.analyses.models import fit_classifier
    from sitecheck.analyses.probe import CrossFit, _estimator, score_crossfit

    site = np.asarray(site).astype(np.int64)
    k = len(site_labels)
    proba = np.full((len(site), k), np.nan)
    D = np.zeros((len(site), 0)) if design is None else design
    fitted = []
    n_iter = []
    with thread_limit(native_threads(len(site))):
        for f, (tr, te) in enumerate(folds):
            key = stream_key(seed, "harmonise", METHODS.index(method), f)
            fold_steps = None
            if steps_cache is not None:  # each site's recording step in the fold's rows: the same for every method
                if f not in steps_cache:
                    steps_cache[f] = site_steps(X[tr], site[tr], k)
                fold_steps = steps_cache[f]
            fit = fit_harmoniser(X[tr], site[tr], method=method, site_labels=site_labels, feature_names=names,
                                 steps=fold_steps,
                                 design=D[tr], protect_spec=protect_spec, categorical=leave,
                                 unchanged_reason=reasons, log_skewed=True, random_state=key + [1])
            Xtr = apply_harmoniser(fit, X[tr], site[tr], design=D[tr], clip=True, random_state=key + [2])
            Xte = apply_harmoniser(fit, X[te], site[te], design=D[te], clip=True, random_state=key + [3])
            est = _estimator(model, cat, k, len(tr), random_state=derived_seed(seed, "probe.fold_model", f))
            fit_classifier(est, Xtr, site[tr])
            block = np.zeros((len(te), k))
            block[:, np.asarray(est.classes_, dtype=np.int64)] = est.predict_proba(Xte)
            proba[te] = block
            fitted.append(est)
            if model == "boosting":
                n_iter.append(int(est.n_iter_))
    cf = CrossFit(proba=proba, models=tuple(fitted), folds=tuple(folds), classes=np.arange(k), model=model,
                  n_iter=tuple(n_iter))
    return score_crossfit(site, cf, n_boot=n_boot, n_permutations=n_permutations,
                          random_state=stream(seed, "harmonise.reprobe"))


def harmonisation_check(prep, *, methods: Sequence[str] = METHODS, protect: Optional[Sequence[str]] = None,
                        random_state: Optional[int] = None, n_boot: int = 200, n_permutations: int = 199,
                        model: str = "boosting", n_splits: int = 3, probe_rows: int = 20_000,
                        alpha: float = 0.05, min_effect: float = 0.05) -> HarmonisationCheck:
    """Harmonise the scan's features with each method and check what is left.

    For each method, on the scan's modelling rows: the site probe again,
    leak-free (:func:`site_reprobe_cv`: the harmonisation is fitted within
    each training fold and applied to the held-out fold), the features whose
    gap survives (:func:`surviving_gaps` on every row harmonised as the user
    would, with the grid rule),
    and the outcome's cross-validated AUC from the features before and after
    harmonisation on the same folds (over-correction shows as a drop).

    Parameters
    ----------
    prep : Prepared
    methods : sequence of str, default all of :data:`METHODS`
    protect : sequence of str, optional
        Protected columns; default: the table's covariates plus the outcome.
    random_state : int, optional
        Default: the scan's seed.
    n_boot, n_permutations : int
        Bootstrap and permutation sizes of the re-probe.
    model : {"boosting", "linear"}
    n_splits : int, default 3
        Folds (stratified by site, shuffled with the seed) shared by every
        re-probe and by the outcome AUCs before and after; fewer than the
        scan's own folds keep the eight to nine cross-fits affordable.
    probe_rows : int, default 20000
        The re-probes and outcome AUCs use a site-stratified subsample of at
        most this many rows (harmonisation is fitted on all rows); each re-probe
        reports its ``n`` and interval. Scaled from the full probe's interval at
        100,000 x 50 x 4 (+-0.004 AUC), 20,000 rows give about +-0.01 (a
        derivation by 1/sqrt(n), not a measurement), enough to tell whether
        harmonisation leaves site signal.
    alpha, min_effect : float
        See :func:`surviving_gaps`.

    Returns
    -------
    HarmonisationCheck

    Notes
    -----
    Both re-probes are leak-free: the harmonisation is fitted within each
    training fold and applied to the held-out rows, which never shape it. For
    the outcome AUC the held-out rows are also harmonised without their
    outcome (see :func:`outcome_auc_cv`), so protecting the outcome cannot
    inflate it. Harmonised values are rounded to each feature's common
    recording grid and kept in the recorded range (:func:`apply_harmoniser`),
    as ``sitecheck harmonise`` writes them. Binary and categorical features are left
    unchanged. A protected column that is confounded with site is dropped
    from the protection, with a warning.

    References
    ----------
    Johnson, W. E., Li, C. and Rabinovic, A. (2007). Biostatistics 8(1), 118-127.
    """
    from sitecheck.table.prepare import stratified_subsample
    from sitecheck.analyses.probe import make_folds

    if not isinstance(n_splits, (int, np.integer)) or n_splits < 2:
        raise ParameterError(f"n_splits must be an integer of at least 2, got {n_splits!r}")
    if not isinstance(probe_rows, (int, np.integer)) or probe_rows < 100:
        raise ParameterError(f"probe_rows must be an integer of at least 100, got {probe_rows!r}")
    for m in methods:
        if m not in METHODS:
            raise ParameterError(f"method must be one of {', '.join(METHODS)}, got {m!r}")
    seed = int(prep.seed if random_state is None else random_state)
    table = prep.table
    frame = table.frame.iloc[prep.rows]
    names = list(prep.features.names)
    kinds = list(prep.features.kinds)
    cat = np.asarray(prep.features.categorical, dtype=bool)
    leave = cat | np.array([k == "binary" for k in kinds], dtype=bool)
    reasons = {n: ("binary" if k == "binary" else "categorical") for n, k, l in zip(names, kinds, leave) if l}
    if protect is None:
        protect = list(table.covariates) + ([table.outcome] if table.outcome else [])
    protect = list(protect)
    warnings: List[str] = []
    k = len(prep.site_labels)
    while True:
        D, spec = protected_design(frame, protect)
        try:
            if D.shape[1]:
                check_confounding(prep.site, D, k, owners=_design_owner(spec))
            break
        except InputError as exc:
            bad = next(s["name"] for s in spec if repr(s["name"]) in str(exc))
            protect.remove(bad)
            warnings.append(f"protected column {bad!r} is confounded with site and was not protected")
    X = prep.X
    y_out = prep.outcome
    # Rows and folds of the re-probes (harmonisation itself uses every row).
    sub = stratified_subsample(prep.site, int(probe_rows), stream(seed, "harmonise"))
    site_sub = prep.site[sub]
    folds = make_folds(site_sub, int(n_splits), random_state=seed)
    y_sub = None if y_out is None else y_out[sub]
    out_ok = None if y_out is None else ~np.isnan(y_sub)
    out_folds = None if y_out is None else _sub_folds(folds, out_ok)
    before = None
    if y_out is not None and table.outcome not in protect:
        w = _prevalence_warning(y_out, prep.site, prep.site_labels)
        if w:
            warnings.append(w)
    if y_out is not None and table.outcome in protect:
        warnings.append("the outcome is protected: for the outcome AUC after harmonisation, held-out rows were "
                        "harmonised without their outcome (set to the training mean), as for new patients; "
                        "the harmonised table itself needs every row's outcome")
    D_sub = D[sub]
    out_cols = _outcome_design_columns(spec, table.outcome)
    has_outcome = (y_out is not None and out_ok.sum() >= 20 and len(np.unique(y_sub[out_ok])) == 2
                   and all(len(np.unique(y_sub[te][out_ok[te]])) == 2 for _, te in folds))
    if has_outcome:
        o = out_ok
        before = outcome_auc_cv(X[sub][o], y_sub[o], site_sub[o], cat, out_folds, seed=seed, n_boot=n_boot,
                                model=model)
    results = []
    raw_tests: Dict[int, tuple] = {}  # the raw-value tests of surviving_gaps, the same for every method
    fold_steps: Dict[int, np.ndarray] = {}  # each re-probe fold's recording steps, the same for every method
    all_steps = site_steps(X, prep.site, k)
    for method in methods:
        Xh, fit = harmonise(X, prep.site, method=method, site_labels=prep.site_labels, feature_names=names,
                            steps=all_steps,
                            design=D, protect_spec=spec, categorical=leave, unchanged_reason=reasons, clip=True,
                            log_skewed=True, random_state=stream_key(seed, "harmonise", METHODS.index(method), 99))
        score = site_reprobe_cv(X[sub], site_sub, cat, folds, method=method, seed=seed, n_boot=n_boot,
                                n_permutations=n_permutations, model=model, site_labels=prep.site_labels,
                                design=D_sub, protect_spec=spec, leave=leave, reasons=reasons, names=names,
                                steps_cache=fold_steps)
        case_mix = (D @ fit.beta) if D.shape[1] else None
        if case_mix is not None:
            case_mix[:, ~np.asarray(fit.adjusted, dtype=bool)] = 0.0
        gaps, n_tested = surviving_gaps(X, Xh, prep.site, names=names, site_labels=prep.site_labels,
                                        categorical=leave, alpha=alpha, min_effect=min_effect, case_mix=case_mix,
                                        raw_tests=raw_tests,
                                        grid=np.where(np.asarray(fit.adjusted, dtype=bool), fit.grid,
                                                      recording_grids(X, prep.site, k,
                                                                      skip=leave | np.asarray(fit.adjusted))))
        after = None
        if before is not None:
            o = out_ok
            after = outcome_auc_cv(X[sub][o], y_sub[o], site_sub[o], cat, out_folds, seed=seed, n_boot=n_boot,
                                   model=model, method=method, site_labels=prep.site_labels, design=D_sub[o],
                                   protect_spec=spec, outcome_cols=out_cols, leave=leave, reasons=reasons,
                                   names=names)
        results.append(MethodCheck(
            method=method, probe_auc=float(score.auc), probe_auc_ci=tuple(float(c) for c in score.auc_ci),
            probe_p_value=None if score.p_value is None else float(score.p_value), n=int(score.n),
            probe_p_value_floor=getattr(score, "p_value_floor", None),
            surviving=gaps, n_tested=int(n_tested),
            outcome_auc_before=None if before is None else before[0],
            outcome_auc_before_ci=None if before is None else before[1],
            outcome_auc_after=None if after is None else after[0],
            outcome_auc_after_ci=None if after is None else after[1],
            outcome_n=0 if out_ok is None or before is None else int(out_ok.sum()), protected=tuple(protect),
            unchanged=dict(fit.unchanged), warnings=tuple(warnings), model=model, n_splits=len(folds),
            outcome_protected=bool(table.outcome and table.outcome in protect),
            grid={n: float(g) for n, g in zip(names, fit.grid) if np.isfinite(g)}))
    return HarmonisationCheck(methods=tuple(results))
