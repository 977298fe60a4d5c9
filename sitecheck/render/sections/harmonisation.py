"""Report section ``harmonisation``: would harmonisation remove the site gaps,
and what would it erase of the outcome signal?

One row per method (site probe AUC after harmonisation, outcome AUC before and
after), then per method the features whose gap survives, with the reason.
Data text is escaped; counts go through
:func:`~sitecheck.render.safety.suppress_count`.
"""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import ci, esc, table_html, num, pval
from ..markdown import md_escape, md_table
from ..safety import suppress_count

_NAMES = {"centre": "per-site centring", "scale": "per-site standardisation",
          "quantile": "per-site quantile mapping", "combat": "ComBat (empirical Bayes)"}

_INTRO = ("Each method was fitted with the protected columns' effects kept and its values returned to each "
          "feature's common recording grid, as the harmonise command writes them; the site probe was run again "
          "with each method fitted within each training fold and applied to the held-out rows. A feature "
          "survives when its values still differ between sites by more than its recording grid explains "
          "(Kolmogorov-Smirnov, one site against the rest, Benjamini-Hochberg adjusted). The "
          "outcome AUC before and after (same folds) shows whether harmonisation erased real signal: a fall "
          "is over-correction; a rise with the outcome protected is expected and optimistic.")


_num = num  # shared formatter (render/html.py)


_p = pval  # shared formatter (render/html.py)


def _summary_rows(sec: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for method, d in sec.items():
        if not isinstance(d, dict):
            continue
        rows.append([_NAMES.get(method, method), _num(d.get("probe_auc")), ci(d.get("probe_auc_ci")),
                     suppress_count(d.get("n"), min_cell), len(d.get("surviving") or []),
                     _num(d.get("outcome_auc_before")), ci(d.get("outcome_auc_before_ci")),
                     _num(d.get("outcome_auc_after")), ci(d.get("outcome_auc_after_ci"))])
    return rows


_HEAD = ["method", "site AUC after", "95% CI", "rows", "features still differing", "outcome AUC before",
         "95% CI", "outcome AUC after", "95% CI"]


def _gap_rows(d: Dict[str, Any]) -> List[List[Any]]:
    return [[g.get("feature"), g.get("reason"), g.get("site"), _num(g.get("statistic")), _p(g.get("p_adj")),
             g.get("detail")] for g in d.get("surviving") or []]


_GAP_HEAD = ["feature", "reason", "site", "effect", "p (BH)", "detail"]


def _common(sec: Dict[str, Any]):
    first = next((d for d in sec.values() if isinstance(d, dict)), {})
    return (list(first.get("protected") or []), dict(first.get("unchanged") or {}),
            list(first.get("warnings") or []))


def html(doc: Dict[str, Any], min_cell: int) -> str:
    sec = doc.get("harmonisation")
    if not sec:
        return ""
    protected, unchanged, warnings = _common(sec)
    parts = ["<h2>Harmonisation: which gaps would survive, and what would be lost</h2>",
             f"<p>{esc(_INTRO)}</p>",
             f"<p>Protected: {esc(', '.join(protected) or 'none')}. Left unchanged: "
             f"{esc(', '.join(f'{k} ({v})' for k, v in unchanged.items()) or 'none')}.</p>"]
    if warnings:
        parts.append("<div class='note'><ul>" + "".join(f"<li>{esc(w)}</li>" for w in warnings) + "</ul></div>")
    parts.append(table_html(_HEAD, _summary_rows(sec, min_cell), numeric=(1, 3, 4, 5, 7)))
    for method, d in sec.items():
        if not isinstance(d, dict):
            continue
        rows = _gap_rows(d)
        parts.append(f"<h3>{esc(_NAMES.get(method, method))}: features still differing</h3>")
        if rows:
            parts.append(table_html(_GAP_HEAD, rows, numeric=(3, 4)))
        else:
            parts.append(f"<p class='muted'>None of the {esc(d.get('n_tested', 0))} features tested "
                         "still differs between sites.</p>")
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    sec = doc.get("harmonisation")
    if not sec:
        return ""
    protected, unchanged, warnings = _common(sec)
    out = ["## Harmonisation", "", md_escape(_INTRO), "",
           f"Protected: {md_escape(', '.join(protected) or 'none')}. Left unchanged: "
           f"{md_escape(', '.join(f'{k} ({v})' for k, v in unchanged.items()) or 'none')}.", ""]
    for w in warnings:
        out += [f"> {md_escape(w)}", ""]
    out += [md_table(_HEAD, _summary_rows(sec, min_cell)), ""]
    for method, d in sec.items():
        if not isinstance(d, dict):
            continue
        rows = _gap_rows(d)
        out += [f"### {md_escape(_NAMES.get(method, method))}: features still differing", ""]
        out += [md_table(_GAP_HEAD, rows) if rows else
                f"None of the {d.get('n_tested', 0)} features tested still differs between sites.", ""]
    return "\n".join(out).rstrip() + "\n"
