"""Formatting of numbers for the report: fixed decimals, no "-0.000", p-values with their floor.

Formatting only: every value comes from the report document.
"""
from __future__ import annotations

from typing import Any, Optional

from sitecheck.analyses.stats import at_permutation_floor  # the one rule for "at the floor"

DASH = "–"


def _is_num(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def num(value: Any, digits: int = 3) -> str:
    """A number with fixed decimals; "–" for missing; strings (such as a suppressed
    count "<10" or "withheld") pass through. A value that rounds to zero prints
    without a minus sign."""
    if value is None or isinstance(value, bool):
        return DASH
    if _is_num(value):
        if value != value:  # NaN
            return DASH
        s = f"{value:.{digits}f}"
        if s.startswith("-") and float(s) == 0.0:
            s = s[1:]
        return s
    return str(value)


def signed(value: Any, digits: int = 3) -> str:
    """Like :func:`num` with an explicit "+" on positive values."""
    s = num(value, digits)
    if _is_num(value) and not s.startswith("-") and float(s) != 0.0:
        return "+" + s
    return s


def ci(pair: Any, digits: int = 3) -> str:
    """An interval "low to high" (fixed decimals), or "–"."""
    if not pair or not isinstance(pair, (list, tuple)) or len(pair) < 2 or pair[0] is None or pair[1] is None:
        return DASH
    return f"{num(pair[0], digits)} to {num(pair[1], digits)}"


def pval(value: Any, floor: Optional[float] = None) -> str:
    """A p-value for a table cell.

    At (or below) ``floor``, the smallest value the permutation test can give,
    it reads "≤ floor": the test cannot say more. Otherwise "< 0.001" below
    0.001, else three decimals (two significant digits under 0.01)."""
    if value is None or isinstance(value, bool):
        return DASH
    if not _is_num(value):
        return str(value)
    if at_permutation_floor(value, floor):
        return f"≤ {floor:.2g}"
    if value < 0.001:
        return "< 0.001"
    if value < 0.01:
        return f"{value:.2g}"
    return f"{value:.3f}"


def p_is(value: Any, floor: Optional[float] = None) -> str:
    """A p-value in prose: "p = 0.012", "p < 0.001" or "p ≤ 0.0027" (never "p = < 0.001")."""
    s = pval(value, floor)
    if s == DASH:
        return "p not computed"
    if s[:1] in ("<", "≤"):
        return f"p {s}"
    return f"p = {s}"


def count(value: Any) -> str:
    """A count (possibly already suppressed to a string such as "<10")."""
    if value is None or isinstance(value, bool):
        return DASH
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float) and value.is_integer():
        return f"{int(value):,}"
    return str(value)


def pct(value: Any, digits: int = 0) -> str:
    """A share 0..1 as a percentage."""
    if not _is_num(value):
        return DASH if value is None else str(value)
    return f"{100 * value:.{digits}f}%"


def excludes_zero(pair: Any) -> bool:
    """Whether an interval lies wholly above 0 (read from the document, not computed)."""
    return bool(pair) and isinstance(pair, (list, tuple)) and _is_num(pair[0]) and pair[0] > 0
