"""Speed goal: the drift analysis of 100,000 rows x 50 features x 4 sites over 24 months in at most 15 s
on 2 cores.

Invented data: four sites, two covariates, 50 numeric features on mixed grids (integers, one and two
decimals), 5% missing at random, dates spread uniformly over 24 months; one recalibration injected
(``lab_00`` at Site-B, +0.5 SD from month 13), one recording grid appearing (``lab_01`` at Site-C rounded
to 0.5 from month 9) and one change at every site at once (``lab_02``, +0.5 SD from month 18, a
network-wide change). Fingerprints run first, as in a scan (their time is printed apart).
Run: ``python tests/benchmarks/bench_drift.py [--rows N]``.
"""
from __future__ import annotations

import argparse
import sys
import time

import numpy as np
import pandas as pd

GOAL_SECONDS = 15.0


def make_table(n_rows: int = 100_000, n_features: int = 50, n_sites: int = 4, months: int = 24, seed: int = 0):
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    rng = np.random.default_rng(seed)
    sites = np.array([f"Site-{chr(65 + i)}" for i in range(n_sites)], dtype=object)
    site = sites[rng.integers(0, n_sites, n_rows)]
    day = rng.integers(0, int(months * 30.44), n_rows)
    date = pd.Timestamp("2024-01-01") + pd.to_timedelta(day, unit="D")
    month = (date.year - 2024) * 12 + date.month - 1
    age = np.round(rng.gamma(9, 6, n_rows) + 10)
    sex = np.where(rng.random(n_rows) < 0.5, "F", "M").astype(object)
    data = {"site": site, "visit_date": date.strftime("%Y-%m-%d"), "age": age, "sex": sex}
    for j in range(n_features):
        scale = 10 ** rng.integers(0, 3)
        x = rng.lognormal(np.log(5 * scale), 0.3, n_rows) + 0.01 * scale * (age - 55)
        if j == 0:
            x = np.where((site == "Site-B") & (month >= 12), x + 0.5 * x.std(), x)
        if j == 2:
            x = np.where(month >= 17, x + 0.5 * x.std(), x)
        digits = int(rng.integers(1, 3)) if j == 1 else int(rng.integers(0, 3))
        x = np.round(x, digits)
        if j == 1:
            x = np.where((site == "Site-C") & (month >= 8), np.round(x * 2) / 2, x)
        x[rng.random(n_rows) < 0.05] = np.nan
        data[f"lab_{j:02d}"] = x
    frame = pd.DataFrame(data)
    return assign_roles(frame_to_raw(frame), RoleSpec(site="site", covariates=("age", "sex"), time="visit_date"))


def main(argv=None) -> int:
    from threadpoolctl import threadpool_limits

    from sitecheck.analyses.drift import drift_check
    from sitecheck.analyses.fingerprints import find_fingerprints

    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=100_000)
    args = ap.parse_args(argv)
    table = make_table(args.rows)
    with threadpool_limits(1):  # as in a scan: one thread per analysis
        t0 = time.perf_counter()
        fp = find_fingerprints(table)
        t_fp = time.perf_counter() - t0
        t0, c0 = time.perf_counter(), time.process_time()
        result = drift_check(table, fingerprints=fp, random_state=0)
        secs, cpu = time.perf_counter() - t0, time.process_time() - c0
    print(f"drift: {len(table.frame)} rows x {len(table.features)} features x {len(table.site_labels)} sites, "
          f"{result.n_series} series: {secs:.2f} s wall, {cpu:.2f} s CPU (goal {GOAL_SECONDS:.0f} s); "
          f"fingerprints before it {t_fp:.2f} s")
    for c in result.change_points:
        if c.finding or c.scope == "network":
            print(f"  {'finding' if c.finding else 'network'}: {c.site} {c.feature} {c.aspect} {c.artefact or ''} "
                  f"{c.period} p_adj={c.p_adj:.2g} scope={c.scope}")
    for p in result.probes:
        print(f"  period probe {p.site}: AUC {p.auc:.3f}, covariates {p.covariate_auc:.3f}, flagged {p.flagged}")
    return 0 if secs <= GOAL_SECONDS else 1


if __name__ == "__main__":
    sys.exit(main())
