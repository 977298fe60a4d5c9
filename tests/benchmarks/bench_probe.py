"""Speed goals of the site probe (issue 3), on 2 cores:

- the probe with interval and p-value on 100,000 rows x 50 features x 4 sites: at most 60 s
  (the default cap, 100,000 rows, uses every row);
- 30 sites x 300 rows x 15 features: at most 15 s.

Invented data with a small injected site shift. Prints timings; exits 1 when a goal is missed.
Not collected by pytest. Run: ``python tests/benchmarks/bench_probe.py``.
"""
from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd


def make_frame(n_sites: int, rows_per_site: int, n_features: int, seed: int = 0, shift: float = 0.3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = n_sites * rows_per_site
    site = np.repeat([f"Site-{i:02d}" for i in range(n_sites)], rows_per_site)
    codes = np.repeat(np.arange(n_sites), rows_per_site)
    X = rng.normal(size=(n, n_features))
    X[:, :3] += shift * rng.normal(size=(n_sites, 3))[codes]   # a modest shift per site
    X[rng.random(X.shape) < 0.05] = np.nan
    frame = pd.DataFrame(X, columns=[f"lab_{j:02d}" for j in range(n_features)])
    frame.insert(0, "site", site)
    return frame


def run(name: str, frame: pd.DataFrame, goal: float, **probe_kw) -> bool:
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.prepare import prepare
    from sitecheck.analyses.probe import site_probe
    from sitecheck.table.roles import RoleSpec, assign_roles

    table = assign_roles(frame_to_raw(frame), RoleSpec(site="site"))
    t0, c0 = time.perf_counter(), time.process_time()
    prep = prepare(table, random_state=0)
    t1 = time.perf_counter()
    r = site_probe(prep, **probe_kw)
    t2, c2 = time.perf_counter(), time.process_time()
    total = t2 - t0
    # CPU seconds are printed too: on a shared machine the wall time also counts other processes.
    print(f"{name}: prepare {t1 - t0:.1f} s, probe {t2 - t1:.1f} s, total {total:.1f} s wall, "
          f"{c2 - c0:.1f} s CPU (goal {goal:.0f} s); "
          f"n_used {r.n_used}, AUC {r.auc:.3f} [{r.auc_ci[0]:.3f}, {r.auc_ci[1]:.3f}], p {r.p_value:.4f}, "
          f"linear AUC {r.linear.auc if r.linear else float('nan'):.3f}, iterations {r.boosting_iterations}")
    return total <= goal


def main() -> int:
    ok = True
    ok &= run("100,000 x 50 x 4 sites (boosting only)", make_frame(4, 25_000, 50), 60.0, linear=False)
    ok &= run("100,000 x 50 x 4 sites (with linear)", make_frame(4, 25_000, 50), 60.0)
    ok &= run("30 sites x 300 x 15 (boosting only)", make_frame(30, 300, 15), 15.0, linear=False)
    ok &= run("30 sites x 300 x 15 (with linear)", make_frame(30, 300, 15), 15.0)
    ok &= run("30 sites x 300 x 15, strong shift (with linear)", make_frame(30, 300, 15, shift=1.5), 15.0)
    ok &= run("100 sites x 60 x 15 (with linear)", make_frame(100, 60, 15), 30.0)
    print("all goals met" if ok else "GOAL MISSED")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
