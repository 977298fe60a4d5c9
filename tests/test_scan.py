"""Analyses fail alone: one analysis that raises is recorded in report.json, the others' sections
and the report are kept, and the command exits 3 with one line (issue 16).

The failures are forced by replacing one registry entry (or, for the second process, the analysis
function inside that process) with one that raises; the data is the invented demo network."""
import dataclasses
import json
import os
import subprocess
import sys

import pytest

from sitecheck.analyses import registry as analyses
from sitecheck.demo import DEMO_ROLES, generate_demo
from sitecheck.scan import ScanOptions, scan_frame

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


class Boom(RuntimeError):
    pass


def _raising(name, message="forced failure for the test\nsecond line never shown"):
    def run(prep, options, objects):
        raise Boom(message)

    return run


def _patch(monkeypatch, name, run):
    reg = [dataclasses.replace(a, run=run) if a.name == name else a for a in analyses.REGISTRY]
    monkeypatch.setattr(analyses, "REGISTRY", reg)


@pytest.fixture(scope="module")
def small_frame():
    return generate_demo(400, seed=11).frame


def _scan(frame, **opts):
    return scan_frame(frame, site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"],
                      covariates=DEMO_ROLES["covariates"], identifiers=DEMO_ROLES["identifiers"],
                      options=ScanOptions(**opts))


LIGHT = ("probe", "leakage", "fingerprints", "outcome")


def test_failed_analysis_is_recorded_and_the_others_kept(monkeypatch, small_frame):
    monkeypatch.delenv("SITECHECK_DEBUG", raising=False)
    # the fingerprints run first (the repair plan is built from them), outside the registry loop
    monkeypatch.setattr("sitecheck.analyses.fingerprints.find_fingerprints",
                        lambda *a, **k: _raising("fingerprints")(None, None, None))
    result = _scan(small_frame, n_jobs=1, analyses=LIGHT)
    doc = result.to_dict()
    assert doc["failed_analyses"] == [{"analysis": "fingerprints", "sections": ["fingerprints", "fingerprint_tests", "fingerprint_skipped", "unit_columns"],
                                       "status": "failed", "error": "Boom",
                                       "message": "forced failure for the test", "process": "main"}]
    assert "fingerprints" not in doc and "fingerprint_tests" not in doc
    # the analyses that do not need it ran in full
    assert 0.5 < doc["probe"]["auc"] <= 1.0
    assert len(doc["leakage"]) == result.objects["prepared"].features.n_features
    assert doc["outcome"]["pooled_auc"] is not None
    assert result.failed == ("fingerprints",)
    assert "fingerprints" in doc["run"]["seconds"]


def test_dependent_analysis_is_marked_not_run_and_fallback_runs(monkeypatch, small_frame):
    monkeypatch.delenv("SITECHECK_DEBUG", raising=False)
    _patch(monkeypatch, "probe", _raising("probe", "probe fault"))
    doc = _scan(small_frame, n_jobs=1, analyses=LIGHT).to_dict()
    by = {f["analysis"]: f for f in doc["failed_analyses"]}
    assert by["probe"]["status"] == "failed" and by["probe"]["error"] == "Boom"
    # the leak ranking reuses the probe's fold models: not run, and says why
    assert by["leakage"] == {"analysis": "leakage", "sections": ["leakage", "clusters", "missingness", "leakage_method"],
                             "status": "not_run", "error": None,
                             "message": "not run: it needs the probe analysis, which failed", "process": "main"}
    assert set(by) == {"probe", "leakage"}
    assert "probe" not in doc and "leakage" not in doc
    # fingerprints need nothing; the outcome analysis falls back to its own site association
    assert isinstance(doc["fingerprints"], list) and "unit_ratio" in doc["fingerprint_tests"]
    assert doc["outcome"]["leak_source"] == "site_association"


def test_section_that_cannot_be_serialised_fails_alone(monkeypatch, small_frame):
    monkeypatch.delenv("SITECHECK_DEBUG", raising=False)
    reg = [dataclasses.replace(a, sections=lambda result: {"fingerprints": object()}) if a.name == "fingerprints"
           else a for a in analyses.REGISTRY]
    monkeypatch.setattr(analyses, "REGISTRY", reg)
    from sitecheck.report.result import to_jsonable

    doc = _scan(small_frame, n_jobs=1, analyses=("probe", "fingerprints")).to_dict()
    json.dumps(doc, allow_nan=False)  # the report is still writable
    assert [f["analysis"] for f in doc["failed_analyses"]] == ["fingerprints"]
    assert "probe" in doc and "fingerprints" not in doc
    assert to_jsonable(doc) == doc


def test_debug_setting_raises(monkeypatch, small_frame):
    monkeypatch.setenv("SITECHECK_DEBUG", "1")
    _patch(monkeypatch, "leakage", _raising("leakage"))
    with pytest.raises(Boom):
        _scan(small_frame, n_jobs=1, analyses=("probe", "leakage"))


def test_failure_in_second_process_is_recorded(monkeypatch, small_frame, tmp_path):
    """The spawned process imports sitecheck afresh: a sitecustomize module on its path makes
    ``harmonisation_check`` raise there, and only there (the parent has already imported it)."""
    monkeypatch.delenv("SITECHECK_DEBUG", raising=False)
    (tmp_path / "sitecustomize.py").write_text(
        "import sitecheck.harmonise.methods as _h\n"
        "def _boom(*a, **k):\n"
        "    raise ArithmeticError('fault inside the second process')\n"
        "_h.harmonisation_check = _boom\n", encoding="utf-8")
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(tmp_path), ROOT, os.environ.get("PYTHONPATH", "")]))
    # probe and leak ranking in this process, the harmonisation check queued for the second (the only side task)
    result = _scan(small_frame, n_jobs=2, analyses=("probe", "leakage", "harmonise"), n_boot=50,
                   n_permutations=19, harmonise_methods=("centre",))
    doc = result.to_dict()
    assert doc["failed_analyses"] == [{"analysis": "harmonise", "sections": ["harmonisation"],
                                       "status": "failed", "error": "ArithmeticError",
                                       "message": "fault inside the second process", "process": "second"}]
    assert doc["probe"]["auc"] > 0.5 and doc["leakage"]


def test_cli_writes_report_and_exits_3_with_one_line(tmp_path):
    """The command: report written (with the failure in JSON, HTML and Markdown), one line on
    stderr naming the failed analysis, exit code 3. The probe is made to raise in a child
    interpreter through a wrapper script, as a user would see it."""
    data = tmp_path / "net.csv"
    generate_demo(300, seed=5).frame.to_csv(data, index=False)
    out = tmp_path / "out"
    script = tmp_path / "run.py"
    script.write_text(
        "import dataclasses, sys\n"
        "from sitecheck import scan\n"
        "from sitecheck.analyses import registry as analyses\n"
        "def boom(prep, options, objects):\n"
        "    raise KeyError('probe <b>fault</b>')\n"
        "analyses.REGISTRY = [dataclasses.replace(a, run=boom) if a.name == 'probe' else a\n"
        "                     for a in analyses.REGISTRY if a.name in ('probe', 'leakage', 'fingerprints')]\n"
        "scan.PARALLEL_MAX_ROWS = 0  # one process, so the patched registry is the one used\n"
        "from sitecheck.cli import main\n"
        "sys.argv = ['sitecheck'] + sys.argv[1:]\n"
        "main()\n", encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": ROOT, "MPLBACKEND": "Agg"}
    env.pop("SITECHECK_DEBUG", None)
    proc = subprocess.run([sys.executable, str(script), "scan", str(data), "--site", "hospital", "--id",
                           "attendance_id", "--out", str(out), "--quiet"], capture_output=True, text=True, env=env,
                          timeout=600)
    assert proc.returncode == 3, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert lines[0].startswith("sitecheck: analysis failed: probe (KeyError: ") and "also missing: leakage" in lines[0]
    doc = json.loads((out / "report.json").read_text(encoding="utf-8"))
    assert [(f["analysis"], f["status"]) for f in doc["failed_analyses"]] == [("probe", "failed"),
                                                                              ("leakage", "not_run")]
    assert "probe" not in doc and isinstance(doc["fingerprints"], list)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "The probe analysis failed with KeyError" in html and "<b>fault</b>" not in html
    assert "&lt;b&gt;fault&lt;/b&gt;" in html
    md = (out / "findings.md").read_text(encoding="utf-8")
    assert "## Analyses that failed" in md and "The leakage analysis did not run" in md


def test_scan_options_are_checked_as_the_config_file_checks_them():
    # one check for the config file, the command line and the Python API: an InputError naming the
    # option and the value, whose `option` lets the command line name the flag
    from sitecheck.errors import InputError

    for kw, text in ((dict(map_rows=20), "map_rows must be at least 100, got 20"),
                     (dict(folds=1), "folds must be between 2 and 20, got 1"),
                     (dict(threshold=1.5), "threshold must lie in (0, 1), got 1.5"),
                     (dict(max_rows=50.5), "max_rows must be a whole number, got 50.5"),
                     (dict(censor_policy="halve"), "censor_policy must be one of"),
                     (dict(n_boot=10), "n_boot must be an integer of at least 50 (or None), got 10")):
        with pytest.raises(InputError) as info:
            ScanOptions(**kw)
        assert str(info.value).startswith(text) and info.value.option == next(iter(kw)), str(info.value)
    ok = ScanOptions(map_rows=100, folds=20, threshold=0.5, censor_policy=None)
    assert (ok.map_rows, ok.folds, ok.threshold) == (100, 20, 0.5)


def test_scan_result_survives_pickling(small_frame):
    # A result is pickled by users' caches (joblib, multiprocessing); its labelled sections
    # ("after repair" / "as given") used to raise KeyError while being unpickled.
    import pickle

    result = _scan(small_frame, n_jobs=1, analyses=LIGHT)
    labelled = [k for k, v in result.sections.items() if type(v).__name__ == "Labelled"]
    assert labelled, "the scan should label at least one section with the values it read"
    back = pickle.loads(pickle.dumps(result))
    assert json.dumps(back.to_dict(), sort_keys=True) == json.dumps(result.to_dict(), sort_keys=True)
    name = labelled[0]
    assert back.sections[name].to_dict() == result.sections[name].to_dict()
