"""findings.md: a plain provenance note to paste into a data management plan,
protocol or model card."""
from __future__ import annotations

from typing import Any, Dict, List

from .html import DISCLAIMER, failure_text
from .safety import suppress_count


def md_escape(value: Any) -> str:
    s = "" if value is None else str(value)
    for ch in "\\`*_{}[]<>|#":
        s = s.replace(ch, "\\" + ch)
    return s.replace("\n", " ")


def md_table(headers: List[str], rows: List[List[Any]]) -> str:
    out = ["| " + " | ".join(md_escape(h) for h in headers) + " |",
           "|" + "|".join("---" for _ in headers) + "|"]
    out += ["| " + " | ".join(md_escape(c) for c in r) + " |" for r in rows]
    return "\n".join(out)


def render_markdown(doc: Dict[str, Any], *, min_cell: int = 10) -> str:
    inp = doc.get("input", {})
    sites = inp.get("sites", {})
    parts = ["# Site-signal check: data provenance note", "",
             f"Input `{md_escape(inp.get('path'))}` (SHA-256 `{inp.get('sha256')}`), "
             f"{inp.get('rows_used')} rows from {len(sites)} sites in column `{md_escape(inp.get('site_column'))}`; "
             f"checked with sitecheck {doc.get('run', {}).get('versions', {}).get('sitecheck')} "
             f"(seed {doc.get('run', {}).get('seed')}).", "",
             md_table(["site", "rows"], [[k, suppress_count(v, min_cell)] for k, v in sites.items()]), ""]
    fails = doc.get("failed_analyses") or []
    if fails:
        parts += ["## Analyses that failed", ""] + [f"- {md_escape(failure_text(f))}" for f in fails] + [""]
    from .sections import modules

    for mod in modules():
        text = mod.markdown(doc, min_cell)
        if text:
            parts += [text, ""]
    hyg = doc.get("hygiene", [])
    if hyg:
        parts += ["## Data hygiene", "", md_table(["column", "finding", "site", "detail"],
                                                  [[f["column"], f["kind"], f.get("site", ""), f["detail"]] for f in hyg]), ""]
    roles: Dict[str, List[str]] = {}
    for c in doc.get("columns", []):
        roles.setdefault(c["role"], []).append(c["name"])
    parts += ["## Column roles", "", md_table(["role", "columns"], [[k, ", ".join(v)] for k, v in roles.items()]), ""]
    parts += ["---", "", f"*{DISCLAIMER}*", ""]
    return "\n".join(parts)
