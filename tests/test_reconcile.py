"""Reconciling the fingerprints with the leak ranking, by ground-truth injection: a feature with a
missing-value code at one site that the probe does not need (another feature separates that site
outright) is explained, not left looking clean."""
import numpy as np
import pandas as pd
import pytest

from sitecheck.scan import ScanOptions, scan_frame


@pytest.fixture(scope="module")
def injected():
    rng = np.random.default_rng(3)
    n = 400
    site = np.repeat(["Hollin", "Marrow", "Tansy"], n)
    frame = pd.DataFrame({
        "ward": site,
        # Marrow is told apart outright by an analyser offset of 6 SD on sodium_x ...
        "sodium_x": rng.normal(140, 1.0, 3 * n) + (site == "Marrow") * 6.0,
        # ... and Tansy by a unit change on urea_x
        "urea_x": rng.normal(6, 1.0, 3 * n) * np.where(site == "Tansy", 6.0, 1.0),
        # lactate_x: identical at every site except a 999 code on 8% of Marrow's rows
        "lactate_x": rng.normal(1.5, 0.4, 3 * n),
        "noise_x": rng.normal(0, 1, 3 * n),
    })
    code = (site == "Marrow") & (rng.random(3 * n) < 0.08)
    frame.loc[code, "lactate_x"] = 999.0
    res = scan_frame(frame, site="ward", options=ScanOptions(analyses=("probe", "leakage", "fingerprints",
                                                                        "reconcile"), n_jobs=1))
    return res.to_dict()


def test_code_is_fingerprinted_but_near_zero_in_the_ranking(injected):
    fp = [(f["feature"], f["site"], f["kind"]) for f in injected["fingerprints"]]
    assert ("lactate_x", "Marrow", "missing_code") in fp
    lact = next(e for e in injected["leakage"] if e["feature"] == "lactate_x")
    assert lact["score_ci"][0] <= 0  # the probe does not need it: sodium_x already separates Marrow


def test_reconciliation_names_the_feature_that_carries_the_site(injected):
    entries = injected["reconciliation"]["entries"]
    e = next(r for r in entries if r["feature"] == "lactate_x" and r["site"] == "Marrow")
    assert e["kind"] == "missing_code"
    assert e["reason"] in ("same_site", "site_gap") and e["via"] == ["sodium_x"]
    sodium = next(x for x in injected["leakage"] if x["feature"] == "sodium_x")
    assert e["via_rank"] == sodium["rank"] and e["via_score"] == pytest.approx(sodium["score"])
    assert e["via_score_ci"][0] > 0
    # every entry is a fingerprint whose own drop interval includes 0 (the rule, checked from both views)
    low = {x["feature"] for x in injected["leakage"] if x["score_ci"][0] <= 0}
    assert all(r["feature"] in low for r in entries)
    assert not any(r["feature"] in ("sodium_x", "urea_x") for r in entries)


def test_report_shows_the_reason_next_to_the_ranking(injected, tmp_path):
    from sitecheck.render.html import render_html

    html = render_html(injected, min_cell=10)
    assert "Flagged by the fingerprints, near 0 here" in html
    assert "Marrow is already told apart by sodium_x" in html
