"""The JSON Schema (draft 2020-12) of ``report.json``.

The document's ``schema`` field carries :data:`sitecheck.report.result.SCHEMA_VERSION`.
Minor versions add keys; a major version renames or removes one. Sections are
present only when their analysis ran (``outcome`` needs ``--outcome``, ``drift``
needs ``--time``).
"""
from __future__ import annotations

from typing import Any, Dict

from sitecheck.report.gates import FINGERPRINT_KINDS
from sitecheck.report.result import SCHEMA_VERSION

NUM = {"type": ["number", "null"]}
CI = {"type": "array", "items": NUM, "minItems": 2, "maxItems": 2, "description": "95% interval [low, high]"}
COUNT = {"type": ["integer", "string"], "description": "a count; '<N' when suppressed below the small-cell threshold"}


def _obj(props: Dict[str, Any], required=None, **extra) -> Dict[str, Any]:
    d = {"type": "object", "properties": props, "additionalProperties": True}
    if required:
        d["required"] = list(required)
    d.update(extra)
    return d


def report_schema() -> Dict[str, Any]:
    """Return the JSON Schema of the report document."""
    from sitecheck.table.repair import DRIFT_KINDS  # a plan entry may fix a step over time (plan 1.1)

    per_site_auc = {"type": "object", "additionalProperties": {
        "anyOf": [_obj({"auc": NUM, "auc_ci": CI, "n": COUNT}, ["auc", "auc_ci", "n"]), {"const": "withheld"}]}}
    probe = _obj({
        "auc": NUM, "auc_ci": CI, "p_value": NUM, "balanced_accuracy": NUM, "per_site": per_site_auc,
        "n_used": COUNT, "folds": {"type": "integer"}, "model": {"type": "string"},
        "verdict": {"enum": ["none", "weak", "moderate", "strong"]},
        "linear": _obj({"auc": NUM, "auc_ci": CI}, ["auc", "auc_ci"]),
        "case_mix": {"type": ["object", "null"]}, "within_outcome": {"type": ["object", "null"]},
    }, ["auc", "auc_ci", "p_value", "balanced_accuracy", "per_site", "n_used", "folds", "model", "verdict", "linear"])
    leak_entry = _obj({"feature": {"type": "string"}, "score": NUM, "score_ci": CI, "rank": {"type": "integer"},
                       "cluster": {"type": "integer"}, "univariate": {"type": "object"},
                       "missing_by_site": {"type": "object"}},
                      ["feature", "score", "score_ci", "rank", "cluster", "univariate", "missing_by_site"])
    fingerprint = _obj({"feature": {"type": "string"}, "site": {"type": ["string", "null"]},
                        "kind": {"enum": list(FINGERPRINT_KINDS)},
                        "detail": {"type": "string"}, "evidence": {"type": "object"}},
                       ["feature", "site", "kind", "detail", "evidence"])
    embedding = _obj({"values": {"enum": ["after repair", "as given"]}, "n_used": COUNT, "methods": {"type": "array"}, "mixing": {"type": "object"},
                      "silhouette": {}, "figures": {"type": "array", "items": {"type": "string"}}},
                     ["n_used", "methods", "mixing", "silhouette"])
    harm_method = _obj({"probe_auc": NUM, "probe_auc_ci": CI,
                        "surviving": {"type": "array", "items": _obj({"feature": {"type": "string"},
                                                                       "reason": {"type": "string"}, "p_adj": NUM},
                                                                      ["feature", "reason", "p_adj"])},
                        "outcome_auc_before": NUM, "outcome_auc_after": NUM},
                       ["probe_auc", "probe_auc_ci", "surviving", "outcome_auc_before", "outcome_auc_after"])
    # equalized odds: heterogeneity of TPR and FPR across units against the within-class permutation null
    ci_or_null = {"anyOf": [CI, {"type": "null"}]}
    null_summary = _obj({"median": NUM, "q95": NUM}, ["median", "q95"])
    rate_het_props = {
        "units_used": {"type": "integer"}, "small_units": {"type": "array", "items": {"type": "string"}},
        "empty_units": {"type": "array", "items": {"type": "string"}}, "min_count": {"type": "integer"},
        "pooled_rate": NUM, "q": NUM, "df": {"type": ["integer", "null"]}, "q_p_value": NUM,
        "tau2": NUM, "tau2_ci": ci_or_null, "i2": NUM, "i2_ci": ci_or_null, "sd_rate": NUM, "sd_rate_ci": ci_or_null,
        "variance": NUM, "spread": NUM, "permutations": {"type": "integer"}, "p_value": NUM,
        "variance_p_value": NUM, "spread_p_value": NUM, "exceeds_noise": {"type": ["boolean", "null"]},
        "null": _obj({k: null_summary for k in ("tau2", "i2", "variance", "spread")},
                     ["tau2", "i2", "variance", "spread"]),
        "without_small": {"type": ["object", "null"]}}
    rate_het = _obj(rate_het_props, list(rate_het_props))
    heterogeneity = _obj({"method": {"type": "string"}, "scale": {"type": "string"}, "min_count": {"type": "integer"},
                          "permutations": {"type": "integer"}, "tpr": rate_het, "fpr": rate_het},
                         ["method", "scale", "min_count", "permutations", "tpr", "fpr"])
    eo_common = {"threshold": NUM, "tpr_spread": NUM, "fpr_spread": NUM, "heterogeneity": heterogeneity}
    outcome = _obj({"prevalence": {"type": "object"}, "site_only_auc": NUM, "pooled_auc": NUM,
                    "loso": {"type": "object"}, "transport_gap": NUM, "shortcut_candidates": {"type": "array"},
                    "equalized_odds": _obj({**eo_common, "per_site": {"type": "object"}},
                                           ["threshold", "per_site", "tpr_spread", "fpr_spread", "heterogeneity"]),
                    "equalized_odds_by_group": {"type": "object", "additionalProperties": _obj(
                        {**eo_common, "per_group": {"type": "object"}},
                        ["threshold", "per_group", "tpr_spread", "fpr_spread", "heterogeneity"])}},
                   ["prevalence", "site_only_auc", "pooled_auc", "loso", "transport_gap", "shortcut_candidates",
                    "equalized_odds"])
    change_point = _obj({
        "site": {"type": "string"}, "feature": {"type": "string"},
        "aspect": {"enum": ["level", "spread", "missing", "artefact"]}, "artefact": {"type": ["string", "null"]},
        "date": {"type": "string", "pattern": "^[0-9]{4}-[0-9]{2}-[0-9]{2}$"}, "period": {"type": "string"},
        "before": {"type": "object"}, "after": {"type": "object"}, "size": NUM, "size_ci": CI, "size_sd": NUM,
        "p_value": NUM, "p_adj": NUM, "scope": {"enum": ["site", "several_sites", "network"]},
        "other_sites": {"type": "object"}, "artefacts": {"type": "array"}, "finding": {"type": "boolean"},
        "detail": {"type": "string"}},
        ["site", "feature", "aspect", "artefact", "date", "period", "size", "size_ci", "size_sd", "p_value",
         "p_adj", "scope", "finding", "detail"])
    drift_site = {"anyOf": [_obj({"site": {"type": "string"}, "unit": {"type": "string"},
                                  "assessed": {"type": "boolean"}, "periods": {"type": "array"},
                                  "starts": {"type": "array"}, "n": {"type": "array", "items": COUNT},
                                  "features": {"type": "object"}},
                                 ["site", "unit", "assessed", "periods", "starts", "n", "features"]),
                            {"const": "withheld"}]}
    period_probe = _obj({"site": {"type": "string"}, "n": COUNT, "split_date": {"type": "string"}, "auc": NUM,
                         "auc_ci": CI, "covariate_auc": NUM, "covariate_auc_ci": CI, "increment": NUM,
                         "increment_ci": CI, "increment_ci_adjusted": CI, "flagged": {"type": "boolean"}},
                        ["site", "n", "split_date", "auc", "auc_ci", "covariate_auc", "increment", "increment_ci",
                         "flagged"])
    drift = _obj({"time_column": {"type": "string"}, "n_series": {"type": "integer"},
                  "findings": {"type": "array", "items": change_point},
                  "change_points": {"type": "array", "items": change_point},
                  "network": {"type": "array", "items": _obj({"feature": {"type": "string"},
                                                              "date": {"type": "string"},
                                                              "sites": {"type": "array"}},
                                                             ["feature", "date", "sites"])},
                  "period_probe": {"type": "array", "items": period_probe},
                  "sites": {"type": "array", "items": drift_site},
                  "calibration": {"type": "object"}, "params": {"type": "object"}, "time_notes": {"type": "object"},
                  "figures": {"type": "array", "items": {"type": "string"}}},
                 ["time_column", "n_series", "findings", "change_points", "network", "period_probe", "sites",
                  "calibration", "params"],
                 description="Drift within each site over the collection period (with --time): change points "
                             "per site, feature and aspect, their scope, and the period probe.")
    column = _obj({"name": {"type": "string"}, "role": {"enum": ["site", "outcome", "covariate", "group", "identifier",
                                                                 "excluded", "feature", "time"]},
                   "kind": {"enum": ["numeric", "binary", "categorical", "datetime", "text"]},
                   "reason": {"type": "string"},
                   "idioms": {"type": "object", "description": "site -> lab-export idiom -> cells",
                              "additionalProperties": {"type": "object", "additionalProperties": COUNT}},
                   "units": {"type": "object", "description": "site -> unit written after the number -> cells",
                             "additionalProperties": {"type": "object", "additionalProperties": COUNT}}},
                  ["name", "role", "kind", "reason"])
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": f"urn:sitecheck:{SCHEMA_VERSION}",
        "title": "sitecheck report.json",
        "description": "Site-signal check of a pooled clinical table. Decision support for data work, not a clinical device.",
        **_obj({
            "schema": {"const": SCHEMA_VERSION},
            "input": _obj({"path": {"type": "string"}, "rows": COUNT, "columns": {"type": "integer"},
                           "sha256": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
                           "sites": {"type": "object", "additionalProperties": COUNT}},
                          ["path", "rows", "columns", "sha256", "sites"]),
            "columns": {"type": "array", "items": column},
            "hygiene": {"type": "array", "items": _obj({"column": {"type": "string"}, "kind": {"type": "string"},
                                                        "detail": {"type": "string"}}, ["column", "kind", "detail"])},
            "warnings": {"type": "array", "items": {"type": "string"}},
            "run": _obj({"seed": {"type": "integer"}, "versions": {"type": "object"}, "seconds": {"type": "object"}},
                        ["seed", "versions", "seconds"]),
            "probe": probe,
            "groups": {"type": "object", "additionalProperties": _obj({"auc": NUM, "auc_ci": CI, "p_value": NUM,
                                                                       "verdict": {"type": "string"}},
                                                                      ["auc", "auc_ci", "p_value", "verdict"])},
            "leakage": {"type": "array", "items": leak_entry},
            "clusters": {"type": "array", "items": _obj({"members": {"type": "array", "items": {"type": "string"}},
                                                         "score": NUM, "score_ci": CI}, ["members", "score", "score_ci"])},
            "fingerprints": {"type": "array", "items": fingerprint},
            "embedding": embedding,
            "harmonisation": {"type": "object", "additionalProperties": harm_method},
            "outcome": outcome,
            "residual": _obj({"auc_given": NUM, "auc_given_ci": CI, "auc_repaired": NUM,
                              "auc_repaired_ci": {"anyOf": [CI, {"type": "null"}]},
                              "difference": NUM, "difference_ci": {"anyOf": [CI, {"type": "null"}]},
                              "explained_share": NUM, "n_used": COUNT, "statement": {"type": "string"},
                              "applied": {"type": "array"}, "top": {"type": "array"}},
                             ["auc_given", "auc_given_ci", "auc_repaired", "statement"],
                             description="the site probe again after the repair plan's safe entries"),
            "repair": _obj({"plan_file": {"type": "string"}, "plan_version": {"type": "string"},
                            "n_entries": {"type": "integer"}, "n_safe": {"type": "integer"},
                            "values_for_maps_harmonisation_outcome": {"enum": ["after repair", "as given"]},
                            "entries": {"type": "array", "items": _obj({
                                "id": {"type": "string"}, "kind": {"enum": list(FINGERPRINT_KINDS) + list(DRIFT_KINDS)},
                                "column": {"type": "string"}, "site": {"type": ["string", "null"]},
                                "operation": {"type": "string"}, "cells": COUNT, "safe": {"type": "boolean"},
                                "enabled": {"type": "boolean"},
                                "period": {"type": "object", "description": "an entry scoped to a period (a step "
                                           "over time at one site): time_column, from, until (ISO dates, until "
                                           "exclusive or null)"}},
                                ["id", "kind", "column", "site", "operation", "cells", "safe", "enabled"])},
                            "applied_in_scan": {"type": "array"}, "log": {"type": "object"},
                            "not_repaired": {"type": "array"}},
                           ["plan_file", "plan_version", "entries", "values_for_maps_harmonisation_outcome"],
                           description="the repair plan (repair_plan.json; its schema: sitecheck repair-schema)"),
            "unit_columns": {"type": "object", "description": "unit column -> the numeric column it qualifies"},
            "drift": drift,
            "shareable": _obj({"min_cell": {"type": "integer"}, "withheld_sites": {"type": "array"}}),
            "failed_analyses": {"type": "array", "description": (
                "analyses that raised (status 'failed': exception type and its first line) or did not run because "
                "one they need failed (status 'not_run'); their sections are absent, every other section is "
                "complete. The command exits 3 when this list is not empty."),
                "items": _obj({"analysis": {"type": "string"}, "sections": {"type": "array", "items": {"type": "string"}},
                               "status": {"enum": ["failed", "not_run"]}, "error": {"type": ["string", "null"]},
                               "message": {"type": "string"}, "process": {"enum": ["main", "second"]}},
                              ["analysis", "sections", "status", "error", "message"])},
        }, ["schema", "input", "columns", "warnings", "run"]),
    }


def validate(doc: Any, schema: Dict[str, Any], path: str = "$") -> list:
    """Check ``doc`` against the subset of JSON Schema used by :func:`report_schema`
    (type, enum, const, required, properties, additionalProperties, items, anyOf,
    minItems, maxItems, pattern). Returns a list of error strings (empty: valid)."""
    import re

    errs = []
    types = {"object": dict, "array": list, "string": str, "integer": int, "number": (int, float), "null": type(None),
             "boolean": bool}
    if "anyOf" in schema:
        if not any(not validate(doc, s, path) for s in schema["anyOf"]):
            errs.append(f"{path}: matches none of anyOf")
        return errs
    if "const" in schema and doc != schema["const"]:
        errs.append(f"{path}: expected {schema['const']!r}")
    if "enum" in schema and doc not in schema["enum"]:
        errs.append(f"{path}: {doc!r} not in {schema['enum']}")
    t = schema.get("type")
    if t is not None:
        ts = t if isinstance(t, list) else [t]
        ok = any(isinstance(doc, types[x]) and not (x in ("integer", "number") and isinstance(doc, bool)) for x in ts)
        if not ok:
            return errs + [f"{path}: expected {t}, got {type(doc).__name__}"]
    if isinstance(doc, dict):
        for k in schema.get("required", []):
            if k not in doc:
                errs.append(f"{path}: missing {k!r}")
        props = schema.get("properties", {})
        for k, v in doc.items():
            if k in props:
                errs += validate(v, props[k], f"{path}.{k}")
            elif isinstance(schema.get("additionalProperties"), dict):
                errs += validate(v, schema["additionalProperties"], f"{path}.{k}")
    if isinstance(doc, list):
        if "minItems" in schema and len(doc) < schema["minItems"]:
            errs.append(f"{path}: fewer than {schema['minItems']} items")
        if "maxItems" in schema and len(doc) > schema["maxItems"]:
            errs.append(f"{path}: more than {schema['maxItems']} items")
        if "items" in schema:
            for i, v in enumerate(doc):
                errs += validate(v, schema["items"], f"{path}[{i}]")
    if isinstance(doc, str) and "pattern" in schema and not re.search(schema["pattern"], doc):
        errs.append(f"{path}: does not match {schema['pattern']}")
    return errs
