"""Gates (sitecheck/gates.py), the configuration loader shared by the CLI and the Python API, the
summary, and the error classes. The end-to-end gate runs (exit codes 0 and 1 on the demo) are in
tests/test_report.py, where they share the scans of the determinism check."""
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from sitecheck.cli import main
from sitecheck.reading.config import load_config, resolve_config
from sitecheck.errors import InputError, ParameterError
from sitecheck.report.gates import FINGERPRINT_KINDS, GateFailure, Gates, check_gates
from sitecheck.table.roles import RoleSpec
from sitecheck.scan import ScanOptions

from .conftest import write

DOC = {"probe": {"auc_ci": [0.74, 0.80]},
       "fingerprints": [{"kind": "unit_ratio", "feature": "glucose", "site": "Cindervale"},
                        {"kind": "missing_code", "feature": "lactate", "site": "Brackenholt"},
                        {"kind": "missing_code", "feature": "urea", "site": "Brackenholt"}]}


def test_fail_above_compares_the_lower_bound_strictly():
    assert check_gates(DOC, Gates(fail_above=0.75)) == ()       # 0.74 does not exceed 0.75
    assert check_gates(DOC, Gates(fail_above=0.74)) == ()       # equal is not above
    (f,) = check_gates(DOC, Gates(fail_above=0.7))
    assert f == GateFailure("fail_above", 0.7, "site probe AUC lower 95% bound 0.740 exceeds 0.7", 1)


def test_fail_on_counts_and_names_each_kind_in_order():
    got = check_gates(DOC, Gates(fail_on=("missing_code", "ceiling", "unit_ratio")))
    assert [(f.gate, f.setting, f.count) for f in got] == [("fail_on", "missing_code", 2), ("fail_on", "unit_ratio", 1)]
    assert got[0].message == "2 missing_code fingerprint(s): 'lactate' at site 'Brackenholt', 'urea' at site 'Brackenholt'"
    # absent sections pass
    assert check_gates({}, Gates(fail_above=0.5, fail_on=("shift",))) == ()


def test_gate_values_are_checked():
    assert Gates(fail_on="unit_ratio").fail_on == ("unit_ratio",)  # one string is one kind, not its letters
    assert Gates(fail_above=1).fail_above == 1.0
    for bad, exc in (("0.7", TypeError), (True, TypeError), (0.4, ValueError), (1.01, ValueError),
                     (float("nan"), ValueError)):
        with pytest.raises(exc):
            Gates(fail_above=bad)
    with pytest.raises(ValueError, match="unknown fingerprint kind 'unit'"):
        Gates(fail_on=["unit"])
    with pytest.raises(TypeError):
        Gates(fail_on=3)
    with pytest.raises(TypeError):
        check_gates(DOC, {"fail_above": 0.7})
    assert set(FINGERPRINT_KINDS) == {"unit_ratio", "precision", "heaping", "floor", "ceiling", "missing_code",
                                      "site_missing", "exclusive_level", "shift", "scale",
                                      # issue 17: lab-export idioms and unit columns
                                      "censored_below", "censored_above", "number_format", "unit_label"}


@pytest.mark.parametrize("options, expected", [
    ('fail_on = "unit_ratio"', {"fail_on": ("unit_ratio",)}),
    ('fail_on = ["unit_ratio", "floor"]', {"fail_on": ("unit_ratio", "floor")}),
    ("fail_above = 0.8", {"fail_above": 0.8}),
    ("fail_above = 1", {"fail_above": 1.0}),
])
def test_config_gates_accepted_forms(tmp_path, options, expected):
    cfg = write(tmp_path, "c.toml", f'site = "hospital"\n[options]\n{options}\n')
    assert load_config(cfg).options == expected
    run = resolve_config(cfg)
    assert (run.gates.fail_above, run.gates.fail_on) == (expected.get("fail_above"), expected.get("fail_on", ()))


@pytest.mark.parametrize("options, message", [
    ('fail_above = "0.7"', "fail_above must be a number"),
    ("fail_above = 1.5", "fail_above must lie between 0.5 and 1.0"),
    ("fail_above = 0.2", "fail_above must lie between 0.5 and 1.0"),
    ('fail_on = "unit"', "unknown fingerprint kind 'unit'"),
    ('fail_on = ["unit_ratio", "bogus"]', "unknown fingerprint kind 'bogus'"),
    ("fail_on = 3", "fail_on must be a fingerprint kind"),
    ("folds = 1", "folds must be between 2 and 20"),
    ('seed = "0"', "seed must be a whole number"),
    ('min_cell = 2.5', "min_cell must be a whole number"),
    ('include_datetime = "yes"', "include_datetime must be true or false"),
    ('encoding = "klingon-8"', "'klingon-8' is not a known text encoding"),
])
def test_bad_config_options_exit_2_before_reading_the_data(tmp_path, options, message):
    cfg = write(tmp_path, "c.toml", f'site = "hospital"\n[options]\n{options}\n')
    with pytest.raises(InputError, match=message):
        load_config(cfg)
    # the data file does not exist: the error is about the config, so the data was never read
    r = CliRunner().invoke(main, ["scan", str(tmp_path / "absent.csv"), "--config", cfg, "-q",
                                  "--out", str(tmp_path / "o")])
    assert r.exit_code == 2, r.output
    lines = [l for l in r.output.splitlines() if l.strip()]
    assert len(lines) == 1 and cfg in lines[0] and message in lines[0] and "Traceback" not in r.output
    assert not (tmp_path / "o").exists()


def test_unknown_fail_on_flag_exits_2_before_reading_the_data(tmp_path):
    r = CliRunner().invoke(main, ["scan", str(tmp_path / "absent.csv"), "--site", "h", "--fail-on", "unit"])
    assert r.exit_code == 2 and "unit" in r.output and "no such file" not in r.output
    r = CliRunner().invoke(main, ["scan", str(tmp_path / "absent.csv"), "--site", "h", "--fail-above", "1.2"])
    assert r.exit_code == 2 and "1.2" in r.output


def test_flags_override_the_file_and_the_file_overrides_defaults(tmp_path):
    cfg = write(tmp_path, "c.toml", 'site = "hospital"\ncovariates = ["age"]\n[options]\nseed = 5\nfolds = 3\n'
                                    'min_site_rows = 500\nfail_on = "floor"\nencoding = "latin-1"\n')
    run = resolve_config(cfg)
    assert (run.options.seed, run.options.folds, run.options.min_site_rows, run.options.min_cell) == (5, 3, 500, 10)
    assert run.encoding == "latin-1" and run.gates.fail_on == ("floor",) and run.record() == {"file": cfg}
    run = resolve_config(cfg, roles=RoleSpec(site="ward"), options={"seed": 9, "folds": None},
                         fail_on=("shift",), encoding="utf-8")
    assert (run.roles.site, run.roles.covariates, run.options.seed, run.options.folds) == ("ward", ("age",), 9, 3)
    assert run.gates.fail_on == ("shift",) and run.encoding == "utf-8"
    # a ScanOptions overrides the fields it sets to other than their default
    run = resolve_config(cfg, options=ScanOptions(n_jobs=1, max_rows=5000))
    assert (run.options.seed, run.options.n_jobs, run.options.max_rows) == (5, 1, 5000)
    with pytest.raises(ValueError, match="unknown scan option 'sed'"):
        resolve_config(cfg, options={"sed": 1})
    with pytest.raises(TypeError):
        resolve_config(cfg, options=[("seed", 1)])


def test_scan_file_applies_the_config_options(tmp_path):
    # Issue 13's bug: scan_file(config=...) ignored [options]; min_site_rows = 500 must leave too few sites.
    from sitecheck.scan import scan_file

    rng = np.random.default_rng(0)
    f = pd.DataFrame({"hospital": np.repeat(["Hilltop", "Riverside"], 100), "sodium": rng.normal(140, 3, 200).round()})
    data = str(tmp_path / "d.csv")
    f.to_csv(data, index=False)
    cfg = write(tmp_path, "c.toml", 'site = "hospital"\n[options]\nmin_site_rows = 500\n')
    with pytest.raises(InputError, match="only 0 site"):
        scan_file(data, config=cfg)
    r = CliRunner().invoke(main, ["scan", data, "--config", cfg, "-q", "--out", str(tmp_path / "o")])
    assert r.exit_code == 2 and "only 0 site" in r.output


def test_parameter_errors_are_not_input_errors(tmp_path, monkeypatch):
    # A wrong argument to a library function is a programming error (exit 3 from the CLI), not the user's.
    from sitecheck import scan as scan_mod
    from sitecheck.analyses.stats import bootstrap_auc_ci

    assert issubclass(ParameterError, ValueError) and not issubclass(ParameterError, InputError)
    y = np.array([0, 1, 0, 1, 2, 2])
    with pytest.raises(ParameterError, match="n_boot") as info:
        bootstrap_auc_ci(y, np.full((6, 3), 1 / 3), n_boot=3, random_state=0)
    assert not isinstance(info.value, InputError)

    def broken(*a, **k):
        raise ParameterError("n_boot must be an integer of at least 10, got 3")

    monkeypatch.setattr(scan_mod, "scan_configured", broken)
    data = write(tmp_path, "d.csv", "hospital,x\nA,1\nB,2\n")
    r = CliRunner().invoke(main, ["scan", data, "--site", "hospital", "-q", "--out", str(tmp_path / "o")])
    assert r.exit_code == 3 and "internal error: ParameterError" in r.output


def test_no_library_message_suggests_a_flag_that_does_not_exist():
    import pathlib

    import sitecheck

    root = pathlib.Path(sitecheck.__file__).parent
    for path in root.rglob("*.py"):
        assert "--verbose" not in path.read_text(encoding="utf-8"), path


def test_stdout_html_and_markdown_share_one_floor_rule():
    # one rule decides "at the floor" for the summary on stdout and for the HTML and findings.md
    from sitecheck.analyses.stats import at_permutation_floor, permutation_pvalue_floor
    from sitecheck.render.fmt import p_is, pval
    from sitecheck.report.result import p_text

    floor = permutation_pvalue_floor(999)
    assert floor == pytest.approx(math.e / 1000, rel=1e-12)  # Vovk & Wang (2020) merge of 1/(B+1) per fold
    for v, at in ((floor, True), (floor * (1 + 1e-12), True), (floor * 1.001, False), (0.2, False),
                  (floor / 2, True)):
        assert at_permutation_floor(v, floor) is at
        assert pval(v, floor).startswith("≤") is at and p_is(v, floor).startswith("p ≤") is at
        assert p_text(v, floor, 999).startswith("p ≤") is at
    assert p_text(floor * 1.001, floor, 999) == f"p = {floor * 1.001:.3g}"
    assert p_text(0.01, None) == "p = 0.01" and p_text(None, floor) == "p not computed"


def test_summary_lines(demo_table):
    from sitecheck.scan import scan_table

    res = scan_table(demo_table, ScanOptions(analyses=("probe",), n_jobs=1, folds=3))
    lines = res.summary().splitlines()
    p = res.to_dict()["probe"]
    assert lines[0].endswith(f"{res.input['rows_used']} rows, 4 sites") and res.input["rows_used"] == 1200
    # The demo's site signal is strong: the probe's p-value sits at the floor of its test, e/(B+1) for B label
    # permutations per fold merged by e x geometric mean (Phipson & Smyth 2010; Vovk & Wang 2020). The summary
    # says it is a bound, as the HTML does, never "p = 0.00272".
    assert p["p_value"] == pytest.approx(p["p_value_floor"]) == pytest.approx(math.e / (p["n_permutations"] + 1))
    assert lines[1] == (f"site probe: AUC {p['auc']:.3f} (95% CI {p['auc_ci'][0]:.3f} to {p['auc_ci'][1]:.3f}), "
                        f"p ≤ {p['p_value_floor']:.3g} (permutation floor: {p['n_permutations']} label permutations "
                        f"per fold), n = {p['n_used']}, verdict: {p['verdict']}")
    assert "p = " not in lines[1]
    # off the floor the value is printed as computed
    off = replace(res, sections={**res.sections, "probe": {**p, "p_value": 0.0132}})
    assert "p = 0.0132, n = " in off.summary().splitlines()[1]
    assert lines[2:] == [f"warning: {w}" for w in res.warnings[:5]]
    assert res.summary(max_warnings=0).count("warning:") == 0
    with pytest.raises(ValueError):
        res.summary(max_warnings=-1)
