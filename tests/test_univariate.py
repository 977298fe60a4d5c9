import numpy as np
import pytest
from scipy import stats as sps

from sitecheck.analyses.univariate import (bh_adjust, cramers_v, epsilon_squared, missing_by_site, residualise, smd,
                                  univariate_gaps)


def test_smd_by_hand():
    a = np.array([1.0, 2.0, 3.0, 4.0])
    b = np.array([2.0, 4.0, 6.0, 8.0, np.nan])
    # (mean_a - mean_b) / sqrt((var_a + var_b) / 2), sample variances: 1.6667 and 6.6667
    expected = (2.5 - 5.0) / np.sqrt((5 / 3 + 20 / 3) / 2)
    assert smd(a, b) == pytest.approx(expected, rel=1e-12)
    # proportions: (p1 - p2) / sqrt((p1 q1 + p2 q2) / 2)  (Austin 2009, binary SMD)
    x = np.array([1, 1, 1, 0.0]); z = np.array([1, 0, 0, 0.0])
    assert smd(x, z, binary=True) == pytest.approx((0.75 - 0.25) / np.sqrt((0.1875 + 0.1875) / 2))


def test_epsilon_squared_equation():
    # Tomczak & Tomczak (2014): epsilon^2 = H / ((n^2 - 1) / (n + 1)) = H / (n - 1)
    assert epsilon_squared(12.0, 61) == pytest.approx(12.0 / 60.0)


def test_cramers_v_matches_scipy():
    # Reference: scipy.stats.contingency.association(method="cramer")
    table = np.array([[20, 30, 5], [25, 10, 40]])
    chi2, p, v = cramers_v(table)
    assert v == pytest.approx(sps.contingency.association(table, method="cramer", correction=False), rel=1e-12)
    ref = sps.chi2_contingency(table, correction=False)
    assert chi2 == pytest.approx(ref[0]) and p == pytest.approx(ref[1])


def test_bh_matches_statsmodels():
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.01, 0.04, 0.03, 0.2, 0.5, np.nan, 0.001])
    ok = ~np.isnan(p)
    ref = multipletests(p[ok], method="fdr_bh")[1]
    got = bh_adjust(p)
    assert np.isnan(got[5]) and np.allclose(got[ok], ref)


def test_residualise_matches_statsmodels_ols():
    import statsmodels.api as sm

    rng = np.random.default_rng(0)
    C = rng.normal(size=(200, 2))
    y = 3 + C @ np.array([1.5, -2.0]) + rng.normal(size=200)
    y[5] = np.nan
    r = residualise(y, C)
    ok = ~np.isnan(y)
    fit = sm.OLS(y[ok], sm.add_constant(C[ok])).fit()
    assert np.allclose(r[ok], fit.resid + y[ok].mean())
    assert np.isnan(r[5])


def test_univariate_gaps_flags_shift_and_adjusts_for_covariate():
    rng = np.random.default_rng(1)
    n = 900
    site = np.repeat([0, 1, 2], n // 3)
    age = rng.normal(60, 10, n) + 8 * (site == 2)
    x_age = 50 + 0.8 * age + rng.normal(0, 5, n)     # differs by site only through age
    x_shift = rng.normal(0, 1, n) + 0.6 * (site == 1)  # a real offset at site 1
    X = np.column_stack([x_age, x_shift])
    gaps = univariate_gaps(X, ["creat", "sodium"], ["numeric", "numeric"], site, ["A", "B", "C"],
                           covariates=age[:, None])
    g_age, g_shift = gaps
    assert g_shift.flagged and g_shift.smd["B"] > 0.4 and g_shift.p_adj < 1e-6
    assert g_shift.adjusted["p_adj"] < 1e-6
    assert g_age.p_adj < 1e-6                     # raw gap is real ...
    assert g_age.adjusted["p_adj"] > 0.01         # ... and explained by age
    h, p = sps.kruskal(*[x_shift[site == k] for k in range(3)])
    assert g_shift.statistic == pytest.approx(h) and g_shift.effect == pytest.approx(h / (n - 1))


def test_missing_by_site_rates():
    site = np.repeat([0, 1], 50)
    x = np.ones(100)
    x[:25] = np.nan     # half of site 0 missing, none at site 1
    m = missing_by_site(x[:, None], ["lab"], site, ["A", "B"])[0]
    assert m.rate == {"A": 0.5, "B": 0.0} and m.n == {"A": 50, "B": 50}
    assert m.p_value < 1e-6
