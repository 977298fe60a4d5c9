"""Speed goal: all three maps (PCA, t-SNE, UMAP) of 10,000 rows in at most 60 s on 2 cores,
the numba compilation of UMAP included.

Invented data: the demo network (:func:`sitecheck.demo.generate_demo`, invented
hospitals and patients) with 12,000 rows, through roles and prepare; the maps
subsample is the default cap of 10,000 site-stratified rows. The timed part
runs in a fresh interpreter with an empty numba cache directory, so UMAP's
just-in-time compilation is counted. Prints the seconds of every stage, the
mixing scores, and the load average (other processes on the machine slow
everything down) and CPU seconds per map (independent of load, summed over threads);
exits 1 above the goal.

Run: ``python tests/benchmarks/bench_maps.py [--tsne-threads N]``.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile

GOAL_SECONDS = 60.0

_CHILD = r'''
import json, sys, time
t_start = time.perf_counter()
import numpy as np
from sitecheck.demo import generate_demo, DEMO_ROLES
from sitecheck.reading.intake import frame_to_raw
from sitecheck.table.roles import RoleSpec, assign_roles
from sitecheck.table.prepare import prepare, stratified_subsample
from sitecheck.analyses import maps

threads = None if sys.argv[1] == "default" else int(sys.argv[1])
demo = generate_demo(12_000, seed=7)
table = assign_roles(frame_to_raw(demo.frame), RoleSpec(site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"],
                     covariates=DEMO_ROLES["covariates"], identifiers=DEMO_ROLES["identifiers"]))
prep = prepare(table, random_state=0)
sec = {}
cpu = {}
t0 = time.perf_counter()
idx = stratified_subsample(prep.site, 10_000, np.random.default_rng([0, 5]))
Z = maps.preprocess(prep.X[idx], prep.features.categorical)
sec["preprocess"] = time.perf_counter() - t0
coords = {}
for m in maps.METHODS:
    t0, c0 = time.perf_counter(), time.process_time()
    if m == "umap":
        import umap  # numba compiles part of UMAP and pynndescent at import: counted here
    c, _ = maps.embed(Z, methods=[m], random_state=0, tsne_threads=threads)
    coords.update(c)
    key = m + (" (import + numba compile included)" if m == "umap" else "")
    sec[key] = time.perf_counter() - t0
    cpu[key] = time.process_time() - c0
t0 = time.perf_counter()
lisi = {}
for space, M in {"features": Z, **coords}.items():
    lisi[space] = float(maps.lisi(M, prep.site[idx], perplexity=30).mean())
sec["lisi x4"] = time.perf_counter() - t0
t0 = time.perf_counter()
for space, M in {"features": Z, **coords}.items():
    maps.silhouette_by_site(M, prep.site[idx], prep.site_labels, random_state=0)
sec["silhouette x4"] = time.perf_counter() - t0
sec["three maps"] = sum(v for k, v in sec.items() if k.split()[0] in maps.METHODS)
sec["all (embeddings + scores, imports excluded)"] = sum(v for k, v in sec.items() if k != "three maps")
print(json.dumps({"n_rows": int(len(idx)), "design_columns": int(Z.shape[1]), "seconds": sec, "cpu": cpu, "mean_lisi": lisi}))
'''


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    threads = argv[argv.index("--tsne-threads") + 1] if "--tsne-threads" in argv else "default"
    env = dict(os.environ)
    with tempfile.TemporaryDirectory() as cache:
        env["NUMBA_CACHE_DIR"] = cache  # empty: UMAP and pynndescent compile from scratch
        load_before = os.getloadavg()
        out = subprocess.run([sys.executable, "-c", _CHILD, threads], env=env, capture_output=True, text=True)
    if out.returncode != 0:
        print(out.stderr, file=sys.stderr)
        return 2
    res = json.loads(out.stdout.strip().splitlines()[-1])
    print(f"rows mapped: {res['n_rows']}, design columns: {res['design_columns']}, t-SNE threads: {threads}")
    for k, v in res["seconds"].items():
        c = res["cpu"].get(k)
        print(f"  {k:45s} {v:7.2f} s wall" + (f"  {c:7.2f} s CPU" if c is not None else ""))
    print("  mean LISI: " + ", ".join(f"{k} {v:.3f}" for k, v in res["mean_lisi"].items()))
    print(f"  load average before / after: {load_before[0]:.2f} / {os.getloadavg()[0]:.2f} (cores: {os.cpu_count()})")
    total = res["seconds"]["three maps"]
    ok = total <= GOAL_SECONDS
    print(f"three maps: {total:.1f} s wall, {sum(res['cpu'].values()):.1f} s CPU "
          f"(goal {GOAL_SECONDS:.0f} s wall): {'met' if ok else 'NOT MET'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
