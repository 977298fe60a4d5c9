"""Report section: could a model use the site as a shortcut to the outcome?

Per-site (and per-group-level) statistics of units with fewer rows than
``min_cell`` are withheld; counts go through
:func:`~sitecheck.render.safety.suppress_count`.
"""
from __future__ import annotations

import re
from typing import Any, Dict, List, Optional

from ..fmt import DASH, ci, count, num, p_is, pval
from ..safety import suppress_count
from ..templating import Col, Table, section_html, section_md

ID = "outcome"
TITLE = "Could a model use the site as a shortcut to the outcome?"
WITHHELD = "withheld (fewer rows than the small-cell threshold)"
_SOURCES = {"leakage": "the leak ranking above"}


def plain(text: Any) -> str:
    """Text without internal (module or function) names in parentheses."""
    s = re.sub(r"\s*\((?:sitecheck|sklearn)\.[\w.]+\)", "", "" if text is None else str(text))
    return re.sub(r"\bsitecheck\.[\w.]+", "", s).strip()


def _small(entry: Any, min_cell: int) -> bool:
    if not isinstance(entry, dict):
        return True
    n = entry.get("n")
    if isinstance(n, str):
        return True
    return isinstance(n, int) and n < min_cell


def _n(e, min_cell):
    return count(suppress_count(e.get("n"), min_cell)) if isinstance(e, dict) else DASH


def _prevalence(o, min_cell) -> Table:
    rows = []
    for site, e in (o.get("prevalence") or {}).items():
        rows.append([site, _n(e, min_cell), WITHHELD, ""] if _small(e, min_cell) else
                    [site, _n(e, min_cell), num(e.get("p")), ci(e.get("ci"))])
    return Table([Col("site"), Col("rows", numeric=True), Col("prevalence", numeric=True),
                  Col("95% CI", "Wilson", True)], rows)


def _loso(o, min_cell) -> Table:
    rows = []
    for site, e in (o.get("loso") or {}).items():
        rows.append([site, _n(e, min_cell), DASH, WITHHELD, ""] if _small(e, min_cell) else
                    [site, _n(e, min_cell), count(suppress_count(e.get("n_pos"), min_cell)), num(e.get("auc")),
                     ci(e.get("ci"))])
    return Table([Col("held-out site"), Col("rows", numeric=True), Col("positives", numeric=True),
                  Col("AUC", "model trained on the other sites", True), Col("95% CI", "bootstrap", True)], rows)


def _shortcuts(o) -> Table:
    return Table([Col("feature"), Col("site-leak score", "AUC drop of the site probe", True),
                  Col("leak rank", numeric=True), Col("outcome importance", "AUC drop of the outcome model", True),
                  Col("95% CI", "t over folds", True), Col("importance rank", numeric=True)],
                 [[c.get("feature"), num(c.get("leak_score"), 4), c.get("leak_rank"), num(c.get("importance"), 4),
                   ci(c.get("importance_ci"), 4), c.get("importance_rank")] for c in (o.get("shortcut_candidates") or [])])


def _flags(het: Any) -> Dict[str, List[str]]:
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


def _rates(per, min_cell, unit: str, het: Any = None) -> Table:
    rows = []
    flags = _flags(het)
    for u, e in (per or {}).items():
        note = ", ".join(flags.get(str(u), [])) or DASH
        rows.append([u, _n(e, min_cell), "", "", WITHHELD, "", "", "", note] if _small(e, min_cell) else
                    [u, _n(e, min_cell), count(suppress_count(e.get("n_pos"), min_cell)),
                     count(suppress_count(e.get("n_neg"), min_cell)), num(e.get("tpr")), ci(e.get("tpr_ci")),
                     num(e.get("fpr")), ci(e.get("fpr_ci")), note])
    return Table([Col(unit), Col("rows", numeric=True), Col("positives", numeric=True),
                  Col("negatives", numeric=True), Col("TPR", "true-positive rate", True),
                  Col("95% CI", "Wilson", True), Col("FPR", "false-positive rate", True),
                  Col("95% CI", "Wilson", True), Col("note")], rows)


_RATE_NAME = {"tpr": "TPR (true positive rate)", "fpr": "FPR (false positive rate)"}


def _pct(x: Any) -> str:
    return f"{100 * x:.0f}%" if isinstance(x, (int, float)) and not isinstance(x, bool) else DASH


def _pct_ci(pair: Any) -> str:
    if not pair or not isinstance(pair[0], (int, float)) or not isinstance(pair[1], (int, float)):
        return DASH
    return f"{100 * pair[0]:.0f}% to {100 * pair[1]:.0f}%"


def _perm_p(h: Dict[str, Any], key: str = "p_value") -> str:
    """A permutation p-value; at its floor (``p_value_floor``, 1 / (permutations + 1)) it is shown as
    "≤ floor". The variance and spread p-values come from the same permutations, hence the same floor."""
    floor = h.get("p_value_floor")
    if floor is None:  # a document written before the floor was recorded
        b = h.get("permutations")
        floor = 1.0 / (b + 1) if isinstance(b, int) and b > 0 else None
    return pval(h.get(key), floor)


def _eq(p: str) -> str:
    return p if p[:1] in ("≤", "<") else f"= {p}"


def _reading(h: Any, unit_word: str) -> str:
    """One sentence: does the rate differ across units beyond sampling noise?"""
    if not isinstance(h, dict) or h.get("tau2") is None:
        return f"not assessed (fewer than two {unit_word} with rows of this class)."
    used = h.get("units_used")
    sd = f"between-{unit_word[:-1]} SD of the true rates {num(h.get('sd_rate'))} (95% CI {ci(h.get('sd_rate_ci'))})"
    if h.get("p_value") is None:
        return f"across the {used} {unit_word}: {sd}; no permutation null was computed."
    p = f"permutation p {_eq(_perm_p(h))}"
    if h.get("exceeds_noise"):
        return (f"differs across the {used} {unit_word} by more than sampling noise gives ({p}; {sd}; "
                f"I² {_pct(h.get('i2'))}).")
    return (f"does not differ across the {used} {unit_word} by more than sampling noise gives ({p}; {sd}). "
            f"This does not show the rates are equal: differences up to the upper bound are not ruled out.")


def _het_table(het: Dict[str, Any]) -> Table:
    rows = []
    for rate in ("tpr", "fpr"):
        for label, h in ((rate.upper(), het.get(rate)),
                         (f"{rate.upper()} without small units", (het.get(rate) or {}).get("without_small"))):
            if not isinstance(h, dict):
                continue
            nl = h.get("null") or {}
            rows.append([label, h.get("units_used"), f"{num(h.get('sd_rate'))} ({ci(h.get('sd_rate_ci'))})",
                         f"{_pct(h.get('i2'))} ({_pct_ci(h.get('i2_ci'))})",
                         f"{num(h.get('tau2'), 4)} ({ci(h.get('tau2_ci'), 4)})", _perm_p(h),
                         f"{num(h.get('variance'), 4)} (null {num((nl.get('variance') or {}).get('median'), 4)}; "
                         f"{num((nl.get('variance') or {}).get('q95'), 4)}), p {_eq(_perm_p(h, 'variance_p_value'))}",
                         f"{num(h.get('spread'))} (null {num((nl.get('spread') or {}).get('median'))}; "
                         f"{num((nl.get('spread') or {}).get('q95'))}), p {_eq(_perm_p(h, 'spread_p_value'))}"])
    return Table([Col("rate"), Col("units", numeric=True), Col("between-unit SD", "of true rates (95% CI)"),
                  Col("I²", "share not noise (95% CI)"), Col("tau²", "arcsine scale (95% CI, Q-profile)"),
                  Col("p", "permutation within class", True),
                  Col("variance of observed rates", "null median; 95th pct, p"),
                  Col("max − min", "null median; 95th pct, p")], rows, sortable=False)


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
            "table below; the rows marked \"without small units\" repeat the analysis without them.")


def _het(eo: Dict[str, Any], unit_word: str) -> Dict[str, Any]:
    het = eo.get("heterogeneity")
    if not isinstance(het, dict):
        return {"readings": [], "table": None, "small": "", "permutations": None, "spreads": _spreads(eo)}
    return {"readings": [{"rate": _RATE_NAME[r], "text": _reading(het.get(r), unit_word)} for r in ("tpr", "fpr")],
            "table": _het_table(het), "small": _small_sentence(het, unit_word),
            "permutations": het.get("permutations"), "spreads": _spreads(eo)}


def brief(o: Dict[str, Any]) -> List[str]:
    """The section's lead: do TPR and FPR differ across sites beyond noise, then the transport gap."""
    out = []
    het = (o.get("equalized_odds") or {}).get("heterogeneity")
    if isinstance(het, dict):
        for r in ("tpr", "fpr"):
            out.append(f"Equalized odds, {_RATE_NAME[r]}: {_reading(het.get(r), 'sites')}")
    if o.get("transport_gap") is None:
        out.append(gap_sentence(o))
    else:
        out.append(f"Transport gap {num(o.get('transport_gap'))} (95% CI {ci(o.get('transport_gap_ci'))}). "
                   f"{gap_sentence(o)}")
    return out


def _spreads(eo) -> str:
    return (f"TPR spread {num(eo.get('tpr_spread'))} (95% CI {ci(eo.get('tpr_spread_ci'))}), "
            f"FPR spread {num(eo.get('fpr_spread'))} (95% CI {ci(eo.get('fpr_spread_ci'))})")


def gap_sentence(o: Dict[str, Any]) -> str:
    g, gci = o.get("transport_gap"), o.get("transport_gap_ci")
    if g is None:
        return "The transport gap could not be computed (no held-out site could be scored)."
    if gci and gci[0] is not None and gci[0] > 0:
        return ("The interval lies above 0: the pooled cross-validated AUC overstates how the model would "
                "do at a site it has not seen.")
    if gci and gci[1] is not None and gci[1] < 0:
        return "The interval lies below 0: held-out sites score better than the pooled estimate."
    return "The interval includes 0: no transport gap is shown at this sample size."


def model(doc: Dict[str, Any], min_cell: int) -> Optional[Dict[str, Any]]:
    o = doc.get("outcome")
    if not isinstance(o, dict):
        return None
    test = o.get("prevalence_test") or {}
    eo = o.get("equalized_odds") or {}
    by_group = [{"name": g, "het": _het(ge, "levels"), "n_missing": count(suppress_count(ge.get("n_missing"), min_cell)),
                 "table": _rates(ge.get("per_group"), min_cell, str(g), ge.get("heterogeneity"))}
                for g, ge in (o.get("equalized_odds_by_group") or {}).items() if isinstance(ge, dict)]
    return {"id": ID, "title": TITLE, "outcome": o.get("outcome"),
            "n": count(suppress_count(o.get("n"), min_cell)), "n_missing": count(suppress_count(o.get("n_missing"), min_cell)),
            "prevalence": _prevalence(o, min_cell), "chi2": num(test.get("chi2"), 2), "df": test.get("df"),
            "prev_p": p_is(test.get("p_value")),
            "site_only_auc": num(o.get("site_only_auc")), "site_only_ci": ci(o.get("site_only_auc_ci")),
            "model": plain(o.get("model")), "pooled_auc": num(o.get("pooled_auc")), "pooled_ci": ci(o.get("pooled_auc_ci")),
            "loso_mean": num(o.get("loso_mean_auc")), "gap": num(o.get("transport_gap")),
            "gap_ci": ci(o.get("transport_gap_ci")), "gap_sentence": gap_sentence(o), "loso": _loso(o, min_cell),
            "rule": plain(o.get("shortcut_rule")), "source": _SOURCES.get(o.get("leak_source"), plain(o.get("leak_source"))),
            "shortcuts": _shortcuts(o),
            "eo": ({"threshold": num(eo.get("threshold")), "rule": plain(eo.get("threshold_rule")), "het": _het(eo, "sites"),
                    "table": _rates(eo.get("per_site"), min_cell, "site", eo.get("heterogeneity"))} if eo else None),
            "brief": brief(o),
            "by_group": by_group}


def html(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as HTML ("" when absent), from :func:`model` and its template."""
    return section_html("outcome", model(doc, min_cell))


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """The section as Markdown ("" when absent), from :func:`model` and its template."""
    return section_md("outcome", model(doc, min_cell))
