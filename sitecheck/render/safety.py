"""Output safety: atomic writes confined to one directory, safe file names,
CSV formula neutralisation and small-cell suppression (in one place)."""
from __future__ import annotations

import re
from typing import Any

from sitecheck._files import atomic_write, confined  # noqa: F401  (the one atomic write; re-exported)

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def safe_name(text: str, *, max_len: int = 60) -> str:
    """A file-name fragment from data text: no separators, no dots at the start."""
    s = re.sub(r"[^0-9A-Za-z_-]+", "_", str(text)).strip("_.")
    return (s or "x")[:max_len]


def csv_cell(value: Any) -> Any:
    """Neutralise spreadsheet formulas: prefix text that starts with = + - @ with a quote."""
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        try:
            float(value)
            return value  # a plain negative number is not a formula
        except ValueError:
            return "'" + value
    return value


def suppress_count(n: Any, min_cell: int) -> Any:
    """A count as shown in shared outputs: ``"<min_cell"`` when below the threshold."""
    try:
        k = int(n)
    except (TypeError, ValueError):
        return n
    if 0 < k < min_cell:
        return f"<{min_cell}"
    return k


#: Keys whose integer values are counts of patients or rows.
COUNT_KEYS = frozenset({"n", "count", "rows", "rows_used", "n_missing", "unparsed_count", "n_rows", "n_pos", "n_neg",
                        "cells", "cells_total", "count_elsewhere", "site_rows_without_date",
                        "positives", "negatives", "tp", "fp", "tn", "fn", "k", "cases", "n_events"})

#: Keys whose string values are names from the data or fixed labels, never free text with counts.
NAME_KEYS = frozenset({"name", "column", "feature", "site", "kind", "role", "path", "sha256", "schema",
                       "site_column", "outcome", "verdict", "method", "levels", "features", "members", "test",
                       "cluster", "panel", "model", "format", "severity"})

# Nouns after which an integer in free text counts rows, values or patients ("3 rows", "2 value(s)",
# "appears 4 times"); and the "n = 3" form. Numbers inside quoted names are never touched.
_COUNT_NOUNS = (r"rows?|values?|value\(s\)|cells?|patients?|records?|cases?|attendances?|times|"
                r"positives?|negatives?|events?|observations?|people|persons?|missing|unparsed")
_TEXT_COUNT = re.compile(
    rf"(?<![\w.,\-])(\d+)(?![\d.,]\d)(?=\s+(?:{_COUNT_NOUNS})(?!\w))"   # 3 rows, 2 value(s)
    rf"|(?<=\bn = )(\d+)(?![\d.,]\d)|(?<=\bn=)(\d+)(?![\d.,]\d)"         # n = 3, n=3
    rf"|(?<=\ball )(\d+)(?![\d.,]\d)(?=\s)"                               # all 3 (rows missing)
)
_QUOTED = re.compile(r"'(?:[^'\\]|\\.)*'|\"(?:[^\"\\]|\\.)*\"")


def suppress_text(text: str, min_cell: int) -> str:
    """Free text (warnings, details, reasons) as shown in shared outputs.

    Every integer below ``min_cell`` (and above 0) that counts rows, values or
    patients ("3 rows", "2 value(s)", "appears 4 times", "n = 3", "all 3 rows")
    becomes ``"<min_cell"``. Quoted names from the data (``'Ward 3'``) are left
    as they are.

    Examples
    --------
    >>> suppress_text("site 'Ward 3' has 3 rows, below the minimum of 5", 10)
    "site 'Ward 3' has <10 rows, below the minimum of 5"
    >>> suppress_text("column 'urea': 12 value(s) did not parse", 10)
    "column 'urea': 12 value(s) did not parse"
    """
    if not isinstance(text, str) or not text:
        return text

    def sub(m: re.Match) -> str:
        k = int(next(g for g in m.groups() if g is not None))
        return f"<{min_cell}" if 0 < k < min_cell else m.group(0)

    parts, last = [], 0
    for q in _QUOTED.finditer(text):
        parts.append(_TEXT_COUNT.sub(sub, text[last:q.start()]))
        parts.append(q.group(0))
        last = q.end()
    parts.append(_TEXT_COUNT.sub(sub, text[last:]))
    return "".join(parts)


def shareable_document(doc: Any, *, min_cell: int, small_sites: frozenset = frozenset()) -> Any:
    """A copy of the report document safe to share outside the data enclave.

    Counts (values under :data:`COUNT_KEYS`, per-site row counts, missing-code
    counts and confusion-matrix cells) below ``min_cell`` become ``"<min_cell"``;
    counts written in free text (warnings, details, reasons: any string not
    under :data:`NAME_KEYS`) go through :func:`suppress_text`; any per-site
    entry of a site in ``small_sites`` is replaced by ``"withheld"``. This is
    the single place where small-cell suppression is applied.
    """

    def walk(obj: Any, key: str = "", counts: bool = False) -> Any:
        if isinstance(obj, dict):
            out = {}
            for k, v in obj.items():
                if k in small_sites and k not in ("site",):
                    out[k] = "withheld"
                    continue
                child_counts = counts or k in ("sites", "missing_codes", "dropped_sites", "confusion_matrix",
                                               "site_counts", "counts", "legend_counts", "idioms", "units",
                                               "cells_by_site", "rows_without_date")
                out[k] = walk(v, k, child_counts and not isinstance(v, str))
            return out
        if isinstance(obj, list):
            return [walk(v, key, counts or key == "confusion_matrix") for v in obj]
        if isinstance(obj, bool) or obj is None:
            return obj
        if isinstance(obj, int) and (counts or key in COUNT_KEYS):
            return suppress_count(obj, min_cell)
        if isinstance(obj, str) and key not in NAME_KEYS:
            return suppress_text(obj, min_cell)
        return obj

    out = walk(doc)
    if isinstance(out, dict):
        out["shareable"] = {"min_cell": int(min_cell), "withheld_sites": sorted(small_sites)}
    return out
