import json
import os

import pytest
from click.testing import CliRunner

from sitecheck.cli import main


def run(args):
    r = CliRunner()
    return r.invoke(main, args, catch_exceptions=False)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    res = run(["demo", "--out", str(out), "--rows", "1200", "--quiet"])
    return out, res


def test_demo_command_writes_report(demo_run):
    out, res = demo_run
    assert res.exit_code == 0, res.output
    doc = json.loads((out / "report" / "report.json").read_text())
    assert doc["schema"].startswith("sitecheck.report/")
    assert doc["input"]["rows"] == 1200 and set(doc["input"]["sites"]) == {"Aldermoor", "Brackenholt", "Cindervale", "Duskwater"}
    assert len(doc["input"]["sha256"]) == 64
    roles = {c["name"]: c["role"] for c in doc["columns"]}
    assert roles["attendance_id"] == "identifier" and roles["hospital"] == "site" and roles["age"] == "covariate"
    assert {"seed", "versions", "seconds"} <= set(doc["run"])
    # the demo passes its arrival date as the time role: the drift section is there
    assert roles["arrival_date"] == "time" and doc["input"]["time_column"] == "arrival_date"
    assert doc["drift"]["time_column"] == "arrival_date" and len(doc["drift"]["sites"]) == 4
    for name in ("report.html", "findings.md"):
        assert (out / "report" / name).stat().st_size > 500


def test_scan_errors_exit_2_one_line(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text("hospital,x\nA,1\nB,2\n")
    r = CliRunner().invoke(main, ["scan", str(p), "--site", "hosp", "--out", str(tmp_path / "o"), "-q"])
    assert r.exit_code == 2
    assert "site column 'hosp' not found" in r.output and "Traceback" not in r.output
    assert len([l for l in r.output.splitlines() if l.strip()]) == 1
    r = CliRunner().invoke(main, ["scan", str(tmp_path / "missing.csv"), "--site", "x"])
    assert r.exit_code == 2 and "no such file" in r.output
    r = CliRunner().invoke(main, ["scan", str(p)])
    assert r.exit_code == 2 and "no site column given" in r.output
    assert not (tmp_path / "o").exists()


def test_version_and_help_show_example():
    r = run(["--version"])
    assert r.exit_code == 0 and "sitecheck" in r.output
    for args in (["--help"], ["scan", "--help"], ["demo", "--help"]):
        r = run(args)
        assert r.exit_code == 0 and "Example" in r.output


def test_demo_report_has_the_repair_loop(demo_run):
    # issue 17: every scan writes the repair plan; the report shows the residual probe and the plan
    from sitecheck.table.repair import plan_schema
    from sitecheck.report.schema import report_schema, validate

    out, res = demo_run
    rep = out / "report"
    doc = json.loads((rep / "report.json").read_text())
    assert validate(doc, report_schema()) == []
    plan = json.loads((rep / "repair_plan.json").read_text())
    assert validate(plan, plan_schema()) == [] and plan["plan_version"].startswith("sitecheck.repair/")
    assert {(e["column"], e["site"], e["operation"]) for e in plan["entries"]} >= {
        ("glucose", "Cindervale", "convert_unit"), ("lactate", "Brackenholt", "recode_missing"),
        ("troponin", "Aldermoor", "censored_policy"), ("potassium", "Cindervale", "number_format")}
    r = doc["residual"]
    assert r["auc_repaired"] < r["auc_given"] and r["difference_ci"][0] > 0
    assert r["statement"] in res.output
    for key in ("embedding", "outcome"):
        assert doc[key]["values"] == "after repair"
    assert {m["values"] for m in doc["harmonisation"].values()} == {"after repair"}
    assert doc["repair"]["values_for_maps_harmonisation_outcome"] == "after repair"
    html = (rep / "report.html").read_text()
    assert "What mechanical repairs would remove" in html and "repair_plan.json" in html
    assert "measurement artefacts explain" in (rep / "findings.md").read_text()
    # idioms per column and site in report.json
    cols = {c["name"]: c for c in doc["columns"]}
    assert cols["troponin"]["idioms"]["Aldermoor"]["censored_below"] > 0
    assert list(cols["potassium"]["idioms"]) == ["Cindervale"]


def test_as_given_keeps_values_and_says_so(tmp_path, demo_small_path):
    out = tmp_path / "o"
    r = CliRunner().invoke(main, ["scan", demo_small_path, "--site", "hospital", "--id", "attendance_id",
                                  "--exclude", "admitted_hdu", "--as-given", "--map-rows", "300", "--folds", "3", "--out", str(out),
                                  "-q", "--fail-on", "censored_below"], catch_exceptions=False)
    assert r.exit_code == 1 and "FAILED gate --fail-on censored_below: 1 censored_below fingerprint(s): 'troponin' at site 'Aldermoor'" in r.output
    doc = json.loads((out / "report.json").read_text())
    assert doc["embedding"]["values"] == "as given" and doc["repair"]["values_for_maps_harmonisation_outcome"] == "as given"
    assert doc["residual"]["auc_repaired"] is not None      # the residual probe still reads the repaired values
