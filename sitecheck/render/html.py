"""The self-contained HTML report, rendered from Jinja2 templates with autoescaping.

Each section module in :mod:`sitecheck.render.sections` either builds a display
model (``model(doc, min_cell)``) rendered by ``templates/sections/<name>.html.j2``,
or, in the older style, returns its own HTML string (``html(doc, min_cell)``);
both appear in the page and its contents. The helpers below (``esc``, ``num``,
``pval``, ``ci``, ``table_html``, ``embed_image``) remain for sections in the
older style.
"""
from __future__ import annotations

import html
import re
from functools import lru_cache
from importlib import resources
from typing import Any, Dict, List

from markupsafe import Markup

from . import fmt as _fmt
from .safety import suppress_count

DISCLAIMER = ("sitecheck is decision support for data work, not a clinical device. Its findings "
              "describe the data, not patients; act on them under your local data-governance "
              "rules and licensed clinical and statistical practice.")


def esc(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def fmt(value: Any, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        return _fmt.num(value, digits)
    return str(value)


num = _fmt.num
ci = _fmt.ci


def pval(value: Any, floor: Any = None) -> str:
    """A p-value for a table cell ("≤ floor" at the permutation floor, "< 0.001", else decimals)."""
    return _fmt.pval(value, floor)


def table_html(headers: List[str], rows: List[List[Any]], *, numeric: tuple = (), nowrap: tuple = (),
               wide: tuple = ()) -> str:
    """A sortable table from headers and rows, every cell escaped (for older-style sections).

    Columns in ``numeric`` are right-aligned and never wrap; in ``nowrap`` (dates, numbers with
    their interval) never wrap; in ``wide`` (prose) keep a readable width."""
    out = ['<div class="tw"><table class="sortable"><thead><tr>']
    out += [("<th class=\"n\">" if j in numeric else "<th>") + esc(h) + "</th>" for j, h in enumerate(headers)]
    out.append("</tr></thead><tbody>")
    for row in rows:
        out.append("<tr>")
        for j, cell in enumerate(row):
            cls = "n" if j in numeric else ("nw" if j in nowrap else ("w" if j in wide else ""))
            cls = f' class="{cls}"' if cls else ""
            out.append(f"<td{cls}>{esc(cell)}</td>")
        out.append("</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


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


@lru_cache(maxsize=None)
def _asset(name: str) -> str:
    return resources.files("sitecheck.render").joinpath("templates", name).read_text(encoding="utf-8")


_H2 = re.compile(r"<h2(\s[^>]*)?>(.*?)</h2>", re.S | re.I)


def legacy_section(name: str, text: str) -> Dict[str, Any]:
    """A section in the older style: its HTML as given, with an anchor on its first heading."""
    sid = f"sec-{name}"
    m = _H2.search(text)
    title = re.sub(r"<[^>]+>", "", m.group(2)).strip() if m else name.replace("_", " ").capitalize()
    title = html.unescape(title)
    if m and not re.search(r'\bid\s*=', m.group(1) or ""):
        text = text[:m.start()] + f'<h2 id="{sid}"{m.group(1) or ""}>{m.group(2)}</h2>' + text[m.end():]
    elif m:
        sid = re.search(r'\bid\s*=\s*["\']?([^"\'\s>]+)', m.group(1)).group(1)
    else:
        text = f'<h2 id="{sid}">{esc(title)}</h2>' + text
    return {"id": sid, "title": title, "html": Markup(text)}


#: Report-section module name -> the report.json key it renders, where they differ.
_MODULE_KEY = {"maps": "embedding", "leakage": "leakage", "hygiene": "hygiene"}


def failure_text(f: Dict[str, Any]) -> str:
    """Plain words for one ``failed_analyses`` entry (shared by HTML and Markdown)."""
    secs = ", ".join(f.get("sections") or []) or "none"
    if f.get("status") == "not_run":
        return f"The {f.get('analysis')} analysis did not run ({f.get('message')}); missing sections: {secs}."
    where = " in the second process" if f.get("process") == "second" else ""
    return (f"The {f.get('analysis')} analysis failed{where} with {f.get('error')}: {f.get('message')}. "
            f"Missing sections: {secs}. The other sections are complete; rerun with SITECHECK_DEBUG=1 "
            "for the traceback.")


def failed_note(doc: Dict[str, Any], key=None) -> str:
    """A visible note (HTML) for the failed analyses: all of them, or those that fill section ``key``."""
    fails = [f for f in doc.get("failed_analyses") or [] if key is None or key in (f.get("sections") or [])]
    if not fails:
        return ""
    return ("<div class='failed'><ul>" + "".join(f"<li>{esc(failure_text(f))}</li>" for f in fails)
            + "</ul></div>")


def render_sections(doc: Dict[str, Any], min_cell: int) -> List[Dict[str, Any]]:
    """Every section present, in the order of a decision, as {id, title, html}."""
    from .sections import hygiene, modules
    from .templating import has_template, render_html_template

    out = []
    if doc.get("failed_analyses"):  # first, so that nobody reads the report as complete
        out.append({"id": "failed", "title": "Analyses that failed",
                    "html": Markup('<h2 id="failed">Analyses that failed</h2>' + failed_note(doc))})
    for mod in modules() + [hygiene]:
        name = mod.__name__.rsplit(".", 1)[-1]
        note = failed_note(doc, _MODULE_KEY.get(name, name))
        if note:  # where the section would be
            title = f"{name.replace('_', ' ').capitalize()}: not available"
            out.append({"id": f"failed-{name}", "title": title,
                        "html": Markup(f'<h2 id="failed-{name}">{esc(title)}</h2>' + note)})
        if hasattr(mod, "model") and has_template(f"sections/{name}.html.j2"):
            m = mod.model(doc, min_cell)
            if not m:
                continue
            out.append({"id": m["id"], "title": m["title"],
                        "html": render_html_template(f"sections/{name}.html.j2", m=m)})
        elif hasattr(mod, "html"):
            text = mod.html(doc, min_cell)
            if text:
                out.append(legacy_section(name, text))
    meth = hygiene.methods_model(doc)
    out.append({"id": meth["id"], "title": meth["title"],
                "html": render_html_template("sections/methods.html.j2", m=meth, disclaimer=DISCLAIMER,
                                             min_cell=min_cell)})
    return out


def _head(doc: Dict[str, Any], min_cell: int) -> Dict[str, Any]:
    import os

    inp = doc.get("input", {}) or {}
    sites = inp.get("sites", {}) or {}
    return {"file": os.path.basename(str(inp.get("path") or "")) or "table",
            "rows": _fmt.count(suppress_count(inp.get("rows_used"), min_cell)), "n_sites": len(sites),
            "site_column": inp.get("site_column"),
            "sites": [{"name": k, "n": _fmt.count(suppress_count(v, min_cell))} for k, v in sites.items()]}


def render_html(doc: Dict[str, Any], *, min_cell: int = 10, out_dir=None) -> str:
    """Render the report document (``ScanResult.to_dict()``, suppressed) as one HTML page.

    Sections receive ``doc["_out_dir"]`` (not part of report.json) so they can
    embed figures with :func:`embed_image`."""
    from .sections import actions, probe
    from .templating import render_html_template

    doc = dict(doc)
    doc["_out_dir"] = out_dir
    nxt = actions.model(doc, min_cell)
    page = render_html_template("page.html.j2", head=_head(doc, min_cell), verdict=probe.headline(doc),
                                disclaimer=DISCLAIMER, next=nxt, glance=nxt["glance"],
                                sections=render_sections(doc, min_cell),
                                css=Markup(_asset("style.css")), script=Markup(_asset("sort.js")))
    return str(page).rstrip() + "\n"
