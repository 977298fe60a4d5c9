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


@dataclass(frozen=True)
class ScanResult:
    """Every section of a scan.

    ``sections`` maps a ``report.json`` key (``probe``, ``groups``,
    ``leakage``, ...) to that analysis's result object (anything with a
    ``to_dict`` method, or plain JSON data). Analyses that did not run are
    absent.
    """

    input: Dict[str, Any]
    columns: Tuple[Dict[str, Any], ...]
    findings: Tuple[Dict[str, Any], ...]
    warnings: Tuple[str, ...]
    run: Dict[str, Any]
    sections: Dict[str, Any] = field(default_factory=dict)
    objects: Dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    def __getitem__(self, key: str) -> Any:
        return self.sections[key]

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
        doc["run"] = self.run
        return to_jsonable(doc)
