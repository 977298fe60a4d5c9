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
    #: The ``report.json`` sections this analysis fills (named in a failure record).
    fills: tuple = ()
    #: Analyses in ``needs`` whose failure does not stop this one: it runs without their
    #: result and says so in its own section (the outcome analysis ranks site leakers by
    #: its own univariate association when the leak ranking failed).
    falls_back_without: tuple = ()
    #: Which values the analysis reads: "given" (the diagnosis: probe, ranking, fingerprints),
    #: "repaired" (after the repair plan's safe entries, unless ScanOptions.repair is False:
    #: maps, harmonisation check, outcome) or "residual" (always the repaired values).
    on: str = "given"


@dataclass(frozen=True)
class AnalysisFailure:
    """An analysis that raised, or that did not run because one it needs failed.

    A scan records one per analysis (``report.json`` key ``failed_analyses``)
    and keeps every other analysis's sections.

    Attributes
    ----------
    analysis : str
        Registry name of the analysis.
    sections : tuple of str
        The ``report.json`` sections it would have filled (absent from the report).
    status : {"failed", "not_run"}
        ``failed``: it raised; ``not_run``: an analysis it needs failed.
    error : str or None
        Exception type (``None`` when not run).
    message : str
        One line: the exception's first line, or why it did not run.
    process : {"main", "second"}
        The process it ran in.
    """

    analysis: str
    sections: tuple
    status: str
    error: Optional[str]
    message: str
    process: str = "main"

    @classmethod
    def from_exception(cls, spec: "Analysis", exc: BaseException, *, process: str = "main") -> "AnalysisFailure":
        text = str(exc).strip()
        line = text.splitlines()[0].strip() if text else ""
        if len(line) > 300:
            line = line[:297] + "..."
        return cls(analysis=spec.name, sections=tuple(spec.fills), status="failed", error=type(exc).__name__,
                   message=line or type(exc).__name__, process=process)

    @classmethod
    def blocked(cls, spec: "Analysis", needed: str, *, process: str = "main") -> "AnalysisFailure":
        return cls(analysis=spec.name, sections=tuple(spec.fills), status="not_run", error=None,
                   message=f"not run: it needs the {needed} analysis, which failed", process=process)

    def to_dict(self) -> Dict[str, Any]:
        return {"analysis": self.analysis, "sections": list(self.sections), "status": self.status,
                "error": self.error, "message": self.message, "process": self.process}


def _resampling(options, **defaults):
    """The analysis's resampling sizes: the scan option when set (``ScanOptions.n_boot`` ...), else ``defaults``."""
    get = getattr(options, "resampling", None)
    return get(**defaults) if get is not None else defaults


def _run_probe(prep, options, objects):
    from sitecheck.analyses.probe import site_probe

    return site_probe(prep, random_state=options.seed, **_resampling(options, n_boot=500, n_permutations=999))


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
                            model="linear", **_resampling(options, n_boot=500, n_permutations=999)).to_dict()

    return rank_leakage(prep, probe.crossfit, cluster_threshold=options.cluster_threshold,
                        panels=prep.table.panels, missingness_probe=missingness_probe, random_state=options.seed)




def _run_outcome(prep, options, objects):
    from sitecheck.analyses.outcome import outcome_risk

    return outcome_risk(prep, leakage=objects.get("leakage"), threshold=options.threshold,
                        random_state=options.seed, **_resampling(options, n_boot=500))


def _run_fingerprints(prep, options, objects):
    from sitecheck.analyses.fingerprints import find_fingerprints

    return find_fingerprints(prep)


def _fingerprint_sections(result):
    out = {"fingerprints": [f.to_dict() for f in result.findings], "fingerprint_tests": result.tests}
    out["fingerprint_skipped"] = dict(getattr(result, "skipped", {}))
    if result.unit_columns:
        out["unit_columns"] = result.unit_columns
    return out




def _run_drift(prep, options, objects):
    from sitecheck.analyses.drift import drift_check

    return drift_check(prep, fingerprints=objects.get("fingerprints"), random_state=options.seed)


def _drift_applies(prep) -> bool:
    return getattr(prep.table, "time", None) is not None


def _run_reconcile(prep, options, objects):
    from .reconcile import reconcile

    leakage, fingerprints = objects.get("leakage"), objects.get("fingerprints")
    if leakage is None or fingerprints is None:
        return None
    return reconcile(leakage, fingerprints)


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

    from sitecheck.harmonise.methods import METHODS

    methods = tuple(getattr(options, "harmonise_methods", None) or METHODS)
    return harmonisation_check(prep, random_state=options.seed, methods=methods,
                               **_resampling(options, n_boot=200, n_permutations=199))


def _run_residual(prep, options, objects):
    from sitecheck.table.repair import residual_signal

    probe, repair = objects.get("probe"), objects.get("repair")
    if probe is None or repair is None:
        return None
    return residual_signal(prep, probe, objects.get("leakage"), repair["applied"], random_state=options.seed)


def _harmonise_applies(prep) -> bool:
    return any(k == "numeric" for k in prep.features.kinds) and prep.n_used >= 50


def _maps_applies(prep) -> bool:
    return prep.features.n_features > 0 and prep.n_used >= 50


#: The analyses, in report order. The leak ranking reuses the probe's fold models
#: (objects["probe"].crossfit); the outcome analysis reads the leak ranking; the drift analysis
#: reads the fingerprints; the t-SNE map
#: is merged into the maps' result.
REGISTRY: List[Analysis] = [
    Analysis("probe", _run_probe, sections=_probe_sections, fills=("probe", "groups")),
    Analysis("leakage", _run_leakage, sections=lambda result: result.sections(), needs=("probe",),
             fills=("leakage", "clusters", "missingness", "leakage_method")),
    Analysis("fingerprints", _run_fingerprints, sections=_fingerprint_sections,
             fills=("fingerprints", "fingerprint_tests", "fingerprint_skipped", "unit_columns")),
    # drift within each site over time (--time); follows the fingerprints' codes, limits and grids
    Analysis("drift", _run_drift, applies=_drift_applies, sections=lambda result: {"drift": result},
             needs=("fingerprints",), fills=("drift",)),
    Analysis("maps", _run_maps, applies=_maps_applies, sections=lambda result: {"embedding": result}, on="repaired",
             fills=("embedding",)),
    # t-SNE is the longest single map (about 3/4 of the maps' time at 10,000 rows, measured):
    # computed apart, it runs beside the probe while PCA and UMAP fill the other lane.
    Analysis("maps_tsne", _run_tsne, applies=_maps_applies, part_of="maps", merge=_merge_maps, priority=2,
             on="repaired", fills=("embedding",)),
    Analysis("harmonise", _run_harmonise, applies=_harmonise_applies,
             sections=lambda result: {"harmonisation": result}, priority=1, on="repaired", fills=("harmonisation",)),
    Analysis("outcome", _run_outcome, applies=lambda prep: prep.outcome is not None,
             sections=lambda result: {"outcome": result}, needs=("leakage",), on="repaired", fills=("outcome",),
             falls_back_without=("leakage",)),
    # reads the leak ranking and the fingerprints only (no fit): why a fingerprinted feature ranks near 0
    Analysis("reconcile", _run_reconcile, sections=lambda result: {"reconciliation": result},
             needs=("leakage", "fingerprints"), fills=("reconciliation",)),
    # the probe and the top of the leak ranking again, on the values after the plan's safe repairs
    Analysis("residual", _run_residual, sections=lambda result: {"residual": result}, needs=("probe", "leakage"),
             on="residual", fills=("residual",)),
]
