"""Report section: why features mark sites (fingerprints), with the reason in plain words.

Rendering only: every number comes from ``doc["fingerprints"]``. Data text
(feature names, site labels, levels) is escaped; counts go through
``suppress_count``; a finding about a site with fewer than ``min_cell`` rows,
or resting on a count below ``min_cell``, shows no per-site numbers.
"""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import esc, pval, table_html
from ..markdown import md_table
from ..safety import suppress_count

_KIND_WORDS = {
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

_HEAD = ["feature", "site", "fingerprint", "severity", "what we found", "what it usually means",
         "suggested fix", "p (adjusted)", "values at site"]


def _counts(obj, out: List[Any]) -> None:
    if isinstance(obj, dict):
        for k, v in obj.items():
            if k in ("n", "count") and not isinstance(v, bool):
                out.append(v)
            else:
                _counts(v, out)
    elif isinstance(obj, list):
        for v in obj:
            _counts(v, out)


def _small(f: Dict[str, Any], sites: Dict[str, Any], min_cell: int) -> bool:
    """Whether the finding rests on a small cell (small site, or a count below min_cell)."""
    n_site = sites.get(f.get("site"))
    if isinstance(n_site, int) and n_site < min_cell:
        return True
    if isinstance(n_site, str):
        return True
    vals: List[Any] = []
    _counts(f.get("evidence") or {}, vals)
    for v in vals:
        if isinstance(v, str):
            return True
        if isinstance(v, (int, float)) and 0 < v < min_cell:
            return True
    return False


_p = pval  # shared formatter (render/html.py)


def _n_site(f: Dict[str, Any]):
    ev = f.get("evidence") or {}
    if isinstance(ev.get("at_site"), dict):
        return ev["at_site"].get("n")
    return ev.get("n")


def _rows(doc: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    sites = (doc.get("input") or {}).get("sites") or {}
    rows = []
    for f in doc.get("fingerprints") or []:
        kind = f.get("kind", "")
        label = f"{kind} ({_KIND_WORDS.get(kind, '')})" if kind in _KIND_WORDS else kind
        if _small(f, sites, min_cell):
            detail = f"details withheld: fewer than {min_cell} rows behind this finding"
            p, n = "withheld", "withheld"
        else:
            detail = f.get("detail", "")
            p = _p((f.get("evidence") or {}).get("p_adj"))
            n = suppress_count(_n_site(f), min_cell)
        rows.append([f.get("feature"), f.get("site") or "", label, f.get("severity", ""), detail,
                     f.get("explanation", ""), f.get("suggested_fix", ""), p, "–" if n is None else n])
    return rows


def _intro(doc: Dict[str, Any]) -> str:
    tests = doc.get("fingerprint_tests") or {}
    alpha = None
    for t in tests.values():
        if isinstance(t, dict) and t.get("alpha") is not None:
            alpha = t["alpha"]
            break
    a = f"{alpha:g}" if isinstance(alpha, (int, float)) else "the chosen level"
    return ("Each row says why a feature marks one site: another unit, a recording grid, a detection limit, "
            "a missing-value code, a test never run there, or a gap the covariates do not explain. "
            f"Every kind is tested on all rows, feature by site, with a Bonferroni correction at family-wise "
            f"level {a}, and with minimum effect sizes, so large tables do not flag trivia. "
            "These are clues for data work, not clinical judgements; confirm them with the sites' laboratories.")


def html(doc: Dict[str, Any], min_cell: int) -> str:
    if "fingerprints" not in doc:
        return ""
    parts = ["<h2>Why features mark sites (fingerprints)</h2>", f"<p>{esc(_intro(doc))}</p>"]
    rows = _rows(doc, min_cell)
    if not rows:
        parts.append("<p>No fingerprint passed its test: no unit, grid, limit, code or unexplained gap "
                     "singles out a site.</p>")
    else:
        parts.append(table_html(_HEAD, rows, numeric=(7, 8)))
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    if "fingerprints" not in doc:
        return ""
    out = ["## Why features mark sites (fingerprints)", "", _intro(doc), ""]
    rows = _rows(doc, min_cell)
    if not rows:
        out.append("No fingerprint passed its test.")
    else:
        out.append(md_table(_HEAD, rows))
    return "\n".join(out)
