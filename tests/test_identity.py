"""The kept before/after identity test: the report document of ``fixtures/demo_small.csv`` equals the
stored reference (``tests/reference/demo_small_report.json``, written by ``tests/reference/regenerate.py``).

A refactor must leave it passing. A change that is meant to alter numbers regenerates the reference
and says why in its commit message (see the contributor guide)."""
import copy
import json

import pytest

from tests.reference.regenerate import REFERENCE, ROOT, RUN_SPECIFIC, compare, current, differences, environment


@pytest.fixture(scope="module")
def reference():
    with open(REFERENCE, encoding="utf-8") as fh:
        return json.load(fh)


def test_report_equals_the_stored_reference(reference):
    # Structure, strings, integers and booleans exactly; floats to a relative 1e-6, because the suite
    # also runs on other machines (CI), where BLAS, OpenMP and libm may round the last bits differently.
    # The message names the numerical libraries, and the CPU code paths (instruction_set), that changed since
    # the reference was written, if any.
    found = compare(reference, current())
    env = environment()
    moved = {k: (reference["environment"].get(k), v) for k, v in env.items() if reference["environment"].get(k) != v}
    assert not found, (f"{len(found)} differences from {REFERENCE} (library versions or CPU code paths changed "
                       f"since it was written: {moved or 'none'}; if the change is meant to alter numbers, regenerate it and "
                       "say why in the commit):\n" + "\n".join(found[:30]))


def test_the_reference_is_a_whole_scan(reference):
    # not a comparison of two empty results: every analysis ran and found the demo's injected effects
    doc = reference["report"]
    assert doc["failed_analyses"] == []
    for section in ("probe", "leakage", "fingerprints", "drift", "embedding", "harmonisation", "outcome",
                    "reconciliation", "residual", "repair"):
        assert doc.get(section), section
    assert doc["probe"]["auc"] > 0.9
    assert list(doc["harmonisation"]) == ["quantile", "combat"]
    assert doc["input"]["rows_used"] == 1200 and doc["run"]["options"]["max_rows"] == 400
    assert reference["repair_plan"]["entries"]
    for section, key in RUN_SPECIFIC:
        assert key not in doc[section]
    assert "generated_by" not in reference["repair_plan"] and "path" not in reference["repair_plan"]["input"]
    assert ROOT not in json.dumps(reference)  # nothing of the machine that wrote it
    assert set(reference["environment"]) >= {"numpy", "scipy", "scikit-learn", "openTSNE", "instruction_set"}


def test_the_comparison_can_fail(reference):
    same = copy.deepcopy(reference)
    assert differences(reference, same) == []
    auc = reference["report"]["probe"]["auc"]
    same["report"]["probe"]["auc"] = auc * (1 + 1e-8)
    assert differences(reference, same) == []  # within the tolerance
    same["report"]["probe"]["auc"] = auc * (1 + 1e-5)
    assert differences(reference, same) == [f"$.report.probe.auc: expected {auc!r}, got {auc * (1 + 1e-5)!r}"]
    moved = copy.deepcopy(reference)
    moved["report"]["input"]["extra"] = 1
    moved["report"]["probe"]["n_used"] += 1
    moved["report"]["fingerprints"].pop()
    found = differences(reference, moved)
    assert [f.split(":")[0] for f in found] == ["$.report.input", "$.report.probe.n_used", "$.report.fingerprints"]
    assert differences({"a": 1}, {"a": 1.0}) and differences({"a": 0.5}, {"a": "0.5"})
    assert differences({"a": 1, "b": 2}, {"b": 2, "a": 1})  # key order is part of report.json
