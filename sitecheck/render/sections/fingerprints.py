"""Report section: why features mark sites (fingerprints), with the reason in plain words.

Mechanical artefacts (unit, code, limit, grid, never measured, site-only
category, digit preference) come first, by severity; distribution gaps that
may be case mix (location and spread) follow in their own table, folded when
long. Every number comes from ``doc["fingerprints"]``; a finding about a site
with fewer than ``min_cell`` rows, or resting on a count below ``min_cell``,
shows no per-site numbers.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..fmt import DASH, count, pval
from ..safety import suppress_count
from ..templating import Cell, Col, Table, anchor, figures_of, section_html, section_md
from ..words import DISTRIBUTION, KIND_TEST, MECHANICAL, SEVERITY_ORDER, artefact

ID = "fingerprints"
TITLE = "Why features mark sites"
FOLD_GAPS_OVER = 12  # distribution-gap rows shown open up to this many
MD_MAX = 30  # mechanical findings listed in findings.md (the rest: fingerprints.csv)


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


def small(f: Dict[str, Any], sites: Dict[str, Any], min_cell: int) -> bool:
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


def _n_site(f: Dict[str, Any]):
    ev = f.get("evidence") or {}
    if isinstance(ev.get("at_site"), dict):
        return ev["at_site"].get("n")
    return ev.get("n")


def order_key(f: Dict[str, Any]):
    kind = f.get("kind")
    mech = 0 if kind in MECHANICAL else 1
    kind_pos = MECHANICAL.index(kind) if kind in MECHANICAL else len(MECHANICAL)
    return (mech, SEVERITY_ORDER.get(f.get("severity"), 3), kind_pos, str(f.get("feature")), str(f.get("site")))


def finding_id(f: Dict[str, Any]) -> str:
    return anchor("fp", f.get("feature"), f.get("site"), f.get("kind"))


def dist_figure_ids(doc: Dict[str, Any]) -> Dict[str, str]:
    """feature -> anchor of its per-site distribution figure."""
    return {fig.feature: fig.id for fig in figures_of(doc, "distributions") if fig.feature}


_COLS = [Col("severity"), Col("feature"), Col("site"), Col("artefact", "hover: what it usually means"),
         Col("what was found", wide=True), Col("suggested fix", wide=True), Col("p", "the kind's test, Bonferroni", True),
         Col("rows at site", numeric=True), Col("leak rank", "of the site probe", True), Col("plot")]


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    if "fingerprints" not in doc:
        return None
    sites = (doc.get("input") or {}).get("sites") or {}
    ranks = {e.get("feature"): e for e in (doc.get("leakage") or [])}
    rec = {(r.get("feature"), r.get("site"), r.get("kind")) for r in
           ((doc.get("reconciliation") or {}).get("entries") or [])}
    figs = dist_figure_ids(doc)
    mech, gaps, mech_ids, gap_ids = [], [], [], []
    for f in sorted(doc.get("fingerprints") or [], key=order_key):
        kind = f.get("kind", "")
        if small(f, sites, min_cell):
            detail = f"details withheld: fewer than {min_cell} rows behind this finding"
            p, n = "withheld", "withheld"
        else:
            detail = f.get("detail", "")
            p = pval((f.get("evidence") or {}).get("p_adj"))
            n = count(suppress_count(_n_site(f), min_cell))
        le = ranks.get(f.get("feature")) or {}
        key = (f.get("feature"), f.get("site"), kind)
        rank = Cell(f"{le.get('rank')} ¹" if key in rec else le.get("rank", DASH), href="#leakage" if le else "",
                    title="near 0 in the leak ranking: see the note under the ranking" if key in rec else "")
        fig = figs.get(f.get("feature"))
        row = [Cell(f.get("severity", ""), cls="sev-" + str(f.get("severity", ""))), f.get("feature"),
               f.get("site") or "", Cell(artefact(kind), title=f.get("explanation", "")), detail,
               f.get("suggested_fix", ""), p, n, rank, Cell("plot", href="#" + fig) if fig else DASH]
        if kind in DISTRIBUTION:
            gaps.append(row)
            gap_ids.append(finding_id(f))
        else:
            mech.append(row)
            mech_ids.append(finding_id(f))
    md_rows = [[f.get("severity", ""), f.get("feature"), f.get("site") or "", artefact(f.get("kind"))]
               for f in sorted(doc.get("fingerprints") or [], key=order_key) if f.get("kind") not in DISTRIBUTION]
    tests = doc.get("fingerprint_tests") or {}
    alpha = next((t["alpha"] for t in tests.values() if isinstance(t, dict) and t.get("alpha") is not None), None)
    gap_table = Table(list(_COLS), [] if len(gaps) > FOLD_GAPS_OVER else gaps,
                      folded=gaps if len(gaps) > FOLD_GAPS_OVER else [],
                      folded_note=f"all {len(gaps)} location and spread gaps",
                      row_ids=[] if len(gaps) > FOLD_GAPS_OVER else gap_ids,
                      folded_ids=gap_ids if len(gaps) > FOLD_GAPS_OVER else [])
    return {"id": ID, "title": TITLE, "alpha": f"{alpha:g}" if isinstance(alpha, (int, float)) else "the chosen level",
            "mechanical": Table(list(_COLS), mech, row_ids=mech_ids), "gaps": gap_table,
            "md_table": Table([Col("severity"), Col("feature"), Col("site"), Col("artefact")], md_rows[:MD_MAX]),
            "md_more": max(0, len(md_rows) - MD_MAX), "rollup": gap_rollup(doc, min_cell),
            "n_mech": len(mech), "n_gaps": len(gaps), "any_rec": bool(rec),
            "tests": [{"kind": artefact(k), "test": KIND_TEST.get(k, "")} for k in tests],
            "figures": figures_of(doc, "distributions")}


def _gap_size(f: Dict[str, Any]):
    """Order of gaps for "largest": location gaps by |SMD| first, then spread gaps by their SD ratio
    (or its inverse), both read from the finding's evidence."""
    ev = f.get("evidence") or {}
    smd, r = ev.get("smd"), ev.get("sd_ratio")
    if isinstance(smd, (int, float)) and not isinstance(smd, bool):
        return (1, abs(float(smd)))
    if isinstance(r, (int, float)) and not isinstance(r, bool) and r > 0:
        return (0, max(float(r), 1.0 / float(r)))
    return (0, 0.0)


def gap_rollup(doc: Dict[str, Any], min_cell: int = 10) -> List[Dict[str, Any]]:
    """Location and spread gaps rolled up per site: how many features, and the largest (by the
    finding's own effect size), in the order of the sites' counts."""
    per: Dict[str, Dict[str, Any]] = {}
    for f in doc.get("fingerprints") or []:
        if f.get("kind") not in DISTRIBUTION:
            continue
        site = str(f.get("site"))
        e = per.setdefault(site, {"site": site, "shift": set(), "scale": set(), "largest": None, "size": (-1, 0.0)})
        e[f["kind"]].add(f.get("feature"))
        size = _gap_size(f)
        if size > e["size"]:
            e["size"], e["largest"] = size, f
    out = []
    for site, e in per.items():
        big = e["largest"] or {}
        sites = (doc.get("input") or {}).get("sites") or {}
        detail = (f"details withheld: fewer than {min_cell} rows behind this finding"
                  if big and small(big, sites, min_cell) else big.get("detail", ""))
        out.append({"site": site, "n_shift": len(e["shift"]), "n_scale": len(e["scale"]),
                    "n_features": len(e["shift"] | e["scale"]), "largest": big.get("feature"),
                    "largest_kind": artefact(big.get("kind")), "largest_detail": detail,
                    "href": "#" + finding_id(big) if big else "#fingerprints-gaps"})
    out.sort(key=lambda e: (-e["n_features"], e["site"]))
    return out


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("fingerprints", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("fingerprints", model(doc, min_cell))
