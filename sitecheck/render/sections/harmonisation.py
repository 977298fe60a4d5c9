"""Report section ``harmonisation``: would harmonisation remove the site gaps, and what would it erase?

One row per method (site probe AUC after harmonisation, outcome AUC before and
after), then one feature x method grid of the gaps that survive, each cell
naming why (one name per artefact, shared with the fingerprints) and its effect
with its unit. Gaps the protected covariates explain are kept on purpose and
folded away.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..fmt import DASH, ci, count, num, pct, pval
from ..safety import suppress_count
from ..templating import Cell, Col, Table, section_html, section_md
from ..words import harm_reason

ID = "harmonisation"
TITLE = "Harmonisation: which gaps would survive, and what would be lost"
NAMES = {"centre": "per-site centring", "scale": "per-site standardisation",
         "quantile": "per-site quantile mapping", "combat": "ComBat (empirical Bayes)"}
SHORT = {"centre": "centring", "scale": "standardising", "quantile": "quantile mapping", "combat": "ComBat"}
KEPT = "case mix (protected)"


def _effect(g: Dict[str, Any]) -> str:
    """The surviving gap's effect with its unit (the statistic differs by reason)."""
    r, v = g.get("reason"), g.get("statistic")
    if r == "missingness":
        return f"missing share {pct(v)} apart"
    if r == "floor or ceiling":
        return f"{pct(v)} of the site's values at one point"
    if r == "categorical, left unchanged":
        return f"Cramér's V {num(v, 2)}"
    return f"KS D {num(v, 2)}"


def _summary(sec: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    for method, d in sec.items():
        if not isinstance(d, dict):
            continue
        rows.append([NAMES.get(method, method), num(d.get("probe_auc")), ci(d.get("probe_auc_ci")),
                     pval(d.get("probe_p_value"), d.get("probe_p_value_floor")), count(suppress_count(d.get("n"), min_cell)),
                     len([g for g in d.get("surviving") or [] if g.get("reason") != KEPT]),
                     num(d.get("outcome_auc_before")), ci(d.get("outcome_auc_before_ci")),
                     num(d.get("outcome_auc_after")), ci(d.get("outcome_auc_after_ci"))])
    return Table([Col("method"), Col("site AUC after", "site probe re-run", True), Col("95% CI", "bootstrap", True),
                  Col("p", "label permutation", True), Col("rows", numeric=True),
                  Col("gaps left", "KS / χ² per feature, BH; case mix excluded", True),
                  Col("outcome AUC before", "same folds", True), Col("95% CI", "bootstrap", True),
                  Col("outcome AUC after", "same folds", True), Col("95% CI", "bootstrap", True)], rows,
                 sortable=False)


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    sec = doc.get("harmonisation")
    if not isinstance(sec, dict) or not sec:
        return None
    methods = [k for k, v in sec.items() if isinstance(v, dict)]
    first = sec[methods[0]] if methods else {}
    fp = {(f.get("feature"), f.get("site")): f.get("kind") for f in doc.get("fingerprints") or []}
    features: List[str] = []
    cells: Dict[str, Dict[str, Dict[str, Any]]] = {}
    for m in methods:
        for g in sec[m].get("surviving") or []:
            f = g.get("feature")
            if f not in cells:
                features.append(f)
                cells[f] = {}
            cells[f][m] = g
    rows, kept = [], []
    for f in features:
        row: List[Any] = [f]
        only_kept = True
        for m in methods:
            g = cells[f].get(m)
            if g is None:
                row.append(Cell("removed", cls="ok"))
                continue
            only_kept = only_kept and g.get("reason") == KEPT
            word = harm_reason(g.get("reason"), fp.get((f, g.get("site"))))
            site = f" at {g.get('site')}" if g.get("site") and g.get("reason") != KEPT else ""
            eff = "" if g.get("reason") == KEPT else f"; {_effect(g)}, p {pval(g.get('p_adj'))}"
            row.append(Cell(f"{word}{site}{eff}", cls="kept" if g.get("reason") == KEPT else "left",
                            title=g.get("detail") or ""))
        (kept if only_kept else rows).append(row)
    cols = [Col("feature")] + [Col(SHORT.get(m, m), "why the gap survives", wide=True) for m in methods]
    grid = Table(cols, rows, folded=kept, sortable=False,
                 folded_note=f"{len(kept)} features whose remaining gap the protected columns explain (case mix, "
                             "kept on purpose)")
    protected = ", ".join(first.get("protected") or []) or "none"
    unchanged = ", ".join(f"{k} ({v})" for k, v in (first.get("unchanged") or {}).items()) or "none"
    lines = []
    for m in methods:
        d = sec[m]
        left = len([g for g in d.get("surviving") or [] if g.get("reason") != KEPT])
        lines.append({"method": NAMES.get(m, m), "auc": num(d.get("probe_auc")), "auc_ci": ci(d.get("probe_auc_ci")),
                      "left": left, "before": num(d.get("outcome_auc_before")), "after": num(d.get("outcome_auc_after"))})
    return {"id": ID, "title": TITLE, "protected": protected, "unchanged": unchanged,
            "warnings": list(first.get("warnings") or []), "summary": _summary(sec, min_cell), "grid": grid,
            "n_tested": first.get("n_tested"), "lines": lines}


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("harmonisation", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("harmonisation", model(doc, min_cell))
