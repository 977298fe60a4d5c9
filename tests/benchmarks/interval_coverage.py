"""Coverage of the site probe's 95% interval on the null study's tables, by interval rule.

For each null table of ``null_study.null_table`` (no site effect; rounded lab values, 2-8 sites,
half with a case-mix covariate) the scan's probe is run alone (the default scan's seed, folds,
bootstrap and permutations), and its macro AUC interval is rebuilt three ways from the same
bootstrap samples and fold values:

- ``z``: the bootstrap percentile interval stretched by ``max(1, sd_cv / sd_boot)`` (the rule
  before 2026-12-02, ``sd_cv`` the Nadeau-Bengio corrected fold SD);
- ``t``: stretched by ``max(1, t(0.975, K-1) / z(0.975) * sd_cv / sd_boot)`` (the corrected
  resampled t interval of Nadeau & Bengio 2003; today's ``stats.widened_ci``);
- ``t+chance``: the ``t`` interval, extended up to 0.5 when it lies wholly below
  (``stats.reach_chance``; today's reported interval).

Run (about 2.5 CPU s per table)::

    python tests/benchmarks/interval_coverage.py --start 0 --tables 200 --save tests/benchmarks/interval_coverage.jsonl
    python tests/benchmarks/interval_coverage.py --table-from tests/benchmarks/interval_coverage.jsonl

Not collected by pytest.
"""
from __future__ import annotations

import argparse
import json
import os
import sys

import numpy as np


def run(start: int, tables: int, save: str) -> None:
    from scipy import stats as st

    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from null_study import null_table

    from sitecheck.analyses import stats
    from sitecheck.scan import ScanOptions, scan_frame

    today = stats.widened_ci
    seen = []

    def recording(point, ci, boot, folds, ratio, *, bounds=(0.0, 1.0), alpha=0.05):
        out = today(point, ci, boot, folds, ratio, bounds=bounds, alpha=alpha)
        s = np.asarray(boot, dtype=float)
        s = s[np.isfinite(s)]
        sd_b, sd_cv = float(np.std(s, ddof=1)), stats.cv_corrected_sd(folds, ratio)
        r_z = max(1.0, sd_cv / sd_b) if sd_b > 0 and np.isfinite(sd_cv) else 1.0
        lo, hi = ci
        old = (max(bounds[0], point - r_z * (point - lo)), min(bounds[1], point + r_z * (hi - point)))
        seen.append((point, old, out[0]))
        return out

    stats.widened_ci = recording
    with open(save, "a", encoding="utf-8") as fh:
        for seed in range(start, start + tables):
            frame, info = null_table(seed)
            seen.clear()
            res = scan_frame(frame, site="hospital", covariates=["age"] if info["case_mix"] else [],
                             options=ScanOptions(analyses=("probe",), n_jobs=1))
            doc = res.to_dict()["probe"]
            point, old, t_rule = seen[0]  # the first interval of a probe is its macro AUC's
            fh.write(json.dumps({"seed": seed, "case_mix": info["case_mix"], "sites": info["sites"],
                                 "auc": point, "z": list(old), "t": list(t_rule),
                                 "t+chance": doc["auc_ci"], "p": doc["p_value"]}) + "\n")
            fh.flush()


def table(path: str) -> str:
    from scipy.stats import binomtest

    rows = [json.loads(line) for line in open(path, encoding="utf-8")]
    out = ["| interval rule | covers 0.5 [Clopper-Pearson 95%] | misses below / above 0.5 |", "|---|---|---|"]
    for key in ("z", "t", "t+chance"):
        cov = sum(r[key][0] <= 0.5 <= r[key][1] for r in rows)
        below = sum(r[key][1] < 0.5 for r in rows)
        ci = binomtest(cov, len(rows)).proportion_ci()
        out.append(f"| {key} | {cov}/{len(rows)} = {cov / len(rows):.1%} [{ci.low:.1%}, {ci.high:.1%}] | "
                   f"{below} / {len(rows) - cov - below} |")
    p05 = sum(r["p"] < 0.05 for r in rows)
    out.append(f"\np < 0.05 in {p05} of {len(rows)} tables.")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--start", type=int, default=0)
    ap.add_argument("--tables", type=int, default=200)
    ap.add_argument("--save", default="interval_coverage.jsonl")
    ap.add_argument("--table-from", metavar="FILE")
    a = ap.parse_args(argv)
    if a.table_from:
        print(table(a.table_from))
        return 0
    run(a.start, a.tables, a.save)
    return 0


if __name__ == "__main__":
    sys.exit(main())
