"""Report section: the repair loop -- the site signal left after the scan's safe
repairs, the repair plan (one anchored row per entry, the target of the checklist's
links), and the lab-export idioms read per column and site.

Rendering only: every number comes from ``doc["residual"]``, ``doc["repair"]`` and
``doc["columns"]``. Data text is escaped by the templates; counts go through
``suppress_count``.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional, Tuple

from ..fmt import DASH, ci, count, num
from ..safety import suppress_count
from ..templating import Cell, Col, Table, anchor
from ..words import artefact

#: plan entries listed in findings.md (the rest: report.html and repair_plan.json)
MD_MAX = 12
ID = "repair"
TITLE = "What mechanical repairs would remove"

_VALUES = ("The maps, the harmonisation check and the outcome analysis below were computed on the values "
           "{values}; the site probe, the leak ranking and the fingerprints above on the values as given.")

#: plan operation -> the action in words
ACTION = {
    "convert_unit": "convert the unit",
    "recode_missing": "codes become missing",
    "number_format": "write as plain numbers",
    "censored_policy": "give censored cells a value",
    "drop_column": "leave the column out",
    "map_level": "map to the common level",
    "remove_step": "subtract the step",
}

#: a plan entry's finding kind that is not a fingerprint kind -> words
_KIND_WORDS = {"drift_level": "change over time (level)", "drift_spread": "change over time (spread)",
               "drift_missing": "change over time (missing share)", "drift_artefact": "change over time (artefact)"}


def plan_anchor(entry_id: Any) -> str:
    """The HTML id of a repair-plan entry's row (``plan-r001``)."""
    return anchor("plan", entry_id)


def finding_key(e: Dict[str, Any]) -> Tuple[Any, Any, Any]:
    """(kind, feature, site) of the finding a plan entry (``doc["repair"]["entries"][i]``) fixes."""
    f = e.get("finding") if isinstance(e.get("finding"), dict) else {}
    return (f.get("kind", e.get("kind")), f.get("feature", e.get("column")), f.get("site", e.get("site")))


def entries_by_finding(doc: Dict[str, Any]) -> Dict[Tuple[Any, Any, Any], List[Dict[str, Any]]]:
    """The repair plan's entries keyed by the finding each one fixes (read from the document)."""
    out: Dict[Tuple[Any, Any, Any], List[Dict[str, Any]]] = {}
    rep = doc.get("repair")
    for e in (rep.get("entries") or []) if isinstance(rep, dict) else []:
        if isinstance(e, dict) and e.get("id") is not None:
            out.setdefault(finding_key(e), []).append(e)
    return out


def action_text(e: Dict[str, Any]) -> str:
    """What an entry does, in words, with its period where it is scoped to one."""
    text = ACTION.get(e.get("operation"), str(e.get("operation") or "").replace("_", " "))
    p = e.get("params") if isinstance(e.get("params"), dict) else {}
    if e.get("operation") == "remove_step" and isinstance(p.get("subtract"), (int, float)):
        unit = f" {p['unit']}" if p.get("unit") else ""
        text = f"subtract {p['subtract']:.3g}{unit}"
        if isinstance(p.get("interval"), list) and len(p["interval"]) == 2:
            text += f" (95% CI {ci(p['interval'])})"
    scope = e.get("period") if isinstance(e.get("period"), dict) else None
    if scope:
        text += " " + period_words(scope)
    return text


def period_words(scope: Dict[str, Any]) -> str:
    """"from 2026-04-01" or "from 2026-04-01 to before 2026-09-01" (a plan entry's period)."""
    out = f"from {scope.get('from')}" if scope.get("from") else ""
    if scope.get("until"):
        out += f"{' ' if out else ''}until before {scope.get('until')}"
    return out


def _plan_table(rep: Dict[str, Any], min_cell: int) -> Table:
    rows, ids = [], []
    for e in rep.get("entries") or []:
        if not isinstance(e, dict):
            continue
        kind = finding_key(e)[0]
        rows.append([Cell(e.get("id"), cls="id"), e.get("site") or "all sites", e.get("column"),
                     _KIND_WORDS.get(kind, artefact(kind)), action_text(e),
                     count(suppress_count(e.get("rows"), min_cell)),
                     count(suppress_count(e.get("cells"), min_cell)),
                     Cell("yes" if e.get("safe") else "no", cls="ok" if e.get("safe") else ""),
                     "yes" if e.get("enabled") else "no", e.get("reason") or ""])
        ids.append(plan_anchor(e.get("id")))
    cols = [Col("entry"), Col("site"), Col("column"), Col("fixes"), Col("action"),
            Col("rows in scope", numeric=True), Col("cells changed", numeric=True), Col("safe by default"),
            Col("enabled"), Col("why", wide=True)]
    return Table(cols, rows, row_ids=ids, sortable=False)


def _residual_table(res: Dict[str, Any]) -> Table:
    rows = [[t.get("feature"), t.get("rank_given"), num(t.get("score_given")), ci(t.get("score_given_ci")),
             num(t.get("score_repaired")), ci(t.get("score_repaired_ci"))] for t in res.get("top") or []]
    return Table([Col("feature"), Col("rank as given", numeric=True), Col("score as given", numeric=True),
                  Col("95% CI", numeric=True), Col("score after repair", numeric=True), Col("95% CI", numeric=True)],
                 rows)


def _idiom_table(doc: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    for c in doc.get("columns") or []:
        for site, idioms in (c.get("idioms") or {}).items():
            if not isinstance(idioms, dict):
                rows.append([c.get("name"), site, "withheld", ""])
                continue
            units = (c.get("units") or {}).get(site) or {}
            unit_txt = ", ".join(f"{u} ({count(suppress_count(n, min_cell))})" for u, n in units.items()) \
                if isinstance(units, dict) else ""
            rows.append([c.get("name"), site, ", ".join(f"{k.replace('_', ' ')} ({count(suppress_count(v, min_cell))})"
                                                        for k, v in idioms.items()), unit_txt])
    return Table([Col("column"), Col("site"), Col("idioms read (cells)"), Col("units written (cells)")], rows)


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    rep = doc.get("repair") if isinstance(doc.get("repair"), dict) else None
    res = doc.get("residual") if isinstance(doc.get("residual"), dict) else None
    idioms = _idiom_table(doc, min_cell)
    if not rep and not res and not idioms.rows:
        return None
    m: Dict[str, Any] = {"id": ID, "title": TITLE, "residual": None, "plan": None, "idioms": idioms}
    if res:
        r: Dict[str, Any] = {"statement": res.get("statement") or "", "method": res.get("method") or "",
                             "top": _residual_table(res), "detail": None}
        if res.get("auc_repaired") is not None:
            r["detail"] = {"rows": count(suppress_count(res.get("n_used"), min_cell)),
                           "auc_given": num(res.get("auc_given")), "auc_given_ci": ci(res.get("auc_given_ci")),
                           "auc_repaired": num(res.get("auc_repaired")),
                           "auc_repaired_ci": ci(res.get("auc_repaired_ci")),
                           "verdict": res.get("verdict_repaired") or DASH}
        m["residual"] = r
    if rep:
        entries = [e for e in rep.get("entries") or [] if isinstance(e, dict)]
        nr = [f for f in rep.get("not_repaired") or [] if isinstance(f, dict)]
        m["plan"] = {
            "values_note": _VALUES.format(values=rep.get("values_for_maps_harmonisation_outcome")),
            "file": rep.get("plan_file") or "repair_plan.json", "n_entries": len(entries),
            "n_safe": sum(1 for e in entries if e.get("safe")), "n_enabled": sum(1 for e in entries if e.get("enabled")),
            "n_period": sum(1 for e in entries if isinstance(e.get("period"), dict)),
            "table": _plan_table(rep, min_cell),
            "md_lines": [{"id": e.get("id"), "site": e.get("site") or "all sites", "column": e.get("column"),
                          "action": action_text(e), "safe": bool(e.get("safe")), "enabled": bool(e.get("enabled"))}
                         for e in entries[:MD_MAX]],
            "md_more": max(0, len(entries) - MD_MAX),
            "not_repaired": Table([Col("finding"), Col("column"), Col("site"), Col("why not", wide=True)],
                                  [[_KIND_WORDS.get(f.get("kind"), artefact(f.get("kind"))), f.get("feature"),
                                    f.get("site"), f.get("reason")]
                                   for f in nr]),
        }
    return m
