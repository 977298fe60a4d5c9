"""Write every output of a scan into one directory."""
from __future__ import annotations

import json
import os
from typing import Callable, Dict, List

from sitecheck.report.result import ScanResult
from .html import render_html
from .markdown import render_markdown
from .safety import atomic_write, shareable_document
from .tables import fingerprints_csv, leakage_csv

#: Figure writers: ``fn(result, out_dir, *, min_cell, shareable) -> {section: [items]}``, an item
#: being a relative path or a dict ``{"png", "svg", "caption", "id", "feature", ...}``.
#: They draw from the result objects (never compute statistics) and write inside
#: ``out_dir/figures`` with :func:`atomic_write`. Every item is listed in the report
#: document under ``doc["figures"][section]``; for a section that is a dict in the
#: document, its paths are also listed as ``doc[section]["figures"]``.
FIGURE_WRITERS: List[Callable] = []


def _figure_writers() -> List[Callable]:
    writers = list(FIGURE_WRITERS)
    try:
        from .figures import write_figures  # provided by the figures module when present
        writers.append(write_figures)
    except ImportError:
        pass
    return writers


def write_report(result: ScanResult, out_dir: str, *, min_cell: int = 10, figures: bool = True,
                 shareable: bool = False) -> Dict[str, str]:
    """Write ``report.json``, ``report.html`` and ``findings.md`` (and figures, CSVs)
    into ``out_dir``, atomically. Returns {name: path}."""
    os.makedirs(out_dir, exist_ok=True)
    doc = result.to_dict()
    paths: Dict[str, str] = {}
    if figures:
        listing: Dict[str, list] = {}
        for writer in _figure_writers():
            for section, items in writer(result, out_dir, min_cell=min_cell, shareable=shareable).items():
                rels = [r for it in items for r in ((it,) if isinstance(it, str) else
                                                      (it.get("png"), it.get("svg"))) if r]
                if section in doc and isinstance(doc[section], dict):
                    doc[section]["figures"] = list(rels)
                listing.setdefault(section, []).extend(items)
                for rel in rels:
                    paths[rel] = os.path.join(out_dir, rel)
        if listing:
            doc["figures"] = listing
    small = frozenset(k for k, v in doc.get("input", {}).get("sites", {}).items() if int(v) < min_cell)
    shared = shareable_document(doc, min_cell=min_cell, small_sites=small)
    full = shared if shareable else doc
    paths["report.json"] = atomic_write(out_dir, "report.json", json.dumps(full, indent=2, sort_keys=False, allow_nan=False) + "\n")
    # HTML, Markdown and CSV are always shared outputs: rendered from the suppressed document.
    paths["report.html"] = atomic_write(out_dir, "report.html", render_html(shared, min_cell=min_cell, out_dir=out_dir))
    paths["findings.md"] = atomic_write(out_dir, "findings.md", render_markdown(shared, min_cell=min_cell))
    if shared.get("leakage"):
        paths["leakage.csv"] = atomic_write(out_dir, "leakage.csv", leakage_csv(shared, min_cell=min_cell))
    if "fingerprints" in shared:
        paths["fingerprints.csv"] = atomic_write(out_dir, "fingerprints.csv", fingerprints_csv(shared, min_cell=min_cell))
    plan = result.objects.get("repair_plan") if result.objects else None
    if plan is not None:
        # the repair plan (sitecheck.table.repair): exact counts, for use inside the data enclave;
        # with --shareable its counts are suppressed like report.json's
        plan_doc = plan.to_dict()
        if shareable:
            plan_doc = shareable_document(plan_doc, min_cell=min_cell, small_sites=small)
            plan_doc.pop("shareable", None)
        paths["repair_plan.json"] = atomic_write(out_dir, "repair_plan.json",
                                                 json.dumps(plan_doc, indent=2, allow_nan=False) + "\n")
    return paths
