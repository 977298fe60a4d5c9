"""The repair loop: the plan, its application to a file, and the residual site signal.

Checks against sources outside the project: the substitution of Hornung & Reed (1990) and the
triangular-density rationale behind it (scipy.stats.triang); unit factors against the AMA SI
conversion table (see tests/test_units.py for the table itself); the round trip on the demo with
ground truth from fixtures/demo_truth.json.
"""
import hashlib
import json
import math
import shutil

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from scipy import stats

from sitecheck.cli import main
from sitecheck.errors import InputError
from sitecheck.analyses.fingerprints import find_fingerprints
from sitecheck.reading.intake import frame_to_raw, read_table
from sitecheck.table.repair import (CENSOR_POLICIES, apply_repairs, censored_value, evident_mapping, plan_from_dict,
                              plan_repairs, plan_schema, repair_file)
from sitecheck.table.roles import RoleSpec, assign_roles
from sitecheck.report.schema import validate

ROLES = RoleSpec(site="hospital", outcome="admitted_hdu", covariates=("age", "sex"), identifiers=("attendance_id",))


# -- the censoring substitution ------------------------------------------------------------------

def test_sqrt2_substitution_is_hornung_and_reed_1990():
    # Hornung RW, Reed LD (1990), Appl Occup Environ Hyg 5(1):46-51: a value below the limit of
    # detection L is replaced by L / sqrt(2) when the data are not highly skewed (geometric standard
    # deviation below 3), and by L / 2 when they are (recalled from the paper, not re-derived here).
    for L in (0.1, 5.0, 20.0, 1000.0):
        assert censored_value(L, "limit_over_sqrt2") == pytest.approx(L / math.sqrt(2), rel=1e-15)
        assert censored_value(L, "limit_over_2") == pytest.approx(L / 2, rel=1e-15)
        assert censored_value(L, "limit") == L and np.isnan(censored_value(L, "missing"))
        # L / sqrt(2) is the median of the right-triangular density 2x/L^2 on (0, L), the distribution
        # the paper assumes below L (scipy.stats.triang with c = 1 is that density)
        assert stats.triang(c=1.0, loc=0.0, scale=L).median() == pytest.approx(L / math.sqrt(2), rel=1e-12)
    # the worked value: L = 5 gives 3.5355...
    assert float(censored_value(5.0, "limit_over_sqrt2")) == pytest.approx(3.5355339, abs=1e-7)
    with pytest.raises(InputError, match="limit_over_sqrt2"):
        censored_value(5.0, "half")


def _censored_table(gsd_log_sd):
    rng = np.random.default_rng(0)
    site = np.repeat(["North", "South", "East"], 400).astype(object)
    x = np.round(np.exp(rng.normal(np.log(12.0), gsd_log_sd, 1200)), 1)
    cells = x.astype(object)
    cells[(site == "East") & (x < 5)] = "<5"
    return assign_roles(frame_to_raw(pd.DataFrame({"site": site, "crp": cells}), site="site"), RoleSpec(site="site"))


@pytest.mark.parametrize("log_sd,policy", [(0.6, "limit_over_sqrt2"), (1.3, "limit_over_2")])
def test_default_censoring_policy_follows_the_geometric_sd(log_sd, policy):
    # GSD = exp(sd of log values): exp(0.6) = 1.8 (< 3: L / sqrt 2); exp(1.3) = 3.7 (>= 3: L / 2)
    table = _censored_table(log_sd)
    plan = plan_repairs(table, find_fingerprints(table))
    (e,) = [e for e in plan.entries if e.operation == "censored_policy"]
    assert e.site == "East" and e.params["policy"] == policy and e.params["limits"] == [5.0]
    assert (e.params["geometric_sd"] >= 3) == (policy == "limit_over_2")
    repaired, log = apply_repairs(table, plan)
    x0, x1 = table.frame["crp"].to_numpy(), repaired.frame["crp"].to_numpy()
    flagged = table.censored("crp") == -1
    assert np.allclose(x1[flagged], censored_value(5.0, policy)) and np.array_equal(x0[~flagged], x1[~flagged])
    assert log.cells_by_site == {"East": {"crp": {"censored_policy": int(flagged.sum())}}}


# -- the plan -------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def demo_plan(demo_table):
    return plan_repairs(demo_table, find_fingerprints(demo_table))


def test_demo_plan_entries_follow_the_ground_truth(demo_plan, demo_truth, demo_table):
    got = {(e.column, e.site, e.kind): e for e in demo_plan.entries}
    truth = {(t["feature"], t["site"], t["kind"]) for t in demo_truth["effects"]}
    mechanical = {k for k in truth if k[2] in ("unit_ratio", "missing_code", "censored_below", "number_format",
                                              "site_missing")}
    assert set(got) == mechanical
    g = got[("glucose", "Cindervale", "unit_ratio")]
    # AMA SI conversion table: glucose 1 mg/dL = 0.0555 mmol/L (Young 1987); rounded to the others' 0.1 grid
    assert g.operation == "convert_unit" and g.params["factor"] == pytest.approx(0.0555, abs=0.00005)
    assert (g.params["from_unit"], g.params["to_unit"], g.params["round_to"]) == ("mg/dL", "mmol/L", 0.1)
    assert g.safe and g.enabled
    at = demo_table.frame.hospital == "Cindervale"
    assert g.rows == int(at.sum()) and g.cells == int(demo_table.frame.glucose[at].notna().sum())
    assert got[("lactate", "Brackenholt", "missing_code")].params["codes"] == [-99.0]
    assert not got[("albumin", "Duskwater", "site_missing")].safe        # dropping loses other sites' values
    assert {f["kind"] for f in demo_plan.not_repaired} == {"shift", "precision", "floor"}
    doc = json.loads(json.dumps(demo_plan.to_dict()))
    assert validate(doc, plan_schema()) == []
    again = plan_from_dict(doc)
    assert [e.to_dict() for e in again.entries] == doc["entries"]


def test_applying_in_memory_leaves_the_given_table_and_copies_only_changed_columns(demo_plan, demo_table):
    # The scan repairs in memory and keeps the table as given for the probe: the given frame must come out
    # unchanged, and a column no entry touches must not be copied (at 1,000,000 x 100 a full copy cost
    # 777 MB, over the scan's memory goal).
    before = demo_table.frame.copy(deep=True)
    repaired, log = apply_repairs(demo_table, demo_plan, safe_only=True)
    pd.testing.assert_frame_equal(demo_table.frame, before)
    touched = {e.column for e in demo_plan.entries if e.id in log.applied}
    assert {"glucose", "lactate"} <= touched
    for col in ("glucose", "lactate"):  # units converted, -99 codes removed (a decimal comma parses the same)
        assert not repaired.frame[col].equals(before[col]), col
    untouched = [c for c in ("sodium", "crp", "temperature") if c not in touched]
    assert untouched
    for col in untouched:
        assert np.shares_memory(repaired.frame[col].to_numpy(), demo_table.frame[col].to_numpy()), col


def test_evident_level_mapping_only():
    assert evident_mapping("Male", ["M", "F"]) == "M" and evident_mapping("female", ["M", "F"]) == "F"
    assert evident_mapping("Walk In", ["walk-in", "ambulance"]) == "walk-in"
    assert evident_mapping("f", ["Female", "Male"]) == "Female"
    assert evident_mapping("Other", ["M", "F"]) is None and evident_mapping("Mixed", ["M", "Male"]) is None
    rng = np.random.default_rng(2)
    site = np.repeat(["North", "South", "East"], 200).astype(object)
    sex = rng.choice(["M", "F"], 600).astype(object)
    east = site == "East"
    sex[east] = np.where(sex[east] == "M", "Male", "Female")
    sex[np.flatnonzero(east)[:12]] = "Unknown"
    table = assign_roles(frame_to_raw(pd.DataFrame({"site": site, "sex": sex, "x": rng.normal(0, 1, 600)})),
                         RoleSpec(site="site"))
    plan = plan_repairs(table, find_fingerprints(table))
    (e,) = [e for e in plan.entries if e.operation == "map_level"]
    assert e.params["mapping"] == {"Male": "M", "Female": "F"} and e.params["unmapped"] == ["Unknown"]
    repaired, _ = apply_repairs(table, plan)
    assert set(repaired.frame.sex[east]) == {"M", "F", "Unknown"}


# -- applying a plan to a file: the round trip on the demo -----------------------------------------

@pytest.fixture(scope="module")
def round_trip(tmp_path_factory, demo_small_path, demo_table, demo_plan):
    d = tmp_path_factory.mktemp("repair")
    data = d / "demo.csv"
    shutil.copy(demo_small_path, data)
    plan_path = d / "repair_plan.json"
    plan_path.write_text(json.dumps(demo_plan.to_dict()))
    before = hashlib.sha256(data.read_bytes()).hexdigest()
    res = repair_file(str(data), str(plan_path), str(d / "fixed.csv"))
    assert hashlib.sha256(data.read_bytes()).hexdigest() == before          # the input is never modified
    return d, data, res


def test_round_trip_removes_the_injected_unit_code_and_format_effects(round_trip):
    d, data, res = round_trip
    fixed = assign_roles(read_table(str(d / "fixed.csv"), site="hospital"), ROLES)
    found = {(f.feature, f.site, f.kind) for f in find_fingerprints(fixed).findings}
    for gone in (("glucose", "Cindervale", "unit_ratio"), ("lactate", "Brackenholt", "missing_code"),
                 ("potassium", "Cindervale", "number_format"), ("troponin", "Aldermoor", "censored_below")):
        assert gone not in found
    # what has no mechanical fix (or is not safe) stays, and nothing new appears
    assert found == {("sodium", "Brackenholt", "shift"), ("temperature", "Aldermoor", "precision"),
                     ("crp", "Duskwater", "floor"), ("albumin", "Duskwater", "site_missing")}
    assert fixed.cells.get("potassium") is None and fixed.censored("troponin") is None   # plain numbers now


def test_no_repair_touches_a_site_or_column_without_a_finding(round_trip, demo_plan):
    d, data, res = round_trip
    a = pd.read_csv(data, dtype=str, keep_default_na=False)
    b = pd.read_csv(d / "fixed.csv", dtype=str, keep_default_na=False)
    assert list(a.columns) == list(b.columns) and len(a) == len(b)
    diff = a.to_numpy() != b.to_numpy()
    touched = {(a.columns[j], a.hospital.iloc[i]) for i, j in zip(*np.nonzero(diff))}
    enabled = {(e.column, e.site) for e in demo_plan.entries if e.enabled}
    assert touched == enabled
    # the log counts exactly the changed cells, per site and column
    logged = {(c, s): sum(ops.values()) for s, cols in res["cells_by_site"].items() for c, ops in cols.items()}
    for (col, site), n in logged.items():
        assert n == int(diff[(a.hospital == site).to_numpy(), list(a.columns).index(col)].sum())
    # a changed glucose value is the mg/dL value x 0.0555 on the 0.1 grid; '<5' became 5 / sqrt(2)
    g0 = pd.to_numeric(a.glucose[a.hospital == "Cindervale"], errors="coerce")
    g1 = pd.to_numeric(b.glucose[b.hospital == "Cindervale"], errors="coerce")
    ok = g0.notna()
    assert np.allclose(g1[ok], np.round(g0[ok] * (10 / 180.16) / 0.1) * 0.1, atol=1e-9)
    t1 = b.troponin[a.troponin == "<5"].astype(float)
    assert np.allclose(t1, 5 / math.sqrt(2))
    log = json.loads((d / "fixed.csv.repair_log.json").read_text())
    assert log["cells_total"] == res["cells_total"] == int(diff.sum())


def test_disabled_entries_and_other_policies_are_honoured(round_trip, demo_plan, tmp_path):
    d, data, _ = round_trip
    doc = demo_plan.to_dict()
    for e in doc["entries"]:
        if e["operation"] == "censored_policy":
            e["params"]["policy"] = "missing"
        if e["operation"] == "convert_unit":
            e["enabled"] = False
        if e["operation"] == "drop_column":
            e["enabled"] = True
    p = tmp_path / "plan.json"
    p.write_text(json.dumps(doc))
    res = repair_file(str(data), str(p), str(tmp_path / "out.csv"))
    out = pd.read_csv(tmp_path / "out.csv", dtype=str, keep_default_na=False)
    src = pd.read_csv(data, dtype=str, keep_default_na=False)
    assert "albumin" not in out.columns and res["dropped_columns"] == ["albumin"]
    assert (out.glucose == src.glucose).all()
    assert set(out.troponin[src.troponin == "<5"]) == {"NA"}      # the column's own missing-value code


def test_parquet_in_parquet_out(round_trip, demo_plan, tmp_path):
    d, data, _ = round_trip
    frame = pd.read_csv(data)         # numbers as numbers; troponin ('<5') and potassium ('4,3') as text
    pq_in = tmp_path / "demo.parquet"
    frame.to_parquet(pq_in)
    plan = tmp_path / "plan.json"
    plan.write_text(json.dumps(demo_plan.to_dict()))
    repair_file(str(pq_in), str(plan), str(tmp_path / "fixed.parquet"))
    fixed = pd.read_parquet(tmp_path / "fixed.parquet")
    brk = frame.hospital == "Brackenholt"
    assert fixed.lactate.dtype.kind == "f" and (fixed.lactate[brk] == -99).sum() == 0
    assert fixed.lactate[brk].isna().sum() == frame.lactate[brk].isna().sum() + (frame.lactate[brk] == -99).sum()
    assert pd.api.types.is_string_dtype(fixed.troponin) and set(fixed.troponin[frame.troponin == "<5"]) == {str(5 / math.sqrt(2))}
    assert set(fixed.potassium[frame.hospital == "Cindervale"].str.contains(",")) == {False}
    assert (fixed.sodium == frame.sodium).all() and fixed.sodium.dtype == frame.sodium.dtype   # untouched


def test_repair_command_refuses_plans_that_do_not_fit_in_one_line(round_trip, demo_plan, tmp_path):
    d, data, _ = round_trip
    good = demo_plan.to_dict()

    def run(doc, out="o.csv", src=data):
        p = tmp_path / "plan.json"
        p.write_text(json.dumps(doc) if not isinstance(doc, str) else doc)
        return CliRunner().invoke(main, ["repair", str(src), "--plan", str(p), "--out", str(tmp_path / out)])

    r = run(good)
    assert r.exit_code == 0 and "Cindervale" in r.output
    bad_version = dict(good, plan_version="sitecheck.repair/9.0")
    no_col = json.loads(json.dumps(good))
    no_col["entries"][1]["column"] = "glucose_mmol"
    no_site = json.loads(json.dumps(good))
    no_site["entries"][0]["site"] = "Eastmarsh"
    for doc, msg in ((bad_version, "version 'sitecheck.repair/9.0' is not known"),
                     (no_col, "column 'glucose_mmol' is not in the table"),
                     (no_site, "site 'Eastmarsh' is not in column 'hospital'"),
                     ("{not json", "not JSON")):
        r = run(doc, out="x.csv")
        assert r.exit_code == 2, r.output
        assert msg in r.output and "Traceback" not in r.output
        assert len([l for l in r.output.splitlines() if l.strip()]) == 1
        assert not (tmp_path / "x.csv").exists()
    r = run(good, out="x.parquet")
    assert r.exit_code == 2 and "input's format (csv)" in r.output
    r = CliRunner().invoke(main, ["repair-schema"])
    assert r.exit_code == 0 and json.loads(r.output)["title"] == "sitecheck repair plan"


# -- the residual site signal --------------------------------------------------------------------

def test_residual_probe_is_lower_on_the_demo(demo_table, demo_prepared, demo_plan):
    from sitecheck.table.prepare import prepare
    from sitecheck.analyses.probe import site_probe
    from sitecheck.table.repair import residual_signal

    probe = site_probe(demo_prepared, n_boot=200, n_permutations=0, linear=False, case_mix=False,
                       within_outcome=False, groups=False, random_state=0)
    repaired_table, log = apply_repairs(demo_table, demo_plan)
    applied = [{"id": i} for i in log.applied]
    prep_r = prepare(repaired_table, random_state=0)
    res = residual_signal(prep_r, probe, None, applied, n_boot=200, n_permutations=0, random_state=0)
    # margin: the safe repairs (glucose units, -99 codes, '<5' policy) lower the probe's AUC by at least
    # 0.03, judged by the lower end of the paired 95% interval (measured on this fixture: 0.981 -> 0.906)
    assert res.difference == pytest.approx(res.auc_given - res.auc_repaired)
    assert res.difference_ci[0] > 0.03
    assert res.auc_repaired_ci[1] < res.auc_given_ci[0]
    assert 0 < res.explained_share < 1 and "\u2192" in res.statement
    # the same rows and folds as the scan's probe
    assert np.array_equal(prep_r.site, demo_prepared.site) and res.n_used == probe.n_used
    none = residual_signal(prep_r, probe, None, [], random_state=0)
    assert none.auc_repaired is None and "no safe repair" in none.statement


# -- entries scoped to a period (a step over time at one site) ------------------------------------

def _dated_scan(tmp_path_factory, null=False, blank=0):
    """The 6,000-row demo with its arrival dates (two years; drift potassium +0.15 at Aldermoor from
    2026-04-01, fixtures/demo_truth.json), scanned for fingerprints and drift only; ``blank`` Aldermoor
    rows lose their date (as exports do), spread over the whole period."""
    from sitecheck.demo import generate_demo
    from sitecheck.render import write_report
    from sitecheck.scan import ScanOptions, scan_file

    d = generate_demo(6000, seed=7, null=null)
    frame = d.frame.copy()
    undated = np.zeros(len(frame), dtype=bool)
    if blank:
        ald = np.flatnonzero((frame.hospital == "Aldermoor").to_numpy())
        undated[ald[::len(ald) // blank][:blank]] = True
        frame.loc[undated, "arrival_date"] = ""
    root = tmp_path_factory.mktemp("null" if null else "dated")
    data = root / "demo.csv"
    frame.to_csv(data, index=False)
    res = scan_file(str(data), site="hospital", outcome="admitted_hdu", covariates=["age", "sex"],
                    identifiers=["attendance_id"], time="arrival_date",
                    options=ScanOptions(analyses=("fingerprints", "drift"), n_jobs=1))
    write_report(res, str(root / "out"), figures=False)
    plan = json.loads((root / "out" / "repair_plan.json").read_text(encoding="utf-8"))
    return d, frame, undated, data, root, res, plan


@pytest.fixture(scope="module")
def dated(tmp_path_factory):
    return _dated_scan(tmp_path_factory, blank=40)


def _months(iso):
    t = pd.Timestamp(iso)
    return t.year * 12 + t.month


def test_a_step_at_one_site_becomes_a_period_entry(dated, demo_truth):
    d, frame, undated, _, _, res, plan = dated
    (truth,) = demo_truth["drift"]
    assert d.truth["drift"] == [truth]
    (e,) = [e for e in plan["entries"] if e["operation"] == "remove_step"]
    assert (e["site"], e["column"], e["finding"]["kind"]) == (truth["site"], truth["feature"], "drift_level")
    assert abs(_months(e["period"]["from"]) - _months(truth["from"])) <= 1  # within one period (months here)
    assert e["period"] == {"time_column": "arrival_date", "from": e["period"]["from"], "until": None}
    assert e["safe"] is False and e["enabled"] is False and "not safe by default" in e["reason"]
    # its evidence is the drift finding's: date, size with its interval, p-values
    (f,) = res.to_dict()["drift"]["findings"]
    ev = e["evidence"]
    assert (ev["change_date"], ev["size"], ev["size_ci"], ev["p_adj"]) == (f["date"], f["size"], f["size_ci"],
                                                                           f["p_adj"])
    assert e["params"]["subtract"] == f["size"] and e["params"]["interval"] == f["size_ci"]
    assert ev["size_ci"][0] < truth["offset"] < ev["size_ci"][1] and ev["p_adj"] < 0.05
    # the step is the difference of 20% trimmed means after minus before (Yuen 1974), here against
    # scipy.stats.trim_mean on the rows of the two segments
    t = pd.to_datetime(frame.arrival_date, errors="coerce")
    ald = (frame.hospital == "Aldermoor") & t.notna()
    k = pd.to_numeric(frame.potassium.astype(str).str.replace(",", "."), errors="coerce")  # Cindervale writes 4,2
    after = k[ald & (t >= e["period"]["from"])].dropna()
    before = k[ald & (t < e["period"]["from"])].dropna()
    assert e["params"]["subtract"] == pytest.approx(stats.trim_mean(after, 0.2) - stats.trim_mean(before, 0.2),
                                                    rel=1e-5)
    assert e["rows"] == int((ald & (t >= e["period"]["from"])).sum()) and e["cells"] == len(after)
    assert ev["site_rows_without_date"] == int(undated.sum()) == 40
    # the plan names version 1.1 and validates against the schema `sitecheck repair-schema` prints
    assert plan["plan_version"] == "sitecheck.repair/1.1"
    r = CliRunner().invoke(main, ["repair-schema"])
    schema = json.loads(r.output)
    assert schema["$id"].endswith("repair/1.1") and "remove_step" in schema["properties"]["entries"]["items"][
        "properties"]["operation"]["enum"]
    assert validate(plan, schema) == []
    assert plan_from_dict(plan).entries[-1].period == e["period"]
    # and report.json, which lists the entry with its period, validates against `sitecheck schema`
    from sitecheck.report.schema import report_schema

    doc = res.to_dict()
    assert [x for x in doc["repair"]["entries"] if x["id"] == e["id"]][0]["period"] == e["period"]
    assert validate(doc, report_schema()) == []


def test_applying_the_period_entry_puts_the_later_period_on_the_earlier(dated, tmp_path):
    _, frame, undated, data, _, _, plan = dated
    doc = json.loads(json.dumps(plan))
    for e in doc["entries"]:
        e["enabled"] = e["operation"] == "remove_step"
    (e,) = [e for e in doc["entries"] if e["enabled"]]
    p = tmp_path / "plan.json"
    p.write_text(json.dumps(doc))
    out = tmp_path / "repaired.csv"
    r = CliRunner().invoke(main, ["repair", str(data), "--plan", str(p), "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert f"entry {e['id']}: 40 rows of its site have no usable date" in r.output
    log = json.loads((tmp_path / "repaired.csv.repair_log.json").read_text())
    assert log["rows_without_date"] == {e["id"]: 40}
    fixed = pd.read_csv(out, dtype=str, keep_default_na=False)
    given = pd.read_csv(data, dtype=str, keep_default_na=False)
    t = pd.to_datetime(given.arrival_date, errors="coerce")
    ald = (given.hospital == "Aldermoor").to_numpy()
    later = ald & (t >= e["period"]["from"]).to_numpy()
    changed = (fixed != given).to_numpy()
    # only potassium, only Aldermoor, only rows dated in the period: no other site, no row before the date,
    # no row without a date
    cols = list(given.columns)
    assert not changed[:, [i for i, c in enumerate(cols) if c != "potassium"]].any()
    pot = changed[:, cols.index("potassium")]
    assert not pot[~later].any() and not pot[undated].any() and pot.sum() == e["cells"] == log["cells_total"]
    k0 = pd.to_numeric(given.potassium.str.replace(",", "."), errors="coerce")
    k1 = pd.to_numeric(fixed.potassium.str.replace(",", "."), errors="coerce")  # Cindervale keeps its 4,2
    early = ald & (t < e["period"]["from"]).to_numpy()
    # Before repair the later median sits a recording step (0.1 mmol/L) above the earlier one. Tolerance:
    # after repair the medians agree within half a recording step (both lie on the 0.1 grid, so they are
    # equal), and the trimmed means within half a step too (the step subtracted is rounded to the grid).
    assert k0[later].median() - k0[early].median() >= 0.1 - 1e-9
    assert abs(k1[later].median() - k1[early].median()) <= 0.05
    gap0 = stats.trim_mean(k0[later].dropna(), 0.2) - stats.trim_mean(k0[early].dropna(), 0.2)
    gap1 = stats.trim_mean(k1[later].dropna(), 0.2) - stats.trim_mean(k1[early].dropna(), 0.2)
    assert abs(gap1) <= 0.05 < gap0
    # the repaired values stay on the site's recording grid (one decimal): no new recording signature
    v = k1[later].dropna().to_numpy()
    assert np.allclose(v * 10, np.round(v * 10), atol=1e-9)
    # applied in memory to the scanned table (its parsed dates), the same values and the same log
    *_, res, _ = dated
    table = res.objects["table"]
    fixed_table, mem_log = apply_repairs(table, plan_from_dict(doc), safe_only=False)
    assert mem_log.rows_without_date == {e["id"]: 40} and mem_log.applied == (e["id"],)
    np.testing.assert_allclose(fixed_table.frame.potassium.to_numpy(float), k1.loc[table.frame.index].to_numpy(),
                               equal_nan=True)
    # with only the safe entries (the scan's in-memory repair) the period entry is not applied
    assert e["id"] not in apply_repairs(table, plan_from_dict(doc), safe_only=True)[1].applied


def test_checklist_line_of_the_change_links_to_its_period_entry(dated):
    import html5lib

    _, _, _, _, root, _, plan = dated
    (e,) = [e for e in plan["entries"] if e["operation"] == "remove_step"]
    page = (root / "out" / "report.html").read_text(encoding="utf-8")
    tree = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(page)
    ids = {el.get("id") for el in tree.iter() if el.get("id")}
    lines = [li for li in tree.findall(".//ol[@class='todo-list']/li") if "change over time" in "".join(li.itertext())]
    assert len(lines) == 1
    links = [a.get("href") for a in lines[0].findall("span[@class='plan']/a")]
    assert links == ["#plan-" + e["id"]] and links[0][1:] in ids
    row = tree.find(f".//tr[@id='plan-{e['id']}']")
    cells = ["".join(td.itertext()) for td in row.findall("td")]
    assert cells[1:3] == [e["site"], e["column"]] and f"from {e['period']['from']}" in cells[4]
    md = (root / "out" / "findings.md").read_text(encoding="utf-8")
    (ln,) = [ln for ln in md.splitlines() if "change over time" in ln and ln[:1].isdigit()]
    assert f"(repair plan {e['id']})" in ln and f"{e['column']} at {e['site']}" in ln


def test_a_null_table_with_dates_yields_no_period_entry(tmp_path_factory):
    *_, res, plan = _dated_scan(tmp_path_factory, null=True)
    assert res.to_dict()["drift"]["findings"] == []
    assert [e for e in plan["entries"] if e.get("period") or e["operation"] == "remove_step"] == []
    assert [f for f in plan["not_repaired"] if f["kind"].startswith("drift_")] == []


def test_older_plans_still_read_and_bad_periods_are_refused(dated):
    *_, plan = dated
    old = json.loads(json.dumps(plan))
    old["plan_version"] = "sitecheck.repair/1.0"
    old["entries"] = [e for e in old["entries"] if "period" not in e]
    assert len(plan_from_dict(old).entries) == len(plan["entries"]) - 1
    (e,) = [e for e in plan["entries"] if e["operation"] == "remove_step"]
    for change, msg in (({"period": None}, "remove_step needs a period"),
                        ({"period": dict(e["period"], **{"from": "2026-04-01", "until": "2026-01-01"})},
                         "is not after 'from'"),
                        ({"period": dict(e["period"], **{"from": "April"})}, r"period\.from: does not match"),
                        ({"params": dict(e["params"], subtract="0.15")}, "needs a number 'subtract'")):
        bad = json.loads(json.dumps(plan))
        bad["entries"][-1].update(change)
        with pytest.raises(InputError, match=msg):
            plan_from_dict(bad)


def test_period_entry_counts_are_suppressed_in_shared_outputs(dated):
    from sitecheck.render.safety import shareable_document

    *_, res, _ = dated
    shared = shareable_document(res.to_dict(), min_cell=50)
    (e,) = [e for e in shared["repair"]["entries"] if e.get("period")]
    # 40 rows without a date at the site: below 50, so withheld; the segments' row counts stay (above 50)
    assert e["evidence"]["site_rows_without_date"] == "<50"
    assert isinstance(e["evidence"]["before"]["n"], int) and e["evidence"]["before"]["n"] > 50
    log = shareable_document({"log": {"rows_without_date": {"r006": 7, "r007": 80}}}, min_cell=10)["log"]
    assert log["rows_without_date"] == {"r006": "<10", "r007": 80}
