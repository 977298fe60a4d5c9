"""findings.md: a short provenance note (about two printed pages) to paste into a data
management plan, protocol or model card: the verdict, what to do, the findings,
the residual after harmonisation, and where the full tables are.

Rendered from ``templates/findings.md.j2`` and each section's ``.md.j2``
template (every value Markdown-escaped); sections in the older style contribute
their own ``markdown(doc, min_cell)`` text.
"""
from __future__ import annotations

from typing import Any, Dict, List

from .templating import Md, md_escape  # noqa: F401  (md_escape: kept for sections in the older style)


def md_table(headers: List[str], rows: List[List[Any]]) -> str:
    out = ["| " + " | ".join(md_escape(h) for h in headers) + " |",
           "|" + "|".join("---" for _ in headers) + "|"]
    out += ["| " + " | ".join(md_escape(c) for c in r) + " |" for r in rows]
    return "\n".join(out)


#: sections of the page that findings.md leaves out (full tables: HTML, CSV, JSON)
MD_SKIP = ("maps",)
#: an older-style section's Markdown is cut (at a line) beyond this many characters, so that the
#: note stays about two printed pages whatever sections are added
LEGACY_MD_MAX = 1500


def _capped(text: str) -> str:
    if len(text) <= LEGACY_MD_MAX:
        return text
    cut = text.rfind("\n", 0, LEGACY_MD_MAX)
    return text[:cut if cut > 0 else LEGACY_MD_MAX].rstrip() + "\n\n(The full section is in report.html.)"


def _sections_md(doc: Dict[str, Any], min_cell: int) -> List[Md]:
    from .sections import modules
    from .templating import has_template, render_md_template

    from .html import failure_text

    out: List[Md] = []
    fails = doc.get("failed_analyses") or []
    if fails:
        out.append(Md("\n".join(["## Analyses that failed", ""] + [f"- {md_escape(failure_text(f))}" for f in fails])))
    for mod in modules():
        name = mod.__name__.rsplit(".", 1)[-1]
        if name in MD_SKIP:
            continue
        if hasattr(mod, "model") and has_template(f"sections/{name}.md.j2"):
            m = mod.model(doc, min_cell)
            if m:
                out.append(Md(render_md_template(f"sections/{name}.md.j2", m=m).strip("\n")))
        elif hasattr(mod, "markdown"):
            text = mod.markdown(doc, min_cell)
            if text:
                out.append(Md(_capped(str(text).strip("\n"))))
    return [s for s in out if s]


def render_markdown(doc: Dict[str, Any], *, min_cell: int = 10) -> str:
    from .html import DISCLAIMER, _head
    from .sections import actions, probe
    from .templating import render_md_template

    inp = doc.get("input", {}) or {}
    run = doc.get("run", {}) or {}
    nxt = actions.model(doc, min_cell)
    covs = [c.get("name") for c in doc.get("columns") or [] if c.get("role") == "covariate"]
    text = render_md_template("findings.md.j2", head=_head(doc, min_cell), path=inp.get("path"),
                              sha=inp.get("sha256"), version=(run.get("versions") or {}).get("sitecheck"),
                              seed=run.get("seed"), covariates=", ".join(covs), verdict=probe.headline(doc),
                              next=nxt, sections=_sections_md(doc, min_cell), disclaimer=DISCLAIMER,
                              min_cell=min_cell)
    while "\n\n\n" in text:
        text = text.replace("\n\n\n", "\n\n")
    return text.strip("\n") + "\n"
