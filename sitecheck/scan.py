"""Run every analysis on a table: the library's main entry point.

>>> from sitecheck.scan import scan_file                      # doctest: +SKIP
>>> result = scan_file("pooled.csv", site="hospital", outcome="died")  # doctest: +SKIP
>>> result["probe"].auc                                         # doctest: +SKIP
"""
from __future__ import annotations

import platform
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, Optional, Sequence

import numpy as np
import pandas as pd

from sitecheck import __version__
from sitecheck._runtime import SINGLE_THREAD_BELOW, thread_limit
from sitecheck.reading.config import RunConfig, resolve_config
from sitecheck.errors import InputError
from sitecheck.reading.intake import RawTable, frame_to_raw, read_table
from sitecheck.table.prepare import Prepared, prepare
from sitecheck.report.result import ScanResult
from sitecheck.table.roles import RoleSpec, Table, assign_roles

Progress = Callable[[str], None]


@dataclass(frozen=True)
class ScanOptions:
    """Options of a scan (everything but the roles).

    Parameters
    ----------
    seed : int, default 0
    folds : int, default 5
    max_rows : int, default 100000
        Cap on the site-stratified subsample used for modelling.
    map_rows : int, default 10000
        Cap on the subsample drawn for the 2-D maps.
    min_site_rows : int, default 20
    min_cell : int, default 10
        Small-cell threshold for shared outputs.
    include_datetime : bool, default False
    cluster_threshold : float, default 0.7
        Spearman |rho| above which features are permuted together.
    threshold : float or None
        Decision threshold of the outcome model for equalized odds (None: Youden).
    analyses : tuple of str or None
        Limit the analyses run (None: all that apply).
    n_jobs : int, default 2
        2 runs the independent analyses in a second process (tables up to 200,000
        rows); 1 runs everything in turn in this process.
    repair : bool, default True
        The maps, the harmonisation check and the outcome analysis read the values
        after the repair plan's safe entries (:mod:`sitecheck.table.repair`); False keeps
        the values as given. The probe, the leak ranking and the fingerprints always
        read the values as given; the residual probe always the repaired ones.
    censor_policy : str, optional
        Policy of the plan's censoring entries (:data:`sitecheck.table.repair.CENSOR_POLICIES`);
        default after Hornung & Reed (1990).
    n_boot : int or None
        Bootstrap resamples of every interval (None: each analysis's own default,
        500 for the probe and the outcome analysis, 200 for the harmonisation
        re-probe). Fewer make a quicker, coarser scan (at least 50).
    n_permutations : int or None
        Label permutations of every permutation p-value (None: each analysis's own
        default, 999 for the probe, 199 for the harmonisation re-probe; at least 19).
    harmonise_methods : tuple of str or None
        Harmonisation methods checked (None: all of ``sitecheck.harmonise.methods.METHODS``).

    Examples
    --------
    >>> from sitecheck import ScanOptions
    >>> options = ScanOptions(seed=3, folds=3, analyses=("probe", "leakage"))
    >>> options.folds, options.wants("maps")
    (3, False)
    """

    seed: int = 0
    folds: int = 5
    max_rows: int = 100_000
    map_rows: int = 10_000
    min_site_rows: int = 20
    min_cell: int = 10
    include_datetime: bool = False
    cluster_threshold: float = 0.7
    threshold: Optional[float] = None
    analyses: Optional[tuple] = None
    n_jobs: int = 2
    repair: bool = True
    censor_policy: Optional[str] = None
    n_boot: Optional[int] = None
    n_permutations: Optional[int] = None
    harmonise_methods: Optional[tuple] = None

    def __post_init__(self):
        from sitecheck.reading.config import SCAN_OPTION_KEYS, check_option

        for name in SCAN_OPTION_KEYS:  # the checks of the config file's [options] (one place)
            if getattr(self, name) is not None:
                check_option(name, getattr(self, name))
        for name, low in (("n_boot", 50), ("n_permutations", 19)):
            v = getattr(self, name)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low):
                raise InputError(f"{name} must be an integer of at least {low} (or None), got {v!r}", option=name)
        if self.harmonise_methods is not None:
            from sitecheck.harmonise.methods import METHODS

            bad = [m for m in self.harmonise_methods if m not in METHODS]
            if bad or not self.harmonise_methods:
                raise InputError(f"harmonise_methods must name some of {', '.join(METHODS)}, got "
                                 f"{self.harmonise_methods!r}")

    def resampling(self, **defaults) -> Dict[str, int]:
        """``n_boot``/``n_permutations`` for one analysis: the option when set, else its default."""
        out = {}
        for key, value in defaults.items():
            mine = getattr(self, key)
            out[key] = int(value if mine is None else mine)
        return out

    def wants(self, name: str) -> bool:
        return self.analyses is None or name in self.analyses


def _versions() -> Dict[str, str]:
    import importlib.metadata as md

    out = {"sitecheck": __version__, "python": platform.python_version()}
    for pkg in ("numpy", "pandas", "scikit-learn", "scipy", "umap-learn", "openTSNE", "matplotlib", "pyarrow"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:  # pragma: no cover
            out[pkg] = "not installed"
    return out


def _prep_for(preps, spec) -> Prepared:
    """The prepared table an analysis reads (``Analysis.on``)."""
    if isinstance(preps, dict):
        return preps.get(spec.on, preps["given"])
    return preps


def debug_enabled() -> bool:
    """True when ``SITECHECK_DEBUG`` is set (not empty or "0"): analysis errors are raised, not isolated."""
    import os

    return os.environ.get("SITECHECK_DEBUG", "") not in ("", "0")


def _run_specs(preps, options: ScanOptions, names, objects: Dict[str, Any],
               say: Progress, timings: Dict[str, float], threads: Optional[int] = 1,
               failures: Optional[Dict[str, Any]] = None, process: str = "main",
               wait_for: Optional[Callable[[str], None]] = None) -> Dict[str, Any]:
    """Run the named analyses in turn with native thread pools limited to ``threads``
    (None: no limit); fill ``objects``. ``preps`` is one Prepared or {"given", "repaired",
    "residual"}: each analysis reads the one its ``on`` names.

    An analysis that raises anything but an :class:`~sitecheck.errors.InputError` (bad input the
    user can fix, which stops the scan) is recorded in ``failures`` as an
    :class:`~sitecheck.analyses.registry.AnalysisFailure` and the next one runs; an analysis that
    needs a failed one is recorded as not run. With ``SITECHECK_DEBUG`` set the exception is raised.
    ``wait_for(name)``, when given, is called for each analysis a spec needs before it runs (the
    scan's way to collect a result computed in its second process).
    """
    from sitecheck.analyses import registry as analyses

    failures = failures if failures is not None else {}
    for spec in analyses.REGISTRY:
        if spec.name not in names:
            continue
        if wait_for is not None:
            for d in spec.needs:
                wait_for(d)
        blocked = [d for d in spec.needs if d in failures and d not in spec.falls_back_without]
        if blocked:
            failures[spec.name] = analyses.AnalysisFailure.blocked(spec, blocked[0], process=process)
            say(f"{spec.name}: not run ({blocked[0]} failed)")
            continue
        say(f"{spec.name}...")
        t0 = time.perf_counter()
        try:
            with thread_limit(threads):
                objects[spec.name] = spec.run(_prep_for(preps, spec), options, objects)
        except InputError:
            raise
        except Exception as exc:  # one analysis's fault never loses the others' results
            if debug_enabled():
                raise
            failures[spec.name] = analyses.AnalysisFailure.from_exception(spec, exc, process=process)
            objects.pop(spec.name, None)
            say(f"{spec.name}: failed ({type(exc).__name__})")
        timings[spec.name] = round(time.perf_counter() - t0, 3)
    return objects


def _side_lane(prep: Prepared, options: ScanOptions, names) -> tuple:
    """Entry point of the second process: run ``names``; return (results, timings, failures)."""
    timings: Dict[str, float] = {}
    failures: Dict[str, Any] = {}
    objects = _run_specs(prep, options, set(names), {}, lambda msg: None, timings, failures=failures,
                         process="second")
    return objects, timings, failures


#: Above this many rows the scan runs in one process (a second one would copy the table).
PARALLEL_MAX_ROWS = SINGLE_THREAD_BELOW


def run_analyses(prep: Prepared, options: ScanOptions, *, progress: Optional[Progress] = None,
                 timings: Optional[Dict[str, float]] = None, repaired: Optional[Prepared] = None,
                 done: Optional[Dict[str, Any]] = None, failed: Optional[Dict[str, Any]] = None) -> Dict[str, Any]:
    """Run the registered analyses on a prepared table; return {"sections", "objects"}.

    With ``options.n_jobs > 1`` (and at most :data:`PARALLEL_MAX_ROWS` rows) the
    analyses that nothing else depends on and that depend on nothing (fingerprints,
    PCA and UMAP maps, the t-SNE map, harmonisation) are queued, longest first
    (``Analysis.priority``), for a second process while the probe, the leak ranking
    and the outcome analysis run in this one; when this one is free it takes the next
    queued task too, one at a time. Every analysis runs with single-threaded native
    thread pools and its own seeded generators, so the results are the same whatever
    the schedule; parts are merged (``Analysis.part_of``) and sections assembled in
    registry order.

    ``repaired`` is the table after the repair plan's safe entries: analyses with
    ``on="repaired"`` read it when ``options.repair`` (else the values as given), those
    with ``on="residual"`` always. ``done`` holds results computed before (the
    fingerprints, from which the plan was built; the plan itself as ``"repair"``); ``failed``
    the failures recorded before (:class:`~sitecheck.analyses.registry.AnalysisFailure` by name).
    The result's ``"failures"`` lists every failed or not-run analysis in registry order.
    """
    import multiprocessing as mp

    from sitecheck.analyses import registry as analyses

    if getattr(mp.current_process(), "_inheriting", False):
        # This is the spawned second process re-running a script that scans at import time:
        # stop at once, so the parent runs the queued analyses itself.
        raise RuntimeError("sitecheck: a scan was started while a spawned worker process was starting; "
                           "put the script's scan under `if __name__ == \"__main__\":`")
    say = progress or (lambda msg: None)
    timings = timings if timings is not None else {}
    done = dict(done or {})
    failures: Dict[str, Any] = dict(failed or {})
    preps = {"given": prep, "repaired": repaired if (repaired is not None and options.repair) else prep,
             "residual": repaired if repaired is not None else prep}
    todo = [a for a in analyses.REGISTRY if options.wants(a.part_of or a.serves or a.name)
            and a.applies(_prep_for(preps, a))
            and (a.on != "residual" or repaired is not None)]
    names = {a.name for a in todo} - set(done) - set(failures)
    needed = {d for a in todo for d in a.needs}
    side = [a.name for a in sorted(todo, key=lambda a: -a.cost(_prep_for(preps, a)))
            if not a.needs and (a.name not in needed or a.serves) and a.name in names]
    spec_of = {a.name: a for a in todo}
    objects: Dict[str, Any] = dict(done)
    if int(options.n_jobs) > 1 and side and len(side) < len(todo) and prep.n_total <= PARALLEL_MAX_ROWS:
        from concurrent.futures import ProcessPoolExecutor

        say(f"{', '.join(side)}: queued for a second process")
        import threading
        from concurrent.futures.process import BrokenProcessPool

        queue, futures, lock, broken = list(side), {}, threading.RLock(), []
        by_name = {a.name: a for a in todo}
        with ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("spawn")) as pool:
            def submit_next(_done=None):
                # one task at a time, so that whatever has not started can still run here
                with lock:
                    if queue and not broken:
                        name = queue[0]
                        try:
                            future = pool.submit(_side_lane, _prep_for(preps, spec_of[name]), options, [name])
                        except (BrokenProcessPool, RuntimeError):
                            broken.append(name)
                            return
                        queue.pop(0)
                        futures[name] = future
                        future.add_done_callback(submit_next)

            submit_next()
            collected, lost = set(), []

            def collect(name):
                """Fold in the second process's result for ``name`` (waiting for it); once."""
                if name in collected or name not in futures:
                    return
                collected.add(name)
                try:
                    side_objects, side_timings, side_failures = futures[name].result()
                except BrokenProcessPool:
                    lost.append(name)
                    return
                except InputError:
                    raise
                except Exception as exc:  # raised outside the analysis (e.g. its result would not pickle)
                    if debug_enabled():
                        raise
                    failures[name] = analyses.AnalysisFailure.from_exception(by_name[name], exc, process="second")
                    return
                objects.update(side_objects)
                timings.update(side_timings)
                failures.update(side_failures)

            def wait_for(name):
                """An analysis about to run here needs ``name``: take it from the queue, or wait for it."""
                with lock:
                    queued = name in queue
                    if queued:
                        queue.remove(name)
                if queued:
                    _run_specs(preps, options, {name}, objects, say, timings, failures=failures)
                    return
                if name in futures and not futures[name].done():
                    say(f"waiting for {name}")
                collect(name)
                if name in lost:  # the second process died with it: run it here
                    lost.remove(name)
                    _run_specs(preps, options, {name}, objects, say, timings, failures=failures)

            _run_specs(preps, options, names - set(side), objects, say, timings, failures=failures,
                       wait_for=wait_for)
            while True:  # list scheduling: both processes take the next queued task when free
                with lock:
                    if not queue:
                        break
                    name = queue.pop(0)
                _run_specs(preps, options, {name}, objects, say, timings, failures=failures)
            remote = [name for name in side if name in futures]
            if any(not futures[name].done() for name in remote if name not in collected):
                say(f"waiting for {', '.join(n for n in remote if n not in collected)}")
            for name in remote:
                collect(name)
        if lost:
            # The second process could not start or died (for instance a script that calls the
            # scan at import time, without an ``if __name__ == "__main__":`` guard, is run again
            # by the spawned process): its analyses run here instead, with the same results.
            say(f"the second process stopped; running {', '.join(lost)} here")
            _run_specs(preps, options, set(lost), objects, say, timings, failures=failures)
            remote = [name for name in remote if name not in lost]
        if remote:
            say(", ".join(f"{k} {timings[k]:.1f}s" for k in remote if k in timings) + " (second process)")
    else:
        # Large tables stay in one process and may use every core; small ones keep one
        # thread per analysis so that n_jobs=1 and n_jobs=2 give the same numbers.
        threads = None if prep.n_total > PARALLEL_MAX_ROWS else 1
        _run_specs(preps, options, names, objects, say, timings, threads=threads, failures=failures)
    for spec in todo:  # fold parts computed apart into their analysis
        if spec.part_of is not None and spec.name in objects:
            part, whole = objects.pop(spec.name), objects.get(spec.part_of)
            if whole is not None and part is not None:
                objects[spec.part_of] = _guarded(spec, failures, lambda: spec.merge(whole, part), whole)
    sections: Dict[str, Any] = {}
    for spec in todo:
        result = objects.get(spec.name)
        if result is None:
            objects.pop(spec.name, None)
            continue
        # a section that cannot be written to report.json fails its analysis here, not the report
        secs = _guarded(spec, failures, lambda: _checked_sections(spec, result), None)
        if secs is None:
            objects.pop(spec.name, None)
            continue
        sections.update(secs)
    order = [a.name for a in analyses.REGISTRY]
    failed_list = tuple(failures[n] for n in sorted(failures, key=lambda n: order.index(n) if n in order else -1))
    return {"sections": sections, "objects": {a.name: objects[a.name] for a in todo if a.name in objects},
            "failures": failed_list}


def _checked_sections(spec, result) -> Dict[str, Any]:
    """The analysis's sections, once written as report.json would write them."""
    import json

    from sitecheck.report.result import to_jsonable

    secs = spec.sections(result)
    for value in secs.values():
        json.dumps(to_jsonable(value), allow_nan=False)
    return secs


def _guarded(spec, failures: Dict[str, Any], fn: Callable[[], Any], default: Any) -> Any:
    """``fn()``, or ``default`` with ``spec`` recorded as failed when it raises (see :func:`_run_specs`)."""
    from sitecheck.analyses import registry as analyses

    try:
        return fn()
    except InputError:
        raise
    except Exception as exc:
        if debug_enabled():
            raise
        failures[spec.name] = analyses.AnalysisFailure.from_exception(spec, exc)
        return default


def scan_table(table: Table, options: ScanOptions = ScanOptions(), *,
               progress: Optional[Progress] = None, config: Optional[dict] = None) -> ScanResult:
    """Run the scan on a validated table."""
    t_start = time.perf_counter()
    timings: Dict[str, float] = {}
    say = progress or (lambda msg: None)
    say("preparing")
    t0 = time.perf_counter()
    prep = prepare(table, n_splits=options.folds, max_rows=options.max_rows, random_state=options.seed)
    timings["prepare"] = round(time.perf_counter() - t0, 3)
    failed: Dict[str, Any] = {}
    done, repaired, plan_doc = _repair_stage(table, prep, options, say, timings, failed)
    out = run_analyses(prep, options, progress=progress, timings=timings, repaired=repaired, done=done,
                       failed=failed)
    sections = dict(out["sections"])
    objects = dict(out["objects"])
    failures = list(out["failures"])
    if plan_doc is not None and objects.get("drift") is not None:
        _period_stage(table, plan_doc, objects["drift"], failures)
    if plan_doc is not None:
        values = "after repair" if (options.repair and repaired is not None) else "as given"
        for key in ("embedding", "harmonisation", "outcome"):
            if key in sections:
                # harmonisation is keyed by method: the label goes into each method's entry
                sections[key] = Labelled(sections[key], values, per_entry=key == "harmonisation")
        sections["repair"] = plan_doc["summary"]
        objects["repair_plan"] = plan_doc["plan"]
        objects["repair_log"] = plan_doc["log"]
    raw = table.source
    input_doc = {
        "path": raw.path,
        "format": raw.format,
        "rows": int(len(raw.frame)),
        "rows_used": int(len(table.frame)),
        "columns": int(raw.frame.shape[1]),
        "sha256": raw.sha256,
        "site_column": table.site,
        "sites": table.site_counts(),
        "dropped_sites": dict(table.dropped_sites),
        "outcome": table.outcome,
    }
    if table.time:
        input_doc["time_column"] = table.time
    timings["total"] = round(time.perf_counter() - t_start, 3)
    run = {
        "seed": int(options.seed),
        "options": {k: (list(v) if isinstance(v, tuple) else v) for k, v in options.__dict__.items()},
        "config": config or {},
        "versions": _versions(),
        "seconds": timings,
    }
    return ScanResult(
        input=input_doc,
        columns=tuple(c.to_dict() for c in table.columns),
        findings=tuple(f.to_dict() for f in table.findings),
        warnings=tuple(table.warnings) + _pooling_warnings(prep),
        run=run,
        sections=sections,
        failures=tuple(f.to_dict() for f in failures),
        objects={"table": table, "prepared": prep, **objects},
    )


class Labelled:
    """A section result with the values it was computed on (``"after repair"`` or
    ``"as given"``) added to its ``report.json`` dict; attributes pass through."""

    def __init__(self, inner: Any, values: str, per_entry: bool = False):
        self.__dict__["inner"] = inner
        self.__dict__["values"] = values
        self.__dict__["per_entry"] = per_entry

    def __getattr__(self, name: str) -> Any:
        if "inner" not in self.__dict__:  # while unpickling, before __dict__ is restored
            raise AttributeError(name)
        return getattr(self.__dict__["inner"], name)

    def to_dict(self) -> Dict[str, Any]:
        from sitecheck.report.result import to_jsonable

        d = to_jsonable(self.__dict__["inner"])
        if isinstance(d, dict) and self.__dict__["per_entry"]:
            return {k: ({"values": self.__dict__["values"], **v} if isinstance(v, dict) else v) for k, v in d.items()}
        if isinstance(d, dict):
            d = {"values": self.__dict__["values"], **d}
        return d


def _repair_stage(table: Table, prep: Prepared, options: ScanOptions, say: Progress, timings: Dict[str, float],
                  failed: Optional[Dict[str, Any]] = None):
    """Fingerprints first, then the repair plan and the table after its safe entries.

    Returns (results computed here, the repaired Prepared or None, the plan's documents or None).
    A failure of the fingerprints or of the plan is recorded in ``failed`` (as for any analysis);
    the scan then goes on with the values as given.
    """
    if not options.wants("fingerprints"):
        return {}, None, None
    from sitecheck.analyses import registry as analyses
    from sitecheck.analyses.fingerprints import find_fingerprints
    from sitecheck.table.repair import apply_repairs, plan_repairs

    failed = failed if failed is not None else {}
    spec = {a.name: a for a in analyses.REGISTRY}["fingerprints"]
    say("fingerprints...")
    t0 = time.perf_counter()
    fp = _guarded(spec, failed, lambda: find_fingerprints(prep), None)
    timings["fingerprints"] = round(time.perf_counter() - t0, 3)
    if fp is None:
        return {}, None, None
    t0 = time.perf_counter()
    repair_spec = analyses.Analysis("repair", lambda *a: None, fills=("repair",))

    def plan_and_apply():
        plan = plan_repairs(table, fp, censor_policy=options.censor_policy)
        repaired_table, log = apply_repairs(table, plan, safe_only=True)
        applied = [e for e in plan.entries if e.id in log.applied]
        repaired = None
        if applied:
            repaired = prepare(repaired_table, n_splits=options.folds, max_rows=options.max_rows,
                               random_state=options.seed)
        return plan, log, applied, repaired

    got = _guarded(repair_spec, failed, plan_and_apply, None)
    timings["repair"] = round(time.perf_counter() - t0, 3)
    if got is None:  # the plan failed: the fingerprints stand, the values stay as given
        return {"fingerprints": fp}, None, None
    plan, log, applied, repaired = got
    applied_doc = [{"id": e.id, "kind": e.kind, "column": e.column, "site": e.site, "operation": e.operation,
                    "cells": int(sum(log.cells_by_site.get(str(e.site), {}).get(e.column, {}).values()))
                    if e.operation != "drop_column" else e.cells} for e in applied]
    say(f"repair plan: {len(plan.entries)} entries, {len(applied)} safe ones applied in memory")
    summary = {
        "plan_file": "repair_plan.json", "plan_version": plan.version, "n_entries": len(plan.entries),
        "n_safe": len(plan.safe()),
        "values_for_maps_harmonisation_outcome": "after repair" if (options.repair and repaired is not None)
        else "as given",
        "entries": _plan_entries_doc(plan),
        "applied_in_scan": applied_doc, "log": log.to_dict(), "not_repaired": list(plan.not_repaired),
    }
    return ({"fingerprints": fp, "repair": {"plan": plan, "log": log, "applied": applied_doc}}, repaired,
            {"summary": summary, "plan": plan, "log": log})


def _plan_entries_doc(plan) -> list:
    """The plan's entries as report.json's ``repair.entries`` lists them (an entry scoped to a period
    also carries its period, parameters and evidence)."""
    out = []
    for e in plan.entries:
        d = {"id": e.id, "kind": e.kind, "finding": {"kind": e.kind, "feature": e.finding_feature, "site": e.site},
             "column": e.column, "site": e.site, "operation": e.operation,
             "cells": e.cells, "rows": e.rows, "safe": e.safe, "enabled": e.enabled, "reason": e.reason}
        if e.period is not None:
            d.update(period=dict(e.period), params=dict(e.params), evidence=dict(e.evidence))
        out.append(d)
    return out


def _period_stage(table: Table, plan_doc: Dict[str, Any], drift, failures: list) -> None:
    """Extend the plan with entries scoped to a period from the drift analysis's findings
    (:func:`sitecheck.table.repair.plan_period_repairs`); they are never safe by default, so the
    values the scan repaired in memory do not change. A failure here is recorded and leaves the
    plan as it was."""
    from sitecheck.analyses import registry as analyses
    from sitecheck.table.repair import plan_period_repairs

    failed: Dict[str, Any] = {}
    spec = analyses.Analysis("repair", lambda *a: None, fills=("repair",))
    plan = _guarded(spec, failed, lambda: plan_period_repairs(table, drift, plan_doc["plan"]), None)
    failures.extend(failed.values())
    if plan is None or plan is plan_doc["plan"]:
        return
    plan_doc["plan"] = plan
    summary = plan_doc["summary"]
    summary.update(plan_version=plan.version, n_entries=len(plan.entries), n_safe=len(plan.safe()),
                   entries=_plan_entries_doc(plan), not_repaired=list(plan.not_repaired))


def _pooling_warnings(prep: Prepared) -> tuple:
    """One warning per categorical column whose rare levels were pooled (Prepared.features/covariates)."""
    out = []
    for enc in (prep.features, prep.covariates):
        if enc is None:
            continue
        for name, n in enc.lumped.items():
            out.append(f"column {name!r}: {n + enc.max_levels - 1} categorical levels; the {enc.max_levels - 1} most "
                       f"frequent are kept and the {n} rarer ones pooled into one level '(other)' (the probe "
                       f"accepts {enc.max_levels} levels with {len(prep.site_labels)} sites)")
    return tuple(out)


def build_table(raw: RawTable, roles: RoleSpec, *, config_path: Optional[str] = None,
                min_site_rows: Optional[int] = None, include_datetime: Optional[bool] = None):
    """Merge roles over a config file and validate; return (Table, the file's options)."""
    run = resolve_config(config_path, roles=roles,
                         options={"min_site_rows": min_site_rows, "include_datetime": include_datetime})
    return _table_for(raw, run), run.file_options


def _table_for(raw: RawTable, run: RunConfig) -> Table:
    return assign_roles(raw, run.roles, min_site_rows=run.options.min_site_rows,
                        include_datetime=run.options.include_datetime)


def scan_configured(path: str, run: RunConfig, *, progress: Optional[Progress] = None) -> ScanResult:
    """Read ``path`` and scan it as ``run`` (from :func:`sitecheck.reading.config.resolve_config`) says.

    The one path of a file scan, shared by :func:`scan_file` and the command line.
    """
    if not isinstance(run, RunConfig):
        raise TypeError(f"run must be a RunConfig (see sitecheck.reading.config.resolve_config), got {type(run).__name__}")
    say = progress or (lambda msg: None)
    say(f"reading {path}")
    raw = read_table(path, sep=run.sep, encoding=run.encoding, site=run.roles.site)
    table = _table_for(raw, run)
    say(f"{len(table.frame)} rows, {len(table.site_labels)} sites, {len(table.features)} features")
    return scan_table(table, run.options, progress=progress, config=run.record())


def scan_file(path: str, *, site: Optional[str] = None, outcome: Optional[str] = None,
              covariates: Optional[Sequence[str]] = None, groups: Optional[Sequence[str]] = None,
              identifiers: Optional[Sequence[str]] = None, excluded: Optional[Sequence[str]] = None,
              config: Optional[str] = None, sep: Optional[str] = None, encoding: Optional[str] = None,
              options: Optional[ScanOptions] = None, progress: Optional[Progress] = None,
              time: Optional[str] = None) -> ScanResult:
    """Read a file and scan it (``time`` names the date column that adds the drift analysis).

    Parameters
    ----------
    path : str
        CSV, TSV, gzip-compressed CSV/TSV or Parquet, chosen by extension.
    site, outcome : str, optional
        Column roles; override the config file's.
    covariates, groups, identifiers, excluded : sequence of str, optional
        Column roles; each overrides the config file's list.
    config : str, optional
        TOML file with roles, ``[panels]`` and ``[options]``.
    sep, encoding : str, optional
        Reading options; override the config file's (default: from the extension, utf-8).
    options : ScanOptions or mapping, optional
        Fields set to other than their default (or the keys of a mapping) override the
        config file's ``[options]``.
    progress : callable, optional
        Called with one line per stage.

    Returns
    -------
    ScanResult

    Raises
    ------
    InputError
        A problem with the file, the config file or the roles, named in one line.

    Notes
    -----
    The command line goes through the same loader
    (:func:`sitecheck.reading.config.resolve_config`), so a config file gives the same
    ``report.json`` from either (``tests/test_report.py``).

    Examples
    --------
    A small copy of the invented demo network, probed for its site signal only (the full
    scan adds the leak ranking, fingerprints, maps, harmonisation and outcome sections):

    >>> from sitecheck import ScanOptions, generate_demo, scan_file
    >>> generate_demo(600, seed=7).frame.to_csv("pooled.csv", index=False)
    >>> result = scan_file("pooled.csv", site="hospital", identifiers=["attendance_id"],
    ...                    options=ScanOptions(analyses=("probe",), folds=3, n_jobs=1))
    >>> result.to_dict()["probe"]["verdict"]
    'strong'
    """
    run = resolve_config(config, roles=_spec(site, outcome, covariates, groups, identifiers, excluded, time),
                         options=options, sep=sep, encoding=encoding)
    return scan_configured(path, run, progress=progress)


def scan_frame(frame: pd.DataFrame, *, site: str, outcome: Optional[str] = None,
               covariates: Optional[Sequence[str]] = None, groups: Optional[Sequence[str]] = None,
               identifiers: Optional[Sequence[str]] = None, excluded: Optional[Sequence[str]] = None,
               options: Optional[ScanOptions] = None, progress: Optional[Progress] = None,
               time: Optional[str] = None) -> ScanResult:
    """Scan an in-memory DataFrame (intake's missing-code rules apply to text columns).

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per patient (or attendance); it is not modified.
    site : str
        The site (or group) column whose signal is measured.
    outcome : str, optional
        A binary outcome: adds the shortcut analysis.
    covariates, groups, identifiers, excluded : sequence of str, optional
        Column roles, as for :func:`scan_file`; every other column is a feature.
    options : ScanOptions, optional
        Everything but the roles (seed, folds, analyses, ...).
    progress : callable, optional
        Called with one line per stage.
    time : str, optional
        A date column: adds the drift analysis within each site.

    Returns
    -------
    ScanResult

    Raises
    ------
    InputError
        Unknown columns, fewer than two sites, a non-binary outcome, no usable feature.

    Examples
    --------
    >>> from sitecheck import ScanOptions, generate_demo, scan_frame
    >>> demo = generate_demo(600, seed=7)
    >>> result = scan_frame(demo.frame, site="hospital", identifiers=["attendance_id"],
    ...                     options=ScanOptions(analyses=("probe",), folds=3, n_jobs=1))
    >>> probe = result.to_dict()["probe"]
    >>> probe["verdict"], probe["auc"] > 0.9
    ('strong', True)
    """
    raw = frame_to_raw(frame, site=site)
    opts = options or ScanOptions()
    table = assign_roles(raw, _spec(site, outcome, covariates, groups, identifiers, excluded, time),
                         min_site_rows=opts.min_site_rows, include_datetime=opts.include_datetime)
    return scan_table(table, opts, progress=progress)


def _spec(site, outcome, covariates, groups, identifiers, excluded, time=None) -> RoleSpec:
    t = lambda v: None if v is None else tuple(v)  # noqa: E731
    return RoleSpec(site=site, outcome=outcome, covariates=t(covariates), groups=t(groups),
                    identifiers=t(identifiers), excluded=t(excluded), time=time)
