"""Report section: the repair loop -- the site signal left after the scan's safe
repairs, the repair plan, and the lab-export idioms read per column and site.

Rendering only: every number comes from ``doc["residual"]``, ``doc["repair"]`` and
``doc["columns"]``. Data text is escaped; counts go through ``suppress_count``.
"""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import ci, esc, num, table_html
from ..markdown import md_escape, md_table
from ..safety import suppress_count

_VALUES = ("The maps, the harmonisation check and the outcome analysis below were computed on the values "
           "{values}; the site probe, the leak ranking and the fingerprints above on the values as given.")


def _residual_rows(res: Dict[str, Any]) -> List[List[Any]]:
    return [[t.get("feature"), t.get("rank_given"), num(t.get("score_given")), ci(t.get("score_given_ci")),
             num(t.get("score_repaired")), ci(t.get("score_repaired_ci"))] for t in res.get("top") or []]


def _plan_rows(rep: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    return [[e.get("id"), e.get("kind"), e.get("column"), e.get("site") or "all sites", e.get("operation"),
             suppress_count(e.get("cells"), min_cell), "yes" if e.get("safe") else "no",
             "yes" if e.get("enabled") else "no", e.get("reason")] for e in rep.get("entries") or []]


def _idiom_rows(doc: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for c in doc.get("columns") or []:
        for site, idioms in (c.get("idioms") or {}).items():
            if not isinstance(idioms, dict):
                rows.append([c.get("name"), site, "withheld", ""])
                continue
            units = (c.get("units") or {}).get(site) or {}
            unit_txt = ", ".join(f"{u} ({suppress_count(n, min_cell)})" for u, n in units.items()) \
                if isinstance(units, dict) else ""
            rows.append([c.get("name"), site, ", ".join(f"{k.replace('_', ' ')} ({suppress_count(v, min_cell)})"
                                                        for k, v in idioms.items()), unit_txt])
    return rows


_PLAN_HEAD = ["entry", "finding", "column", "site", "repair", "cells", "safe", "enabled", "why"]
_TOP_HEAD = ["feature", "rank as given", "score as given", "95% CI", "score after repair", "95% CI"]
_IDIOM_HEAD = ["column", "site", "idioms read (cells)", "units written (cells)"]


def html(doc: Dict[str, Any], min_cell: int) -> str:
    rep, res = doc.get("repair"), doc.get("residual")
    idioms = _idiom_rows(doc, min_cell)
    if not rep and not res and not idioms:
        return ""
    parts = ['<h2 id="repair">What mechanical repairs would remove</h2>']
    if res:
        parts.append(f'<p class="verdict">{esc(res.get("statement"))}</p>')
        if res.get("auc_repaired") is not None:
            parts.append(f"<p>Site probe on {esc(suppress_count(res.get('n_used'), min_cell))} rows, as given: AUC "
                         f"{num(res.get('auc_given'))} (95% CI {ci(res.get('auc_given_ci'))}); after the safe repairs: "
                         f"{num(res.get('auc_repaired'))} (95% CI {ci(res.get('auc_repaired_ci'))}), verdict "
                         f"{esc(res.get('verdict_repaired'))}. What remains is case mix, or artefacts without a "
                         f"mechanical fix (offsets, recording grids, limits written as numbers).</p>")
            parts.append(f'<p class="muted">{esc(res.get("method"))}</p>')
        if res.get("top"):
            parts.append("<h3>Top of the leak ranking, before and after repair</h3>")
            parts.append(table_html(_TOP_HEAD, _residual_rows(res), numeric=(1, 2, 4)))
    if rep:
        parts.append(f'<p class="note">{esc(_VALUES.format(values=rep.get("values_for_maps_harmonisation_outcome")))}</p>')
        parts.append(f"<h3>Repair plan ({esc(rep.get('n_entries'))} entries, {esc(rep.get('n_safe'))} safe; file "
                     f"<code>{esc(rep.get('plan_file'))}</code>)</h3>")
        parts.append("<p>Edit <code>enabled</code> (and a censoring <code>policy</code>) in the file, then apply it "
                     "with <code>sitecheck repair DATA --plan repair_plan.json --out REPAIRED</code>; the input is "
                     "never modified. The scan applied the safe entries in memory.</p>")
        if rep.get("entries"):
            parts.append(table_html(_PLAN_HEAD, _plan_rows(rep, min_cell), numeric=(5,)))
        nr = rep.get("not_repaired") or []
        if nr:
            parts.append("<h3>Findings without a mechanical fix</h3>")
            parts.append(table_html(["finding", "column", "site", "why not"],
                                    [[f.get("kind"), f.get("feature"), f.get("site"), f.get("reason")] for f in nr]))
    if idioms:
        parts.append("<h3>Lab-export idioms read as numbers</h3>")
        parts.append("<p>Censored cells keep their limit with a flag; decimal commas, units and separators are read "
                     "where unambiguous for the site.</p>")
        parts.append(table_html(_IDIOM_HEAD, idioms))
    return "\n".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    rep, res = doc.get("repair"), doc.get("residual")
    idioms = _idiom_rows(doc, min_cell)
    if not rep and not res and not idioms:
        return ""
    parts = ["## What mechanical repairs would remove", ""]
    if res:
        parts += [md_escape(res.get("statement")), ""]
        if res.get("top"):
            parts += [md_table(_TOP_HEAD, _residual_rows(res)), ""]
    if rep:
        parts += [md_escape(_VALUES.format(values=rep.get("values_for_maps_harmonisation_outcome"))), ""]
        if rep.get("entries"):
            parts += [f"Repair plan `{md_escape(rep.get('plan_file'))}`:", "", md_table(_PLAN_HEAD, _plan_rows(rep, min_cell)), ""]
    if idioms:
        parts += ["Lab-export idioms read as numbers:", "", md_table(_IDIOM_HEAD, idioms), ""]
    return "\n".join(parts).rstrip() + "\n"
