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


def _flags(het: Dict[str, Any]) -> Dict[str, List[str]]:
    """Notes per unit from the heterogeneity's lists of small and empty units."""
    out: Dict[str, List[str]] = {}
    for rate, few, none in (("tpr", "few positives", "no positives"), ("fpr", "few negatives", "no negatives")):
        h = het.get(rate) if isinstance(het, dict) else None
        if not isinstance(h, dict):
            continue
        for u in h.get("small_units") or []:
            out.setdefault(str(u), []).append(few)
        for u in h.get("empty_units") or []:
            out.setdefault(str(u), []).append(none)
    return out


def _rate_rows(per: Dict[str, Any], min_cell: int, het: Any = None) -> List[List[Any]]:
    rows = []
    flags = _flags(het or {})
    for unit, e in (per or {}).items():
        note = ", ".join(flags.get(str(unit), []))
        if _small(e, min_cell):
            rows.append([unit, suppress_count(e.get("n"), min_cell) if isinstance(e, dict) else "–", "", "",
                         WITHHELD, "", "", "", note])
        else:
            rows.append([unit, suppress_count(e.get("n"), min_cell), suppress_count(e.get("n_pos"), min_cell),
                         suppress_count(e.get("n_neg"), min_cell), _num(e.get("tpr")), ci(e.get("tpr_ci")),
                         _num(e.get("fpr")), ci(e.get("fpr_ci")), note])
    return rows


def _spreads(eo: Dict[str, Any]) -> str:
    return (f"TPR spread {_num(eo.get('tpr_spread'))} (95% CI {ci(eo.get('tpr_spread_ci'))}), "
            f"FPR spread {_num(eo.get('fpr_spread'))} (95% CI {ci(eo.get('fpr_spread_ci'))})")


_RATE_NAME = {"tpr": "TPR (true positive rate)", "fpr": "FPR (false positive rate)"}


def _pct(x: Any) -> str:
    return f"{100 * x:.0f}%" if isinstance(x, (int, float)) and not isinstance(x, bool) else "–"


def _pct_ci(pair: Any) -> str:
    if not pair or not isinstance(pair[0], (int, float)) or not isinstance(pair[1], (int, float)):
        return "–"
    return f"{100 * pair[0]:.0f}% to {100 * pair[1]:.0f}%"


def _perm_p(h: Dict[str, Any], key: str = "p_value") -> str:
    """A permutation p-value; at its floor 1 / (permutations + 1) it is shown as "<= floor"."""
    p, b = h.get(key), h.get("permutations")
    if isinstance(p, (int, float)) and isinstance(b, int) and b > 0 and p <= 1.0 / (b + 1) + 1e-12:
        return f"≤ {1.0 / (b + 1):.{max(3, len(str(b + 1)) - 1)}f}"
    return _p(p)


def _reading(h: Any, unit_word: str) -> str:
    """One sentence: does the rate differ across units beyond sampling noise?"""
    if not isinstance(h, dict) or h.get("tau2") is None:
        return f"not assessed (fewer than two {unit_word} with rows of this class)."
    used = h.get("units_used")
    sd = f"between-{unit_word[:-1]} SD of the true rates {_num(h.get('sd_rate'))} (95% CI {ci(h.get('sd_rate_ci'))})"
    if h.get("p_value") is None:
        return f"across the {used} {unit_word}: {sd}; no permutation null was computed."
    p = f"permutation p {_eq(_perm_p(h))}"
    if h.get("exceeds_noise"):
        return (f"differs across the {used} {unit_word} by more than sampling noise gives ({p}; {sd}; "
                f"I² {_pct(h.get('i2'))}).")
    return (f"does not differ across the {used} {unit_word} by more than sampling noise gives ({p}; {sd}). "
            f"This does not show the rates are equal: differences up to the upper bound are not ruled out.")


def _het_rows(het: Dict[str, Any]) -> List[List[Any]]:
    rows = []
    for rate in ("tpr", "fpr"):
        for label, h in ((rate.upper(), het.get(rate)),
                         (f"{rate.upper()} without small", (het.get(rate) or {}).get("without_small"))):
            if not isinstance(h, dict):
                continue
            nl = h.get("null") or {}
            rows.append([label, h.get("units_used"), f"{_num(h.get('sd_rate'))} ({ci(h.get('sd_rate_ci'))})",
                         f"{_pct(h.get('i2'))} ({_pct_ci(h.get('i2_ci'))})",
                         f"{_num(h.get('tau2'), 4)} ({ci(h.get('tau2_ci'), 4)})", _perm_p(h),
                         f"{_num(h.get('variance'), 4)} (null {_num((nl.get('variance') or {}).get('median'), 4)}; "
                         f"{_num((nl.get('variance') or {}).get('q95'), 4)}), p {_eq(_perm_p(h, 'variance_p_value'))}",
                         f"{_num(h.get('spread'))} (null {_num((nl.get('spread') or {}).get('median'))}; "
                         f"{_num((nl.get('spread') or {}).get('q95'))}), p {_eq(_perm_p(h, 'spread_p_value'))}"])
    return rows


def _eq(p: str) -> str:
    return p if p.startswith("≤") else f"= {p}"


_HET_HEAD = ["rate", "units", "between-unit SD of true rates (95% CI)", "I² (95% CI)",
             "tau², arcsine scale (95% CI, Q-profile)", "permutation p",
             "variance of observed rates (null median; 95th pct), p", "max − min (null median; 95th pct), p"]


def _small_sentence(het: Dict[str, Any], unit_word: str) -> str:
    t, f = het.get("tpr") or {}, het.get("fpr") or {}
    parts = []
    for h, cls in ((t, "positives"), (f, "negatives")):
        small, empty = h.get("small_units") or [], h.get("empty_units") or []
        if small:
            parts.append(f"{len(small)} of the {h.get('units_used')} {unit_word} have fewer than "
                         f"{het.get('min_count')} {cls}")
        if empty:
            parts.append(f"{len(empty)} have no {cls} (no {'TPR' if cls == 'positives' else 'FPR'}; left out)")
    if not parts:
        return f"Every {unit_word[:-1]} has at least {het.get('min_count')} positives and negatives."
    return ("; ".join(parts) + ". They are kept in the heterogeneity (their noise is modelled) and flagged in the "
            "table below; the rows marked \"without small\" repeat the analysis without them.")


def _het_html(eo: Dict[str, Any], unit_word: str, *, explain: bool = True) -> str:
    het = eo.get("heterogeneity")
    if not isinstance(het, dict):
        return f"<p>{esc(_spreads(eo))}; spreads are max minus min across units.</p>"
    lines = "".join(f"<li><b>{esc(_RATE_NAME[r])}</b> {esc(_reading(het.get(r), unit_word))}</li>"
                    for r in ("tpr", "fpr"))
    head = (f"<ul>{lines}</ul>" + table_html(_HET_HEAD, _het_rows(het), numeric=(1, 5))
            + f"<p>{esc(_small_sentence(het, unit_word))}</p>")
    if not explain:
        return head + (f"<p class='note'>Read as for the sites above. Kept for comparison: {esc(_spreads(eo))} "
                       "(bootstrap intervals).</p>")
    return (head
            + "<p class='note'>How to read this: each rate is compared across units on the Freeman-Tukey arcsine "
              "scale, which is defined at rates of 0 and 1 without a continuity correction. tau² is the "
              "DerSimonian-Laird between-unit variance (sampling noise removed) with its Q-profile interval, and "
              "the between-unit SD is the spread of the true rates it implies; I² is the share of the observed "
              "variation that is not noise. The null distribution comes from "
              f"{esc(het.get('permutations'))} permutations of the unit labels within each outcome class "
              "(positives for TPR, negatives for FPR), which keeps every unit's size. The max − min spread of "
              f"the observed rates is kept for comparison ({esc(_spreads(eo))}, bootstrap intervals): across "
              "many small units it is large even when every unit has the same true rates, so compare it with "
              "its null median, not with 0.</p>")


def _het_markdown(eo: Dict[str, Any], unit_word: str) -> List[str]:
    het = eo.get("heterogeneity")
    if not isinstance(het, dict):
        return [f"{_spreads(eo)} (max minus min across units).", ""]
    return ([f"- {_RATE_NAME[r]} {_reading(het.get(r), unit_word)}" for r in ("tpr", "fpr")] + [""]
            + [md_table(_HET_HEAD, _het_rows(het)), "", _small_sentence(het, unit_word), "",
               f"Kept for comparison: {_spreads(eo)}; across many small units the max - min spread is large "
               "even when the true rates are equal (compare it with its null median).", ""])


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


_RATE_HEAD = ["unit", "rows", "positives", "negatives", "TPR", "95% CI", "FPR", "95% CI", "note"]


def _brief(o: Dict[str, Any]) -> List[str]:
    """The section's lead: do TPR and FPR differ across sites beyond noise, then the transport gap."""
    out = []
    het = (o.get("equalized_odds") or {}).get("heterogeneity")
    if isinstance(het, dict):
        for r in ("tpr", "fpr"):
            out.append(f"Equalized odds, {_RATE_NAME[r]}: {_reading(het.get(r), 'sites')}")
    if o.get("transport_gap") is None:
        out.append(_gap_sentence(o))
    else:
        out.append(f"Transport gap {_num(o.get('transport_gap'))} (95% CI {ci(o.get('transport_gap_ci'))}). "
                   f"{_gap_sentence(o)}")
    return out


def html(doc: Dict[str, Any], min_cell: int) -> str:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return ""
    test = o.get("prevalence_test") or {}
    parts = ["<h2>Could a model use the site as a shortcut to the outcome?</h2>",
             f"<p>Outcome <code>{esc(o.get('outcome'))}</code>: {esc(suppress_count(o.get('n'), min_cell))} rows "
             f"with an outcome ({esc(suppress_count(o.get('n_missing'), min_cell))} rows with a missing outcome "
             "left out).</p>",
             "<div class='note'><b>In brief</b><ul>" + "".join(f"<li>{esc(b)}</li>" for b in _brief(o))
             + "</ul></div>",
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
        parts += ["<h3>Equalized odds across sites: do TPR and FPR differ by more than noise?</h3>",
                  f"<p>Baseline model at threshold {esc(_num(eo.get('threshold')))} "
                  f"({esc(eo.get('threshold_rule'))}); equalized odds asks for the same TPR and FPR at every "
                  "site (Hardt, Price and Srebro, NeurIPS 2016).</p>",
                  _het_html(eo, "sites"),
                  table_html(["site"] + _RATE_HEAD[1:], _rate_rows(eo.get("per_site"), min_cell,
                                                                   eo.get("heterogeneity")),
                             numeric=(1, 2, 3, 4, 6))]
    for g, ge in (o.get("equalized_odds_by_group") or {}).items():
        if not isinstance(ge, dict):
            continue
        parts += [f"<h3>Equalized odds by group: {esc(g)}</h3>",
                  f"<p>{esc(suppress_count(ge.get('n_missing'), min_cell))} rows with no group value left out.</p>",
                  _het_html(ge, "levels", explain=not eo),
                  table_html([str(g)] + _RATE_HEAD[1:], _rate_rows(ge.get("per_group"), min_cell,
                                                                   ge.get("heterogeneity")),
                             numeric=(1, 2, 3, 4, 6))]
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return ""
    test = o.get("prevalence_test") or {}
    text = ["## Outcome shortcut and transport risk", "",
            f"Outcome `{md_escape(o.get('outcome'))}`: {suppress_count(o.get('n'), min_cell)} rows with an outcome "
            f"({suppress_count(o.get('n_missing'), min_cell)} with a missing outcome left out).", ""]
    text += [f"- {b}" for b in _brief(o)]
    text += ["", "Prevalence by site "
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
                 "do TPR and FPR differ across sites by more than noise?", ""] + _het_markdown(eo, "sites") + [
                 md_table(["site"] + _RATE_HEAD[1:], _rate_rows(eo.get("per_site"), min_cell, eo.get("heterogeneity")))]
    for g, ge in (o.get("equalized_odds_by_group") or {}).items():
        if isinstance(ge, dict):
            text += ["", f"By group `{md_escape(g)}`:", ""] + _het_markdown(ge, "levels") + [
                     md_table([str(g)] + _RATE_HEAD[1:], _rate_rows(ge.get("per_group"), min_cell,
                                                                    ge.get("heterogeneity")))]
    return "\n".join(text)
