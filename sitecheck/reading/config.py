"""Run configuration: a TOML file's roles and options, merged under explicit arguments.

One loader (:func:`resolve_config`) serves both the command line and the Python
API (:func:`sitecheck.scan.scan_file`): it reads the file once, checks every
value's type and range (a problem is an :class:`~sitecheck.errors.InputError`
naming the file and the key), and returns the roles, the scan options, the
reading options and the gates of the run.

Examples
--------
>>> run = resolve_config(None, roles=RoleSpec(site="hospital"), options={"seed": 3})
>>> run.roles.site, run.options.seed, run.options.folds, run.gates.active
('hospital', 3, 5, False)
"""
from __future__ import annotations

import codecs
import dataclasses
import numbers
import sys
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Dict, Mapping, Optional, Tuple, Union

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from sitecheck.errors import InputError
from sitecheck.report.gates import Gates, check_fail_above, check_fail_on
from sitecheck.table.roles import RoleSpec

if TYPE_CHECKING:  # pragma: no cover
    from sitecheck.scan import ScanOptions

_ROLE_KEYS = {"site", "outcome", "time", "covariates", "groups", "identifiers", "excluded", "features", "panels"}
_OPTION_KEYS = {"seed", "min_site_rows", "min_cell", "folds", "max_rows", "map_rows", "sep", "encoding",
                "cluster_threshold", "include_datetime", "fail_above", "fail_on", "threshold", "repair",
                "censor_policy"}
#: [options] keys that are fields of :class:`~sitecheck.scan.ScanOptions`.
SCAN_OPTION_KEYS = ("seed", "folds", "max_rows", "map_rows", "min_site_rows", "min_cell", "include_datetime",
                    "cluster_threshold", "threshold", "repair", "censor_policy")


def _int(lo: Optional[int] = None, hi: Optional[int] = None):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, numbers.Integral):
            raise TypeError(f"must be a whole number, got {v!r}")
        if (lo is not None and v < lo) or (hi is not None and v > hi):
            rng = f"at least {lo}" if hi is None else f"between {lo} and {hi}"
            raise ValueError(f"must be {rng}, got {v!r}")
        return int(v)
    return check


def _real(lo: float, hi: float, *, open_lo: bool = False, open_hi: bool = False):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, numbers.Real):
            raise TypeError(f"must be a number, got {v!r}")
        v = float(v)
        if not (lo < v if open_lo else lo <= v) or not (v < hi if open_hi else v <= hi):
            raise ValueError(f"must lie in {'(' if open_lo else '['}{lo:g}, {hi:g}{')' if open_hi else ']'}, got {v!r}")
        return v
    return check


def _bool(v):
    if not isinstance(v, bool):
        raise TypeError(f"must be true or false, got {v!r}")
    return v


def _sep(v):
    if not isinstance(v, str) or len(v) != 1:
        raise ValueError(f"must be a single character, got {v!r}")
    return v


def _encoding(v):
    if not isinstance(v, str):
        raise TypeError(f"must be the name of a text encoding, got {v!r}")
    try:
        codecs.lookup(v)
    except LookupError:
        raise ValueError(f"{v!r} is not a known text encoding") from None
    return v


def _censor_policy(v):
    from sitecheck.table.repair import CENSOR_POLICIES

    if not isinstance(v, str) or v not in CENSOR_POLICIES:
        raise ValueError(f"must be one of {', '.join(CENSOR_POLICIES)}, got {v!r}")
    return v


_OPTION_CHECKS = {
    "seed": _int(),
    "folds": _int(2, 20),
    "max_rows": _int(100),
    "map_rows": _int(100),
    "min_site_rows": _int(1),
    "min_cell": _int(1),
    "include_datetime": _bool,
    "cluster_threshold": _real(0.0, 1.0, open_lo=True),
    "threshold": _real(0.0, 1.0, open_lo=True, open_hi=True),
    "sep": _sep,
    "encoding": _encoding,
    "fail_above": check_fail_above,
    "fail_on": check_fail_on,
    "repair": _bool,
    "censor_policy": _censor_policy,
}


@dataclass(frozen=True)
class FileConfig:
    """What a config file said: roles and the options it sets (checked and typed)."""

    roles: RoleSpec = field(default_factory=RoleSpec)
    options: Dict[str, Any] = field(default_factory=dict)
    path: Optional[str] = None


def _tuple_of_str(value, key: str, path: str) -> Tuple[str, ...]:
    if isinstance(value, str):
        return (value,)
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise InputError(f"{path}: {key!r} must be a column name or a list of column names")
    return tuple(value)


def load_config(path: Optional[str]) -> FileConfig:
    """Read a TOML config file.

    The file may hold the role keys ``site``, ``outcome``, ``time``, ``covariates``,
    ``groups``, ``identifiers``, ``excluded``, ``features``, a ``[panels]``
    table (panel name -> list of columns) and an ``[options]`` table.
    Unknown keys are an error, so that typos do not pass silently; so is an
    option of the wrong type or out of range (``fail_above = "0.7"``).
    ``fail_on`` may be one kind (``"unit_ratio"``) or a list of kinds.

    Raises
    ------
    InputError
        Naming the file and the key, when the file is missing, not TOML, or
        holds an unknown key or a bad value.
    """
    if path is None:
        return FileConfig()
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"{path}: config file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc})") from None
    unknown = set(data) - _ROLE_KEYS - {"options"}
    if unknown:
        raise InputError(f"{path}: unknown key {sorted(unknown)[0]!r}; expected one of {sorted(_ROLE_KEYS | {'options'})}")
    kw: Dict[str, Any] = {}
    for key in ("site", "outcome", "time"):
        if key in data:
            if not isinstance(data[key], str):
                raise InputError(f"{path}: {key!r} must be a column name")
            kw[key] = data[key]
    for key in ("covariates", "groups", "identifiers", "excluded", "features"):
        if key in data:
            kw[key] = _tuple_of_str(data[key], key, path)
    if "panels" in data:
        if not isinstance(data["panels"], dict):
            raise InputError(f"{path}: [panels] must be a table of panel name = [columns]")
        kw["panels"] = {str(k): _tuple_of_str(v, f"panels.{k}", path) for k, v in data["panels"].items()}
    options = data.get("options", {})
    if not isinstance(options, dict):
        raise InputError(f"{path}: [options] must be a table")
    bad = set(options) - _OPTION_KEYS
    if bad:
        raise InputError(f"{path}: unknown option {sorted(bad)[0]!r} in [options]")
    typed: Dict[str, Any] = {}
    for key, value in options.items():
        try:
            typed[key] = check_option(key, value)
        except InputError as exc:
            raise InputError(f"{path}: [options] {exc}") from None
    return FileConfig(roles=RoleSpec(**kw), options=typed, path=path)


def check_option(key: str, value: Any) -> Any:
    """An option's value typed and checked, the same for the config file's ``[options]``, the
    command line and :class:`~sitecheck.scan.ScanOptions`.

    Raises
    ------
    InputError
        Naming the option and the value; its ``option`` is ``key`` (the command line names the flag).

    Examples
    --------
    >>> from sitecheck.reading.config import check_option
    >>> check_option("folds", 3)
    3
    >>> check_option("map_rows", 20)
    Traceback (most recent call last):
    ...
    sitecheck.errors.InputError: map_rows must be at least 100, got 20
    """
    try:
        return _OPTION_CHECKS[key](value)
    except (TypeError, ValueError) as exc:
        msg = str(exc)
        raise InputError(msg if msg.startswith(key) else f"{key} {msg}", option=key) from None


@dataclass(frozen=True)
class RunConfig:
    """Everything a run needs besides the data: roles, scan options, reading options, gates.

    Attributes
    ----------
    roles : RoleSpec
    options : ScanOptions
    gates : Gates
    sep : str or None
        Field separator (None: from the file's extension).
    encoding : str
    path : str or None
        The config file read, if any.
    file_options : dict
        The options the file set, as typed by :func:`load_config`.
    """

    roles: RoleSpec
    options: "ScanOptions"
    gates: Gates = field(default_factory=Gates)
    sep: Optional[str] = None
    encoding: str = "utf-8"
    path: Optional[str] = None
    file_options: Dict[str, Any] = field(default_factory=dict)

    def record(self) -> Dict[str, Any]:
        """What ``report.json``'s ``run.config`` says about the config file."""
        return {"file": self.path} if self.path else {}


def resolve_config(path: Optional[str] = None, *, roles: Optional[RoleSpec] = None,
                   options: Union[None, Mapping[str, Any], "ScanOptions"] = None, sep: Optional[str] = None,
                   encoding: Optional[str] = None, fail_above: Optional[float] = None,
                   fail_on: Any = None) -> RunConfig:
    """Merge explicit settings over a config file: the one loader of the CLI and the Python API.

    Parameters
    ----------
    path : str or None
        TOML config file (see :func:`load_config`); None for none.
    roles : RoleSpec or None
        Roles given explicitly; a field that is not None overrides the file's.
    options : ScanOptions, mapping or None
        Scan options given explicitly. A mapping overrides the keys it names
        (None values are ignored); a :class:`~sitecheck.scan.ScanOptions`
        overrides the fields it sets to other than their default. Everything
        else comes from the file's ``[options]``, then the defaults.
    sep, encoding : str or None
        Reading options; None takes the file's, then the default.
    fail_above, fail_on : optional
        Gates; None takes the file's.

    Returns
    -------
    RunConfig

    Raises
    ------
    InputError
        A problem in the config file (named with its key).
    TypeError, ValueError
        A wrong explicit argument (a programming error, not the user's data).
    """
    from sitecheck.scan import ScanOptions

    cfg = load_config(path)
    if roles is not None and not isinstance(roles, RoleSpec):
        raise TypeError(f"roles must be a RoleSpec, got {type(roles).__name__}")
    merged = (roles or RoleSpec()).merged_over(cfg.roles)
    base = ScanOptions()
    if options is None:
        given: Dict[str, Any] = {}
    elif isinstance(options, ScanOptions):
        given = {f.name: getattr(options, f.name) for f in dataclasses.fields(ScanOptions)
                 if getattr(options, f.name) != getattr(base, f.name)}
    elif isinstance(options, Mapping):
        names = {f.name for f in dataclasses.fields(ScanOptions)}
        unknown = sorted(set(options) - names)
        if unknown:
            raise ValueError(f"unknown scan option {unknown[0]!r}; expected one of {sorted(names)}")
        given = {k: v for k, v in options.items() if v is not None}
    else:
        raise TypeError(f"options must be a ScanOptions, a mapping or None, got {type(options).__name__}")
    kw = {k: cfg.options[k] for k in SCAN_OPTION_KEYS if k in cfg.options}
    kw.update(given)
    scan_options = dataclasses.replace(base, **kw)
    gates = Gates(fail_above=fail_above if fail_above is not None else cfg.options.get("fail_above"),
                  fail_on=fail_on if fail_on else cfg.options.get("fail_on", ()))
    return RunConfig(roles=merged, options=scan_options, gates=gates,
                     sep=sep if sep is not None else cfg.options.get("sep"),
                     encoding=encoding if encoding is not None else cfg.options.get("encoding", "utf-8"),
                     path=path, file_options=dict(cfg.options))
