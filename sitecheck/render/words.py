"""One name per artefact, used by every section, the checklist and the figures."""
from __future__ import annotations

from typing import Any, Dict, Optional

#: fingerprint kind -> the words the report uses for it
ARTEFACT = {
    "unit_ratio": "another unit",
    "precision": "recording grid",
    "heaping": "digit preference",
    "floor": "lower limit",
    "ceiling": "upper limit",
    "missing_code": "missing-value code",
    "site_missing": "never measured",
    "exclusive_level": "site-only category",
    "shift": "location gap",
    "scale": "spread gap",
    "censored_below": "written below a limit",
    "censored_above": "written above a limit",
    "number_format": "number format",
    "unit_label": "unit column",
}

#: kinds that are about how values were recorded, not about patients: acted on first
MECHANICAL = ("unit_ratio", "missing_code", "site_missing", "floor", "ceiling", "precision", "exclusive_level",
              "heaping", "censored_below", "censored_above", "number_format", "unit_label")
#: kinds that may be case mix as well as measurement
DISTRIBUTION = ("shift", "scale")

SEVERITY_ORDER = {"high": 0, "medium": 1, "low": 2}

#: the fingerprint tests, as column labels
KIND_TEST = {
    "unit_ratio": "median ratio near a conversion factor",
    "precision": "share of values on the site's grid",
    "heaping": "terminal-digit counts (chi-square)",
    "floor": "share at the site's minimum",
    "ceiling": "share at the site's maximum",
    "missing_code": "share at one out-of-range value",
    "site_missing": "share missing",
    "exclusive_level": "level count at the site",
    "shift": "mean difference, covariate-adjusted",
    "scale": "variance ratio",
    "censored_below": "share of cells written '<limit'",
    "censored_above": "share of cells written '>limit'",
    "number_format": "share of cells in another number format",
    "unit_label": "share of rows in another unit",
}

#: harmonisation reasons -> the artefact words above (one name across sections)
HARM_REASON = {
    "missingness": "missing share",
    "floor or ceiling": "lower or upper limit",
    "precision": "recording grid",
    "unit mixture": "another unit",
    "shape difference": "shape gap",
    "case mix (protected)": "case mix, kept on purpose",
    "categorical, left unchanged": "categorical, unchanged",
}

#: hygiene finding kinds -> words
HYGIENE = {
    "identifier": "identifier-like",
    "site_prefix": "site-specific code prefix",
    "direct_identifier": "direct identifier",
    "constant": "constant",
    "site_missing": "never measured",
    "datetime": "date or time",
    "free_text": "free text",
    "exclusive_level": "site-only category",
}


def artefact(kind: Optional[str]) -> str:
    return ARTEFACT.get(kind or "", (kind or "").replace("_", " "))


def harm_reason(reason: Optional[str], fingerprint_kind: Optional[str] = None) -> str:
    """The harmonisation reason in the report's words; a fingerprint at the same
    feature and site gives its name, so one artefact has one name."""
    if fingerprint_kind and reason not in ("case mix (protected)", "shape difference"):
        return artefact(fingerprint_kind)
    return HARM_REASON.get(reason or "", reason or "")


def missing_code_label(code: Any) -> str:
    """A missing-value code as shown: the empty string is "empty cell"."""
    s = "" if code is None else str(code)
    if s == "":
        return "empty cell"
    if s.strip() == "":
        return f"blank ({len(s)} spaces)"
    return f"“{s}”"


def hygiene_word(kind: Optional[str]) -> str:
    return HYGIENE.get(kind or "", (kind or "").replace("_", " "))
