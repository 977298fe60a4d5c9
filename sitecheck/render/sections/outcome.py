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
from ..templating import Col, Table

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


def _rates(per, min_cell, unit: str) -> Table:
    rows = []
    for u, e in (per or {}).items():
        rows.append([u, _n(e, min_cell), WITHHELD, "", "", ""] if _small(e, min_cell) else
                    [u, _n(e, min_cell), num(e.get("tpr")), ci(e.get("tpr_ci")), num(e.get("fpr")), ci(e.get("fpr_ci"))])
    return Table([Col(unit), Col("rows", numeric=True), Col("TPR", "true-positive rate", True),
                  Col("95% CI", "Wilson", True), Col("FPR", "false-positive rate", True),
                  Col("95% CI", "Wilson", True)], rows)


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
    by_group = [{"name": g, "spreads": _spreads(ge), "n_missing": count(suppress_count(ge.get("n_missing"), min_cell)),
                 "table": _rates(ge.get("per_group"), min_cell, str(g))}
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
            "eo": ({"threshold": num(eo.get("threshold")), "rule": plain(eo.get("threshold_rule")), "spreads": _spreads(eo),
                    "table": _rates(eo.get("per_site"), min_cell, "site")} if eo else None),
            "by_group": by_group}
