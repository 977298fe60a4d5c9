"""`sitecheck harmonise` through the command line: every method, `--apply` on new rows, its flag conflicts,
a malformed parameters file, rows of an unknown site, values outside the fitted range."""
import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from sitecheck.cli import main

SITES = ("Ashgrove", "Hollowmere", "Pinecrest")  # invented hospitals


def _frame(seed=0, n_per=80):
    """Invented laboratory extract: sodium as integers, urea to one decimal, CRP with missing cells; each site
    has its own offset (and Pinecrest its own spread)."""
    rng = np.random.default_rng(seed)
    site = np.repeat(SITES, n_per)
    k = np.repeat(np.arange(3), n_per)
    sodium = np.round(rng.normal(139, 3, len(site)) + np.array([0, 4, -2])[k]).astype(int)
    urea = np.round(np.exp(rng.normal(np.log(6), 0.3, len(site))) * np.array([1.0, 1.0, 1.6])[k], 1)
    crp = np.round(np.exp(rng.normal(np.log(9), 0.9, len(site))), 1)
    crp[rng.random(len(site)) < 0.1] = np.nan
    ward = rng.choice(["acute", "surgical", "medical"], len(site))
    return pd.DataFrame({"hospital": site, "sodium": sodium, "urea": urea, "crp": crp, "ward": ward})


def _cli(args):
    return CliRunner().invoke(main, args, catch_exceptions=False)


def _one_line_error(res, text):
    assert res.exit_code == 2, res.output
    lines = [l for l in res.output.splitlines() if l.strip()]
    assert len(lines) == 1 and text in lines[0] and "Traceback" not in res.output, res.output


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    root = tmp_path_factory.mktemp("harm")
    data = root / "train.csv"
    _frame().to_csv(data, index=False)
    out = {}
    for method in ("centre", "scale", "quantile", "combat"):
        r = _cli(["harmonise", str(data), "--site", "hospital", "--method", method,
                  "--out", str(root / f"{method}.csv"), "-q"])
        assert r.exit_code == 0, r.output
        out[method] = (pd.read_csv(root / f"{method}.csv"), root / f"{method}.csv.params.json")
    return root, data, out


@pytest.mark.parametrize("method", ["centre", "scale", "quantile", "combat"])
def test_every_method_through_the_command(fitted, method):
    _, data, out = fitted
    raw = pd.read_csv(data)
    h, params = out[method]
    assert list(h.columns) == list(raw.columns) and len(h) == len(raw)
    assert h["hospital"].equals(raw["hospital"]) and h["ward"].equals(raw["ward"])  # copied
    assert h["crp"].isna().equals(raw["crp"].isna())                                 # missing stays missing
    doc = json.loads(params.read_text())
    assert doc["method"] == method and doc["site_column"] == "hospital" and doc["site_labels"] == list(SITES)
    means = h.groupby("hospital")["sodium"].mean()
    raw_means = raw.groupby("hospital")["sodium"].mean()
    # the 6 mmol/L spread of site means before, by construction of the invented table
    assert raw_means.max() - raw_means.min() > 4
    if method in ("centre", "scale"):
        # definition of the method: every site's mean moved to the same value (no protected columns), up to
        # the return to the recording grid (integers): the mean of 80 rounding errors of SD 0.41 (within-cell
        # draw and rounding, 1/sqrt(12) each) has SD 0.046, so 0.25 is more than five of them
        assert means.max() - means.min() < 0.25
        assert (h["sodium"] == np.round(h["sodium"])).all()
    else:
        assert means.max() - means.min() < 1.0
    if method == "scale":
        # equal on the scale the feature was fitted on (log(x + c) for a right-skewed feature), up to the
        # rounding to one decimal
        c = doc["log_offset"][doc["features"].index("urea")]
        u = h["urea"] if c is None else np.log(h["urea"] + c)
        sds = u.groupby(h["hospital"]).std(ddof=0)
        assert sds.max() / sds.min() < 1.1
    if method == "quantile":
        # the pooled quantile function at each site's own CDF: each site's median lands near the pooled one
        med = h.groupby("hospital")["urea"].median()
        assert (med - raw["urea"].median()).abs().max() < 0.3


@pytest.mark.parametrize("method", ["centre", "scale", "quantile", "combat"])
def test_apply_to_new_rows_reproduces_the_fit(fitted, tmp_path, method):
    _, data, out = fitted
    h, params = out[method]
    part = tmp_path / "part.csv"
    pd.read_csv(data).iloc[::7].to_csv(part, index=False)  # new rows from every site, in another order
    r = _cli(["harmonise", str(part), "--apply", str(params), "--out", str(tmp_path / "p.csv"), "-q"])
    assert r.exit_code == 0, r.output
    got = pd.read_csv(tmp_path / "p.csv")
    pd.testing.assert_frame_equal(got, h.iloc[::7].reset_index(drop=True), check_exact=False, rtol=1e-12)


@pytest.mark.parametrize("method", ["centre", "scale", "quantile", "combat"])
def test_values_outside_the_fitted_range(fitted, tmp_path, method):
    _, data, out = fitted
    h, params = out[method]
    raw = pd.read_csv(data)
    fitted_max = raw.loc[raw.hospital == "Hollowmere", "sodium"].max()
    new = pd.DataFrame({"hospital": ["Hollowmere"] * 3, "sodium": [fitted_max + 40, 140, 141],
                        "urea": [6.0, 6.0, 6.0], "crp": [9.0, 9.0, 9.0], "ward": ["acute"] * 3})
    p = tmp_path / "new.csv"
    new.to_csv(p, index=False)
    r = _cli(["harmonise", str(p), "--apply", str(params), "--out", str(tmp_path / "n.csv"), "-q"])
    assert r.exit_code == 0, r.output
    y = pd.read_csv(tmp_path / "n.csv")["sodium"].to_numpy()
    # Never beyond the range recorded in the fitted table: quantile mapping holds its end values (np.interp
    # does not extrapolate) at the pooled maximum; centre, scale and ComBat are affine per site, and the far
    # value, carried beyond that maximum, is set to it, which the command says.
    doc = json.loads(params.read_text())
    assert y[0] == raw["sodium"].max() == doc["upper"][doc["features"].index("sodium")]
    assert 130 <= y[1] <= y[2] <= 150
    if method != "quantile":
        assert "set to its nearest end: sodium 1 above" in r.output


def test_apply_flag_conflicts_and_bad_parameter_files(fitted, tmp_path):
    _, data, out = fitted
    params = str(out["scale"][1])
    o = str(tmp_path / "o.csv")
    _one_line_error(_cli(["harmonise", str(data), "--apply", params, "--method", "scale", "--out", o]),
                    "drop --method and --protect")
    _one_line_error(_cli(["harmonise", str(data), "--apply", params, "--protect", "sodium", "--out", o]),
                    "drop --method and --protect")
    _one_line_error(_cli(["harmonise", str(data), "--apply", params, "--params", str(tmp_path / "x.json"),
                          "--out", o]), "--params names the file to write when fitting")
    _one_line_error(_cli(["harmonise", str(data), "--apply", params, "--out", params]), "")
    bad = tmp_path / "bad.json"
    bad.write_text('{"method": "scale", "features": ["sodium"', encoding="utf-8")
    _one_line_error(_cli(["harmonise", str(data), "--apply", str(bad), "--out", o]), "not JSON")
    bad.write_text("[1, 2]", encoding="utf-8")
    _one_line_error(_cli(["harmonise", str(data), "--apply", str(bad), "--out", o]), "not a parameters file")
    doc = json.loads(out["scale"][1].read_text())
    del doc["sigma"]
    bad.write_text(json.dumps(doc), encoding="utf-8")
    _one_line_error(_cli(["harmonise", str(data), "--apply", str(bad), "--out", o]), "parameters file is malformed")
    _one_line_error(_cli(["harmonise", str(data), "--apply", str(tmp_path / "absent.json"), "--out", o]),
                    "cannot be read")
    # rows of a site the parameters never saw
    new = pd.read_csv(data).iloc[:20].copy()
    new.loc[new.index[5], "hospital"] = "Thornbury"  # invented, not fitted
    p = tmp_path / "unknown.csv"
    new.to_csv(p, index=False)
    _one_line_error(_cli(["harmonise", str(p), "--apply", params, "--out", o]),
                    "site 'Thornbury' is not one of the fitted sites")
    assert not (tmp_path / "o.csv").exists()


def test_load_keeps_the_keys_saved_beside_the_parameters(fitted, tmp_path):
    # the command writes the table's keys beside the fit; load gives them back in saved_with (not in to_dict),
    # and harmonise_table applies a loaded fit exactly as it applies the saved document
    from sitecheck.errors import ParameterError
    from sitecheck.harmonise.methods import HarmonisationFit
    from sitecheck.harmonise.table import harmonise_table
    from sitecheck.reading.intake import read_table

    _, data, out = fitted
    path = str(out["combat"][1])
    doc = json.loads(open(path, encoding="utf-8").read())
    fit = HarmonisationFit.load(path)
    assert fit.saved_with["site_column"] == "hospital" == doc["site_column"]
    assert set(fit.saved_with) == {"site_column", "input_sha256", "rows_fitted", "left_unchanged"}
    assert not set(fit.saved_with) & set(fit.to_dict())
    again = str(tmp_path / "again.json")
    fit.save(again)
    assert json.loads(open(again, encoding="utf-8").read()) == doc  # a loaded fit saves the same file
    raw = read_table(str(data))
    a = harmonise_table(raw, site=None, parameters=fit, despite_findings=True)
    b = harmonise_table(raw, site=None, parameters=doc, despite_findings=True)
    pd.testing.assert_frame_equal(a.frame, b.frame, check_exact=True)
    assert a.left_unchanged == b.left_unchanged == doc["left_unchanged"]
    with pytest.raises(ParameterError, match=r"extra must not use the parameters' own keys, got \['method'\]"):
        fit.save(again, method="centre")
