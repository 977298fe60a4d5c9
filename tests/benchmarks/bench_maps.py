"""Maps benchmark: CPU and wall seconds of the two map stages of a scan, first and second run, and the
new t-SNE map against the one it replaced (same conclusions).

For each table, two fresh interpreters run one after the other with the same, initially empty, kernel
cache directory (``XDG_CACHE_HOME`` pointed to a temporary folder, ``NUMBA_CACHE_DIR`` unset): the first
compiles UMAP's numba kernels and caches them, the second loads them. Each times the scan's own stages
(``registry._run_maps``: PCA, UMAP and the mixing scores of the design, PCA and UMAP;
``registry._run_tsne``: the t-SNE map and its scores) with single-threaded native pools, as a scan runs
them. The first also draws the map this change replaced (scikit-learn's Barnes-Hut t-SNE, 350 iterations,
angle 0.7, one thread) on the same rows and compares: normalised LISI (mean LISI / its value under random
mixing) within 0.03 and scikit-learn's trustworthiness (5 neighbours, on a fixed subsample of at most 5,000
mapped rows) no lower by more than 0.01. The two processes' coordinates must be bit-identical (same seed,
same JSON).

Tables: ``demo`` (the invented four-hospital demo, 6,000 rows, :func:`sitecheck.demo.generate_demo`) and
``RxFxS`` tables of ``tests/benchmarks/run.py`` (invented; the maps use at most 10,000 site-stratified
rows). CPU seconds (process time) are the primary evidence on a shared machine; the load average is
printed. Exits 1 when a conclusion differs or a repeated run is not identical.

Run: ``nice python tests/benchmarks/bench_maps.py [--tables demo,9000x20x30,100000x50x4]``.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile

LISI_TOLERANCE = 0.03
TRUST_TOLERANCE = 0.01

_CHILD = r'''
import hashlib, json, sys, time
import numpy as np
from threadpoolctl import threadpool_limits
sys.path.insert(0, sys.argv[3])
from sitecheck.reading.intake import frame_to_raw
from sitecheck.table.roles import RoleSpec, assign_roles
from sitecheck.table.prepare import prepare
from sitecheck.scan import ScanOptions
from sitecheck.analyses import registry
from sitecheck.analyses import maps

kind, compare = sys.argv[1], sys.argv[2] == "1"
if kind == "demo":
    from sitecheck.demo import generate_demo, DEMO_ROLES
    demo = generate_demo(6000, seed=7)
    table = assign_roles(frame_to_raw(demo.frame), RoleSpec(site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"],
                         covariates=DEMO_ROLES["covariates"], identifiers=DEMO_ROLES["identifiers"]))
else:
    from run import make_table
    n, f, s = map(int, kind.split("x"))
    table = assign_roles(frame_to_raw(make_table(n, f, s)), RoleSpec(site="site"))
prep = prepare(table, random_state=0)
options = ScanOptions()
out = {"stages": {}}
for name, fn in (("pca_umap", registry._run_maps), ("tsne", registry._run_tsne)):
    t0, c0 = time.perf_counter(), time.process_time()
    with threadpool_limits(limits=1):
        res = fn(prep, options, {})
    out["stages"][name] = {"wall": time.perf_counter() - t0, "cpu": time.process_time() - c0}
    for m, c in res.coords.items():
        out.setdefault("sha", {})[m] = hashlib.sha256(np.ascontiguousarray(c).tobytes()).hexdigest()
    if name == "tsne":
        new = res
out["n_mapped"] = int(new.n_used)
out["json_sha"] = hashlib.sha256(json.dumps(new.to_dict(), sort_keys=True).encode()).hexdigest()
if compare:
    from sklearn.manifold import TSNE, trustworthiness
    idx = np.searchsorted(prep.rows, new.rows)
    Z = maps.preprocess(prep.X[idx], prep.features.categorical)
    site = new.site
    t0, c0 = time.perf_counter(), time.process_time()
    with threadpool_limits(limits=1):
        old = TSNE(n_components=2, perplexity=new.settings["tsne"]["perplexity"], init="pca", learning_rate="auto",
                   max_iter=350, angle=0.7, random_state=options.seed).fit_transform(Z)
    out["stages"]["tsne_before (scikit-learn Barnes-Hut)"] = {"wall": time.perf_counter() - t0,
                                                            "cpu": time.process_time() - c0}
    exp = maps.expected_random(np.bincount(site))
    perp = new.mixing_method["perplexity"]
    sub = np.sort(np.random.default_rng(0).choice(len(Z), min(len(Z), 5000), replace=False))
    out["compare"] = {}
    for label, Y in (("before", old), ("after", new.coords["tsne"])):
        out["compare"][label] = {"lisi_mean": float(maps.lisi(Y, site, perplexity=perp).mean()),
                                 "lisi_normalised": float(maps.lisi(Y, site, perplexity=perp).mean() / exp),
                                 "trustworthiness": float(trustworthiness(Z[sub], Y[sub], n_neighbors=5))}
print(json.dumps(out))
'''


def _child(kind: str, compare: bool, cache: str) -> dict:
    here = os.path.dirname(os.path.abspath(__file__))
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = cache
    env["PYTHONPATH"] = os.pathsep.join([here] + [p for p in [env.get("PYTHONPATH")] if p])
    out = subprocess.run([sys.executable, "-c", _CHILD, kind, "1" if compare else "0", here], env=env,
                         capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-3000:])
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--tables", default="demo,9000x20x30")
    args = ap.parse_args(argv)
    ok = True
    for kind in args.tables.split(","):
        load = os.getloadavg()[0]
        with tempfile.TemporaryDirectory() as cache:
            first = _child(kind, True, cache)
            second = _child(kind, False, cache)
        print(f"{kind}: {first['n_mapped']} rows mapped; load average {load:.1f} -> {os.getloadavg()[0]:.1f} "
              f"on {os.cpu_count()} cores")
        for stage, t in first["stages"].items():
            t2 = second["stages"].get(stage)
            again = f"; second run {t2['cpu']:6.2f} s CPU, {t2['wall']:6.2f} s wall" if t2 else ""
            print(f"  {stage:40s} first run {t['cpu']:6.2f} s CPU, {t['wall']:6.2f} s wall{again}")
        c = first["compare"]
        d_lisi = c["after"]["lisi_normalised"] - c["before"]["lisi_normalised"]
        d_trust = c["after"]["trustworthiness"] - c["before"]["trustworthiness"]
        same = first["sha"] == second["sha"] and first["json_sha"] == second["json_sha"]
        print(f"  t-SNE before/after: LISI {c['before']['lisi_mean']:.3f} / {c['after']['lisi_mean']:.3f}, "
              f"normalised {c['before']['lisi_normalised']:.3f} / {c['after']['lisi_normalised']:.3f} "
              f"(difference {d_lisi:+.3f}, tolerance {LISI_TOLERANCE}); trustworthiness "
              f"{c['before']['trustworthiness']:.4f} / {c['after']['trustworthiness']:.4f} ({d_trust:+.4f})")
        print(f"  two fresh processes, same seed: coordinates and embedding JSON identical: {same}")
        ok &= abs(d_lisi) <= LISI_TOLERANCE and d_trust >= -TRUST_TOLERANCE and same
    print("conclusions kept and runs identical" if ok else "NOT MET")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
