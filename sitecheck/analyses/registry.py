"""The registry of analyses run by a scan, in order.

Each entry names a ``report.json`` section, says when it applies, runs the
analysis (a pure function of :class:`~sitecheck.table.prepare.Prepared`, the scan
options and earlier results) and maps its result to report sections. To add
an analysis, write its module, then add an :class:`Analysis` here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Dict, List, Optional, Union

from sitecheck._records import fields_dict


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
    #: A number, or a function of the prepared table estimating the analysis's seconds on one core
    #: (:func:`estimated_seconds`), since which stage is longest depends on the table's shape.
    priority: Union[float, Callable[[Any], float]] = 0
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
    #: A helper computed apart for the analysis named here: it runs whenever that one runs, has
    #: no ``needs`` and may go to the second process even though that analysis needs it (the
    #: scan then waits for its result before running that analysis).
    serves: Optional[str] = None

    def cost(self, prep) -> float:
        """The queue key of this analysis for ``prep`` (:attr:`priority`)."""
        return float(self.priority(prep) if callable(self.priority) else self.priority)


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
        return fields_dict(self)


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




def harmonise_parts(options) -> tuple:
    """The harmonisation methods of the scan, in two parts run as two analyses (``harmonise`` and
    ``harmonise_rest``) so that both processes can share the check: every other method, starting with
    the first (the four methods cost about the same, measured: 2.3-3.2 CPU s each on the demo). Each
    method's result is the same whichever part computes it (its own seeded streams). Both parts compute the
    shared pieces (the outcome AUC before harmonisation, the recording steps, the raw-value tests), so that
    neither waits for the other: measured on the demo, the four methods in one call 10.5 CPU s, one at a
    time 11.1 s in all."""
    from sitecheck.harmonise.methods import METHODS

    methods = tuple(getattr(options, "harmonise_methods", None) or METHODS)
    return methods[0::2], methods[1::2]


def _run_harmonise(prep, options, objects, part: int = 0):
    from sitecheck.harmonise.methods import harmonisation_check

    methods = harmonise_parts(options)[part]
    if not methods:
        return None
    return harmonisation_check(prep, random_state=options.seed, methods=methods,
                               **_resampling(options, n_boot=200, n_permutations=199))


def _run_harmonise_rest(prep, options, objects):
    return _run_harmonise(prep, options, objects, part=1)


def _merge_harmonise(whole, part):
    from sitecheck.harmonise.methods import merge_checks

    return merge_checks(whole, part)


def _run_residual_probe(prep, options, objects):
    from sitecheck.table.repair import residual_probe

    return residual_probe(prep, random_state=options.seed)


def _run_residual(prep, options, objects):
    from sitecheck.table.repair import residual_signal

    probe, repair = objects.get("probe"), objects.get("repair")
    if probe is None or repair is None:
        return None
    return residual_signal(prep, probe, objects.get("leakage"), repair["applied"], random_state=options.seed,
                           refit=objects.get("residual_probe"))


def _harmonise_applies(prep) -> bool:
    return any(k == "numeric" for k in prep.features.kinds) and prep.n_used >= 50


#: Rows the maps use by default (``ScanOptions.map_rows``), for the estimates below.
_MAP_ROWS = 10_000


def estimated_seconds(name: str, prep) -> float:
    """Seconds one core spends on an analysis of the second process's queue, estimated from the
    table's shape; used only to order that queue (longest first), never reported.

    Fitted by hand to stage seconds measured with ``tests/benchmarks/run.py`` and ``sitecheck demo`` on an
    idle 2-core machine (2026-12-02, after the harmonisation re-probes were capped at 20,000 rows):

    ============================  ======  ==========  =====  =======  ==============
    table                         maps    t-SNE map   harm.  outcome  residual probe
    ============================  ======  ==========  =====  =======  ==============
    demo, 6,000 x 19 numeric, 4   4.2     2.9         5.2    yes      1.3
    9,000 x 20 x 30 sites         5.9     4.1         8.8    no       (no repair)
    100,000 x 50 x 4              7.6     5.4         23.9   no       18.1
    ============================  ======  ==========  =====  =======  ==============

    The maps grow with the mapped rows only (capped at 10,000); harmonisation's four leak-free
    re-probes with the re-probed rows (capped at 20,000), the numeric features and the sites (one
    booster output per site), times three with an outcome (its cross-fits before and after), plus
    harmonising and testing every row (rows x features); the residual probe as the boosting probe.
    The order these give: harmonisation first on all three.
    """
    n = float(prep.n_used)
    m = min(n, _MAP_ROWS)
    if name == "maps":
        return 0.3 + 0.63e-3 * m
    if name == "maps_tsne":
        return 0.3 + 0.43e-3 * m
    if name in ("harmonise", "harmonise_rest"):  # two methods each (harmonise_parts): half the check
        p = sum(k == "numeric" for k in prep.features.kinds)
        sites = len(prep.site_labels)
        outcome = 3.0 if prep.outcome is not None else 1.0
        return 0.5 * (0.3 + 2.89e-4 * min(n, 20_000) ** 0.65 * p ** 0.8 * (1 + 0.198 * sites) * outcome
                      + 3.3e-6 * n * p)
    if name == "residual_probe":
        p = prep.features.n_features
        return 0.5 + 2.5e-4 * n ** 0.8 * max(p, 1) ** 0.5
    return 0.0


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
             priority=lambda prep: estimated_seconds("maps", prep), fills=("embedding",)),
    # The t-SNE map, computed apart so that it and PCA/UMAP can run in different processes; the queue
    # takes the longer of the maps and harmonisation first for the table's shape (estimated_seconds).
    Analysis("maps_tsne", _run_tsne, applies=_maps_applies, part_of="maps", merge=_merge_maps, on="repaired",
             priority=lambda prep: estimated_seconds("maps_tsne", prep), fills=("embedding",)),
    Analysis("harmonise", _run_harmonise, applies=_harmonise_applies,
             sections=lambda result: {"harmonisation": result}, on="repaired",
             priority=lambda prep: estimated_seconds("harmonise", prep), fills=("harmonisation",)),
    # the other half of the harmonisation methods (harmonise_parts), so that the two processes share the check
    Analysis("harmonise_rest", _run_harmonise_rest, applies=_harmonise_applies, part_of="harmonise",
             merge=_merge_harmonise, on="repaired", priority=lambda prep: estimated_seconds("harmonise_rest", prep),
             fills=("harmonisation",)),
    Analysis("outcome", _run_outcome, applies=lambda prep: prep.outcome is not None,
             sections=lambda result: {"outcome": result}, needs=("leakage",), on="repaired", fills=("outcome",),
             falls_back_without=("leakage",)),
    # reads the leak ranking and the fingerprints only (no fit): why a fingerprinted feature ranks near 0
    Analysis("reconcile", _run_reconcile, sections=lambda result: {"reconciliation": result},
             needs=("leakage", "fingerprints"), fills=("reconciliation",)),
    # the probe and the top of the leak ranking again, on the values after the plan's safe repairs; the
    # refit needs neither the probe nor the ranking, so it may run in the second process meanwhile
    Analysis("residual_probe", _run_residual_probe, on="residual", serves="residual", fills=("residual",),
             priority=lambda prep: estimated_seconds("residual_probe", prep)),
    Analysis("residual", _run_residual, sections=lambda result: {"residual": result},
             needs=("probe", "leakage", "residual_probe"), on="residual", fills=("residual",)),
]
