"""The JSON Schema (draft 2020-12) of ``report.json``.

The document's ``schema`` field carries :data:`sitecheck.report.result.SCHEMA_VERSION`.
Minor versions add keys; a major version renames or removes one. Sections are
present only when their analysis ran (``outcome`` needs ``--outcome``).
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
    embedding = _obj({"n_used": COUNT, "methods": {"type": "array"}, "mixing": {"type": "object"},
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
    column = _obj({"name": {"type": "string"}, "role": {"enum": ["site", "outcome", "covariate", "group", "identifier",
                                                                 "excluded", "feature"]},
                   "kind": {"enum": ["numeric", "binary", "categorical", "datetime", "text"]},
                   "reason": {"type": "string"}}, ["name", "role", "kind", "reason"])
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
            "shareable": _obj({"min_cell": {"type": "integer"}, "withheld_sites": {"type": "array"}}),
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
