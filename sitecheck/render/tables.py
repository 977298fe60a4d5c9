"""Spreadsheet tables: leakage.csv and fingerprints.csv (formula-safe, small cells suppressed)."""
from __future__ import annotations

import csv
import io
import json
from typing import Any, Dict, List

from .safety import csv_cell, suppress_count
from .words import MECHANICAL, artefact


def _csv(headers: List[str], rows: List[List[Any]]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_cell(h) for h in headers])
    for r in rows:
        w.writerow([csv_cell("" if v is None else v) for v in r])
    return buf.getvalue()


def leakage_csv(doc: Dict[str, Any], *, min_cell: int) -> str:
    rows = []
    for e in doc.get("leakage", []) or []:
        u = e.get("univariate", {}) or {}
        m = e.get("missing_by_site", {}) or {}
        adj = u.get("adjusted_for_covariates") or {}
        rows.append([e["rank"], e["feature"], e["score"], e["score_ci"][0], e["score_ci"][1], e["cluster"],
                     u.get("test"), u.get("p_adj"), u.get("epsilon_squared", u.get("cramers_v")), u.get("max_abs_smd"),
                     adj.get("p_adj"), m.get("p_adj"),
                     json.dumps(m.get("rate", {}), sort_keys=True), suppress_count(u.get("n"), min_cell)])
    return _csv(["rank", "feature", "score", "score_ci_low", "score_ci_high", "cluster", "test", "p_adj",
                 "effect", "max_abs_smd", "p_adj_covariate_adjusted", "missing_rate_p_adj", "missing_rate_by_site",
                 "n"], rows)


def fingerprints_csv(doc: Dict[str, Any], *, min_cell: int) -> str:
    rows = []
    for f in doc.get("fingerprints", []) or []:
        ev = f.get("evidence", {}) or {}
        ev_s = {k: (suppress_count(v, min_cell) if k in ("n", "count") else v) for k, v in ev.items()}
        rows.append([f.get("feature"), f.get("site"), f.get("kind"), f.get("detail"),
                     json.dumps(ev_s, sort_keys=True, default=str), artefact(f.get("kind")), f.get("severity"),
                     "recording" if f.get("kind") in MECHANICAL else "distribution gap", f.get("suggested_fix")])
    # the columns of the first version come first (pipelines read them by position or name)
    return _csv(["feature", "site", "kind", "detail", "evidence", "artefact", "severity", "group", "suggested_fix"],
                rows)
