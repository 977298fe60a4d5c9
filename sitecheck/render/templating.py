"""Jinja2 environments of the report, and the small value types section models hand to templates.

Two environments load the packaged templates (``sitecheck/render/templates``):

* HTML: autoescaping on, so every value from the data is escaped unless a
  section deliberately passes :class:`markupsafe.Markup` (used only for our own
  markup, such as a legacy section's rendered HTML or an embedded figure).
* Markdown: every ``{{ value }}`` passes through :func:`md_finalize`, which
  escapes Markdown syntax in data text; :class:`Md` marks text that is already
  Markdown (our own), the Markdown twin of ``Markup``.

Section models are plain dictionaries of display-ready strings and the types
below; templates only lay them out. Nothing here computes a statistic.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any, Dict, List, Optional, Sequence

from markupsafe import Markup


class Md(str):
    """Text that is already Markdown (our own), left unescaped in Markdown templates."""


def md_escape(value: Any) -> str:
    """Escape Markdown syntax in data text; newlines become spaces."""
    s = "" if value is None else str(value)
    for ch in "\\`*_{}[]<>|#":
        s = s.replace(ch, "\\" + ch)
    return s.replace("\r", " ").replace("\n", " ")


def md_finalize(value: Any) -> str:
    if isinstance(value, (Md, Markup)):
        return str(value)
    if isinstance(value, Cell):
        return md_escape(value.text)
    return md_escape(value)


@dataclass(frozen=True)
class Cell:
    """A table cell: its text, and optionally a link (``#anchor``), a CSS class and a title."""

    text: Any
    href: str = ""
    cls: str = ""
    title: str = ""

    def __str__(self) -> str:
        return "" if self.text is None else str(self.text)


@dataclass(frozen=True)
class Col:
    """A table column: its label, the test or source behind it (shown under the label), numeric or not."""

    label: str
    test: str = ""
    numeric: bool = False
    #: prose: kept at a readable width (the table scrolls sideways on a narrow screen instead)
    wide: bool = False


@dataclass
class Table:
    """A table model: columns, rows of cells (strings or :class:`Cell`), and rows folded away.

    ``folded`` rows are shown in a ``<details>`` element below the table (HTML) and
    left out of Markdown, where ``folded_note`` says how many there are and why.
    """

    cols: List[Col]
    rows: List[List[Any]]
    folded: List[List[Any]] = field(default_factory=list)
    folded_note: str = ""
    id: str = ""
    sortable: bool = True
    #: optional anchors of the rows (same length as ``rows``) and of the folded rows
    row_ids: List[str] = field(default_factory=list)
    folded_ids: List[str] = field(default_factory=list)

    @property
    def numeric(self) -> List[bool]:
        return [c.numeric for c in self.cols]


def _cell_text(value: Any) -> str:
    return str(value) if isinstance(value, Cell) else ("" if value is None else str(value))


def _is_cell(value: Any) -> bool:
    return isinstance(value, Cell)


@lru_cache(maxsize=None)
def html_env():
    from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

    env = Environment(loader=PackageLoader("sitecheck.render", "templates"),
                      autoescape=select_autoescape(enabled_extensions=("html", "j2"), default=True),
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.tests["cell"] = _is_cell
    env.filters["celltext"] = _cell_text
    return env


def md_table(t: "Table", rows: Optional[List[List[Any]]] = None) -> Md:
    """A Markdown table of a table model, every cell escaped."""
    cols = t.cols
    out = ["| " + " | ".join(md_escape(c.label) for c in cols) + " |",
           "|" + "|".join("---:" if c.numeric else "---" for c in cols) + "|"]
    for r in (t.rows if rows is None else rows):
        out.append("| " + " | ".join(md_escape(_cell_text(v)) for v in r) + " |")
    return Md("\n".join(out) + "\n")


@lru_cache(maxsize=None)
def md_env():
    from jinja2 import Environment, PackageLoader, StrictUndefined

    env = Environment(loader=PackageLoader("sitecheck.render", "templates"), autoescape=False,
                      finalize=md_finalize, undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                      keep_trailing_newline=True)
    env.globals["table"] = md_table
    env.tests["cell"] = _is_cell
    env.filters["celltext"] = _cell_text
    return env


def render_html_template(name: str, **context: Any) -> Markup:
    return Markup(html_env().get_template(name).render(**context))


def render_md_template(name: str, **context: Any) -> Md:
    return Md(md_env().get_template(name).render(**context))


def has_template(name: str) -> bool:
    from jinja2 import TemplateNotFound

    try:
        html_env().get_template(name)
        return True
    except TemplateNotFound:
        return False


def anchor(*parts: Any) -> str:
    """An HTML id from our own names and indices (never from data text alone)."""
    import re

    s = "-".join(str(p) for p in parts if p is not None and p != "")
    return re.sub(r"[^0-9A-Za-z_-]+", "-", s).strip("-").lower() or "x"


@dataclass(frozen=True)
class Figure:
    """A figure as the page shows it: an anchor, the embedded image (our own markup), a caption in words."""

    id: str
    img: Any
    caption: str
    svg: str = ""
    feature: str = ""
    png: str = ""


def figures_of(doc: Dict[str, Any], section: str) -> List[Figure]:
    """The figures written for ``section`` (``doc["figures"][section]``), embedded as data URIs."""
    from .html import embed_image

    out = []
    items = (doc.get("figures") or {}).get(section) if isinstance(doc.get("figures"), dict) else None
    if items is None and isinstance(doc.get(section), dict):  # a section's own list of paths
        items = doc[section].get("figures")
    for i, item in enumerate(items or []):
        if isinstance(item, str):
            item = {"png": item} if item.endswith(".png") else None
        if not item or not item.get("png"):
            continue
        img = embed_image(doc.get("_out_dir"), item["png"], alt=item.get("alt") or item.get("caption") or "")
        if img:
            out.append(Figure(id=item.get("id") or anchor("fig", section, i), img=Markup(img),
                              caption=item.get("caption") or "", svg=item.get("svg") or "",
                              feature=item.get("feature") or "", png=item["png"]))
    return out


def section_html(name: str, m: Optional[Dict[str, Any]]) -> str:
    """A section's HTML from its display model ("" when absent): for callers of ``html(doc, min_cell)``."""
    return "" if not m else str(render_html_template(f"sections/{name}.html.j2", m=m))


def section_md(name: str, m: Optional[Dict[str, Any]]) -> str:
    """A section's Markdown from its display model ("" when absent)."""
    return "" if not m else str(render_md_template(f"sections/{name}.md.j2", m=m)).strip("\n")
