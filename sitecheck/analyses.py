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


def _run_probe(prep, options, objects):
    from .probe import site_probe

    return site_probe(prep, random_state=options.seed)


def _probe_sections(result):
    out = {"probe": result}
    if result.groups.probes or result.groups.skipped:
        out["groups"] = result.groups
    return out


# The site probe runs first: later analyses reuse its fold models (objects["probe"].crossfit).
REGISTRY.insert(0, Analysis("probe", _run_probe, sections=_probe_sections))


def _run_leakage(prep, options, objects):
    import numpy as np

    from .leakage import rank_leakage
    from .probe import probe_matrix

    probe = objects.get("probe")
    if probe is None:
        return None

    def missingness_probe(M, y):
        return probe_matrix(M, y, np.zeros(M.shape[1], dtype=bool), prep.folds, random_state=options.seed,
                            n_boot=500, n_permutations=999, model="linear").to_dict()

    return rank_leakage(prep, probe.crossfit, cluster_threshold=options.cluster_threshold,
                        panels=prep.table.panels, missingness_probe=missingness_probe, random_state=options.seed)


# The leak ranking reuses the probe's fold models: it goes right after the probe.
REGISTRY.insert(next(i for i, a in enumerate(REGISTRY) if a.name == "probe") + 1,
                Analysis("leakage", _run_leakage, sections=lambda result: result.sections()))


def _run_outcome(prep, options, objects):
    from .outcome import outcome_risk

    return outcome_risk(prep, leakage=objects.get("leakage"), threshold=options.threshold,
                        random_state=options.seed)


def _run_fingerprints(prep, options, objects):
    from .fingerprints import find_fingerprints

    return find_fingerprints(prep)


def _fingerprint_sections(result):
    return {"fingerprints": [f.to_dict() for f in result.findings], "fingerprint_tests": result.tests}


# fingerprints go after probe/leakage and before maps, harmonise and outcome
REGISTRY.insert(next((i for i, a in enumerate(REGISTRY) if a.name in ("maps", "harmonise", "outcome")),
                     len(REGISTRY)),
                Analysis("fingerprints", _run_fingerprints, sections=_fingerprint_sections))


def _run_maps(prep, options, objects):
    from .maps import compute_maps

    return compute_maps(prep, max_rows=options.map_rows, random_state=options.seed)


# maps go after probe, leakage and fingerprints and before harmonise and outcome
REGISTRY.insert(next((i for i, a in enumerate(REGISTRY) if a.name in ("harmonise", "outcome")), len(REGISTRY)),
                Analysis("maps", _run_maps, applies=lambda prep: prep.features.n_features > 0 and prep.n_used >= 50,
                         sections=lambda result: {"embedding": result}))


def _run_harmonise(prep, options, objects):
    from .harmonise import harmonisation_check

    return harmonisation_check(prep, random_state=options.seed)


def _harmonise_applies(prep) -> bool:
    return any(k == "numeric" for k in prep.features.kinds) and prep.n_used >= 50


# harmonise goes after probe, leakage, fingerprints and maps and before outcome
REGISTRY.insert(next((i for i, a in enumerate(REGISTRY) if a.name == "outcome"), len(REGISTRY)),
                Analysis("harmonise", _run_harmonise, applies=_harmonise_applies,
                         sections=lambda result: {"harmonisation": result}))


# Order: probe, leakage, fingerprints, maps, harmonise, outcome (outcome stays last).
REGISTRY.append(Analysis("outcome", _run_outcome, applies=lambda prep: prep.outcome is not None,
                         sections=lambda result: {"outcome": result}))
