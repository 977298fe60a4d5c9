"""Report section: which features carry the site signature (leak ranking).

Features whose AUC-drop interval lies above 0 are shown; the rest are folded
away. A fingerprinted feature near zero here is shown with the reason the
``reconciliation`` section of the document gives (redundant with which feature
or group), so no reader takes it for clean.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..fmt import DASH, ci, excludes_zero, num, pval
from ..templating import Cell, Col, Table, anchor, figures_of, section_html, section_md
from ..words import DISTRIBUTION, artefact

ID = "leakage"
TITLE = "What carries the site signature"
MD_NOTES = 8  # reconciled recording artefacts listed in findings.md


def redundancy_sentence(r: Dict[str, Any]) -> str:
    """Why a fingerprinted feature ranks near zero, from one reconciliation entry."""
    via = ", ".join(r.get("via") or [])
    drop = f"AUC drop {num(r.get('via_score'))} ({ci(r.get('via_score_ci'))})"
    reason = r.get("reason")
    if reason == "group":
        return f"permuted together with {via} (correlated or one panel); the group's {drop}"
    if reason == "same_site":
        return (f"{r.get('site')} is already told apart by {via} ({artefact(r.get('via_kind'))}, "
                f"rank {r.get('via_rank')}, {drop})")
    if reason == "site_gap":
        return (f"{r.get('site')} is already told apart by {via} (|SMD| {num(r.get('via_smd'), 2)} at that site, "
                f"rank {r.get('via_rank')}, {drop})")
    return "no other feature carries that site's difference; the probe's trees did not need this feature"


def reconciled(doc: Dict[str, Any]) -> Dict[str, List[Dict[str, Any]]]:
    out: Dict[str, List[Dict[str, Any]]] = {}
    for r in ((doc.get("reconciliation") or {}).get("entries") or []):
        out.setdefault(r.get("feature"), []).append(r)
    return out


def _cols(has_adj: bool) -> List[Col]:
    cols = [Col("rank", numeric=True), Col("feature"), Col("AUC drop", "held-out permutation", True),
            Col("95% CI", "t over folds", True), Col("permuted with", "correlated group or panel"),
            Col("max |SMD|", "one site vs the rest", True),
            Col("effect size", "ε² (Kruskal–Wallis) or Cramér's V (χ²)", True),
            Col("p: sites differ", "Kruskal–Wallis or χ², BH-adjusted", True)]
    if has_adj:
        cols.append(Col("p: after covariates", "same test on covariate residuals, BH", True))
    cols.append(Col("p: missing rate differs", "χ² of missing by site, BH", True))
    return cols


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    leak = doc.get("leakage")
    if not leak:
        return None
    meth = doc.get("leakage_method") or {}
    groups = {}
    for c in doc.get("clusters") or []:
        for f in c.get("members") or []:
            groups[f] = [g for g in c["members"] if g != f]
    has_adj = any(((e.get("univariate") or {}).get("adjusted_for_covariates")) for e in leak)
    rec = reconciled(doc)
    shown, folded = [], []
    for e in leak:
        u = e.get("univariate") or {}
        adj = u.get("adjusted_for_covariates") or {}
        miss = e.get("missing_by_site") or {}
        effect = u.get("epsilon_squared", u.get("cramers_v"))
        feat = Cell(e["feature"], title="; ".join(redundancy_sentence(r) for r in rec.get(e["feature"], [])),
                    cls="flag" if e["feature"] in rec else "")
        row = [e.get("rank"), feat, num(e.get("score")), ci(e.get("score_ci")),
               ", ".join(groups.get(e["feature"], [])) or DASH, num(u.get("max_abs_smd"), 2), num(effect),
               pval(u.get("p_adj"))]
        if has_adj:
            row.append(pval(adj.get("p_adj")) if adj else DASH)
        row.append(pval(miss.get("p_adj")))
        (shown if excludes_zero(e.get("score_ci")) else folded).append(row)
    table = Table(_cols(has_adj), shown, folded=folded,
                  folded_note=f"{len(folded)} features whose AUC-drop interval includes 0 (the probe does not "
                              "need them on their own)")
    crow_open, crow_fold = [], []
    for c in doc.get("clusters") or []:
        row = [", ".join(c["members"]), "correlated (Spearman)" if c.get("source") == "correlation"
               else str(c.get("source", "")).replace("panel ", "declared panel "), num(c.get("score")),
               ci(c.get("score_ci"))]
        (crow_open if excludes_zero(c.get("score_ci")) else crow_fold).append(row)
    clusters = Table([Col("members", wide=True), Col("kind"), Col("AUC drop", "held-out permutation, together", True),
                      Col("95% CI", "t over folds", True)], crow_open, folded=crow_fold,
                     folded_note=f"{len(crow_fold)} group{'s' if len(crow_fold) != 1 else ''} whose joint drop "
                                 "interval includes 0")
    notes, gap_notes = [], []
    for feat, rs in rec.items():
        for r in rs:
            (gap_notes if r.get("kind") in DISTRIBUTION else notes).append(
                {"feature": feat, "site": r.get("site"), "kind": artefact(r.get("kind")),
                          "rank": r.get("rank"), "drop": num(r.get("score")), "why": redundancy_sentence(r),
                 "href": "#" + anchor("fp", feat, r.get("site"), r.get("kind"))})
    mp = doc.get("missingness") if isinstance(doc.get("missingness"), dict) else None
    missing = None
    if mp and mp.get("auc") is not None:
        missing = {"n_features": len(mp.get("features") or []), "auc": num(mp.get("auc")), "auc_ci": ci(mp.get("auc_ci")),
                   "p": pval(mp.get("p_value"), mp.get("p_value_floor"))}
    return {"id": ID, "title": TITLE, "n_folds": meth.get("n_folds"), "n_repeats": meth.get("n_repeats"),
            "n_rows": meth.get("n_rows_per_fold"), "threshold": meth.get("cluster_threshold"),
            "table": table, "n_shown": len(shown), "n_all": len(leak), "clusters": clusters,
            "notes": notes, "gap_notes": gap_notes, "md_notes": notes[:MD_NOTES],
            "md_more": len(notes) - len(notes[:MD_NOTES]) + len(gap_notes), "missing": missing, "figures": figures_of(doc, "leakage"),
            "missing_figures": figures_of(doc, "missingness"),
            "top": [{"feature": r[1].text, "drop": r[2], "ci": r[3]} for r in shown[:10]]}


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("leakage", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("leakage", model(doc, min_cell))
