"""Tests of sitecheck.analyses.stats against reference libraries and published definitions."""
import numpy as np
import pytest
from scipy import stats as st
from sklearn.metrics import roc_auc_score

from sitecheck.analyses import stats
from sitecheck.errors import InputError


def _scores(n=400, k=4, seed=0, ties=True):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    P = rng.dirichlet(np.ones(k), n)
    P[np.arange(n), y] += 0.25
    if ties:
        P = np.round(P, 1) + 1e-3  # many ties
    return y, P / P.sum(axis=1, keepdims=True)


@pytest.mark.parametrize("k", [2, 3, 5])
def test_macro_ovr_auc_matches_sklearn(k):
    y, P = _scores(k=k)
    # reference: scikit-learn roc_auc_score (multi_class="ovr", average="macro"; binary: column 1)
    ref = roc_auc_score(y, P, multi_class="ovr", average="macro") if k > 2 else roc_auc_score(y, P[:, 1])
    assert stats.macro_ovr_auc(y, P) == pytest.approx(ref, abs=1e-12)
    per = stats.ovr_aucs(y, P)
    for c in range(k):
        assert per[c] == pytest.approx(roc_auc_score(y == c, P[:, c]), abs=1e-12)


def test_bootstrap_weights_give_exact_resample_aucs():
    # Each weighted resample AUC equals scikit-learn's AUC on the rows repeated by their weights.
    y, P = _scores(n=150, k=3, seed=1)
    rng = np.random.default_rng(5)
    W = stats.stratified_bootstrap_weights(y, 4, rng)
    assert np.array_equal(W[:, y == 0].sum(axis=1), np.full(4, (y == 0).sum()))  # stratified: class totals kept
    for c in range(3):
        for tie_free in (P[:, c], P[:, c] + np.linspace(0, 1e-6, len(y))):
            got = stats.SortedScores(tie_free, y == c).aucs(W)
            ref = [roc_auc_score(np.repeat(y == c, w), np.repeat(tie_free, w)) for w in W]
            np.testing.assert_allclose(got, ref, atol=1e-12)


def test_bootstrap_auc_ci_brackets_estimate_and_is_deterministic():
    y, P = _scores(n=300, k=3, seed=2, ties=False)
    auc = stats.macro_ovr_auc(y, P)
    lo, hi = stats.bootstrap_auc_ci(y, P, n_boot=400, random_state=3)
    assert lo < auc < hi
    assert 0.02 < hi - lo < 0.2
    assert (lo, hi) == stats.bootstrap_auc_ci(y, P, n_boot=400, random_state=3)
    # the bootstrap SD agrees with the Hanley-McNeil (1982) standard error of one class's AUC
    # (formula: Radiology 143, 29-36), to within 25%
    (cls,) = stats.bootstrap_class_aucs(y, [P], n_boot=400, random_state=4)
    a = roc_auc_score(y == 0, P[:, 0])
    n1, n0 = (y == 0).sum(), (y != 0).sum()
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    se = np.sqrt((a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n0 - 1) * (q2 - a * a)) / (n1 * n0))
    assert np.std(cls[:, 0]) == pytest.approx(se, rel=0.25)


def test_binary_auc_ci():
    rng = np.random.default_rng(7)
    y = rng.integers(0, 2, 200)
    s = y + rng.normal(0, 1.2, 200)
    auc, (lo, hi) = stats.binary_auc_ci(y, s, n_boot=300, random_state=0)
    assert auc == pytest.approx(roc_auc_score(y, s), abs=1e-12)  # reference: scikit-learn
    assert lo < auc < hi


def test_wilson_matches_statsmodels():
    from statsmodels.stats.proportion import proportion_confint

    for k, n in [(0, 10), (3, 17), (50, 100), (99, 100)]:
        # reference: statsmodels proportion_confint(method="wilson")
        ref = proportion_confint(k, n, alpha=0.05, method="wilson")
        np.testing.assert_allclose(stats.wilson_ci(k, n), ref, atol=1e-12)


def test_bh_matches_scipy_and_statsmodels():
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.001, 0.04, 0.03, 0.2, 0.5, 0.04, 0.9, 0.0001, 0.012])
    # references: scipy.stats.false_discovery_control (method "bh") and statsmodels multipletests("fdr_bh")
    np.testing.assert_allclose(stats.bh_adjust(p), st.false_discovery_control(p, method="bh"), atol=1e-12)
    np.testing.assert_allclose(stats.bh_adjust(p), multipletests(p, method="fdr_bh")[1], atol=1e-12)
    assert stats.bh_adjust(np.array([])).shape == (0,)


def test_geometric_merge_definition():
    # Vovk & Wang (2020), Biometrika 107(4): e times the geometric mean, capped at 1
    assert stats.merge_pvalues_geometric([0.01, 0.04]) == pytest.approx(np.e * 0.02)
    assert stats.merge_pvalues_geometric([0.9, 0.8]) == 1.0


def test_fold_permutation_pvalue_matches_exact_mann_whitney():
    # One fold, two classes: the permutation p-value of the AUC estimates the exact one-sided
    # Mann-Whitney p-value (scipy.stats.mannwhitneyu, method="exact"), within Monte Carlo error.
    rng = np.random.default_rng(11)
    y = np.r_[np.zeros(12, int), np.ones(10, int)]
    s = rng.normal(size=22) + 0.6 * y
    proba = np.column_stack([1 - s, s])
    folds = [(np.array([], int), np.arange(22))]
    p, per = stats.fold_permutation_pvalue(y, proba, folds, n_permutations=4999, random_state=0)
    exact = st.mannwhitneyu(s[y == 1], s[y == 0], alternative="greater", method="exact").pvalue
    assert per[0] == pytest.approx(exact, abs=0.015)
    assert p == pytest.approx(min(1.0, np.e * per[0]))


def test_fold_permutation_pvalue_null_and_signal():
    rng = np.random.default_rng(3)
    n, k = 300, 3
    y = np.arange(n) % k
    folds = [(None, np.arange(f, n, 5)) for f in range(5)]
    # 400 null score tables. (1) The merged p-value: at most 31 rejections at p < 0.05, which passes with
    # probability >= 0.99 at a true 5% rate; power (scipy.stats.binom): a true 10% rate fails it with
    # probability 0.93. The merged test is conservative (measured: 0 of 400 below 0.05), so (2) checks the
    # per-fold permutation p-values, each a proper p-value on {0.01, ..., 1} with P(p <= 0.05) = 5/100:
    # of the 2,000, between 76 and 126 at or below 0.05 (probability 0.991 at 5%); power: a per-fold rate
    # of 7% fails it with probability 0.88, 3.5% with 0.75.
    from scipy.stats import binom

    n_runs = 400
    limit = int(binom.ppf(0.99, n_runs, 0.05))
    assert limit == 31 and binom.sf(limit, n_runs, 0.10) > 0.92
    lo, hi = int(binom.ppf(0.005, 5 * n_runs, 0.05)), int(binom.ppf(0.995, 5 * n_runs, 0.05))
    assert (lo, hi) == (76, 126) and binom.sf(hi, 5 * n_runs, 0.07) > 0.88
    rej, per_fold = 0, []
    for s in range(n_runs):
        P = np.random.default_rng(s).dirichlet(np.ones(k), n)  # scores independent of labels
        p, per = stats.fold_permutation_pvalue(y, P, folds, n_permutations=99, random_state=s)
        rej += p < 0.05
        per_fold += per
    assert rej <= limit, rej
    small = int(np.sum(np.asarray(per_fold) <= 0.05 + 1e-12))
    assert len(per_fold) == 5 * n_runs and lo <= small <= hi, small
    P = rng.dirichlet(np.ones(k), n)
    P[np.arange(n), y] += 1.0
    p, per = stats.fold_permutation_pvalue(y, P, folds, n_permutations=99, random_state=0)
    assert per == (0.01,) * 5 and p == pytest.approx(np.e * 0.01)


def test_cv_corrected_sd_formula():
    # Nadeau & Bengio (2003): sqrt((1/K + n_test/n_train) * s^2)
    v = [0.7, 0.75, 0.8, 0.72]
    assert stats.cv_corrected_sd(v, 1 / 3) == pytest.approx(np.sqrt((0.25 + 1 / 3) * np.var(v, ddof=1)))
    (lo, hi), r = stats.widened_ci(0.5, (0.49, 0.51), np.random.default_rng(0).normal(0.5, 0.005, 200), v, 1 / 3)
    assert r > 1 and lo < 0.49 and hi > 0.51


def test_errors():
    # Wrong arguments are programming errors (ParameterError, a ValueError), not the user's input (InputError).
    from sitecheck.errors import ParameterError

    with pytest.raises(ParameterError) as info:
        stats.macro_ovr_auc([0, 1, 2], np.ones((2, 3)))
    assert not isinstance(info.value, InputError)
    with pytest.raises(ParameterError):
        stats.bootstrap_auc_ci([0, 1, 1, 0], np.ones((4, 2)) / 2, random_state=None)


def test_bh_keeps_missing_pvalues_missing():
    # reference: statsmodels' multipletests(method="fdr_bh") on the non-missing p-values
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.01, np.nan, 0.04, 0.03, np.nan, 0.2])
    got = stats.bh_adjust(p)
    assert np.isnan(got[[1, 4]]).all()
    ok = ~np.isnan(p)
    np.testing.assert_allclose(got[ok], multipletests(p[ok], method="fdr_bh")[1], atol=1e-12)


def test_one_weighted_auc_for_integer_and_fractional_weights():
    # the bootstrap's integer multiplicities and the outcome analysis's float weights go through one class
    rng = np.random.default_rng(8)
    score = np.round(rng.normal(size=300), 1)  # ties
    y = (rng.random(300) < 1 / (1 + np.exp(-score))).astype(int)
    W = rng.integers(0, 4, (6, 300))
    s = stats.SortedScores(score, y)
    assert np.array_equal(s.aucs(W), s.aucs(W.astype(float)))  # exact either way
    frac = rng.random((3, 300))
    got = s.aucs(frac)
    for b in range(3):
        # Reference: sklearn.metrics.roc_auc_score with sample_weight (ties count one half).
        assert got[b] == pytest.approx(roc_auc_score(y, score, sample_weight=frac[b]), rel=1e-12)
    assert np.isnan(s.aucs(np.where(y == 1, 1, 0)[None, :])[0])  # no negative weight left
    assert np.isnan(stats.SortedScores(np.zeros(0), np.zeros(0)).aucs(np.zeros((2, 0)))).all()


def test_widened_interval_is_the_corrected_resampled_t_interval_when_folds_vary_more():
    # Nadeau & Bengio (2003): half-width t(0.975, K-1) * sqrt((1/K + n_test/n_train) * s^2), with the
    # t quantile from scipy.stats. A symmetric bootstrap interval of +-1.96 bootstrap SDs is stretched
    # to exactly that half-width when the fold spread dominates.
    from scipy import stats as st

    folds = [0.61, 0.66, 0.58, 0.69, 0.63]
    ratio = 0.25
    sd_b = 0.004
    boot = 0.63 + sd_b * np.r_[np.ones(100), -np.ones(100)] / np.sqrt(200 / 199)  # sample SD exactly sd_b
    z = st.norm.ppf(0.975)
    (lo, hi), r = stats.widened_ci(0.63, (0.63 - z * sd_b, 0.63 + z * sd_b), boot, folds, ratio)
    half = st.t.ppf(0.975, 4) * np.sqrt((1 / 5 + ratio) * np.var(folds, ddof=1))
    assert hi - 0.63 == pytest.approx(half, rel=1e-9) and 0.63 - lo == pytest.approx(half, rel=1e-9)
    assert r == pytest.approx(half / (z * sd_b), rel=1e-9)
    # a bootstrap interval already wider than the t interval is kept as it is
    (lo2, hi2), r2 = stats.widened_ci(0.63, (0.4, 0.8), np.tile([0.4, 0.8], 100), folds, ratio)
    assert (lo2, hi2, r2) == (0.4, 0.8, 1.0)


def test_interval_below_chance_reaches_chance_and_others_are_unchanged():
    assert stats.reach_chance((0.44, 0.49)) == (0.44, 0.5)
    assert stats.reach_chance((0.47, 0.52)) == (0.47, 0.52)
    assert stats.reach_chance((0.6, 0.7)) == (0.6, 0.7)
    nan = float("nan")
    lo, hi = stats.reach_chance((nan, nan))
    assert np.isnan(lo) and np.isnan(hi)


def test_resample_counts_follow_the_multinomial_law():
    # Each row must be a Multinomial(m, 1/m, ..., 1/m) vector, the law of one bootstrap resample's
    # multiplicities. Moments against scipy.stats.multinomial (mean 1, variance 1 - 1/m, covariance -1/m),
    # and P(count = 0) against its marginal Binomial(m, 1/m) (scipy.stats.binom), over 20,000 resamples.
    from scipy.stats import binom, multinomial

    m, B = 8, 20_000
    W = stats.resample_counts(m, B, np.random.default_rng(5))
    assert W.shape == (B, m) and W.dtype.kind == "i" and (W.sum(axis=1) == m).all()
    law = multinomial(m, np.full(m, 1.0 / m))
    se = np.sqrt(np.diag(law.cov()) / B)  # standard error of each column's mean
    assert np.all(np.abs(W.mean(axis=0) - law.mean()) < 4 * se)
    assert np.allclose(np.cov(W, rowvar=False), law.cov(), atol=0.03)
    zero = binom.pmf(0, m, 1.0 / m)
    assert abs((W == 0).mean() - zero) < 4 * np.sqrt(zero * (1 - zero) / (B * m)) * 3  # columns dependent: x3
    # and the stratified weights keep every class's size in every resample
    y = np.r_[np.zeros(5, int), np.ones(9, int), np.full(3, 2)]
    S = stats.stratified_bootstrap_weights(y, 50, np.random.default_rng(0))
    assert (S[:, y == 0].sum(axis=1) == 5).all() and (S[:, y == 1].sum(axis=1) == 9).all()
    assert (S[:, y == 2].sum(axis=1) == 3).all()
