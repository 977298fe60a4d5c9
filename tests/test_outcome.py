import json

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import confusion_matrix, roc_auc_score, roc_curve

from sitecheck.errors import InputError, ParameterError
from sitecheck.reading.intake import frame_to_raw
from sitecheck.analyses.outcome import (outcome_folds, outcome_risk, prevalence_by_site, rates_at, site_association,
                               site_only_scores, SortedScores, youden_threshold)
from sitecheck.table.prepare import prepare
from sitecheck.table.roles import RoleSpec, assign_roles

SITES = np.array(["Alpha", "Beta", "Gamma", "Delta"])


def synth(n=1000, *, shortcut=True, seed=0, missing_outcome=0):
    """Invented four-site table. With ``shortcut`` the outcome depends only on f0, whose
    mean is shifted by site; f1 is site-shifted but unrelated to the outcome. Without it
    nothing depends on the site and the outcome depends on f2 alone."""
    rng = np.random.default_rng(seed)
    site = rng.integers(0, 4, n)
    mu = np.array([-2.0, -0.7, 0.7, 2.0]) if shortcut else np.zeros(4)
    f0 = mu[site] + rng.normal(0, 0.4, n)
    f1 = 1.5 * mu[site] + rng.normal(0, 1, n)
    f2 = rng.normal(0, 1, n)
    f3 = rng.normal(0, 1, n)
    logit = 1.6 * f0 if shortcut else 1.2 * f2
    y = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(float)
    if missing_outcome:
        y[rng.choice(n, missing_outcome, replace=False)] = np.nan
    return pd.DataFrame({"site": SITES[site], "f0": f0, "f1": f1, "f2": f2, "f3": f3,
                         "ward": rng.choice(["east", "west"], n), "y": y})


def prep_of(frame, groups=("ward",), seed=0):
    table = assign_roles(frame_to_raw(frame), RoleSpec(site="site", outcome="y", groups=tuple(groups)))
    return prepare(table, random_state=seed)


@pytest.fixture(scope="module")
def shortcut_result():
    prep = prep_of(synth(1000, shortcut=True, seed=0))
    return prep, outcome_risk(prep, n_boot=200, n_repeats=2)


@pytest.fixture(scope="module")
def null_result():
    prep = prep_of(synth(1000, shortcut=False, seed=1))
    return prep, outcome_risk(prep, n_boot=200, n_repeats=2)


# ---------------------------------------------------------------- reference checks

def test_prevalence_wilson_and_chi2_match_statsmodels():
    from statsmodels.stats.proportion import proportion_confint, proportions_chisquare

    y = np.r_[np.ones(7), np.zeros(43), np.ones(30), np.zeros(20), np.zeros(12)]
    site = np.r_[np.zeros(50, int), np.ones(50, int), np.full(12, 2)]
    prev, chi2, df, p = prevalence_by_site(y, site, ["A", "B", "C"])
    assert [s.n for s in prev] == [50, 50, 12] and [s.k for s in prev] == [7, 30, 0]
    for s in prev:
        # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
        lo, hi = proportion_confint(s.k, s.n, alpha=0.05, method="wilson")
        assert s.ci[0] == pytest.approx(lo, abs=1e-10) and s.ci[1] == pytest.approx(hi, abs=1e-10)
        assert s.p == pytest.approx(s.k / s.n)
    # Reference: statsmodels.stats.proportion.proportions_chisquare (k-sample test of equal proportions).
    ref_chi2, ref_p, _ = proportions_chisquare([7, 30, 0], [50, 50, 12])
    assert chi2 == pytest.approx(ref_chi2, rel=1e-10) and p == pytest.approx(ref_p, rel=1e-8) and df == 2


def test_weighted_auc_matches_sklearn_with_sample_weight():
    rng = np.random.default_rng(3)
    score = np.round(rng.normal(size=400), 1)  # many ties
    y = (rng.random(400) < 1 / (1 + np.exp(-2 * score))).astype(float)
    W = rng.integers(0, 4, (5, 400)).astype(float)
    got = SortedScores(score, y).aucs(np.vstack([W, np.ones(400)]))
    # Reference: sklearn.metrics.roc_auc_score with sample_weight (ties count one half).
    for b in range(5):
        assert got[b] == pytest.approx(roc_auc_score(y, score, sample_weight=W[b]), abs=1e-12)
    assert got[5] == pytest.approx(roc_auc_score(y, score), abs=1e-12)
    assert np.isnan(SortedScores(score, y).aucs(np.where(y == 1, 0.0, 1.0)[None, :])[0])  # one class left


def test_youden_threshold_maximises_tpr_minus_fpr():
    rng = np.random.default_rng(4)
    s = rng.random(300)
    y = (rng.random(300) < s).astype(int)
    t = youden_threshold(y, s)
    pred = s >= t
    tn, fp, fn, tp = confusion_matrix(y, pred).ravel()
    # Reference: Youden (1950) J = sensitivity + specificity - 1, maximised over sklearn's roc_curve points.
    fpr, tpr, _ = roc_curve(y, s)
    assert tp / (tp + fn) - fp / (fp + tn) == pytest.approx(np.max(tpr - fpr), abs=1e-12)


def test_rates_match_sklearn_confusion_matrix():
    rng = np.random.default_rng(5)
    n = 500
    unit = rng.integers(0, 3, n)
    y = (rng.random(n) < 0.3 + 0.1 * unit).astype(float)
    pred = (rng.random(n) < 0.2 + 0.5 * y).astype(float)
    eo = rates_at(y, pred, unit, ["u0", "u1", "u2"], threshold=0.5, rule="given")
    tprs, fprs = [], []
    for i, r in enumerate(eo.per_unit):
        # Reference: sklearn.metrics.confusion_matrix on the same 0/1 predictions.
        tn, fp, fn, tp = confusion_matrix(y[unit == i], pred[unit == i], labels=[0, 1]).ravel()
        assert r.tpr == pytest.approx(tp / (tp + fn)) and r.fpr == pytest.approx(fp / (fp + tn))
        assert (r.n_pos, r.n_neg, r.n) == (tp + fn, fp + tn, int(np.sum(unit == i)))
        tprs.append(r.tpr)
        fprs.append(r.fpr)
    # Equalized-odds gaps (Hardt, Price & Srebro 2016): spread of TPR and FPR across units.
    assert eo.tpr_spread == pytest.approx(max(tprs) - min(tprs))
    assert eo.fpr_spread == pytest.approx(max(fprs) - min(fprs))


def test_full_result_rates_match_confusion_matrix(shortcut_result):
    prep, res = shortcut_result
    d = res.to_dict()
    eo = d["equalized_odds"]
    pred = (res.pooled_scores >= eo["threshold"]).astype(int)
    y = prep.outcome[res.rows].astype(int)
    site = prep.site[res.rows]
    for i, lab in enumerate(prep.site_labels):
        m = site == i
        # Reference: sklearn.metrics.confusion_matrix on the same predictions.
        tn, fp, fn, tp = confusion_matrix(y[m], pred[m], labels=[0, 1]).ravel()
        got = eo["per_site"][lab]
        if tp + fn:
            assert got["tpr"] == pytest.approx(tp / (tp + fn))
        if fp + tn:
            assert got["fpr"] == pytest.approx(fp / (fp + tn))
        assert got["n"] == m.sum()
    ward = prep.groups["ward"][res.rows]
    lv = prep.table.binary_levels.get("ward")  # two-level text columns are recoded to 0/1 by roles
    if lv is not None:
        ward = np.array([lv[int(v)] for v in ward], dtype=object)
    for lab, got in d["equalized_odds_by_group"]["ward"]["per_group"].items():
        m = ward == lab
        tn, fp, fn, tp = confusion_matrix(y[m], pred[m], labels=[0, 1]).ravel()
        assert got["tpr"] == pytest.approx(tp / (tp + fn)) and got["fpr"] == pytest.approx(fp / (fp + tn))
    assert set(d["equalized_odds_by_group"]["ward"]["per_group"]) == {"east", "west"}
    # the pooled AUC is the AUC of the kept out-of-fold scores (reference: sklearn roc_auc_score)
    assert d["pooled_auc"] == pytest.approx(roc_auc_score(y, res.pooled_scores), abs=1e-12)
    for i, lab in enumerate(prep.site_labels):
        m = site == i
        assert d["loso"][lab]["auc"] == pytest.approx(roc_auc_score(y[m], res.loso_scores[m]), abs=1e-12)


def test_site_only_scores_are_training_fold_prevalences():
    rng = np.random.default_rng(6)
    site = rng.integers(0, 3, 300)
    y = (rng.random(300) < np.array([0.1, 0.4, 0.7])[site]).astype(float)
    folds = outcome_folds(y, site, 3, random_state=0)
    s = site_only_scores(y, site, folds)
    for tr, te in folds:
        ref = pd.Series(y[tr]).groupby(site[tr]).mean()  # reference: pandas groupby mean
        assert np.allclose(s[te], ref.loc[site[te]].to_numpy())
    # folds are stratified by site and outcome: each cell spread evenly over folds
    for tr, te in folds:
        for c in range(3):
            cell = (site == c) & (y == 1)
            assert abs(cell[te].sum() - cell.sum() / 3) <= 1


def test_site_association_matches_scipy_kruskal():
    from scipy.stats import kruskal

    rng = np.random.default_rng(8)
    site = rng.integers(0, 3, 300)
    x = rng.normal(size=300) + 0.8 * site
    X = np.column_stack([x, rng.normal(size=300)])
    score, p = site_association(X, site, np.zeros(2, bool))
    h, ref_p = kruskal(*[x[site == s] for s in range(3)])
    # Reference: scipy.stats.kruskal; epsilon-squared = H / (n - 1) (Tomczak & Tomczak 2014).
    assert score[0] == pytest.approx(h / 299) and p[0] == pytest.approx(ref_p)
    assert score[1] < 0.05


# ---------------------------------------------------------------- ground-truth injection

def test_shortcut_feature_flagged_and_transport_gap_large(shortcut_result):
    _, res = shortcut_result
    d = res.to_dict()
    names = [c["feature"] for c in d["shortcut_candidates"]]
    assert names == ["f0"]
    f0 = d["shortcut_candidates"][0]
    assert f0["leak_rank"] <= 2 and f0["importance_rank"] == 1 and f0["importance_ci"][0] > 0.1
    f1 = next(f for f in d["feature_risk"] if f["feature"] == "f1")
    assert f1["leak_significant"] and not f1["shortcut"]  # a leaker, not an outcome driver
    assert d["pooled_auc"] > 0.85 and d["site_only_auc"] > 0.85
    assert all(v["auc"] < 0.75 for v in d["loso"].values())
    assert d["transport_gap"] > 0.2 and d["transport_gap_ci"][0] > 0.15
    assert d["transport_gap_ci"][0] <= d["transport_gap"] <= d["transport_gap_ci"][1]
    assert d["prevalence_test"]["p_value"] < 1e-10
    assert d["leak_source"] == "site_association"


def test_equalized_odds_heterogeneity_on_shortcut_and_null_tables(shortcut_result, null_result):
    from sitecheck.analyses.heterogeneity import rate_heterogeneity
    from sitecheck.report.schema import report_schema, validate

    # Ground truth of the invented tables: with the shortcut the site decides the prediction
    # (site TPRs 0 to 1); without it, and for the ward column in both, nothing differs by unit.
    prep, res = shortcut_result
    d = res.to_dict()
    het = d["equalized_odds"]["heterogeneity"]
    for rate in ("tpr", "fpr"):
        h = het[rate]
        assert h["exceeds_noise"] and h["p_value"] == pytest.approx(1 / 1000) and h["tau2_ci"][0] > 0.05
        assert h["spread"] == pytest.approx(d["equalized_odds"][f"{rate}_spread"])
        assert h["null"]["spread"]["q95"] < 0.3 < h["spread"]
    assert het["tpr"]["small_units"] == ["Alpha"]  # 9 positives at Alpha
    assert het["tpr"]["without_small"]["units_used"] == 3 and het["fpr"]["without_small"] is None
    ward = d["equalized_odds_by_group"]["ward"]["heterogeneity"]
    assert ward["tpr"]["tau2_ci"][0] == 0 and ward["tpr"]["p_value"] >= 0.05 and not ward["fpr"]["exceeds_noise"]
    # the section's numbers are those of rate_heterogeneity on the per-site counts (its own generator)
    eo = res.equalized_odds
    ref = rate_heterogeneity([r.tp for r in eo.per_unit], [r.n_pos for r in eo.per_unit],
                             [r.label for r in eo.per_unit], n_permutations=999,
                             random_state=np.random.default_rng([res.seed, 7, 2]))
    assert ref.to_dict() == het["tpr"]
    assert validate(d, report_schema()["properties"]["outcome"]) == []
    _, nres = null_result
    nd = nres.to_dict()["equalized_odds"]["heterogeneity"]
    assert all(nd[r]["tau2_ci"][0] == 0 and not nd[r]["exceeds_noise"] for r in ("tpr", "fpr"))
    assert 0 < nd["tpr"]["sd_rate_ci"][1] < 0.2  # four sites, ~60 positives each: an SD above 0.2 ruled out


def test_no_site_effect_gap_interval_covers_zero(null_result):
    _, res = null_result
    d = res.to_dict()
    lo, hi = d["transport_gap_ci"]
    assert lo <= 0 <= hi and hi - lo < 0.1
    assert d["shortcut_candidates"] == []
    assert 0.4 < d["site_only_auc"] < 0.6 and d["pooled_auc"] > 0.7
    f2 = next(f for f in d["feature_risk"] if f["feature"] == "f2")
    assert f2["importance_rank"] == 1 and not f2["leak_significant"]


@pytest.mark.slow
def test_null_gap_interval_coverage_over_seeds():
    # Invented null tables (nothing depends on the site): the 95% interval of the transport gap should cover 0.
    # 60 small tables (200 rows, 3 folds) to keep it cheap. Limit: at least 53 of 60 covering, which passes
    # with probability >= 0.99 at the nominal 95%. Power (scipy.stats.binom): a true 80% coverage fails it
    # with probability 0.93, 85% with 0.70.
    from scipy.stats import binom

    n_runs, limit = 60, 53
    assert binom.sf(limit - 1, n_runs, 0.95) >= 0.99 and binom.cdf(limit - 1, n_runs, 0.80) > 0.93
    cover = 0
    for seed in range(n_runs):
        frame = synth(200, shortcut=False, seed=100 + seed)
        prep = prepare(assign_roles(frame_to_raw(frame), RoleSpec(site="site", outcome="y")), n_splits=3,
                       random_state=seed)
        res = outcome_risk(prep, n_boot=100, n_repeats=1, importance_rows=50)
        lo, hi = res.transport_gap_ci
        cover += lo <= 0 <= hi
    assert cover >= limit, cover


# ---------------------------------------------------------------- contract and behaviour

def test_report_keys_missing_outcome_and_determinism():
    frame = synth(500, shortcut=True, seed=2, missing_outcome=37)
    a = outcome_risk(prep_of(frame), n_boot=60, n_repeats=1).to_dict()
    b = outcome_risk(prep_of(frame), n_boot=60, n_repeats=1).to_dict()
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)
    assert a["n"] == 463 and a["n_missing"] == 37
    assert sum(v["n"] for v in a["prevalence"].values()) == 463
    for key in ("prevalence", "site_only_auc", "pooled_auc", "loso", "transport_gap", "shortcut_candidates",
                "equalized_odds"):
        assert key in a
    for v in a["prevalence"].values():
        assert set(v) >= {"p", "ci", "n"}
    for v in a["loso"].values():
        assert set(v) >= {"auc", "ci", "n"}
    assert set(a["equalized_odds"]) >= {"threshold", "per_site", "tpr_spread", "fpr_spread", "tpr_spread_ci",
                                        "fpr_spread_ci", "heterogeneity"}
    for rate in ("tpr", "fpr"):
        assert set(a["equalized_odds"]["heterogeneity"][rate]) >= {
            "tau2", "tau2_ci", "i2", "i2_ci", "variance", "spread", "p_value", "null", "small_units", "without_small"}
    assert all(set(v) >= {"tpr", "fpr"} for v in a["equalized_odds"]["per_site"].values())
    c = outcome_risk(prep_of(frame, seed=1), n_boot=60, n_repeats=1).to_dict()
    assert c["pooled_auc"] != a["pooled_auc"]  # another seed, other folds


def test_given_threshold_and_invalid_options():
    prep = prep_of(synth(400, seed=3))
    res = outcome_risk(prep, threshold=0.3, n_boot=50, n_repeats=1)
    eo = res.to_dict()["equalized_odds"]
    assert eo["threshold"] == 0.3 and eo["threshold_rule"].startswith("given")
    pred = res.pooled_scores >= 0.3
    y = prep.outcome[res.rows]
    assert sum(r["tpr"] * r["n_pos"] for r in eo["per_site"].values()) == pytest.approx(np.sum(pred & (y == 1)))
    # wrong parameters are programming errors (ParameterError, exit 3), not input errors (exit 2)
    for kw, text in ((dict(threshold=1.5), "threshold must be a number strictly between 0 and 1, got 1.5"),
                     (dict(n_boot=3), "n_boot must be an integer of at least 50, got 3"),
                     (dict(n_repeats=0), "n_repeats must be an integer of at least 1, got 0"),
                     (dict(importance_rows=10), "importance_rows must be an integer of at least 50, got 10"),
                     (dict(min_rate_count=0), "min_rate_count must be an integer of at least 1, got 0"),
                     (dict(n_permutations=-1), "n_permutations must be an integer of at least 0, got -1")):
        with pytest.raises(ParameterError) as info:
            outcome_risk(prep, **kw)
        assert not isinstance(info.value, InputError) and str(info.value) == text


def test_rates_at_needs_a_seed_for_its_permutation_null():
    y = np.array([1, 0, 1, 0, 1, 0, 1, 0])
    unit = np.array([0, 0, 0, 0, 1, 1, 1, 1])
    with pytest.raises(ParameterError, match="random_state must be .* got None") as info:
        rates_at(y, y, unit, ["A", "B"], threshold=0.5, rule="given", n_permutations=19, random_state=None)
    assert not isinstance(info.value, InputError)
    seeded = rates_at(y, y, unit, ["A", "B"], threshold=0.5, rule="given", n_permutations=19, random_state=0)
    assert [(r.label, r.tpr, r.fpr) for r in seeded.per_unit] == [("A", 1.0, 0.0), ("B", 1.0, 0.0)]


def test_outcome_analysis_without_an_outcome_is_an_input_error():
    frame = synth(300, seed=5).drop(columns="y")
    table = assign_roles(frame_to_raw(frame), RoleSpec(site="site"))
    with pytest.raises(InputError, match="needs an outcome column") as info:
        outcome_risk(prepare(table, random_state=0), n_boot=50)
    assert info.value.option == "outcome"  # the command line names its flag


def test_leak_scores_from_leakage_result_are_used():
    prep = prep_of(synth(600, seed=4))

    from sitecheck.analyses.leakage import LeakageResult, LeakEntry

    rows = [("f0", 0.30, (0.2, 0.4)), ("f1", 0.10, (0.05, 0.15)), ("f2", 0.0, (-0.01, 0.01)),
            ("f3", 0.0, (-0.01, 0.01))]
    given = LeakageResult(entries=tuple(LeakEntry(feature=f, score=s, score_ci=ci, rank=i + 1, cluster=i,
                                                  univariate={}, missing_by_site={})
                                        for i, (f, s, ci) in enumerate(rows)),
                          clusters=(), missingness=None, baseline_auc=0.9, n_folds=5, n_repeats=2,
                          n_rows_per_fold=100, threshold=0.7)
    d = outcome_risk(prep, leakage=given, n_boot=50, n_repeats=1).to_dict()
    assert d["leak_source"] == "leakage"
    f = {r["feature"]: r for r in d["feature_risk"]}
    assert f["f0"]["leak_score"] == 0.30 and f["f0"]["leak_rank"] == 1 and f["f0"]["shortcut"]
    assert not f["f2"]["leak_significant"]


def test_outcome_with_one_class_too_few_is_an_input_error():
    frame = synth(300, seed=5)
    frame["y"] = 0.0
    frame.loc[0, "y"] = 1.0  # a single positive row
    prep = prep_of(frame)
    with pytest.raises(InputError, match="'y'"):
        outcome_risk(prep, n_boot=50)


# ---------------------------------------------------------------- rendering

def test_section_escapes_text_and_withholds_small_sites(shortcut_result):
    from sitecheck.render.safety import shareable_document
    from sitecheck.render.sections import ORDER
    from sitecheck.render.sections import outcome as section

    assert ORDER.index("outcome") == len(ORDER) - 1
    _, res = shortcut_result
    o = json.loads(json.dumps(res.to_dict()))
    bad = "<script>alert(1)</script>"
    o["prevalence"][bad] = {"p": 0.123456, "ci": [0.01, 0.5], "n": 4, "k": 1}
    o["loso"][bad] = {"auc": 0.987654, "ci": [0.9, 1.0], "n": 4, "n_pos": 1, "n_train": 996}
    o["equalized_odds"]["per_site"][bad] = {"tpr": 0.876543, "fpr": 0.1, "tpr_ci": [0, 1], "fpr_ci": [0, 1], "n": 4}
    doc = {"outcome": o}
    page = section.html(doc, 10)
    assert bad not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    import re

    esc_bad = "&lt;script&gt;alert(1)&lt;/script&gt;"
    bad_rows = re.findall(r"<tr><td>" + re.escape(esc_bad) + r"</td>(.*?)</tr>", page)
    assert len(bad_rows) == 3  # prevalence, held-out AUC, equalized odds
    for row in bad_rows:  # statistics of a site below min_cell are withheld, its count suppressed
        assert "withheld" in row and "&lt;10" in row
        assert not any(h in row for h in ("0.123", "0.988", "0.877"))
    assert "Alpha" in page and f"{o['transport_gap']:.3f}" in page
    md = section.markdown(doc, 10)
    assert "<script>" not in md and "0.988" not in md and f"{o['pooled_auc']:.3f}" in md
    # the shared document marks small sites "withheld"; the section still renders
    shared = shareable_document({"outcome": res.to_dict()}, min_cell=10, small_sites=frozenset({"Alpha"}))
    page = section.html(shared, 10)
    assert "withheld" in page and f"{o['prevalence']['Alpha']['p']:.3f}" not in page
    assert section.html({}, 10) == "" and section.markdown({}, 10) == ""


def test_section_leads_with_heterogeneity_and_flags_small_units(shortcut_result):
    from sitecheck.render.sections import outcome as section

    _, res = shortcut_result
    o = json.loads(json.dumps(res.to_dict()))
    bad = "<b>ward & co</b>"
    o["equalized_odds"]["heterogeneity"]["tpr"]["small_units"].append(bad)
    o["equalized_odds"]["per_site"][bad] = {"tpr": 0.5, "fpr": 0.1, "tpr_ci": [0, 1], "fpr_ci": [0, 1], "n": 40,
                                             "n_pos": 4, "n_neg": 36}
    page = section.html({"outcome": o}, 10)
    assert bad not in page and "&lt;b&gt;ward &amp; co&lt;/b&gt;" in page
    # the lead: the heterogeneity reading comes before prevalence, and the range only "for comparison"
    brief = page.index("In brief")
    assert brief < page.index("Prevalence by site")
    h = o["equalized_odds"]["heterogeneity"]["tpr"]
    assert "differs across the 4 sites by more than sampling noise gives" in page[brief:page.index("Prevalence")]
    eo_at = page.index("Equalized odds across sites")
    assert page.index("permutation p", eo_at) < page.index("kept for comparison", eo_at)
    assert f"{h['sd_rate']:.3f}" in page and "few positives" in page
    assert page.count("few positives") == 2  # Alpha (9 positives) and the added unit
    md = section.markdown({"outcome": o}, 10)
    assert "by more than sampling noise gives" in md and "without small" in md and "<b>" not in md


def test_leak_scores_switch_to_the_real_leak_ranking():
    from sitecheck.analyses.leakage import rank_leakage
    from sitecheck.analyses.probe import cross_fit

    prep = prep_of(synth(600, seed=6), groups=())
    cf = cross_fit(prep.X, prep.site, prep.features.categorical, prep.folds, random_state=0)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):  # small table: OpenMP start-up would dominate the predictions
        ranking = rank_leakage(prep, cf, n_repeats=2, max_rows_per_fold=200)
    d = outcome_risk(prep, leakage=ranking, n_boot=50, n_repeats=1).to_dict()
    assert d["leak_source"] == "leakage"
    f = {r["feature"]: r for r in d["feature_risk"]}
    for name in ("f0", "f1", "f2", "f3"):
        assert f[name]["leak_score"] == pytest.approx(ranking.score_of(name))
    assert [c["feature"] for c in d["shortcut_candidates"]] == ["f0"]


def test_scan_fills_outcome_section_on_the_demo(demo_table, demo_truth):
    from sitecheck.render.html import render_html
    from sitecheck.render.markdown import render_markdown
    from sitecheck.scan import ScanOptions, scan_table

    res = scan_table(demo_table, ScanOptions(analyses=("outcome",)))
    doc = res.to_dict()
    o = doc["outcome"]
    # Ground truth of the invented demo: baseline outcome logits differ by site.
    assert demo_truth["outcome_prevalence"]["varies_by_site"]
    assert o["prevalence_test"]["p_value"] < 0.01
    for site, observed in demo_truth["outcome_prevalence"]["observed"].items():
        assert o["prevalence"][site]["ci"][0] <= observed <= o["prevalence"][site]["ci"][1]
    assert set(o["loso"]) == set(demo_truth["outcome_prevalence"]["observed"])
    assert 0.6 < o["pooled_auc"] < 0.95 and o["n"] + o["n_missing"] == res.objects["prepared"].n_used
    assert "Could a model use the site as a shortcut" in render_html(doc)
    assert "Outcome shortcut and transport risk" in render_markdown(doc)
