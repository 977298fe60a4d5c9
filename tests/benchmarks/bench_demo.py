"""Demo benchmark: wall and CPU seconds of ``sitecheck demo``, as a user runs it, and where they go.

Runs the installed command (``sitecheck demo``, from the same environment as the Python running this)
``--runs`` times after one warm-up run (the first run after an install compiles and caches UMAP's numba
kernels; the goal is stated for the second run), each into a fresh temporary directory, one after the
other. For each run it records:

- ``wall_s``: wall-clock seconds of the whole command (start-up, demo table, scan, report, exit);
- ``cpu_s``: user + system CPU seconds of the command and every process it started (the scan's second
  process included), from ``resource.getrusage(RUSAGE_CHILDREN)``: on a shared machine whose speed drifts
  this is the steadier measure of work, and ``cpu_s / wall_s`` shows how well the two cores are used;
- ``scan_s`` and ``stages``: the scan's own seconds from ``report.json`` (``run.seconds``);
- ``clock_at_report_s``: the progress clock (started when the table is read) when the report starts to
  be written; ``wall_s`` minus it is the command's start-up, demo table, report and exit.

Prints the median of the runs and appends one JSON line per run to ``--log`` (default
``tests/benchmarks/demo_runs.jsonl``) with the machine's load average before each run.

Run: ``python tests/benchmarks/bench_demo.py [--runs 3]``.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import resource
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))


def _children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def _command() -> list:
    """The ``sitecheck`` console script beside this Python, or the same entry point through ``-c``."""
    script = os.path.join(os.path.dirname(sys.executable), "sitecheck")
    if os.path.exists(script):
        return [script]
    return [sys.executable, "-c", "import sys; from sitecheck.cli import main; sys.exit(main())"]


def one_run(out_root: str) -> dict:
    out = os.path.join(out_root, "demo")
    load = os.getloadavg()[0]
    c0, t0 = _children_cpu(), time.perf_counter()
    proc = subprocess.run(_command() + ["demo", "--out", out], capture_output=True, text=True, cwd=ROOT)
    wall, cpu = time.perf_counter() - t0, _children_cpu() - c0
    if proc.returncode != 0:
        raise SystemExit(f"sitecheck demo exited {proc.returncode}: {proc.stderr.strip().splitlines()[-1:]}")
    with open(os.path.join(out, "report", "report.json"), encoding="utf-8") as fh:
        stages = json.load(fh)["run"]["seconds"]
    # the progress clock starts when the table is read; "writing report" is stamped when the scan ends
    stamps = re.findall(r"^\[\s*([0-9.]+)s\] writing report", proc.stderr, flags=re.M)
    row = {"date": time.strftime("%Y-%m-%dT%H:%M:%S"), "load_1min": round(load, 2), "wall_s": round(wall, 2),
           "cpu_s": round(cpu, 2), "scan_s": stages.get("total"), "stages": stages}
    if stamps:
        row["clock_at_report_s"] = float(stamps[0])
    return row


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--log", default=os.path.join(HERE, "demo_runs.jsonl"))
    ap.add_argument("--no-warm-up", action="store_true", help="skip the first (kernel-compiling) run")
    args = ap.parse_args(argv)
    if args.runs < 1:
        ap.error("--runs must be at least 1")
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        if not args.no_warm_up:
            warm = one_run(os.path.join(tmp, "warm"))
            print(f"warm-up run: {warm['wall_s']:.1f} s wall, {warm['cpu_s']:.1f} CPU s")
        for i in range(args.runs):
            row = one_run(os.path.join(tmp, f"run{i}"))
            rows.append(row)
            print(f"run {i + 1}: {row['wall_s']:.1f} s wall, {row['cpu_s']:.1f} CPU s, scan {row['scan_s']:.1f} s, "
                  f"load {row['load_1min']:.2f}")
    with open(args.log, "a", encoding="utf-8") as fh:
        for row in rows:
            fh.write(json.dumps(row, sort_keys=True) + "\n")
    med = {k: statistics.median(r[k] for r in rows) for k in ("wall_s", "cpu_s", "scan_s")}
    print(f"median of {len(rows)}: {med['wall_s']:.1f} s wall, {med['cpu_s']:.1f} CPU s "
          f"({med['cpu_s'] / med['wall_s']:.2f} cores busy), scan {med['scan_s']:.1f} s")
    stage_names = [k for k in rows[0]["stages"] if k != "total"]
    print("stage medians (s): " + ", ".join(f"{k} {statistics.median(r['stages'].get(k, 0) for r in rows):.1f}"
                                            for k in stage_names))
    return 0


if __name__ == "__main__":
    sys.exit(main())
