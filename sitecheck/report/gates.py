"""Gates for pipelines: conditions on a scan's result that make a run fail.

Two gates exist: ``fail_above`` (the lower bound of the site probe's 95% AUC
interval exceeds a threshold) and ``fail_on`` (a fingerprint of a given kind
was found). :func:`check_gates` evaluates them on a result and returns one
:class:`GateFailure` per gate that failed; the command line prints them and
exits 1. Nothing here reads files or prints.

Examples
--------
>>> gates = Gates(fail_above=0.75, fail_on=("unit_ratio",))
>>> doc = {"probe": {"auc_ci": [0.81, 0.86]},
...        "fingerprints": [{"kind": "unit_ratio", "feature": "glucose", "site": "Aldermoor"}]}
>>> [f.gate for f in check_gates(doc, gates)]
['fail_above', 'fail_on']
>>> print(check_gates(doc, gates)[0].message)
site probe AUC lower 95% bound 0.810 exceeds 0.75
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Any, Mapping, Optional, Tuple

from sitecheck._records import fields_dict

#: The kinds of fingerprint (the one list: the detectors in :mod:`sitecheck.analyses.fingerprints`, the gates and
#: the command line read it). Kept here, free of heavy imports, so the command line starts fast.
#: Names are a contract; new kinds are appended (the repair plan's schema reads this list too).
FINGERPRINT_KINDS = ("unit_ratio", "precision", "heaping", "floor", "ceiling", "missing_code", "site_missing",
                     "exclusive_level", "shift", "scale", "censored_below", "censored_above", "number_format",
                     "unit_label")

#: The range a ``fail_above`` threshold may take (an AUC of 0.5 is chance).
FAIL_ABOVE_RANGE = (0.5, 1.0)


def check_fail_above(value: Any) -> Optional[float]:
    """``value`` as a ``fail_above`` threshold: None, or a number in [0.5, 1.0].

    Raises
    ------
    TypeError
        When ``value`` is not a real number (a string such as ``"0.7"`` or a bool).
    ValueError
        When it lies outside [0.5, 1.0] or is not finite.
    """
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"fail_above must be a number between {FAIL_ABOVE_RANGE[0]} and {FAIL_ABOVE_RANGE[1]}, "
                        f"got {value!r} ({type(value).__name__})")
    v = float(value)
    if not math.isfinite(v) or not FAIL_ABOVE_RANGE[0] <= v <= FAIL_ABOVE_RANGE[1]:
        raise ValueError(f"fail_above must lie between {FAIL_ABOVE_RANGE[0]} and {FAIL_ABOVE_RANGE[1]}, got {value!r}")
    return v


def check_fail_on(value: Any) -> Tuple[str, ...]:
    """``value`` as ``fail_on`` kinds: one kind name or a list of them, each a fingerprint kind.

    Raises
    ------
    TypeError
        When ``value`` is neither a string nor a list (or tuple) of strings.
    ValueError
        When a name is not one of :data:`FINGERPRINT_KINDS`.
    """
    if value is None:
        return ()
    if isinstance(value, str):
        value = (value,)
    if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
        raise TypeError(f"fail_on must be a fingerprint kind or a list of kinds, got {value!r}")
    for kind in value:
        if kind not in FINGERPRINT_KINDS:
            raise ValueError(f"unknown fingerprint kind {kind!r}; choose from {', '.join(FINGERPRINT_KINDS)}")
    return tuple(dict.fromkeys(value))


@dataclass(frozen=True)
class Gates:
    """The gates of a run.

    Parameters
    ----------
    fail_above : float or None, default None
        Fail when the lower bound of the site probe's 95% AUC interval exceeds
        this value (0.5 to 1.0).
    fail_on : tuple of str, default ()
        Fail when a fingerprint of any of these kinds is found (one of
        :data:`FINGERPRINT_KINDS`). A single string is taken as one kind.
    """

    fail_above: Optional[float] = None
    fail_on: Tuple[str, ...] = ()

    def __post_init__(self):
        object.__setattr__(self, "fail_above", check_fail_above(self.fail_above))
        object.__setattr__(self, "fail_on", check_fail_on(self.fail_on))

    @property
    def active(self) -> bool:
        return self.fail_above is not None or bool(self.fail_on)


@dataclass(frozen=True)
class GateFailure:
    """One gate that failed.

    Attributes
    ----------
    gate : {"fail_above", "fail_on"}
    setting : float or str
        The threshold (``fail_above``) or the fingerprint kind (``fail_on``).
    message : str
        What was found, in one line (names features and sites, not command-line flags).
    count : int
        How many findings failed the gate (1 for ``fail_above``).
    """

    gate: str
    setting: Any
    message: str
    count: int = 1

    def to_dict(self) -> dict:
        return fields_dict(self)


def check_gates(result: Any, gates: Gates) -> Tuple[GateFailure, ...]:
    """Evaluate ``gates`` on a scan result.

    Parameters
    ----------
    result : ScanResult or dict
        A scan's result, or its ``report.json`` document (``ScanResult.to_dict()``).
    gates : Gates

    Returns
    -------
    tuple of GateFailure
        One per failed gate, ``fail_above`` first, then each ``fail_on`` kind in
        the order given; empty when every gate passes. A gate whose section is
        absent (no probe, no fingerprints) passes.
    """
    if not isinstance(gates, Gates):
        raise TypeError(f"gates must be a Gates, got {type(gates).__name__}")
    doc: Mapping[str, Any] = result.to_dict() if hasattr(result, "to_dict") else result
    if not isinstance(doc, Mapping):
        raise TypeError(f"result must be a ScanResult or its document, got {type(result).__name__}")
    failed = []
    probe = doc.get("probe")
    if gates.fail_above is not None and isinstance(probe, Mapping) and probe.get("auc_ci"):
        lo = probe["auc_ci"][0]
        if isinstance(lo, numbers.Real) and lo > gates.fail_above:
            failed.append(GateFailure("fail_above", gates.fail_above,
                                      f"site probe AUC lower 95% bound {lo:.3f} exceeds {gates.fail_above:g}"))
    found = [f for f in (doc.get("fingerprints") or []) if isinstance(f, Mapping)]
    for kind in gates.fail_on:
        hits = [f for f in found if f.get("kind") == kind]
        if hits:
            where = ", ".join(f"{h.get('feature')!r} at site {h.get('site')!r}" for h in hits[:5])
            more = f" and {len(hits) - 5} more" if len(hits) > 5 else ""
            failed.append(GateFailure("fail_on", kind, f"{len(hits)} {kind} fingerprint(s): {where}{more}",
                                      count=len(hits)))
    return tuple(failed)


__all__ = ["FINGERPRINT_KINDS", "GateFailure", "Gates", "check_fail_above", "check_fail_on", "check_gates"]

