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
from sitecheck.reading.intake import IDIOM_BITS, CellNotes, ColumnIntake, RawTable

ROLES = ("site", "outcome", "covariate", "group", "identifier", "excluded", "feature", "time")
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
_PERSON_NAME_RE = re.compile(r"(^|_)((first|last|given|family|sur|maiden|middle)_?names?)$")


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
    # a person's name after any prefix ("fake_last_name", "mothers_first_name")
    m = _PERSON_NAME_RE.search(norm)
    if m:
        return m.group(2)
    return None


@dataclass(frozen=True)
class RoleSpec:
    """Roles requested by the user (CLI flags and/or a config file).

    ``None`` for a list means "not given" (so a config file value may apply);
    an empty tuple means "given, and empty".

    Parameters
    ----------
    site : str, optional
        The site (or group) column; required by :func:`assign_roles`.
    outcome : str, optional
        A binary outcome.
    covariates, groups, identifiers, excluded : tuple of str, optional
        Case-mix columns, demographic columns probed like sites, identifiers (never
        features) and columns left out.

    Examples
    --------
    >>> from sitecheck import RoleSpec
    >>> spec = RoleSpec(site="hospital", covariates=("age",))
    >>> spec.site, spec.covariates, spec.groups
    ('hospital', ('age',), None)
    """

    site: Optional[str] = None
    outcome: Optional[str] = None
    covariates: Optional[Tuple[str, ...]] = None
    groups: Optional[Tuple[str, ...]] = None
    identifiers: Optional[Tuple[str, ...]] = None
    excluded: Optional[Tuple[str, ...]] = None
    features: Optional[Tuple[str, ...]] = None
    panels: Optional[Dict[str, Tuple[str, ...]]] = None
    time: Optional[str] = None

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
    #: site -> lab-export idiom -> cells (censored_below, decimal_comma, unit_suffix, ...)
    idioms: Dict[str, Dict[str, int]] = field(default_factory=dict)
    #: site -> unit written after the number -> cells
    units: Dict[str, Dict[str, int]] = field(default_factory=dict)

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
        if self.idioms:
            d["idioms"] = {s: dict(v) for s, v in self.idioms.items()}
        if self.units:
            d["units"] = {s: dict(v) for s, v in self.units.items()}
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
    cells : dict
        Column -> :class:`~sitecheck.reading.intake.CellNotes` of the retained rows, for the
        columns whose cells used a lab-export idiom (censoring flags, units).
    outcome : str or None
    time : str or None
        The time column (``--time``), parsed to datetime64 per site; rows without a
        usable date hold NaT.
    time_notes : dict
        Site label -> what parsing the time column found there: ``rows``, ``dated``,
        ``without_date``, ``implausible``, ``first``, ``last``, ``format``.
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
    cells: Dict[str, CellNotes] = field(default_factory=dict)
    time: Optional[str] = None
    time_notes: Dict[str, dict] = field(default_factory=dict)

    def censored(self, name: str) -> Optional[np.ndarray]:
        """-1/0/+1 per row (below a limit / not censored / above), or None without censoring."""
        notes = self.cells.get(name)
        if notes is None or not notes.censor.any():
            return None
        return notes.censor

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

    Examples
    --------
    >>> from sitecheck import RoleSpec, assign_roles, read_table
    >>> with open("labs.csv", "w") as fh:
    ...     _ = fh.write("hospital,crp,potassium\\nAshby,12,4.1\\nAshby,<5,3.9\\n"
    ...                  "Brill,7,NA\\nBrill,9,4.4\\n")
    >>> table = assign_roles(read_table("labs.csv", site="hospital"), RoleSpec(site="hospital"),
    ...                      min_site_rows=2)
    >>> table.site_labels, table.features
    (('Ashby', 'Brill'), ['crp', 'potassium'])
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
    if spec.time:
        _check_named(names, [spec.time], "time")
        if spec.time in special or spec.time in covs + groups + ids + excl:
            raise InputError(f"time column {spec.time!r} cannot also be the site, the outcome, a covariate, "
                             "a group, an identifier or excluded")

    warnings: List[str] = []
    findings: List[Finding] = []
    time_notes: Dict[str, dict] = {}

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
    cells = {name: notes.take(keep_mask) for name, notes in raw.cells.items()}
    site_code = np.searchsorted(np.array(kept, dtype=object), frame[spec.site].to_numpy(dtype=object))
    idioms_of, units_of = {}, {}
    for name, notes in cells.items():
        idioms_of[name], units_of[name] = _per_site_idioms(notes, site_code, kept)

    def make(name, role, kind, reason, levels=()):
        info: ColumnIntake = intake[name]
        return Column(name=name, role=role, kind=kind, reason=reason,
                      n_missing=int(frame[name].isna().sum()), missing_codes=dict(info.missing_codes),
                      unparsed_count=info.unparsed_count, unparsed_examples=info.unparsed_examples,
                      levels=tuple(levels), idioms=idioms_of.get(name, {}), units=units_of.get(name, {}))

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
        if name == spec.time:
            text = None if info.text is None else pd.Series(info.text[keep_mask], index=frame.index)
            parsed, time_notes, time_warnings = parse_dates_by_site(frame[name], info, site, kept, text=text)
            frame[name] = parsed
            warnings.extend(time_warnings)
            columns.append(make(name, "time", "datetime", "time column (given); dates parsed per site"))
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
            # one finding per column x site, listing the levels (most frequent first)
            ct = pd.crosstab(frame[col.name], site)
            per_site: Dict[str, List[Tuple[str, int]]] = {}
            for level, row in ct.iterrows():
                nz = row[row > 0]
                if len(nz) == 1 and int(nz.iloc[0]) >= 5:
                    per_site.setdefault(str(nz.index[0]), []).append((str(level), int(nz.iloc[0])))
            for lab in kept:
                lv = sorted(per_site.get(lab, []), key=lambda t: (-t[1], t[0]))
                if not lv:
                    continue
                shown = ", ".join(repr(x) for x, _ in lv[:5]) + (f" and {len(lv) - 5} more" if len(lv) > 5 else "")
                what = f"level {shown} occurs" if len(lv) == 1 else f"{len(lv)} levels occur ({shown})"
                findings.append(Finding(col.name, "exclusive_level", f"{what} only at site {lab!r}",
                                        site=lab, count=sum(c for _, c in lv)))

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
        cells=cells,
        time=spec.time or None,
        time_notes=time_notes,
    )


def _per_site_idioms(notes: CellNotes, site_code: np.ndarray, labels: Sequence[str]):
    """(site -> idiom -> cells, site -> unit -> cells) from per-cell notes (vectorised)."""
    k = len(labels)
    idioms: Dict[str, Dict[str, int]] = {}
    for key, bit in IDIOM_BITS.items():
        hit = (notes.idiom & bit) != 0
        if not hit.any():
            continue
        counts = np.bincount(site_code[hit], minlength=k)
        for s in np.flatnonzero(counts):
            idioms.setdefault(labels[s], {})[key] = int(counts[s])
    units: Dict[str, Dict[str, int]] = {}
    has = notes.unit >= 0
    if has.any():
        nl = len(notes.unit_levels)
        counts = np.bincount(site_code[has] * nl + notes.unit[has], minlength=k * nl).reshape(k, nl)
        for s, u in zip(*np.nonzero(counts)):
            units.setdefault(labels[s], {})[notes.unit_levels[u]] = int(counts[s, u])
    return ({lab: idioms[lab] for lab in labels if lab in idioms},
            {lab: units[lab] for lab in labels if lab in units})


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


#: Date formats tried, site by site, on a time column that intake left as text. Day-first
#: comes before month-first: when both read every value, the day-first reading is kept
#: and a warning says so.
DATE_FORMATS = ("ISO8601", "%d/%m/%Y", "%m/%d/%Y", "%d.%m.%Y", "%d-%m-%Y", "%Y/%m/%d", "%Y.%m.%d",
                "%d/%m/%y", "%m/%d/%y", "%d %b %Y", "%d-%b-%Y", "%b %d %Y")

#: Dates outside [first, last) are read as placeholders (1900-01-01, 2999-12-31, ...), not dates.
PLAUSIBLE_DATES = (pd.Timestamp("1901-01-01"), pd.Timestamp("2100-01-01"))

#: Share of a site's non-missing values that must parse in one format (as intake's COERCE_SHARE).
DATE_SHARE = 0.95


def _parse_text_dates(values: pd.Series) -> Tuple[pd.Series, str, bool]:
    """Parse one site's date strings in the format that reads most of them.

    Returns (parsed, format, ambiguous): ``ambiguous`` is True when day-first and
    month-first both read every value and disagree on some.
    """
    import warnings as _w

    best, best_fmt, best_ok = None, "", -1
    results = {}
    with _w.catch_warnings():
        _w.simplefilter("ignore")
        for fmt in DATE_FORMATS:
            try:
                got = pd.to_datetime(values, format=fmt, errors="coerce")
            except (ValueError, TypeError):  # pragma: no cover - pandas refuses the format
                continue
            ok = int(got.notna().sum())
            results[fmt] = got
            if ok > best_ok:
                best, best_fmt, best_ok = got, fmt, ok
            if ok == len(values) and fmt not in ("%d/%m/%Y", "%d/%m/%y"):
                break
    ambiguous = False
    for dayfirst, monthfirst in (("%d/%m/%Y", "%m/%d/%Y"), ("%d/%m/%y", "%m/%d/%y")):
        if best_fmt == dayfirst and monthfirst in results:
            other = results[monthfirst]
            if int(other.notna().sum()) == best_ok and not other.equals(best):
                ambiguous = True
    return best, best_fmt, ambiguous


def parse_dates_by_site(values: pd.Series, info: ColumnIntake, site: pd.Series,
                        labels: Sequence[str], *, text: Optional[pd.Series] = None
                        ) -> Tuple[pd.Series, Dict[str, dict], List[str]]:
    """Parse and validate the time column, site by site.

    Text (``text``, the column as written when intake read it as dates, or the
    column itself when intake left it as text) is parsed per site in the format
    that reads most of that site's values: sites may write dates differently,
    and one format per site keeps 03/01 from being read as 3 January at one row
    and 1 March at the next. Dates stored as dates (Parquet) are taken as they
    are; integers written as YYYYMMDD are read as dates.
    Dates before 1901 or from 2100 are taken as placeholders. Rows without a
    usable date become NaT and are counted per site.

    Returns
    -------
    (parsed, notes, warnings)
        ``parsed`` is datetime64[ns] aligned with ``values``; ``notes`` maps each site
        to ``rows``, ``dated``, ``without_date``, ``implausible``, ``first``, ``last``,
        ``format``.

    Raises
    ------
    InputError
        The column holds numbers that are not YYYYMMDD dates, or a site's values are
        not dates in any one format (fewer than 95% parse), or no site has a date.
    """
    name = info.name
    out = pd.Series(pd.NaT, index=values.index, dtype="datetime64[ns]")
    formats: Dict[str, str] = {}
    warn: List[str] = []
    if info.storage == "datetime" and text is not None:
        values = text
    if info.storage == "datetime" and text is None:
        out[:] = pd.to_datetime(values).astype("datetime64[ns]").to_numpy()
        formats = {lab: "stored as dates" for lab in labels}
    elif info.storage == "numeric":
        v = pd.to_numeric(values, errors="coerce")
        present = v.dropna()
        ymd = present.between(19000101, 21001231) & (present % 1 == 0)
        if len(present) == 0 or float(ymd.mean()) < DATE_SHARE:
            ex = ", ".join(repr(float(x)) for x in present[~ymd].head(3)) if len(present) else "none"
            raise InputError(f"time column {name!r} holds numbers, not dates (e.g. {ex}); "
                             "write dates as text such as 2025-01-31")
        out[:] = pd.to_datetime(v.where(ymd).astype("Int64").astype(str), format="%Y%m%d",
                                errors="coerce").astype("datetime64[ns]").to_numpy()
        formats = {lab: "YYYYMMDD numbers" for lab in labels}
    else:
        text = values.astype(object)
        for lab in labels:
            mask = (site == lab).to_numpy() & text.notna().to_numpy()
            vals = text[mask].astype(str).str.strip()
            if len(vals) == 0:
                continue
            parsed, fmt, ambiguous = _parse_text_dates(vals)
            ok = int(parsed.notna().sum())
            if ok < DATE_SHARE * len(vals):
                bad = vals[parsed.isna().to_numpy()]
                ex = ", ".join(repr(x) for x in pd.unique(bad.to_numpy())[:3])
                raise InputError(f"time column {name!r}: at site {lab!r}, {len(vals) - ok} of {len(vals)} values are "
                                 f"not dates in any one format (e.g. {ex})")
            out[mask] = parsed.astype("datetime64[ns]").to_numpy()
            formats[lab] = "ISO 8601" if fmt == "ISO8601" else fmt
            if ambiguous:
                warn.append(f"time column {name!r}: dates at site {lab!r} were read day-first ({fmt}); "
                            "every day number is 12 or less, so month-first would also fit")
    lo, hi = PLAUSIBLE_DATES
    implausible = out.notna() & ((out < lo) | (out >= hi))
    out[implausible] = pd.NaT
    notes: Dict[str, dict] = {}
    without: Dict[str, int] = {}
    for lab in labels:
        m = (site == lab).to_numpy()
        d = out[m]
        dated = int(d.notna().sum())
        notes[lab] = {"rows": int(m.sum()), "dated": dated, "without_date": int(m.sum()) - dated,
                      "implausible": int(implausible[m].sum()),
                      "first": None if dated == 0 else f"{d.min():%Y-%m-%d}",
                      "last": None if dated == 0 else f"{d.max():%Y-%m-%d}",
                      "format": formats.get(lab, "")}
        if notes[lab]["without_date"]:
            without[lab] = notes[lab]["without_date"]
        if dated == 0:
            warn.append(f"time column {name!r}: no usable date at site {lab!r}; the site is left out of the "
                        "drift analysis")
    if all(n["dated"] == 0 for n in notes.values()):
        raise InputError(f"time column {name!r}: no value could be read as a date")
    if without:
        warn.append(f"time column {name!r}: {sum(without.values())} rows have no usable date ("
                    + ", ".join(f"{k} {v}" for k, v in sorted(without.items()))
                    + "); they are left out of the drift analysis")
    return out, notes, warn
