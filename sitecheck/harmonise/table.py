"""Harmonising a whole table: choose the columns, refuse what harmonisation cannot repair, fit or
apply, and return the harmonised frame with its fit (the ``sitecheck harmonise`` command reads the
file, calls :func:`harmonise_table`, writes the table and the parameters, and prints).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from sitecheck._runtime import stream_key
from sitecheck.errors import InputError
from sitecheck.harmonise.methods import (HarmonisationFit, _prevalence_warning, apply_harmoniser, clip_to_range,
                                         fit_harmoniser, protected_design)
from sitecheck.table.roles import value_label

#: Extra keys of a saved parameters file (beside the fit's own): where and on what it was fitted.
FILE_KEYS = ("site_column", "input_sha256", "rows_fitted", "left_unchanged")


def _site_codes(frame: pd.DataFrame, site_col: str, labels: Sequence[str], *, fitted: bool) -> Tuple[np.ndarray, np.ndarray]:
    """(row mask with a site value, integer codes of those rows)."""
    lab = [value_label(v) for v in frame[site_col].to_numpy(dtype=object)]
    has = np.array([v is not None for v in lab])
    code = {s: i for i, s in enumerate(labels)}
    unknown = sorted({v for v in lab if v is not None and v not in code})
    if unknown:
        known = ", ".join(labels[:6]) + (", ..." if len(labels) > 6 else "")
        raise InputError(f"site column {site_col!r}: site {unknown[0]!r} is not one of the "
                         f"{'fitted ' if fitted else ''}sites ({known})")
    return has, np.array([code[v] for v in lab if v is not None], dtype=np.int64)


def _numeric_matrix(frame: pd.DataFrame, names: Sequence[str], raw) -> np.ndarray:
    for name in names:
        if name not in frame.columns:
            raise InputError(f"column {name!r} is not in the table")
        storage = raw.column(name).storage
        if storage != "numeric":
            raise InputError(f"column {name!r} is not numeric ({storage}); it cannot be harmonised")
    return np.column_stack([frame[n].to_numpy(dtype=float, na_value=np.nan) for n in names]) if names else \
        np.zeros((len(frame), 0))


def _choose_columns(raw, site: str, protect: Sequence[str], identifiers: Sequence[str],
                    excluded: Sequence[str], outcome: Optional[str]):
    """Numeric feature columns to harmonise, and the others left unchanged with why."""
    from sitecheck.table.roles import RoleSpec, assign_roles

    spec = RoleSpec(site=site, covariates=tuple(protect) or None, identifiers=tuple(identifiers) or None,
                    excluded=tuple(excluded) or None, outcome=outcome)
    table = assign_roles(raw, spec, min_site_rows=1)
    adjust: List[str] = []
    left: Dict[str, str] = {}
    for c in table.columns:
        if c.role == "feature":
            if c.kind == "numeric":
                adjust.append(c.name)
            else:
                left[c.name] = c.kind
        elif c.role not in ("site",):
            left[c.name] = c.role if c.role != "covariate" else "protected"
    if not adjust:
        raise InputError("no numeric feature column to harmonise")
    return adjust, left


def blocking_findings(raw, site: str, features: Sequence[str], *, identifiers: Sequence[str] = (),
                      excluded: Sequence[str] = (), outcome: Optional[str] = None) -> list:
    """Fingerprints of a blocking kind (:data:`sitecheck.harmonise.methods.BLOCKING_KINDS`) on the
    columns about to be harmonised: a unit, a missing-value code, a censored limit or a
    number format that differs by site. Empty when the table has fewer than two sites."""
    from sitecheck.analyses.fingerprints import find_fingerprints
    from sitecheck.harmonise.methods import BLOCKING_KINDS
    from sitecheck.table.roles import RoleSpec, assign_roles

    if raw.frame[site].dropna().nunique() < 2:
        return []  # a batch from one site: nothing to compare it with
    spec = RoleSpec(site=site, identifiers=tuple(identifiers) or None, excluded=tuple(excluded) or None,
                    outcome=outcome)
    table = assign_roles(raw, spec, min_site_rows=1)
    wanted = set(features)
    res = find_fingerprints(table, covariates=[])
    return [f for f in res.findings if f.kind in BLOCKING_KINDS and f.feature in wanted]


def _blocking_line(found: list, limit: Optional[int] = 4) -> str:
    shown = found if limit is None else found[:limit]
    parts = [f"{f.feature} ({f.kind} at {f.site})" for f in shown]
    more = f" and {len(found) - len(shown)} more" if len(found) > len(shown) else ""
    return ", ".join(parts) + more


def _check_findings(raw, site, features, identifiers, excluded, outcome, despite: bool,
                    warnings: List[str]) -> None:
    found = blocking_findings(raw, site, features, identifiers=identifiers, excluded=excluded, outcome=outcome)
    if not found:
        return
    if not despite:
        raise InputError(f"not harmonised: {_blocking_line(found)} would be spread over every value of the site; "
                         "repair them first (a scan's repair plan lists the fixes) or set despite_findings",
                         option="despite_findings")
    warnings.append(f"harmonised despite {len(found)} finding(s) that harmonisation cannot repair: "
                    f"{_blocking_line(found, None)}")



@dataclass(frozen=True, eq=False)
class HarmonisedTable:
    """A harmonised table and how it was made.

    Attributes
    ----------
    frame : pandas.DataFrame
        The table as read, with each adjusted column replaced by its harmonised values (float, on the
        fit's recording grid, inside the recorded range); rows without a site value are unchanged.
    fit : HarmonisationFit
        The fitted (or applied) parameters; ``fit.to_dict()`` plus :attr:`file_keys` is the parameters file.
    rows : ndarray of bool
        Rows that had a site value (the rows harmonised).
    adjusted : tuple of str
        The harmonised columns.
    left_unchanged : dict
        Column -> why it was left unchanged.
    clipped : dict
        Column -> (values raised to the recorded minimum, values lowered to the recorded maximum).
    warnings : tuple of str
    file_keys : dict
        The parameters file's extra keys (:data:`FILE_KEYS`); empty when parameters were applied.
    """

    frame: pd.DataFrame
    fit: HarmonisationFit
    rows: np.ndarray
    adjusted: Tuple[str, ...]
    left_unchanged: Dict[str, str]
    clipped: Dict[str, Tuple[int, int]]
    warnings: Tuple[str, ...]
    file_keys: Dict[str, object] = field(default_factory=dict)

    def parameters(self) -> dict:
        """The parameters file's document: the fit's parameters and :attr:`file_keys`."""
        return {**self.fit.to_dict(), **self.file_keys}


def harmonise_table(raw, *, site: Optional[str], method: Optional[str] = None, protect: Sequence[str] = (),
                    identifiers: Sequence[str] = (), excluded: Sequence[str] = (), outcome: Optional[str] = None,
                    despite_findings: bool = False, seed: int = 0,
                    parameters=None) -> HarmonisedTable:
    """Fit a harmonisation on a table (or apply saved ``parameters``) and return the harmonised frame.

    Refuses (InputError) when a column to harmonise carries a blocking fingerprint
    (:func:`blocking_findings`) unless ``despite_findings``; then it warns. Harmonised
    values are on each feature's common recording grid and kept inside the range recorded in
    the fitting rows (:func:`sitecheck.harmonise.methods.clip_to_range`; the values moved are
    counted per feature and reported in a warning). Right-skewed non-negative features are
    fitted on the log scale, and each recorded value is read as a uniform draw from its site's
    recording cell (seeded by ``seed``: the same table and seed give the same output; see
    :func:`sitecheck.harmonise.methods.dither`).

    Parameters
    ----------
    raw : RawTable
        From :func:`sitecheck.reading.intake.read_table`.
    site : str or None
        The site column (with ``parameters``, None takes the saved one).
    method : {"centre", "scale", "quantile", "combat"}, optional
        Required when fitting; not allowed with ``parameters``.
    protect : sequence of str
        Columns whose effect is kept (fitting only).
    identifiers, excluded : sequence of str
        Columns left unchanged.
    outcome : str, optional
        A binary outcome, left unchanged (warns when its prevalence differs by site and it is not protected).
    despite_findings : bool, default False
        Harmonise despite blocking findings (with a warning).
    seed : int, default 0
    parameters : HarmonisationFit or dict, optional
        Saved parameters to apply to new rows of the same sites: a fit from
        :meth:`HarmonisationFit.load <sitecheck.harmonise.methods.HarmonisationFit.load>` (its
        ``saved_with`` holds the site column and the columns left unchanged) or the saved document
        (:meth:`HarmonisedTable.parameters`).

    Returns
    -------
    HarmonisedTable

    References
    ----------
    Johnson, W. E., Li, C. and Rabinovic, A. (2007). Adjusting batch effects in microarray
    expression data using empirical Bayes methods. Biostatistics 8(1), 118-127.
    """
    frame = raw.frame
    warnings: List[str] = []
    file_keys: Dict[str, object] = {}
    if parameters is not None:
        if method is not None or protect:
            raise InputError("applying saved parameters takes the method and protected columns from them; "
                             "give neither a method nor protected columns")
        fit = parameters if isinstance(parameters, HarmonisationFit) else HarmonisationFit.from_dict(parameters)
        site_col = site or fit.saved_with.get("site_column")
        if not site_col:
            raise InputError("no site column: name the site column", option="site")
        if site_col not in frame.columns:
            raise InputError(f"site column {site_col!r} is not in the table")
        for name in list(fit.features) + [s["name"] for s in fit.protect]:
            if name not in frame.columns:
                raise InputError(f"column {name!r} (in the parameters) is not in the table")
        has, codes = _site_codes(frame, site_col, fit.site_labels, fitted=True)
        X = _numeric_matrix(frame.loc[has], fit.features, raw)
        adjusted_cols = [f for f, a in zip(fit.features, fit.adjusted) if a]
        _check_findings(raw, site_col, adjusted_cols, identifiers, excluded, outcome, despite_findings,
                        warnings)
        D, _ = protected_design(frame.loc[has], [s["name"] for s in fit.protect], spec=fit.protect)
        Xh = apply_harmoniser(fit, X, codes, design=D, random_state=stream_key(seed, "harmonise.apply"))
        Xh, clipped = clip_to_range(fit, Xh)
        left = dict(fit.saved_with.get("left_unchanged", {}))
    else:
        if not site:
            raise InputError("no site column: name the site column", option="site")
        if method is None:
            raise InputError("no method: choose centre, scale, quantile or combat", option="method")
        if site not in frame.columns:
            raise InputError(f"site column {site!r} is not in the table")
        adjust, left = _choose_columns(raw, site, protect, identifiers, excluded, outcome)
        labels = sorted({v for v in (value_label(x) for x in frame[site].to_numpy(dtype=object)) if v is not None})
        if len(labels) < 2:
            raise InputError(f"site column {site!r} has fewer than two sites")
        has, codes = _site_codes(frame, site, labels, fitted=False)
        X = _numeric_matrix(frame.loc[has], adjust, raw)
        _check_findings(raw, site, adjust, identifiers, excluded, outcome, despite_findings, warnings)
        D, spec = protected_design(frame.loc[has], list(protect))
        fit = fit_harmoniser(X, codes, method=method, site_labels=labels, feature_names=adjust, design=D,
                             protect_spec=spec, log_skewed=True, random_state=stream_key(seed, "harmonise.fit"))
        Xh = apply_harmoniser(fit, X, codes, design=D, random_state=stream_key(seed, "harmonise.apply"))
        Xh, clipped = clip_to_range(fit, Xh)
        if outcome and outcome not in protect:
            y = pd.to_numeric(frame.loc[has, outcome], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            levels = np.unique(y[~np.isnan(y)])
            if len(levels) == 2:
                w = _prevalence_warning((y == levels[1]).astype(float) + np.where(np.isnan(y), np.nan, 0.0),
                                        codes, labels)
                if w:
                    warnings.append(w)
        file_keys = {"site_column": site, "input_sha256": raw.sha256, "rows_fitted": int(has.sum()),
                     "left_unchanged": left}
    out = frame.copy()
    rows = np.flatnonzero(has)
    for j, name in enumerate(fit.features):
        if fit.adjusted[j]:
            col = frame[name].to_numpy(dtype=float, na_value=np.nan).copy()
            col[rows] = Xh[:, j]
            out[name] = col
    moved = {name: (int(c[0]), int(c[1])) for name, c in zip(fit.features, clipped) if c.sum()}
    if moved:
        n_obs = (~np.isnan(Xh)).sum(axis=0)
        parts = []
        for j, name in enumerate(fit.features):
            if name in moved:
                lo_n, hi_n = moved[name]
                what = " and ".join(w for w in (f"{lo_n} below {fit.lower[j]:g}" if lo_n else "",
                                                f"{hi_n} above {fit.upper[j]:g}" if hi_n else "") if w)
                parts.append(f"{name} {what} ({(lo_n + hi_n) / max(int(n_obs[j]), 1):.1%})")
        warnings.append("harmonised values outside the range recorded in the fitting rows were set to its "
                        "nearest end: " + "; ".join(parts))
    n_no_site = int((~has).sum())
    if n_no_site:
        warnings.append(f"{n_no_site} rows have no site value and were written unchanged")
    return HarmonisedTable(frame=out, fit=fit, rows=has, adjusted=tuple(f for f, a in zip(fit.features, fit.adjusted) if a),
                           left_unchanged={**left, **dict(fit.unchanged)}, clipped=moved, warnings=tuple(warnings),
                           file_keys=file_keys)
