"""One way to turn a plain result record into its JSON dictionary.

Most frozen result dataclasses serialise field by field, in the order the fields are declared, with
tuples as lists and numbers as plain Python numbers (sometimes rounded, for stable JSON).
:func:`fields_dict` does that from :func:`dataclasses.fields`, so such a ``to_dict`` is one line and
a new field cannot be forgotten in it. Records whose JSON renames, reorders, adds or leaves out keys
keep a ``to_dict`` of their own.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Callable, Dict, Mapping, Optional

import numpy as np


def plain(value: Any, number: Optional[Callable[[float], Any]] = None) -> Any:
    """``value`` as JSON types: a record with ``to_dict`` as its dictionary, mappings and sequences
    element by element (tuples and arrays as lists), numpy scalars as Python ones, and floats through
    ``number`` when given (for instance :func:`sitecheck.analyses.stats.round_sig`)."""
    if hasattr(value, "to_dict"):
        return value.to_dict()
    if isinstance(value, Mapping):
        return {k: plain(v, number) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v, number) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return number(value) if number is not None else float(value)
    return value


def fields_dict(record: Any, *, number: Optional[Callable[[float], Any]] = None,
                convert: Optional[Callable[[Any], Any]] = None) -> Dict[str, Any]:
    """``{field: value}`` of a dataclass ``record`` in declaration order, each value through
    ``convert`` (default :func:`plain` with ``number``).

    Examples
    --------
    >>> from dataclasses import dataclass
    >>> from sitecheck._records import fields_dict
    >>> @dataclass(frozen=True)
    ... class Gap:
    ...     feature: str
    ...     smd: float
    ...     ci: tuple
    >>> fields_dict(Gap("sodium", 0.123456789, (0.1, 0.2)), number=lambda x: round(x, 3))
    {'feature': 'sodium', 'smd': 0.123, 'ci': [0.1, 0.2]}
    """
    conv = convert if convert is not None else (lambda v: plain(v, number))
    return {f.name: conv(getattr(record, f.name)) for f in dataclasses.fields(record)}
