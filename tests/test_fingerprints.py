"""Fingerprints: ground-truth injection on the demo, null false-positive rates, reference checks."""
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from sitecheck.demo import GLUCOSE_MGDL_PER_MMOLL, generate_demo
from sitecheck.errors import InputError, ParameterError
from sitecheck.analyses.fingerprints import (KINDS, adjust_for_covariates, detect_exclusive_levels, detect_site_missing,
                                    find_fingerprints, grid_step, median_ci)
from sitecheck.reading.intake import frame_to_raw
from sitecheck.table.roles import RoleSpec, assign_roles


def _demo(n, seed, null=False):
    d = generate_demo(n, seed=seed, null=null)
    spec = RoleSpec(site="hospital", outcome="admitted_hdu", covariates=("age", "sex"),
                    identifiers=("attendance_id",))
    return d, assign_roles(frame_to_raw(d.frame), spec)


def _table(frame, covariates=()):
    return assign_roles(frame_to_raw(frame), RoleSpec(site="site", covariates=tuple(covariates)))


def _keys(result):
    return {(f.feature, f.site, f.kind) for f in result.findings}


@pytest.fixture(scope="module", params=[7, 2031], ids=["seed7", "fresh-seed2031"])
def demo_run(request):
    d, table = _demo(6000, request.param)
    return d, table, find_fingerprints(table)


def test_demo_truth_recovered_with_kind_and_site(demo_run):
    d, _, result = demo_run
    truth = {(e["feature"], e["site"], e["kind"]) for e in d.truth["effects"]}
    assert len(truth) == 8
    # every injected effect is found with the right kind and site, and nothing else is reported
    assert _keys(result) == truth
    for f in result.findings:
        assert f.kind in KINDS
        assert f.evidence["p_adj"] < 0.01
        assert f.explanation and f.suggested_fix


def test_demo_evidence_numbers(demo_run):
    d, table, result = demo_run
    by = {(f.feature, f.kind): f.evidence for f in result.findings}
    g = by[("glucose", "unit_ratio")]
    # the demo records glucose in mg/dL at Cindervale: x 18.016 (molar mass 180.16 g/mol)
    assert g["factor"] == pytest.approx(GLUCOSE_MGDL_PER_MMOLL, rel=1e-3)
    assert g["ratio_ci"][0] <= GLUCOSE_MGDL_PER_MMOLL * 1.05 and g["ratio_ci"][1] >= GLUCOSE_MGDL_PER_MMOLL * 0.95
    assert g["name_match"] is True and g["conversion"]["analyte"] == "glucose"
    s = by[("sodium", "shift")]
    assert s["smd_ci"][0] > 0.2
    assert 3.0 < s["difference"] < 5.0  # injected +4 mmol/L
    t = by[("temperature", "precision")]
    assert (t["step_site"], t["step_elsewhere"]) == (0.5, 0.1)
    assert by[("crp", "floor")]["limit"] == 5.0
    assert by[("lactate", "missing_code")]["value"] == -99.0
    alb = by[("albumin", "site_missing")]
    n_dusk = int((table.frame["hospital"] == "Duskwater").sum())
    assert alb["at_site"]["n"] == n_dusk and alb["at_site"]["count"] == n_dusk


def test_creatinine_case_mix_is_not_a_shift_when_age_is_a_covariate(demo_run):
    _, _, result = demo_run
    assert not [f for f in result.findings if f.feature == "creatinine"]
    assert result.covariates == ("age", "sex")


def test_case_mix_synthetic_flags_shift_only_without_adjustment():
    # invented: creatinine rises steeply with age; one site is 15 years older on average
    rng = np.random.default_rng(5)
    n = 2400
    site = np.repeat(["North", "South", "East", "West"], n // 4).astype(object)
    age = rng.normal(55, 10, n) + np.where(site == "East", 15, 0)
    creat = np.round(70 + 1.2 * (age - 55) + rng.normal(0, 12, n))
    frame = pd.DataFrame({"site": site, "age": np.round(age), "creatinine": creat,
                          "noise": np.round(rng.normal(5, 1, n), 1)})
    raw_cov = find_fingerprints(_table(frame, ["age"]), covariates=())
    assert ("creatinine", "East", "shift") in _keys(raw_cov)
    adjusted = find_fingerprints(_table(frame, ["age"]))
    assert not [f for f in adjusted.findings if f.kind == "shift"]


def _unit_frame(seed=3, name="creatinine"):
    rng = np.random.default_rng(seed)
    n = 2000
    site = np.repeat(["North", "South", "East", "West"], n // 4).astype(object)
    umol = np.exp(rng.normal(np.log(80), 0.25, n))
    values = np.where(site == "West", np.round(umol / 88.4, 2), np.round(umol))
    return pd.DataFrame({"site": site, name: values, "other": np.round(rng.normal(10, 2, n), 1)})


def test_unit_detection_creatinine_in_mg_dl_at_one_site():
    result = find_fingerprints(_table(_unit_frame()))
    assert _keys(result) == {("creatinine", "West", "unit_ratio")}
    ev = result.findings[0].evidence
    # AMA SI table: creatinine mg/dL x 88.4 = umol/L, so West/others = 1/88.4
    assert ev["factor"] == pytest.approx(1 / 88.4, rel=1e-3)
    assert ev["conversion"]["from_unit"] == "mg/dL" and ev["name_match"] is True
    assert ev["ratio_ci"][0] < 1 / 88.4 < ev["ratio_ci"][1]


def test_unit_detection_by_ratio_alone_for_an_unnamed_column():
    result = find_fingerprints(_table(_unit_frame(name="lab_x17")))
    f = [f for f in result.findings if f.kind == "unit_ratio"]
    assert [(x.feature, x.site) for x in f] == [("lab_x17", "West")]
    assert f[0].evidence["name_match"] is False


def test_temperature_in_fahrenheit_is_an_affine_unit():
    rng = np.random.default_rng(11)
    n = 1600
    site = np.repeat(["North", "South", "East", "West"], n // 4).astype(object)
    c = rng.normal(36.9, 0.5, n)
    temp = np.where(site == "South", np.round(c * 9 / 5 + 32, 1), np.round(c, 1))
    result = find_fingerprints(_table(pd.DataFrame({"site": site, "temp": temp})))
    assert _keys(result) == {("temp", "South", "unit_ratio")}
    assert result.findings[0].evidence["median_site_converted"] == pytest.approx(36.9, abs=0.2)


def test_heaping_ceiling_scale_and_exclusive_level_on_a_synthetic():
    rng = np.random.default_rng(21)
    n = 3200
    site = np.repeat(["North", "South", "East", "West"], n // 4).astype(object)
    sbp = np.round(rng.normal(130, 18, n))
    heap = (site == "North") & (rng.random(n) < 0.5)
    sbp[heap] = np.round(sbp[heap] / 10) * 10          # half the values rounded to tens at North
    sat = np.round(rng.normal(94, 4, n))
    sat[(site == "South") & (sat > 97)] = 97           # upper reporting limit at South
    wide = rng.normal(50, 5, n) * np.where(site == "East", 1.8, 1.0)
    ward = rng.choice(["A", "B", "C"], n).astype(object)
    ward[(site == "West") & (rng.random(n) < 0.1)] = "Z-local"
    frame = pd.DataFrame({"site": site, "sbp": sbp, "sat": sat, "wide": np.round(wide, 2), "ward": ward})
    keys = _keys(find_fingerprints(_table(frame)))
    assert {("sbp", "North", "heaping"), ("sat", "South", "ceiling"), ("wide", "East", "scale"),
            ("ward", "West", "exclusive_level")} <= keys
    assert ("sbp", "North", "precision") not in keys


@pytest.mark.slow
def test_no_kind_fires_on_the_null_demo_more_than_its_rate():
    # Stated rate: each kind fires on a null table with probability <= alpha = 0.01. Over 50 small null
    # tables (400 rows) a kind may fire at most 4 times: P(> 4 | 50, 0.01) < 0.00015 per kind, so all
    # fourteen kinds pass together with probability > 0.997. Power (scipy.stats.binom): a kind that fires on 10% of
    # null tables fails it with probability 0.57, on 20% with 0.98.
    from scipy.stats import binom

    n_tables, limit = 50, 4
    assert binom.sf(limit, n_tables, 0.01) * len(KINDS) < 0.003 and binom.sf(limit, n_tables, 0.2) > 0.98
    fired = {k: 0 for k in KINDS}
    for seed in range(100, 100 + n_tables):
        _, table = _demo(400, seed, null=True)
        result = find_fingerprints(table)
        n_numeric = sum(table.kind(f) == "numeric" for f in result.features)
        assert result.tests["shift"]["n_tests"] == 4 * n_numeric
        assert result.tests["shift"]["per_test_alpha"] == pytest.approx(0.01 / (4 * n_numeric), rel=1e-4)
        for k in {f.kind for f in result.findings}:
            fired[k] += 1
    assert max(fired.values()) <= limit, fired


def test_covariate_adjustment_matches_statsmodels_ols():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(0)
    n, k = 500, 3
    site = rng.integers(0, k, n)
    Z = rng.normal(size=(n, 2))
    y = 1.5 * Z[:, 0] - 0.7 * Z[:, 1] + np.array([0.0, 2.0, -1.0])[site] + rng.normal(0, 1, n)
    y[:7] = np.nan
    adj, used = adjust_for_covariates(y, site, Z, k)
    ok = ~np.isnan(y)
    D = np.eye(k)[site[ok]]
    fit = sm.OLS(y[ok], np.hstack([D, Z[ok]])).fit()  # reference: statsmodels OLS with site indicators
    np.testing.assert_allclose(adj[ok], y[ok] - Z[ok] @ fit.params[k:], atol=1e-8)
    assert used == n - 7 and np.isnan(adj[:7]).all()


def test_site_missing_p_value_is_fishers_exact_probability():
    site = np.repeat([0, 1, 2], [30, 50, 40])
    present = np.ones(120, dtype=bool)
    present[:30] = False            # site 0 never recorded
    present[30:35] = False          # 5 missing elsewhere
    (c,) = detect_site_missing(present, site, 3)
    # Fisher (1935): one-sided p of the extreme table = C(M, n_s) / C(N, n_s), M = all missing
    expected = math.comb(35, 30) / math.comb(120, 30)
    assert c.s == 0 and c.p == pytest.approx(expected, rel=1e-6)


def test_exclusive_level_p_value_is_hypergeometric():
    site = np.repeat([0, 1], [40, 60])
    values = np.array(["a"] * 34 + ["z"] * 6 + ["a"] * 60, dtype=object)
    (c,) = detect_exclusive_levels(values, site, 2)
    # all 6 'z' rows fall at the 40-row site: C(40, 6) / C(100, 6)
    assert c.p == pytest.approx(math.comb(40, 6) / math.comb(100, 6), rel=1e-9)
    assert c.evidence["level"] == "z" and c.evidence["count"] == 6


def test_median_interval_agrees_with_scipy_quantile_test():
    x = np.sort(np.random.default_rng(4).lognormal(0, 1, 301))
    lo, hi = median_ci(x)
    # reference: scipy.stats.quantile_test (exact binomial interval for the median)
    ref = stats.quantile_test(x, q=np.median(x), p=0.5).confidence_interval(0.95)
    rank = {v: i for i, v in enumerate(x)}
    assert abs(rank[lo] - rank[ref.low]) <= 1 and abs(rank[hi] - rank[ref.high]) <= 1


def test_grid_step():
    assert grid_step(np.array([36.5, 37.0, 38.5, 36.0])) == 0.5
    assert grid_step(np.array([36.7, 37.1, 38.2, 36.0, 36.9])) == 0.1
    assert grid_step(np.array([120.0, 131.0, 142.0, 97.0])) == 1.0
    assert grid_step(np.array([0.123456, 0.98765, 3.14159265])) is None


def test_deterministic_and_accepts_prepared(demo_table, demo_prepared):
    a = find_fingerprints(demo_table).to_dict()
    b = find_fingerprints(demo_prepared).to_dict()
    assert a == b
    assert a["n_rows"] == len(demo_table.frame)


def test_bad_inputs_name_the_column(demo_table):
    with pytest.raises(InputError, match="'height_cm'"):
        find_fingerprints(demo_table, covariates=["height_cm"])
    with pytest.raises(ParameterError):
        find_fingerprints(demo_table, alpha=2)


def test_scan_fills_the_fingerprints_section_and_renders(demo_table):
    from sitecheck.analyses import registry as analyses
    from sitecheck.render.sections import ORDER, fingerprints as section
    from sitecheck.scan import ScanOptions, scan_table

    names = [a.name for a in analyses.REGISTRY]
    assert "fingerprints" in names and "fingerprints" in ORDER
    for later in ("maps", "harmonise", "outcome"):
        if later in names:
            assert names.index("fingerprints") < names.index(later)
    doc = scan_table(demo_table, ScanOptions(analyses=("fingerprints",))).to_dict()
    assert {f["kind"] for f in doc["fingerprints"]} >= {"unit_ratio", "missing_code", "site_missing"}
    for f in doc["fingerprints"]:
        assert set(f) >= {"feature", "site", "kind", "detail", "evidence"}
    from sitecheck.report.schema import report_schema, validate

    assert validate(doc, report_schema()) == []
    md = section.markdown(doc, 10)
    assert "glucose" in md and "another unit" in md  # one name per artefact across the report (issue 18)


def test_render_escapes_data_text_and_withholds_small_cells():
    from sitecheck.render.sections import fingerprints as section

    doc = {"input": {"sites": {"<b>Big</b>": 500, "Tiny": 4}},
           "fingerprints": [
               {"feature": "<script>x</script>", "site": "<b>Big</b>", "kind": "missing_code",
                "detail": "the value -99 appears 7 times", "evidence": {"p_adj": 1e-5, "at_site": {"n": 500, "count": 7}}},
               {"feature": "crp", "site": "Tiny", "kind": "floor", "detail": "secret 3 of 4",
                "evidence": {"p_adj": 0.001, "at_site": {"n": 4, "count": 3}}},
               {"feature": "sodium", "site": "<b>Big</b>", "kind": "shift", "detail": "mean 142",
                "evidence": {"p_adj": 0.0, "n": 500}}]}
    page = section.html(doc, 10)
    assert "<script>" not in page and "&lt;script&gt;" in page and "&lt;b&gt;Big" in page
    assert "secret" not in page and "appears 7 times" not in page and "withheld" in page
    assert "mean 142" in page and "500" in page
    md = section.markdown(doc, 10)
    assert "secret" not in md and "mean 142" in md
    assert section.html({"input": {}}, 10) == ""


def test_welch_and_brown_forsythe_match_scipy():
    from sitecheck.analyses.fingerprints import brown_forsythe, welch_test

    rng = np.random.default_rng(8)
    a, b = rng.normal(0.3, 1.0, 140), rng.normal(0.0, 2.0, 260)
    # reference: scipy.stats.ttest_ind(equal_var=False) and scipy.stats.levene(center="median")
    ref_t = stats.ttest_ind(a, b, equal_var=False).pvalue
    got_t = welch_test(a.mean(), a.var(ddof=1), len(a), b.mean(), b.var(ddof=1), len(b))
    assert got_t == pytest.approx(ref_t, rel=1e-9)
    assert brown_forsythe(a, b) == pytest.approx(stats.levene(a, b, center="median").pvalue, rel=1e-9)


def test_feature_recorded_at_one_site_is_skipped_with_its_reason_not_a_crash():
    # Invented three-clinic table: troponin measured at Fernhollow only (a test the others never ran),
    # lactate measured nowhere. The value detectors have nothing to compare; site_missing says where.
    rng = np.random.default_rng(16)
    n = 90
    site = np.repeat(["Fernhollow", "Gorsebrook", "Hazelmere"], n // 3)
    trop = np.where(site == "Fernhollow", np.round(rng.lognormal(2.5, 0.6, n), 0), np.nan)
    frame = pd.DataFrame({"site": site, "sodium": np.round(rng.normal(140, 3, n)), "troponin": trop,
                          "lactate": np.full(n, np.nan)})
    result = find_fingerprints(_table(frame))
    assert result.skipped["troponin"] == ("recorded at one site only (Fernhollow); the value detectors compare a "
                                          "site with the others")
    assert "sodium" not in result.skipped
    assert {(f.feature, f.site, f.kind) for f in result.findings if f.feature == "troponin"} == {
        ("troponin", "Gorsebrook", "site_missing"), ("troponin", "Hazelmere", "site_missing")}
    assert result.to_dict()["skipped"] == dict(result.skipped)


def test_temperature_check_without_a_reference_site_in_the_other_scale():
    # One clinic's median is in the Fahrenheit range and the median of the others' medians in the Celsius
    # range, but no single other clinic is in it (medians 25 and 50): no temperature pair, and no crash
    # (it used to concatenate an empty list of reference sites).
    from sitecheck.analyses.fingerprints import detect_unit_ratio

    rng = np.random.default_rng(3)
    vals = [np.sort(rng.normal(m, 1.0, 40)) for m in (98.0, 25.0, 50.0)]
    out = detect_unit_ratio(vals, "temp")
    assert [c for c in out if c.kind == "unit_ratio" and isinstance(c.payload, tuple)] == []


# -- issue 17: censoring, number formats, one finding per feature x site x kind --------------------

def test_demo_censoring_and_number_format_evidence(demo_run):
    d, table, result = demo_run
    by = {(f.feature, f.kind): f.evidence for f in result.findings}
    f = d.frame
    t = by[("troponin", "censored_below")]
    at = f.hospital == "Aldermoor"
    n_cens = int((f.troponin[at] == "<5").sum())
    n_rec = int(f.troponin[at].notna().sum())
    assert t["limit"] == 5.0 and t["at_site"]["count"] == n_cens and t["at_site"]["n"] == n_rec
    assert t["at_site"]["share"] == pytest.approx(n_cens / n_rec, rel=1e-5)
    assert t["elsewhere"]["count"] == 0
    # the other sites measure values below 5 (3 and 4 ng/L in the demo)
    other = pd.to_numeric(f.troponin[~at], errors="coerce").dropna()
    assert t["elsewhere"]["share_measured_below"] == pytest.approx((other < 5).mean(), rel=1e-5)
    # the censored cells are not also reported as a floor at the same site
    assert ("troponin", "floor") not in by
    k = by[("potassium", "number_format")]
    cin = f.hospital == "Cindervale"
    assert k["formats"][0]["format"] == "decimal_comma"
    assert k["formats"][0]["count"] == int(f.potassium[cin].astype(str).str.contains(",").sum())
    assert k["formats"][0]["count_elsewhere"] == 0


def test_exclusive_levels_aggregate_to_one_finding_per_feature_and_site():
    # invented: one site writes 21 local ward codes that no other site uses
    rng = np.random.default_rng(3)
    site = np.repeat(["North", "South", "East"], 300).astype(object)
    ward = rng.choice(["A", "B", "C"], 900).astype(object)
    ward[:300] = np.array([f"N{i:02d}" for i in range(21)], dtype=object)[rng.integers(0, 21, 300)]
    frame = pd.DataFrame({"site": site, "ward": ward, "x": np.round(rng.normal(5, 1, 900), 1)})
    table = _table(frame)
    result = find_fingerprints(table)
    excl = result.of_kind("exclusive_level")
    assert len(excl) == 1 and excl[0].site == "North"
    ev = excl[0].evidence
    assert len(ev["levels"]) == 21 and ev["count"] == 300
    assert [r["count"] for r in ev["levels"]] == sorted((r["count"] for r in ev["levels"]), reverse=True)
    # the hygiene finding before modelling is aggregated the same way
    hyg = [h for h in table.findings if h.kind == "exclusive_level"]
    assert len(hyg) == 1 and hyg[0].site == "North" and hyg[0].count == 300 and "21 levels" in hyg[0].detail


def test_missing_codes_aggregate_with_every_code_listed():
    rng = np.random.default_rng(9)
    site = np.repeat(["North", "South", "East"], 400).astype(object)
    x = np.round(rng.normal(1.4, 0.4, 1200), 1)
    x[:30], x[30:55] = -99.0, 999.0
    table = _table(pd.DataFrame({"site": site, "lactate": x}))
    (mc,) = find_fingerprints(table).of_kind("missing_code")
    assert mc.site == "North" and mc.evidence["value"] == -99.0
    assert [c["value"] for c in mc.evidence["codes"]] == [-99.0, 999.0] and mc.evidence["at_site"]["count"] == 55


def _censored_frame(rng, n_per_site, censor_sites, limit=5.0):
    """Four invented sites with the same troponin distribution; some write values below
    ``limit`` as '<limit' (text cells, as exported)."""
    sites = ["North", "South", "East", "West"]
    site = np.repeat(sites, n_per_site).astype(object)
    trop = np.round(2 + np.exp(rng.normal(np.log(7.0), 0.9, len(site))))
    cells = trop.astype(object)
    for s in censor_sites:
        m = (site == s) & (trop < limit)
        cells[m] = f"<{limit:g}"
    return pd.DataFrame({"site": site, "troponin": cells})


def test_censoring_false_alarm_rate_when_every_site_censors_alike():
    # every site writes '<5' below 5: censoring does not mark any site. Measured over 20 seeds.
    fired = 0
    for seed in range(20):
        frame = _censored_frame(np.random.default_rng(seed), 300, ["North", "South", "East", "West"])
        res = find_fingerprints(_table(frame))
        fired += any(f.kind in ("censored_below", "censored_above", "floor") for f in res.findings)
    assert fired <= 1        # family-wise level 0.01 per kind: at most 1 of 20 is allowed by chance
    # and one censoring site among four is found every time, at that site only
    for seed in range(5):
        frame = _censored_frame(np.random.default_rng(100 + seed), 300, ["East"])
        res = find_fingerprints(_table(frame))
        assert {(f.site, f.kind) for f in res.findings if f.kind.startswith("censored")} == {("East", "censored_below")}


def test_number_format_false_alarm_rate_when_every_site_writes_commas():
    fired = 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        site = np.repeat(["North", "South", "East"], 200).astype(object)
        k = np.round(rng.normal(4.2, 0.45, 600), 1)
        frame = pd.DataFrame({"site": site, "potassium": [f"{v:.1f}".replace(".", ",") for v in k]})
        res = find_fingerprints(_table(frame))
        fired += any(f.kind == "number_format" for f in res.findings)
    assert fired == 0


def test_kinds_are_one_list_for_gates_and_schema():
    from sitecheck.table.repair import DRIFT_KINDS, plan_schema
    from sitecheck.report.gates import FINGERPRINT_KINDS, check_fail_on
    from sitecheck.report.schema import report_schema

    enum = report_schema()["properties"]["fingerprints"]["items"]["properties"]["kind"]["enum"]
    assert enum == list(KINDS) == list(FINGERPRINT_KINDS)
    # a plan entry fixes a fingerprint, or (plan 1.1) a step over time found by the drift analysis
    assert plan_schema()["properties"]["entries"]["items"]["properties"]["finding"]["properties"]["kind"]["enum"] \
        == list(KINDS) + list(DRIFT_KINDS) and DRIFT_KINDS == ("drift_level",)
    assert KINDS[:10] == ("unit_ratio", "precision", "heaping", "floor", "ceiling", "missing_code", "site_missing",
                          "exclusive_level", "shift", "scale")      # shipped names, a contract
    assert check_fail_on(["censored_below", "censored_above", "number_format", "unit_label"])
    with pytest.raises(ValueError, match="censored_below"):
        check_fail_on(["censored"])


def _creatinine_with_unit_column(seed=0, unit_name="creat_unit", value_name="creatinine"):
    # invented: four sites; Westbrook reports creatinine in mg/dL and says so in a unit column
    rng = np.random.default_rng(seed)
    site = np.repeat(["North", "South", "East", "Westbrook"], 250).astype(object)
    umol = np.round(np.exp(rng.normal(np.log(80), 0.3, 1000)))
    west = site == "Westbrook"
    values = umol.copy()
    values[west] = np.round(umol[west] / 88.42, 2)            # mg/dL, two decimals as printed
    unit = np.where(west, "mg/dL", rng.choice(["umol/L", "µmol/l"], 1000)).astype(object)
    return pd.DataFrame({"site": site, value_name: values, unit_name: unit,
                         "sodium": np.round(rng.normal(139, 3, 1000))})


def test_unit_column_linked_by_name_and_values():
    frame = _creatinine_with_unit_column()
    table = _table(frame)
    res = find_fingerprints(table)
    link = res.unit_columns["creat_unit"]
    assert link["column"] == "creatinine" and link["linked_by"] == "name and values"
    # published factor: creatinine 1 mg/dL = 88.4 umol/L (AMA Manual of Style SI conversion table)
    assert link["factor"] == pytest.approx(1 / 88.4, rel=1e-3)
    assert link["ratio"] == pytest.approx(1 / 88.4, rel=0.05)
    (lab,) = res.of_kind("unit_label")
    assert lab.site == "Westbrook" and lab.evidence["unit"] == "mg/dL" and lab.evidence["reference_unit"] == "umol/L"
    assert "unit of 'creatinine'" in lab.detail
    (ur,) = res.of_kind("unit_ratio")
    assert ur.site == "Westbrook" and ur.evidence["unit_column"] == "creat_unit" and "creat_unit" in ur.detail
    assert not res.of_kind("exclusive_level")


def test_unit_column_linked_by_values_alone():
    frame = _creatinine_with_unit_column(seed=1, unit_name="lab_u", value_name="creatinine")
    res = find_fingerprints(_table(frame))
    assert res.unit_columns["lab_u"]["column"] == "creatinine"
    assert res.unit_columns["lab_u"]["linked_by"] == "values"
    # a text column that is not a unit column is left alone
    frame["lab_u"] = np.where(frame.site == "Westbrook", "ward B", "ward A")
    assert find_fingerprints(_table(frame)).unit_columns == {}
