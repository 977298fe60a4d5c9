"""The ``sitecheck harmonise`` command: fit a harmonisation on a table (or apply
saved parameters to new rows of known sites) and write the harmonised table.

Thin layer over :func:`sitecheck.harmonise.table.harmonise_table`: read, call the library,
write files atomically, print a summary. Errors the user can fix
raise :class:`~sitecheck.errors.InputError` (exit code 2, one line).
"""
from __future__ import annotations

import io
import os
from typing import Dict, List, Optional, Sequence, Tuple

import click
import numpy as np
import pandas as pd

from sitecheck._files import atomic_write_path, publish
from sitecheck.errors import InputError

def _original_frame(path: str, fmt: str, sep: Optional[str], encoding: str) -> pd.DataFrame:
    """The input as stored (text cells verbatim for CSV/TSV), so unchanged columns are
    written back exactly as read (leading zeros, integers, missing-value codes)."""
    if fmt == "parquet":
        return pd.read_parquet(path)
    delim = sep if sep is not None else ("\t" if fmt.startswith("tsv") else ",")
    return pd.read_csv(path, sep=delim, dtype=str, keep_default_na=False, na_filter=False, encoding=encoding,
                       compression="gzip" if fmt.endswith(".gz") else None)


def _write_table(frame: pd.DataFrame, path: str, fmt: str, sep: Optional[str]) -> str:
    if fmt == "parquet":
        buf = io.BytesIO()
        frame.to_parquet(buf, index=False)
        data = buf.getvalue()
    else:
        delim = sep if sep is not None else ("\t" if fmt.startswith("tsv") else ",")
        text = frame.to_csv(index=False, sep=delim, lineterminator="\n")
        data = text.encode("utf-8")
        if fmt.endswith(".gz"):
            import gzip

            data = gzip.compress(data, mtime=0)
    return publish(atomic_write_path(path, data))


def _same_file(a: str, b: str) -> bool:
    return os.path.realpath(a) == os.path.realpath(b)


def run_harmonise(data: str, *, site: Optional[str], method: Optional[str], protect: Sequence[str], out: str,
                  params_path: Optional[str], apply_path: Optional[str], identifiers: Sequence[str] = (),
                  excluded: Sequence[str] = (), outcome: Optional[str] = None, sep: Optional[str] = None,
                  encoding: str = "utf-8", despite_findings: bool = False, seed: int = 0) -> Dict[str, object]:
    """The command's work: read, call :func:`sitecheck.harmonise.table.harmonise_table`, write the table
    (each harmonised feature at the precision its recording grid needs) and the parameters; return a
    summary dict (paths, counts, warnings)."""
    from sitecheck.harmonise.methods import HarmonisationFit, grid_decimals
    from sitecheck.harmonise.table import harmonise_table
    from sitecheck.reading.intake import detect_format, read_table

    if _same_file(data, out):
        raise InputError("--out must not be the input file; the input is never overwritten")
    fmt_out = detect_format(out)
    raw = read_table(data, sep=sep, encoding=encoding)
    if fmt_out != raw.format:
        raise InputError(f"--out {out}: write the table in the input's format ({raw.format})")
    saved = None
    if apply_path is not None:
        if method is not None or protect:
            raise InputError("--apply takes the method and protected columns from the parameters file; "
                             "drop --method and --protect")
        if params_path is not None:
            raise InputError("--params names the file to write when fitting; with --apply it is not used")
        if _same_file(apply_path, out):
            raise InputError("--out must not be the parameters file")
        try:
            saved = HarmonisationFit.load(apply_path)
        except InputError as exc:
            raise InputError(f"--apply: {exc}") from None
        if not (site or saved.saved_with.get("site_column")):
            raise InputError("no site column: pass --site COL")
    else:
        if not site:
            raise InputError("no site column: pass --site COL")
        if method is None:
            raise InputError("no method: pass --method centre, scale, quantile or combat")
        params_path = params_path or out + ".params.json"
        if _same_file(params_path, data) or _same_file(params_path, out):
            raise InputError("--params must differ from the input and the --out file")
    res = harmonise_table(raw, site=site, method=method, protect=protect, identifiers=identifiers,
                          excluded=excluded, outcome=outcome, despite_findings=despite_findings, seed=seed,
                          parameters=saved)
    fit = res.fit
    written_params = None
    if saved is None:
        written_params = publish(fit.save(params_path, **res.file_keys))
    frame = raw.frame
    out_frame = _original_frame(data, raw.format, sep, encoding)
    if list(out_frame.columns) != list(frame.columns) or len(out_frame) != len(frame):
        out_frame = frame.copy()  # pragma: no cover - the two readers disagree; fall back to coerced values
    rows = np.flatnonzero(res.rows)
    for j, name in enumerate(fit.features):
        if not fit.adjusted[j]:
            continue  # left unchanged: written back exactly as read
        g = fit.grid[j]
        harmonised = res.frame[name].to_numpy(dtype=float, na_value=np.nan)
        if raw.format == "parquet":
            out_frame[name] = harmonised
        else:
            col = out_frame[name].to_numpy(dtype=object).copy()
            vals = harmonised[rows]
            if np.isfinite(g):  # at the reported precision: as many decimals as the grid step needs
                d = grid_decimals(float(g))
                text = ["" if np.isnan(v) else f"{v + 0.0:.{d}f}" for v in vals]
                text = [t[1:] if t.startswith("-") and float(t) == 0 else t for t in text]  # no "-0.0"
            else:
                text = ["" if np.isnan(v) else repr(float(v)) for v in vals]
            col[rows] = np.array(text, dtype=object)
            out_frame[name] = col
    written = _write_table(out_frame, out, raw.format, sep)
    return {"table": written, "params": written_params, "method": fit.method, "rows": int(res.rows.sum()),
            "sites": len(fit.site_labels), "adjusted": list(res.adjusted), "unchanged": dict(res.left_unchanged),
            "protected": [s["name"] for s in fit.protect], "warnings": list(res.warnings),
            "grid": {f: float(g) for f, g, a in zip(fit.features, fit.grid, fit.adjusted) if a and np.isfinite(g)},
            "clipped": dict(res.clipped)}


@click.command("harmonise", epilog=(
    "Examples:\n\n"
    "  sitecheck harmonise train.csv --site hospital --method combat --protect age --protect sex --out train_h.csv\n\n"
    "  sitecheck harmonise test.csv --apply train_h.csv.params.json --out test_h.csv"))
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--site", metavar="COL", help="Column naming the site (stored in the parameters; optional with --apply).")
@click.option("--method", type=click.Choice(["centre", "scale", "quantile", "combat"]), default=None,
              help="centre: per-site location; scale: location and scale; quantile: per-site quantile mapping "
                   "to the pooled distribution; combat: empirical-Bayes location and scale (ComBat).")
@click.option("--protect", multiple=True, metavar="COL",
              help="Column whose linear effect on the features is kept (repeatable), e.g. age, sex. Protecting "
                   "the outcome keeps its signal but then --apply needs the outcome of every new row.")
@click.option("--out", required=True, type=click.Path(dir_okay=False), metavar="FILE",
              help="The harmonised table, in the input's format; never the input file.")
@click.option("--params", "params_path", type=click.Path(dir_okay=False), metavar="FILE",
              help="Where to write the fitted parameters as JSON (default: the --out file + '.params.json').")
@click.option("--apply", "apply_path", type=click.Path(dir_okay=False), metavar="PARAMS",
              help="Apply saved parameters to new rows of the fitted sites instead of fitting.")
@click.option("--outcome", metavar="COL", help="Binary outcome: left unchanged; warns when its prevalence differs by site and it is not protected.")
@click.option("--id", "identifiers", multiple=True, metavar="COL", help="Identifier column, left unchanged (repeatable).")
@click.option("--exclude", "excluded", multiple=True, metavar="COL", help="Column to leave unchanged (repeatable).")
@click.option("--sep", metavar="CHAR", help="Field separator (default from the extension).")
@click.option("--encoding", default="utf-8", show_default=True, help="Text encoding of CSV/TSV input.")
@click.option("--despite-findings", is_flag=True,
              help="Harmonise even when a column still carries a unit, missing-code, censoring or number-format "
                   "finding (refused otherwise: such values are not the same quantity as the other sites').")
@click.option("--seed", default=0, show_default=True, type=int,
              help="Seed of the within-cell draws (each recorded value is read as a uniform draw from its "
                   "recording cell before it is mapped and rounded back to the grid).")
@click.option("--quiet", "-q", is_flag=True, help="No summary on stdout.")
def harmonise_cmd(data, site, method, protect, out, params_path, apply_path, outcome, identifiers, excluded, sep,
                  encoding, despite_findings, seed, quiet):
    """Harmonise the numeric feature columns of DATA across sites and write the table to --out.

    Numeric feature columns are adjusted; categorical and binary columns, identifiers, the site, the
    protected columns and the outcome are copied unchanged. Missing cells stay missing (written as
    empty cells in CSV). Harmonised values are rounded to each feature's common recording grid (the
    coarsest step any site records in) and written at that precision; values beyond the range recorded
    in the table are set to its nearest end, and how many is reported. A table whose columns still
    carry a unit, missing-code, censoring or number-format finding is refused unless --despite-findings. Fitted parameters are written as JSON beside --out (or to --params) and can
    be applied to new rows of the same sites with --apply (fit on training rows, apply to test rows).
    Decision support for data work, not a clinical device; check the result with `sitecheck scan`.
    """
    res = run_harmonise(data, site=site, method=method, protect=protect, out=out, params_path=params_path,
                        apply_path=apply_path, identifiers=identifiers, excluded=excluded, outcome=outcome,
                        sep=sep, encoding=encoding, despite_findings=despite_findings, seed=seed)
    for w in res["warnings"]:
        click.echo(f"sitecheck: warning: {w}", err=True)
    if not quiet:
        unchanged = ", ".join(f"{k} ({v})" for k, v in res["unchanged"].items()) or "none"
        click.echo(f"{res['method']}: {len(res['adjusted'])} columns harmonised over {res['rows']} rows from "
                   f"{res['sites']} sites; protected: {', '.join(res['protected']) or 'none'}; "
                   f"left unchanged: {unchanged}")
        grid = ", ".join(f"{k} {v:g}" for k, v in res["grid"].items())
        if grid:
            click.echo(f"written on each feature's common recording grid: {grid}")
        click.echo(f"table: {res['table']}" + (f"; parameters: {res['params']}" if res["params"] else ""))
