"""Write the stored reference of the before/after identity test.

``tests/test_identity.py`` scans ``fixtures/demo_small.csv`` with the roles and options below and
compares the report document (``report.json`` as the scan writes it, without the figure listing that
only ``write_report`` adds) with ``demo_small_report.json`` beside this script, run-specific fields
stripped (:data:`RUN_SPECIFIC`). A change that is *meant* to alter numbers regenerates the file:

    PYTHONPATH=$PWD MPLBACKEND=Agg python tests/reference/regenerate.py

and says in its commit message why the numbers moved. ``--check`` compares instead of writing and
lists the differences (exit 1 when there are any). ``--full --reference PATH`` uses the scan's default
options instead (all four harmonisation methods, full resampling; about 20 s): a deeper check to run by
hand around a refactor (write PATH before, ``--check`` it after); it is not stored, so it never goes stale.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
from typing import Any, List

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
FIXTURE = os.path.join(ROOT, "fixtures", "demo_small.csv")
REFERENCE = os.path.join(HERE, "demo_small_report.json")

#: The demo's roles, as the other tests scan the fixture, with the time role so that drift runs too.
ROLES = dict(site="hospital", outcome="admitted_hdu", covariates=["age", "sex"], identifiers=["attendance_id"],
             time="arrival_date")

#: Quick options: every analysis runs (probe, leak ranking, fingerprints, drift, maps with t-SNE and
#: UMAP, harmonisation, outcome, reconciliation, residual) on a 400-row modelling subsample, with the
#: smallest resampling the options allow. Two harmonisation methods, not the first two of METHODS, so
#: that a method's own random stream (its index in METHODS) is exercised. One process: the numbers do
#: not depend on it below 200,000 rows, and a test should not start one.
QUICK = dict(n_jobs=1, folds=3, max_rows=400, map_rows=300, n_boot=50, n_permutations=19,
             harmonise_methods=("quantile", "combat"))
FULL = dict(n_jobs=1)

#: Fields that belong to the run, not to the data and the seed: (section, key) of report.json ...
RUN_SPECIFIC = (("run", "seconds"), ("run", "versions"), ("input", "path"))
#: ... and of repair_plan.json (generated_by: "sitecheck 0.1.0", the version that wrote it; the input path).
RUN_SPECIFIC_PLAN = ("generated_by", ("input", "path"))


def strip(doc: dict, fields=RUN_SPECIFIC) -> dict:
    """The document as JSON holds it, without its run-specific fields (timings, versions, the input's path).

    ``fields`` holds (section, key) pairs, or keys of the top level.
    """
    doc = json.loads(json.dumps(doc, allow_nan=False))  # what report.json holds: JSON types only
    for field in fields:
        if isinstance(field, str):
            doc.pop(field, None)
        else:
            doc.get(field[0], {}).pop(field[1], None)
    return doc


def current(full: bool = False) -> dict:
    """Scan the fixture now and return its stripped document (with the repair plan)."""
    from sitecheck.scan import ScanOptions, scan_file

    result = scan_file(FIXTURE, options=ScanOptions(**(FULL if full else QUICK)), **ROLES)
    plan = result.objects.get("repair_plan") if result.objects else None
    return {"report": strip(result.to_dict()), "repair_plan": None if plan is None else strip(plan.to_dict(), RUN_SPECIFIC_PLAN)}


#: The numerical libraries whose rounding reaches the report's floats. The reference records their versions.
NUMERIC_PACKAGES = ("numpy", "scipy", "scikit-learn", "pandas", "openTSNE", "umap-learn", "numba", "pynndescent")


def instruction_set() -> str:
    """The CPU code paths that round the report's floats: the machine and the widest vector extension its
    CPU reports (Linux ``/proc/cpuinfo``), the CPU numba compiles UMAP's kernels for (llvmlite's host CPU
    name) and the kernels OpenBLAS chose (threadpoolctl). Two machines that agree on all three run the
    same code paths."""
    import platform

    parts = [platform.machine()]
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            flags = set(fh.read().split())
        parts += [next((f for f in ("avx512f", "avx2", "avx", "sse4_2") if f in flags), "no-avx")]
    except OSError:
        pass
    try:
        import llvmlite.binding as llvm

        parts.append(f"numba target {llvm.get_host_cpu_name()}")
    except Exception:  # pragma: no cover - llvmlite comes with umap-learn
        pass
    try:
        import numpy  # noqa: F401  (loads OpenBLAS, so that threadpoolctl sees it)
        from threadpoolctl import threadpool_info

        blas = sorted({str(i.get("architecture")) for i in threadpool_info() if i.get("internal_api") == "openblas"})
        parts.append("OpenBLAS " + "/".join(blas))
    except Exception:  # pragma: no cover
        pass
    return "; ".join(parts)


def environment() -> dict:
    """Versions of :data:`NUMERIC_PACKAGES` installed now, and the :func:`instruction_set`."""
    from importlib.metadata import PackageNotFoundError, version

    out = {}
    for name in NUMERIC_PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = None
    out["instruction_set"] = instruction_set()
    return out


def compare(reference: dict, now: dict) -> List[str]:
    """Differences between the stored reference and the document ``now``: every field, floats to a
    relative 1e-6. The reference also records :func:`environment` (not compared), so that a failure can
    say whether the numerical libraries or the CPU's code paths changed since it was written (an unpinned
    install moves the last digits of fitted models and the t-SNE layout with their releases; another CPU
    moved UMAP's layout and the linear missingness probe with the same releases)."""
    keys = ("report", "repair_plan")
    return [d for k in keys for d in differences(reference[k], now[k], path=f"$.{k}")]


def differences(expected: Any, actual: Any, *, rel: float = 1e-6, path: str = "$") -> List[str]:
    """Where ``actual`` differs from ``expected``: structure, strings, booleans, None and integers
    exactly; floats within a relative tolerance ``rel`` (an integer-valued float compares as a float).
    Returns one line per difference, each with its JSON path."""
    if isinstance(expected, dict):
        if not isinstance(actual, dict):
            return [f"{path}: expected an object, got {type(actual).__name__}"]
        if list(expected) != list(actual):
            missing = [k for k in expected if k not in actual]
            extra = [k for k in actual if k not in expected]
            return [f"{path}: keys differ (missing {missing}, extra {extra}, or another order)"]
        return [d for k in expected for d in differences(expected[k], actual[k], rel=rel, path=f"{path}.{k}")]
    if isinstance(expected, list):
        if not isinstance(actual, list) or len(expected) != len(actual):
            return [f"{path}: expected a list of {len(expected)}, got "
                    f"{len(actual) if isinstance(actual, list) else type(actual).__name__}"]
        return [d for i, (e, a) in enumerate(zip(expected, actual))
                for d in differences(e, a, rel=rel, path=f"{path}[{i}]")]
    if isinstance(expected, float) and not isinstance(actual, bool) and isinstance(actual, (int, float)):
        if isinstance(actual, int) and not float(expected).is_integer():
            return [f"{path}: expected {expected!r}, got {actual!r}"]
        if math.isclose(expected, actual, rel_tol=rel, abs_tol=1e-12):
            return []
        return [f"{path}: expected {expected!r}, got {actual!r}"]
    if type(expected) is not type(actual) or expected != actual:
        return [f"{path}: expected {expected!r}, got {actual!r}"]
    return []


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="compare with the stored reference instead of writing")
    ap.add_argument("--full", action="store_true", help="the scan's default options (needs --reference)")
    ap.add_argument("--reference", help=f"the file to write or check (default {os.path.relpath(REFERENCE, ROOT)})")
    args = ap.parse_args(argv)
    if args.full and not args.reference:
        ap.error("--full needs --reference PATH (the full reference is not stored)")
    path = args.reference or REFERENCE
    doc = current(full=args.full)
    if args.check:
        with open(path, encoding="utf-8") as fh:
            found = compare(json.load(fh), doc)
        print("\n".join(found[:50]) if found else f"identical to {path}")
        return 1 if found else 0
    doc = {"environment": environment(), **doc}
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=1, sort_keys=False, allow_nan=False)
        fh.write("\n")
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    if ROOT not in sys.path:
        sys.path.insert(0, ROOT)
    sys.exit(main())
