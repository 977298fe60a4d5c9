"""sitecheck against the hand-written recipe, on the same data, in one run.

For each size the script generates an invented pooled table (a few features shifted per
site, 5% missing cells), then times in separate child processes, so that peak memory is
measured for each alone:

(a) ``sitecheck scan`` with default settings (library call, report written), and
(b) the recipe a data scientist would write with the same libraries: cross_val_predict with
    HistGradientBoostingClassifier (5 folds), in-sample permutation_importance with 5 repeats,
    t-SNE and UMAP on all rows.

It prints each stage's time, the ratio (b)/(a) (also without the recipe's maps), peak resident
memory, and whether both reach the same conclusions (the recipe's AUC inside sitecheck's interval;
the same top-5 leakers). The recipe is not run above ``--recipe-max-rows`` rows (default 200,000:
its in-sample permutation importance alone grows with every row); a table of 500,000 rows or more
is written as Parquet, smaller ones as CSV.

Usage::

    python tests/benchmarks/run.py                 # every size of the contributor guide's table
    python tests/benchmarks/run.py --sizes 10000x20x4 --no-recipe-maps
    python tests/benchmarks/run.py --markdown      # print the results table for DEVELOPERS.md

Not collected by pytest.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np
import pandas as pd

#: rows x features x sites: growth with rows (10k, 100k, 1M), features (20, 50, 100, 200) and sites (4, 30).
DEFAULT_SIZES = ["10000x20x4", "10000x200x4", "9000x20x30", "100000x50x4", "1000000x100x4"]
LEAKERS = 5


def make_table(n_rows: int, n_features: int, n_sites: int, seed: int = 0) -> pd.DataFrame:
    """Invented pooled table: features 0..4 shifted per site by decreasing amounts; the first
    site writes 2% of lab_000 as the missing-value code -99, so that the scan's repair loop (the
    plan and the residual probe) runs, as it does on real exports."""
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, n_sites, n_rows)
    X = rng.normal(size=(n_rows, n_features)).astype(np.float64)
    offsets = rng.normal(size=(n_sites, LEAKERS)) * np.array([0.8, 0.6, 0.45, 0.35, 0.3])
    X[:, :LEAKERS] += offsets[codes]
    X[rng.random(X.shape) < 0.05] = np.nan
    X[(codes == 0) & (rng.random(n_rows) < 0.02), 0] = -99.0
    df = pd.DataFrame(X, columns=[f"lab_{j:03d}" for j in range(n_features)])
    df.insert(0, "site", np.array([f"Site-{k:02d}" for k in range(n_sites)])[codes])
    return df


def _peak_mb() -> float:
    """Peak resident memory of this process, or of its largest finished child process (a scan of at most
    200,000 rows runs part of its work in a second process), whichever is larger."""
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    child = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return max(own, child) / 1024.0


def child_sitecheck(path: str, out: str) -> dict:
    from sitecheck.render import write_report
    from sitecheck.scan import scan_file

    t0 = time.perf_counter()
    result = scan_file(path, site="site")
    write_report(result, out)
    total = time.perf_counter() - t0
    doc = result.to_dict()
    top = [e["feature"] for e in doc.get("leakage", [])[:5]]
    return {"seconds": total, "stages": doc["run"]["seconds"], "auc": doc["probe"]["auc"],
            "auc_ci": doc["probe"]["auc_ci"], "top5": top, "peak_mb": _peak_mb()}


def child_recipe(path: str, maps: bool) -> dict:
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.inspection import permutation_importance
    from sklearn.manifold import TSNE
    from sklearn.metrics import roc_auc_score
    from sklearn.model_selection import cross_val_predict

    stages = {}
    t0 = time.perf_counter()
    df = pd.read_csv(path)
    y = pd.factorize(df["site"], sort=True)[0]
    X = df.drop(columns=["site"]).to_numpy(dtype=float)
    stages["read"] = time.perf_counter() - t0
    t = time.perf_counter()
    clf = HistGradientBoostingClassifier(random_state=0)
    proba = cross_val_predict(clf, X, y, cv=5, method="predict_proba")
    auc = roc_auc_score(y, proba, multi_class="ovr") if proba.shape[1] > 2 else roc_auc_score(y, proba[:, 1])
    stages["probe"] = time.perf_counter() - t
    print("recipe stages " + json.dumps(stages), file=sys.stderr, flush=True)
    t = time.perf_counter()
    clf.fit(X, y)
    pi = permutation_importance(clf, X, y, scoring="roc_auc_ovr" if proba.shape[1] > 2 else "roc_auc",
                                n_repeats=5, random_state=0)
    names = list(df.columns[1:])
    top = [names[j] for j in np.argsort(-pi.importances_mean)[:5]]
    stages["importance"] = time.perf_counter() - t
    print("recipe stages " + json.dumps({**stages, "auc": float(auc), "top5": top}), file=sys.stderr, flush=True)
    if maps:
        Xi = np.where(np.isnan(X), np.nanmedian(X, axis=0), X)
        t = time.perf_counter()
        TSNE(random_state=0).fit_transform(Xi)
        stages["tsne"] = time.perf_counter() - t
        print("recipe stages " + json.dumps(stages), file=sys.stderr, flush=True)
        import umap

        t = time.perf_counter()
        umap.UMAP(random_state=0).fit_transform(Xi)
        stages["umap"] = time.perf_counter() - t
        print("recipe stages " + json.dumps(stages), file=sys.stderr, flush=True)
    return {"seconds": time.perf_counter() - t0, "stages": stages, "auc": float(auc), "top5": top,
            "peak_mb": _peak_mb()}


def run_child(kind: str, path: str, out: str, maps: bool) -> dict:
    cmd = [sys.executable, __file__, "--child", kind, "--path", path, "--outdir", out]
    if not maps:
        cmd.append("--no-recipe-maps")
    # the recipe's stage lines go straight to this process's stderr, so a stopped run keeps them
    res = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=None if kind == "recipe" else subprocess.PIPE,
                         text=True, check=False)
    if res.returncode != 0:
        raise RuntimeError(f"{kind} failed: {(res.stderr or '')[-2000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def _f(v) -> str:
    return "not run" if v is None else f"{v:.1f}"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", nargs="*", default=DEFAULT_SIZES, help="ROWSxFEATURESxSITES")
    ap.add_argument("--no-recipe", action="store_true", help="time sitecheck only")
    ap.add_argument("--no-recipe-maps", action="store_true", help="leave t-SNE/UMAP out of the recipe")
    ap.add_argument("--recipe-max-rows", type=int, default=200_000, help="run the recipe up to this many rows")
    ap.add_argument("--markdown", action="store_true")
    ap.add_argument("--save", help="append each size's result (one JSON line) to this file")
    ap.add_argument("--table-from", help="print the markdown table of the results saved in this file, run nothing")
    ap.add_argument("--child", choices=["sitecheck", "recipe"])
    ap.add_argument("--path")
    ap.add_argument("--outdir")
    a = ap.parse_args(argv)
    if a.child:
        out = child_sitecheck(a.path, a.outdir) if a.child == "sitecheck" else child_recipe(a.path, not a.no_recipe_maps)
        print(json.dumps(out))
        return 0
    if a.table_from:
        with open(a.table_from, encoding="utf-8") as fh:
            print_markdown([json.loads(line) for line in fh if line.strip()])
        return 0
    rows = []
    for size in a.sizes:
        n, p, k = (int(v) for v in size.lower().split("x"))
        with tempfile.TemporaryDirectory() as tmp:
            path = os.path.join(tmp, "pooled.parquet" if n >= 500_000 else "pooled.csv")
            df = make_table(n, p, k)
            table_mb = df.memory_usage(deep=True).sum() / 2**20
            (df.to_parquet if path.endswith(".parquet") else lambda f: df.to_csv(f, index=False))(path)
            del df
            sc = run_child("sitecheck", path, os.path.join(tmp, "out"), True)
            print("sitecheck " + json.dumps(sc), flush=True)  # kept even if the recipe is stopped
            rc = None if a.no_recipe or n > a.recipe_max_rows else run_child("recipe", path, tmp,
                                                                             not a.no_recipe_maps)
        truth = {f"lab_{j:03d}" for j in range(LEAKERS)}
        row = {"size": size, "cores": os.cpu_count(), "date": time.strftime("%Y-%m-%d"), "sitecheck_s": sc["seconds"], "sitecheck_peak_mb": sc["peak_mb"], "table_mb": table_mb,
               "auc": sc["auc"], "auc_ci": sc["auc_ci"], "top5_true": len(truth & set(sc["top5"])), "top5": sc["top5"],
               "stages": sc["stages"]}
        if rc:
            lo, hi = sc["auc_ci"]
            no_maps = rc["seconds"] - rc["stages"].get("tsne", 0.0) - rc["stages"].get("umap", 0.0)
            row.update({"recipe_maps": not a.no_recipe_maps,  # False: recipe_s and ratio leave its maps out
                        "recipe_s": rc["seconds"], "recipe_stages": rc["stages"], "ratio": rc["seconds"] / sc["seconds"],
                        "recipe_s_no_maps": no_maps, "ratio_no_maps": no_maps / sc["seconds"],
                        "recipe_auc": rc["auc"], "same_auc": lo <= rc["auc"] <= hi,
                        "same_top5": set(rc["top5"]) == set(sc["top5"]), "recipe_peak_mb": rc["peak_mb"],
                        "recipe_top5": rc["top5"], "recipe_top5_true": len(truth & set(rc["top5"]))})
        rows.append(row)
        print(json.dumps(row), flush=True)
        if a.save:
            with open(a.save, "a", encoding="utf-8") as fh:
                fh.write(json.dumps(row) + "\n")
    if a.markdown:
        print_markdown(rows)
    return 0


def print_markdown(rows) -> None:
    """The results table of the contributor guide, then each size's stages."""
    print(f"\nMachine: {rows[0].get('cores', os.cpu_count()) if rows else os.cpu_count()} cores.\n")
    print("| rows x features x sites | sitecheck s | recipe s | ratio | recipe s without maps | ratio without maps "
          "| peak MB (table MB) | AUC [95% CI] | recipe AUC (in CI) | same top-5 | injected in top-5 (recipe) |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    na = "not run"
    for r in rows:
        rec = f"{r['recipe_auc']:.3f} ({r['same_auc']})" if "recipe_auc" in r else na
        full = r.get("recipe_maps", True)  # a run with --no-recipe-maps has no whole-recipe time
        whole = (_f(r.get('recipe_s')), _f(r.get('ratio'))) if full else ("maps not run", "–")
        print(f"| {r['size']} | {r['sitecheck_s']:.1f} | {whole[0]} | {whole[1]} | "
              f"{_f(r.get('recipe_s_no_maps'))} | {_f(r.get('ratio_no_maps'))} | "
              f"{r['sitecheck_peak_mb']:.0f} ({r['table_mb']:.0f}) | "
              f"{r['auc']:.3f} [{r['auc_ci'][0]:.3f}, {r['auc_ci'][1]:.3f}] | {rec} | {r.get('same_top5', na)} | "
              f"{r['top5_true']}/5 ({r['recipe_top5_true'] if 'recipe_top5_true' in r else '–'}/5) |")
    print()
    for r in rows:
        st = ", ".join(f"{k} {v:.1f}" for k, v in r["stages"].items() if k != "total")
        line = f"- {r['size']}: sitecheck stages (s): {st}"
        if "recipe_stages" in r:
            line += "; recipe stages (s): " + ", ".join(f"{k} {v:.1f}" for k, v in r["recipe_stages"].items())
        print(line)


if __name__ == "__main__":
    sys.exit(main())
