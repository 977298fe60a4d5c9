"""Report sections ``probe`` and ``groups``: can the site (or a group) be predicted from the features?

:func:`model` turns the document into one display model, which feeds both
``templates/sections/probe.html.j2`` and ``probe.md.j2``. Counts go through
:func:`~sitecheck.render.safety.suppress_count`; per-site statistics of sites
with fewer rows than ``min_cell`` are withheld.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from sitecheck.analyses.stats import at_permutation_floor  # the one floor rule

from ..fmt import DASH, ci, count, num, p_is, pval
from ..safety import suppress_count
from ..templating import Col, Table, figures_of, section_html, section_md

ID = "probe"
TITLE = "Can the site be predicted from the features?"

_WORDS = {
    "strong": "The site can be predicted from the features with high accuracy.",
    "moderate": "The site can be predicted from the features clearly better than chance.",
    "weak": "The site can be predicted from the features slightly better than chance.",
    "none": "The site could not be predicted from the features better than chance.",
}


def _small(n, min_cell) -> bool:
    try:
        return 0 < int(n) < min_cell
    except (TypeError, ValueError):
        return True


def _per_site(probe: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    for label, e in (probe.get("per_site") or {}).items():
        if not isinstance(e, dict) or _small(e.get("n"), min_cell):
            n = e.get("n") if isinstance(e, dict) else None
            rows.append([label, count(suppress_count(n, min_cell)) if n is not None else "withheld",
                         "withheld", "withheld"])
            continue
        rows.append([label, count(suppress_count(e.get("n"), min_cell)), num(e.get("auc")), ci(e.get("auc_ci"))])
    return Table([Col("site"), Col("rows", numeric=True), Col("AUC", "this site against the rest", True),
                  Col("95% CI", "bootstrap", True)], rows)


def _case_mix(cm: Dict[str, Any]) -> Dict[str, Any]:
    rows = []
    for key, name in (("covariates_only", "covariates alone"), ("with_features", "features + covariates")):
        e = cm.get(key) or {}
        rows.append([name, num(e.get("auc")), ci(e.get("auc_ci")), pval(e.get("p_value"), e.get("p_value_floor"))])
    inc = cm.get("increment") or {}
    rows.append(["what the features add", num(inc.get("auc")), ci(inc.get("auc_ci")), DASH])
    lo, hi = (inc.get("auc_ci") or [None, None])[:2]
    sentence = ""
    if lo is not None and lo > 0:
        sentence = ("The features tell the sites apart beyond what the covariates (case mix) explain: "
                    "the difference looks like measurement or recording, not only patients.")
    elif lo is not None and hi is not None and hi >= 0 >= lo:
        sentence = ("The features add no clear site signal beyond the covariates: the differences may be "
                    "explained by case mix.")
    return {"covariates": ", ".join(cm.get("covariates") or []), "sentence": sentence,
            "table": Table([Col("probe"), Col("AUC", "macro one-vs-rest", True), Col("95% CI", "bootstrap", True),
                            Col("p", "label permutation", True)], rows, sortable=False)}


def _within(wo: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    for key, e in wo.items():
        if e.get("auc") is None:
            rows.append([key, count(suppress_count(e.get("n"), min_cell)), DASH, DASH, DASH, e.get("skipped", "")])
        else:
            rows.append([key, count(suppress_count(e.get("n"), min_cell)), num(e.get("auc")), ci(e.get("auc_ci")),
                         pval(e.get("p_value"), e.get("p_value_floor")), e.get("verdict", "")])
    return Table([Col("outcome class"), Col("rows", numeric=True), Col("AUC", "site probe in this class", True),
                  Col("95% CI", "bootstrap", True), Col("p", "label permutation", True), Col("verdict")], rows)


def _groups(groups: Dict[str, Any], min_cell: int) -> Table:
    rows = []
    for col, e in groups.items():
        if e.get("auc") is None:
            rows.append([col, DASH, DASH, DASH, DASH, e.get("skipped", "skipped")])
            continue
        rows.append([col, count(suppress_count(e.get("n"), min_cell)), num(e.get("auc")), ci(e.get("auc_ci")),
                     pval(e.get("p_value"), e.get("p_value_floor")), e.get("verdict", "")])
    return Table([Col("group column"), Col("rows", numeric=True), Col("AUC", "macro one-vs-rest", True),
                  Col("95% CI", "bootstrap", True), Col("p", "label permutation", True), Col("verdict")], rows)


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    probe = doc.get("probe")
    groups = doc.get("groups")
    if not probe and not groups:
        return None
    m: Dict[str, Any] = {"id": ID, "title": TITLE, "probe": None, "groups": None, "group_id": "groups",
                         "figures": figures_of(doc, "probe")}
    if probe:
        n_used = count(suppress_count(probe.get("n_used"), min_cell))
        sub = (f" (a site-stratified subsample of {count(suppress_count(probe.get('n_total'), min_cell))})"
               if probe.get("subsampled") else "")
        lin = probe.get("linear") or {}
        cm = probe.get("case_mix")
        wo = probe.get("within_outcome")
        m["probe"] = {
            "verdict": probe.get("verdict") or "none",
            "headline": probe.get("verdict_text") or _WORDS.get(probe.get("verdict", "none"), ""),
            "auc": num(probe.get("auc")), "auc_ci": ci(probe.get("auc_ci")),
            "p": p_is(probe.get("p_value"), probe.get("p_value_floor")),
            "at_floor": at_permutation_floor(probe.get("p_value"), probe.get("p_value_floor")),
            "n_permutations": probe.get("n_permutations"),
            "balanced_accuracy": num(probe.get("balanced_accuracy")),
            "rows": n_used, "subsample": sub, "folds": probe.get("folds"),
            "linear": ({"auc": num(lin.get("auc")), "auc_ci": ci(lin.get("auc_ci"))} if lin else None),
            "caution": probe.get("caution", ""),
            "per_site": _per_site(probe, min_cell),
            "case_mix": _case_mix(cm) if cm else None,
            "within": _within(wo, min_cell) if wo else None,
            "within_note": ("The site probe's held-out predictions, scored among the patients of one outcome "
                            "class at a time: a site signal that appears here is not the outcome being more "
                            "common at some sites.") if wo else "",
            "interval_method": probe.get("interval_method", ""), "n_boot": probe.get("n_boot"),
            "p_method": probe.get("p_value_method", ""),
        }
    if groups:
        m["groups"] = _groups(groups, min_cell)
    return m


def headline(doc: Dict[str, Any]) -> Optional[Dict[str, str]]:
    """The verdict line for the top of the page and of findings.md."""
    probe = doc.get("probe")
    if not probe or probe.get("auc") is None:
        return None
    return {"verdict": probe.get("verdict") or "none",
            "text": probe.get("verdict_text") or _WORDS.get(probe.get("verdict", "none"), ""),
            "auc": num(probe.get("auc")), "auc_ci": ci(probe.get("auc_ci")),
            "p": p_is(probe.get("p_value"), probe.get("p_value_floor"))}


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("probe", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("probe", model(doc, min_cell))
