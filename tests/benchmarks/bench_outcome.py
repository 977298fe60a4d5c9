"""Speed goal: the outcome analysis on 100,000 rows x 50 features x 4 sites.

Invented data: four sites, two covariates and a group column, 50 numeric
features of which three shift by site and five drive a binary outcome (one
of them both: a shortcut). The table goes through roles and prepare (the
default 100,000-row modelling subsample), then :func:`sitecheck.analyses.outcome.outcome_risk`
runs with its defaults. Prints the seconds; exits 1 above the goal.
Run: ``python tests/benchmarks/bench_outcome.py``.
"""
from __future__ import annotations

import sys
import time

import numpy as np
import pandas as pd

GOAL_SECONDS = 120.0


def make_table(n_rows: int = 100_000, n_features: int = 50, seed: int = 0):
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    rng = np.random.default_rng(seed)
    sites = np.array(["North Vale", "Eastmere", "Southholm", "Westbrook"], dtype=object)
    s = rng.integers(0, 4, n_rows)
    X = rng.normal(size=(n_rows, n_features))
    shift = np.array([-1.0, -0.3, 0.4, 1.0])
    X[:, 0] += 1.5 * shift[s]          # the shortcut: site-shifted and outcome-driving
    X[:, 1] += 0.8 * shift[s]          # site leakers only
    X[:, 2] += 0.6 * shift[s]
    logit = -1.0 + 1.2 * X[:, 0] + 0.6 * X[:, 3] + 0.5 * X[:, 4] - 0.4 * X[:, 5] + 0.3 * X[:, 6]
    y = (rng.random(n_rows) < 1 / (1 + np.exp(-logit))).astype(float)
    y[rng.random(n_rows) < 0.01] = np.nan
    data = {"site": sites[s], "age": np.round(rng.gamma(9, 6, n_rows) + 10),
            "sex": np.where(rng.random(n_rows) < 0.5, "F", "M").astype(object),
            "ward": rng.choice(np.array(["medical", "surgical", "acute"], dtype=object), n_rows),
            "outcome": y}
    for j in range(n_features):
        data[f"lab_{j:02d}"] = np.round(X[:, j], 2)
    frame = pd.DataFrame(data)
    spec = RoleSpec(site="site", outcome="outcome", covariates=("age", "sex"), groups=("ward",))
    return assign_roles(frame_to_raw(frame), spec)


def main() -> int:
    from sitecheck.analyses.outcome import outcome_risk
    from sitecheck.table.prepare import prepare

    t0 = time.perf_counter()
    table = make_table()
    prep = prepare(table, random_state=0)
    t1 = time.perf_counter()
    res = outcome_risk(prep)
    t2 = time.perf_counter()
    d = res.to_dict()
    print(f"table + prepare: {t1 - t0:.1f} s ({prep.n_used} rows used of {prep.n_total})")
    print(f"outcome analysis: {t2 - t1:.1f} s (goal {GOAL_SECONDS:.0f} s), n = {d['n']}")
    print(f"pooled AUC {d['pooled_auc']:.3f} {d['pooled_auc_ci']}, transport gap {d['transport_gap']:.3f} "
          f"{d['transport_gap_ci']}, shortcuts {[c['feature'] for c in d['shortcut_candidates']]}")
    return 0 if t2 - t1 <= GOAL_SECONDS else 1


if __name__ == "__main__":
    sys.exit(main())
