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
