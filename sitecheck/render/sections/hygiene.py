"""Report sections at the end of the page: data hygiene, and methods and reproducibility."""
from __future__ import annotations

from typing import Any, Dict, List

from ..fmt import count
from ..safety import suppress_count
from ..templating import Col, Table
from ..words import hygiene_word, missing_code_label

ID = "hygiene"
TITLE = "Data hygiene"
ROLE_WORDS = {"feature": "feature", "site": "site", "outcome": "outcome", "covariate": "covariate",
              "group": "group", "identifier": "identifier", "excluded": "left out"}


def model(doc: Dict[str, Any], min_cell: int) -> Dict[str, Any]:
    rows = []
    for c in doc.get("columns", []):
        codes = c.get("missing_codes") or {}
        rows.append([c.get("name"), ROLE_WORDS.get(c.get("role"), c.get("role")), c.get("kind"), c.get("reason"),
                     count(suppress_count(c.get("n_missing", 0), min_cell)),
                     "; ".join(f"{missing_code_label(k)}: {count(suppress_count(v, min_cell))}"
                               for k, v in codes.items()) or "none"])
    findings = [[h.get("column"), hygiene_word(h.get("kind")), h.get("site", "") or "all", h.get("detail")]
                for h in doc.get("hygiene") or []]
    return {"id": ID, "title": TITLE,
            "columns": Table([Col("column"), Col("role"), Col("kind"), Col("why"), Col("missing", "cells", True),
                              Col("missing-value codes read", "code: cells")], rows),
            "findings": Table([Col("column"), Col("finding"), Col("site"), Col("detail", wide=True)], findings),
            "warnings": list(doc.get("warnings") or [])}


def methods_model(doc: Dict[str, Any]) -> Dict[str, Any]:
    run = doc.get("run", {}) or {}
    inp = doc.get("input", {}) or {}
    rows: List[List[Any]] = [["input file", inp.get("path")], ["SHA-256", inp.get("sha256")],
                             ["seed", run.get("seed")], ["report schema", doc.get("schema")]]
    rows += [[f"version of {k}", v] for k, v in (run.get("versions") or {}).items()]
    rows += [[f"option {k}", ", ".join(map(str, v)) if isinstance(v, list) else v]
             for k, v in (run.get("options") or {}).items() if v is not None and v != []]
    seconds = [[k, f"{v:.1f}" if isinstance(v, (int, float)) else v] for k, v in (run.get("seconds") or {}).items()]
    rows = [r for r in rows if r[1] is not None and r[1] != ""]
    return {"id": "methods", "title": "Methods, caveats and reproducibility",
            "table": Table([Col("item"), Col("value")], rows, sortable=False),
            "seconds": Table([Col("stage"), Col("seconds", numeric=True)], seconds, sortable=False)}
