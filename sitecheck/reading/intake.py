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
    """

    name: str
    storage: str
    missing_codes: Dict[str, int]
    n_missing: int
    coerced: bool = False
    unparsed_count: int = 0
    unparsed_examples: Tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "storage": self.storage,
            "missing_codes": dict(self.missing_codes),
            "n_missing": int(self.n_missing),
            "coerced": bool(self.coerced),
            "unparsed_count": int(self.unparsed_count),
            "unparsed_examples": list(self.unparsed_examples),
        }


@dataclass(frozen=True)
class RawTable:
    """A table as read from disk, before roles are assigned."""

    frame: pd.DataFrame
    path: str
    format: str
    sha256: str
    columns: Tuple[ColumnIntake, ...] = field(default_factory=tuple)

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
    if parsed.notna().mean() >= COERCE_SHARE:
        return parsed
    return None


def _coerce_column(name: str, values: np.ndarray) -> Tuple[np.ndarray, ColumnIntake]:
    if values.dtype.kind == "f":
        n_missing = int(np.isnan(values).sum())
        return values, ColumnIntake(name, "numeric", {"(null)": n_missing} if n_missing else {}, n_missing)
    if values.dtype.kind == "M":
        n_missing = int(pd.isna(values).sum())
        return values, ColumnIntake(name, "datetime", {"(null)": n_missing} if n_missing else {}, n_missing)
    mask, codes = _classify_missing(values)
    n_missing = int(mask.sum())
    s = pd.Series(values, dtype=object)
    present = s[~mask].astype(str).str.strip()
    if len(present) == 0:
        out = np.full(len(values), np.nan)
        return out, ColumnIntake(name, "numeric", codes, n_missing)
    num = pd.to_numeric(present, errors="coerce")
    ok = num.notna()
    share = float(ok.mean())
    if share >= COERCE_SHARE:
        bad = present[~ok]
        examples = tuple(pd.unique(bad.to_numpy())[:3].tolist())
        out = np.full(len(values), np.nan)
        out[np.flatnonzero(~mask)] = num.to_numpy(dtype="float64")
        return out, ColumnIntake(
            name, "numeric", codes, n_missing + int((~ok).sum()),
            coerced=True, unparsed_count=int((~ok).sum()), unparsed_examples=examples,
        )
    parsed = _looks_datetime(present)
    if parsed is not None:
        out = pd.Series(pd.NaT, index=s.index, dtype="datetime64[ns]")
        out[~mask] = parsed.astype("datetime64[ns]").to_numpy()
        bad = present[parsed.isna().to_numpy()]
        examples = tuple(pd.unique(bad.to_numpy())[:3].tolist())
        return out.to_numpy(), ColumnIntake(
            name, "datetime", codes, n_missing + int(parsed.isna().sum()),
            coerced=True, unparsed_count=int(parsed.isna().sum()), unparsed_examples=examples,
        )
    out = np.empty(len(values), dtype=object)
    out[:] = None
    out[np.flatnonzero(~mask)] = present.to_numpy(dtype=object)
    return out, ColumnIntake(name, "text", codes, n_missing)


_NUMERIC_RE = r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$"


def _coerce_arrow(name: str, col) -> Tuple[np.ndarray, ColumnIntake]:
    """Intake rules on an Arrow string column, vectorised with pyarrow.compute.

    Numeric columns never become Python objects (the 1M-row path); other columns
    fall back to :func:`_coerce_column`.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    nulls = col.is_null()
    trimmed = pc.utf8_trim_whitespace(pc.fill_null(col, ""))
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
    present = pc.invert(is_code)
    n_present = len(col) - n_code
    if n_present == 0:
        return np.full(len(col), np.nan), ColumnIntake(name, "numeric", codes, int(n_code))
    is_num = pc.and_(present, pc.match_substring_regex(trimmed, _NUMERIC_RE))
    n_num = pc.sum(is_num).as_py() or 0
    if n_num / n_present >= COERCE_SHARE:
        values = pc.if_else(is_num, trimmed, pa.scalar(None, pa.string()))
        out = pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False)
        out = np.asarray(out, dtype=np.float64)
        bad_mask = pc.and_(present, pc.invert(is_num))
        n_bad = n_present - n_num
        examples: Tuple[str, ...] = ()
        if n_bad:
            examples = tuple(pc.unique(pc.filter(trimmed, bad_mask)).to_pylist()[:3])
        return out, ColumnIntake(name, "numeric", codes, int(n_code + n_bad), coerced=True,
                                 unparsed_count=int(n_bad), unparsed_examples=examples)
    return _coerce_column(name, col.to_numpy(zero_copy_only=False).astype(object))


def read_table(
    path: str,
    *,
    sep: Optional[str] = None,
    encoding: str = "utf-8",
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

    Returns
    -------
    RawTable
        Coerced frame and per-column intake notes. The input file is only read.

    Raises
    ------
    InputError
        Missing, empty, unreadable or undecodable files, duplicate column names.
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
    if fmt == "parquet":
        raw = _read_parquet(path)
        names = list(raw.columns)
        for name in names:
            arr, info = _coerce_column(name, raw[name].to_numpy())
            cols[name] = arr
            infos.append(info)
    else:
        arrow_cols, names = _read_text_columns(path, fmt, sep, encoding)
        for name in names:
            arr, info = _coerce_arrow(name, arrow_cols.pop(name))  # free each Arrow column once converted
            cols[name] = arr
            infos.append(info)
    frame = pd.DataFrame(cols, columns=names)
    return RawTable(frame=frame, path=path, format=fmt, sha256=file_sha256(path), columns=tuple(infos))


def frame_to_raw(frame: pd.DataFrame, *, name: str = "<frame>") -> RawTable:
    """Apply intake's missing-code and coercion rules to an in-memory frame."""
    names = [str(c) for c in frame.columns]
    _check_header(name, names)
    if len(frame) == 0:
        raise InputError(f"{name}: the table has no rows")
    cols = {}
    infos = []
    for orig, cname in zip(frame.columns, names):
        values = frame[orig]
        if pd.api.types.is_bool_dtype(values) or pd.api.types.is_numeric_dtype(values):
            arr = pd.to_numeric(values, errors="coerce").astype("float64").to_numpy()
        elif pd.api.types.is_datetime64_any_dtype(values):
            arr = pd.to_datetime(values).astype("datetime64[ns]").to_numpy()
        else:
            arr = np.array([None if (v is None or (isinstance(v, float) and np.isnan(v))) else str(v)
                            for v in values.to_numpy(dtype=object)], dtype=object)
        arr, info = _coerce_column(cname, arr)
        cols[cname] = arr
        infos.append(info)
    out = pd.DataFrame(cols, columns=names)
    import hashlib

    digest = hashlib.sha256(pd.util.hash_pandas_object(out, index=False).to_numpy().tobytes()).hexdigest()
    return RawTable(frame=out, path=name, format="frame", sha256=digest, columns=tuple(infos))
