"""The registry of analyses run by a scan, in order.

Each entry names a ``report.json`` section, says when it applies, runs the
analysis (a pure function of :class:`~sitecheck.table.prepare.Prepared`, the scan
options and earlier results) and maps its result to report sections. To add
an analysis, write its module, then add an :class:`Analysis` here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Dict, List, Optional


@dataclass(frozen=True)
class Analysis:
    """One analysis of a scan.

    ``needs`` names analyses whose results ``run`` reads from ``objects``; when
    those are scheduled, this one waits for them. Analyses without a dependency
    between them may run at the same time (see :func:`sitecheck.scan.run_analyses`);
    each uses its own seeded generators, so the results do not depend on the order.
    """

    name: str
    run: Callable[..., Any]
    applies: Callable[..., bool] = lambda prep: True
    sections: Callable[[Any], Dict[str, Any]] = lambda result: {}
    needs: tuple = ()
    #: A part of another analysis (by name), run on its own so that the two can run at
    #: the same time; ``merge(whole, part)`` folds its result into that analysis's result.
    part_of: Optional[str] = None
    merge: Optional[Callable[[Any, Any], Any]] = None
    #: Order of the queue for the second process (higher first): the longest tasks go first,
    #: so that the short ones fill the gaps (longest-processing-time-first list scheduling).
    priority: int = 0


def _run_probe(prep, options, objects):
    from sitecheck.analyses.probe import site_probe

    return site_probe(prep, random_state=options.seed)


def _probe_sections(result):
    out = {"probe": result}
    if result.groups.probes or result.groups.skipped:
        out["groups"] = result.groups
    return out




def _run_leakage(prep, options, objects):
    import numpy as np

    from sitecheck.analyses.leakage import rank_leakage
    from sitecheck.analyses.probe import probe_matrix

    probe = objects.get("probe")
    if probe is None:
        return None

    def missingness_probe(M, y):
        return probe_matrix(M, y, np.zeros(M.shape[1], dtype=bool), prep.folds, random_state=options.seed,
                            n_boot=500, n_permutations=999, model="linear").to_dict()

    return rank_leakage(prep, probe.crossfit, cluster_threshold=options.cluster_threshold,
                        panels=prep.table.panels, missingness_probe=missingness_probe, random_state=options.seed)




def _run_outcome(prep, options, objects):
    from sitecheck.analyses.outcome import outcome_risk

    return outcome_risk(prep, leakage=objects.get("leakage"), threshold=options.threshold,
                        random_state=options.seed)


def _run_fingerprints(prep, options, objects):
    from sitecheck.analyses.fingerprints import find_fingerprints

    return find_fingerprints(prep)


def _fingerprint_sections(result):
    return {"fingerprints": [f.to_dict() for f in result.findings], "fingerprint_tests": result.tests}




def _run_maps(prep, options, objects):
    from sitecheck.analyses.maps import compute_maps

    try:  # one core per analysis: UMAP's numba kernels stay on this process's lane
        import numba

        numba.set_num_threads(1)
    except (ImportError, ValueError):  # pragma: no cover
        pass
    return compute_maps(prep, max_rows=options.map_rows, methods=("pca", "umap"), random_state=options.seed)


def _run_tsne(prep, options, objects):
    from sitecheck.analyses.maps import compute_maps

    return compute_maps(prep, max_rows=options.map_rows, methods=("tsne",), score_design=False,
                        random_state=options.seed)


def _merge_maps(whole, part):
    from sitecheck.analyses.maps import merge_maps

    return merge_maps(whole, part)




def _run_harmonise(prep, options, objects):
    from sitecheck.harmonise.methods import harmonisation_check

    return harmonisation_check(prep, random_state=options.seed)


def _harmonise_applies(prep) -> bool:
    return any(k == "numeric" for k in prep.features.kinds) and prep.n_used >= 50


def _maps_applies(prep) -> bool:
    return prep.features.n_features > 0 and prep.n_used >= 50


#: The analyses, in report order. The leak ranking reuses the probe's fold models
#: (objects["probe"].crossfit); the outcome analysis reads the leak ranking; the t-SNE map
#: is merged into the maps' result.
REGISTRY: List[Analysis] = [
    Analysis("probe", _run_probe, sections=_probe_sections),
    Analysis("leakage", _run_leakage, sections=lambda result: result.sections(), needs=("probe",)),
    Analysis("fingerprints", _run_fingerprints, sections=_fingerprint_sections),
    Analysis("maps", _run_maps, applies=_maps_applies, sections=lambda result: {"embedding": result}),
    # t-SNE is the longest single map (about 3/4 of the maps' time at 10,000 rows, measured):
    # computed apart, it runs beside the probe while PCA and UMAP fill the other lane.
    Analysis("maps_tsne", _run_tsne, applies=_maps_applies, part_of="maps", merge=_merge_maps, priority=2),
    Analysis("harmonise", _run_harmonise, applies=_harmonise_applies,
             sections=lambda result: {"harmonisation": result}, priority=1),
    Analysis("outcome", _run_outcome, applies=lambda prep: prep.outcome is not None,
             sections=lambda result: {"outcome": result}, needs=("leakage",)),
]
