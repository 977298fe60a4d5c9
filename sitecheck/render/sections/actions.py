"""The top of the page and of findings.md: "What to do next" and "At a glance".

The checklist is an ordering of what the analyses found, never a new number:
mechanical artefacts first (one line each, by severity), then identifier-like
columns, then location and spread gaps rolled up per site, then the outcome
shortcut; at most :data:`MAX_LINES` lines, each linked to its section. The full
list is a folded table (and ``fingerprints.csv``).
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..fmt import ci, excludes_zero, num
from ..templating import Col, Cell, Table
from ..words import DISTRIBUTION, artefact, hygiene_word
from . import fingerprints as fp_section
from .leakage import reconciled, redundancy_sentence
from .outcome import gap_sentence
from .repair import entries_by_finding, plan_anchor

MAX_LINES = 15
MIN_MECHANICAL = 6


def _covariates(doc: Dict[str, Any]) -> List[str]:
    return [c.get("name") for c in doc.get("columns") or [] if c.get("role") == "covariate"]


def _fp_line(f: Dict[str, Any], sites: Dict[str, Any], min_cell: int, rec) -> Dict[str, Any]:
    withheld = fp_section.small(f, sites, min_cell)
    evidence = (f"details withheld: fewer than {min_cell} rows behind this finding" if withheld
                else f.get("detail", ""))
    note = ""
    for r in rec.get(f.get("feature"), []):
        if r.get("site") == f.get("site") and r.get("kind") == f.get("kind"):
            note = "near 0 in the leak ranking: " + redundancy_sentence(r)
    return {"severity": f.get("severity", ""), "site": f.get("site") or "", "column": f.get("feature"),
            "what": artefact(f.get("kind")), "evidence": evidence, "fix": f.get("suggested_fix", ""),
            "note": note, "href": "#" + fp_section.finding_id(f),
            "keys": [(f.get("kind"), f.get("feature"), f.get("site"))]}


def _rolled(fps, sites, min_cell, rec) -> List[Dict[str, Any]]:
    """One line per high or medium recording finding; low-severity ones of one kind at one site on one
    line (digit preference across many features is one habit of one site)."""
    out: List[Dict[str, Any]] = []
    low: Dict[tuple, List[Dict[str, Any]]] = {}
    for f in fps:
        if f.get("kind") in DISTRIBUTION:
            continue
        if f.get("severity") == "low":
            key = (f.get("kind"), f.get("site"))
            if key not in low:
                low[key] = []
                out.append({"_low": key})
            low[key].append(f)
        else:
            out.append(_fp_line(f, sites, min_cell, rec))
    lines = []
    for x in out:
        if "_low" not in x:
            lines.append(x)
            continue
        group = low[x["_low"]]
        if len(group) == 1:
            lines.append(_fp_line(group[0], sites, min_cell, rec))
            continue
        first = _fp_line(group[0], sites, min_cell, rec)
        names = [g.get("feature") for g in group]
        first.update(column=f"{len(group)} features", what=artefact(group[0].get("kind")),
                     evidence=", ".join(names[:6]) + (f" and {len(names) - 6} more" if len(names) > 6 else ""),
                     keys=[(g.get("kind"), g.get("feature"), g.get("site")) for g in group])
        lines.append(first)
    return lines


#: plan entries named on one checklist line at most (a rolled-up line can have several)
MAX_PLAN_LINKS = 3


def with_plan(line: Dict[str, Any], plan: Dict[tuple, List[Dict[str, Any]]]) -> Dict[str, Any]:
    """The line with the repair-plan entries of its findings (``plan``: id and anchor of each),
    matched on the finding's kind, feature and site as the plan records them."""
    refs, seen = [], set()
    for key in line.get("keys") or []:
        for e in plan.get(tuple(key), []):
            if e["id"] not in seen:
                seen.add(e["id"])
                refs.append({"id": e["id"], "href": "#" + plan_anchor(e["id"]), "site": e.get("site"),
                             "column": e.get("column")})
    out = dict(line)
    out["plan"] = refs[:MAX_PLAN_LINKS]
    out["plan_more"] = max(0, len(refs) - MAX_PLAN_LINKS)
    return out


def _hygiene_lines(doc: Dict[str, Any], fp_keys) -> List[Dict[str, Any]]:
    out = []
    for h in doc.get("hygiene") or []:
        kind = h.get("kind")
        if kind == "identifier":
            out.append({"severity": "high", "site": h.get("site", ""), "column": h.get("column"),
                        "what": hygiene_word(kind), "evidence": h.get("detail", ""),
                        "fix": "declare it with --id (never a feature) or drop it before sharing", "note": "",
                        "href": "#hygiene"})
        elif kind == "site_missing" and (h.get("column"), h.get("site")) not in fp_keys:
            out.append({"severity": "high", "site": h.get("site", ""), "column": h.get("column"),
                        "what": hygiene_word(kind), "evidence": h.get("detail", ""),
                        "fix": "leave the column out, or model without it at that site", "note": "",
                        "href": "#hygiene"})
    return out


def _gap_lines(doc: Dict[str, Any], min_cell: int) -> List[Dict[str, Any]]:
    covs = _covariates(doc)
    fix = (f"check calibration and method at this site; the covariates ({', '.join(covs)}) do not explain it"
           if covs else "give case-mix covariates (--covariate) to tell case mix from measurement")
    out = []
    for r in fp_section.gap_rollup(doc, min_cell):
        n = r["n_features"]
        out.append({"severity": "review", "site": r["site"], "column": f"{n} feature{'s' if n != 1 else ''}",
                    "what": f"location or spread gaps (largest: {r['largest']})",
                    "evidence": f"{r['largest_kind']}, {r['largest_detail']}", "fix": fix, "note": "",
                    "href": r["href"]})
    return out


def _outcome_line(doc: Dict[str, Any]) -> Optional[Dict[str, Any]]:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return None
    cands = [c.get("feature") for c in o.get("shortcut_candidates") or []]
    if cands:
        return {"severity": "review", "site": "all", "column": ", ".join(cands), "what": "shortcut candidates",
                "evidence": "rank high both as site leakers and as outcome drivers",
                "fix": "repair or drop them before training; validate on a held-out site", "note": "",
                "href": "#outcome-shortcuts"}
    if excludes_zero(o.get("transport_gap_ci")):
        return {"severity": "review", "site": "all", "column": "the outcome model", "what": "transport gap",
                "evidence": f"pooled AUC exceeds leave-one-site-out by {num(o.get('transport_gap'))} "
                            f"(95% CI {ci(o.get('transport_gap_ci'))})",
                "fix": "report leave-one-site-out performance, not the pooled figure", "note": "",
                "href": "#outcome-transport"}
    return None


def model(doc: Dict[str, Any], min_cell: int) -> Dict[str, Any]:
    sites = (doc.get("input") or {}).get("sites") or {}
    rec = reconciled(doc)
    fps = sorted(doc.get("fingerprints") or [], key=fp_section.order_key)
    mech = _rolled(fps, sites, min_cell, rec)
    hyg = _hygiene_lines(doc, {(f.get("feature"), f.get("site")) for f in fps})
    gaps = _gap_lines(doc, min_cell)
    out_line = _outcome_line(doc)
    from .drift import next_lines as drift_lines  # changes over time at one site (--time)

    tail = gaps + drift_lines(doc) + ([out_line] if out_line else [])
    first = hyg + mech
    room = max(MIN_MECHANICAL, MAX_LINES - len(tail) - 1)
    if len(tail) > MAX_LINES - min(room, len(first)):
        tail = tail[:max(1, MAX_LINES - min(room, len(first)) - 1)]
    lines = first[:room]
    more = len(first) - len(lines)
    lines += tail
    plan = entries_by_finding(doc)
    lines = [with_plan(x, plan) for x in lines]
    full_rows = [[Cell(x["severity"], cls="sev-" + x["severity"]), x["site"], Cell(x["column"], href=x["href"]),
                  x["what"], x["evidence"], x["fix"],
                  Cell(", ".join(r["id"] for r in x["plan"]), href=x["plan"][0]["href"]) if x["plan"] else ""]
                 for x in [with_plan(y, plan) for y in first] + [_fp_line(f, sites, min_cell, rec) | {"plan": []}
                                                               for f in fps if f.get("kind") in DISTRIBUTION]]
    full = Table([Col("severity"), Col("site"), Col("column"), Col("what"), Col("evidence", wide=True),
                  Col("fix", wide=True), Col("plan entry")], [],
                 folded=full_rows, folded_note=f"the full list ({len(full_rows)} items; also in fingerprints.csv)")
    return {"id": "next", "title": "What to do next", "lines": lines, "more": more, "full": full,
            "n_all": len(full_rows), "glance": glance(doc)}


def glance(doc: Dict[str, Any]) -> List[Dict[str, Any]]:
    """The headline answers, each a label and text (our own words around the document's numbers)."""
    items = []
    p = doc.get("probe")
    if isinstance(p, dict) and p.get("auc") is not None:
        items.append({"label": "Site probe", "text": f"{p.get('verdict')}: AUC {num(p.get('auc'))} "
                      f"(95% CI {ci(p.get('auc_ci'))})", "href": "#probe"})
    top = [e["feature"] for e in (doc.get("leakage") or []) if excludes_zero(e.get("score_ci"))][:5]
    if doc.get("leakage"):
        items.append({"label": "Carried mostly by",
                      "text": ", ".join(top) if top else "no single feature (every drop interval includes 0)",
                      "href": "#leakage"})
    fps = doc.get("fingerprints")
    if fps is not None:
        kinds: Dict[str, int] = {}
        for f in fps:
            kinds[artefact(f.get("kind"))] = kinds.get(artefact(f.get("kind")), 0) + 1
        items.append({"label": "Fingerprints", "text": ", ".join(f"{k} ({v})" for k, v in kinds.items()) or "none",
                      "href": "#fingerprints"})
    from .drift import glance_item as drift_glance

    drift = drift_glance(doc)
    if drift:
        items.append(drift)
    o = doc.get("outcome")
    if isinstance(o, dict) and o.get("pooled_auc") is not None:
        items.append({"label": "Outcome", "text": f"site-only AUC {num(o.get('site_only_auc'))}, pooled model AUC "
                      f"{num(o.get('pooled_auc'))}, transport gap {num(o.get('transport_gap'))} "
                      f"({ci(o.get('transport_gap_ci'))}). {gap_sentence(o)}", "href": "#outcome"})
    return items
