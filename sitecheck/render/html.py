"""Self-contained HTML report. Every string from the data is escaped."""
from __future__ import annotations

import html
from typing import Any, Dict, List

from .safety import suppress_count

DISCLAIMER = ("sitecheck is decision support for data work, not a clinical device. Its findings "
              "describe the data, not patients; act on them under your local data-governance "
              "rules and licensed clinical and statistical practice.")

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#1a1a1a;line-height:1.45}
h1{font-size:1.6em}h2{border-bottom:2px solid #ddd;padding-bottom:.2em;margin-top:2em}
table{border-collapse:collapse;margin:.8em 0;font-size:.92em}th,td{border:1px solid #ccc;padding:.25em .6em;text-align:left}
th{background:#f3f3f3;cursor:pointer}td.n{text-align:right;font-variant-numeric:tabular-nums}
.note{background:#fff8e1;border-left:4px solid #f0b400;padding:.6em 1em}.verdict{font-size:1.3em;font-weight:600}
.muted{color:#666}img{max-width:100%}
.failed{background:#fdecea;border-left:4px solid #c62828;padding:.6em 1em}
"""

_SORT_JS = """
document.querySelectorAll('table.sortable th').forEach(function(th,i){th.addEventListener('click',function(){
var t=th.closest('table'),b=t.tBodies[0],r=Array.from(b.rows),d=th.dataset.d==='a'?-1:1;th.dataset.d=d>0?'a':'d';
r.sort(function(x,y){var a=x.cells[i].dataset.v||x.cells[i].textContent,c=y.cells[i].dataset.v||y.cells[i].textContent;
var fa=parseFloat(a),fc=parseFloat(c);if(!isNaN(fa)&&!isNaN(fc))return d*(fa-fc);return d*a.localeCompare(c);});
r.forEach(function(x){b.appendChild(x);});});});
"""


def esc(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def fmt(value: Any, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def num(value: Any, digits: int = 3) -> str:
    """A number for a table cell: fixed decimals; "–" for missing; strings (such as
    a suppressed count "<10" or "withheld") pass through."""
    if value is None or isinstance(value, bool):
        return "–"
    if isinstance(value, (int, float)):
        return f"{value:.{digits}f}"
    return str(value)


def pval(value: Any) -> str:
    """A p-value for a table cell: "< 0.001" below 0.001, else three decimals."""
    if value is None or isinstance(value, bool) or not isinstance(value, (int, float)):
        return "–" if value is None or isinstance(value, bool) else str(value)
    return "< 0.001" if value < 0.001 else f"{value:.3f}"


def ci(pair: Any, digits: int = 3) -> str:
    if not pair or pair[0] is None:
        return "–"
    return f"{pair[0]:.{digits}f} to {pair[1]:.{digits}f}"


def table_html(headers: List[str], rows: List[List[Any]], *, numeric: tuple = ()) -> str:
    out = ['<table class="sortable"><thead><tr>']
    out += [f"<th>{esc(h)}</th>" for h in headers]
    out.append("</tr></thead><tbody>")
    for row in rows:
        out.append("<tr>")
        for j, cell in enumerate(row):
            cls = ' class="n"' if j in numeric else ""
            out.append(f"<td{cls}>{esc(cell)}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _hygiene(doc: Dict[str, Any], min_cell: int) -> str:
    parts = ["<h2>Data hygiene</h2>"]
    rows = [[c["name"], c["role"], c["kind"], c["reason"], suppress_count(c.get("n_missing", 0), min_cell),
             ", ".join(f"{k} ({suppress_count(v, min_cell)})" for k, v in c.get("missing_codes", {}).items())]
            for c in doc.get("columns", [])]
    parts.append(table_html(["column", "role", "kind", "reason", "missing", "missing codes"], rows, numeric=(4,)))
    if doc.get("hygiene"):
        parts.append("<h3>Findings before modelling</h3>")
        parts.append(table_html(["column", "finding", "site", "detail"],
                                [[f["column"], f["kind"], f.get("site", ""), f["detail"]] for f in doc["hygiene"]]))
    if doc.get("warnings"):
        parts.append("<h3>Warnings</h3><ul>" + "".join(f"<li>{esc(w)}</li>" for w in doc["warnings"]) + "</ul>")
    return "".join(parts)


def _methods(doc: Dict[str, Any]) -> str:
    run = doc.get("run", {})
    inp = doc.get("input", {})
    rows = [["input file", inp.get("path")], ["SHA-256", inp.get("sha256")], ["seed", run.get("seed")],
            ["schema", doc.get("schema")]]
    rows += [[f"version: {k}", v] for k, v in run.get("versions", {}).items()]
    rows += [[f"seconds: {k}", v] for k, v in run.get("seconds", {}).items()]
    rows += [[f"option: {k}", v] for k, v in run.get("options", {}).items()]
    return "<h2>Methods, caveats and reproducibility</h2>" + table_html(["item", "value"], rows)


def embed_image(out_dir, rel: str, alt: str = "") -> str:
    """An <img> with the PNG at ``out_dir/rel`` embedded as a data URI (self-contained page)."""
    import base64
    import os

    if not out_dir:
        return ""
    path = os.path.join(out_dir, rel)
    if not os.path.exists(path):
        return ""
    with open(path, "rb") as fh:
        data = base64.b64encode(fh.read()).decode("ascii")
    return f'<img alt="{esc(alt)}" src="data:image/png;base64,{data}">'


def _at_a_glance(doc: Dict[str, Any]) -> str:
    """A short box with the headline answers, drawn from the sections present."""
    items = []
    p = doc.get("probe")
    if isinstance(p, dict) and p.get("auc") is not None:
        items.append(f"<li><b>Site probe:</b> verdict <span class='verdict'>{esc(p.get('verdict'))}</span>, "
                     f"AUC {fmt(p.get('auc'))} (95% CI {ci(p.get('auc_ci'))}).</li>")
    leak = doc.get("leakage") or []
    if leak:
        top = [e["feature"] for e in leak[:5] if isinstance(e.get("score_ci"), list) and (e["score_ci"][0] or 0) > 0]
        if top:
            items.append("<li><b>Carried mostly by:</b> " + ", ".join(esc(t) for t in top) + ".</li>")
    fps = doc.get("fingerprints") or []
    if fps:
        kinds = {}
        for f in fps:
            kinds[f.get("kind")] = kinds.get(f.get("kind"), 0) + 1
        items.append("<li><b>Fingerprints:</b> " + ", ".join(f"{esc(k)} ({v})" for k, v in kinds.items()) + ".</li>")
    o = doc.get("outcome")
    if isinstance(o, dict) and o.get("transport_gap") is not None:
        items.append(f"<li><b>Outcome:</b> site-only AUC {fmt(o.get('site_only_auc'))}, pooled model AUC "
                     f"{fmt(o.get('pooled_auc'))}, transport gap {fmt(o.get('transport_gap'))}.</li>")
    if not items:
        return ""
    return "<div class='note'><b>At a glance</b><ul>" + "".join(items) + "</ul></div>"


#: Report-section module name -> the report.json key it renders, where they differ.
_MODULE_KEY = {"maps": "embedding"}


def failure_text(f: Dict[str, Any]) -> str:
    """Plain words for one ``failed_analyses`` entry (shared by HTML and Markdown)."""
    secs = ", ".join(f.get("sections") or []) or "none"
    if f.get("status") == "not_run":
        return f"The {f.get('analysis')} analysis did not run ({f.get('message')}); missing sections: {secs}."
    where = " in the second process" if f.get("process") == "second" else ""
    return (f"The {f.get('analysis')} analysis failed{where} with {f.get('error')}: {f.get('message')}. "
            f"Missing sections: {secs}. The other sections are complete; rerun with SITECHECK_DEBUG=1 "
            "for the traceback.")


def _failed_note(doc: Dict[str, Any], key=None) -> str:
    """A visible note for the failed analyses (all of them, or those that fill section ``key``)."""
    fails = [f for f in doc.get("failed_analyses") or [] if key is None or key in (f.get("sections") or [])]
    if not fails:
        return ""
    title = "Analyses that failed" if key is None else "This section is missing"
    return (f"<div class='failed'><b>{esc(title)}</b><ul>"
            + "".join(f"<li>{esc(failure_text(f))}</li>" for f in fails) + "</ul></div>")


def render_html(doc: Dict[str, Any], *, min_cell: int = 10, out_dir=None) -> str:
    """Render the report document (``ScanResult.to_dict()``) as one HTML page.

    Section renderers receive ``doc["_out_dir"]`` (not part of report.json) so they can
    embed figures with :func:`embed_image`."""
    doc = dict(doc)
    doc["_out_dir"] = out_dir
    inp = doc.get("input", {})
    sites = inp.get("sites", {})
    head = (f"<h1>sitecheck report: {esc(inp.get('path'))}</h1>"
            f"<p class='note'>{esc(DISCLAIMER)}</p>"
            f"<p>{esc(inp.get('rows_used'))} rows from {len(sites)} sites "
            f"(site column <code>{esc(inp.get('site_column'))}</code>): "
            + ", ".join(f"{esc(k)} ({esc(suppress_count(v, min_cell))})" for k, v in sites.items()) + "</p>")
    body = [head, _failed_note(doc), _at_a_glance(doc)]
    from .sections import modules

    for mod in modules():
        body.append(mod.html(doc, min_cell))
        name = mod.__name__.rsplit(".", 1)[-1]
        body.append(_failed_note(doc, _MODULE_KEY.get(name, name)))
    body.append(_hygiene(doc, min_cell))
    body.append(_methods(doc))
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<meta http-equiv='Content-Security-Policy' content=\"default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'unsafe-inline'\">"
            f"<title>sitecheck report</title><style>{_CSS}</style></head><body>"
            + "".join(body) + f"<script>{_SORT_JS}</script></body></html>\n")
