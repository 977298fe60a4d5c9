"""The same data as CSV and as Parquet give the same numbers; the order of the rows does not change the verdict."""
import json

import numpy as np
import pandas as pd
import pytest

from sitecheck.scan import ScanOptions, scan_file

ROLES = dict(site="hospital", outcome="admitted_hdu", covariates=["age", "sex"], identifiers=["attendance_id"])
OPTIONS = ScanOptions(analyses=("probe", "fingerprints"), n_jobs=1)


def _sections(result):
    doc = result.to_dict()
    return {k: doc[k] for k in ("probe", "fingerprints", "fingerprint_tests") if k in doc}, doc


@pytest.fixture(scope="module")
def csv_result(demo_small_path):
    return scan_file(demo_small_path, options=OPTIONS, **ROLES)


def test_csv_and_parquet_give_the_same_numbers(csv_result, demo_small_path, tmp_path):
    pq = tmp_path / "demo_small.parquet"
    pd.read_csv(demo_small_path).to_parquet(pq, index=False)
    a, da = _sections(csv_result)
    b, db = _sections(scan_file(str(pq), options=OPTIONS, **ROLES))
    assert (da["input"]["format"], db["input"]["format"]) == ("csv", "parquet")
    assert da["input"]["sites"] == db["input"]["sites"] and da["input"]["rows_used"] == db["input"]["rows_used"] == 1200
    assert a["probe"]["auc"] > 0.9  # the demo's injected effects: not a comparison of two empty results
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def test_row_order_does_not_change_the_verdict(csv_result, demo_small_path, tmp_path):
    shuffled = tmp_path / "shuffled.csv"
    frame = pd.read_csv(demo_small_path, dtype=str, keep_default_na=False)
    frame.sample(frac=1.0, random_state=np.random.default_rng(11).integers(1 << 31)).to_csv(shuffled, index=False)
    a, _ = _sections(csv_result)
    b, _ = _sections(scan_file(str(shuffled), options=OPTIONS, **ROLES))
    assert a["probe"]["verdict"] == b["probe"]["verdict"]
    # folds and subsamples follow the rows, so the estimate moves a little: each inside the other's interval
    lo, hi = a["probe"]["auc_ci"]
    assert lo <= b["probe"]["auc"] <= hi and b["probe"]["auc_ci"][0] <= a["probe"]["auc"] <= b["probe"]["auc_ci"][1]
    key = lambda fps: {(f["feature"], f["site"], f["kind"]) for f in fps}  # noqa: E731
    assert key(a["fingerprints"]) == key(b["fingerprints"])
