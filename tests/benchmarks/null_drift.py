"""Measured false-alarm rates of the drift analysis on null series (no change anywhere).

1. Gaussian null: N independent N(0, 1) series of 24 periods, the unit-variance null the penalty is
   calibrated for; the share with any change point at the calibrated penalty.
2. Null demo networks: ``generate_demo(6000, null=True)`` over several seeds (no effect of any kind;
   dates over two years; values rounded as the laboratories round, some missing): the share of series
   with any change point, and the share of networks with any drift finding or flagged period probe.
3. Power on the demo: how often the injected recalibration is a finding within one month of the truth.

Run: ``python tests/benchmarks/null_drift.py [--gaussian 4000] [--networks 10]`` (about a second per
network). Not collected by pytest; ``tests/test_drift.py`` asserts smaller versions of 1 and 2.
"""
from __future__ import annotations

import argparse
import sys
import warnings

import numpy as np
import pandas as pd


def main(argv=None) -> int:
    from sitecheck.analyses import drift as D
    from sitecheck.demo import generate_demo
    from sitecheck.analyses.fingerprints import find_fingerprints
    from sitecheck.reading.intake import frame_to_raw
    from sitecheck.table.roles import RoleSpec, assign_roles

    ap = argparse.ArgumentParser()
    ap.add_argument("--gaussian", type=int, default=4000)
    ap.add_argument("--networks", type=int, default=10)
    ap.add_argument("--periods", type=int, default=24)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")

    rng = np.random.default_rng(20261202)
    Z = rng.normal(size=(args.gaussian, args.periods))
    Zn = Z / D.noise_scale(Z)[:, None]
    pen = D.penalty(args.periods)
    maybe = (D.split_gains(Zn).max(axis=1) > pen) | (D.pair_gains_max(Zn) > 2 * pen)
    alarms = sum(bool(D.segment(Zn[i])[0]) for i in np.flatnonzero(maybe))
    print(f"Gaussian null: {alarms} of {args.gaussian} series of {args.periods} periods with a change point "
          f"({alarms / args.gaussian:.2%}); penalty {pen:.2f}")

    spec = RoleSpec(site="hospital", outcome="admitted_hdu", covariates=("age", "sex"),
                    identifiers=("attendance_id",), time="arrival_date")
    n_series = alarmed = tables_with_finding = probes = flagged = hits = 0
    for k in range(args.networks):
        seed = 100 + k
        for null in (True, False):
            d = generate_demo(6000, seed=seed, null=null)
            table = assign_roles(frame_to_raw(d.frame), spec)
            r = D.drift_check(table, fingerprints=find_fingerprints(table), random_state=0)
            if null:
                n_series += r.n_series
                alarmed += len({(c.site, c.feature, c.aspect, c.artefact) for c in r.change_points})
                tables_with_finding += bool(r.findings)
                probes += len(r.probes)
                flagged += sum(p.flagged for p in r.probes)
            else:
                (truth,) = d.truth["drift"]
                t0 = pd.Timestamp(truth["from"])
                hits += any(c.site == truth["site"] and c.feature == truth["feature"] and c.aspect == "level"
                            and abs((pd.Timestamp(c.date) - t0).days) <= 31 for c in r.findings)
    print(f"null demo networks: {alarmed} of {n_series} series with a change point ({alarmed / n_series:.2%}); "
          f"{tables_with_finding} of {args.networks} networks with a drift finding; "
          f"{flagged} of {probes} period probes flagged")
    print(f"demo networks: the injected recalibration found within one month in {hits} of {args.networks}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
