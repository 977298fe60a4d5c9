"""False-alarm rate, power and speed of the TPR/FPR heterogeneity (sitecheck.analyses.heterogeneity).

Invented wards with fixed 0/1 predictions (no model is fitted): each ward's
rows are positive with probability 0.25, predicted positive with probability
TPR among positives and FPR among negatives.

- null: 30 wards of 20-80 rows, the same TPR (0.7) and FPR (0.2) everywhere;
  the share of seeds in which the tau^2 interval excludes 0, the permutation
  p-value is below 0.05, either, and the max - min TPR spread exceeds 0.4;
- power: two wards whose TPR differs by 0.3, 0.15 or 0.1 with 200 positives each;
- speed: one call of ``rates_at`` with 999 permutations for 30 and 1,000 units.

Run: ``nice python tests/benchmarks/bench_heterogeneity.py [--seeds 1000]``. Prints a table; nothing is asserted.
"""
from __future__ import annotations

import argparse
import time

import numpy as np


def wards(seed, sites=30, tpr=0.7, fpr=0.2, rows=(20, 80), prevalence=0.25):
    rng = np.random.default_rng(seed)
    size = rng.integers(rows[0], rows[1] + 1, sites)
    unit = np.repeat(np.arange(sites), size)
    y = (rng.random(len(unit)) < prevalence).astype(float)
    t = np.broadcast_to(np.asarray(tpr, dtype=float), (sites,))[unit]
    pred = np.where(y == 1, rng.random(len(unit)) < t, rng.random(len(unit)) < fpr).astype(float)
    return y, pred, unit, [f"ward {i}" for i in range(sites)]


def main() -> None:
    from sitecheck.analyses.outcome import rates_at

    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=1000)
    ap.add_argument("--permutations", type=int, default=999)
    a = ap.parse_args()

    counts = {k: np.zeros(4, int) for k in ("tpr", "fpr")}
    t0 = time.perf_counter()
    for seed in range(a.seeds):
        y, pred, unit, labels = wards(seed)
        eo = rates_at(y, pred, unit, labels, threshold=0.5, rule="given", n_permutations=a.permutations,
                      random_state=seed)
        for key, h, spread in (("tpr", eo.tpr_heterogeneity, eo.tpr_spread),
                               ("fpr", eo.fpr_heterogeneity, eo.fpr_spread)):
            ci0 = h.tau2_ci[0] > 0
            p05 = h.p_value < 0.05
            counts[key] += [ci0, p05, ci0 or p05, spread > 0.4]
    sec = time.perf_counter() - t0
    print(f"null, 30 wards of 20-80 rows, {a.seeds} seeds, {a.permutations} permutations ({sec:.1f} s):")
    print("| rate | tau2 interval excludes 0 | permutation p < 0.05 | either | max - min > 0.4 |")
    print("|---|---|---|---|---|")
    for key, c in counts.items():
        print(f"| {key.upper()} | " + " | ".join(f"{v / a.seeds:.3f}" for v in c) + " |")

    print("\npower, two wards, 200 positives each, 200 seeds:")
    print("| TPR difference | tau2 interval excludes 0 | permutation p < 0.05 |")
    print("|---|---|---|")
    for diff in (0.3, 0.15, 0.1):
        ci0 = p05 = 0
        for seed in range(200):
            rng = np.random.default_rng(seed)
            y = np.r_[np.ones(200), np.zeros(300), np.ones(200), np.zeros(300)]
            unit = np.repeat([0, 1], 500)
            tpr = np.where(unit == 0, 0.55, 0.55 + diff)
            pred = np.where(y == 1, rng.random(1000) < tpr, rng.random(1000) < 0.2).astype(float)
            h = rates_at(y, pred, unit, ["a", "b"], threshold=0.5, rule="given", n_permutations=a.permutations,
                         random_state=seed).tpr_heterogeneity
            ci0 += h.tau2_ci[0] > 0
            p05 += h.p_value < 0.05
        print(f"| {diff} | {ci0 / 200:.3f} | {p05 / 200:.3f} |")

    print("\nspeed (one rates_at call, TPR and FPR, with the without-small repeat):")
    for sites in (30, 1000):
        y, pred, unit, labels = wards(0, sites=sites)
        t0 = time.perf_counter()
        rates_at(y, pred, unit, labels, threshold=0.5, rule="given", n_permutations=999, random_state=0)
        print(f"  {sites} units, {len(y)} rows: {time.perf_counter() - t0:.3f} s")


if __name__ == "__main__":
    main()
