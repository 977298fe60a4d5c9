"""The registry of analyses run by a scan, in order.

Each entry names a ``report.json`` section, says when it applies, runs the
analysis (a pure function of :class:`~sitecheck.prepare.Prepared`, the scan
options and earlier results) and maps its result to report sections. To add
an analysis, write its module, then add an :class:`Analysis` here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Dict, List


@dataclass(frozen=True)
class Analysis:
    name: str
    run: Callable[..., Any]
    applies: Callable[..., bool] = lambda prep: True
    sections: Callable[[Any], Dict[str, Any]] = lambda result: {}


REGISTRY: List[Analysis] = []


def _run_outcome(prep, options, objects):
    from .outcome import outcome_risk

    return outcome_risk(prep, leakage=objects.get("leakage"), threshold=options.threshold,
                        random_state=options.seed)


# Order: probe, leakage, fingerprints, maps, harmonise, outcome (outcome stays last).
REGISTRY.append(Analysis("outcome", _run_outcome, applies=lambda prep: prep.outcome is not None,
                         sections=lambda result: {"outcome": result}))
