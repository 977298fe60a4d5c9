"""Write every output of a scan into one directory."""
from __future__ import annotations

import json
import os
from typing import Dict, Optional

from ..result import ScanResult
from .html import render_html
from .markdown import render_markdown
from .safety import atomic_write


def write_report(result: ScanResult, out_dir: str, *, min_cell: int = 10,
                 figures: bool = True) -> Dict[str, str]:
    """Write ``report.json``, ``report.html`` and ``findings.md`` (and figures, CSVs)
    into ``out_dir``, atomically. Returns {name: path}."""
    os.makedirs(out_dir, exist_ok=True)
    doc = result.to_dict()
    paths: Dict[str, str] = {}
    paths["report.json"] = atomic_write(out_dir, "report.json", json.dumps(doc, indent=2, sort_keys=False, allow_nan=False) + "\n")
    paths["report.html"] = atomic_write(out_dir, "report.html", render_html(doc, min_cell=min_cell))
    paths["findings.md"] = atomic_write(out_dir, "findings.md", render_markdown(doc, min_cell=min_cell))
    return paths
