"""Report section: could a model use the site as a shortcut to the outcome?

Renders the ``outcome`` section of the report document. Per-site (and
per-group-level) statistics of units with fewer rows than ``min_cell`` are
withheld; counts go through :func:`~sitecheck.render.safety.suppress_count`.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..html import ci, esc, table_html, num, pval
from ..markdown import md_escape, md_table
from ..safety import suppress_count

WITHHELD = "withheld (fewer rows than the small-cell threshold)"


_num = num  # shared formatter (render/html.py)


_p = pval  # shared formatter (render/html.py)


def _small(entry: Any, min_cell: int) -> bool:
    """True when a per-unit entry must be withheld (already withheld, or n below min_cell)."""
    if not isinstance(entry, dict):
        return True
    n = entry.get("n")
    if isinstance(n, str):
        return True
    return isinstance(n, int) and n < min_cell


def _prevalence_rows(o: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for site, e in (o.get("prevalence") or {}).items():
        if _small(e, min_cell):
            rows.append([site, suppress_count(e.get("n"), min_cell) if isinstance(e, dict) else "–", WITHHELD, ""])
        else:
            rows.append([site, suppress_count(e.get("n"), min_cell), _num(e.get("p")), ci(e.get("ci"))])
    return rows


def _loso_rows(o: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for site, e in (o.get("loso") or {}).items():
        if _small(e, min_cell):
            rows.append([site, suppress_count(e.get("n"), min_cell) if isinstance(e, dict) else "–", "–",
                         WITHHELD, ""])
        else:
            rows.append([site, suppress_count(e.get("n"), min_cell), suppress_count(e.get("n_pos"), min_cell),
                         _num(e.get("auc")), ci(e.get("ci"))])
    return rows


def _shortcut_rows(o: Dict[str, Any]) -> List[List[Any]]:
    return [[c.get("feature"), _num(c.get("leak_score"), 4), c.get("leak_rank"), _num(c.get("importance"), 4),
             ci(c.get("importance_ci"), 4), c.get("importance_rank")]
            for c in (o.get("shortcut_candidates") or [])]


def _rate_rows(per: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for unit, e in (per or {}).items():
        if _small(e, min_cell):
            rows.append([unit, suppress_count(e.get("n"), min_cell) if isinstance(e, dict) else "–",
                         WITHHELD, "", "", ""])
        else:
            rows.append([unit, suppress_count(e.get("n"), min_cell), _num(e.get("tpr")), ci(e.get("tpr_ci")),
                         _num(e.get("fpr")), ci(e.get("fpr_ci"))])
    return rows


def _spreads(eo: Dict[str, Any]) -> str:
    return (f"TPR spread {_num(eo.get('tpr_spread'))} (95% CI {ci(eo.get('tpr_spread_ci'))}), "
            f"FPR spread {_num(eo.get('fpr_spread'))} (95% CI {ci(eo.get('fpr_spread_ci'))})")


def _gap_sentence(o: Dict[str, Any]) -> str:
    g, gci = o.get("transport_gap"), o.get("transport_gap_ci")
    if g is None:
        return "The transport gap could not be computed (no held-out site could be scored)."
    if gci and gci[0] is not None and gci[0] > 0:
        return ("The interval lies above 0: the pooled cross-validated AUC overstates how the model would "
                "do at a site it has not seen.")
    if gci and gci[1] is not None and gci[1] < 0:
        return "The interval lies below 0: held-out sites score better than the pooled estimate."
    return "The interval includes 0: no transport gap is shown at this sample size."


_RATE_HEAD = ["unit", "rows", "TPR", "95% CI", "FPR", "95% CI"]


def html(doc: Dict[str, Any], min_cell: int) -> str:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return ""
    test = o.get("prevalence_test") or {}
    parts = ["<h2>Could a model use the site as a shortcut to the outcome?</h2>",
             f"<p>Outcome <code>{esc(o.get('outcome'))}</code>: {esc(suppress_count(o.get('n'), min_cell))} rows "
             f"with an outcome ({esc(suppress_count(o.get('n_missing'), min_cell))} rows with a missing outcome "
             "left out).</p>",
             "<h3>Prevalence by site</h3>",
             table_html(["site", "rows", "prevalence", "95% CI (Wilson)"], _prevalence_rows(o, min_cell),
                        numeric=(1, 2)),
             f"<p>Chi-square test of equal prevalence: chi2 = {esc(_num(test.get('chi2'), 2))}, "
             f"df = {esc(test.get('df'))}, p = {esc(_p(test.get('p_value')))}.</p>",
             "<h3>Shortcut ceiling and transport</h3>",
             f"<p>Outcome AUC from the site label alone (each held-out row scored by its site's training "
             f"prevalence): {esc(_num(o.get('site_only_auc')))} (95% CI {esc(ci(o.get('site_only_auc_ci')))}). "
             f"Baseline outcome model ({esc(o.get('model'))}): pooled cross-validated AUC "
             f"{esc(_num(o.get('pooled_auc')))} (95% CI {esc(ci(o.get('pooled_auc_ci')))}); row-weighted mean "
             f"leave-one-site-out AUC {esc(_num(o.get('loso_mean_auc')))}; transport gap "
             f"<b>{esc(_num(o.get('transport_gap')))}</b> (95% CI {esc(ci(o.get('transport_gap_ci')))}). "
             f"{esc(_gap_sentence(o))}</p>",
             table_html(["held-out site", "rows", "positives", "AUC", "95% CI"], _loso_rows(o, min_cell),
                        numeric=(1, 2, 3)),
             "<h3>Shortcut candidates</h3>",
             f"<p>Rule: {esc(o.get('shortcut_rule'))}. Site-leak score from {esc(o.get('leak_source'))}; outcome "
             "importance is the held-out permutation importance of the baseline model (drop in AUC).</p>"]
    rows = _shortcut_rows(o)
    if rows:
        parts.append(table_html(["feature", "site-leak score", "leak rank", "outcome importance", "95% CI",
                                 "importance rank"], rows, numeric=(1, 2, 3, 5)))
    else:
        parts.append("<p>No feature ranks high both as a site leaker and as an outcome driver.</p>")
    eo = o.get("equalized_odds") or {}
    if eo:
        parts += ["<h3>Equalized odds across sites</h3>",
                  f"<p>Threshold {esc(_num(eo.get('threshold')))} ({esc(eo.get('threshold_rule'))}) on the "
                  f"out-of-fold predictions. {esc(_spreads(eo))}; spreads are max minus min across units "
                  "(Hardt, Price and Srebro, NeurIPS 2016).</p>",
                  table_html(["site"] + _RATE_HEAD[1:], _rate_rows(eo.get("per_site"), min_cell), numeric=(1, 2, 4))]
    for g, ge in (o.get("equalized_odds_by_group") or {}).items():
        if not isinstance(ge, dict):
            continue
        parts += [f"<h3>Equalized odds by group: {esc(g)}</h3>",
                  f"<p>{esc(_spreads(ge))}; {esc(suppress_count(ge.get('n_missing'), min_cell))} rows with no "
                  "group value left out.</p>",
                  table_html([str(g)] + _RATE_HEAD[1:], _rate_rows(ge.get("per_group"), min_cell),
                             numeric=(1, 2, 4))]
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return ""
    test = o.get("prevalence_test") or {}
    text = ["## Outcome shortcut and transport risk", "",
            f"Outcome `{md_escape(o.get('outcome'))}`: {suppress_count(o.get('n'), min_cell)} rows with an outcome "
            f"({suppress_count(o.get('n_missing'), min_cell)} with a missing outcome left out). Prevalence by site "
            f"(Wilson 95% CI); chi-square test of equality chi2 = {_num(test.get('chi2'), 2)}, df = {test.get('df')}, "
            f"p = {_p(test.get('p_value'))}.", "",
            md_table(["site", "rows", "prevalence", "95% CI"], _prevalence_rows(o, min_cell)), "",
            f"- Outcome AUC from the site label alone: {_num(o.get('site_only_auc'))} "
            f"(95% CI {ci(o.get('site_only_auc_ci'))}).",
            f"- Baseline model, pooled cross-validated AUC: {_num(o.get('pooled_auc'))} "
            f"(95% CI {ci(o.get('pooled_auc_ci'))}).",
            f"- Transport gap (pooled minus row-weighted leave-one-site-out AUC): {_num(o.get('transport_gap'))} "
            f"(95% CI {ci(o.get('transport_gap_ci'))}). {_gap_sentence(o)}", "",
            md_table(["held-out site", "rows", "positives", "AUC", "95% CI"], _loso_rows(o, min_cell)), ""]
    rows = _shortcut_rows(o)
    if rows:
        text += ["Shortcut candidates (" + md_escape(o.get("shortcut_rule")) + "):", "",
                 md_table(["feature", "site-leak score", "leak rank", "outcome importance", "95% CI",
                           "importance rank"], rows), ""]
    else:
        text += ["No feature ranks high both as a site leaker and as an outcome driver.", ""]
    eo = o.get("equalized_odds") or {}
    if eo:
        text += [f"Equalized odds at threshold {_num(eo.get('threshold'))} ({md_escape(eo.get('threshold_rule'))}): "
                 f"{_spreads(eo)}.", "",
                 md_table(["site"] + _RATE_HEAD[1:], _rate_rows(eo.get("per_site"), min_cell))]
    for g, ge in (o.get("equalized_odds_by_group") or {}).items():
        if isinstance(ge, dict):
            text += ["", f"By group `{md_escape(g)}`: {_spreads(ge)}.", "",
                     md_table([str(g)] + _RATE_HEAD[1:], _rate_rows(ge.get("per_group"), min_cell))]
    return "\n".join(text)
