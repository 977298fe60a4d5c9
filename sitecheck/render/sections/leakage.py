"""Report section: which features carry the site signature (leak ranking)."""
from __future__ import annotations

from typing import Any, Dict

from ..html import ci, esc, fmt, table_html, num, pval
from ..markdown import md_table


_num = num  # shared formatter (render/html.py)


_p = pval  # shared formatter (render/html.py)


def _rows(doc: Dict[str, Any], limit: int = 25):
    rows = []
    for e in (doc.get("leakage") or [])[:limit]:
        u = e.get("univariate") or {}
        adj = u.get("adjusted_for_covariates") or {}
        m = e.get("missing_by_site") or {}
        effect = u.get("epsilon_squared", u.get("cramers_v"))
        rows.append([e["rank"], e["feature"], _num(e["score"]), ci(e["score_ci"]), e["cluster"],
                     _num(u.get("max_abs_smd"), 2), _num(effect), _p(u.get("p_adj")),
                     _p(adj.get("p_adj")) if adj else "–", _p(m.get("p_adj"))])
    return rows


_HEAD = ["rank", "feature", "AUC drop", "95% CI", "cluster", "max |SMD|", "effect size", "p (BH)",
         "p (BH), covariate-adjusted", "missing-rate p (BH)"]


def _clusters(doc):
    return [[", ".join(c["members"]), c.get("source", ""), _num(c["score"]), ci(c["score_ci"])]
            for c in (doc.get("clusters") or [])]


def html(doc: Dict[str, Any], min_cell: int) -> str:
    if not doc.get("leakage"):
        return ""
    meth = doc.get("leakage_method") or {}
    parts = ["<h2>What carries the site signature</h2>",
             f"<p>Score: {esc(meth.get('score', 'drop in held-out AUC'))}, averaged over {esc(meth.get('n_folds'))} folds "
             f"x {esc(meth.get('n_repeats'))} repeats (up to {esc(meth.get('n_rows_per_fold'))} held-out rows per fold); "
             "intervals are t intervals over folds. Univariate columns: the largest standardised mean difference of "
             "one site against the rest (|SMD| &gt; 0.1 is a common-practice flag), epsilon-squared (Kruskal-Wallis) or "
             "Cramer's V (chi-square), Benjamini-Hochberg adjusted.</p>",
             table_html(_HEAD, _rows(doc), numeric=(0, 2, 4, 5, 6, 7, 8, 9))]
    cl = _clusters(doc)
    if cl:
        parts += ["<h3>Features permuted together</h3>",
                  "<p>Correlated features (Spearman |rho| above the threshold) and declared panels, permuted jointly so "
                  "that redundancy cannot hide a leaking group.</p>",
                  table_html(["members", "source", "AUC drop", "95% CI"], cl, numeric=(2,))]
    mp = doc.get("missingness")
    if mp and isinstance(mp, dict) and mp.get("auc") is not None:
        parts.append(f"<p>Missingness alone: a probe on the missing-value indicators of "
                     f"{esc(len(mp.get('features', [])))} features reaches AUC {_num(mp.get('auc'))} "
                     f"(95% CI {ci(mp.get('auc_ci'))}).</p>")
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    if not doc.get("leakage"):
        return ""
    rows = [r[:4] + [r[5], r[7]] for r in _rows(doc, limit=10)]
    text = ["## What carries the site signature", "",
            "Held-out permutation importance of the site probe (drop in macro AUC), top features:", "",
            md_table(["rank", "feature", "AUC drop", "95% CI", "max |SMD|", "p (BH)"], rows)]
    cl = _clusters(doc)
    if cl:
        text += ["", "Groups permuted together:", "", md_table(["members", "source", "AUC drop", "95% CI"], cl)]
    return "\n".join(text)
