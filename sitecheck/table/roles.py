"""Column roles, kinds and hygiene findings.

:func:`assign_roles` turns a :class:`~sitecheck.reading.intake.RawTable` and a
:class:`RoleSpec` into a validated :class:`Table`: every column gets a role
(``site``, ``outcome``, ``covariate``, ``group``, ``identifier``,
``excluded`` or ``feature``), a kind (``numeric``, ``binary``,
``categorical``, ``datetime``, ``text``) and a reason. Hygiene findings are
raised here, before any modelling.
"""
from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field, replace
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd

from sitecheck.errors import InputError
from sitecheck.reading.intake import ColumnIntake, RawTable

ROLES = ("site", "outcome", "covariate", "group", "identifier", "excluded", "feature")
KINDS = ("numeric", "binary", "categorical", "datetime", "text")

#: Name tokens that denote direct identifiers, after the HIPAA Safe Harbor
#: categories (45 CFR 164.514(b)(2)): names, geographic subdivisions smaller
#: than a state (address, postcode), dates of birth, telephone and fax
#: numbers, email, social security / medical record / health plan / account /
#: licence numbers, vehicle and device identifiers, URLs, IP addresses,
#: biometrics, photographs.
_IDENT_PATTERNS = [
    r"(first|last|given|family|full|patient|sur|maiden|middle)_?names?",
    r"names?",
    r"mrn", r"medical_?record(_?(no|num|number))?", r"record_?(no|num|number|id)",
    r"hospital_?(no|num|number)", r"nhs_?(no|num|number)", r"chi_?(no|num|number)?",
    r"ssn", r"social_?security(_?(no|num|number))?", r"national_?(id|insurance)(_?(no|number))?",
    r"account_?(no|num|number|id)?", r"acct(_?(no|num))?", r"health_?plan(_?(no|id|number))?",
    r"insurance_?(no|id|number)", r"beneficiary(_?(no|id))?",
    r"(tele)?phone(_?(no|num|number))?", r"mobile(_?(no|number))?", r"cell(_?phone)?", r"fax(_?(no|number))?",
    r"e_?mail(_?address)?",
    r"(street_?|home_?|postal_?)?address(_?line_?\d*)?", r"street", r"city", r"town",
    r"post_?code", r"postal_?code", r"zip(_?code)?", r"zipcode",
    r"d_?o_?b", r"date_?of_?birth", r"birth_?date", r"birthdate", r"birth_?day",
    r"licen[cs]e(_?(no|number))?", r"passport(_?(no|number))?", r"vehicle(_?id)?", r"plate(_?number)?",
    r"device_?(id|serial)", r"serial(_?(no|number))?", r"url", r"ip(_?address)?", r"ip_?addr",
    r"biometric", r"finger_?print", r"photo(graph)?",
]
_IDENT_RE = re.compile(r"^(?:" + "|".join(_IDENT_PATTERNS) + r")$")


def value_label(value: Any) -> Optional[str]:
    """The text label of one site or group value, the same everywhere it is shown or matched.

    Missing values (None, NaN, NaT) give None; whole-number floats lose their ``.0`` (a site
    column read as numbers with gaps is float: 3.0 is site "3").

    Examples
    --------
    >>> from sitecheck.table.roles import value_label
    >>> value_label(3.0), value_label("Ashby"), value_label(float("nan"))
    ('3', 'Ashby', None)
    """
    if value is None or value is pd.NaT or (isinstance(value, (float, np.floating)) and np.isnan(value)):
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _norm_name(name: str) -> str:
    s = re.sub(r"([a-z0-9])([A-Z])", r"\1_\2", str(name))
    s = re.sub(r"[^0-9a-zA-Z]+", "_", s).strip("_").lower()
    return s


def identifier_name_match(name: str) -> Optional[str]:
    """Return the matched Safe Harbor category token when a column name denotes
    a direct identifier, else None."""
    norm = _norm_name(name)
    if _IDENT_RE.match(norm):
        return norm
    # allow a prefix such as "pt_", "patient_", "subject_" or a suffix "_raw"
    for part in (re.sub(r"^(pt|patient|subject|person|mother|father|next_of_kin|nok)_", "", norm),
                 re.sub(r"_(raw|text|str|full)$", "", norm)):
        if part != norm and _IDENT_RE.match(part):
            return part
    return None


@dataclass(frozen=True)
class RoleSpec:
    """Roles requested by the user (CLI flags and/or a config file).

    ``None`` for a list means "not given" (so a config file value may apply);
    an empty tuple means "given, and empty".
    """

    site: Optional[str] = None
    outcome: Optional[str] = None
    covariates: Optional[Tuple[str, ...]] = None
    groups: Optional[Tuple[str, ...]] = None
    identifiers: Optional[Tuple[str, ...]] = None
    excluded: Optional[Tuple[str, ...]] = None
    features: Optional[Tuple[str, ...]] = None
    panels: Optional[Dict[str, Tuple[str, ...]]] = None

    def merged_over(self, base: "RoleSpec") -> "RoleSpec":
        """Return this spec with unset fields filled from ``base`` (flags over file)."""
        kw = {}
        for f in self.__dataclass_fields__:
            mine = getattr(self, f)
            kw[f] = mine if mine is not None else getattr(base, f)
        return RoleSpec(**kw)


@dataclass(frozen=True)
class Finding:
    """A hygiene finding about a column, raised before modelling."""

    column: str
    kind: str
    detail: str
    site: Optional[str] = None
    count: Optional[int] = None

    def to_dict(self) -> dict:
        d = {"column": self.column, "kind": self.kind, "detail": self.detail}
        if self.site is not None:
            d["site"] = self.site
        if self.count is not None:
            d["count"] = int(self.count)
        return d


@dataclass(frozen=True)
class Column:
    """A column with its role, kind and the reason for the role."""

    name: str
    role: str
    kind: str
    reason: str
    n_missing: int = 0
    missing_codes: Dict[str, int] = field(default_factory=dict)
    unparsed_count: int = 0
    unparsed_examples: Tuple[str, ...] = ()
    levels: Tuple[str, ...] = ()

    def to_dict(self) -> dict:
        d = {
            "name": self.name,
            "role": self.role,
            "kind": self.kind,
            "reason": self.reason,
            "n_missing": int(self.n_missing),
            "missing_codes": dict(self.missing_codes),
        }
        if self.unparsed_count:
            d["unparsed"] = {"count": int(self.unparsed_count), "examples": list(self.unparsed_examples)}
        return d


@dataclass(frozen=True)
class Table:
    """A validated table with column roles.

    Attributes
    ----------
    frame : pandas.DataFrame
        Rows of retained sites only; numeric/binary columns as float64
        (binary columns mapped to 0/1), categorical columns as object strings,
        datetime columns as datetime64.
    columns : tuple of Column
    site : str
        Name of the site column.
    site_labels : tuple of str
        Retained site labels, sorted.
    findings : tuple of Finding
    warnings : tuple of str
    binary_levels : dict
        For binary columns stored as text: column -> (level mapped to 0, level mapped to 1).
    panels : dict
        User-declared feature panels (name -> member columns).
    source : RawTable
    dropped_sites : dict
        Site label -> rows, for sites left out below the minimum row count.
    """

    frame: pd.DataFrame
    columns: Tuple[Column, ...]
    site: str
    site_labels: Tuple[str, ...]
    findings: Tuple[Finding, ...]
    warnings: Tuple[str, ...]
    binary_levels: Dict[str, Tuple[str, str]]
    panels: Dict[str, Tuple[str, ...]]
    source: RawTable
    dropped_sites: Dict[str, int]
    outcome: Optional[str] = None

    def names(self, role: str) -> List[str]:
        return [c.name for c in self.columns if c.role == role]

    @property
    def features(self) -> List[str]:
        return self.names("feature")

    @property
    def covariates(self) -> List[str]:
        return self.names("covariate")

    @property
    def groups(self) -> List[str]:
        return self.names("group")

    def column(self, name: str) -> Column:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)

    def kind(self, name: str) -> str:
        return self.column(name).kind

    def site_values(self) -> np.ndarray:
        return self.frame[self.site].to_numpy(dtype=object)

    def site_counts(self) -> Dict[str, int]:
        vc = self.frame[self.site].value_counts()
        return {lab: int(vc.get(lab, 0)) for lab in self.site_labels}


def _infer_kind(values: pd.Series, storage: str, n_rows: int) -> str:
    if storage == "datetime":
        return "datetime"
    present = values.dropna()
    if storage == "numeric":
        nunique = present.nunique()
        if nunique == 2:
            return "binary"
        return "numeric"
    nunique = present.nunique()
    if nunique == 2:
        return "binary"
    if len(present) == 0:
        return "categorical"
    # free text: many distinct values that contain spaces, or long strings
    s = present.astype(str)
    mean_len = float(s.str.len().mean())
    share_unique = nunique / max(len(present), 1)
    has_space = float(s.str.contains(" ", regex=False).mean())
    if (share_unique > 0.5 and nunique > 50 and (has_space > 0.5 or mean_len > 30)) or mean_len > 60:
        return "text"
    return "categorical"


def _closest(name: str, options: Sequence[str]) -> str:
    lowmap = {o.lower(): o for o in options}
    got = difflib.get_close_matches(name.lower(), list(lowmap), n=3, cutoff=0.5)
    if not got:
        return ""
    return "; did you mean " + " or ".join(repr(lowmap[g]) for g in got) + "?"


def _check_named(table_cols: Sequence[str], names: Sequence[str], what: str) -> None:
    for n in names:
        if n not in table_cols:
            raise InputError(f"{what} column {n!r} not found in the table{_closest(n, table_cols)}")


def _site_prefix_identifier(values: pd.Series, site: pd.Series) -> Optional[str]:
    """Codes whose leading letters identify the site, e.g. 'ALD-00123'."""
    present = values.notna()
    if present.sum() < 20:
        return None
    s = values[present].astype(str)
    m = s.str.extract(r"^\s*([A-Za-z]{1,8})[-_/.: ]?\d", expand=False)
    if m.notna().mean() < 0.9:
        return None
    if s.nunique() / len(s) < 0.5:
        return None
    pref = m[m.notna()]
    st = site[present][m.notna()]
    ct = pd.crosstab(pref, st)
    if ct.shape[0] < 2:
        return None
    purity = float(ct.max(axis=1).sum() / ct.to_numpy().sum())
    if purity >= 0.95:
        return (f"codes carry a site-specific prefix ({ct.shape[0]} prefixes, "
                f"{purity:.0%} of rows' prefix names one site)")
    return None


def _near_unique(values: pd.Series, storage: str) -> Optional[str]:
    present = values.dropna()
    n = len(present)
    if n < 20:
        return None
    if storage == "numeric":
        arr = present.to_numpy(dtype=float)
        if not np.all(np.equal(np.mod(arr, 1), 0)):
            return None  # continuous measurements may be unique; integer codes may not
    elif storage == "datetime":
        return None
    share = present.nunique() / n
    if share >= 0.95:
        return f"near-unique per row ({share:.1%} of {n} values are distinct)"
    return None


def assign_roles(
    raw: RawTable,
    spec: RoleSpec,
    *,
    min_site_rows: int = 20,
    include_datetime: bool = False,
) -> Table:
    """Validate roles and compute kinds and hygiene findings.

    Parameters
    ----------
    raw : RawTable
        Output of :func:`sitecheck.reading.intake.read_table`.
    spec : RoleSpec
        Requested roles; ``spec.site`` is required.
    min_site_rows : int, default 20
        Sites with fewer rows are left out with a warning.
    include_datetime : bool, default False
        Keep datetime columns as features (as numeric days) instead of leaving
        them out.

    Returns
    -------
    Table

    Raises
    ------
    InputError
        Unknown columns, fewer than two sites, a non-binary outcome, no usable
        feature.
    """
    if not isinstance(min_site_rows, (int, np.integer)) or min_site_rows < 1:
        raise InputError(f"min_site_rows must be a positive integer, got {min_site_rows!r}")
    frame = raw.frame
    names = list(frame.columns)
    if not spec.site:
        raise InputError("no site column given; name the column that holds the site (site in the config file)",
                         option="site")
    if spec.site not in names:
        raise InputError(f"site column {spec.site!r} not found in the table{_closest(spec.site, names)}")
    covs = tuple(spec.covariates or ())
    groups = tuple(spec.groups or ())
    ids = tuple(spec.identifiers or ())
    excl = tuple(spec.excluded or ())
    feats = spec.features
    if spec.outcome:
        _check_named(names, [spec.outcome], "outcome")
    _check_named(names, covs, "covariate")
    _check_named(names, groups, "group")
    _check_named(names, ids, "identifier")
    _check_named(names, excl, "excluded")
    if feats is not None:
        _check_named(names, feats, "feature")
    special = {spec.site, spec.outcome} - {None}
    for n in covs + groups:
        if n in special:
            raise InputError(f"column {n!r} cannot be both the site/outcome and a covariate or group")

    warnings: List[str] = []
    findings: List[Finding] = []

    # -- sites -------------------------------------------------------------
    site_raw = frame[spec.site]
    site_str = site_raw.map(value_label)
    n_site_missing = int(site_str.isna().sum())
    if n_site_missing:
        warnings.append(f"{n_site_missing} rows have no value in site column {spec.site!r} and were left out")
    counts = site_str.value_counts()
    if len(counts) < 2:
        raise InputError(f"site column {spec.site!r} has {len(counts)} distinct value(s); at least two sites are needed")
    dropped = {str(k): int(v) for k, v in counts.items() if v < min_site_rows}
    for lab, n in sorted(dropped.items()):
        warnings.append(f"site {lab!r} has {n} rows, below the minimum of {min_site_rows}, and was left out")
    kept = sorted(str(k) for k, v in counts.items() if v >= min_site_rows)
    if len(kept) < 2:
        raise InputError(
            f"site column {spec.site!r}: only {len(kept)} site(s) have at least {min_site_rows} rows; "
            "at least two are needed (lower min_site_rows to keep smaller sites)", option="min_site_rows"
        )
    keep_mask = site_str.isin(kept).to_numpy()
    frame = frame.loc[keep_mask].reset_index(drop=True).copy()
    frame[spec.site] = site_str[keep_mask].to_numpy(dtype=object)
    site = frame[spec.site]
    n = len(frame)

    intake = {c.name: c for c in raw.columns}
    columns: List[Column] = []
    binary_levels: Dict[str, Tuple[str, str]] = {}

    def make(name, role, kind, reason, levels=()):
        info: ColumnIntake = intake[name]
        return Column(name=name, role=role, kind=kind, reason=reason,
                      n_missing=int(frame[name].isna().sum()), missing_codes=dict(info.missing_codes),
                      unparsed_count=info.unparsed_count, unparsed_examples=info.unparsed_examples,
                      levels=tuple(levels))

    for name in names:
        info = intake[name]
        if info.unparsed_count:
            warnings.append(
                f"column {name!r}: {info.unparsed_count} value(s) did not parse as "
                f"{'numbers' if info.storage == 'numeric' else 'dates'} and were set to missing "
                f"(e.g. {', '.join(repr(x) for x in info.unparsed_examples)})"
            )
        if name == spec.site:
            columns.append(make(name, "site", "categorical", "site column (given)", kept))
            continue
        kind = _infer_kind(frame[name], info.storage, n)
        levels: Tuple[str, ...] = ()
        if kind in ("binary", "categorical") and info.storage == "text":
            levels = tuple(sorted(frame[name].dropna().astype(str).unique()))
        if kind == "binary":
            vals = frame[name].dropna().unique()
            lv = sorted(vals.tolist(), key=lambda v: (str(v)))
            if info.storage == "text":
                lv0, lv1 = _order_binary(lv)
                binary_levels[name] = (lv0, lv1)
                frame[name] = frame[name].map({lv0: 0.0, lv1: 1.0}).astype("float64")
            else:
                lo, hi = sorted(float(v) for v in vals)
                if (lo, hi) != (0.0, 1.0):
                    binary_levels[name] = (repr(lo), repr(hi))
                    frame[name] = frame[name].map({lo: 0.0, hi: 1.0}).astype("float64")
        if name == spec.outcome:
            present = frame[name].dropna()
            nun = present.nunique()
            if kind != "binary":
                raise InputError(
                    f"outcome column {name!r} is not binary: it has {nun} distinct non-missing values"
                )
            columns.append(make(name, "outcome", kind, "outcome column (given)", levels))
            continue
        if name in ids:
            columns.append(make(name, "identifier", kind, "identifier (given)"))
            continue
        if name in excl:
            columns.append(make(name, "excluded", kind, "excluded (given)"))
            continue
        role_given = "covariate" if name in covs else "group" if name in groups else None
        if role_given:
            if kind in ("text",):
                raise InputError(f"{role_given} column {name!r} looks like free text; covariates and groups must be numeric or categorical")
            if kind == "datetime":
                raise InputError(f"{role_given} column {name!r} is a datetime; convert it to a number (e.g. a year) first")
            columns.append(make(name, role_given, kind, f"{role_given} (given)", levels))
            continue
        if feats is not None and name not in feats:
            columns.append(make(name, "excluded", kind, "not in the given feature list"))
            continue
        # automatic hygiene on candidate features ------------------------
        tok = identifier_name_match(name)
        if tok:
            reason = f"name denotes a direct identifier ({tok!r}; HIPAA Safe Harbor category)"
            columns.append(make(name, "identifier", kind, reason))
            findings.append(Finding(name, "identifier", reason))
            continue
        if info.storage == "text" or kind in ("categorical", "binary", "text"):
            pref = _site_prefix_identifier(frame[name], site) if info.storage == "text" else None
            if pref:
                columns.append(make(name, "identifier", kind, pref))
                findings.append(Finding(name, "identifier", pref))
                continue
        uniq = _near_unique(frame[name], info.storage) if kind != "binary" else None
        if uniq and kind != "text":
            columns.append(make(name, "identifier", kind, uniq))
            findings.append(Finding(name, "identifier", uniq))
            continue
        present_n = int(frame[name].notna().sum())
        if present_n == 0:
            reason = "entirely missing"
            columns.append(make(name, "excluded", kind, reason))
            findings.append(Finding(name, "constant", reason))
            continue
        if frame[name].nunique(dropna=True) <= 1:
            reason = "constant (one distinct value)"
            columns.append(make(name, "excluded", kind, reason))
            findings.append(Finding(name, "constant", reason))
            continue
        if kind == "text":
            reason = "free text; left out of the analyses"
            columns.append(make(name, "excluded", kind, reason))
            findings.append(Finding(name, "free_text", reason))
            continue
        if kind == "datetime":
            detail = _datetime_periods(frame[name], site, kept)
            if include_datetime:
                columns.append(make(name, "feature", kind, "datetime kept as days since the earliest value"))
            else:
                columns.append(make(name, "excluded", kind, "datetime; left out of the probe by default"))
            findings.append(Finding(name, "datetime", detail))
            continue
        columns.append(make(name, "feature", kind, "feature (default role)", levels))

    # -- per-site completeness and exclusive levels ------------------------
    for col in columns:
        if col.role not in ("feature", "covariate", "group"):
            continue
        miss_by_site = frame[col.name].isna().groupby(site).mean()
        for lab in kept:
            if float(miss_by_site.get(lab, 0.0)) == 1.0:
                findings.append(Finding(col.name, "site_missing",
                                        f"never recorded at site {lab!r} (all {int((site == lab).sum())} rows missing)",
                                        site=lab, count=int((site == lab).sum())))
        if col.kind == "categorical":
            ct = pd.crosstab(frame[col.name], site)
            for level, row in ct.iterrows():
                nz = row[row > 0]
                if len(nz) == 1 and int(nz.iloc[0]) >= 5:
                    lab = str(nz.index[0])
                    findings.append(Finding(col.name, "exclusive_level",
                                            f"level {str(level)!r} occurs only at site {lab!r}",
                                            site=lab, count=int(nz.iloc[0])))

    usable = [c for c in columns if c.role == "feature"]
    if not usable:
        why = "; ".join(f"{c.name!r}: {c.reason}" for c in columns if c.role not in ("site", "outcome"))[:300]
        raise InputError(f"no usable feature left after roles and hygiene checks ({why}); "
                         "list the features to use under features in the config")

    panels = {}
    for pname, members in (spec.panels or {}).items():
        _check_named(names, members, f"panel {pname!r} member")
        panels[str(pname)] = tuple(members)

    return Table(
        frame=frame,
        columns=tuple(columns),
        site=spec.site,
        site_labels=tuple(kept),
        findings=tuple(findings),
        warnings=tuple(warnings),
        binary_levels=binary_levels,
        panels=panels,
        source=raw,
        dropped_sites=dropped,
        outcome=spec.outcome,
    )


_POSITIVE = ("1", "yes", "y", "true", "t", "positive", "pos", "died", "dead", "event", "admitted")


def _order_binary(levels: List) -> Tuple[str, str]:
    a, b = (str(levels[0]), str(levels[1]))
    if a.lower() in _POSITIVE and b.lower() not in _POSITIVE:
        return b, a
    if b.lower() in _POSITIVE and a.lower() not in _POSITIVE:
        return a, b
    return (a, b) if a <= b else (b, a)


def _datetime_periods(values: pd.Series, site: pd.Series, labels: Sequence[str]) -> str:
    parts = []
    ranges = {}
    for lab in labels:
        v = values[site == lab].dropna()
        if len(v) == 0:
            continue
        ranges[lab] = (v.min(), v.max())
        parts.append(f"{lab}: {v.min():%Y-%m-%d} to {v.max():%Y-%m-%d}")
    if len(ranges) >= 2:
        lo = max(r[0] for r in ranges.values())
        hi = min(r[1] for r in ranges.values())
        span = max(r[1] for r in ranges.values()) - min(r[0] for r in ranges.values())
        overlap = (hi - lo) if hi > lo else pd.Timedelta(0)
        share = overlap / span if span > pd.Timedelta(0) else 1.0
        if share < 0.8:
            return f"collection periods differ by site (common overlap {share:.0%} of the span; " + "; ".join(parts) + "); left out of the probe"
    return "datetime column; left out of the probe (" + "; ".join(parts) + ")"
