"""The scan's result: one frozen dataclass holding every section."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, Optional, Tuple

SCHEMA_VERSION = "sitecheck.report/1.0"


def to_jsonable(obj: Any) -> Any:
    """Convert results (dataclasses with ``to_dict``, numpy scalars) to JSON types."""
    import math

    import numpy as np

    if hasattr(obj, "to_dict"):
        return to_jsonable(obj.to_dict())
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return None if math.isnan(v) or math.isinf(v) else v
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return obj


def p_text(p_value: Any, floor: Any = None, n_permutations: Any = None) -> str:
    """A p-value for the terminal: "p = 0.0132", or at the permutation floor (the smallest value
    the test can give; the same rule as the report, :func:`sitecheck.analyses.stats.at_permutation_floor`)
    "p ≤ 0.00272 (permutation floor: 999 label permutations per fold)"."""
    from sitecheck.analyses.stats import at_permutation_floor

    if p_value is None or isinstance(p_value, bool):
        return "p not computed"
    if at_permutation_floor(p_value, floor):
        perms = f": {n_permutations} label permutations per fold" if isinstance(n_permutations, int) else ""
        return f"p ≤ {floor:.3g} (permutation floor{perms})"
    return f"p = {p_value:.3g}"


@dataclass(frozen=True)
class ScanResult:
    """Every section of a scan.

    ``sections`` maps a ``report.json`` key (``probe``, ``groups``,
    ``leakage``, ...) to that analysis's result object (anything with a
    ``to_dict`` method, or plain JSON data). Analyses that did not run are
    absent. ``failures`` lists the analyses that raised (or did not run because
    one they need raised), as ``report.json``'s ``failed_analyses``: their
    sections are absent and every other section is complete.

    Attributes
    ----------
    input, run : dict
        The input file (path, format, rows, SHA-256, sites) and the run (seed, options,
        versions, seconds).
    columns, findings, warnings : tuple
        Each column's role and kind, the hygiene findings and the warnings of reading.
    sections : dict
        ``report.json`` key -> result.
    objects : dict
        The in-memory objects behind the sections (the table, the prepared matrices,
        each analysis's result), for rendering; not part of the document.

    Examples
    --------
    >>> from sitecheck import ScanOptions, generate_demo, scan_frame
    >>> result = scan_frame(generate_demo(600, seed=7).frame, site="hospital",
    ...                     identifiers=["attendance_id"],
    ...                     options=ScanOptions(analyses=("probe",), folds=3, n_jobs=1))
    >>> doc = result.to_dict()                     # the report.json document
    >>> doc["schema"].startswith("sitecheck.report/"), doc["input"]["rows"]
    (True, 600)
    >>> print(result.summary().splitlines()[0])
    sitecheck ...: 600 rows, 4 sites
    """

    input: Dict[str, Any]
    columns: Tuple[Dict[str, Any], ...]
    findings: Tuple[Dict[str, Any], ...]
    warnings: Tuple[str, ...]
    run: Dict[str, Any]
    sections: Dict[str, Any] = field(default_factory=dict)
    failures: Tuple[Dict[str, Any], ...] = ()
    objects: Dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    def __getitem__(self, key: str) -> Any:
        return self.sections[key]

    @property
    def failed(self) -> Tuple[str, ...]:
        """Names of the analyses that failed or did not run because of a failure."""
        return tuple(f["analysis"] for f in self.failures)

    def to_dict(self) -> Dict[str, Any]:
        """The ``report.json`` document."""
        doc: Dict[str, Any] = {
            "schema": SCHEMA_VERSION,
            "input": self.input,
            "columns": list(self.columns),
            "hygiene": list(self.findings),
            "warnings": list(self.warnings),
        }
        for key, value in self.sections.items():
            doc[key] = value
        doc["failed_analyses"] = [dict(f) for f in self.failures]
        doc["run"] = self.run
        return to_jsonable(doc)

    def summary(self, *, max_warnings: int = 5) -> str:
        """A few lines for a terminal: rows and sites, the site probe's AUC with its interval,
        p-value and verdict, the drift findings (with ``--time``), and the first warnings.

        Parameters
        ----------
        max_warnings : int, default 5
            How many warnings to list; the rest are counted.

        Returns
        -------
        str
            Lines separated by newlines, without a trailing newline. This text is for the
            person running the scan (counts are not suppressed); shared outputs are the
            report files.
        """
        from sitecheck import __version__

        if isinstance(max_warnings, bool) or not isinstance(max_warnings, int) or max_warnings < 0:
            raise ValueError(f"max_warnings must be a non-negative integer, got {max_warnings!r}")
        doc = self.to_dict()
        inp = doc.get("input", {})
        lines = [f"sitecheck {__version__}: {inp.get('rows_used')} rows, {len(inp.get('sites') or {})} sites"]
        probe = doc.get("probe")
        if isinstance(probe, dict) and probe.get("auc") is not None:
            lo, hi = probe["auc_ci"]
            lines.append(f"site probe: AUC {probe['auc']:.3f} (95% CI {lo:.3f} to {hi:.3f}), "
                         f"{p_text(probe.get('p_value'), probe.get('p_value_floor'), probe.get('n_permutations'))}"
                         f", n = {probe.get('n_used', inp.get('rows_used'))}, verdict: {probe['verdict']}")
        drift = doc.get("drift")
        if isinstance(drift, dict):
            found = drift.get("findings") or []
            where = ", ".join(f"{c['feature']} at {c['site']} from {c['period']}" for c in found[:3])
            lines.append(f"drift over time: {len(found)} change(s) at a site" + (f" ({where})" if where else "")
                         + (f"; {len(drift.get('network') or [])} network-wide" if drift.get("network") else ""))
        warnings = doc.get("warnings", [])
        lines += [f"warning: {w}" for w in warnings[:max_warnings]]
        if len(warnings) > max_warnings:
            lines.append(f"({len(warnings) - max_warnings} more warnings in the report)")
        return "\n".join(lines)
