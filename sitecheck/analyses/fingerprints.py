"""Fingerprints: why a feature carries a site's signature.

:func:`find_fingerprints` runs small detectors over the raw per-site values of
every feature (all rows of the validated table, not the modelling
subsample) and returns :class:`Fingerprint` findings, each with the numbers
behind it (``evidence``: counts, an effect size, a p-value or an interval).

Detectors run per feature in this order; later detectors see the values
cleaned by earlier ones and skip what is already explained:

1. ``site_missing`` -- never recorded at a site (Fisher's exact test).
2. ``exclusive_level`` -- a categorical level seen at one site only
   (hypergeometric probability that all its rows fall at that site).
3. ``missing_code`` -- sentinel values (-1, -9, -99, -999, 99, 999, 9999, ...)
   far outside the feature's range at one site; removed before step 4.
4. ``unit_ratio`` -- the site's quantiles are a published conversion factor
   times the others' (:mod:`sitecheck.table.units`), or Fahrenheit against Celsius.
   Sites with a unit finding leave the reference of later detectors.
5. ``censored_below`` / ``censored_above`` -- the site writes cells as ``<5`` or
   ``>20`` (read by intake as the limit with a flag) while the other sites censor
   less often; its censored cells leave the values of later detectors.
   ``number_format`` -- the site writes decimal commas, a unit after the number
   or thousands separators where the others do not (per-site cell counts from
   intake).
   ``floor`` / ``ceiling`` -- a point mass at the site's minimum/maximum that
   the other sites do not show at that value, while they do have values
   beyond it (a detection or reporting limit).
6. ``precision`` -- the recording grid (0.1, 0.5, 1, ...) differs by site.
7. ``heaping`` -- terminal-digit preference relative to the other sites.
8. ``shift`` / ``scale`` -- a location / spread gap after covariate adjustment.

Multiple testing: each kind's tests are Bonferroni-corrected over
features x sites at family-wise level ``alpha`` (default 0.01), so each
per-test false-positive rate is at most ``alpha / (n_features * n_sites)`` and
the chance that a kind fires at all on data with no site effect is at most
``alpha``. Effect-size floors (stated per detector) keep large tables from
flagging trivia.

This is decision support for data work, not a clinical device.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from scipy import stats as _st

from sitecheck._records import fields_dict
from sitecheck.report.result import to_jsonable as _jsonable
from sitecheck.errors import InputError, ParameterError
from sitecheck.table.units import TEMPERATURE, candidate_factors, conversions_for, is_temperature

from sitecheck.report.gates import FINGERPRINT_KINDS as KINDS  # noqa: E402  (the one list of kinds)

#: Candidate recording steps, coarsest last.
GRID_STEPS = (0.001, 0.002, 0.005, 0.01, 0.02, 0.025, 0.05, 0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0,
              20.0, 25.0, 50.0, 100.0)

#: Sentinel codes for "missing" (common practice in clinical and survey data; no single source).
SENTINELS = tuple(sorted({-1.0} | {float(s * int(str(d) * k)) for d in (7, 8, 9) for k in range(1, 6)
                                   for s in (-1, 1) if not (s == 1 and k == 1)}
                         | {99.9, 999.9, -99.9, -999.9}))

_Z95 = 1.959963984540054


@dataclass(frozen=True)
class Fingerprint:
    """One finding: ``kind`` explains why ``feature`` marks ``site``.

    Attributes
    ----------
    feature, site, kind, detail : str
    evidence : dict
        Numbers behind the finding (counts ``n``/``count``, effect sizes, a
        ``p_value`` or ``p_adj`` and intervals).
    severity : str
        ``high`` (the values are not comparable as they stand), ``medium`` or ``low``.
    explanation : str
        What the finding usually means, in plain words.
    suggested_fix : str
    """

    feature: str
    site: Optional[str]
    kind: str
    detail: str
    evidence: Dict[str, Any] = field(default_factory=dict)
    severity: str = "medium"
    explanation: str = ""
    suggested_fix: str = ""

    def to_dict(self) -> dict:
        return fields_dict(self, convert=_jsonable)


@dataclass(frozen=True)
class FingerprintResult:
    """All fingerprints of a table, with the testing rules that produced them.

    Attributes
    ----------
    findings : tuple of Fingerprint
        Sorted by feature (table order), then site, then kind.
    tests : dict
        Kind -> ``{"n_tests", "alpha", "per_test_alpha"}`` (Bonferroni).
    n_rows : int
        Rows used (all rows of the validated table).
    features : tuple of str
    covariates : tuple of str
    params : dict
    """

    findings: Tuple[Fingerprint, ...]
    tests: Dict[str, Dict[str, Any]]
    n_rows: int
    features: Tuple[str, ...]
    covariates: Tuple[str, ...]
    params: Dict[str, Any]
    #: Feature -> why the value detectors skipped it (recorded at fewer than two sites).
    skipped: Dict[str, str] = field(default_factory=dict)
    #: unit column -> its link to the numeric column it qualifies (:func:`link_unit_columns`)
    unit_columns: Dict[str, Dict[str, Any]] = field(default_factory=dict)

    def of_kind(self, kind: str) -> List[Fingerprint]:
        return [f for f in self.findings if f.kind == kind]

    def to_dict(self) -> dict:
        return fields_dict(self, convert=_jsonable)




from sitecheck.analyses.stats import round_sig as _r  # noqa: E402  (stable JSON rounding, shared)


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------

def median_ci(sorted_values: np.ndarray, level: float = 0.95) -> Tuple[float, float]:
    """Distribution-free interval for a median from order statistics.

    Uses the normal approximation to the binomial for the ranks
    ``n/2 -+ z sqrt(n)/2``.

    References
    ----------
    Conover WJ. Practical Nonparametric Statistics, 3rd ed. Wiley, 1999, section 3.2.
    """
    a = sorted_values
    n = len(a)
    if n == 0:
        return (float("nan"), float("nan"))
    z = _st.norm.ppf(0.5 + level / 2)
    lo = int(max(0, math.floor(n / 2 - z * math.sqrt(n) / 2)))
    hi = int(min(n - 1, math.ceil(n / 2 + z * math.sqrt(n) / 2) - 1))
    return float(a[lo]), float(a[max(hi, lo)])


def grid_share(uniq: np.ndarray, weights: np.ndarray, step: float) -> float:
    """Share of values (unique values with their counts) on multiples of ``step``."""
    r = uniq / step
    on = np.abs(r - np.round(r)) < 1e-6 + 1e-9 * np.abs(r)
    tot = weights.sum()
    return float(weights[on].sum() / tot) if tot else float("nan")


def grid_step(values: np.ndarray, *, share: float = 0.98) -> Optional[float]:
    """The coarsest step of :data:`GRID_STEPS` holding at least ``share`` of the values.

    None when no step does (finer than 0.001 or no common grid) or fewer than
    two distinct values.
    """
    uniq, cnt = np.unique(values, return_counts=True)
    if len(uniq) < 2:
        return None
    tot = cnt.sum()
    # every step at once, coarsest first: the same element-wise test as grid_share
    steps = np.asarray(GRID_STEPS[::-1], dtype=float)
    r = uniq[None, :] / steps[:, None]
    on = np.abs(r - np.round(r)) < 1e-6 + 1e-9 * np.abs(r)
    shares = (on * cnt[None, :]).sum(axis=1) / tot
    hit = np.flatnonzero(shares >= share)
    return float(steps[hit[0]]) if len(hit) else None


def _sorted_median(a: np.ndarray) -> float:
    """Median of an already sorted array."""
    n = len(a)
    h = n // 2
    return float(a[h]) if n % 2 else float(0.5 * (a[h - 1] + a[h]))


def welch_test(m1: float, v1: float, n1: int, m2: float, v2: float, n2: int) -> float:
    """Two-sided p-value of Welch's unequal-variance t-test from summary statistics.

    References
    ----------
    Welch BL. The generalization of Student's problem when several different
    population variances are involved. Biometrika 1947;34:28-35.
    """
    a, b = v1 / n1, v2 / n2
    se2 = a + b
    if se2 <= 0 or n1 < 2 or n2 < 2:
        return 1.0
    t = (m1 - m2) / math.sqrt(se2)
    df = se2 ** 2 / (a ** 2 / (n1 - 1) + b ** 2 / (n2 - 1)) if (a > 0 or b > 0) else n1 + n2 - 2
    return float(min(1.0, 2 * _st.t.sf(abs(t), df)))


def brown_forsythe(a: np.ndarray, b: np.ndarray) -> float:
    """p-value of the Brown-Forsythe test (Levene's test about medians) for two groups.

    One-way ANOVA F on absolute deviations from each group's median.

    References
    ----------
    Brown MB, Forsythe AB. Robust tests for the equality of variances. JASA 1974;69:364-367.
    """
    return _abs_dev_anova(np.abs(a - np.median(a)), np.abs(b - np.median(b)))


def _abs_dev_anova(za: np.ndarray, zb: np.ndarray) -> float:
    """One-way ANOVA p-value on two groups of absolute deviations."""
    na, nb = len(za), len(zb)
    if na < 2 or nb < 2:
        return 1.0
    ma, mb = float(za.mean()), float(zb.mean())
    m = (na * ma + nb * mb) / (na + nb)
    between = na * (ma - m) ** 2 + nb * (mb - m) ** 2
    within = float(((za - ma) ** 2).sum() + ((zb - mb) ** 2).sum())
    if within <= 0:
        return 0.0 if between > 0 else 1.0
    F = between / (within / (na + nb - 2))
    return float(_st.f.sf(F, 1, na + nb - 2))


def _fisher_greater(a: int, b: int, c: int, d: int) -> float:
    """One-sided Fisher exact p-value that row 1 has the higher share of column 1."""
    return float(_st.fisher_exact([[a, b], [c, d]], alternative="greater").pvalue)


def _fisher_two(a: int, b: int, c: int, d: int) -> float:
    return float(_st.fisher_exact([[a, b], [c, d]], alternative="two-sided").pvalue)


@dataclass
class _Cand:
    """A candidate finding before multiplicity control."""

    j: int
    s: int
    kind: str
    p: float
    passes_effect: bool
    detail: str
    evidence: Dict[str, Any]
    severity: str = "medium"
    fix: str = ""
    payload: Any = None


# ---------------------------------------------------------------------------
# detectors: pure functions on values by site
# ---------------------------------------------------------------------------

def detect_missing_codes(vals: Sequence[np.ndarray], *, min_count: int = 10) -> List[_Cand]:
    """Sentinel values far outside the feature's range at one site.

    A value of :data:`SENTINELS` is a candidate at site ``s`` when it occurs
    at least ``min_count`` times there and lies outside the other sites'
    0.5-99.5% range widened by two interquartile ranges (or is negative while
    the other sites never are). The p-value is Fisher's one-sided exact test
    of its share at the site against the other sites (Bonferroni within the
    pair over the candidate values). False-positive rate per feature x site
    test: at most the per-test level; values far outside the range with
    ``min_count`` copies essentially never arise by chance.
    """
    out: List[_Cand] = []
    k = len(vals)
    sent = np.array(SENTINELS)
    for s in range(k):
        v = vals[s]
        if len(v) < min_count:
            continue
        is_sent = np.isin(v, sent)
        if not is_sent.any():
            continue
        others = [vals[t] for t in range(k) if t != s and len(vals[t])]
        if not others:
            continue
        rest = np.concatenate(others)
        rest_clean = rest[~np.isin(rest, sent)]
        own_clean = v[~is_sent]
        if len(rest_clean) < min_count:
            continue
        q005, q25, q75, q995 = np.quantile(rest_clean, [0.005, 0.25, 0.75, 0.995])
        iqr = max(q75 - q25, 1e-12)
        lo, hi = q005 - 2 * iqr, q995 + 2 * iqr
        if len(own_clean) >= min_count:
            # the code must also lie outside the site's own bulk (another unit is not a code)
            o005, o25, o75, o995 = np.quantile(own_clean, [0.005, 0.25, 0.75, 0.995])
            oiqr = max(o75 - o25, 1e-12)
            lo, hi = min(lo, o005 - 2 * oiqr), max(hi, o995 + 2 * oiqr)
        nonneg = bool(rest_clean.min() >= 0 and (len(own_clean) == 0 or own_clean.min() >= 0))
        codes, counts = np.unique(v[is_sent], return_counts=True)
        tested = []
        for code, cnt in zip(codes, counts):
            if cnt < min_count:
                continue
            far = code < lo or code > hi or (code < 0 and nonneg)
            if not far:
                continue
            c_rest = int(np.sum(rest == code))
            p = _fisher_greater(int(cnt), len(v) - int(cnt), c_rest, len(rest) - c_rest)
            tested.append((float(code), int(cnt), c_rest, p))
        if not tested:
            continue
        m = len(tested)
        kept = []
        for code, cnt, c_rest, p in tested:
            share_s, share_r = cnt / len(v), c_rest / len(rest)
            if share_s > 2 * share_r + 0.005:
                kept.append({"value": code, "count": int(cnt), "share": _r(share_s), "count_elsewhere": int(c_rest),
                             "share_elsewhere": _r(share_r), "p_value": _r(min(1.0, p * m)), "_p": min(1.0, p * m)})
        if not kept:
            continue
        # one finding per feature x site: the codes listed, the most frequent first
        kept.sort(key=lambda e: (-e["count"], e["value"]))
        top = kept[0]
        cnt = sum(e["count"] for e in kept)
        c_rest = sum(e["count_elsewhere"] for e in kept)
        p_min = min(e.pop("_p") for e in kept)
        codes = [e["value"] for e in kept]
        ev = {"value": top["value"], "codes": kept, "p_value": _r(p_min),
              "at_site": {"n": int(len(v)), "count": int(cnt), "share": _r(cnt / len(v))},
              "elsewhere": {"n": int(len(rest)), "count": int(c_rest), "share": _r(c_rest / len(rest))},
              "reference_range": [_r(q005), _r(q995)]}
        shown = ", ".join(f"{c:g}" for c in codes)
        detail = (f"the value{'s' if len(codes) > 1 else ''} {shown} appear{'' if len(codes) > 1 else 's'} {cnt} times "
                  f"({cnt / len(v):.1%} of recorded values) at this site, far outside the range of the other sites "
                  f"({q005:.4g} to {q995:.4g})")
        out.append(_Cand(-1, s, "missing_code", p_min, True, detail, ev,
                         "high", f"treat {shown} as missing at this site before analysis", payload=tuple(codes)))
    return out


def _ref_sites(meds: Dict[int, float], s: int) -> List[int]:
    """Other sites whose median lies within a factor 1.5 of the median of the others' medians."""
    others = {t: m for t, m in meds.items() if t != s}
    if not others:
        return []
    mm = float(np.median(list(others.values())))
    if mm <= 0:
        return []
    return [t for t, m in others.items() if m > 0 and abs(math.log(m / mm)) < math.log(1.5)]


_QS = (0.1, 0.25, 0.5, 0.75, 0.9)


def detect_unit_ratio(vals: Sequence[np.ndarray], name: Optional[str] = None, *,
                      min_count: int = 10) -> List[_Cand]:
    """A site's values are a conversion factor times the others' (or F against C).

    For each site, the reference is the pooled values of the other sites whose
    median is within a factor 1.5 of the median of the other sites' medians.
    The ratio of the site's quantiles (10, 25, 50, 75, 90%) to the reference's
    must be near-constant (a unit change scales every quantile) and its median
    ratio must match a factor ``f`` or ``1/f`` of :mod:`sitecheck.table.units`: within
    10% (quantile spread within 30%) for the analyte named by the column, within
    5% (spread 15%) for the table's other factors on any positive feature.
    Temperature is affine: the site's median between 86 and 113 against a
    reference between 30 and 45 (or the reverse), with the converted median
    within 1 degree of the reference. The p-value is the two-sided Mann-Whitney
    test of site against reference; ``ratio_ci`` combines the order-statistic
    intervals of the two medians. Requires ``|log ratio| >= log 1.8``, so on
    data without unit differences the false-positive rate is essentially zero.
    """
    out: List[_Cand] = []
    k = len(vals)
    meds = {t: _sorted_median(vals[t]) for t in range(k) if len(vals[t]) >= min_count}
    named = conversions_for(name) if name is not None else []
    temp_named = name is not None and is_temperature(name)
    for s in meds:
        v = vals[s]
        refs = [t for t in meds if t != s]
        if not refs:
            continue
        # -- temperature (affine) --------------------------------------
        m_s = meds[s]
        other_meds = [meds[t] for t in refs]
        mm = float(np.median(other_meds))
        temp_case = None
        if 86 <= m_s <= 113 and 30 <= mm <= 45:
            temp_case = "F_at_site"
        elif 30 <= m_s <= 45 and 86 <= mm <= 113:
            temp_case = "C_at_site"
        if temp_case is not None:
            ref_ids = [t for t in refs if (30 <= meds[t] <= 45) == (temp_case == "F_at_site")]
            if not ref_ids:  # no other site in the other scale: no temperature pair to compare
                temp_case = None
        if temp_case is not None:
            ref = np.concatenate([vals[t] for t in ref_ids])
            conv = TEMPERATURE.forward(v) if temp_case == "F_at_site" else TEMPERATURE.backward(v)
            med_conv = float(np.median(conv))
            med_ref = float(np.median(ref))
            tol = 1.0 if temp_case == "F_at_site" else 1.8
            iqr_s = float(np.subtract(*np.quantile(conv, [0.75, 0.25])))
            iqr_r = float(np.subtract(*np.quantile(ref, [0.75, 0.25])))
            iqr_ok = iqr_r > 0 and 0.5 <= iqr_s / iqr_r <= 2.0
            if abs(med_conv - med_ref) <= tol and (iqr_ok or temp_named):
                p = float(_st.mannwhitneyu(v, ref, method="asymptotic").pvalue)
                after = float(_st.mannwhitneyu(conv, ref, method="asymptotic").pvalue)
                site_unit, ref_unit = ("degF", "degC") if temp_case == "F_at_site" else ("degC", "degF")
                ev = {"conversion": TEMPERATURE.to_dict(), "median_site": _r(m_s), "median_reference": _r(med_ref),
                      "median_site_converted": _r(med_conv), "p_value": _r(p), "p_value_after_conversion": _r(after),
                      "n": int(len(v)), "n_reference": int(len(ref)), "name_match": bool(temp_named)}
                detail = (f"median {m_s:.4g} against {med_ref:.4g} elsewhere; converted from {site_unit} to "
                          f"{ref_unit} it is {med_conv:.4g}: the site records {site_unit}, the others {ref_unit}")
                fix = ("convert this site's values with C = (F - 32) x 5/9" if temp_case == "F_at_site"
                       else "convert this site's values with F = C x 9/5 + 32 (or the others' to Celsius)")
                out.append(_Cand(-1, s, "unit_ratio", p, True, detail, ev, "high", fix,
                                 payload=(site_unit, ref_unit)))
                continue
        # -- multiplicative factors ------------------------------------
        ref_ids = _ref_sites(meds, s)
        if not ref_ids or m_s <= 0:
            continue
        # cheap pre-check on the median of the reference sites' medians
        pre = float(np.median([meds[t] for t in ref_ids]))
        if pre <= 0 or abs(math.log(m_s / pre)) < math.log(1.6):
            continue
        ref = np.concatenate([vals[t] for t in ref_ids])
        if np.mean(v > 0) < 0.9 or np.mean(ref > 0) < 0.9:
            continue
        med_ref = float(np.median(ref))
        ratio = m_s / med_ref
        if abs(math.log(ratio)) < math.log(1.8):
            continue
        q_s = np.quantile(v, _QS)
        q_r = np.quantile(ref, _QS)
        if np.any(q_s <= 0) or np.any(q_r <= 0):
            # fall back to the central quantiles
            q_s, q_r = q_s[1:4], q_r[1:4]
            if np.any(q_s <= 0) or np.any(q_r <= 0):
                continue
        spread = float(np.max(np.abs(np.log(q_s / q_r) - math.log(ratio))))
        cands = [(f, lab, c, True) for f, lab, c in candidate_factors(name)] if named else []
        cands += [(f, lab, c, False) for f, lab, c in candidate_factors(None)
                  if not any(abs(f - g) < 1e-9 for g, _, _, _ in cands)]
        best = None
        for f, lab, c, is_named in cands:
            for direction, target in (("site_conventional", 1.0 / f), ("site_si", f)):
                err = abs(math.log(ratio / target))
                tol, stol = (math.log(1.10), math.log(1.30)) if is_named else (math.log(1.05), math.log(1.15))
                if err <= tol and spread <= stol:
                    score = (0 if is_named else 1, err)
                    if best is None or score < best[0]:
                        best = (score, f, lab, c, is_named, direction, target)
        if best is None:
            continue
        _, f, lab, c, is_named, direction, target = best
        vs, rs = np.sort(v), np.sort(ref)
        lo_s, hi_s = median_ci(vs)
        lo_r, hi_r = median_ci(rs)
        rci = [_r(lo_s / hi_r) if hi_r > 0 else None, _r(hi_s / lo_r) if lo_r > 0 else None]
        p = float(_st.mannwhitneyu(v, ref, method="asymptotic").pvalue)
        conv = v / target
        after = float(_st.mannwhitneyu(conv, ref, method="asymptotic").pvalue)
        if c is not None:
            site_unit, ref_unit = (c.from_unit, c.to_unit) if direction == "site_conventional" else (c.to_unit, c.from_unit)
        else:
            site_unit, ref_unit = (f"unit x{target:g}", "unit")
        ev = {"ratio": _r(ratio), "ratio_ci": rci, "factor": _r(target), "relative_error": _r(ratio / target - 1),
              "quantile_log_spread": _r(spread), "median_site": _r(m_s), "median_reference": _r(med_ref),
              "p_value": _r(p), "p_value_after_conversion": _r(after), "n": int(len(v)),
              "n_reference": int(len(ref)), "reference_sites": len(ref_ids), "name_match": bool(is_named),
              "conversion": c.to_dict() if c is not None else {"factor": float(f), "source": "decimal prefix"}}
        what = lab if is_named else f"{lab} (matched by the ratio alone)"
        detail = (f"values are {ratio:.4g} times the other sites' (median {m_s:.4g} against {med_ref:.4g}), "
                  f"matching {what}: this site likely records {site_unit}, the others {ref_unit}")
        fix = f"divide this site's values by {target:.6g} to express them in {ref_unit}"
        out.append(_Cand(-1, s, "unit_ratio", p, True, detail, ev, "high", fix, payload=target))
    return out


def detect_limits(vals: Sequence[np.ndarray], active: Sequence[int], *, min_count: int = 10,
                  min_share_gap: float = 0.02) -> List[_Cand]:
    """Floor / ceiling: a point mass at the site's minimum (maximum).

    At site ``s`` with minimum ``m``: the share of its values equal to ``m``
    against the other sites' share equal to ``m`` (Fisher's one-sided exact
    test). The effect must be at least ``min_share_gap`` and three times the
    others' share, with at least ``min_count`` values at ``m``, and the other
    sites must have values below ``m`` amounting to at least half the excess
    (the mass the limit would have absorbed). False-positive rate per feature
    x site x side: at most the per-test level (exact conditional test).
    """
    out: List[_Cand] = []
    for s in active:
        v = vals[s]
        if len(v) < min_count:
            continue
        others = [vals[t] for t in active if t != s and len(vals[t])]
        if not others:
            continue
        rest = np.concatenate(others)
        if float(v.min()) == float(v.max()):
            continue  # one value only: a constant, judged by ``scale``
        for kind, m in (("floor", float(v.min())), ("ceiling", float(v.max()))):
            tol = 1e-9 * max(1.0, abs(m))
            k_s = int(np.sum(np.abs(v - m) <= tol))
            if k_s < min_count:
                continue
            k_r = int(np.sum(np.abs(rest - m) <= tol))
            beyond = int(np.sum(rest < m - tol)) if kind == "floor" else int(np.sum(rest > m + tol))
            sh_s, sh_r, sh_b = k_s / len(v), k_r / len(rest), beyond / len(rest)
            effect = (sh_s - sh_r >= min_share_gap and sh_s >= 3 * sh_r and sh_b >= 0.5 * (sh_s - sh_r))
            p = _fisher_greater(k_s, len(v) - k_s, k_r, len(rest) - k_r)
            word = "below" if kind == "floor" else "above"
            ev = {"limit": _r(m), "p_value": _r(p),
                  "at_site": {"n": int(len(v)), "count": k_s, "share": _r(sh_s)},
                  "elsewhere": {"n": int(len(rest)), "count": k_r, "share": _r(sh_r),
                                f"share_{word}": _r(sh_b)}}
            detail = (f"{sh_s:.1%} of values sit exactly at the site's {'minimum' if kind == 'floor' else 'maximum'} "
                      f"{m:.4g}, against {sh_r:.1%} at that value elsewhere, where {sh_b:.1%} lie {word} it")
            fix = (f"treat values at {m:.4g} as censored ({'<=' if kind == 'floor' else '>='} {m:.4g}) at this site, "
                   f"or apply the same limit to every site")
            out.append(_Cand(-1, s, kind, p, effect, detail, ev, "medium", fix, payload=m))
    return out


def detect_precision(vals: Sequence[np.ndarray], active: Sequence[int], *, min_count: int = 10,
                     min_share_gap: float = 0.2) -> Tuple[List[_Cand], Dict[int, Optional[float]]]:
    """The recording grid of a site differs from the other sites'.

    Each site's step is the coarsest of :data:`GRID_STEPS` holding 98% of its
    values. A site is a candidate when its step differs from the most common
    step of the other sites (with two sites, only the coarser one). On the
    coarser grid ``G`` of the two, the share of values on ``G`` at the site is
    compared with the other sites' (Fisher's two-sided exact test); the
    shares must differ by at least ``min_share_gap``. False-positive rate per
    feature x site test: at most the per-test level.
    """
    out: List[_Cand] = []
    steps: Dict[int, Optional[float]] = {}
    for s in active:
        if len(vals[s]) >= min_count:
            steps[s] = grid_step(vals[s])
    for s, g_s in steps.items():
        other = [steps[t] for t in steps if t != s]
        if not other:
            continue
        vc = pd.Series([-1.0 if g is None else g for g in other]).value_counts()
        top = vc[vc == vc.max()].index.tolist()
        g_o = min(top)
        g_o = None if g_o == -1.0 else g_o
        if g_s == g_o:
            continue
        if len(steps) == 2 and (g_s or 0) < (g_o or 0):
            continue
        G = max(g for g in (g_s, g_o) if g is not None) if (g_s is not None or g_o is not None) else None
        if G is None:
            continue
        v = vals[s]
        rest = np.concatenate([vals[t] for t in steps if t != s and steps[t] == g_o])
        u1, c1 = np.unique(v, return_counts=True)
        u2, c2 = np.unique(rest, return_counts=True)
        sh_s, sh_r = grid_share(u1, c1, G), grid_share(u2, c2, G)
        k_s, k_r = int(round(sh_s * len(v))), int(round(sh_r * len(rest)))
        p = _fisher_two(k_s, len(v) - k_s, k_r, len(rest) - k_r)
        def name(g):
            return "no common grid (finer than 0.001)" if g is None else f"steps of {g:g}"
        ev = {"step_site": g_s, "step_elsewhere": g_o, "grid": G, "p_value": _r(p),
              "at_site": {"n": int(len(v)), "count": k_s, "share_on_grid": _r(sh_s)},
              "elsewhere": {"n": int(len(rest)), "count": k_r, "share_on_grid": _r(sh_r)}}
        detail = (f"recorded in {name(g_s)} at this site against {name(g_o)} elsewhere "
                  f"({sh_s:.0%} against {sh_r:.0%} of values on multiples of {G:g})")
        fix = (f"round every site to multiples of {G:g} before pooling, or model the rounding"
               if G is not None else "")
        out.append(_Cand(-1, s, "precision", p, abs(sh_s - sh_r) >= min_share_gap, detail, ev, "medium", fix))
    return out, steps


def detect_heaping(vals: Sequence[np.ndarray], active: Sequence[int], steps: Dict[int, Optional[float]], *,
                   min_count: int = 50, min_tvd: float = 0.1) -> List[_Cand]:
    """Terminal-digit preference at one site relative to the others.

    With ``g`` the finest recording step among the sites, the terminal digit
    is ``round(x / g) mod 10``. Only sites recorded on ``g`` are tested (a
    coarser grid is a ``precision`` finding), and only when the robust SD
    (IQR / 1.349) of both the site and the rest is at least ``8 g``, so that a
    smooth distribution gives near-uniform terminal digits whatever its
    location. Test: chi-square on the 2 x 10 table site against the other
    sites; effect: total-variation distance between the digit distributions
    of at least ``min_tvd``. False-positive rate per feature x site test: at
    most the per-test level.
    """
    out: List[_Cand] = []
    known = [g for s, g in steps.items() if g is not None]
    if not known:
        return out
    g0 = min(known)
    usable = [s for s in active if steps.get(s) == g0 and len(vals[s]) >= min_count]
    digits = {}
    for s in usable:
        v = vals[s]
        q25, q75 = np.quantile(v, [0.25, 0.75])
        if (q75 - q25) / 1.349 < 8 * g0:
            continue
        d = np.mod(np.round(v / g0).astype(np.int64), 10)
        digits[s] = np.bincount(d, minlength=10)
    for s in digits:
        rest = sum(digits[t] for t in digits if t != s) if len(digits) > 1 else None
        if rest is None or isinstance(rest, int):
            continue
        tab = np.vstack([digits[s], rest])
        keep = tab.sum(axis=0) > 0
        tab = tab[:, keep]
        if tab.shape[1] < 2:
            continue
        chi = _st.chi2_contingency(tab, correction=False)
        p_s = digits[s] / digits[s].sum()
        p_r = rest / rest.sum()
        tvd = 0.5 * float(np.abs(p_s - p_r).sum())
        pref = [int(i) for i in np.argsort(-(p_s - p_r))[:2] if p_s[i] - p_r[i] > 0.02]
        n_cells = int(digits[s].sum())
        ev = {"p_value": _r(chi.pvalue), "chi2": _r(chi.statistic), "dof": int(chi.dof),
              "total_variation": _r(tvd), "preferred_digits": pref, "step": g0,
              "share_site": [_r(x, 4) for x in p_s], "share_elsewhere": [_r(x, 4) for x in p_r],
              "n": n_cells, "n_reference": int(rest.sum())}
        dig = " and ".join(str(i) for i in pref) or "some digits"
        detail = (f"terminal digit {dig} over-represented at this site (digit distributions differ by "
                  f"{tvd:.0%} total variation from the other sites)")
        out.append(_Cand(-1, s, "heaping", float(chi.pvalue), tvd >= min_tvd, detail, ev, "low",
                         "check how values are read and entered at this site (manual rounding); "
                         "compare after coarsening every site to the preferred grid"))
    return out


def _design(frame: pd.DataFrame, covs: Sequence[str], kinds: Sequence[str]) -> np.ndarray:
    cols: List[np.ndarray] = []
    for c, kind in zip(covs, kinds):
        if kind in ("numeric", "binary"):
            x = pd.to_numeric(frame[c], errors="coerce").to_numpy(dtype=float)
            miss = np.isnan(x)
            mu = float(np.nanmean(x)) if (~miss).any() else 0.0
            sd = float(np.nanstd(x)) if (~miss).any() else 1.0
            z = np.where(miss, 0.0, (x - mu) / (sd if sd > 0 else 1.0))
            cols.append(z)
            if kind == "numeric" and len(np.unique(x[~miss])) > 10:
                cols.append(z ** 2 - np.mean(z ** 2))
            if miss.any():
                cols.append(miss.astype(float))
        else:
            s = frame[c].astype(object).where(frame[c].notna(), None)
            levels = sorted({str(v) for v in s.dropna()})
            arr = np.array(["\0" if v is None else str(v) for v in s.to_numpy(dtype=object)], dtype=object)
            for lv in levels[1:]:
                cols.append((arr == lv).astype(float))
            if (arr == "\0").any():
                cols.append((arr == "\0").astype(float))
    if not cols:
        return np.zeros((len(frame), 0))
    return np.column_stack(cols)


def _full_gram(site_code: np.ndarray, Z: np.ndarray, k: int):
    """The Gram matrix of [site indicators, Z] over all rows (reused across features)."""
    if Z.shape[1] == 0:
        return None
    A = np.hstack([np.eye(k)[site_code], Z])
    return A, A.T @ A


def adjust_for_covariates(y: np.ndarray, site_code: np.ndarray, Z: np.ndarray, k: int, *,
                          _gram=None) -> Tuple[np.ndarray, int]:
    """Remove the covariates' within-site linear effect from ``y``.

    Fits ``y ~ site indicators + Z`` by least squares on the rows where ``y``
    is present (normal equations solved with ``numpy.linalg.lstsq``) and returns ``y - Z beta`` (site
    effects kept) and the number of rows used. Estimating ``beta`` within
    sites keeps a site's shift from leaking into the covariate slope.
    """
    ok = ~np.isnan(y)
    if Z.shape[1] == 0 or ok.sum() <= Z.shape[1] + k:
        return y.copy(), int(ok.sum())
    if _gram is None:
        _gram = _full_gram(site_code, Z, k)
    A_all, G_all = _gram
    miss = ~ok
    # normal equations: the full Gram matrix minus the rows where y is missing
    # (small matrix; lstsq on it handles collinear columns)
    G = G_all - A_all[miss].T @ A_all[miss] if miss.any() else G_all
    yz = np.where(ok, y, 0.0)
    beta, *_ = np.linalg.lstsq(G, A_all.T @ yz, rcond=None)
    out = np.full_like(y, np.nan)
    out[ok] = y[ok] - Z[ok] @ beta[k:]
    return out, int(ok.sum())


def detect_shift_scale(vals: Sequence[np.ndarray], active: Sequence[int], *, min_count: int = 10,
                       min_smd: float = 0.2, min_sd_ratio: float = 1.25) -> List[_Cand]:
    """Location and spread gaps of (covariate-adjusted) values at one site.

    ``shift``: the standardised mean difference of the site against the median
    of all sites' means (of the other site's, with two sites), over the pooled
    within-site SD (a robust reference: one shifted site does not make the
    others look shifted);
    p-value from Welch's t-test of the site against the other sites; interval
    from the large-sample SE of the SMD (Hedges & Olkin 1985). Needs
    ``|SMD| >= min_smd`` (0.2, a "small" effect after Cohen 1988).
    ``scale``: the site's SD over the median of the sites' SDs (same rule); p-value
    from the Brown-Forsythe test (ANOVA of absolute deviations from the
    median, each site about its own median); needs a ratio beyond ``min_sd_ratio`` either way.
    False-positive rate per feature x site test: at most the per-test level
    (the effect floors make it far smaller in large tables).

    References
    ----------
    Hedges LV, Olkin I. Statistical Methods for Meta-Analysis. Academic Press, 1985.
    Brown MB, Forsythe AB. Robust tests for the equality of variances. JASA 1974;69:364-367.
    """
    out: List[_Cand] = []
    act = [s for s in active if len(vals[s]) >= max(min_count, 3)]
    if len(act) < 2:
        return out
    means = {s: float(np.mean(vals[s])) for s in act}
    sds = {s: float(np.std(vals[s], ddof=1)) for s in act}
    meds = {s: float(np.median(vals[s])) for s in act}
    n = {s: len(vals[s]) for s in act}
    # sums of squares about each site's mean, to get the rest's variance without pooling arrays
    ss = {s: (n[s] - 1) * sds[s] ** 2 for s in act}
    pooled_var = sum((n[s] - 1) * sds[s] ** 2 for s in act) / max(sum(n[s] - 1 for s in act), 1)
    sd_p = math.sqrt(pooled_var)
    if sd_p <= 0:
        return out
    for s in act:
        others = [t for t in act if t != s]
        # reference: median over all sites (robust to one odd site) from three sites on;
        # with two sites, the other site
        ref_set = act if len(act) >= 3 else others
        ref_mean = float(np.median([means[t] for t in ref_set]))
        smd = (means[s] - ref_mean) / sd_p
        n_s = n[s]
        n_r = sum(n[t] for t in others)
        m_r = sum(n[t] * means[t] for t in others) / n_r
        v_r = (sum(ss[t] + n[t] * (means[t] - m_r) ** 2 for t in others)) / max(n_r - 1, 1)
        se = math.sqrt(1 / n_s + 1 / n_r + smd ** 2 / (2 * (n_s + n_r)))
        p = welch_test(means[s], sds[s] ** 2, n_s, m_r, v_r, n_r)
        ev = {"smd": _r(smd), "smd_ci": [_r(smd - _Z95 * se), _r(smd + _Z95 * se)], "p_value": _r(p),
              "mean_site": _r(means[s]), "mean_reference": _r(ref_mean), "sd_pooled": _r(sd_p),
              "difference": _r(means[s] - ref_mean), "n": int(n_s), "n_reference": int(n_r)}
        detail = (f"mean {means[s]:.4g} against {ref_mean:.4g} across sites (median of site means; difference "
                  f"{means[s] - ref_mean:+.3g}, SMD {smd:+.2f})")
        sev = "high" if abs(smd) >= 0.8 else "medium" if abs(smd) >= 0.5 else "low"
        out.append(_Cand(-1, s, "shift", p, abs(smd) >= min_smd, detail, ev, sev,
                         "check the analyser, calibration or method at this site; if it is a known offset, "
                         "correct it, else harmonise with care (it may be case mix the covariates miss)"))
        # scale
        ref_sd = float(np.median([sds[t] for t in ref_set]))
        if ref_sd <= 0 or sds[s] <= 0:
            continue
        ratio = sds[s] / ref_sd
        # Brown-Forsythe on absolute deviations, each site about its own median
        zr = np.concatenate([np.abs(vals[t] - meds[t]) for t in others])
        pl = _abs_dev_anova(np.abs(vals[s] - meds[s]), zr)
        se_l = math.sqrt(1 / (2 * (n_s - 1)) + 1 / (2 * max(n_r - 1, 1)))
        ev2 = {"sd_ratio": _r(ratio), "sd_ratio_ci": [_r(ratio * math.exp(-_Z95 * se_l)),
                                                       _r(ratio * math.exp(_Z95 * se_l))],
               "p_value": _r(pl), "sd_site": _r(sds[s]), "sd_reference": _r(ref_sd),
               "n": int(n_s), "n_reference": int(n_r)}
        detail2 = f"spread (SD) {sds[s]:.4g} against {ref_sd:.4g} across sites (median of site SDs; ratio {ratio:.2f})"
        eff = ratio >= min_sd_ratio or ratio <= 1 / min_sd_ratio
        out.append(_Cand(-1, s, "scale", pl, eff, detail2, ev2, "medium" if eff else "low",
                         "check the assay's range and calibration at this site; a different method or "
                         "patient group can widen or narrow the spread"))
    return out


def detect_site_missing(present: np.ndarray, site_code: np.ndarray, k: int) -> List[_Cand]:
    """Never recorded at a site while recorded elsewhere.

    Fisher's one-sided exact test of the site's missing share against the
    other sites'. False-positive rate: at most the per-test level.
    """
    out: List[_Cand] = []
    n_all = np.bincount(site_code, minlength=k)
    n_pres = np.bincount(site_code[present], minlength=k)
    for s in range(k):
        if n_all[s] == 0 or n_pres[s] > 0:
            continue
        pr = int(n_pres.sum() - n_pres[s])
        nr = int(n_all.sum() - n_all[s])
        if pr == 0:
            continue
        p = _fisher_greater(int(n_all[s]), 0, nr - pr, pr)
        ev = {"p_value": _r(p), "at_site": {"n": int(n_all[s]), "count": int(n_all[s]), "share_missing": 1.0},
              "elsewhere": {"n": nr, "count": nr - pr, "share_missing": _r((nr - pr) / nr)}}
        detail = (f"never recorded at this site (all {int(n_all[s])} rows missing) while "
                  f"{pr / nr:.0%} of rows elsewhere have it")
        out.append(_Cand(-1, s, "site_missing", p, True, detail, ev, "high",
                         "leave the feature out, or model it only where measured; do not impute one site wholesale"))
    return out


def detect_exclusive_levels(values: np.ndarray, site_code: np.ndarray, k: int, *,
                            min_count: int = 5) -> List[_Cand]:
    """A categorical level seen at one site only.

    The p-value is the hypergeometric probability that all ``c`` rows of the
    level fall at a site holding ``n_s`` of the ``N`` rows with a value
    (Bonferroni within the feature x site pair over its exclusive levels).
    False-positive rate: at most the per-test level.
    """
    out: List[_Cand] = []
    ok = np.array([v is not None and not (isinstance(v, float) and math.isnan(v)) for v in values])
    vals = np.array([str(v) for v in values[ok]], dtype=object)
    sc = site_code[ok]
    N = len(vals)
    if N == 0:
        return out
    n_site = np.bincount(sc, minlength=k)
    ct = pd.crosstab(pd.Series(vals, name="level"), pd.Series(sc, name="site"))
    per_site: Dict[int, List[Tuple[str, int]]] = {}
    for level, row in ct.iterrows():
        nz = row[row > 0]
        if len(nz) == 1 and int(nz.iloc[0]) >= min_count:
            per_site.setdefault(int(nz.index[0]), []).append((str(level), int(nz.iloc[0])))
    for s, levels in sorted(per_site.items()):
        # one finding per feature x site listing its levels, the most frequent first
        m = len(levels)
        rows, ps = [], []
        for level, c in sorted(levels, key=lambda t: (-t[1], t[0])):
            p = float(_st.hypergeom.pmf(c, N, int(n_site[s]), c))
            ps.append(min(1.0, p * m))
            rows.append({"level": level, "count": int(c), "p_value": _r(ps[-1])})
        p_min = min(ps)
        total = sum(r["count"] for r in rows)
        ev = {"level": rows[0]["level"], "levels": rows, "p_value": _r(p_min), "count": int(total),
              "n": int(n_site[s]), "n_reference": int(N - n_site[s])}
        shown = ", ".join(repr(r["level"]) for r in rows[:5]) + (f" and {m - 5} more" if m > 5 else "")
        detail = (f"level {shown} occurs only at this site ({total} rows) and never at the other sites" if m == 1 else
                  f"{m} levels occur only at this site ({total} rows) and never at the other sites: {shown}")
        out.append(_Cand(-1, s, "exclusive_level", p_min, True, detail, ev, "medium",
                         "map the level to the common coding used elsewhere, or confirm it is a local category",
                         payload=tuple(r["level"] for r in rows)))
    return out


def detect_censoring(vals: Sequence[np.ndarray], flags: Sequence[np.ndarray], *, min_count: int = 10,
                     min_share_gap: float = 0.02) -> List[_Cand]:
    """Censored cells (``<5``, ``>20``) written at one site more than at the others.

    ``vals[s]`` are the site's recorded values and ``flags[s]`` their censoring
    flags from intake (-1 below a limit, +1 above, 0 none); a censored cell holds
    its limit. For each site and side: the share of the site's values censored on
    that side against the other sites' share (Fisher's one-sided exact test). The
    effect must be at least ``min_share_gap`` and three times the others' share,
    with at least ``min_count`` censored cells. The evidence gives the limits (the
    most frequent first) with the share of the site's values at each, and the
    other sites' behaviour at the main limit: how many of their values lie beyond
    it as measured numbers and how many they censor there. False-positive rate per
    feature x site x side: at most the per-test level (exact conditional test).
    """
    out: List[_Cand] = []
    k = len(vals)
    for side, kind in ((-1, "censored_below"), (1, "censored_above")):
        cnt = np.array([int(np.sum(flags[t] == side)) for t in range(k)])
        tot = np.array([len(vals[t]) for t in range(k)])
        for s in range(k):
            if cnt[s] < min_count or tot[s] == 0:
                continue
            k_r, n_r = int(cnt.sum() - cnt[s]), int(tot.sum() - tot[s])
            if n_r == 0:
                continue
            sh_s, sh_r = cnt[s] / tot[s], k_r / n_r
            lim, lim_n = np.unique(vals[s][flags[s] == side], return_counts=True)
            order = np.lexsort((lim, -lim_n))
            limits = [{"limit": _r(lim[i]), "count": int(lim_n[i]), "share": _r(lim_n[i] / tot[s])} for i in order]
            L = float(lim[order[0]])
            rest_v = np.concatenate([vals[t] for t in range(k) if t != s])
            rest_f = np.concatenate([flags[t] for t in range(k) if t != s])
            measured = rest_f == 0
            beyond = int(np.sum(measured & ((rest_v < L) if side < 0 else (rest_v > L))))
            at_cens = int(np.sum((rest_f == side) & (np.abs(rest_v - L) <= 1e-9 * max(1.0, abs(L)))))
            p = _fisher_greater(int(cnt[s]), int(tot[s] - cnt[s]), k_r, n_r - k_r)
            effect = sh_s - sh_r >= min_share_gap and sh_s >= 3 * sh_r
            word, sign = ("below", "<") if side < 0 else ("above", ">")
            ev = {"limit": _r(L), "limits": limits, "p_value": _r(p),
                  "at_site": {"n": int(tot[s]), "count": int(cnt[s]), "share": _r(sh_s)},
                  "elsewhere": {"n": n_r, "count": k_r, "share": _r(sh_r),
                                f"share_measured_{word}": _r(beyond / n_r), "censored_at_limit": at_cens}}
            listed = ", ".join(sign + format(e["limit"], "g") for e in limits)
            more = f" (limits {listed})" if len(limits) > 1 else ""
            detail = (f"{sh_s:.1%} of values are written as {sign}{L:g}{more} at this site, against {sh_r:.1%} "
                      f"censored elsewhere, where {beyond / n_r:.1%} of values are measured {word} {L:g}")
            fix = (f"choose one policy for the censored cells (keep the limit, limit / sqrt(2), or missing) and "
                   f"consider censoring every site at {sign}{L:g}")
            out.append(_Cand(-1, s, kind, p, effect, detail, ev, "medium", fix, payload=L))
    return out


#: Number-format idioms (from intake) that make a site's export differ.
FORMAT_IDIOMS = ("decimal_comma", "unit_suffix", "thousands_separator")


def detect_number_format(idioms: Dict[str, Dict[str, int]], units: Dict[str, Dict[str, int]],
                         labels: Sequence[str], n_present: Sequence[int], *, min_count: int = 10,
                         min_share_gap: float = 0.02) -> List[_Cand]:
    """A site writes its numbers differently: decimal commas, a unit after the
    number, thousands separators.

    Intake reads such cells as numbers (:func:`sitecheck.reading.intake.parse_idioms`)
    and counts them per site; a pipeline that does not will see text or missing
    values at that site only. For each site: the share of its recorded values in
    each format against the other sites' (Fisher's one-sided exact test on the
    most frequent format; effect at least ``min_share_gap`` and three times the
    others' share, at least ``min_count`` cells). One finding per feature x site
    lists the formats. A site that writes another unit than the others is named
    in the evidence (``units``).
    """
    out: List[_Cand] = []
    k = len(labels)
    n_present = np.asarray(n_present, dtype=np.int64)
    for s in range(k):
        own = idioms.get(labels[s], {})
        if n_present[s] == 0:
            continue
        formats, best = [], None
        for key in FORMAT_IDIOMS:
            c = int(own.get(key, 0))
            if c < min_count:
                continue
            c_r = int(sum(idioms.get(labels[t], {}).get(key, 0) for t in range(k) if t != s))
            n_r = int(n_present.sum() - n_present[s])
            if n_r == 0:
                continue
            sh_s, sh_r = c / n_present[s], c_r / n_r
            if not (sh_s - sh_r >= min_share_gap and sh_s >= 3 * sh_r):
                continue
            p = _fisher_greater(c, int(n_present[s] - c), c_r, n_r - c_r)
            formats.append({"format": key, "count": c, "share": _r(sh_s), "count_elsewhere": c_r,
                            "share_elsewhere": _r(sh_r), "p_value": _r(p)})
            if best is None or p < best:
                best = p
        if not formats:
            continue
        own_units = dict(units.get(labels[s], {}))
        other_units: Dict[str, int] = {}
        for t in range(k):
            if t != s:
                for u, c in units.get(labels[t], {}).items():
                    other_units[u] = other_units.get(u, 0) + int(c)
        m = len(formats)
        ev = {"formats": formats, "p_value": _r(min(1.0, best * m)),
              "at_site": {"n": int(n_present[s]), "count": int(max(f["count"] for f in formats))},
              "units": own_units, "units_elsewhere": other_units}
        words = {"decimal_comma": "decimal commas", "unit_suffix": "a unit after the number",
                 "thousands_separator": "thousands separators"}
        said = "; ".join(f"{words[f['format']]} in {f['share']:.0%} of cells ({f['share_elsewhere']:.0%} elsewhere)"
                         for f in formats)
        if own_units:
            said += "; units written: " + ", ".join(f"{u} ({c})" for u, c in sorted(own_units.items()))
        detail = f"this site writes {said}"
        out.append(_Cand(-1, s, "number_format", min(1.0, best * m), True, detail, ev, "low",
                         "rewrite this site's cells as plain numbers with a decimal point (the repair plan's "
                         "number_format entry); intake has already read them as numbers",
                         payload=tuple(f["format"] for f in formats)))
    return out


# ---------------------------------------------------------------------------
# unit columns: a text column whose levels are units, linked to the values
# ---------------------------------------------------------------------------

def _text_values(table, name: str) -> np.ndarray:
    """A categorical or binary column's cells as text (binary columns are stored as 0/1)."""
    x = table.frame[name]
    if name in table.binary_levels:
        lv0, lv1 = table.binary_levels[name]
        v = x.to_numpy(dtype=float)
        out = np.where(v == 1.0, lv1, lv0).astype(object)
        out[np.isnan(v)] = None
        return out
    return x.to_numpy(dtype=object)


def link_unit_columns(table, *, min_count: int = 10) -> Dict[str, Dict[str, Any]]:
    """Find the text columns whose levels are units and the numeric column each qualifies.

    A feature is a unit column when every level reads as a unit
    (:func:`sitecheck.table.units.canonical_unit`: ``mg/dL``, ``umol/L``, ``µmol/l``,
    ``g/L`` ...). It is linked to a numeric feature by name (``creat_unit`` ->
    ``creatinine``; :func:`sitecheck.table.units.unit_column_base`) or, failing that, by
    the values: the ratio of the numeric feature's medians between two unit levels
    (at least ``min_count`` rows each) within 10% of the conversion factor between
    those units (:func:`sitecheck.table.units.unit_factor`: the SI table for the named
    analyte, else metric prefixes), with a factor of at least 1.8 either way so that
    a ratio near 1 links nothing.

    Returns
    -------
    dict
        Unit column -> ``{"column", "linked_by", "levels", "ratio", "factor",
        "factor_source", "from_unit", "to_unit"}`` (``column`` None when the levels
        are units but no numeric feature matched).
    """
    from sitecheck.table.units import canonical_unit, names_refer_to_same, unit_column_base, unit_factor

    out: Dict[str, Dict[str, Any]] = {}
    numeric = [f for f in table.features if table.kind(f) == "numeric"]
    for col in table.columns:
        if col.role != "feature" or col.kind not in ("categorical", "binary"):
            continue
        if col.kind == "binary" and col.name not in table.binary_levels:
            continue
        if col.levels and len(col.levels) > 30:
            continue
        raw = pd.Series(_text_values(table, col.name), dtype=object)
        present = raw.notna().to_numpy()
        if not present.any():
            continue
        levels = pd.unique(raw[present])
        if len(levels) > 30:
            continue
        canon = {lv: canonical_unit(lv) for lv in levels}
        if any(c is None for c in canon.values()) or len(set(canon.values())) < 2:
            continue
        units = raw.map(canon).where(raw.notna(), None).to_numpy(dtype=object)
        counts = pd.Series(units[present]).value_counts()
        ref_unit = str(counts.index[0])
        base = unit_column_base(col.name)
        by_name = [f for f in numeric if base is not None and names_refer_to_same(base, f)]
        best = None
        for f in (by_name or numeric):
            x = table.frame[f].to_numpy(dtype=float)
            ref_rows = (units == ref_unit) & ~np.isnan(x)
            if ref_rows.sum() < min_count:
                continue
            m_ref = float(np.median(x[ref_rows]))
            if m_ref <= 0:
                continue
            for u in counts.index[1:]:
                rows = (units == u) & ~np.isnan(x)
                if rows.sum() < min_count:
                    continue
                fac = unit_factor(ref_unit, str(u), f)
                if fac is None:
                    continue
                ratio = float(np.median(x[rows])) / m_ref
                if ratio <= 0 or abs(math.log(fac[0])) < math.log(1.8):
                    continue
                err = abs(math.log(ratio / fac[0]))
                if err <= math.log(1.10) and (best is None or (f not in by_name, err) < (best[0] not in by_name, best[1])):
                    best = (f, err, ratio, fac, str(u))
        if best is not None:
            f, err, ratio, fac, u = best
            linked_by = "name and values" if f in by_name else "values"
            out[col.name] = {"column": f, "linked_by": linked_by, "levels": {str(k): int(v) for k, v in counts.items()},
                             "ratio": _r(ratio), "factor": _r(fac[0]), "factor_source": fac[1],
                             "from_unit": ref_unit, "to_unit": u}
        else:
            out[col.name] = {"column": by_name[0] if len(by_name) == 1 else None,
                             "linked_by": "name" if len(by_name) == 1 else None,
                             "levels": {str(k): int(v) for k, v in counts.items()}, "ratio": None, "factor": None,
                             "factor_source": None, "from_unit": ref_unit, "to_unit": None}
    return out


def detect_unit_label(units: np.ndarray, site_code: np.ndarray, k: int, link: Dict[str, Any], *,
                      min_count: int = 10, min_share_gap: float = 0.02) -> List[_Cand]:
    """A site writes another unit in a unit column than the other sites.

    ``units`` holds the canonical unit of each row (None when missing). At site
    ``s`` with main unit ``u`` that is not the others' main unit: the share of the
    site's rows in ``u`` against the others' share (Fisher's one-sided exact test;
    effect at least ``min_share_gap`` and three times the others' share, at least
    ``min_count`` rows). False-positive rate: at most the per-test level.
    """
    out: List[_Cand] = []
    ok = pd.notna(units)
    for s in range(k):
        at = ok & (site_code == s)
        rest = ok & (site_code != s)
        if at.sum() < min_count or rest.sum() == 0:
            continue
        own = pd.Series(units[at]).value_counts()
        oth = pd.Series(units[rest]).value_counts()
        u, u_ref = str(own.index[0]), str(oth.index[0])
        if u == u_ref:
            continue
        c_s, n_s = int(own.iloc[0]), int(at.sum())
        c_r, n_r = int(oth.get(u, 0)), int(rest.sum())
        sh_s, sh_r = c_s / n_s, c_r / n_r
        p = _fisher_greater(c_s, n_s - c_s, c_r, n_r - c_r)
        effect = c_s >= min_count and sh_s - sh_r >= min_share_gap and sh_s >= 3 * sh_r
        col = link.get("column")
        ev = {"unit": u, "reference_unit": u_ref, "linked_column": col, "linked_by": link.get("linked_by"),
              "ratio": link.get("ratio"), "factor": link.get("factor"), "factor_source": link.get("factor_source"),
              "levels_at_site": {str(a): int(b) for a, b in own.items()},
              "levels_elsewhere": {str(a): int(b) for a, b in oth.items()}, "p_value": _r(p),
              "at_site": {"n": n_s, "count": c_s, "share": _r(sh_s)},
              "elsewhere": {"n": n_r, "count": c_r, "share": _r(sh_r)}}
        if col is not None:
            how = {"name": "by name", "values": "by its values", "name and values": "by name and values"}[link["linked_by"]]
            ratio = (f"; the values' ratio {link['ratio']:.4g} between {link['to_unit']} and {link['from_unit']} "
                     f"matches the factor {link['factor']:.4g}" if link.get("ratio") is not None else "")
            what = f"this column gives the unit of {col!r} (linked {how}{ratio}): "
        else:
            what = "this column's levels are units, linked to no numeric column: "
        detail = f"{what}this site writes {u} in {sh_s:.0%} of rows, the other sites {u_ref} ({sh_r:.0%} {u})"
        fix = (f"convert {col!r} at this site from {u} to {u_ref} and write {u_ref} in this column"
               if col is not None else f"check which column this unit qualifies; the site writes {u}")
        out.append(_Cand(-1, s, "unit_label", p, effect, detail, ev, "high", fix, payload=(u, u_ref, col)))
    return out


# ---------------------------------------------------------------------------
# the public entry point
# ---------------------------------------------------------------------------

_EXPLAIN = {
    "unit_ratio": "The site's values are the others' times a unit-conversion factor: it records another unit.",
    "precision": "The site records values on a different grid (rounding habit or instrument resolution).",
    "heaping": "Some terminal digits are preferred at this site, typical of values read and typed by hand.",
    "floor": "Values pile at the site's minimum: likely a detection or reporting limit written as a number.",
    "ceiling": "Values pile at the site's maximum: likely an upper reporting limit written as a number.",
    "missing_code": "A sentinel number stands for 'missing' at this site and would be read as a real value.",
    "site_missing": "The site never recorded this feature, so missingness alone identifies the site.",
    "exclusive_level": "A category is used only at this site, so the level alone identifies it.",
    "shift": "Values are offset at this site beyond what the covariates explain (analyser, method or case mix).",
    "scale": "Values are more or less spread at this site beyond what the covariates explain.",
    "censored_below": "The site writes values below a detection limit as '<limit' more often than the others: "
                      "the censored cells sit at the limit, which marks the site.",
    "censored_above": "The site writes values above a reporting limit as '>limit' more often than the others.",
    "number_format": "The site's export writes numbers differently (decimal comma, unit, separators); read as "
                     "text, the column would mark the site.",
    "unit_label": "A column that names the unit of a measurement says another unit at this site.",
}


def _cross_reference_units(findings, unit_links, table):
    """Name the unit column on the numeric column's ``unit_ratio`` finding (and the
    units written in the cells, from intake), so that each finding says so."""
    from dataclasses import replace

    by_value = {link["column"]: name for name, link in unit_links.items() if link.get("column")}
    out = []
    for t in findings:
        f = t[3]
        if f.kind == "unit_ratio":
            ev = dict(f.evidence)
            detail = f.detail
            if f.feature in by_value:
                ev["unit_column"] = by_value[f.feature]
                detail += f"; the unit column {by_value[f.feature]!r} gives this column's unit"
            units = table.column(f.feature).units if hasattr(table, "column") else {}
            if units:
                ev["units_written"] = {s: dict(u) for s, u in units.items()}
            f = replace(f, evidence=ev, detail=detail)
        out.append((t[0], t[1], t[2], f))
    return out


def _table_of(data):
    from sitecheck.table.prepare import Prepared
    from sitecheck.table.roles import Table

    if isinstance(data, Prepared):
        return data.table
    if isinstance(data, Table):
        return data
    raise ParameterError("find_fingerprints expects a sitecheck Table or Prepared")


def find_fingerprints(data, *, covariates: Optional[Sequence[str]] = None, alpha: float = 0.01,
                      min_count: int = 10, min_smd: float = 0.2, min_sd_ratio: float = 1.25,
                      min_tvd: float = 0.1) -> FingerprintResult:
    """Detect why features mark sites: units, grids, limits, codes, gaps.

    Parameters
    ----------
    data : Table or Prepared
        The validated table; every row is used (not the modelling subsample).
    covariates : sequence of str, optional
        Columns to adjust ``shift``/``scale`` for; default the table's
        covariates. An empty sequence means no adjustment.
    alpha : float, default 0.01
        Family-wise error per kind (Bonferroni over features x sites).
    min_count : int, default 10
        Fewest values at a site (or at a code or limit) for a test.
    min_smd : float, default 0.2
        Smallest |standardised mean difference| reported as ``shift``.
    min_sd_ratio : float, default 1.25
        Smallest SD ratio (or its inverse) reported as ``scale``.
    min_tvd : float, default 0.1
        Smallest total-variation distance of terminal digits for ``heaping``.

    Returns
    -------
    FingerprintResult

    Notes
    -----
    Deterministic: no random numbers are drawn, so the same table gives the
    same result.
    """
    table = _table_of(data)
    if not (isinstance(alpha, (int, float)) and 0 < alpha < 1):
        raise ParameterError(f"alpha must be in (0, 1), got {alpha!r}")
    if not isinstance(min_count, (int, np.integer)) or min_count < 2:
        raise ParameterError(f"min_count must be an integer of at least 2, got {min_count!r}")
    for nm, val in (("min_smd", min_smd), ("min_tvd", min_tvd)):
        if not (isinstance(val, (int, float)) and val >= 0):
            raise ParameterError(f"{nm} must be a non-negative number, got {val!r}")
    if not (isinstance(min_sd_ratio, (int, float)) and min_sd_ratio >= 1):
        raise ParameterError(f"min_sd_ratio must be at least 1, got {min_sd_ratio!r}")
    frame = table.frame
    covs = list(table.covariates if covariates is None else covariates)
    for c in covs:
        if c not in frame.columns:
            raise InputError(f"covariate column {c!r} not found in the table")
        if c == table.site:
            raise InputError(f"covariate column {c!r} is the site column")
    labels = tuple(table.site_labels)
    k = len(labels)
    code_of = {lab: i for i, lab in enumerate(labels)}
    site_code = np.array([code_of[v] for v in frame[table.site].to_numpy(dtype=object)], dtype=np.int64)
    features = [f for f in table.features if f not in covs]
    kinds = {f: table.kind(f) for f in features}
    cov_kinds = []
    for c in covs:
        try:
            cov_kinds.append(table.kind(c))
        except KeyError:
            cov_kinds.append("numeric" if pd.api.types.is_numeric_dtype(frame[c]) else "categorical")
    Z = _design(frame, covs, cov_kinds)
    site_rows = [np.flatnonzero(site_code == s) for s in range(k)]
    gram = _full_gram(site_code, Z, k)

    cands: List[_Cand] = []
    skipped: Dict[str, str] = {}
    n_tests = {kd: 0 for kd in KINDS}
    numeric = [f for f in features if kinds[f] == "numeric"]
    categorical = [f for f in features if kinds[f] == "categorical"]
    n_tests["site_missing"] = len(features) * k
    unit_links = link_unit_columns(table, min_count=min_count)
    n_tests["exclusive_level"] = len([f for f in categorical if f not in unit_links]) * k
    n_tests["unit_label"] = len(unit_links) * k
    for kd in ("unit_ratio", "precision", "heaping", "missing_code", "shift", "scale", "floor", "ceiling",
               "censored_below", "censored_above", "number_format"):
        n_tests[kd] = len(numeric) * k

    for j, f in enumerate(features):
        col = frame[f]
        present = col.notna().to_numpy()
        for c in detect_site_missing(present, site_code, k):
            c.j = j
            cands.append(c)
        if f in unit_links:
            from sitecheck.table.units import canonical_unit

            texts = pd.Series(_text_values(table, f), dtype=object)
            canon = {lv: canonical_unit(lv) for lv in pd.unique(texts.dropna())}
            units = texts.map(canon).where(texts.notna(), None).to_numpy(dtype=object)
            for c in detect_unit_label(units, site_code, k, unit_links[f], min_count=min_count):
                c.j = j
                cands.append(c)
            continue
        if kinds[f] == "categorical":
            for c in detect_exclusive_levels(col.to_numpy(dtype=object), site_code, k):
                c.j = j
                cands.append(c)
            continue
        if kinds[f] != "numeric":
            continue
        x = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)
        vals = []
        for s in range(k):
            v = x[site_rows[s]]
            vals.append(np.sort(v[~np.isnan(v)]))
        seen = [labels[s] for s in range(k) if len(vals[s])]
        if len(seen) < 2:  # nothing to compare a site with; site_missing (above) says where it is missing
            skipped[f] = ("recorded at no site" if not seen else f"recorded at one site only ({seen[0]})") + \
                "; the value detectors compare a site with the others"
            continue
        column = table.column(f)
        if column.idioms:
            for c in detect_number_format(column.idioms, column.units, labels, [len(v) for v in vals],
                                          min_count=min_count):
                c.j = j
                cands.append(c)
        cens = table.censored(f) if hasattr(table, "censored") else None
        cens_found: Dict[int, set] = {}
        if cens is not None:
            xs = [x[site_rows[s]] for s in range(k)]
            fl = [cens[site_rows[s]][~np.isnan(xs[s])] for s in range(k)]
            xv = [xs[s][~np.isnan(xs[s])] for s in range(k)]
            for c in detect_censoring(xv, fl, min_count=min_count):
                c.j = j
                cands.append(c)
                if c.p < alpha / max(n_tests[c.kind], 1) and c.passes_effect:
                    cens_found.setdefault(c.s, set()).add(-1 if c.kind == "censored_below" else 1)
            for s, sides in cens_found.items():
                # censored cells are limits, not recorded values: out of the later detectors
                vals[s] = np.sort(xv[s][~np.isin(fl[s], list(sides))])
        per_test = alpha / max(n_tests["missing_code"], 1)
        found: Dict[int, set] = {s: set() for s in range(k)}
        for s in cens_found:
            found[s].add("censored")

        mc = detect_missing_codes(vals, min_count=min_count)
        for c in mc:
            c.j = j
            cands.append(c)
            if c.p < per_test and c.passes_effect:
                found[c.s].add("missing_code")
                vals[c.s] = vals[c.s][~np.isin(vals[c.s], c.payload)]
        ur = detect_unit_ratio(vals, f, min_count=min_count)
        for c in ur:
            c.j = j
            cands.append(c)
            if c.p < alpha / max(n_tests["unit_ratio"], 1):
                found[c.s].add("unit_ratio")
        active = [s for s in range(k) if "unit_ratio" not in found[s] and len(vals[s]) > 0]
        for c in detect_limits(vals, active, min_count=min_count):
            c.j = j
            cands.append(c)
            if c.p < alpha / max(n_tests[c.kind], 1) and c.passes_effect:
                found[c.s].add(c.kind)
                # values at a reporting limit are not recorded values: leave them out of grid checks
                vals[c.s] = vals[c.s][np.abs(vals[c.s] - c.payload) > 1e-9 * max(1.0, abs(c.payload))]
        prec, steps = detect_precision(vals, active, min_count=min_count)
        for c in prec:
            c.j = j
            cands.append(c)
            if c.p < alpha / max(n_tests["precision"], 1) and c.passes_effect:
                found[c.s].add("precision")
        for c in detect_heaping(vals, [s for s in active if "precision" not in found[s]], steps,
                                min_count=max(min_count, 50), min_tvd=min_tvd):
            c.j = j
            cands.append(c)
        # shift / scale on covariate-adjusted values, without the sites whose
        # values are not comparable (a unit change or a reporting limit explains them)
        y = x.copy()
        y[~present] = np.nan
        for s in range(k):
            if found[s] & {"unit_ratio"}:
                y[site_code == s] = np.nan
            elif "missing_code" in found[s]:
                codes = [v for c in mc if c.s == s and c.p < per_test and c.passes_effect for v in c.payload]
                y[(site_code == s) & np.isin(x, codes)] = np.nan
        y_adj, _ = adjust_for_covariates(y, site_code, Z, k, _gram=gram)
        adj_vals = []
        for s in range(k):
            v = y_adj[site_rows[s]]
            adj_vals.append(v[~np.isnan(v)])
        act2 = [s for s in active if len(adj_vals[s]) > 0 and not found[s] & {"floor", "ceiling", "censored"}]
        for c in detect_shift_scale(adj_vals, act2, min_count=min_count, min_smd=min_smd,
                                    min_sd_ratio=min_sd_ratio):
            c.j = j
            c.evidence["covariates"] = list(covs)
            cands.append(c)

    # -- multiplicity and assembly ------------------------------------------
    tests = {}
    for kd in KINDS:
        m = max(n_tests[kd], 1)
        tests[kd] = {"n_tests": int(n_tests[kd]), "alpha": float(alpha), "per_test_alpha": _r(alpha / m),
                     "correction": "bonferroni over features x sites"}
    findings: List[Tuple[int, int, int, Fingerprint]] = []
    for c in cands:
        m = max(n_tests[c.kind], 1)
        if not c.passes_effect or not (c.p * m < alpha):
            continue
        ev = dict(c.evidence)
        ev["p_adj"] = _r(min(1.0, c.p * m))
        findings.append((c.j, c.s, KINDS.index(c.kind), Fingerprint(
            feature=features[c.j], site=labels[c.s], kind=c.kind, detail=c.detail, evidence=ev,
            severity=c.severity, explanation=_EXPLAIN[c.kind], suggested_fix=c.fix)))
    # a precision finding at a site that is explained by a unit change is dropped above
    # (unit sites leave 'active'); keep a stable order
    findings.sort(key=lambda t: (t[0], t[1], t[2], str(t[3].evidence.get("value", ""))))
    findings = _cross_reference_units(findings, unit_links, table)
    return FingerprintResult(
        findings=tuple(t[3] for t in findings), tests=tests, n_rows=int(len(frame)),
        features=tuple(features), covariates=tuple(covs), unit_columns=unit_links,
        params={"alpha": float(alpha), "min_count": int(min_count), "min_smd": float(min_smd),
                "min_sd_ratio": float(min_sd_ratio), "min_tvd": float(min_tvd)}, skipped=skipped)
