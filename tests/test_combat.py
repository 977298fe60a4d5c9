"""ComBat (Johnson, Li & Rabinovic, Biostatistics 2007) against its published
equations and against ordinary least squares from statsmodels."""
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sitecheck.harmonise.methods import (HarmonisationFit, apply_harmoniser, combat_estimates, fit_harmoniser, harmonise,
                                 protected_design, standardise_fit, _standardised)

LABELS = ("North Fen", "Quarry Hill", "Saltmarsh")  # invented sites


def _synthetic(n=900, p=5, seed=0, missing=0.1):
    """Invented data: per-site location and scale effects, an age effect, missing cells."""
    rng = np.random.default_rng(seed)
    site = rng.integers(0, 3, n)
    age = rng.normal(55, 12, n) + 5 * (site == 2)
    sex = rng.choice(["F", "M"], n)
    shift = np.array([0.0, 1.5, -1.0])[site][:, None] * np.linspace(0.5, 1.5, p)[None, :]
    scale = np.array([1.0, 2.0, 0.6])[site][:, None]
    X = 10 + shift + scale * rng.normal(size=(n, p)) + 0.04 * age[:, None] + 0.5 * (sex == "M")[:, None]
    X[rng.random((n, p)) < missing] = np.nan
    frame = pd.DataFrame({"age": age, "sex": sex})
    return X, site, frame


def test_standardisation_equals_statsmodels_ols():
    # Reference: statsmodels OLS on the same design (site indicators without an
    # intercept plus the protected covariates), rows with a missing feature dropped.
    # ComBat's grand mean is the n-weighted mean of the site coefficients and its
    # pooled variance the residual sum of squares over N (Johnson et al. 2007, sec. 3.1).
    X, site, frame = _synthetic()
    D, spec = protected_design(frame, ["age", "sex"])
    st = standardise_fit(X, site, D, 3)
    design = np.column_stack([np.eye(3)[site], D])
    for j in range(X.shape[1]):
        ok = ~np.isnan(X[:, j])
        res = sm.OLS(X[ok, j], design[ok]).fit()
        np.testing.assert_allclose(st.site_coef[:, j], res.params[:3], rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(st.beta[:, j], res.params[3:], rtol=1e-9, atol=1e-9)
        n_i = np.bincount(site[ok], minlength=3)
        assert np.array_equal(st.n[:, j], n_i)
        np.testing.assert_allclose(st.alpha[j], (n_i / ok.sum()) @ res.params[:3], rtol=1e-12)
        np.testing.assert_allclose(st.sigma[j] ** 2, res.ssr / res.nobs, rtol=1e-9)


def test_site_estimates_before_shrinkage_equal_statsmodels_ols():
    # Reference: gamma_hat is the OLS coefficient of the site indicators on the
    # standardised data and delta_hat^2 the residual mean square (ddof 1) of an
    # intercept-only OLS within each site: statsmodels OLS, same rows.
    X, site, frame = _synthetic(seed=1)
    D, _ = protected_design(frame, ["age", "sex"])
    st = standardise_fit(X, site, D, 3)
    Z = _standardised(X, D, st)
    est = combat_estimates(Z, site, 3)
    B = np.eye(3)[site]
    for j in range(X.shape[1]):
        ok = ~np.isnan(Z[:, j])
        g = sm.OLS(Z[ok, j], B[ok]).fit().params
        np.testing.assert_allclose(est.gamma_hat[:, j], g, rtol=1e-9, atol=1e-12)
        for i in range(3):
            r = ok & (site == i)
            d2 = sm.OLS(Z[r, j], np.ones(r.sum())).fit().mse_resid
            np.testing.assert_allclose(est.delta2_hat[i, j], d2, rtol=1e-9)


def test_priors_and_posterior_follow_the_published_equations():
    # Johnson et al. (2007), sec. 3.2: method-of-moments priors and the
    # conditional posterior means at convergence (a fixed point of both equations).
    X, site, frame = _synthetic(n=1500, p=8, seed=2)
    D, _ = protected_design(frame, ["age"])
    st = standardise_fit(X, site, D, 3)
    Z = _standardised(X, D, st)
    est = combat_estimates(Z, site, 3, tol=1e-10)
    for i in range(3):
        g, d2 = est.gamma_hat[i], est.delta2_hat[i]
        V, S2 = d2.mean(), d2.var(ddof=1)
        assert est.gamma_bar[i] == pytest.approx(g.mean(), rel=1e-12)
        assert est.tau2[i] == pytest.approx(g.var(ddof=1), rel=1e-12)
        assert est.lambda_bar[i] == pytest.approx((V ** 2 + 2 * S2) / S2, rel=1e-12)
        assert est.theta_bar[i] == pytest.approx((V ** 3 + V * S2) / S2, rel=1e-12)
        r = site == i
        for j in range(X.shape[1]):
            z = Z[r, j][~np.isnan(Z[r, j])]
            n = len(z)
            gs, ds = est.gamma_star[i, j], est.delta2_star[i, j]
            t2, gb = est.tau2[i], est.gamma_bar[i]
            assert gs == pytest.approx((n * t2 * g[j] + ds * gb) / (n * t2 + ds), rel=1e-7, abs=1e-9)
            assert ds == pytest.approx((est.theta_bar[i] + 0.5 * ((z - gs) ** 2).sum())
                                       / (n / 2 + est.lambda_bar[i] - 1), rel=1e-7)
    assert est.shrunk.all()
    # Shrinkage pulls each estimate toward the site's prior mean, never past it.
    lo = np.minimum(est.gamma_hat, est.gamma_bar[:, None]) - 1e-12
    hi = np.maximum(est.gamma_hat, est.gamma_bar[:, None]) + 1e-12
    assert ((est.gamma_star >= lo) & (est.gamma_star <= hi)).all()


def test_adjusted_data_is_the_published_back_transform():
    # Johnson et al. (2007), sec. 3.2: Y* = sigma / delta* (Z - gamma*) + alpha + D beta.
    X, site, frame = _synthetic(seed=3)
    D, spec = protected_design(frame, ["age", "sex"])
    Xh, fit = harmonise(X, site, method="combat", site_labels=LABELS, design=D, protect_spec=spec)
    st = standardise_fit(X, site, D, 3)
    Z = _standardised(X, D, st)
    est = combat_estimates(Z, site, 3)
    want = st.sigma * (Z - est.gamma_star[site]) / np.sqrt(est.delta2_star[site]) + st.location(D)
    np.testing.assert_allclose(Xh, want, rtol=1e-10, equal_nan=True)
    assert np.array_equal(np.isnan(Xh), np.isnan(X))  # missing stays missing


def test_location_scale_effects_removed_and_probe_falls():
    # Ground-truth injection: only per-site location and scale effects.
    from sitecheck.analyses.probe import probe_matrix

    rng = np.random.default_rng(4)
    n, p = 2400, 6
    site = rng.integers(0, 3, n)
    X = np.array([0.0, 2.0, -1.5])[site][:, None] + np.array([1.0, 2.5, 0.5])[site][:, None] * rng.normal(size=(n, p))
    X[rng.random((n, p)) < 0.05] = np.nan
    folds = tuple((tr, te) for tr, te in
                  __import__("sklearn.model_selection").model_selection.StratifiedKFold(
                      3, shuffle=True, random_state=0).split(X, site))
    before = probe_matrix(X, site, np.zeros(p, bool), folds, random_state=0, n_boot=50, n_permutations=0)
    assert before.auc > 0.9
    Xh, _ = harmonise(X, site, method="combat", site_labels=LABELS)
    # Tolerance (our own): site means within 0.05 pooled SD, variances within 10%;
    # before harmonisation the means differ by up to 2 SD and the variances 25-fold.
    sd = np.nanstd(Xh, axis=0)
    means = np.array([np.nanmean(Xh[site == i], axis=0) for i in range(3)])
    varis = np.array([np.nanvar(Xh[site == i], axis=0, ddof=1) for i in range(3)])
    assert (np.abs(means - means.mean(axis=0)) / sd).max() < 0.05
    assert np.abs(varis / varis.mean(axis=0) - 1).max() < 0.10
    raw_var = np.array([np.nanvar(X[site == i], axis=0, ddof=1) for i in range(3)])
    assert (raw_var.max(axis=0) / raw_var.min(axis=0)).min() > 10
    after = probe_matrix(Xh, site, np.zeros(p, bool), folds, random_state=0, n_boot=50, n_permutations=0)
    assert after.auc < 0.6
    assert after.n == n


@pytest.mark.parametrize("method", ["centre", "scale", "combat", "quantile"])
def test_protected_covariate_coefficient_is_preserved(method):
    # The age effect is real and age differs by site (case mix). Reference for the
    # coefficient: statsmodels OLS of the raw feature on site indicators + age.
    rng = np.random.default_rng(5)
    n = 3000
    site = rng.integers(0, 3, n)
    age = rng.normal(50, 10, n) + 12 * site
    y = 0.08 * age + np.array([0.0, 3.0, -2.0])[site] + np.array([1.0, 1.6, 0.7])[site] * rng.normal(size=n)
    X = y[:, None]
    frame = pd.DataFrame({"age": age})
    ref = sm.OLS(y, np.column_stack([np.eye(3)[site], age])).fit().params[3]
    D, spec = protected_design(frame, ["age"])
    Xh, _ = harmonise(X, site, method=method, site_labels=LABELS, design=D, protect_spec=spec)
    slope = sm.OLS(Xh[:, 0], sm.add_constant(age)).fit().params[1]
    tol = 1e-8 if method == "centre" else 0.002  # centre keeps the OLS residuals exactly
    assert slope == pytest.approx(ref, abs=tol)
    # Without protection the case-mix difference is erased with the site effect.
    Xu, _ = harmonise(X, site, method=method, site_labels=LABELS)
    slope_u = sm.OLS(Xu[:, 0], sm.add_constant(age)).fit().params[1]
    assert abs(slope_u - ref) > 0.005


@pytest.mark.parametrize("method", ["centre", "scale", "combat", "quantile"])
def test_saved_parameters_reapply_to_the_same_table(method):
    X, site, frame = _synthetic(seed=6)
    D, spec = protected_design(frame, ["age", "sex"])
    Xh, fit = harmonise(X, site, method=method, site_labels=LABELS, design=D, protect_spec=spec)
    text = json.dumps(fit.to_dict(), allow_nan=False)
    again = HarmonisationFit.from_dict(json.loads(text))
    np.testing.assert_array_equal(apply_harmoniser(again, X, site, design=D), Xh)
    # New rows of known sites (a later batch): rebuilt design from the saved spec.
    D2, _ = protected_design(frame.iloc[100:200], ["age", "sex"], spec=again.protect)
    np.testing.assert_allclose(apply_harmoniser(again, X[100:200], site[100:200], design=D2), Xh[100:200],
                               rtol=0, atol=1e-12)


def _combat_from_the_paper(Y, site, cov, n_sites, tol=1e-13, max_iter=10_000):
    """ComBat written here from Johnson, Li & Rabinovic (2007), Biostatistics 8(1):118-127, sections 3.1-3.2
    (parametric priors), with numpy only and none of sitecheck's helpers; complete data.

    Y: (n, G) features; site: (n,) codes 0..k-1; cov: (n, q) covariates to keep (X in the paper)."""
    n, G = Y.shape
    B = np.eye(n_sites)[site]                                  # site indicators, no intercept
    design = np.hstack([B, cov])
    coef, *_ = np.linalg.lstsq(design, Y, rcond=None)          # eq. (3.1): OLS per feature
    n_i = B.sum(axis=0)
    alpha = (n_i / n) @ coef[:n_sites]                         # alpha_hat: n-weighted site coefficients (sum n_i gamma_i = 0)
    beta = coef[n_sites:]
    fitted = design @ coef
    sigma2 = ((Y - fitted) ** 2).sum(axis=0) / n               # sigma_hat^2 = 1/N sum (Y - fit)^2
    Z = (Y - alpha - cov @ beta) / np.sqrt(sigma2)             # standardised data
    Ystar = np.empty_like(Y)
    for i in range(n_sites):
        z = Z[site == i]
        ni = z.shape[0]
        g_hat = z.mean(axis=0)                                 # gamma_hat_ig
        d_hat = z.var(axis=0, ddof=1)                          # delta_hat^2_ig
        g_bar, t2 = g_hat.mean(), g_hat.var(ddof=1)            # normal prior of gamma
        V, S2 = d_hat.mean(), d_hat.var(ddof=1)                # inverse-gamma prior by moments
        lam, theta = (V ** 2 + 2 * S2) / S2, (V ** 3 + V * S2) / S2
        g, d = g_hat.copy(), d_hat.copy()
        for _ in range(max_iter):                              # conditional posterior means, iterated
            g_new = (ni * t2 * g_hat + d * g_bar) / (ni * t2 + d)
            d_new = (theta + 0.5 * ((z - g_new) ** 2).sum(axis=0)) / (ni / 2 + lam - 1)
            done = max(np.max(np.abs(g_new - g) / np.abs(g)), np.max(np.abs(d_new - d) / d)) < tol
            g, d = g_new, d_new
            if done:
                break
        Ystar[site == i] = np.sqrt(sigma2) / np.sqrt(d) * (z - g) + alpha + cov[site == i] @ beta
    return Ystar


def test_combat_matches_an_independent_implementation_of_the_paper():
    # An implementation written in this test from the published equations (above), on complete invented data
    # with a numeric and a binary covariate to keep: the harmonised values must agree.
    X, site, frame = _synthetic(n=600, p=6, seed=4, missing=0.0)
    cov = np.column_stack([frame["age"].to_numpy(), (frame["sex"] == "M").to_numpy(float)])
    want = _combat_from_the_paper(X, site, cov, 3)
    got, fit = harmonise(X, site, method="combat", site_labels=LABELS, design=cov, tol=1e-12, max_iter=10_000)
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-8)
    # and the result differs from the input by more than rounding: the check is not vacuous
    assert np.abs(got - X).max() > 0.5
