"""Report section: drift within each site over the collection period (``--time``).

Rendering only: every number comes from ``doc["drift"]``. Data text (feature names, site labels,
artefact labels) is escaped by ``table_html``/``esc``; counts go through ``suppress_count`` (the
document is already suppressed: counts may be strings such as "<10", entries of small sites
"withheld"), so every value is formatted defensively.
"""
from __future__ import annotations

from typing import Any, Dict, List

from ..html import ci, embed_image, esc, num, pval, table_html
from ..markdown import md_escape
from ..safety import suppress_count

_SCOPE = {"site": "this site only", "several_sites": "this and some other sites at the same time",
          "network": "every site at once (network-wide)"}
_ASPECT = {"level": "level", "spread": "spread", "missing": "missing share", "artefact": "artefact share"}


def _ci(pair: Any, digits: int = 3) -> str:
    if not isinstance(pair, list) or len(pair) != 2 or not all(isinstance(v, (int, float)) for v in pair):
        return "–"
    return f"{pair[0]:.{digits}g} to {pair[1]:.{digits}g}"


def _g(v: Any, digits: int = 3) -> str:
    if isinstance(v, bool) or v is None:
        return "–"
    if isinstance(v, (int, float)):
        return f"{v:.{digits}g}"
    return str(v)


def _size(c: Dict[str, Any]) -> str:
    size = c.get("size")
    if c.get("aspect") == "spread":
        return f"x{_g(size)}" if size is not None else "–"
    if c.get("aspect") in ("missing", "artefact"):
        if not isinstance(size, (int, float)):
            return "–"
        ci = c.get("size_ci") or [None, None]
        inner = f" ({_g(ci[0] * 100 if isinstance(ci[0], (int, float)) else None)} to " \
                f"{_g(ci[1] * 100 if isinstance(ci[1], (int, float)) else None)})"
        return f"{size * 100:+.1f} points{inner}"
    return f"{_g(size)} ({_ci(c.get('size_ci'))})" if isinstance(size, (int, float)) else "–"


def _finding_rows(d: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for c in d.get("findings") or []:
        if not isinstance(c, dict):
            continue
        what = _ASPECT.get(c.get("aspect"), c.get("aspect"))
        if c.get("artefact"):
            what = f"{what}: {c['artefact']}"
        before = (c.get("before") or {}).get("n")
        after = (c.get("after") or {}).get("n")
        rows.append([c.get("site"), c.get("feature"), what, c.get("period"), c.get("detail"), _size(c),
                     _g(c.get("size_sd"), 2), pval(c.get("p_adj")), _SCOPE.get(c.get("scope"), c.get("scope")),
                     f"{suppress_count(before, min_cell)} / {suppress_count(after, min_cell)}"])
    return rows


_FINDING_HEAD = ["site", "feature", "what changed", "from", "in words", "size after - before (95% CI)",
                 "size (SD)", "p (adjusted)", "where", "values before / after"]


def _network_rows(d: Dict[str, Any]) -> List[List[Any]]:
    return [[g.get("feature"), g.get("artefact") or _ASPECT.get(g.get("aspect"), g.get("aspect")), g.get("period"),
             ", ".join(str(s) for s in g.get("sites") or [])] for g in d.get("network") or [] if isinstance(g, dict)]


def _probe_rows(d: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    rows = []
    for p in d.get("period_probe") or []:
        if not isinstance(p, dict):
            continue
        verdict = ("the features tell the later half apart beyond case mix" if p.get("flagged")
                   else "not beyond case mix")
        rows.append([p.get("site"), suppress_count(p.get("n"), min_cell), p.get("split_date"),
                     f"{num(p.get('auc'))} ({ci(p.get('auc_ci'))})",
                     f"{num(p.get('covariate_auc'))} ({ci(p.get('covariate_auc_ci'))})",
                     f"{num(p.get('increment'))} ({ci(p.get('increment_ci'))})", verdict,
                     ", ".join(p.get("left_out") or []) or "–"])
    return rows


_PROBE_HEAD = ["site", "held-out rows", "later half from", "AUC, features and covariates (95% CI)",
               "AUC, covariates alone (95% CI)", "increment (95% CI)", "reading", "left out (network-wide)"]


def _site_rows(d: Dict[str, Any], min_cell: int) -> List[List[Any]]:
    notes = d.get("time_notes") or {}
    rows = []
    for s in d.get("sites") or []:
        if not isinstance(s, dict):
            continue
        note = notes.get(s.get("site")) if isinstance(notes, dict) else None
        note = note if isinstance(note, dict) else {}
        counts = note.get("counts") if isinstance(note.get("counts"), dict) else {}
        periods = s.get("periods") or []
        span = f"{note.get('first') or '–'} to {note.get('last') or '–'}"
        rows.append([s.get("site"), s.get("unit") or "–", len(periods) if s.get("assessed") else "not assessed",
                     span, suppress_count(counts.get("without_date"), min_cell) if counts else "–",
                     note.get("format") or "–", s.get("reason") or ""])
    return rows


_SITE_HEAD = ["site", "period used", "periods", "dates", "rows without a usable date", "date format read",
              "note"]


def _intro(d: Dict[str, Any]) -> str:
    params = d.get("params") or {}
    cal = d.get("calibration") or {}
    return (f"Time column {d.get('time_column')}. Each site's rows are grouped by calendar month, or by quarter, "
            f"half-year or year where a site has fewer than {params.get('min_period_rows', 30)} rows a month "
            "(the period used is listed per site). For every feature, the median, the interquartile range, the "
            "missing share and the share of values on each artefact (a missing-value code, a limit, a recording "
            "grid) are followed period by period, and each series is searched for change points with PELT "
            "(ruptures). The penalty is set so that a series without any change triggers rarely "
            f"({cal.get('penalty', 'Bonferroni over the split points')}, at level {params.get('alpha', 0.05)}); "
            f"p-values are adjusted by Benjamini-Hochberg over the {d.get('n_series')} series searched, and a "
            "change counts only when it is also of practical size and not shared by every site at once: a change "
            "at every site together (a new guideline, a shared coding change) is listed apart as network-wide. "
            "The period probe asks, site by site, whether the features tell the later half of the collection "
            "period from the earlier half beyond the covariates. Changes found here describe the data as "
            "recorded; confirm them with the sites' laboratories and records teams before excluding or repairing "
            "a period.")


def html(doc: Dict[str, Any], min_cell: int) -> str:
    d = doc.get("drift")
    if not isinstance(d, dict):
        return ""
    parts = ["<h2 id=\"drift\">Drift over the collection period</h2>", f"<p>{esc(_intro(d))}</p>"]
    rows = _finding_rows(d, min_cell)
    if rows:
        parts.append("<h3>Changes at a site</h3>")
        parts.append(table_html(_FINDING_HEAD, rows, numeric=(6, 7), nowrap=(3, 5, 9), wide=(4,)))
        refs = _plan_refs_html(doc)
        if refs:
            parts.append(refs)
    else:
        parts.append("<p>No change over time passed its test at any site.</p>")
    net = _network_rows(d)
    if net:
        parts.append("<h3>Network-wide changes (every site at once; not a site effect)</h3>")
        parts.append(table_html(["feature", "what changed", "from about", "sites"], net))
    out_dir = doc.get("_out_dir")
    for rel in d.get("figures") or []:
        if str(rel).endswith(".png"):
            img = embed_image(out_dir, rel, alt=f"drift figure {rel}")
            if img:
                parts.append(f"<figure>{img}</figure>")
    probes = _probe_rows(d, min_cell)
    if probes:
        parts.append("<h3>Period probe: can the period be told from the features?</h3>")
        parts.append(table_html(_PROBE_HEAD, probes, nowrap=(2, 3, 4, 5)))
    others = [c for c in d.get("change_points") or [] if isinstance(c, dict) and not c.get("finding")]
    if others:
        parts.append(f"<p class='muted'>{len(others)} further change point(s) were found by the search but did not "
                     "pass the adjusted test, were too small to matter, or were network-wide; they are listed in "
                     "report.json under drift.change_points.</p>")
    parts.append("<h3>Periods by site</h3>")
    parts.append(table_html(_SITE_HEAD, _site_rows(d, min_cell), nowrap=(3,)))
    return "".join(parts)


def markdown(doc: Dict[str, Any], min_cell: int) -> str:
    """A few lines for findings.md: how the search was calibrated, one line per change at a site (with its
    repair-plan entry), the network-wide changes and the flagged period probes; the tables are in the HTML."""
    d = doc.get("drift")
    if not isinstance(d, dict):
        return ""
    params = d.get("params") or {}
    out = ["## Drift over the collection period", "",
           md_escape(f"Time column {d.get('time_column')}: per site and feature, monthly (or coarser) medians, spreads, "
                     f"missing and artefact shares searched for change points with PELT (ruptures), the penalty set "
                     f"for a false-alarm rate of at most {params.get('alpha', 0.05)} per series, p-values adjusted "
                     f"by Benjamini-Hochberg over the {d.get('n_series')} series searched."), ""]
    plan = _plan_ids(doc)
    found = [c for c in d.get("findings") or [] if isinstance(c, dict)]
    for c in found:
        ref = plan.get((c.get("feature"), c.get("site"), c.get("date")))
        out.append(md_escape(f"- {c.get('feature')} at {c.get('site')} from {c.get('period')}: {c.get('detail')}; "
                             f"size {_md_size(c)}, p (adjusted) {pval(c.get('p_adj'))}; "
                             f"{_SCOPE.get(c.get('scope'), c.get('scope'))}"
                             + (f"; repair plan {ref}" if ref else "") + "."))
    if not found:
        out.append("No change over time passed its test at any site.")
    net = _network_rows(d)
    if net:
        out += ["", md_escape("Network-wide changes (not site effects): "
                              + "; ".join(f"{r[0]} ({r[1]}) from about {r[2]}" for r in net) + ".")]
    flagged = [p.get("site") for p in d.get("period_probe") or [] if isinstance(p, dict) and p.get("flagged")]
    if flagged:
        out += ["", md_escape("The period probe tells the later half of the collection period apart beyond the "
                              f"covariates at: {', '.join(map(str, flagged))}.")]
    return "\n".join(out)


def _plan_refs_html(doc: Dict[str, Any]) -> str:
    """A line linking each repair-plan entry scoped to a change found here (its row in the plan table)."""
    from .repair import plan_anchor

    rep = doc.get("repair") if isinstance(doc.get("repair"), dict) else {}
    items = []
    for e in rep.get("entries") or []:
        per = e.get("period") if isinstance(e, dict) else None
        if not isinstance(per, dict):
            continue
        state = "enabled" if e.get("enabled") else "not enabled: enable it in the plan file once the site confirms"
        items.append(f'<a href="#{esc(plan_anchor(e.get("id")))}">{esc(e.get("id"))}</a> ({esc(e.get("column"))} at '
                     f'{esc(e.get("site"))} from {esc(per.get("from"))}; {state})')
    if not items:
        return ""
    return ("<p>Repair-plan entries that subtract a step over the later period: " + "; ".join(items)
            + ". A step may be real (a new population, a new referral pathway): ask the site first.</p>")


def _md_size(c: Dict[str, Any]) -> str:
    if c.get("aspect") == "level" and isinstance(c.get("size"), (int, float)):
        return f"{_g(c.get('size'))} (95% CI {_ci(c.get('size_ci'))})"
    return _size(c)


def _plan_ids(doc: Dict[str, Any]) -> Dict[tuple, str]:
    """(feature, site, change date) -> the id of the repair-plan entry scoped to that change."""
    rep = doc.get("repair") if isinstance(doc.get("repair"), dict) else {}
    out = {}
    for e in rep.get("entries") or []:
        per = e.get("period") if isinstance(e, dict) else None
        if isinstance(per, dict):
            out[(e.get("column"), e.get("site"), per.get("from"))] = e.get("id")
    return out


def next_lines(doc: Dict[str, Any]) -> List[Dict[str, Any]]:
    """Lines for "What to do next": one per change at a site (network-wide changes are not site effects)."""
    d = doc.get("drift")
    if not isinstance(d, dict):
        return []
    out = []
    plan = _plan_ids(doc)
    for c in d.get("findings") or []:
        if not isinstance(c, dict):
            continue
        ref = plan.get((c.get("feature"), c.get("site"), c.get("date")))
        fix = (f"ask the site what changed about {c.get('period')}; if the step is the measurement's, enable "
               f"plan entry {ref} to subtract it, else model the periods apart or leave one out" if ref else
               f"ask the site what changed about {c.get('period')}; harmonise or model the periods before "
               "and after apart, or leave one out")
        out.append({"severity": "review", "site": c.get("site") or "", "column": c.get("feature"),
                    "what": f"change over time from {c.get('period')}",
                    "evidence": c.get("detail", ""),
                    "fix": fix, "note": "", "href": "#drift",
                    "keys": [("drift_" + str(c.get("aspect")), c.get("feature"), c.get("site"))]})
    return out


def glance_item(doc: Dict[str, Any]):
    """The drift headline for "At a glance" (None without a time column)."""
    d = doc.get("drift")
    if not isinstance(d, dict):
        return None
    found = [c for c in d.get("findings") or [] if isinstance(c, dict)]
    text = ", ".join(f"{c.get('feature')} at {c.get('site')} from {c.get('period')}" for c in found[:4]) or \
        "no change at a site"
    if d.get("network"):
        text += f"; {len(d['network'])} network-wide change(s)"
    return {"label": "Drift over time", "text": text, "href": "#drift"}
