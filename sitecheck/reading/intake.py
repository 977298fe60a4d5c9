"""Reading pooled tables: file formats, missing-value codes, type coercion.

This module knows nothing of models or roles. :func:`read_table` returns a
:class:`RawTable` whose frame has one pandas column per input column, with
numeric columns as ``float64``, datetimes as ``datetime64[ns]`` and everything
else as ``object`` strings (missing values as ``None``/``NaN``). Alongside it
come per-column notes: which missing-value codes were seen and which values
failed numeric coercion.
"""
from __future__ import annotations

import codecs
import csv
import gzip
import io
import os
import warnings
from dataclasses import dataclass, field
from typing import Dict, List, Optional, Tuple

import numpy as np
import pandas as pd

from sitecheck.errors import InputError

#: Text read as missing, compared after stripping white space. Matching is
#: case-insensitive for the alphabetic codes.
MISSING_CODES = ("", "NA", "N/A", "NaN", "null", ".", "-")
_MISSING_LOWER = {c.lower(): c for c in MISSING_CODES}

#: Share of non-missing values that must parse as numbers before a text
#: column is coerced to numeric.
COERCE_SHARE = 0.95
#: A text column whose values are at least this share dates is read as dates (the rest, such as
#: ranges "09/20/2011 - 10/28/2011", become missing and are reported as unparsed): left as text it
#: would be a categorical feature with a level per day.
DATE_SHARE = 0.80

#: Magnitude beyond which a number is not read as a measurement (its square overflows float64):
#: such values, and infinities, are read as missing and listed with the missing-value codes.
MAX_MAGNITUDE = 1e150


def _non_measurements(values: np.ndarray, codes: Dict[str, int]) -> Tuple[np.ndarray, int]:
    """Replace infinite values and values beyond :data:`MAX_MAGNITUDE` by NaN; count them in ``codes``."""
    with np.errstate(invalid="ignore"):
        inf = np.isinf(values)
        huge = ~inf & (np.abs(values) > MAX_MAGNITUDE)
    n_inf, n_huge = int(inf.sum()), int(huge.sum())
    if not (n_inf or n_huge):
        return values, 0
    values = np.where(inf | huge, np.nan, values)
    if n_inf:
        codes["inf"] = codes.get("inf", 0) + n_inf
    if n_huge:
        key = f"beyond +/-{MAX_MAGNITUDE:g}"
        codes[key] = codes.get(key, 0) + n_huge
    return values, n_inf + n_huge

_EXTENSIONS = {
    ".csv": "csv",
    ".tsv": "tsv",
    ".tab": "tsv",
    ".txt": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv.gz": "csv.gz",
    ".tsv.gz": "tsv.gz",
}


@dataclass(frozen=True)
class ColumnIntake:
    """What intake learnt about one column.

    Attributes
    ----------
    name : str
    storage : str
        ``"numeric"``, ``"datetime"`` or ``"text"`` after coercion.
    missing_codes : dict
        Missing-value code -> count of cells that used it.
    n_missing : int
    coerced : bool
        True when a text column was converted to numbers.
    unparsed_count : int
        Values that did not parse during coercion (set to missing).
    unparsed_examples : tuple of str
        Up to three distinct such values.
    idioms : dict
        Lab-export idiom -> cells that used it (see :data:`IDIOMS`), for a text
        column read as numbers.
    """

    name: str
    storage: str
    missing_codes: Dict[str, int]
    n_missing: int
    coerced: bool = False
    unparsed_count: int = 0
    unparsed_examples: Tuple[str, ...] = ()
    idioms: Dict[str, int] = field(default_factory=dict)
    #: For text read as dates: the text as written (None where missing), so that a time column can be
    #: parsed again site by site (sites may write dates differently). Not part of ``to_dict``.
    text: Optional[np.ndarray] = field(default=None, compare=False, repr=False)

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "storage": self.storage,
            "missing_codes": dict(self.missing_codes),
            "n_missing": int(self.n_missing),
            "coerced": bool(self.coerced),
            "unparsed_count": int(self.unparsed_count),
            "unparsed_examples": list(self.unparsed_examples),
            "idioms": dict(self.idioms),
        }


@dataclass(frozen=True)
class CellNotes:
    """Per-cell notes of a column read with lab-export idioms.

    Attributes
    ----------
    idiom : numpy.ndarray of uint8
        Bit mask per row of :data:`IDIOM_BITS` (0: a plain number, missing or text).
    censor : numpy.ndarray of int8
        -1 censored below (``<5``: the value holds the limit 5), +1 censored
        above (``>20``), 0 otherwise.
    unit : numpy.ndarray of int16
        Index into ``unit_levels`` of the unit written after the number, -1 for none.
    unit_levels : tuple of str
    """

    idiom: np.ndarray
    censor: np.ndarray
    unit: np.ndarray
    unit_levels: Tuple[str, ...] = ()

    def take(self, rows: np.ndarray) -> "CellNotes":
        """The notes of a subset of rows (a boolean mask or indices)."""
        return CellNotes(self.idiom[rows], self.censor[rows], self.unit[rows], self.unit_levels)


@dataclass(frozen=True)
class RawTable:
    """A table as read from disk, before roles are assigned.

    ``cells`` holds :class:`CellNotes` for the columns read as numbers whose
    cells used a lab-export idiom (censoring, decimal comma, unit, separators).
    """

    frame: pd.DataFrame
    path: str
    format: str
    sha256: str
    columns: Tuple[ColumnIntake, ...] = field(default_factory=tuple)
    cells: Dict[str, CellNotes] = field(default_factory=dict)

    def column(self, name: str) -> ColumnIntake:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)


def detect_format(path: str) -> str:
    """Return the file format implied by the extension of ``path``."""
    low = path.lower()
    for ext in sorted(_EXTENSIONS, key=len, reverse=True):
        if low.endswith(ext):
            return _EXTENSIONS[ext]
    if low.endswith(".gz"):
        return "csv.gz"
    raise InputError(
        f"{path}: unknown file extension; expected one of "
        ".csv, .tsv, .csv.gz, .tsv.gz, .parquet"
    )


def file_sha256(path: str) -> str:
    """SHA-256 of the file's bytes, read in chunks."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _check_encoding(path: str, compressed: bool, encoding: str) -> None:
    """Raise InputError naming the byte offset of the first undecodable byte."""
    try:
        decoder = codecs.getincrementaldecoder(encoding)(errors="strict")
    except LookupError:
        raise InputError(f"{encoding!r} is not a known text encoding", option="encoding") from None
    opener = gzip.open if compressed else open
    offset = 0
    try:
        with opener(path, "rb") as fh:
            while True:
                chunk = fh.read(1 << 20)
                if not chunk:
                    decoder.decode(b"", final=True)
                    break
                try:
                    decoder.decode(chunk)
                except UnicodeDecodeError as exc:
                    pos = offset + exc.start
                    raise InputError(
                        f"{path}: byte 0x{chunk[exc.start]:02x} at offset {pos} is not valid "
                        f"{encoding}; give the file's encoding (for example latin-1)", option="encoding"
                    ) from None
                offset += len(chunk)
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise InputError(f"{path}: cannot be read ({exc})") from None


def _read_header(path: str, compressed: bool, sep: str, encoding: str) -> List[str]:
    opener = gzip.open if compressed else open
    try:
        with opener(path, "rt", encoding=encoding, newline="") as fh:
            reader = csv.reader(fh, delimiter=sep)
            for row in reader:
                return row
    except (OSError, EOFError, gzip.BadGzipFile, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot be read ({exc})") from None
    except csv.Error as exc:
        raise InputError(f"{path}: malformed header line ({exc})") from None
    return []


def _check_header(path: str, names: List[str]) -> None:
    if not names or all(not str(n).strip() for n in names):
        raise InputError(f"{path}: the file is empty (no header line)")
    seen: Dict[str, int] = {}
    for n in names:
        seen[n] = seen.get(n, 0) + 1
    dup = [n for n, k in seen.items() if k > 1]
    if dup:
        raise InputError(f"{path}: duplicate column name {dup[0]!r}; column names must be unique")


def _read_text_columns(path: str, fmt: str, sep: Optional[str], encoding: str):
    """Read a delimited file with every column as Arrow text (no NA conversion).

    Returns ({name: pyarrow.ChunkedArray}, names)."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    compressed = fmt.endswith(".gz")
    if sep is None:
        sep = "\t" if fmt.startswith("tsv") else ","
    if len(sep) != 1:
        raise InputError(f"the field separator must be a single character, got {sep!r}", option="sep")
    enc_norm = codecs.lookup(encoding).name if _known(encoding) else encoding
    if enc_norm in ("utf-8", "utf_8"):
        _check_encoding(path, compressed, "utf-8")
    else:
        _check_encoding(path, compressed, encoding)
    names = _read_header(path, compressed, sep, encoding)
    _check_header(path, names)
    try:
        stream = pa.input_stream(path, compression="gzip" if compressed else None)
        table = pacsv.read_csv(
            stream,
            read_options=pacsv.ReadOptions(
                encoding=encoding, autogenerate_column_names=True, skip_rows=1
            ),
            parse_options=pacsv.ParseOptions(delimiter=sep, newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(
                column_types={f"f{i}": pa.string() for i in range(len(names))},
                strings_can_be_null=False,
                quoted_strings_can_be_null=False,
            ),
        )
    except pa.ArrowInvalid as exc:
        msg = str(exc).splitlines()[0]
        if "Empty CSV file" in msg:
            raise InputError(f"{path}: the file has a header but no data rows") from None
        raise InputError(f"{path}: cannot be parsed as delimited text ({msg})") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc})") from None
    if table.num_columns != len(names):
        raise InputError(
            f"{path}: header has {len(names)} columns but rows have {table.num_columns}; check the field separator",
            option="sep")
    if table.num_rows == 0:
        raise InputError(f"{path}: the file has a header but no data rows")
    return {name: table.column(i) for i, name in enumerate(names)}, names


def _known(encoding: str) -> bool:
    try:
        codecs.lookup(encoding)
        return True
    except LookupError:
        return False


def _read_parquet(path: str) -> pd.DataFrame:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except (pa.ArrowInvalid, OSError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot be read as Parquet ({msg})") from None
    names = list(table.column_names)
    _check_header(path, names)
    if table.num_rows == 0:
        raise InputError(f"{path}: the file has no data rows")
    data = {}
    for i, name in enumerate(names):
        col = table.column(i)
        t = col.type
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t) or pa.types.is_decimal(t):
            arr = col.to_numpy(zero_copy_only=False)
            data[name] = pd.to_numeric(pd.Series(arr), errors="coerce").astype("float64").to_numpy()
        elif pa.types.is_timestamp(t) or pa.types.is_date(t):
            data[name] = pd.to_datetime(pd.Series(col.to_pandas()), errors="coerce").to_numpy()
        else:
            arr = col.to_numpy(zero_copy_only=False).astype(object)
            arr = np.array([None if v is None else str(v) for v in arr], dtype=object)
            data[name] = arr
    return pd.DataFrame(data, columns=names)


def _classify_missing(values: np.ndarray) -> Tuple[np.ndarray, Dict[str, int]]:
    """Return a missing mask and a count per missing code for a text column."""
    s = pd.Series(values, dtype=object)
    isnull = s.isna().to_numpy()
    stripped = s.where(~isnull, "").astype(str).str.strip()
    lower = stripped.str.lower()
    mask = lower.isin(list(_MISSING_LOWER)).to_numpy() | isnull
    codes: Dict[str, int] = {}
    if mask.any():
        vc = stripped[mask & ~isnull].value_counts()
        for raw, n in vc.items():
            key = _MISSING_LOWER.get(raw.lower(), raw)
            codes[key] = codes.get(key, 0) + int(n)
        if isnull.any():
            codes["(null)"] = codes.get("(null)", 0) + int(isnull.sum())
    return mask, codes


def _looks_datetime(values: pd.Series) -> Optional[pd.Series]:
    """Parse text as datetimes when nearly all values do; else None."""
    sample = values.iloc[: min(len(values), 200)]
    # Cheap screen: dates contain '-', '/' or ':' and at least one digit.
    if not sample.str.contains(r"\d", regex=True).all():
        return None
    if not sample.str.contains(r"[-/:]", regex=True).mean() >= 0.95:
        return None
    if sample.str.fullmatch(r"[+-]?\d+(\.\d*)?([eE][+-]?\d+)?").mean() > 0.5:
        return None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            parsed = pd.to_datetime(values, errors="coerce", format="mixed")
        except (ValueError, TypeError):
            return None
    if parsed.notna().mean() >= DATE_SHARE:
        return parsed
    return None


def _text_or_datetime(name: str, values: np.ndarray, mask: np.ndarray, codes: Dict[str, int],
                      present: pd.Series) -> Tuple[np.ndarray, ColumnIntake]:
    """The fallback of a text column that is not numeric: datetimes, else text."""
    n_missing = int(mask.sum())
    parsed = _looks_datetime(present)
    if parsed is not None:
        out = pd.Series(pd.NaT, index=range(len(values)), dtype="datetime64[ns]")
        out[~mask] = parsed.astype("datetime64[ns]").to_numpy()
        bad = present[parsed.isna().to_numpy()]
        examples = tuple(pd.unique(bad.to_numpy())[:3].tolist())
        text = np.full(len(values), None, dtype=object)
        text[np.flatnonzero(~mask)] = present.to_numpy(dtype=object)
        return out.to_numpy(), ColumnIntake(
            name, "datetime", codes, n_missing + int(parsed.isna().sum()),
            coerced=True, unparsed_count=int(parsed.isna().sum()), unparsed_examples=examples, text=text,
        )
    out = np.empty(len(values), dtype=object)
    out[:] = None
    out[np.flatnonzero(~mask)] = present.to_numpy(dtype=object)
    return out, ColumnIntake(name, "text", codes, n_missing)


def _coerce_column(name: str, values: np.ndarray, groups: Optional[np.ndarray] = None
                   ) -> Tuple[np.ndarray, ColumnIntake, Optional[CellNotes]]:
    """Intake rules on one in-memory column (Parquet, DataFrame): text goes through
    :func:`_coerce_arrow`."""
    if values.dtype.kind == "f":
        n_missing = int(np.isnan(values).sum())
        codes = {"(null)": n_missing} if n_missing else {}
        values, n_out = _non_measurements(values, codes)
        return values, ColumnIntake(name, "numeric", codes, n_missing + n_out), None
    if values.dtype.kind == "M":
        n_missing = int(pd.isna(values).sum())
        return values, ColumnIntake(name, "datetime", {"(null)": n_missing} if n_missing else {}, n_missing), None
    import pyarrow as pa

    s = pd.Series(values, dtype=object)
    s = s.where(s.isna() | s.map(type).eq(str), s.astype(str))
    return _coerce_arrow(name, pa.array(s.to_numpy(dtype=object), type=pa.string(), from_pandas=True), groups)


_NUMERIC_RE = r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$"

#: Lab-export idioms read by intake, with their bit in :attr:`CellNotes.idiom`.
#: ``ambiguous_comma`` cells (``1,234`` where neither reading is evident) are not parsed.
IDIOM_BITS = {"censored_below": 1, "censored_above": 2, "decimal_comma": 4, "unit_suffix": 8,
              "thousands_separator": 16, "whitespace": 32, "ambiguous_comma": 64}
IDIOMS = tuple(IDIOM_BITS)

# A cell: optional comparison prefix, a number (digits with '.', ',', spaces or
# apostrophes), an optional unit. Parts are checked below; RE2 syntax (pyarrow).
_CELL_RE = (r"^(?P<op><=|>=|=<|=>|<|>|\x{2264}|\x{2265})?\s*"
            r"(?P<num>[+-]?[0-9.,'\x{00a0}\x{202f}\x{2009} ]*[0-9])\s*"
            r"(?P<unit>[^\s0-9.,+-][^\s]*(?:\s?/\s?[A-Za-z0-9]+)?)?$")
#: Units a number may carry (case-insensitive): concentrations, counts, pressures,
#: lengths, masses, temperatures (common practice in laboratory reports; no single source).
_UNIT_RE = (r"(?i)^(?:%|[munpfkµμ]?(?:g|mol|eq|iu|u|kat)(?:/(?:[dcmµμnp]?l|kg|g|24 ?h|h|hr|min|d|day|"
            r"[munpµμ]?mol))?|[munpfµμ]?l|mmhg|kpa|cm|mm|m|kg|lbs?|in|bpm|/min|\x{00b0}c|\x{00b0}f|deg ?[cf]|"
            r"fl|pg|sec|s|x ?10\^?[0-9]+/l|10\^?[0-9]+/l|/[uµμn]?l|cells/[uµμ]?l|mosm/kg|mm/h(?:r)?|"
            r"[munpµμ]?(?:mol|g)/(?:[dcmµμ]?l|kg))$")
_COMMA1 = r"^[+-]?[0-9]*,[0-9]+$"                    # one comma: 4,2 or 1,234
_TH3 = r"^[+-]?[0-9]{1,3},[0-9]{3}$"                 # either reading: 1,234
_TH_COMMA = r"^[+-]?[0-9]{1,3}(?:(?:,[0-9]{3}){2,}(?:\.[0-9]+)?|,[0-9]{3}\.[0-9]+)$"  # 1,234,567 / 1,234.5
_TH_SPACE = r"^[+-]?[0-9]{1,3}(?:['\x{00a0}\x{202f}\x{2009} ][0-9]{3})+(?:[.,][0-9]+)?$"  # 1 234 / 1'234,5
_TH_DOT = r"^[+-]?[0-9]{1,3}(?:\.[0-9]{3})+,[0-9]+$"  # 1.234,5


def _np_bool(arr) -> np.ndarray:
    import pyarrow.compute as pc

    return np.asarray(pc.fill_null(arr, False).to_numpy(zero_copy_only=False), dtype=bool)


def parse_idioms(trimmed, groups: Optional[np.ndarray] = None):
    """Read lab-export numbers in text cells, vectorised (pyarrow.compute).

    Parameters
    ----------
    trimmed : pyarrow.StringArray
        Cells with surrounding white space removed (not missing codes).
    groups : numpy.ndarray of int, optional
        Site code per cell; decimal-comma and thousands decisions are made per
        site (one group when None).

    Returns
    -------
    values : numpy.ndarray of float64
        The number of each cell; NaN where the cell is not a number.
    idiom : numpy.ndarray of uint8
        Bits of :data:`IDIOM_BITS` (``whitespace`` is set by the caller).
    censor : numpy.ndarray of int8
        -1 below a limit (``<5``, ``<=0.1``, ``≤``), +1 above (``>20``, ``>=1000``, ``≥``), else 0.
    unit : numpy.ndarray of int16
        Index into ``unit_levels``; -1 without a unit.
    unit_levels : tuple of str

    Notes
    -----
    A comma is a decimal separator at a site when the column has no comma
    thousands grouping anywhere (``1,234,567``, ``1,234.5``) and the site writes
    at least one comma number that cannot be a thousands group (``4,2``); then
    ``1,234`` at that site reads 1.234 when the site writes no decimal points. A
    ``1,234`` is a thousands group when the column groups thousands elsewhere or
    the site writes decimal points; otherwise it is left unparsed
    (``ambiguous_comma``). Spaces, no-break spaces and apostrophes between groups
    of three digits are thousands separators. A unit is kept only when it reads as
    a unit (``mmol/L``, ``mg/dL``, ``%``, ...), so codes such as ``12A`` stay text.

    Examples
    --------
    >>> import pyarrow as pa
    >>> v, idiom, censor, unit, levels = parse_idioms(pa.array(["<5", "4,2", "4.2 mmol/L", "1 234", "x"]))
    >>> v.tolist()[:4], censor.tolist(), levels
    ([5.0, 4.2, 4.2, 1234.0], [-1, 0, 0, 0, 0], ('mmol/L',))
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    n = len(trimmed)
    g = np.zeros(n, dtype=np.int64) if groups is None else np.asarray(groups, dtype=np.int64)
    if g.size and g.min() < 0:
        g = g - g.min()
    n_groups = int(g.max()) + 1 if n else 1
    values = np.full(n, np.nan)
    idiom = np.zeros(n, dtype=np.uint8)
    censor = np.zeros(n, dtype=np.int8)
    unit = np.full(n, -1, dtype=np.int16)
    plain = _np_bool(pc.match_substring_regex(trimmed, _NUMERIC_RE))
    if plain.any():
        values[plain] = np.asarray(pc.cast(pc.filter(trimmed, pa.array(plain)), pa.float64())
                                   .to_numpy(zero_copy_only=False), dtype=np.float64)
    rest = np.flatnonzero(~plain)
    if rest.size == 0:
        return values, idiom, censor, unit, ()
    sub = pc.take(trimmed, pa.array(rest))
    parts = pc.extract_regex(sub, _CELL_RE)
    matched = _np_bool(pc.is_valid(parts))
    if not matched.any():
        return values, idiom, censor, unit, ()
    rest, parts = rest[matched], pc.filter(parts, pa.array(matched))
    op = pc.struct_field(parts, [0])
    num = pc.utf8_trim_whitespace(pc.struct_field(parts, [1]))
    u = pc.struct_field(parts, [2])
    has_unit = _np_bool(pc.not_equal(u, ""))
    unit_ok = ~has_unit | _np_bool(pc.match_substring_regex(u, _UNIT_RE))
    m = lambda pat: _np_bool(pc.match_substring_regex(num, pat))  # noqa: E731
    is_plain, comma1, th3 = m(_NUMERIC_RE), m(_COMMA1), m(_TH3)
    th_comma, th_space, th_dot = m(_TH_COMMA), m(_TH_SPACE), m(_TH_DOT)
    gs = g[rest]
    # -- per-site decisions on the comma ---------------------------------------
    col_thousands = bool(th_comma.any())
    dec_evidence = np.bincount(gs[comma1 & ~th3], minlength=n_groups) > 0
    dot_cells = plain & _np_bool(pc.match_substring(trimmed, "."))
    site_dot = np.bincount(g[dot_cells], minlength=n_groups) > 0
    site_dot |= np.bincount(gs[is_plain & _np_bool(pc.match_substring(num, "."))], minlength=n_groups) > 0
    site_dec = dec_evidence & (not col_thousands)
    dec = comma1 & site_dec[gs] & (~th3 | ~site_dot[gs])
    thousands_c = th_comma | (th3 & ~site_dec[gs] & (site_dot[gs] | col_thousands))
    ambiguous = comma1 & ~dec & ~thousands_c
    space_frac_comma = th_space & _np_bool(pc.match_substring(num, ","))
    ok = (is_plain | dec | thousands_c | th_space | th_dot) & unit_ok
    # -- the number as a plain decimal string ---------------------------------
    text = num
    text = pc.if_else(pa.array(thousands_c), pc.replace_substring(text, ",", ""), text)
    text = pc.if_else(pa.array(th_space), pc.replace_substring_regex(text, r"['\x{00a0}\x{202f}\x{2009} ]", ""), text)
    text = pc.if_else(pa.array(th_dot), pc.replace_substring(text, ".", ""), text)
    text = pc.if_else(pa.array(dec | th_space | th_dot), pc.replace_substring(text, ",", "."), text)
    text = pc.if_else(pa.array(ok), text, pa.scalar(None, pa.string()))
    parsed = np.asarray(pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
    values[rest[ok]] = parsed[ok]
    opv = np.asarray(op.to_numpy(zero_copy_only=False), dtype=object)
    below = ok & np.isin(opv, ["<", "<=", "=<", "\u2264"])
    above = ok & np.isin(opv, [">", ">=", "=>", "\u2265"])
    censor[rest[below]], censor[rest[above]] = -1, 1
    bits = (below * IDIOM_BITS["censored_below"] + above * IDIOM_BITS["censored_above"]
            + (ok & (dec | th_dot | space_frac_comma)) * IDIOM_BITS["decimal_comma"]
            + (ok & has_unit) * IDIOM_BITS["unit_suffix"]
            + (ok & (thousands_c | th_space | th_dot)) * IDIOM_BITS["thousands_separator"]
            + (ambiguous & unit_ok) * IDIOM_BITS["ambiguous_comma"])
    idiom[rest] = bits.astype(np.uint8)
    levels: Tuple[str, ...] = ()
    if (ok & has_unit).any():
        keep = ok & has_unit
        enc = pc.dictionary_encode(pc.filter(u, pa.array(keep)))
        levels = tuple(str(x) for x in enc.dictionary.to_pylist())
        unit[rest[keep]] = np.asarray(enc.indices.to_numpy(zero_copy_only=False), dtype=np.int16)
    return values, idiom, censor, unit, levels


def _coerce_arrow(name: str, col, groups: Optional[np.ndarray] = None
                  ) -> Tuple[np.ndarray, ColumnIntake, Optional[CellNotes]]:
    """Intake rules on an Arrow string column, vectorised with pyarrow.compute.

    Missing codes first, then lab-export idioms (:func:`parse_idioms`), then the
    95% rule: the column is numeric when at least :data:`COERCE_SHARE` of its
    non-missing cells read as numbers. Numeric columns never become Python objects
    (the 1M-row path).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    nulls = col.is_null()
    filled = pc.fill_null(col, "")
    trimmed = pc.utf8_trim_whitespace(filled)
    lower = pc.utf8_lower(trimmed)
    is_code = pc.is_in(lower, value_set=pa.array(list(_MISSING_LOWER)))
    is_code = pc.or_(is_code, nulls)
    codes: Dict[str, int] = {}
    n_code = pc.sum(is_code).as_py() or 0
    if n_code:
        vc = pc.value_counts(pc.filter(trimmed, pc.and_(is_code, pc.invert(nulls))))
        for item in vc.to_pylist():
            key = _MISSING_LOWER.get(item["values"].lower(), item["values"])
            codes[key] = codes.get(key, 0) + int(item["counts"])
        n_null = pc.sum(nulls).as_py() or 0
        if n_null:
            codes["(null)"] = codes.get("(null)", 0) + int(n_null)
    present_np = ~_np_bool(is_code)
    n_present = int(present_np.sum())
    if n_present == 0:
        return np.full(len(col), np.nan), ColumnIntake(name, "numeric", codes, int(n_code)), None
    cells = pc.if_else(pa.array(present_np), trimmed, pa.scalar(None, pa.string()))
    values, idiom, censor, unit, levels = parse_idioms(cells, groups)
    is_num = present_np & ~np.isnan(values)
    n_num = int(is_num.sum())
    if n_num / n_present >= COERCE_SHARE:
        values[~is_num] = np.nan
        values, n_out = _non_measurements(values, codes)
        n_code += n_out
        n_bad = n_present - n_num
        examples: Tuple[str, ...] = ()
        if n_bad:
            examples = tuple(pc.unique(pc.filter(trimmed, pa.array(present_np & ~is_num))).to_pylist()[:3])
        notes = None
        if idiom.any():
            spaced = _np_bool(pc.not_equal(pc.utf8_length(filled), pc.utf8_length(trimmed)))
            idiom |= ((spaced & is_num) * IDIOM_BITS["whitespace"]).astype(np.uint8)
            notes = CellNotes(idiom, censor, unit, levels)
        else:
            spaced = _np_bool(pc.not_equal(pc.utf8_length(filled), pc.utf8_length(trimmed))) & is_num
            if spaced.any():
                notes = CellNotes((spaced * IDIOM_BITS["whitespace"]).astype(np.uint8), censor, unit, levels)
        totals = {}
        if notes is not None:
            for key, bit in IDIOM_BITS.items():
                cnt = int(np.count_nonzero(notes.idiom & bit))
                if cnt:
                    totals[key] = cnt
        return values, ColumnIntake(name, "numeric", codes, int(n_code + n_bad), coerced=True,
                                    unparsed_count=int(n_bad), unparsed_examples=examples,
                                    idioms=totals), notes
    obj = col.to_numpy(zero_copy_only=False).astype(object)
    mask = ~present_np
    present = pd.Series(np.asarray(trimmed.to_numpy(zero_copy_only=False), dtype=object)[present_np])
    out, info = _text_or_datetime(name, obj, mask, codes, present)
    return out, info, None


def site_groups(values, site: Optional[str] = None) -> Optional[np.ndarray]:
    """Integer site code per row from a raw site column (text as written, stripped)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if values is None:
        return None
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        enc = pc.dictionary_encode(pc.utf8_trim_whitespace(pc.fill_null(values, "")))
        if isinstance(enc, pa.ChunkedArray):
            enc = enc.combine_chunks()
        return np.asarray(enc.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
    codes, _ = pd.factorize(pd.Series(values).astype(str).str.strip())
    return codes.astype(np.int64)


def read_table(
    path: str,
    *,
    sep: Optional[str] = None,
    encoding: str = "utf-8",
    site: Optional[str] = None,
) -> RawTable:
    """Read a CSV, TSV, gzip-compressed CSV/TSV or Parquet file.

    Parameters
    ----------
    path : str
        The file. The format is chosen by extension.
    sep : str, optional
        Field separator for delimited text; overrides the extension's default.
    encoding : str, default "utf-8"
        Text encoding of delimited files.
    site : str, optional
        The site column: lab-export idioms (decimal commas, thousands separators)
        are decided site by site (:func:`parse_idioms`). Without it, or when the
        column is absent, the whole table counts as one site.

    Returns
    -------
    RawTable
        Coerced frame, per-column intake notes and per-cell idiom notes. The input
        file is only read.

    Raises
    ------
    InputError
        Missing, empty, unreadable or undecodable files, duplicate column names.

    Examples
    --------
    A value below a detection limit keeps its limit and a censoring flag; ``NA`` is missing:

    >>> from sitecheck import read_table
    >>> with open("labs.csv", "w") as fh:
    ...     _ = fh.write("hospital,crp,potassium\\nAshby,12,4.1\\nAshby,<5,3.9\\nBrill,7,NA\\n")
    >>> raw = read_table("labs.csv", site="hospital")
    >>> raw.frame["crp"].tolist(), raw.cells["crp"].censor.tolist()
    ([12.0, 5.0, 7.0], [0, -1, 0])
    >>> {c.name: dict(c.idioms) for c in raw.columns}["crp"]
    {'censored_below': 1}
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a directory, not a data file")
    if os.path.getsize(path) == 0:
        raise InputError(f"{path}: the file is empty")
    fmt = detect_format(path)
    cols = {}
    infos = []
    cells: Dict[str, CellNotes] = {}
    if fmt == "parquet":
        raw = _read_parquet(path)
        names = list(raw.columns)
        groups = site_groups(raw[site].to_numpy()) if site in raw.columns else None
        for name in names:
            arr, info, notes = _coerce_column(name, raw[name].to_numpy(), groups)
            cols[name] = arr
            infos.append(info)
            if notes is not None:
                cells[name] = notes
    else:
        arrow_cols, names = _read_text_columns(path, fmt, sep, encoding)
        groups = site_groups(arrow_cols[site]) if site in arrow_cols else None
        for name in names:
            arr, info, notes = _coerce_arrow(name, arrow_cols.pop(name), groups)  # free each Arrow column once converted
            cols[name] = arr
            infos.append(info)
            if notes is not None:
                cells[name] = notes
    frame = pd.DataFrame(cols, columns=names)
    return RawTable(frame=frame, path=path, format=fmt, sha256=file_sha256(path), columns=tuple(infos),
                    cells=cells)


def frame_to_raw(frame: pd.DataFrame, *, name: str = "<frame>", site: Optional[str] = None) -> RawTable:
    """Apply intake's missing-code, idiom and coercion rules to an in-memory frame."""
    names = [str(c) for c in frame.columns]
    _check_header(name, names)
    if len(frame) == 0:
        raise InputError(f"{name}: the table has no rows")
    cols = {}
    infos = []
    cells: Dict[str, CellNotes] = {}
    groups = None
    if site is not None and site in names:
        groups = site_groups(frame[frame.columns[names.index(site)]].to_numpy())
    for orig, cname in zip(frame.columns, names):
        values = frame[orig]
        if pd.api.types.is_bool_dtype(values) or pd.api.types.is_numeric_dtype(values):
            arr = pd.to_numeric(values, errors="coerce").astype("float64").to_numpy()
        elif pd.api.types.is_datetime64_any_dtype(values):
            arr = pd.to_datetime(values).astype("datetime64[ns]").to_numpy()
        else:
            s = values.astype(object)
            arr = s.where(s.isna() | s.map(type).eq(str), s.astype(str)).where(s.notna(), None).to_numpy(dtype=object)
        arr, info, notes = _coerce_column(cname, arr, groups)
        cols[cname] = arr
        infos.append(info)
        if notes is not None:
            cells[cname] = notes
    out = pd.DataFrame(cols, columns=names)
    import hashlib

    digest = hashlib.sha256(pd.util.hash_pandas_object(out, index=False).to_numpy().tobytes()).hexdigest()
    return RawTable(frame=out, path=name, format="frame", sha256=digest, columns=tuple(infos), cells=cells)
