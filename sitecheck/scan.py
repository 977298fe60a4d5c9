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
from .errors import InputError
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

    def wants(self, name: str) -> bool:
        return self.analyses is None or name in self.analyses


def _versions() -> Dict[str, str]:
    import importlib.metadata as md

    out = {"sitecheck": __version__, "python": platform.python_version()}
    for pkg in ("numpy", "pandas", "scikit-learn", "scipy", "umap-learn", "matplotlib", "pyarrow"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:  # pragma: no cover
            out[pkg] = "not installed"
    return out


def _run_specs(prep: Prepared, options: ScanOptions, names, objects: Dict[str, Any],
               say: Progress, timings: Dict[str, float], threads: Optional[int] = 1) -> Dict[str, Any]:
    """Run the named analyses in turn with native thread pools limited to ``threads``
    (None: no limit); fill ``objects``."""
    from sitecheck.analyses import registry as analyses

    for spec in analyses.REGISTRY:
        if spec.name not in names:
            continue
        say(f"{spec.name}...")
        t0 = time.perf_counter()
        with thread_limit(threads):
            objects[spec.name] = spec.run(prep, options, objects)
        timings[spec.name] = round(time.perf_counter() - t0, 3)
    return objects


def _side_lane(prep: Prepared, options: ScanOptions, names) -> tuple:
    """Entry point of the second process: run ``names``; return (results, timings)."""
    timings: Dict[str, float] = {}
    objects = _run_specs(prep, options, set(names), {}, lambda msg: None, timings)
    return objects, timings


#: Above this many rows the scan runs in one process (a second one would copy the table).
PARALLEL_MAX_ROWS = SINGLE_THREAD_BELOW


def run_analyses(prep: Prepared, options: ScanOptions, *, progress: Optional[Progress] = None,
                 timings: Optional[Dict[str, float]] = None) -> Dict[str, Any]:
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
    todo = [a for a in analyses.REGISTRY if options.wants(a.part_of or a.name) and a.applies(prep)]
    names = {a.name for a in todo}
    needed = {d for a in todo for d in a.needs}
    side = [a.name for a in sorted(todo, key=lambda a: -a.priority) if not a.needs and a.name not in needed]
    objects: Dict[str, Any] = {}
    if int(options.n_jobs) > 1 and side and len(side) < len(todo) and prep.n_total <= PARALLEL_MAX_ROWS:
        from concurrent.futures import ProcessPoolExecutor

        say(f"{', '.join(side)}: queued for a second process")
        import threading
        from concurrent.futures.process import BrokenProcessPool

        queue, futures, lock, broken = list(side), {}, threading.RLock(), []
        with ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("spawn")) as pool:
            def submit_next(_done=None):
                # one task at a time, so that whatever has not started can still run here
                with lock:
                    if queue and not broken:
                        name = queue[0]
                        try:
                            future = pool.submit(_side_lane, prep, options, [name])
                        except (BrokenProcessPool, RuntimeError):
                            broken.append(name)
                            return
                        queue.pop(0)
                        futures[name] = future
                        future.add_done_callback(submit_next)

            submit_next()
            _run_specs(prep, options, names - set(side), objects, say, timings)
            while True:  # list scheduling: both processes take the next queued task when free
                with lock:
                    if not queue:
                        break
                    name = queue.pop(0)
                _run_specs(prep, options, {name}, objects, say, timings)
            remote = [name for name in side if name in futures]
            if any(not futures[name].done() for name in remote):
                say(f"waiting for {', '.join(remote)}")
            lost = []
            for name in remote:
                try:
                    side_objects, side_timings = futures[name].result()
                except BrokenProcessPool:
                    lost.append(name)
                    continue
                objects.update(side_objects)
                timings.update(side_timings)
        if lost:
            # The second process could not start or died (for instance a script that calls the
            # scan at import time, without an ``if __name__ == "__main__":`` guard, is run again
            # by the spawned process): its analyses run here instead, with the same results.
            say(f"the second process stopped; running {', '.join(lost)} here")
            _run_specs(prep, options, set(lost), objects, say, timings)
            remote = [name for name in remote if name not in lost]
        if remote:
            say(", ".join(f"{k} {timings[k]:.1f}s" for k in remote) + " (second process)")
    else:
        # Large tables stay in one process and may use every core; small ones keep one
        # thread per analysis so that n_jobs=1 and n_jobs=2 give the same numbers.
        threads = None if prep.n_total > PARALLEL_MAX_ROWS else 1
        _run_specs(prep, options, names, objects, say, timings, threads=threads)
    for spec in todo:  # fold parts computed apart into their analysis
        if spec.part_of is not None and spec.name in objects:
            part, whole = objects.pop(spec.name), objects.get(spec.part_of)
            if whole is not None and part is not None:
                objects[spec.part_of] = spec.merge(whole, part)
    sections: Dict[str, Any] = {}
    for spec in todo:
        result = objects.get(spec.name)
        if result is None:
            objects.pop(spec.name, None)
            continue
        for key, value in spec.sections(result).items():
            sections[key] = value
    return {"sections": sections, "objects": {a.name: objects[a.name] for a in todo if a.name in objects}}


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
    out = run_analyses(prep, options, progress=progress, timings=timings)
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
        warnings=tuple(table.warnings),
        run=run,
        sections=out["sections"],
        objects={"table": table, "prepared": prep, **out["objects"]},
    )


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
    raw = read_table(path, sep=run.sep, encoding=run.encoding)
    table = _table_for(raw, run)
    say(f"{len(table.frame)} rows, {len(table.site_labels)} sites, {len(table.features)} features")
    return scan_table(table, run.options, progress=progress, config=run.record())


def scan_file(path: str, *, site: Optional[str] = None, outcome: Optional[str] = None,
              covariates: Optional[Sequence[str]] = None, groups: Optional[Sequence[str]] = None,
              identifiers: Optional[Sequence[str]] = None, excluded: Optional[Sequence[str]] = None,
              config: Optional[str] = None, sep: Optional[str] = None, encoding: Optional[str] = None,
              options: Optional[ScanOptions] = None, progress: Optional[Progress] = None) -> ScanResult:
    """Read a file and scan it.

    Role arguments override the config file's roles; ``options`` fields set to
    other than their default (or the keys of a mapping) override the file's
    ``[options]``; ``sep`` and ``encoding`` override the file's. The command
    line goes through the same loader (:func:`sitecheck.reading.config.resolve_config`),
    so a config file gives the same report from either.
    """
    run = resolve_config(config, roles=_spec(site, outcome, covariates, groups, identifiers, excluded),
                         options=options, sep=sep, encoding=encoding)
    return scan_configured(path, run, progress=progress)


def scan_frame(frame: pd.DataFrame, *, site: str, outcome: Optional[str] = None,
               covariates: Optional[Sequence[str]] = None, groups: Optional[Sequence[str]] = None,
               identifiers: Optional[Sequence[str]] = None, excluded: Optional[Sequence[str]] = None,
               options: Optional[ScanOptions] = None, progress: Optional[Progress] = None) -> ScanResult:
    """Scan an in-memory DataFrame (intake's missing-code rules apply to text columns)."""
    raw = frame_to_raw(frame)
    opts = options or ScanOptions()
    table = assign_roles(raw, _spec(site, outcome, covariates, groups, identifiers, excluded),
                         min_site_rows=opts.min_site_rows, include_datetime=opts.include_datetime)
    return scan_table(table, opts, progress=progress)


def _spec(site, outcome, covariates, groups, identifiers, excluded) -> RoleSpec:
    t = lambda v: None if v is None else tuple(v)  # noqa: E731
    return RoleSpec(site=site, outcome=outcome, covariates=t(covariates), groups=t(groups),
                    identifiers=t(identifiers), excluded=t(excluded))
