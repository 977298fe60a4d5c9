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
    frame = pd.DataFrame(d)
    frame["sodium"] = frame["sodium"].round(1).astype(object)
    frame.loc[[4, 50, 130], "sodium"] = "clotted"  # 3 cells that do not parse: a count below 10
    return frame


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
    from sitecheck.render.html import render_html
    from sitecheck.render.markdown import render_markdown

    _, _, out, _, _, _ = evil_run
    html = (out / "report.html").read_text()
    md = (out / "findings.md").read_text()
    small = re.compile(r"(?<![\w.])3 value\(s\)|\bn[= ]3\b")
    for text in (html, md):
        assert not small.search(text)
    assert "&lt;10 value(s) did not parse" in html
    # The same document rendered without suppression (min_cell=1) does show the count: the check
    # above can fail.
    doc = json.loads((out / "report.json").read_text())  # report.json is not shareable here: the full counts
    assert any("3 value(s) did not parse" in w for w in doc["warnings"])
    assert small.search(render_html(shareable_document(doc, min_cell=1), min_cell=1))
    assert not small.search(render_html(shareable_document(doc, min_cell=10), min_cell=10))
    assert not small.search(render_markdown(shareable_document(doc, min_cell=10), min_cell=10))


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


# Roles, the seed and two gates from a TOML file; fail_on given as one string (a list is also accepted).
DEMO_CONFIG = ('site = "hospital"\noutcome = "admitted_hdu"\ncovariates = ["age", "sex"]\n'
               'identifiers = ["attendance_id"]\n[options]\nseed = 5\nfail_on = "unit_ratio"\nfail_above = 0.5\n')


def _cli(args, hashseed):
    """The command line in its own interpreter, with its own PYTHONHASHSEED."""
    import subprocess
    import sys

    env = dict(os.environ, PYTHONHASHSEED=str(hashseed), MPLBACKEND="Agg")
    return subprocess.run([sys.executable, "-c", "from sitecheck.cli import main; main(prog_name=\"sitecheck\")", *args],
                          capture_output=True, text=True,
                          env=env, timeout=900)


def _load(out):
    with open(os.path.join(out, "report.json")) as fh:
        return json.load(fh)


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory, demo_small_path):
    """Two scans of the demo fixture from the command line, in separate interpreters with different
    PYTHONHASHSEED: (a) the config file's gates fail (exit 1); (b) flags override them and pass (exit 0)."""
    root = tmp_path_factory.mktemp("det")
    cfg = root / "demo.toml"
    cfg.write_text(DEMO_CONFIG, encoding="utf-8")
    ra = _cli(["scan", demo_small_path, "--config", str(cfg), "--out", str(root / "a")], hashseed=1)
    rb = _cli(["scan", demo_small_path, "--config", str(cfg), "--out", str(root / "b"), "-q",
               "--fail-above", "0.99", "--fail-on", "ceiling"], hashseed=2)
    assert "Traceback" not in ra.stderr + rb.stderr, (ra.stderr + rb.stderr)[-3000:]
    return {"a": _load(root / "a"), "b": _load(root / "b"), "ra": ra, "rb": rb, "config": str(cfg)}


def test_failed_gates_exit_1_name_the_gate_and_still_write_the_report(two_runs):
    ra, doc = two_runs["ra"], two_runs["a"]
    assert ra.returncode == 1, ra.stderr[-2000:]
    failed = [l for l in ra.stdout.splitlines() if l.startswith("FAILED")]
    lo = doc["probe"]["auc_ci"][0]
    assert failed == [f"FAILED gate --fail-above 0.5: site probe AUC lower 95% bound {lo:.3f} exceeds 0.5",
                      "FAILED gate --fail-on unit_ratio: 1 unit_ratio fingerprint(s): 'glucose' at site 'Cindervale'"]
    assert [(f["feature"], f["site"]) for f in doc["fingerprints"] if f["kind"] == "unit_ratio"] == \
        [("glucose", "Cindervale")]  # the demo's injected unit error (fixtures/demo_truth.json)
    assert "report: " in ra.stdout and doc["probe"]["verdict"]


def test_passing_gates_exit_0(two_runs):
    rb, doc = two_runs["rb"], two_runs["b"]
    assert rb.returncode == 0, rb.stderr[-2000:]
    assert "FAILED" not in rb.stdout
    # the gates pass for the reason they should: the bound is below 0.99 and no ceiling was found
    assert doc["probe"]["auc_ci"][0] <= 0.99
    assert not [f for f in doc["fingerprints"] if f["kind"] == "ceiling"]
    assert rb.stdout.splitlines()[0].startswith("sitecheck ") and "site probe: AUC" in rb.stdout


def test_same_data_and_seed_give_identical_json_across_processes(two_runs):
    # Different interpreters and hash seeds, different gates (which do not enter report.json).
    import copy

    a, b = copy.deepcopy(two_runs["a"]), copy.deepcopy(two_runs["b"])
    a["run"].pop("seconds"); b["run"].pop("seconds")
    assert a["run"]["seed"] == 5 and a["run"]["config"] == {"file": two_runs["config"]}
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def test_report_conforms_to_schema(two_runs):
    # Validated with the jsonschema library (draft 2020-12), not with our own validator.
    import jsonschema

    a = two_runs["a"]
    schema = report_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.validate(a, schema, cls=jsonschema.Draft202012Validator)
    bad = json.loads(json.dumps(a))
    bad["probe"]["auc_ci"] = [0.7]
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, schema, cls=jsonschema.Draft202012Validator)
    assert validate(a, schema) == []  # our own light validator agrees


def test_schema_command_output_validates_a_real_report(two_runs):
    import jsonschema

    r = CliRunner().invoke(main, ["schema"], catch_exceptions=False)
    assert r.exit_code == 0
    schema = json.loads(r.output)
    jsonschema.validate(two_runs["b"], schema, cls=jsonschema.Draft202012Validator)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate({**two_runs["b"], "fingerprints": [{"kind": "unit_ratio"}]}, schema,
                            cls=jsonschema.Draft202012Validator)


def test_schedule_does_not_change_results_and_config_is_read_alike(two_runs, demo_small_path, tmp_path):
    # The CLI run used two processes (n_jobs=2) and the config file; scan_file with the same file in one
    # process must give the same document: one loader for both paths (the file's seed, roles and
    # options reach the Python API too), and the schedule does not change the numbers.
    import copy

    from sitecheck.render import write_report
    from sitecheck.scan import ScanOptions, scan_file

    # the second process did run analyses (its progress line names them)
    side = [l for l in two_runs["ra"].stderr.splitlines() if l.endswith("(second process)")]
    assert side and any(name in side[0] for name in ("harmonisation", "maps", "maps_tsne", "fingerprints")), \
        two_runs["ra"].stderr[-2000:]
    assert "the second process stopped" not in two_runs["ra"].stderr
    res = scan_file(demo_small_path, config=two_runs["config"], options=ScanOptions(n_jobs=1))
    assert res.run["seed"] == 5 and res.run["config"] == {"file": two_runs["config"]}
    write_report(res, str(tmp_path))
    one = _load(tmp_path)
    a = copy.deepcopy(two_runs["a"])
    for d in (a, one):
        d["run"].pop("seconds"); d["run"]["options"].pop("n_jobs")
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
        "doc, said = {}, []\n"
        "for jobs in (2, 1):\n"
        "    r = scan_frame(frame, site='hospital', options=ScanOptions(n_jobs=jobs, analyses=('probe', 'leakage',\n"
        "                   'harmonise')), progress=said.append)\n"
        "    d = r.to_dict(); d['run'].pop('seconds'); d['run']['options'].pop('n_jobs')\n"
        "    doc[jobs] = json.dumps(d, sort_keys=True, default=str)\n"
        "print('FALLBACK' if any(m.startswith('the second process stopped; running harmonise here')\n"
        "                        for m in said) else 'NO FALLBACK')\n"
        "print('SAME' if doc[1] == doc[2] else 'DIFFERENT')\n", encoding="utf-8")
    res = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=300,
                         cwd=str(tmp_path))
    assert res.returncode == 0, res.stderr[-2000:]
    # the first scan (n_jobs=2) lost its second process and ran the queued analysis itself
    assert res.stdout.strip().splitlines()[-2:] == ["FALLBACK", "SAME"], res.stdout[-2000:]
