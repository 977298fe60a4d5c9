"""Speed goal: fingerprints on 100,000 rows x 50 features in well under 60 s on 2 cores.

The issue budgets 60 s for ranking plus fingerprints together; this script
asks fingerprints alone for at most 20 s. Invented data: five sites, two
covariates, 50 numeric features on mixed grids, with a unit change, a floor,
a missing code and a shift injected. Run: ``python tests/benchmarks/bench_fingerprints.py``.
"""
from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

GOAL_SECONDS = 20.0


def make_table(n_rows: int = 100_000, n_features: int = 50, seed: int = 0):
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    rng = np.random.default_rng(seed)
    sites = np.array(["Site-A", "Site-B", "Site-C", "Site-D", "Site-E"], dtype=object)
    site = sites[rng.integers(0, len(sites), n_rows)]
    age = np.round(rng.gamma(9, 6, n_rows) + 10)
    sex = np.where(rng.random(n_rows) < 0.5, "F", "M").astype(object)
    data = {"site": site, "age": age, "sex": sex}
    for j in range(n_features):
        scale = 10 ** rng.integers(0, 3)
        x = rng.lognormal(np.log(5 * scale), 0.3, n_rows) + 0.01 * scale * (age - 55)
        digits = int(rng.integers(0, 3))
        data[f"lab_{j:02d}"] = np.round(x, digits)
    # injected effects
    data["lab_00"] = np.where(site == "Site-B", np.round(data["lab_00"] * 10, 1), data["lab_00"])
    data["lab_01"] = np.where((site == "Site-C") & (data["lab_01"] < np.quantile(data["lab_01"], 0.2)),
                              np.quantile(data["lab_01"], 0.2), data["lab_01"])
    miss = rng.random(n_rows) < 0.05
    data["lab_02"] = np.where((site == "Site-D") & miss, -999.0, data["lab_02"])
    data["lab_03"] = np.where(site == "Site-E", data["lab_03"] + np.std(data["lab_03"]), data["lab_03"])
    frame = pd.DataFrame(data)
    raw = frame_to_raw(frame)
    return assign_roles(raw, RoleSpec(site="site", covariates=("age", "sex")))


def main() -> int:
    from sitecheck.analyses.fingerprints import find_fingerprints

    table = make_table()
    t0 = time.perf_counter()
    result = find_fingerprints(table)
    secs = time.perf_counter() - t0
    kinds = sorted({(f.feature, f.site, f.kind) for f in result.findings})
    print(f"fingerprints: {len(table.frame)} rows x {len(result.features)} features: {secs:.2f} s "
          f"(goal {GOAL_SECONDS:.0f} s); {len(result.findings)} findings")
    for k in kinds:
        print("  ", *k)
    return 0 if secs <= GOAL_SECONDS else 1


if __name__ == "__main__":
    sys.exit(main())
