"""Null study of the scan and of ``sitecheck harmonise`` on realistically rounded lab values.

Tables with **no site effect**: every site draws its patients from one population,
and the lab values are rounded as laboratories report them (integers, one and two
decimals; symmetric and right-skewed distributions), with 2-8 sites of unequal
size and a few cells missing completely at random. In half of the tables a
case-mix covariate (age) differs by site and some labs depend on it (a real,
protected difference, not a site effect). Every name is invented.

For each table the study records (bounds from issue 14):

- the scan's site probe: p < 0.05 (at most 7% of tables), 95% interval covers 0.5
  (at least 93%);
- fingerprints: at least one finding (at most 5%);
- the scan's harmonisation check, each method: the leak-free re-probe's interval
  covers 0.5 (at least 93%); at least one "feature still differing" (at most 5%);
- the table written by ``sitecheck harmonise`` (each method, age protected where
  present): a plain scikit-learn probe (``HistGradientBoostingClassifier`` with its
  defaults, 5-fold stratified out-of-fold macro one-vs-rest AUC of the site) at most
  0.55 (at least 95% of tables).

The scan runs with its defaults (seed, folds, bootstrap and permutation sizes),
limited to the analyses the bounds bear on: the probe, the fingerprints and the
harmonisation check. The leak ranking, the maps and the outcome analysis are left
out (no bound reads them; each analysis draws from its own seeded streams, so the
probe, fingerprints and harmonisation results are those of a full default scan).

The power table: the same generator with one injected effect of each fingerprint
kind at two sizes, at one site; the share of tables where the fingerprints report
that kind at that site.

Run (CPU-heavy: about 10 CPU seconds per null table, dominated by the five plain probes; the power part
is cheap)::

    nice python tests/benchmarks/null_study.py --tables 200 --power-tables 0 --jobs 2 \
        --save tests/benchmarks/null_study.jsonl
    nice python tests/benchmarks/null_study.py --tables 0 --power-tables 50 \
        --save tests/benchmarks/null_study_power.jsonl

``--table-from FILE`` prints the tables from saved results without running anything.
``tests/test_harmonise.py`` imports :func:`null_table` and :func:`plain_probe_auc`
for the fast version in the suite.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from typing import Dict, List, Optional, Tuple

import numpy as np
import pandas as pd

#: Invented site names.
SITES = ("Ashby Lode", "Bramwell Cross", "Carrick Fold", "Dunholme", "Eskdale Rise", "Fallowmere",
         "Garth Haven", "Holloway End")

#: (name, decimals, kind, centre, spread, age slope per year) -- values invented, shaped like
#: common adult lab panels (common practice, no single source): "normal" draws N(centre, spread),
#: "lognormal" draws exp(N(log(centre), spread)), then rounds to ``decimals``.
LABS = (
    ("sodium", 0, "normal", 139.0, 3.0, 0.0),
    ("haemoglobin", 0, "normal", 132.0, 16.0, -0.25),
    ("albumin", 0, "normal", 38.0, 4.5, -0.06),
    ("creatinine", 0, "lognormal", 80.0, 0.3, 0.0),
    ("crp", 0, "lognormal", 6.0, 1.1, 0.0),
    ("bilirubin", 0, "lognormal", 9.0, 0.5, 0.0),
    ("potassium", 1, "normal", 4.2, 0.45, 0.0),
    ("temperature", 1, "normal", 36.9, 0.45, 0.0),
    ("glucose", 1, "lognormal", 5.8, 0.25, 0.0),
    ("lactate", 1, "lognormal", 1.3, 0.45, 0.0),
    ("calcium", 2, "normal", 2.35, 0.12, 0.0),
    ("magnesium", 2, "normal", 0.85, 0.09, 0.0),
    ("phosphate", 2, "lognormal", 1.1, 0.25, 0.0),
    ("inr", 2, "lognormal", 1.05, 0.15, 0.0),
)


def _site_sizes(rng: np.random.Generator, n_rows: int, k: int, min_share: float) -> np.ndarray:
    """Unequal site sizes: Dirichlet(1.5) shares, each at least ``min_share`` of the rows
    (and 25 rows) -- or, with many sites, at least half an equal share."""
    floor = min(min_share, 0.5 / k)
    while True:
        share = rng.dirichlet(np.full(k, 1.5))
        if share.min() >= floor and share.min() * n_rows >= 25:
            break
    n = np.floor(share * n_rows).astype(int)
    n[0] += n_rows - n.sum()
    return n


def _draw(rng, kind, centre, spread, n):
    if kind == "normal":
        return rng.normal(centre, spread, n)
    return np.exp(rng.normal(np.log(centre), spread, n))


def null_table(seed: int, *, n_rows: Optional[int] = None, n_sites: Optional[int] = None,
               n_labs: int = 6, case_mix: Optional[bool] = None, min_share: float = 0.15
               ) -> Tuple[pd.DataFrame, dict]:
    """One null table (no site effect) and its description.

    Columns: ``hospital`` (2-8 sites of unequal size, by default), ``age`` (integer
    years) and ``n_labs`` labs drawn from :data:`LABS` (at least one of each
    precision), rounded to their decimals, 0-4% of cells missing completely at
    random; 600-900 rows by default. With ``case_mix`` (odd seeds by default)
    the mean age differs by site (site offsets drawn with SD 5 years) and the labs
    with an age slope follow it.
    """
    rng = np.random.default_rng([seed, 14])
    n_rows = int(rng.integers(600, 901)) if n_rows is None else int(n_rows)
    k = int(rng.integers(2, 9)) if n_sites is None else int(n_sites)
    case_mix = bool(seed % 2) if case_mix is None else bool(case_mix)
    sizes = _site_sizes(rng, n_rows, k, min_share)
    site = np.repeat(np.arange(k), sizes)
    age_shift = rng.normal(0, 5, k) if case_mix else np.zeros(k)
    age = np.clip(np.round(rng.normal(58, 16, n_rows) + age_shift[site]), 18, 97)
    by_dec = {d: [lab for lab in LABS if lab[1] == d] for d in (0, 1, 2)}
    chosen = [by_dec[d][int(rng.integers(len(by_dec[d])))] for d in (0, 1, 2)]
    rest = [lab for lab in LABS if lab not in chosen]
    chosen += [rest[i] for i in rng.choice(len(rest), n_labs - 3, replace=False)]
    chosen.sort(key=lambda lab: LABS.index(lab))
    data = {"hospital": np.array(SITES)[site], "age": age}
    for name, dec, kind, centre, spread, slope in chosen:
        x = _draw(rng, kind, centre, spread, n_rows) + slope * (age - 58)
        x = np.round(x, dec)
        x[rng.random(n_rows) < rng.uniform(0, 0.04)] = np.nan
        data[name] = x
    frame = pd.DataFrame(data)
    frame = frame.iloc[rng.permutation(n_rows)].reset_index(drop=True)
    info = {"seed": seed, "rows": n_rows, "sites": k, "sizes": [int(s) for s in sizes], "case_mix": case_mix,
            "labs": [lab[0] for lab in chosen]}
    return frame, info


def example_table(seed: int = 0) -> pd.DataFrame:
    """The example of issue 14: four sites (40/30/20/10%), 3,000 rows, no site effect; age,
    sodium and haemoglobin as integers, potassium and temperature to one decimal."""
    rng = np.random.default_rng([seed, 1414])
    n = 3000
    site = np.repeat(np.arange(4), [1200, 900, 600, 300])
    frame = pd.DataFrame({
        "hospital": np.array(SITES[:4])[site],
        "age": np.clip(np.round(rng.normal(58, 16, n)), 18, 97),
        "sodium": np.round(rng.normal(139, 3, n)),
        "haemoglobin": np.round(rng.normal(132, 16, n)),
        "potassium": np.round(rng.normal(4.2, 0.45, n), 1),
        "temperature": np.round(rng.normal(36.9, 0.45, n), 1),
    })
    return frame.iloc[rng.permutation(n)].reset_index(drop=True)


def plain_probe_auc(frame: pd.DataFrame, site: str = "hospital", *, seed: int = 0) -> float:
    """A plain scikit-learn probe of the site: ``HistGradientBoostingClassifier`` with its
    defaults, 5-fold stratified (shuffled) out-of-fold probabilities, macro one-vs-rest AUC
    (``roc_auc_score(multi_class="ovr", average="macro")``; binary AUC for two sites), every
    column but the site as a feature, single-threaded."""
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.metrics import roc_auc_score
    from sklearn.model_selection import StratifiedKFold, cross_val_predict
    from threadpoolctl import threadpool_limits

    y = pd.factorize(frame[site])[0]
    X = frame.drop(columns=[site]).apply(pd.to_numeric, errors="coerce").to_numpy(dtype=float)
    cv = StratifiedKFold(5, shuffle=True, random_state=seed)
    with threadpool_limits(1):
        proba = cross_val_predict(HistGradientBoostingClassifier(random_state=seed), X, y, cv=cv,
                                  method="predict_proba")
    if proba.shape[1] == 2:
        return float(roc_auc_score(y, proba[:, 1]))
    return float(roc_auc_score(y, proba, multi_class="ovr", average="macro"))


# ---------------------------------------------------------------------------------------------
# power: one injected effect of each kind, at two sizes
# ---------------------------------------------------------------------------------------------

#: kind -> (small, large) size of the injected effect (see :func:`inject`).
POWER_SIZES = {
    "shift": (0.5, 1.0),            # shift by this many SDs
    "scale": (1.6, 2.5),            # SD multiplied by this factor about the site's mean
    "unit_ratio": (0.5, 1.0),       # share of the site's values in the other unit (factor 10 / mmol<->mg)
    "precision": (0.5, 1.0),        # share of the site's values rounded to a five times coarser grid
    "heaping": (0.3, 0.6),          # share of the site's values moved to the nearest multiple of 5 grid steps
    "floor": (0.1, 0.25),           # quantile of the pooled values set as the site's detection limit
    "ceiling": (0.1, 0.25),         # upper quantile set as the site's reporting ceiling
    "missing_code": (0.03, 0.08),   # share of the site's values replaced by -99
    "site_missing": (0.7, 1.0),     # share of the site's values missing
}


def inject(frame: pd.DataFrame, kind: str, size: float, seed: int) -> Tuple[pd.DataFrame, str, str]:
    """One effect of ``kind`` at one site (the second largest) on one lab; returns
    (table, feature, site)."""
    rng = np.random.default_rng([seed, 99, list(POWER_SIZES).index(kind)])
    f = frame.copy()
    labs = [c for c in f.columns if c not in ("hospital", "age")]
    counts = f["hospital"].value_counts()
    site = counts.index[1] if len(counts) > 1 else counts.index[0]
    feat = labs[int(rng.integers(len(labs)))]
    rows = (f["hospital"] == site).to_numpy()
    x = f[feat].to_numpy(dtype=float).copy()
    dec = max((len(repr(float(v)).split(".")[1].rstrip("0")) for v in x[~np.isnan(x)][:200]), default=0)
    step = 10.0 ** -dec
    obs = rows & ~np.isnan(x)
    sd = float(np.nanstd(x))
    pick = obs & (rng.random(len(x)) < size)
    if kind == "shift":
        x[obs] = np.round(x[obs] + size * sd, dec)
    elif kind == "scale":
        m = np.nanmean(x[obs])
        x[obs] = np.round(m + size * (x[obs] - m), dec)
    elif kind == "unit_ratio":
        x[pick] = np.round(x[pick] * 10.0, dec)
    elif kind == "precision":
        g = 5 * step
        x[pick] = np.round(np.round(x[pick] / g) * g, dec)
    elif kind == "heaping":
        g = 5 * step
        x[pick] = np.round(np.round(x[pick] / g) * g, dec)
    elif kind == "floor":
        lim = float(np.nanquantile(x, size))
        x[obs] = np.maximum(x[obs], lim)
    elif kind == "ceiling":
        lim = float(np.nanquantile(x, 1 - size))
        x[obs] = np.minimum(x[obs], lim)
    elif kind == "missing_code":
        x[pick] = -99.0
    elif kind == "site_missing":
        x[pick] = np.nan
    else:  # pragma: no cover
        raise ValueError(kind)
    f[feat] = x
    return f, feat, str(site)


# ---------------------------------------------------------------------------------------------
# one table
# ---------------------------------------------------------------------------------------------

def run_table(seed: int, *, plain: bool = True) -> dict:
    """Scan one null table and harmonise it with each method; the figures of the bounds."""
    from sitecheck.cli.harmonise import run_harmonise
    from sitecheck.harmonise.methods import METHODS
    from sitecheck.scan import ScanOptions, scan_frame

    frame, info = null_table(seed)
    covs = ["age"] if info["case_mix"] else []
    t0 = time.perf_counter()
    res = scan_frame(frame, site="hospital", covariates=covs,
                     options=ScanOptions(analyses=("probe", "fingerprints", "harmonise"), n_jobs=1))
    doc = res.to_dict()
    out = dict(info)
    pr = doc["probe"]
    out["probe"] = {"auc": pr["auc"], "ci": pr["auc_ci"], "p": pr["p_value"]}
    out["fingerprints"] = [(f["feature"], f["site"], f["kind"]) for f in doc.get("fingerprints", [])]
    out["harmonisation"] = {m: {"auc": d["probe_auc"], "ci": d["probe_auc_ci"], "p": d["probe_p_value"],
                                "surviving": [(g["feature"], g["reason"], g["site"]) for g in d["surviving"]]}
                            for m, d in doc.get("harmonisation", {}).items()}
    out["scan_seconds"] = round(time.perf_counter() - t0, 2)
    if plain:
        out["plain_raw"] = plain_probe_auc(frame)
        out["written"] = {}
        with tempfile.TemporaryDirectory() as tmp:
            src = os.path.join(tmp, "t.csv")
            frame.to_csv(src, index=False)
            for m in METHODS:
                dst = os.path.join(tmp, f"h_{m}.csv")
                s = run_harmonise(src, site="hospital", method=m, protect=covs, out=dst, params_path=None,
                                  apply_path=None)
                out["written"][m] = {"auc": plain_probe_auc(pd.read_csv(dst)),
                                     "clipped": int(sum(a + b for a, b in s["clipped"].values()))}
    out["seconds"] = round(time.perf_counter() - t0, 2)
    return out


def run_power(seed: int) -> List[dict]:
    """Fingerprints of one table with each injected effect at each size."""
    from sitecheck.analyses.fingerprints import find_fingerprints
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    frame, info = null_table(seed)
    covs = ("age",) if info["case_mix"] else None
    rows = []
    for kind, sizes in POWER_SIZES.items():
        for which, size in zip(("small", "large"), sizes):
            f, feat, site = inject(frame, kind, size, seed)
            table = assign_roles(frame_to_raw(f), RoleSpec(site="hospital", covariates=covs))
            found = find_fingerprints(table).findings
            rows.append({"seed": seed, "kind": kind, "size": which, "value": size, "feature": feat, "site": site,
                         "found": any(x.kind == kind and x.feature == feat and x.site == site for x in found),
                         "any_at_site": any(x.feature == feat and x.site == site for x in found)})
    return rows


# ---------------------------------------------------------------------------------------------
# summary
# ---------------------------------------------------------------------------------------------

def _wilson(k: int, n: int) -> Tuple[float, float]:
    from statsmodels.stats.proportion import proportion_confint

    lo, hi = proportion_confint(k, n, alpha=0.05, method="wilson")
    return float(lo), float(hi)


def _rate(k: int, n: int) -> str:
    lo, hi = _wilson(k, n)
    return f"{k}/{n} = {k / n:.1%} [{lo:.1%}, {hi:.1%}]"


def summarise(rows: List[dict]) -> List[Tuple[str, str, str, bool]]:
    """(measure, bound, observed with Wilson 95% interval, met) for the null tables."""
    n = len(rows)
    out = []

    def add(name, bound, k, ok):
        out.append((name, bound, _rate(k, n), ok))

    k = sum(r["probe"]["p"] is not None and r["probe"]["p"] < 0.05 for r in rows)
    add("site probe p < 0.05", "<= 7%", k, k / n <= 0.07)
    k = sum(r["probe"]["ci"][0] <= 0.5 <= r["probe"]["ci"][1] for r in rows)
    add("site probe 95% CI covers 0.5", ">= 93%", k, k / n >= 0.93)
    k = sum(bool(r["fingerprints"]) for r in rows)
    add("fingerprints: at least one finding", "<= 5%", k, k / n <= 0.05)
    methods = list(rows[0]["harmonisation"])
    for m in methods:
        k = sum(r["harmonisation"][m]["ci"][0] <= 0.5 <= r["harmonisation"][m]["ci"][1] for r in rows)
        add(f"re-probe after {m}: CI covers 0.5", ">= 93%", k, k / n >= 0.93)
    for m in methods:
        k = sum(bool(r["harmonisation"][m]["surviving"]) for r in rows)
        add(f"{m}: features still differing", "<= 5%", k, k / n <= 0.05)
    if all("written" in r for r in rows):
        k = sum(r["plain_raw"] <= 0.55 for r in rows)
        out.append(("plain probe AUC <= 0.55, table as given (reference)", "-", _rate(k, n), True))
        for m in methods:
            k = sum(r["written"][m]["auc"] <= 0.55 for r in rows)
            add(f"written by `sitecheck harmonise --method {m}`: plain probe AUC <= 0.55", ">= 95%", k,
                k / n >= 0.95)
    return out


def power_table(rows: List[dict]) -> List[Tuple[str, ...]]:
    """Per kind and size: the share found with the right kind at the right feature and site, and (in
    brackets) the share with any finding at that feature and site."""
    out = []
    for kind, sizes in POWER_SIZES.items():
        cells = []
        for which in ("small", "large"):
            sel = [r for r in rows if r["kind"] == kind and r["size"] == which]
            k = sum(r["found"] for r in sel)
            a = sum(r["any_at_site"] for r in sel)
            cells.append(f"{k}/{len(sel)} = {k / max(len(sel), 1):.0%} ({a / max(len(sel), 1):.0%})")
        out.append((kind, f"{sizes[0]:g} / {sizes[1]:g}", cells[0], cells[1]))
    return out


def markdown(null_rows: List[dict], power_rows: List[dict]) -> str:
    lines = []
    if null_rows:
        lines += ["| measure (null tables) | bound | observed [Wilson 95% CI] | met |", "|---|---|---|---|"]
        lines += [f"| {a} | {b} | {c} | {'yes' if d else 'NO'} |" for a, b, c, d in summarise(null_rows)]
    if power_rows:
        lines += ["", "| injected kind | size (small / large) | right kind and site, small (any finding there) | "
                  "right kind and site, large (any finding there) |", "|---|---|---|---|"]
        lines += [f"| {a} | {b} | {c} | {d} |" for a, b, c, d in power_table(power_rows)]
    return "\n".join(lines)


def _worker(args):
    what, seed = args
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        return run_table(seed) if what == "null" else run_power(seed)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--tables", type=int, default=200)
    ap.add_argument("--power-tables", type=int, default=50)
    ap.add_argument("--start", type=int, default=0, help="first seed")
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--save", metavar="FILE", help="append one JSON line per table")
    ap.add_argument("--table-from", metavar="FILE", help="print the tables from saved lines; run nothing")
    ap.add_argument("--markdown", action="store_true")
    a = ap.parse_args(argv)
    if a.table_from:
        null_rows, power_rows = [], []
        with open(a.table_from, encoding="utf-8") as fh:
            for line in fh:
                d = json.loads(line)
                (null_rows if d["what"] == "null" else power_rows).extend(d["rows"])
        print(markdown(null_rows, power_rows))
        return 0
    tasks = [("null", s) for s in range(a.start, a.start + a.tables)] + \
            [("power", s) for s in range(a.start, a.start + a.power_tables)]
    null_rows, power_rows = [], []
    t0 = time.perf_counter()

    def record(task, res):
        what, seed = task
        rows = res if what == "power" else [res]
        (power_rows if what == "power" else null_rows).extend(rows)
        if a.save:
            with open(a.save, "a", encoding="utf-8") as fh:
                fh.write(json.dumps({"what": what, "seed": seed, "rows": rows}) + "\n")
        print(f"[{time.perf_counter() - t0:7.0f} s] {what} {seed} done", file=sys.stderr, flush=True)

    if a.jobs > 1:
        import multiprocessing as mp

        with mp.get_context("spawn").Pool(a.jobs) as pool:
            for task, res in zip(tasks, pool.imap(_worker, tasks)):
                record(task, res)
    else:
        for task in tasks:
            record(task, _worker(task))
    print(markdown(null_rows, power_rows) if a.markdown else json.dumps(summarise(null_rows) if null_rows else []))
    return 0


if __name__ == "__main__":
    sys.exit(main())
