"""The repair plan: mechanical fixes for the measurement artefacts a scan found.

A repair is data, not code. :func:`plan_repairs` turns the fingerprints of a
table into a :class:`RepairPlan`: one entry per finding that has a mechanical
fix, each naming its finding, column, site, operation and parameters, with the
evidence, the rows and cells it touches, whether it is safe to apply by default
(``safe``) and an ``enabled`` flag a person can edit in the JSON file. Findings
without a mechanical fix (an analyser offset, a rounding habit, a floor written
as a number) are listed under ``not_repaired`` with the reason.

Operations
----------
``convert_unit``
    Multiply the site's values by the factor of the SI conversion table
    (:mod:`sitecheck.table.units`) or apply the Fahrenheit -> Celsius formula, rounded
    to the other sites' recording step; a linked unit column gets the others' label.
``recode_missing``
    The site's sentinel codes (``-99``, ``999`` ...) become missing.
``number_format``
    Cells written with a decimal comma, a unit after the number or thousands
    separators are written as plain numbers (the values do not change).
``censored_policy``
    Censored cells (``<5``) get a value by policy: ``limit`` (5), ``limit_over_sqrt2``
    (5 / sqrt 2, Hornung & Reed 1990, for data that are not highly skewed),
    ``limit_over_2`` (their choice for a geometric standard deviation of 3 or more)
    or ``missing``.
``drop_column``
    A column a site never measured is left out (not safe by default: the other
    sites' values are lost with it).
``map_level``
    An exclusive level is mapped to the common coding when the mapping is evident
    (``Male`` -> ``M``, ``walk in`` -> ``walk-in``).
``remove_step``
    Scoped to a period (``period``: time column, ``from``, ``until``): a step in one
    site's level found by the drift analysis (:func:`plan_period_repairs`) is subtracted
    from that site's values dated in the period, putting the later period on the
    earlier one; the result is rounded to the site's recording step. Never safe by
    default: a step may be real (a new population, a new referral pathway).

Applying a plan never modifies the input; :func:`apply_repairs` returns a new
table with a per-site log of the cells changed. This is decision support for
data work, not a clinical device: review a plan under your local data-governance
rules before using the repaired values.

References
----------
Hornung RW, Reed LD. Estimation of average concentration in the presence of
nondetectable values. Appl Occup Environ Hyg 1990;5(1):46-51.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field, replace
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from sitecheck.errors import InputError

#: Version of the plan document. Minor versions add keys; a major version renames
#: or removes one. :func:`read_plan` refuses a major version it does not know.
PLAN_VERSION = "sitecheck.repair/1.1"
#: 1.1 added entries scoped to a period (``period``; operation ``remove_step``, finding kind ``drift_level``).
OPERATIONS = ("convert_unit", "recode_missing", "number_format", "censored_policy", "drop_column", "map_level",
              "remove_step")
#: finding kinds of plan entries that come from the drift analysis, not from the fingerprints
DRIFT_KINDS = ("drift_level",)
CENSOR_POLICIES = ("limit", "limit_over_sqrt2", "limit_over_2", "missing")
#: Hornung & Reed (1990): L / sqrt(2) when the geometric standard deviation is below 3, L / 2 above.
GSD_HIGHLY_SKEWED = 3.0
#: Order in which operations apply to a column (codes out before a unit conversion).
_ORDER = {op: i for i, op in enumerate(("recode_missing", "number_format", "censored_policy", "convert_unit",
                                        "remove_step", "map_level", "drop_column"))}
NOTE = ("Decision support for data work, not a clinical device. Review every entry under your local "
        "data-governance rules; set \"enabled\" to false to skip one.")


def censored_value(limit, policy: str):
    """The value given to a censored cell with limit ``limit`` under ``policy``.

    ``limit_over_sqrt2`` is the substitution of Hornung & Reed (1990) for values
    below a detection limit when the data are not highly skewed (geometric
    standard deviation below 3): L / sqrt(2), the median of a right-triangular
    density on (0, L); ``limit_over_2`` their choice for highly skewed data.

    Examples
    --------
    >>> round(float(censored_value(5.0, "limit_over_sqrt2")), 4)
    3.5355
    """
    lim = np.asarray(limit, dtype=float)
    if policy == "limit":
        return lim
    if policy == "limit_over_sqrt2":
        return lim / math.sqrt(2.0)
    if policy == "limit_over_2":
        return lim / 2.0
    if policy == "missing":
        return np.full_like(lim, np.nan)
    raise InputError(f"unknown censoring policy {policy!r}; choose from {', '.join(CENSOR_POLICIES)}")


@dataclass(frozen=True)
class RepairEntry:
    """One mechanical fix. ``params`` depend on ``operation`` (see the module notes)."""

    id: str
    kind: str
    column: str
    site: Optional[str]
    operation: str
    params: Dict[str, Any]
    evidence: Dict[str, Any]
    rows: int
    cells: int
    safe: bool
    enabled: bool
    reason: str
    #: the finding's feature where it differs from ``column`` (a unit column whose values column is converted)
    feature: Optional[str] = None
    #: the rows' period, for an entry scoped to one: {"time_column", "from", "until"} (ISO dates; "until"
    #: exclusive, None for open-ended); None applies to every row of the site
    period: Optional[Dict[str, Any]] = None

    @property
    def finding_feature(self) -> str:
        return self.feature if self.feature is not None else self.column

    def to_dict(self) -> dict:
        from sitecheck.report.result import to_jsonable

        return to_jsonable({"id": self.id, "finding": {"kind": self.kind, "feature": self.finding_feature,
                                                       "site": self.site},
                            "column": self.column, "site": self.site, "operation": self.operation,
                            **({"period": dict(self.period)} if self.period is not None else {}),
                            "params": self.params, "evidence": self.evidence, "rows": int(self.rows),
                            "cells": int(self.cells), "safe": bool(self.safe), "enabled": bool(self.enabled),
                            "reason": self.reason})


@dataclass(frozen=True)
class RepairPlan:
    """A versioned list of repair entries for one table."""

    entries: Tuple[RepairEntry, ...]
    site_column: str
    input: Dict[str, Any]
    not_repaired: Tuple[Dict[str, Any], ...] = ()
    version: str = PLAN_VERSION

    def enabled(self) -> List[RepairEntry]:
        return [e for e in self.entries if e.enabled]

    def safe(self) -> List[RepairEntry]:
        return [e for e in self.entries if e.safe]

    def to_dict(self) -> dict:
        from sitecheck import __version__
        from sitecheck.report.result import to_jsonable

        return to_jsonable({"plan_version": self.version, "generated_by": f"sitecheck {__version__}",
                            "note": NOTE, "input": self.input, "site_column": self.site_column,
                            "censor_policies": list(CENSOR_POLICIES), "operations": list(OPERATIONS),
                            "entries": [e.to_dict() for e in self.entries],
                            "not_repaired": list(self.not_repaired)})


# ---------------------------------------------------------------------------
# building a plan from the findings
# ---------------------------------------------------------------------------

def _norm_level(text: str) -> str:
    return re.sub(r"[^0-9a-z]+", "", str(text).lower())


_SYNONYMS = {"male": "m", "female": "f", "man": "m", "woman": "f", "yes": "y", "no": "n", "true": "t", "false": "f"}


def evident_mapping(level: str, common: Sequence[str]) -> Optional[str]:
    """The common level an exclusive ``level`` evidently stands for, or None.

    Evident means: equal after dropping case, spaces and punctuation
    (``Walk in`` -> ``walk-in``), or a word of the short list of conventional
    one-letter codes (male/female, yes/no, true/false; common practice) whose
    letter is exactly one common level (``Male`` -> ``M``), or the reverse
    (``f`` -> ``Female``). Anything else (``Mixed`` against ``M``) is left to a person.

    >>> evident_mapping("Male", ["M", "F"]), evident_mapping("walk in", ["walk-in", "ambulance"])
    ('M', 'walk-in')
    >>> evident_mapping("Other", ["M", "F"]) is None
    True
    """
    n = _norm_level(level)
    if not n:
        return None
    same = [c for c in common if _norm_level(c) == n]
    if len(same) == 1:
        return same[0]
    short = _SYNONYMS.get(n)
    if short is not None:
        hits = [c for c in common if _norm_level(c) == short]
        if len(hits) == 1:
            return hits[0]
    if len(n) == 1:
        hits = [c for c in common if _SYNONYMS.get(_norm_level(c)) == n]
        if len(hits) == 1:
            return hits[0]
    return None


def _grid_step(values: np.ndarray) -> Optional[float]:
    from sitecheck.analyses.fingerprints import grid_step

    v = values[~np.isnan(values)]
    return grid_step(v) if len(v) >= 2 else None


def _round_to(x: np.ndarray, step: Optional[float]) -> np.ndarray:
    if step is None:
        return np.round(x, 6)
    digits = max(0, -int(math.floor(math.log10(step)))) + 2
    return np.round(np.round(x / step) * step, digits)


def _round_half_even(x: np.ndarray, step: Optional[float]) -> np.ndarray:
    """``x`` on the grid of ``step`` (None: unchanged), halves to the even multiple (IEEE 754's default
    rounding, unbiased over many values); ``x / step`` is first cut to 6 decimals so that floating-point
    noise (4.15 / 0.1 = 41.4999...) does not decide a half."""
    if step is None or not step > 0:
        return x
    digits = max(0, -int(math.floor(math.log10(step)))) + 2
    return np.round(np.round(np.round(x / step, 6)) * step, digits)


def _site_mask(table, site: str) -> np.ndarray:
    return table.frame[table.site].to_numpy(dtype=object) == site


def plan_repairs(table, fingerprints, *, censor_policy: Optional[str] = None) -> RepairPlan:
    """Build the repair plan of a table from its fingerprints.

    Parameters
    ----------
    table : sitecheck.table.roles.Table
        The validated table the fingerprints were computed on (values as given).
    fingerprints : sitecheck.analyses.fingerprints.FingerprintResult
    censor_policy : str, optional
        Policy of every ``censored_policy`` entry (one of :data:`CENSOR_POLICIES`).
        Default: below a limit ``limit_over_sqrt2``, or ``limit_over_2`` when the
        site's measured values have a geometric standard deviation of 3 or more
        (Hornung & Reed 1990); above a limit ``limit``.

    Returns
    -------
    RepairPlan
        Entries in the order of the findings; ``enabled`` equals ``safe``.

    Examples
    --------
    >>> from sitecheck.demo import generate_demo, DEMO_ROLES
    >>> from sitecheck.reading.intake import frame_to_raw
    >>> from sitecheck.table.roles import RoleSpec, assign_roles
    >>> from sitecheck.analyses.fingerprints import find_fingerprints
    >>> d = generate_demo(1200, seed=7)
    >>> t = assign_roles(frame_to_raw(d.frame, site="hospital"), RoleSpec(site="hospital", covariates=("age", "sex"),
    ...                  identifiers=("attendance_id",), outcome="admitted_hdu"))
    >>> plan = plan_repairs(t, find_fingerprints(t))
    >>> sorted({(e.column, e.operation) for e in plan.entries})[:2]
    [('albumin', 'drop_column'), ('glucose', 'convert_unit')]
    """
    from sitecheck.table.units import CONVERSIONS, TEMPERATURE

    if censor_policy is not None and censor_policy not in CENSOR_POLICIES:
        raise InputError(f"censor policy {censor_policy!r} is not known; choose from {', '.join(CENSOR_POLICIES)}")
    frame = table.frame
    site_vals = frame[table.site].to_numpy(dtype=object)
    entries: List[RepairEntry] = []
    skipped: List[Dict[str, Any]] = []
    links = {v["column"]: (k, v) for k, v in getattr(fingerprints, "unit_columns", {}).items() if v.get("column")}
    converted = set()

    def add(f, operation, params, cells, safe, reason, column=None, evidence=None):
        at = site_vals == f.site if f.site is not None else np.ones(len(frame), dtype=bool)
        entries.append(RepairEntry(id="", kind=f.kind, column=column or f.feature, site=f.site, operation=operation,
                                   params=params, evidence=dict(evidence if evidence is not None else f.evidence),
                                   rows=int(at.sum()), cells=int(cells), safe=bool(safe), enabled=bool(safe),
                                   reason=reason, feature=f.feature if (column or f.feature) != f.feature else None))

    for f in fingerprints.findings:
        col = f.feature
        at = site_vals == f.site if f.site is not None else np.zeros(len(frame), dtype=bool)
        if f.kind == "unit_ratio":
            x = frame[col].to_numpy(dtype=float)
            ev = f.evidence
            conv = ev.get("conversion", {})
            ref = x[~at & ~np.isnan(x)]
            step = _grid_step(ref)
            params: Dict[str, Any] = {"round_to": step}
            if "offset" in conv:  # temperature
                forward = ev.get("median_site", 0) > ev.get("median_reference", 0)
                params.update({"formula": "C = (F - 32) x 5/9" if forward else "F = C x 9/5 + 32",
                               "factor": TEMPERATURE.factor if forward else 1 / TEMPERATURE.factor,
                               "offset_before": TEMPERATURE.offset if forward else 0.0,
                               "offset_after": 0.0 if forward else -TEMPERATURE.offset,
                               "from_unit": "degF" if forward else "degC", "to_unit": "degC" if forward else "degF",
                               "source": TEMPERATURE.source})
            else:
                target = float(ev["factor"])
                site_unit, ref_unit = _units_of(f.detail)
                params.update({"factor": 1.0 / target, "offset_before": 0.0, "offset_after": 0.0,
                               "from_unit": site_unit, "to_unit": ref_unit,
                               "source": conv.get("source", "decimal prefix")})
            link = links.get(col)
            if link is not None:
                params.update(_label_params(table, link[0], f.site, at))
            codes = _codes_at(fingerprints, col, f.site)
            cells = int(np.sum(at & ~np.isnan(x) & ~np.isin(x, codes)))
            safe = bool(ev.get("name_match")) or link is not None
            add(f, "convert_unit", params, cells, safe,
                f"values are {ev.get('ratio', 0):.4g} times the other sites'; convert from {params['from_unit']} to "
                f"{params['to_unit']}" + ("" if safe else " (matched by the ratio alone: check before enabling)"))
            converted.add((col, f.site))
        elif f.kind == "unit_label":
            u, u_ref, linked = f.evidence.get("unit"), f.evidence.get("reference_unit"), f.evidence.get("linked_column")
            if linked is None or (linked, f.site) in converted or any(
                    g.kind == "unit_ratio" and g.feature == linked and g.site == f.site for g in fingerprints.findings):
                if linked is None:
                    skipped.append({"kind": f.kind, "feature": col, "site": f.site,
                                    "reason": "the unit column is linked to no numeric column"})
                continue
            from sitecheck.table.units import unit_factor

            fac = unit_factor(u, u_ref, linked)
            if fac is None:
                skipped.append({"kind": f.kind, "feature": col, "site": f.site,
                                "reason": f"no conversion factor from {u} to {u_ref} for {linked!r}"})
                continue
            x = frame[linked].to_numpy(dtype=float)
            params = {"factor": fac[0], "offset_before": 0.0, "offset_after": 0.0, "from_unit": u, "to_unit": u_ref,
                      "source": fac[1], "round_to": _grid_step(x[~at & ~np.isnan(x)])}
            params.update(_label_params(table, col, f.site, at))
            rows = _label_rows(table, col, at, u)
            add(f, "convert_unit", params, int(np.sum(rows & ~np.isnan(x))), True,
                f"the unit column {col!r} says {u} at this site; convert {linked!r} to {u_ref}", column=linked)
            converted.add((linked, f.site))
        elif f.kind == "missing_code":
            codes = [float(c["value"]) for c in f.evidence.get("codes", [])] or [float(f.evidence["value"])]
            x = frame[col].to_numpy(dtype=float)
            add(f, "recode_missing", {"codes": codes}, int(np.sum(at & np.isin(x, codes))), True,
                f"{', '.join(f'{c:g}' for c in codes)} stand{'s' if len(codes) == 1 else ''} for missing at this site")
        elif f.kind in ("censored_below", "censored_above"):
            side = -1 if f.kind == "censored_below" else 1
            x = frame[col].to_numpy(dtype=float)
            flags = table.censored(col)
            cells = int(np.sum(at & (flags == side))) if flags is not None else 0
            # geometric SD on a log-probit reading of the site's values (censored cells rank below the
            # limit): Q(84.13%) / Q(50%) of a lognormal; only while less than half the cells are censored
            vals_s = x[at & ~np.isnan(x)]
            share_c = cells / max(len(vals_s), 1)
            gsd = None
            if side < 0 and len(vals_s) >= 20 and share_c < 0.5 and np.median(vals_s) > 0:
                gsd = float(np.quantile(vals_s, 0.8413447) / np.median(vals_s))
            if censor_policy is not None:
                policy = censor_policy
            elif side < 0:
                policy = "limit_over_2" if gsd is not None and gsd >= GSD_HIGHLY_SKEWED else "limit_over_sqrt2"
            else:
                policy = "limit"
            params = {"side": "below" if side < 0 else "above", "policy": policy,
                      "limits": [e["limit"] for e in f.evidence.get("limits", [])],
                      "geometric_sd": None if gsd is None else round(gsd, 4),
                      "choices": list(CENSOR_POLICIES),
                      "reference": "Hornung RW, Reed LD. Appl Occup Environ Hyg 1990;5(1):46-51"}
            add(f, "censored_policy", params, cells, True,
                f"censored cells get {policy.replace('_', ' ')} (edit 'policy': {', '.join(CENSOR_POLICIES)})")
        elif f.kind == "number_format":
            formats = [e["format"] for e in f.evidence.get("formats", [])]
            notes = table.cells.get(col)
            cells = 0
            if notes is not None:
                from sitecheck.reading.intake import IDIOM_BITS

                bits = sum(IDIOM_BITS[k] for k in formats) | IDIOM_BITS["whitespace"]
                cells = int(np.sum(at & ((notes.idiom & bits) != 0) & (notes.censor == 0)))
            add(f, "number_format", {"formats": formats, "write": "plain number with a decimal point"}, cells, True,
                "write this site's cells as plain numbers (intake already reads them as numbers)")
        elif f.kind == "site_missing":
            add(f, "drop_column", {}, int(frame[col].notna().sum()), False,
                f"never measured at {f.site}; dropping the column loses the other sites' values "
                "(not safe by default: enable it, or model the feature only where measured)")
        elif f.kind == "exclusive_level":
            levels = [r["level"] for r in f.evidence.get("levels", [])] or [f.evidence.get("level")]
            col_vals = frame[col].astype(object)
            common = sorted({str(v) for v in col_vals[~at].dropna().unique()})
            mapping = {lv: evident_mapping(lv, common) for lv in levels}
            mapping = {k: v for k, v in mapping.items() if v is not None}
            if not mapping:
                skipped.append({"kind": f.kind, "feature": col, "site": f.site,
                                "reason": "no evident mapping to the levels used elsewhere"})
                continue
            cells = int(np.sum(at & col_vals.isin(list(mapping)).to_numpy()))
            add(f, "map_level", {"mapping": mapping, "unmapped": [lv for lv in levels if lv not in mapping]}, cells,
                True, "map " + ", ".join(f"{k!r} -> {v!r}" for k, v in mapping.items()) + " (evident spelling)")
        else:
            skipped.append({"kind": f.kind, "feature": col, "site": f.site,
                            "reason": {"shift": "an offset is not a mechanical fix (analyser, method or case mix)",
                                       "scale": "a spread difference is not a mechanical fix",
                                       "precision": "a coarser recording grid cannot be undone",
                                       "heaping": "preferred digits cannot be undone",
                                       "floor": "values at a limit written as numbers cannot be told from "
                                                "measured values", "ceiling": "values at a limit written as "
                                                                               "numbers cannot be told from measured "
                                                                               "values"}.get(f.kind, "no mechanical fix")})
    entries = [replace(e, id=f"r{i + 1:03d}") for i, e in enumerate(entries)]
    raw = table.source
    inp = {"path": raw.path, "format": raw.format, "sha256": raw.sha256, "rows": int(len(raw.frame)),
           "columns": list(map(str, raw.frame.columns)), "sites": list(table.site_labels)}
    return RepairPlan(entries=tuple(entries), site_column=table.site, input=inp, not_repaired=tuple(skipped))


def _iso_day(value) -> np.datetime64:
    return np.datetime64(str(value)[:10], "ns")


def period_mask(times: np.ndarray, period: Dict[str, Any]) -> Tuple[np.ndarray, np.ndarray]:
    """(rows dated in ``period``, rows without a date) of a datetime64 array: ``from`` inclusive,
    ``until`` exclusive (either may be None)."""
    t = np.asarray(times, dtype="datetime64[ns]")
    undated = np.isnat(t)
    inside = ~undated
    if period.get("from"):
        inside &= t >= _iso_day(period["from"])
    if period.get("until"):
        inside &= t < _iso_day(period["until"])
    return inside, undated


def plan_period_repairs(table, drift, plan: RepairPlan) -> RepairPlan:
    """Add entries scoped to a period to ``plan``: one per step in one site's level found by the
    drift analysis.

    A drift finding (significant after adjustment, of practical size; see
    :func:`sitecheck.analyses.drift.drift_check`) becomes an entry when it is a change of
    level (aspect ``level``) of a numeric feature, at this site only (scope ``site``: a
    change shared with other sites or with the whole network is not one site's artefact),
    with a 95% interval of the step that excludes 0. The entry subtracts the step (the
    difference of 20% trimmed means after minus before, Yuen 1974) from the site's values
    dated from the change until the next change point of the same series (open-ended when
    there is none), putting the later period on the earlier one, rounded to the site's
    recording step so that the repair adds no recording signature of its own.

    It is never safe by default (``enabled`` false): a step may be real (a new population,
    a new referral pathway), and only the site can say. Other drift findings are listed
    under ``not_repaired`` with the reason.

    Parameters
    ----------
    table : sitecheck.table.roles.Table
        The validated table the drift analysis ran on (with its time column).
    drift : sitecheck.analyses.drift.DriftResult
    plan : RepairPlan
        The plan built from the fingerprints; its entries keep their ids.

    Returns
    -------
    RepairPlan
        ``plan`` with the period entries appended (ids continue the plan's numbering).

    References
    ----------
    Yuen, K. K. (1974). The two-sample trimmed t for unequal population variances.
    Biometrika 61(1), 165-170.
    """
    tcol = getattr(table, "time", None)
    if drift is None or tcol is None:
        return plan
    frame = table.frame
    site_vals = frame[table.site].to_numpy(dtype=object)
    times = frame[tcol].to_numpy(dtype="datetime64[ns]")
    entries = list(plan.entries)
    skipped = list(plan.not_repaired)
    n = len(entries)
    for c in drift.findings:
        doc = c.to_dict()
        kind = f"drift_{c.aspect}"
        lo, hi = doc["size_ci"] if len(doc["size_ci"]) == 2 else (None, None)
        reason = None
        if c.aspect != "level":
            reason = {"spread": "a change in spread over time is not a mechanical fix",
                      "missing": "a change in the missing share over time cannot be undone",
                      "artefact": "an artefact that appeared or vanished over time: repair the artefact itself"
                      }.get(c.aspect, "no mechanical fix")
        elif c.scope != "site":
            reason = "other sites changed at the same time: not one site's artefact"
        elif table.kind(c.feature) != "numeric":
            reason = "not a numeric feature"
        elif lo is None or hi is None or not (lo > 0 or hi < 0):
            reason = "the step's 95% interval includes 0"
        if reason is not None:
            skipped.append({"kind": kind, "feature": c.feature, "site": c.site, "period_from": c.date,
                            "reason": reason})
            continue
        later = [o.date for o in drift.change_points
                 if (o.site, o.feature, o.aspect, o.artefact) == (c.site, c.feature, c.aspect, c.artefact)
                 and o.date > c.date]
        period = {"time_column": tcol, "from": c.date, "until": min(later) if later else None}
        at = site_vals == c.site
        inside, undated = period_mask(times, period)
        x = frame[c.feature].to_numpy(dtype=float)
        rows = at & inside
        step = _grid_step(x[at & ~np.isnan(x)])
        size = doc["size"]
        params = {"subtract": size, "interval": [lo, hi], "round_to": step,
                  "estimate": "difference of 20% trimmed means, later period minus earlier (Yuen 1974), with "
                              "its 95% interval",
                  "choices": "edit 'subtract' (for instance to the value the site's laboratory reports) or "
                             "set 'round_to' to null to keep the exact difference"}
        evidence = {"change_date": c.date, "period": c.period, "size": size, "size_ci": [lo, hi],
                    "size_sd": doc["size_sd"], "p_value": doc["p_value"], "p_adj": doc["p_adj"], "scope": c.scope,
                    "before": doc["before"], "after": doc["after"], "detail": c.detail,
                    "site_rows_without_date": int(np.sum(at & undated))}
        until = f" until before {period['until']}" if period["until"] else ""
        n += 1
        entries.append(RepairEntry(
            id=f"r{n:03d}", kind="drift_level", column=c.feature, site=c.site, operation="remove_step",
            params=params, evidence=evidence, rows=int(rows.sum()), cells=int(np.sum(rows & ~np.isnan(x))),
            safe=False, enabled=False, period=period,
            reason=(f"{c.feature} at {c.site} from {c.date}{until}: subtract the step ({size:.3g}, 95% CI "
                    f"{lo:.3g} to {hi:.3g}) to put the later period on the earlier one (not safe by default: "
                    "a step may be real; ask the site what changed)")))
    if len(entries) == len(plan.entries) and len(skipped) == len(plan.not_repaired):
        return plan
    return replace(plan, entries=tuple(entries), not_repaired=tuple(skipped))


def _units_of(detail: str) -> Tuple[str, str]:
    m = re.search(r"this site likely records (.+?), the others (.+)$", detail)
    return (m.group(1), m.group(2)) if m else ("site unit", "reference unit")


def _codes_at(fingerprints, col: str, site: Optional[str]) -> List[float]:
    out: List[float] = []
    for g in fingerprints.findings:
        if g.kind == "missing_code" and g.feature == col and g.site == site:
            out += [float(c["value"]) for c in g.evidence.get("codes", [])] or [float(g.evidence["value"])]
    return out


def _unit_text(table, col: str) -> pd.Series:
    from sitecheck.analyses.fingerprints import _text_values

    return pd.Series(_text_values(table, col), dtype=object)


def _label_params(table, unit_col: str, site: Optional[str], at: np.ndarray) -> Dict[str, Any]:
    """The unit column and the label to write at the site: the others' most frequent spelling."""
    text = _unit_text(table, unit_col)
    others = text[~at].dropna()
    if others.empty:
        return {}
    return {"unit_column": unit_col, "unit_label": str(others.value_counts().index[0]),
            "site_labels": sorted(map(str, text[at].dropna().unique()))}


def _label_rows(table, unit_col: str, at: np.ndarray, unit: str) -> np.ndarray:
    from sitecheck.table.units import canonical_unit

    text = _unit_text(table, unit_col)
    canon = {lv: canonical_unit(lv) for lv in text.dropna().unique()}
    return at & (text.map(canon) == unit).to_numpy()


# ---------------------------------------------------------------------------
# applying a plan
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class RepairLog:
    """What an application of a plan changed.

    Attributes
    ----------
    cells_by_site : dict
        Site -> column -> operation -> cells changed.
    applied : tuple of str
        Entry ids applied, in order.
    skipped : tuple of str
        Entry ids not applied (disabled, or not safe when only safe entries apply).
    dropped_columns : tuple of str
    """

    cells_by_site: Dict[str, Dict[str, Dict[str, int]]]
    applied: Tuple[str, ...]
    skipped: Tuple[str, ...]
    dropped_columns: Tuple[str, ...] = ()
    #: entry id -> rows of its site left alone because they have no usable date (entries scoped to a period)
    rows_without_date: Dict[str, int] = field(default_factory=dict)

    @property
    def total(self) -> int:
        return int(sum(n for cols in self.cells_by_site.values() for ops in cols.values() for n in ops.values()))

    def to_dict(self) -> dict:
        return {"cells_by_site": {s: {c: dict(o) for c, o in v.items()} for s, v in self.cells_by_site.items()},
                "cells_total": self.total, "applied": list(self.applied), "skipped": list(self.skipped),
                "dropped_columns": list(self.dropped_columns), "rows_without_date": dict(self.rows_without_date)}


def check_plan_fits(plan: RepairPlan, columns: Sequence[str], site_column: str, sites: Sequence[str]) -> None:
    """Raise InputError (one line) when the plan does not fit a table."""
    if plan.site_column != site_column and plan.site_column not in columns:
        raise InputError(f"repair plan: site column {plan.site_column!r} is not in the table")
    known = set(map(str, sites))
    cols = set(map(str, columns))
    for e in plan.entries:
        if e.column not in cols:
            raise InputError(f"repair plan entry {e.id}: column {e.column!r} is not in the table")
        if e.site is not None and e.site not in known:
            raise InputError(f"repair plan entry {e.id}: site {e.site!r} is not in column {plan.site_column!r}")
        uc = e.params.get("unit_column")
        if uc is not None and uc not in cols:
            raise InputError(f"repair plan entry {e.id}: unit column {uc!r} is not in the table")
        if e.period is not None and e.period.get("time_column") not in cols:
            raise InputError(f"repair plan entry {e.id}: time column {e.period.get('time_column')!r} is not in "
                             "the table")


def repair_values(frame: pd.DataFrame, plan: RepairPlan, *, site: np.ndarray, cells: Dict[str, Any],
                  binary_levels: Optional[Dict[str, Tuple[str, str]]] = None, safe_only: bool = False,
                  times: Optional[Dict[str, np.ndarray]] = None):
    """Apply a plan's entries to parsed values (vectorised); return (frame, log, changed).

    ``frame`` holds numbers as float64 and text as objects (a copy is changed);
    ``site`` the site label of each row; ``cells`` the intake's
    :class:`~sitecheck.reading.intake.CellNotes` per column (censoring flags, idioms);
    ``times`` maps a time column to its dates (datetime64, NaT without a usable date) for
    entries scoped to a period (default: the frame's own column when it holds dates).
    ``changed`` maps column -> boolean mask of the cells whose value or written
    form changes (for writing a file), ``None`` for a dropped column.
    """
    from sitecheck.reading.intake import IDIOM_BITS

    # A shallow copy: every change below assigns a whole new column (``out[c] = x``) or drops one, which
    # pandas (>= 1.5) never writes into the shared arrays, so ``frame`` is unchanged while the columns no
    # entry touches are not copied (a deep copy doubled the table's memory: 1,000,000 x 100, +777 MB).
    out = frame.copy(deep=False)
    changed: Dict[str, Optional[np.ndarray]] = {}
    by_site: Dict[str, Dict[str, Dict[str, int]]] = {}
    applied, skipped, dropped = [], [], []
    undated_rows: Dict[str, int] = {}
    binary_levels = binary_levels or {}
    times = dict(times or {})

    def note(site_label, column, op, mask):
        n = int(mask.sum())
        if n:
            by_site.setdefault(str(site_label), {}).setdefault(column, {})
            by_site[str(site_label)][column][op] = by_site[str(site_label)][column].get(op, 0) + n
            prev = changed.get(column)
            changed[column] = mask if prev is None else (prev | mask)

    for e in sorted(plan.entries, key=lambda e: (_ORDER.get(e.operation, 99), e.id)):
        if not (e.safe if safe_only else e.enabled):
            skipped.append(e.id)
            continue
        if e.column in dropped:
            skipped.append(e.id)
            continue
        at = site == e.site if e.site is not None else np.ones(len(out), dtype=bool)
        if e.period is not None:  # only the rows dated in the period; rows without a date are left alone
            tcol = e.period.get("time_column")
            t = times.get(tcol)
            if t is None and tcol in frame.columns and np.issubdtype(frame[tcol].dtype, np.datetime64):
                t = frame[tcol].to_numpy(dtype="datetime64[ns]")
            if t is None:
                raise InputError(f"repair plan entry {e.id}: time column {tcol!r} holds no dates")
            inside, undated = period_mask(t, e.period)
            undated_rows[e.id] = int(np.sum(at & undated))
            at = at & inside
        op, p = e.operation, e.params
        if op == "remove_step":
            x = out[e.column].to_numpy(dtype=float).copy()
            m = at & ~np.isnan(x)
            x[m] = _round_half_even(x[m] - float(p["subtract"]), p.get("round_to"))
            out[e.column] = x
            note(e.site, e.column, op, m)
        elif op == "recode_missing":
            x = out[e.column].to_numpy(dtype=float).copy()
            m = at & np.isin(x, np.asarray(p["codes"], dtype=float))
            x[m] = np.nan
            out[e.column] = x
            note(e.site, e.column, op, m)
        elif op == "censored_policy":
            notes = cells.get(e.column)
            if notes is None:
                skipped.append(e.id)
                continue
            side = -1 if p.get("side") == "below" else 1
            x = out[e.column].to_numpy(dtype=float).copy()
            m = at & (notes.censor == side) & ~np.isnan(x)
            x[m] = censored_value(x[m], p.get("policy", "limit"))
            out[e.column] = x
            note(e.site, e.column, op, m)   # with policy "limit" the value stays; '<5' is written as 5
        elif op == "number_format":
            # values were read as numbers already; the cells are rewritten when a file is written
            notes = cells.get(e.column)
            if notes is None:
                skipped.append(e.id)
                continue
            bits = sum(IDIOM_BITS[k] for k in p.get("formats", []) if k in IDIOM_BITS) | IDIOM_BITS["whitespace"]
            m = at & ((notes.idiom & bits) != 0) & (notes.censor == 0) & out[e.column].notna().to_numpy()
            note(e.site, e.column, op, m)
        elif op == "convert_unit":
            x = out[e.column].to_numpy(dtype=float).copy()
            m = at & ~np.isnan(x)
            uc = p.get("unit_column")
            if uc is not None and uc in out.columns and p.get("site_labels"):
                labels = _column_text(out[uc], binary_levels.get(uc))
                m &= labels.isin(p["site_labels"]).to_numpy()
            x[m] = _round_to((x[m] + float(p.get("offset_before", 0.0))) * float(p["factor"])
                             + float(p.get("offset_after", 0.0)), p.get("round_to"))
            out[e.column] = x
            note(e.site, e.column, op, m)
            if uc is not None and uc in out.columns and p.get("unit_label") is not None:
                lv = binary_levels.get(uc)
                if lv is not None:
                    code = 1.0 if p["unit_label"] == lv[1] else 0.0
                    col = out[uc].to_numpy(dtype=float).copy()
                    mm = m & (col != code)
                    col[mm] = code
                else:
                    col = out[uc].to_numpy(dtype=object).copy()
                    mm = m & (col != p["unit_label"])
                    col[mm] = p["unit_label"]
                out[uc] = col
                note(e.site, uc, op, mm)
        elif op == "map_level":
            col = out[e.column].to_numpy(dtype=object).copy()
            m = np.zeros(len(col), dtype=bool)
            for old, new in p.get("mapping", {}).items():
                hit = at & (col == old)
                col[hit] = new
                m |= hit
            out[e.column] = col
            note(e.site, e.column, op, m)
        elif op == "drop_column":
            n = int(out[e.column].notna().sum())
            out = out.drop(columns=[e.column])
            dropped.append(e.column)
            changed[e.column] = None
            by_site.setdefault("(all sites)", {}).setdefault(e.column, {})[op] = n
        else:
            raise InputError(f"repair plan entry {e.id}: unknown operation {op!r}")
        applied.append(e.id)
    log = RepairLog(cells_by_site={s: by_site[s] for s in sorted(by_site)}, applied=tuple(applied),
                    skipped=tuple(skipped), dropped_columns=tuple(dropped), rows_without_date=undated_rows)
    return out, log, changed


def _column_text(values: pd.Series, levels: Optional[Tuple[str, str]]) -> pd.Series:
    if levels is None:
        return values.astype(object)
    v = values.to_numpy(dtype=float)
    return pd.Series(np.where(v == 1.0, levels[1], np.where(v == 0.0, levels[0], None)), dtype=object)


def apply_repairs(table, plan: RepairPlan, *, safe_only: bool = True):
    """Apply a plan to a validated table in memory; return (repaired Table, RepairLog).

    With ``safe_only`` (the scan's default) the entries marked safe apply whatever
    their ``enabled`` flag; otherwise the enabled ones. The table is not changed.
    A dropped column becomes an excluded column (reason: the plan entry).
    """
    from sitecheck.table.roles import Column

    check_plan_fits(plan, list(table.frame.columns), table.site, table.site_labels)
    frame, log, changed = repair_values(table.frame, plan, site=table.site_values(), cells=table.cells,
                                        binary_levels=table.binary_levels, safe_only=safe_only)
    cols = []
    for c in table.columns:
        if c.name in log.dropped_columns:
            frame[c.name] = np.nan
            cols.append(replace(c, role="excluded", reason="dropped by the repair plan (never measured at a site)"))
        else:
            cols.append(replace(c, n_missing=int(frame[c.name].isna().sum())))
    cells = {}
    for name, notes in table.cells.items():
        m = changed.get(name)
        if m is not None and notes.censor.any():
            notes = replace(notes, censor=np.where(m, 0, notes.censor).astype(np.int8))
        cells[name] = notes
    repaired = replace(table, frame=frame, columns=tuple(cols), cells=cells)
    return repaired, log


def plan_from_dict(doc: Any) -> RepairPlan:
    """Read a plan document (as written by a scan, possibly edited); InputError when it
    is not a plan this version reads."""
    if not isinstance(doc, dict) or "plan_version" not in doc:
        raise InputError("repair plan: not a sitecheck repair plan (no plan_version)")
    ver = str(doc["plan_version"])
    major = PLAN_VERSION.rsplit("/", 1)[-1].split(".")[0]
    if not ver.startswith("sitecheck.repair/") or ver.rsplit("/", 1)[-1].split(".")[0] != major:
        raise InputError(f"repair plan: version {ver!r} is not known; this sitecheck reads {PLAN_VERSION}")
    from sitecheck.report.schema import validate

    errs = validate(doc, plan_schema())
    if errs:
        raise InputError(f"repair plan: {errs[0]}")
    entries = []
    for d in doc["entries"]:
        if d["operation"] not in OPERATIONS:
            raise InputError(f"repair plan entry {d['id']}: unknown operation {d['operation']!r}")
        if d["operation"] == "censored_policy" and d["params"].get("policy") not in CENSOR_POLICIES:
            raise InputError(f"repair plan entry {d['id']}: censoring policy {d['params'].get('policy')!r} is not "
                             f"one of {', '.join(CENSOR_POLICIES)}")
        entries.append(RepairEntry(id=str(d["id"]), kind=d["finding"]["kind"], column=d["column"], site=d.get("site"),
                                   operation=d["operation"], params=dict(d["params"]), evidence=dict(d["evidence"]),
                                   rows=int(d["rows"]), cells=int(d["cells"]), safe=bool(d["safe"]),
                                   enabled=bool(d["enabled"]), reason=str(d.get("reason", "")),
                                   feature=d["finding"].get("feature") if d["finding"].get("feature") != d["column"]
                                   else None, period=_read_period(d)))
    return RepairPlan(entries=tuple(entries), site_column=str(doc["site_column"]), input=dict(doc.get("input", {})),
                      not_repaired=tuple(doc.get("not_repaired", [])), version=ver)


def _read_period(d: Dict[str, Any]) -> Optional[Dict[str, Any]]:
    """An entry's period, checked: a time column and ISO dates (``until`` after ``from``)."""
    per = d.get("period")
    if per is None:
        if d["operation"] == "remove_step":
            raise InputError(f"repair plan entry {d['id']}: remove_step needs a period (time_column, from)")
        return None
    out = {"time_column": str(per["time_column"]), "from": per.get("from"), "until": per.get("until")}
    bounds = []
    for key in ("from", "until"):
        if out[key] is None:
            bounds.append(None)
            continue
        try:
            bounds.append(pd.Timestamp(str(out[key])))
        except (ValueError, TypeError):
            raise InputError(f"repair plan entry {d['id']}: period {key} {out[key]!r} is not a date "
                             "(write YYYY-MM-DD)") from None
    if bounds[0] is None and bounds[1] is None:
        raise InputError(f"repair plan entry {d['id']}: the period needs 'from' or 'until'")
    if bounds[0] is not None and bounds[1] is not None and bounds[1] <= bounds[0]:
        raise InputError(f"repair plan entry {d['id']}: period 'until' {out['until']} is not after 'from' "
                         f"{out['from']}")
    if d["operation"] == "remove_step" and not isinstance(d["params"].get("subtract"), (int, float)):
        raise InputError(f"repair plan entry {d['id']}: remove_step needs a number 'subtract' in params")
    return out


def read_plan(path: str) -> RepairPlan:
    """Read a plan file; one-line InputError when it cannot be read or is not a plan."""
    import json

    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from None
    except ValueError as exc:
        raise InputError(f"{path}: not JSON ({exc})") from None
    return plan_from_dict(doc)


def plan_schema() -> Dict[str, Any]:
    """The JSON Schema (draft 2020-12) of the repair plan document."""
    from sitecheck.analyses.fingerprints import KINDS

    def obj(props, required=()):
        return {"type": "object", "properties": props, "required": list(required), "additionalProperties": True}

    s = {"type": "string"}
    date = r"^\d{4}-\d{2}-\d{2}$"
    entry = obj({
        "id": s, "finding": obj({"kind": {"enum": list(KINDS) + list(DRIFT_KINDS)}, "feature": s,
                                 "site": {"type": ["string", "null"]}}, ["kind", "feature", "site"]),
        "column": s, "site": {"type": ["string", "null"]}, "operation": {"enum": list(OPERATIONS)},
        "period": {"type": ["object", "null"], "description": "rows dated from 'from' (inclusive) until 'until' "
                   "(exclusive; null: open-ended) in time_column; rows without a date are left alone (plan 1.1)",
                   "properties": {"time_column": s, "from": {"type": ["string", "null"], "pattern": date},
                                  "until": {"type": ["string", "null"], "pattern": date}},
                   "required": ["time_column", "from", "until"], "additionalProperties": True},
        "params": {"type": "object", "description": "by operation: convert_unit {factor, offset_before, "
                   "offset_after, from_unit, to_unit, source, round_to, unit_column?, unit_label?, site_labels?}; "
                   "recode_missing {codes}; number_format {formats}; censored_policy {side, policy, limits}; "
                   "map_level {mapping}; drop_column {}; remove_step {subtract, interval, unit?, round_to, "
                   "estimate} (with a period)"},
        "evidence": {"type": "object"}, "rows": {"type": ["integer", "string"]},
        "cells": {"type": ["integer", "string"]}, "safe": {"type": "boolean"}, "enabled": {"type": "boolean"},
        "reason": s}, ["id", "finding", "column", "site", "operation", "params", "evidence", "rows", "cells", "safe",
                       "enabled"])
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", "$id": f"urn:{PLAN_VERSION}",
            "title": "sitecheck repair plan",
            "description": "Mechanical fixes for the measurement artefacts found by a scan; edit 'enabled' and "
                           "'params' (for instance a censoring policy) before applying. " + NOTE,
            **obj({"plan_version": {"type": "string", "pattern": r"^sitecheck\.repair/\d+\.\d+$"},
                   "generated_by": s, "note": s, "site_column": s,
                   "input": obj({"path": s, "sha256": s, "format": s}),
                   "entries": {"type": "array", "items": entry},
                   "not_repaired": {"type": "array", "items": obj({"kind": s, "feature": s, "reason": s})}},
                  ["plan_version", "site_column", "entries"])}


# ---------------------------------------------------------------------------
# the site signal that remains after repair
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class ResidualSignal:
    """The site probe and the top of the leak ranking before and after the safe repairs.

    Attributes
    ----------
    auc_given, auc_given_ci : float, (float, float)
        The scan's probe on the values as given.
    auc_repaired, auc_repaired_ci, p_value_repaired : float, (float, float), float or None
        The same probe (same rows, folds, model and seed) on the repaired values.
    difference, difference_ci : float, (float, float)
        ``auc_given - auc_repaired`` with a paired stratified-bootstrap 95% interval
        (the same resamples of the same out-of-fold rows for both).
    explained_share : float or None
        ``difference / (auc_given - 0.5)``: the share of the site signal above chance
        that the repairs remove.
    n_used : int
    applied : tuple of dict
        The entries applied in memory (id, kind, column, site, operation, cells).
    top : tuple of dict
        The top features of the leak ranking: score as given and after repair, with intervals.
    statement : str
    """

    auc_given: float
    auc_given_ci: Tuple[float, float]
    auc_repaired: Optional[float]
    auc_repaired_ci: Optional[Tuple[float, float]]
    p_value_repaired: Optional[float]
    difference: Optional[float]
    difference_ci: Optional[Tuple[float, float]]
    explained_share: Optional[float]
    n_used: int
    n_boot: int
    applied: Tuple[Dict[str, Any], ...]
    top: Tuple[Dict[str, Any], ...]
    verdict_repaired: Optional[str]
    statement: str
    #: the smallest value the repaired probe's permutation test can give
    p_value_repaired_floor: Optional[float] = None

    def to_dict(self) -> dict:
        from sitecheck.report.result import to_jsonable

        return to_jsonable({
            "auc_given": self.auc_given, "auc_given_ci": list(self.auc_given_ci),
            "auc_repaired": self.auc_repaired,
            "auc_repaired_ci": None if self.auc_repaired_ci is None else list(self.auc_repaired_ci),
            "p_value_repaired": self.p_value_repaired, "p_value_repaired_floor": self.p_value_repaired_floor,
            "difference": self.difference,
            "difference_ci": None if self.difference_ci is None else list(self.difference_ci),
            "explained_share": self.explained_share, "n_used": self.n_used, "n_boot": self.n_boot,
            "verdict_repaired": self.verdict_repaired, "applied": list(self.applied), "top": list(self.top),
            "statement": self.statement,
            "method": ("the scan's boosting probe refitted on the values after the plan's safe repairs (same rows, "
                       "folds and seed); difference with a paired stratified bootstrap of the out-of-fold "
                       "predictions; the leak ranking's top features re-scored by held-out permutation on the "
                       "refitted fold models"),
        })


def residual_probe(prep_repaired, *, n_boot: int = 500, n_permutations: int = 199,
                   random_state: Optional[int] = None):
    """The scan's boosting probe refitted on the repaired values (same rows, folds and seed).

    The part of :func:`residual_signal` that needs neither the scan's probe nor its leak
    ranking, so that a scan can run it at the same time as those (in its second process).

    Parameters
    ----------
    prep_repaired : Prepared
    n_boot : int, default 500
    n_permutations : int, default 199
    random_state : int, optional (default: the scan seed)

    Returns
    -------
    ProbeResult
        Boosting only: no linear second opinion, case-mix, within-outcome or group probes.
    """
    from sitecheck.analyses.probe import site_probe

    seed = int(prep_repaired.seed if random_state is None else random_state)
    return site_probe(prep_repaired, n_boot=n_boot, n_permutations=n_permutations, linear=False, case_mix=False,
                      within_outcome=False, groups=False, random_state=seed)


def residual_signal(prep_repaired, probe, leakage, applied: Sequence[Dict[str, Any]], *, top: int = 10,
                    n_boot: int = 500, n_permutations: int = 199, max_rows_per_fold: int = 4000,
                    random_state: Optional[int] = None, refit=None) -> ResidualSignal:
    """Probe the repaired values again and compare with the scan's probe.

    Parameters
    ----------
    prep_repaired : Prepared
        The table after the safe repairs, prepared with the scan's seed (same rows
        and folds as the probe's).
    probe : ProbeResult
        The scan's probe on the values as given.
    leakage : LeakageResult or None
        The scan's leak ranking; its ``top`` features are re-scored.
    applied : sequence of dict
        The repair entries applied (for the report).
    top : int, default 10
    n_boot : int, default 500
    n_permutations : int, default 199
        Label permutations per fold for the repaired probe's p-value.
    max_rows_per_fold : int, default 4000
    random_state : int, optional (default: the scan seed)
    refit : ProbeResult, optional
        :func:`residual_probe` of ``prep_repaired`` with the same ``n_boot``,
        ``n_permutations`` and ``random_state``, when computed apart; else it is computed here.

    Returns
    -------
    ResidualSignal
    """
    from sitecheck._runtime import derived_seed, stream
    from sitecheck.analyses import stats
    from sitecheck.analyses.leakage import grouped_permutation_importance
    from sitecheck.table.prepare import stratified_subsample

    seed = int(prep_repaired.seed if random_state is None else random_state)
    given = probe.score
    if not applied:
        return ResidualSignal(given.auc, tuple(given.auc_ci), None, None, None, None, None, None, int(given.n), 0,
                              (), (), None, "no safe repair applied: the site signal is that of the values as given")
    res = refit if refit is not None else residual_probe(prep_repaired, n_boot=n_boot, n_permutations=n_permutations,
                                                         random_state=seed)
    y = prep_repaired.site
    paired = len(probe.crossfit.proba) == len(y)
    diff, diff_ci = None, None
    if paired:
        a, b = stats.bootstrap_class_aucs(y, [probe.crossfit.proba, res.crossfit.proba], n_boot=n_boot,
                                          random_state=stream(seed, "residual.bootstrap"))
        d = stats.macro_from_class_aucs(a) - stats.macro_from_class_aucs(b)
        diff = float(given.auc - res.auc)
        diff_ci = stats.percentile_ci(d)
    share = None
    if given.auc > 0.5 and diff is not None:
        share = float(min(1.0, max(0.0, diff / (given.auc - 0.5))))
    rows: List[Dict[str, Any]] = []
    if leakage is not None:
        names = list(prep_repaired.features.names)
        entries = [e for e in leakage.entries if e.feature in names][:top]
        groups = [[names.index(e.feature)] for e in entries]
        if groups:
            X = prep_repaired.features.X
            rng = stream(seed, "leakage.permutations")   # the leak ranking's held-out rows and repeats
            drops = np.zeros((len(res.crossfit.models), len(groups)))
            for f, ((tr, te), model) in enumerate(zip(res.crossfit.folds, res.crossfit.models)):
                te = np.asarray(te)
                if len(te) > max_rows_per_fold:
                    te = te[stratified_subsample(y[te], max_rows_per_fold, rng)]
                _, dr = grouped_permutation_importance(model, X[te], y[te], groups, n_repeats=leakage.n_repeats,
                                                       random_state=derived_seed(seed, "leakage.fold_repeats", f))
                drops[f] = dr.mean(axis=1)
            from sitecheck.analyses.leakage import _t_interval

            for g, e in enumerate(entries):
                rows.append({"feature": e.feature, "rank_given": e.rank, "score_given": e.score,
                             "score_given_ci": list(e.score_ci), "score_repaired": float(drops[:, g].mean()),
                             "score_repaired_ci": list(_t_interval(drops[:, g]))})
    lo, hi = res.auc_ci
    statement = (f"measurement artefacts explain this much of the site signal: AUC {given.auc:.3f} \u2192 {res.auc:.3f} "
                 f"(95% CI {lo:.3f} to {hi:.3f})")
    if diff_ci is not None:
        statement += f"; difference {diff:.3f} (95% CI {diff_ci[0]:.3f} to {diff_ci[1]:.3f})"
    if share is not None:
        statement += f", {share:.0%} of the signal above chance"
    return ResidualSignal(
        auc_given=float(given.auc), auc_given_ci=tuple(given.auc_ci), auc_repaired=float(res.auc),
        auc_repaired_ci=(float(lo), float(hi)), p_value_repaired=res.p_value, difference=diff,
        difference_ci=None if diff_ci is None else (float(diff_ci[0]), float(diff_ci[1])),
        explained_share=share, n_used=int(res.n_used), n_boot=int(n_boot), applied=tuple(applied), top=tuple(rows),
        verdict_repaired=res.verdict, statement=statement,
        p_value_repaired_floor=getattr(getattr(res, "score", None), "p_value_floor", None))


# ---------------------------------------------------------------------------
# applying a plan to a file
# ---------------------------------------------------------------------------

def _site_labels(values: pd.Series) -> np.ndarray:
    """Site labels as the scan names them (:func:`sitecheck.table.roles.value_label`), one call per
    distinct value."""
    from sitecheck.table.roles import value_label

    codes, uniq = pd.factorize(values, use_na_sentinel=True)
    labels = np.array([value_label(u) for u in uniq] + [None], dtype=object)
    return labels[codes]


def _as_text(values: np.ndarray, missing: str):
    import pyarrow as pa
    import pyarrow.compute as pc

    if values.dtype.kind == "f":
        text = pc.cast(pa.array(values, from_pandas=True), pa.string())
        return np.asarray(pc.fill_null(text, missing).to_numpy(zero_copy_only=False), dtype=object)
    out = values.astype(object).copy()
    out[pd.isna(out)] = missing
    return out


def _plan_times(raw, plan: RepairPlan, labels: np.ndarray, sites: Sequence[str]) -> Dict[str, np.ndarray]:
    """The dates of each time column an enabled entry is scoped by, read site by site as the scan
    reads them (:func:`sitecheck.table.roles.parse_dates_by_site`; NaT without a usable date)."""
    from sitecheck.table.roles import parse_dates_by_site

    out: Dict[str, np.ndarray] = {}
    for e in plan.enabled():
        tcol = (e.period or {}).get("time_column")
        if tcol is None or tcol in out:
            continue
        info = next(c for c in raw.columns if c.name == tcol)
        text = None if info.text is None else pd.Series(info.text, index=raw.frame.index)
        parsed, _, _ = parse_dates_by_site(raw.frame[tcol], info, pd.Series(labels, index=raw.frame.index,
                                                                               dtype=object), list(sites), text=text)
        out[tcol] = parsed.to_numpy(dtype="datetime64[ns]")
    return out


def repair_file(data: str, plan_path: str, out: str, *, sep: Optional[str] = None,
                encoding: str = "utf-8") -> Dict[str, Any]:
    """Apply a repair plan's enabled entries to a table file and write the repaired
    table in the input's format; the input is never modified.

    Cells no entry touches are written as they were read; touched cells are written
    as plain numbers (a point as decimal separator) or as the mapped text; missing
    values as the column's most used missing-value code. A ``drop_column`` entry
    leaves its column out. A log (``OUT.repair_log.json``) lists per site and
    column the cells each operation changed.

    Raises
    ------
    InputError
        One line when the plan does not fit the table (an unknown plan version, a
        column or site the table lacks), when ``out`` is the input or has another
        format, or when the input cannot be read.
    """
    import json
    import os

    from sitecheck.reading.intake import _read_parquet, _read_text_columns, detect_format, read_table

    if os.path.exists(out) and os.path.exists(data) and os.path.samefile(out, data):
        raise InputError(f"the output {out!r} must not be the input file; the input is never overwritten", option="out")
    plan = read_plan(plan_path)
    fmt_in, fmt_out = detect_format(data), detect_format(out)
    if fmt_in != fmt_out:
        raise InputError(f"the output {out!r} must be in the input's format ({fmt_in})", option="out")
    raw = read_table(data, sep=sep, encoding=encoding, site=plan.site_column)
    if plan.site_column not in raw.frame.columns:
        raise InputError(f"repair plan: site column {plan.site_column!r} is not in {data}")
    labels = _site_labels(raw.frame[plan.site_column])
    sites = sorted({str(v) for v in labels if v is not None})
    check_plan_fits(plan, list(raw.frame.columns), plan.site_column, sites)
    frame, log, changed = repair_values(raw.frame, plan, site=labels, cells=raw.cells, safe_only=False,
                                        times=_plan_times(raw, plan, labels, sites))
    missing_code = {}
    for info in raw.columns:
        codes = {k: v for k, v in info.missing_codes.items() if k != "(null)"}
        missing_code[info.name] = max(sorted(codes), key=codes.get) if codes else ""
    tmp = out + ".tmp"
    if fmt_in == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        table = pq.read_table(data)
        for name, mask in changed.items():
            if mask is None:
                table = table.drop([name])
                continue
            i = table.column_names.index(name)
            new = frame[name].to_numpy()
            old = table.column(i)
            if pa.types.is_string(old.type) or pa.types.is_large_string(old.type):
                # a text column stays text: touched cells as plain numbers or mapped text, missing as null
                text = np.asarray(old.to_numpy(zero_copy_only=False), dtype=object).copy()
                vals = _as_text(new[mask], "")
                vals[pd.isna(new[mask])] = None
                text[mask] = vals
                arr = pa.array(text, type=pa.string(), from_pandas=True)
            elif new.dtype.kind == "f":
                arr = pa.array(new.astype(float), from_pandas=True)
                if not pa.types.is_floating(old.type):
                    arr = arr.cast(pa.float64())
            else:
                arr = pa.array(pd.Series(new, dtype=object).where(pd.notna(new), None).to_numpy(dtype=object),
                               type=pa.string(), from_pandas=True)
            table = table.set_column(i, name, arr)
        pq.write_table(table, tmp)
    else:
        text_cols, names = _read_text_columns(data, fmt_in, sep, encoding)
        cols = {}
        for name in names:
            mask = changed.get(name, False)
            if mask is None:
                continue
            orig = np.asarray(text_cols.pop(name).to_numpy(zero_copy_only=False), dtype=object)
            if mask is not False and mask.any():
                orig = orig.copy()
                orig[mask] = _as_text(frame[name].to_numpy()[mask], missing_code.get(name, ""))
            cols[name] = orig
        delim = sep if sep is not None else ("\t" if fmt_in.startswith("tsv") else ",")
        pd.DataFrame(cols, columns=list(cols)).to_csv(tmp, sep=delim, index=False, encoding=encoding,
                                                      compression="gzip" if fmt_in.endswith(".gz") else None)
    os.replace(tmp, out)
    log_doc = {"input": {"path": data, "sha256": raw.sha256}, "output": out, "plan": plan_path,
               "plan_version": plan.version, "note": NOTE, **log.to_dict()}
    log_path = out + ".repair_log.json"
    with open(log_path + ".tmp", "w", encoding="utf-8") as fh:
        json.dump(log_doc, fh, indent=2)
        fh.write("\n")
    os.replace(log_path + ".tmp", log_path)
    return {"out": out, "log": log_path, "cells_by_site": log.cells_by_site, "cells_total": log.total,
            "applied": list(log.applied), "skipped": list(log.skipped), "dropped_columns": list(log.dropped_columns),
            "rows_without_date": dict(log.rows_without_date)}
