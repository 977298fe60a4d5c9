"""Run configuration from a TOML file, merged under command-line flags."""
from __future__ import annotations

import sys
from dataclasses import dataclass, field
from typing import Any, Dict, Optional, Tuple

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from sitecheck.errors import InputError
from sitecheck.table.roles import RoleSpec

_ROLE_KEYS = {"site", "outcome", "time", "covariates", "groups", "identifiers", "excluded", "features", "panels"}
_OPTION_KEYS = {"seed", "min_site_rows", "min_cell", "folds", "max_rows", "map_rows", "sep", "encoding",
                "cluster_threshold", "include_datetime", "fail_above", "fail_on", "threshold"}


@dataclass(frozen=True)
class FileConfig:
    """What a config file said: roles and options."""

    roles: RoleSpec = field(default_factory=RoleSpec)
    options: Dict[str, Any] = field(default_factory=dict)


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
    Unknown keys are an error, so that typos do not pass silently.
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
    return FileConfig(roles=RoleSpec(**kw), options=dict(options))
