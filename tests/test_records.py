"""fields_dict: the one plain to_dict of result records (sitecheck._records)."""
import dataclasses
import doctest
import json

import numpy as np

from sitecheck import _records
from sitecheck._records import fields_dict, plain
from sitecheck.analyses.stats import round_sig


@dataclasses.dataclass(frozen=True)
class _Inner:
    value: float

    def to_dict(self):
        return {"value": round(self.value, 1)}


@dataclasses.dataclass(frozen=True)
class _Record:
    name: str
    n: int
    flagged: bool
    auc: float
    ci: tuple
    missing: object
    inner: _Inner
    per_site: dict


def test_fields_in_declaration_order_as_json_types():
    r = _Record("crp", np.int64(12), np.bool_(True), np.float64(0.123456789), (np.float32(0.5), 0.25), None,
                _Inner(0.26), {"Aldermoor": (1, np.float64(2.5))})
    d = fields_dict(r)
    assert list(d) == [f.name for f in dataclasses.fields(r)]
    assert d == {"name": "crp", "n": 12, "flagged": True, "auc": 0.123456789, "ci": [0.5, 0.25], "missing": None,
                 "inner": {"value": 0.3}, "per_site": {"Aldermoor": [1, 2.5]}}
    assert [type(d[k]) for k in ("n", "flagged", "auc")] == [int, bool, float]
    json.dumps(d, allow_nan=False)  # plain JSON
    # rounding reaches every float, nested too, and nothing else (integers and booleans stay as they are)
    rounded = fields_dict(r, number=round_sig)
    assert rounded["auc"] == 0.123457 and rounded["per_site"] == {"Aldermoor": [1, 2.5]} and rounded["n"] == 12
    assert fields_dict(r, convert=repr)["name"] == "'crp'"
    assert plain(np.array([[1, 2], [3, 4]])) == [[1, 2], [3, 4]]


def test_result_records_keep_every_field():
    from sitecheck.analyses.registry import AnalysisFailure
    from sitecheck.report.gates import GateFailure

    g = GateFailure(gate="fail_on", setting="unit_ratio", message="1 unit_ratio finding", count=1)
    assert g.to_dict() == {"gate": "fail_on", "setting": "unit_ratio", "message": "1 unit_ratio finding", "count": 1}
    f = AnalysisFailure(analysis="maps", sections=("embedding",), status="failed", error="ParameterError",
                        message="max_rows must be an integer of at least 50, got 3", process="main")
    assert f.to_dict()["sections"] == ["embedding"] and list(f.to_dict()) == [x.name for x in dataclasses.fields(f)]


def test_doctests_run():
    result = doctest.testmod(_records)
    assert result.attempted >= 2 and result.failed == 0
