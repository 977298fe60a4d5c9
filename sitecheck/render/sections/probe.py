"""Report sections ``probe`` and ``groups``: can the site (or a group) be predicted from the features?

The verdict comes first, in plain words, with the AUC and its interval; then
the per-site table, the linear second opinion, the case-mix increment, the
probe within outcome classes and the group probes. Data text is escaped;
counts go through :func:`~sitecheck.render.safety.suppress_count`; per-site
statistics of sites with fewer rows than ``min_cell`` are withheld.
"""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import ci, esc, table_html, num, pval
from ..markdown import md_escape, md_table
from ..safety import suppress_count

_WORDS = {
    "strong": "The site can be predicted from the features with high accuracy.",
    "moderate": "The site can be predicted from the features clearly better than chance.",
    "weak": "The site can be predicted from the features slightly better than chance.",
    "none": "The site could not be predicted from the features better than chance.",
}


_num = num  # shared formatter (render/html.py)


_p = pval  # shared formatter (render/html.py)


def _small(n, min_cell) -> bool:
    try:
        return 0 < int(n) < min_cell
    except (TypeError, ValueError):
        return True


def _per_site_rows(probe: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for label, e in (probe.get("per_site") or {}).items():
        if not isinstance(e, dict) or _small(e.get("n"), min_cell):
            n = e.get("n") if isinstance(e, dict) else None
            rows.append([label, suppress_count(n, min_cell) if n is not None else "withheld", "withheld", "withheld"])
            continue
        rows.append([label, suppress_count(e.get("n"), min_cell), _num(e.get("auc")), ci(e.get("auc_ci"))])
    return rows


def _case_mix_rows(cm: Dict[str, Any]) -> List[List[Any]]:
    rows = []
    for key, name in (("covariates_only", "covariates alone"), ("with_features", "features + covariates")):
        e = cm.get(key) or {}
        rows.append([name, _num(e.get("auc")), ci(e.get("auc_ci")), _p(e.get("p_value"))])
    inc = cm.get("increment") or {}
    rows.append(["increment the features add", _num(inc.get("auc")), ci(inc.get("auc_ci")), "–"])
    return rows


def _case_mix_sentence(cm: Dict[str, Any]) -> str:
    inc = cm.get("increment") or {}
    lo = (inc.get("auc_ci") or [None, None])[0]
    hi = (inc.get("auc_ci") or [None, None])[1]
    if lo is None:
        return ""
    if lo > 0:
        return ("The features tell the sites apart beyond what the covariates (case mix) explain: "
                "the difference looks like measurement or recording, not only patients.")
    if hi is not None and hi >= 0 >= lo:
        return ("The features add no clear site signal beyond the covariates: the differences may be "
                "explained by case mix.")
    return ""


def _within_rows(wo: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for key, e in wo.items():
        if e.get("auc") is None:
            rows.append([key, suppress_count(e.get("n"), min_cell), "–", "–", "–", e.get("skipped", "")])
        else:
            rows.append([key, suppress_count(e.get("n"), min_cell), _num(e.get("auc")), ci(e.get("auc_ci")),
                         _p(e.get("p_value")), e.get("verdict", "")])
    return rows


def _group_rows(groups: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for col, e in groups.items():
        if e.get("auc") is None:
            rows.append([col, "–", "–", "–", "–", e.get("skipped", "skipped")])
            continue
        rows.append([col, suppress_count(e.get("n"), min_cell), _num(e.get("auc")), ci(e.get("auc_ci")),
                     _p(e.get("p_value")), e.get("verdict", "")])
    return rows


def _headline(probe: Dict[str, Any]) -> str:
    v = probe.get("verdict", "none")
    return probe.get("verdict_text") or _WORDS.get(v, "")


def html(doc: Dict[str, Any], min_cell: int) -> str:
    parts: List[str] = []
    probe = doc.get("probe")
    if probe:
        parts.append("<h2>Can the site be predicted from the features?</h2>")
        parts.append(f"<p class='verdict'>Verdict: {esc(probe.get('verdict'))}. {esc(_headline(probe))}</p>")
        parts.append(
            f"<p>Out-of-fold macro one-vs-rest ROC AUC {esc(_num(probe.get('auc')))} "
            f"(95% CI {esc(ci(probe.get('auc_ci')))}), permutation p {esc(_p(probe.get('p_value')))}, "
            f"balanced accuracy {esc(_num(probe.get('balanced_accuracy')))}; "
            f"{esc(suppress_count(probe.get('n_used'), min_cell))} rows"
            + (f" (a site-stratified subsample of {esc(suppress_count(probe.get('n_total'), min_cell))})"
               if probe.get("subsampled") else "")
            + f", {esc(probe.get('folds'))} folds, model {esc(probe.get('model'))}. "
            "0.5 means the sites cannot be told apart; 1 means they separate perfectly.</p>")
        lin = probe.get("linear")
        if lin:
            parts.append(f"<p>Second opinion (logistic regression): AUC {esc(_num(lin.get('auc')))} "
                         f"(95% CI {esc(ci(lin.get('auc_ci')))}).</p>")
        parts.append(f"<p class='note'>{esc(probe.get('caution', ''))}</p>")
        rows = _per_site_rows(probe, min_cell)
        if rows:
            parts.append("<h3>Each site against the rest</h3>")
            parts.append(table_html(["site", "rows", "AUC", "95% CI"], rows, numeric=(1, 2)))
        cm = probe.get("case_mix")
        if cm:
            parts.append("<h3>Beyond case mix</h3>")
            parts.append(f"<p>Covariates: {esc(', '.join(cm.get('covariates', [])))}. {esc(_case_mix_sentence(cm))}</p>")
            parts.append(table_html(["probe", "AUC", "95% CI", "p"], _case_mix_rows(cm), numeric=(1,)))
        wo = probe.get("within_outcome")
        if wo:
            parts.append("<h3>Within each outcome class</h3>")
            parts.append(table_html(["outcome class", "rows", "AUC", "95% CI", "p", "verdict"],
                                    _within_rows(wo, min_cell), numeric=(1, 2)))
        parts.append(f"<p class='muted'>Interval: {esc(probe.get('interval_method', ''))} "
                     f"({esc(probe.get('n_boot'))} resamples). p-value: {esc(probe.get('p_value_method', ''))}. "
                     "Verdict thresholds on the interval's low end are sitecheck's own convention: strong &ge; 0.80, "
                     "moderate &ge; 0.65, weak &gt; 0.50.</p>")
    groups = doc.get("groups")
    if groups:
        parts.append("<h2>Can a group be predicted from the features?</h2>")
        parts.append("<p>The same probe, predicting each group column instead of the site.</p>")
        parts.append(table_html(["group column", "rows", "AUC", "95% CI", "p", "verdict"],
                                _group_rows(groups, min_cell), numeric=(1, 2)))
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    parts: List[str] = []
    probe = doc.get("probe")
    if probe:
        parts += ["## Can the site be predicted from the features?", "",
                  f"**Verdict: {md_escape(probe.get('verdict'))}.** {md_escape(_headline(probe))}", "",
                  f"Out-of-fold macro one-vs-rest ROC AUC {_num(probe.get('auc'))} "
                  f"(95% CI {ci(probe.get('auc_ci'))}), permutation p {_p(probe.get('p_value'))}, "
                  f"balanced accuracy {_num(probe.get('balanced_accuracy'))}; "
                  f"{md_escape(suppress_count(probe.get('n_used'), min_cell))} rows, {md_escape(probe.get('folds'))} folds, "
                  f"model {md_escape(probe.get('model'))}.", ""]
        lin = probe.get("linear")
        if lin:
            parts += [f"Second opinion (logistic regression): AUC {_num(lin.get('auc'))} "
                      f"(95% CI {ci(lin.get('auc_ci'))}).", ""]
        parts += [f"*{md_escape(probe.get('caution', ''))}*", ""]
        rows = _per_site_rows(probe, min_cell)
        if rows:
            parts += [md_table(["site", "rows", "AUC", "95% CI"], rows), ""]
        cm = probe.get("case_mix")
        if cm:
            parts += ["### Beyond case mix", "", md_escape(_case_mix_sentence(cm)), "",
                      md_table(["probe", "AUC", "95% CI", "p"], _case_mix_rows(cm)), ""]
        wo = probe.get("within_outcome")
        if wo:
            parts += ["### Within each outcome class", "",
                      md_table(["outcome class", "rows", "AUC", "95% CI", "p", "verdict"], _within_rows(wo, min_cell)), ""]
    groups = doc.get("groups")
    if groups:
        parts += ["## Can a group be predicted from the features?", "",
                  md_table(["group column", "rows", "AUC", "95% CI", "p", "verdict"], _group_rows(groups, min_cell)), ""]
    return "\n".join(parts).rstrip("\n")
