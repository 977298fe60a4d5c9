"""Report safety and reproducibility: escaping, formula neutralisation, small cells,
determinism, no writes outside --out, input untouched, schema conformance."""
import csv
import hashlib
import json
import os
import re

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from sitecheck.cli import main
from sitecheck.render.safety import csv_cell, shareable_document, suppress_count
from sitecheck.report.schema import report_schema, validate

EVIL_SITES = ["<script>alert(1)</script>", "../x", "=HYPERLINK(\"http://e\")", "O'Brien \"Ward\""]
EVIL_COLS = ["<img src=x onerror=alert(1)>", "=1+1", "+sum(A1)", "@cmd", "-2+3", "a/b\\c", "sodium"]


def _evil_frame(n_per=40, seed=0):
    rng = np.random.default_rng(seed)
    site = np.repeat(EVIL_SITES, n_per)
    n = len(site)
    d = {"hosp": site}
    for j, c in enumerate(EVIL_COLS):
        d[c] = rng.normal(0, 1, n) + (site == EVIL_SITES[j % 4]) * 0.8
    d["<b>level</b>"] = rng.choice(["<i>x</i>", "=cmd|' /C calc'!A0", "plain"], n)
    d["tiny_flag"] = np.where(np.arange(n) < 3, "yes", "no")  # 3 positives: below the small-cell threshold
    return pd.DataFrame(d)


@pytest.fixture(scope="module")
def evil_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("evil")
    data = root / "in.csv"
    _evil_frame().to_csv(data, index=False)
    out = root / "out"
    before = hashlib.sha256(data.read_bytes()).hexdigest()
    listing_before = sorted(os.listdir(root))
    r = CliRunner().invoke(main, ["scan", str(data), "--site", "hosp", "--out", str(out), "-q"], catch_exceptions=False)
    return root, data, out, before, listing_before, r


def test_scan_on_hostile_names_finishes(evil_run):
    _, _, out, _, _, r = evil_run
    assert r.exit_code == 0, r.output
    assert (out / "report.html").exists()


def test_html_has_no_live_markup_from_data(evil_run):
    _, _, out, _, _, _ = evil_run
    html = (out / "report.html").read_text()
    assert "<script>alert(1)</script>" not in html
    assert "<img src=x" not in html and "<b>level</b>" not in html and "<i>x</i>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    # the only <script> element is our own sorter, at the end
    assert len(re.findall(r"<script>", html)) == 1


def test_csv_cells_are_not_formulas(evil_run):
    _, _, out, _, _, _ = evil_run
    for name in os.listdir(out):
        if name.endswith(".csv"):
            with open(out / name, newline="") as fh:
                for row in csv.reader(fh):
                    for cell in row:
                        if cell[:1] in ("=", "+", "@") or (cell[:1] == "-" and not re.fullmatch(r"-[0-9.eE+-]+", cell)):
                            pytest.fail(f"{name}: formula-like cell {cell!r}")


def test_nothing_written_outside_out_and_input_unchanged(evil_run):
    root, data, out, before, listing_before, _ = evil_run
    assert hashlib.sha256(data.read_bytes()).hexdigest() == before
    assert sorted(os.listdir(root)) == sorted(listing_before + ["out"])
    for dirpath, _, files in os.walk(out):
        for f in files:
            assert not f.startswith(".tmp-"), "temporary file left behind"
            assert os.path.realpath(os.path.join(dirpath, f)).startswith(os.path.realpath(out))
    assert not (root / "x").exists()


def test_small_counts_never_in_shared_outputs(evil_run):
    _, _, out, _, _, _ = evil_run
    html = (out / "report.html").read_text()
    md = (out / "findings.md").read_text()
    # 'tiny_flag' has 3 'yes' rows: it must never show as a count
    for text in (html, md):
        assert not re.search(r"\bn[= ]3\b", text)


def test_shareable_document_suppresses_counts_and_small_sites():
    doc = {"input": {"sites": {"A": 120, "B": 7}, "rows": 127},
           "probe": {"per_site": {"A": {"auc": 0.7, "n": 120}, "B": {"auc": 0.9, "n": 7}}, "n_used": 127},
           "columns": [{"name": "x", "n_missing": 4, "missing_codes": {"NA": 4, ".": 30}}],
           "hygiene": [{"column": "w", "kind": "exclusive_level", "count": 6}]}
    s = shareable_document(doc, min_cell=10, small_sites=frozenset({"B"}))
    assert s["input"]["sites"] == {"A": 120, "B": "withheld"}
    assert s["probe"]["per_site"]["B"] == "withheld" and s["probe"]["per_site"]["A"]["n"] == 120
    assert s["columns"][0]["n_missing"] == "<10" and s["columns"][0]["missing_codes"] == {"NA": "<10", ".": 30}
    assert s["hygiene"][0]["count"] == "<10"
    assert s["shareable"] == {"min_cell": 10, "withheld_sites": ["B"]}
    assert doc["input"]["sites"]["B"] == 7  # the original is untouched
    assert suppress_count(0, 10) == 0 and suppress_count(10, 10) == 10


def test_csv_cell_neutralises_formulas():
    # OWASP guidance on CSV injection (common practice): cells starting with = + - @ are prefixed.
    assert csv_cell("=1+1") == "'=1+1" and csv_cell("@x") == "'@x" and csv_cell("+a") == "'+a"
    assert csv_cell("-2") == "-2" and csv_cell("-cmd") == "'-cmd" and csv_cell(3) == 3


def _scan_json(path, out):
    r = CliRunner().invoke(main, ["scan", path, "--site", "hospital", "--outcome", "admitted_hdu",
                                  "--covariate", "age", "--covariate", "sex", "--id", "attendance_id",
                                  "--out", out, "-q", "--seed", "5"], catch_exceptions=False)
    assert r.exit_code == 0, r.output
    with open(os.path.join(out, "report.json")) as fh:
        return json.load(fh)


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory, demo_small_path):
    root = tmp_path_factory.mktemp("det")
    a = _scan_json(demo_small_path, str(root / "a"))
    b = _scan_json(demo_small_path, str(root / "b"))
    return a, b


def test_same_data_and_seed_give_identical_json(two_runs):
    import copy

    a, b = copy.deepcopy(two_runs)
    a["run"].pop("seconds"); b["run"].pop("seconds")
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def test_report_conforms_to_schema(two_runs):
    a, _ = two_runs
    errors = validate(a, report_schema())
    assert errors == [], errors[:5]
    assert validate({"schema": "x"}, report_schema())  # and the validator can fail


def test_schedule_does_not_change_results(two_runs, demo_small_path, tmp_path):
    # The CLI runs used two processes (n_jobs=2); one process must give the same document.
    import copy

    from sitecheck.scan import ScanOptions, scan_file

    res = scan_file(demo_small_path, site="hospital", outcome="admitted_hdu", covariates=["age", "sex"],
                    identifiers=["attendance_id"], options=ScanOptions(seed=5, n_jobs=1))
    from sitecheck.render import write_report

    write_report(res, str(tmp_path))
    with open(tmp_path / "report.json") as fh:
        one = json.load(fh)
    a = copy.deepcopy(two_runs[0])
    for d in (a, one):
        d["run"].pop("seconds"); d["run"]["options"].pop("n_jobs")
        d["input"].pop("path")
    assert json.dumps(a, sort_keys=True) == json.dumps(one, sort_keys=True)


def test_script_without_main_guard_still_finishes(tmp_path):
    # A script that scans at import time is run again by the spawned second process, which then
    # cannot start its own; the scan must run the queued analyses itself and give the same numbers.
    import subprocess
    import sys

    script = tmp_path / "unguarded.py"
    script.write_text(
        "import json, numpy as np, pandas as pd\n"
        "from sitecheck.scan import ScanOptions, scan_frame\n"
        "rng = np.random.default_rng(0)\n"
        "site = rng.integers(0, 2, 300)\n"
        "frame = pd.DataFrame({'hospital': np.where(site == 1, 'Hilltop', 'Riverside'),\n"
        "                      'sodium': rng.normal(140, 3, 300) + 2 * site, 'urea': rng.normal(5, 1, 300)})\n"
        "doc = {}\n"
        "for jobs in (2, 1):\n"
        "    r = scan_frame(frame, site='hospital', options=ScanOptions(n_jobs=jobs, analyses=('probe', 'leakage',\n"
        "                   'fingerprints')))\n"
        "    d = r.to_dict(); d['run'].pop('seconds'); d['run']['options'].pop('n_jobs')\n"
        "    doc[jobs] = json.dumps(d, sort_keys=True, default=str)\n"
        "print('SAME' if doc[1] == doc[2] else 'DIFFERENT')\n", encoding="utf-8")
    res = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=300,
                         cwd=str(tmp_path))
    assert res.returncode == 0, res.stderr[-2000:]
    assert res.stdout.strip().splitlines()[-1] == "SAME"
