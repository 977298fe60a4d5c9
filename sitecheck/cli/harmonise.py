"""The ``sitecheck harmonise`` command: fit a harmonisation on a table (or apply
saved parameters to new rows of known sites) and write the harmonised table.

Thin layer over :mod:`sitecheck.harmonise.methods`: read, choose columns, call the
library, write files atomically, print a summary. Errors the user can fix
raise :class:`~sitecheck.errors.InputError` (exit code 2, one line).
"""
from __future__ import annotations

import io
import json
import os
from typing import Dict, List, Optional, Sequence, Tuple

import click
import numpy as np
import pandas as pd

from sitecheck.errors import InputError

#: Extra keys of the parameters file written by the command (beside the fit's own).
FILE_KEYS = ("site_column", "input_sha256", "rows_fitted", "left_unchanged")


def _site_label(v) -> Optional[str]:
    from sitecheck.table.roles import value_label

    return value_label(v)


def _site_codes(frame: pd.DataFrame, site_col: str, labels: Sequence[str], *, fitted: bool) -> Tuple[np.ndarray, np.ndarray]:
    """(row mask with a site value, integer codes of those rows)."""
    lab = [_site_label(v) for v in frame[site_col].to_numpy(dtype=object)]
    has = np.array([v is not None for v in lab])
    code = {s: i for i, s in enumerate(labels)}
    unknown = sorted({v for v in lab if v is not None and v not in code})
    if unknown:
        known = ", ".join(labels[:6]) + (", ..." if len(labels) > 6 else "")
        raise InputError(f"site column {site_col!r}: site {unknown[0]!r} is not one of the "
                         f"{'fitted ' if fitted else ''}sites ({known})")
    return has, np.array([code[v] for v in lab if v is not None], dtype=np.int64)


def _numeric_matrix(frame: pd.DataFrame, names: Sequence[str], raw) -> np.ndarray:
    for name in names:
        if name not in frame.columns:
            raise InputError(f"column {name!r} is not in the table")
        storage = raw.column(name).storage
        if storage != "numeric":
            raise InputError(f"column {name!r} is not numeric ({storage}); it cannot be harmonised")
    return np.column_stack([frame[n].to_numpy(dtype=float, na_value=np.nan) for n in names]) if names else \
        np.zeros((len(frame), 0))


def _choose_columns(raw, site: str, protect: Sequence[str], identifiers: Sequence[str],
                    excluded: Sequence[str], outcome: Optional[str]):
    """Numeric feature columns to harmonise, and the others left unchanged with why."""
    from sitecheck.table.roles import RoleSpec, assign_roles

    spec = RoleSpec(site=site, covariates=tuple(protect) or None, identifiers=tuple(identifiers) or None,
                    excluded=tuple(excluded) or None, outcome=outcome)
    table = assign_roles(raw, spec, min_site_rows=1)
    adjust: List[str] = []
    left: Dict[str, str] = {}
    for c in table.columns:
        if c.role == "feature":
            if c.kind == "numeric":
                adjust.append(c.name)
            else:
                left[c.name] = c.kind
        elif c.role not in ("site",):
            left[c.name] = c.role if c.role != "covariate" else "protected"
    if not adjust:
        raise InputError("no numeric feature column to harmonise")
    return adjust, left


def blocking_findings(raw, site: str, features: Sequence[str], *, identifiers: Sequence[str] = (),
                      excluded: Sequence[str] = (), outcome: Optional[str] = None) -> list:
    """Fingerprints of a blocking kind (:data:`sitecheck.harmonise.methods.BLOCKING_KINDS`) on the
    columns about to be harmonised: a unit, a missing-value code, a censored limit or a
    number format that differs by site. Empty when the table has fewer than two sites."""
    from sitecheck.analyses.fingerprints import find_fingerprints
    from sitecheck.harmonise.methods import BLOCKING_KINDS
    from sitecheck.table.roles import RoleSpec, assign_roles

    if raw.frame[site].dropna().nunique() < 2:
        return []  # a batch from one site: nothing to compare it with
    spec = RoleSpec(site=site, identifiers=tuple(identifiers) or None, excluded=tuple(excluded) or None,
                    outcome=outcome)
    table = assign_roles(raw, spec, min_site_rows=1)
    wanted = set(features)
    res = find_fingerprints(table, covariates=[])
    return [f for f in res.findings if f.kind in BLOCKING_KINDS and f.feature in wanted]


def _blocking_line(found: list, limit: Optional[int] = 4) -> str:
    shown = found if limit is None else found[:limit]
    parts = [f"{f.feature} ({f.kind} at {f.site})" for f in shown]
    more = f" and {len(found) - len(shown)} more" if len(found) > len(shown) else ""
    return ", ".join(parts) + more


def _check_findings(raw, site, features, identifiers, excluded, outcome, despite: bool,
                    warnings: List[str]) -> None:
    found = blocking_findings(raw, site, features, identifiers=identifiers, excluded=excluded, outcome=outcome)
    if not found:
        return
    if not despite:
        raise InputError(f"not harmonised: {_blocking_line(found)} would be spread over every value of the site; "
                         "repair them first (see `sitecheck scan`) or pass --despite-findings")
    warnings.append(f"harmonised despite {len(found)} finding(s) that harmonisation cannot repair: "
                    f"{_blocking_line(found, None)}")


def _original_frame(path: str, fmt: str, sep: Optional[str], encoding: str) -> pd.DataFrame:
    """The input as stored (text cells verbatim for CSV/TSV), so unchanged columns are
    written back exactly as read (leading zeros, integers, missing-value codes)."""
    if fmt == "parquet":
        return pd.read_parquet(path)
    delim = sep if sep is not None else ("\t" if fmt.startswith("tsv") else ",")
    return pd.read_csv(path, sep=delim, dtype=str, keep_default_na=False, na_filter=False, encoding=encoding,
                       compression="gzip" if fmt.endswith(".gz") else None)


def _publish(path: str) -> str:
    # atomic_write's temporary file is private (0600); give the table the usual permissions.
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)
    return path


def _write_table(frame: pd.DataFrame, path: str, fmt: str, sep: Optional[str]) -> str:
    from sitecheck.render.safety import atomic_write

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
    out_dir = os.path.dirname(os.path.abspath(path))
    return _publish(atomic_write(out_dir, os.path.basename(path), data))


def _same_file(a: str, b: str) -> bool:
    return os.path.realpath(a) == os.path.realpath(b)


def run_harmonise(data: str, *, site: Optional[str], method: Optional[str], protect: Sequence[str], out: str,
                  params_path: Optional[str], apply_path: Optional[str], identifiers: Sequence[str] = (),
                  excluded: Sequence[str] = (), outcome: Optional[str] = None, sep: Optional[str] = None,
                  encoding: str = "utf-8", despite_findings: bool = False, seed: int = 0) -> Dict[str, object]:
    """Library entry of the command; returns a summary dict (paths, counts, warnings).

    Refuses (InputError) when a column to harmonise carries a blocking fingerprint
    (:func:`blocking_findings`) unless ``despite_findings``; then it warns. Harmonised
    values are written on each feature's common recording grid, with as many decimals
    as the grid step needs, and kept inside the range recorded in the fitting rows
    (:func:`sitecheck.harmonise.methods.clip_to_range`); the values moved to that range are
    counted per feature (``clipped``) and reported in a warning. Right-skewed non-negative
    features are fitted on the log scale, and each recorded value is read as a uniform draw
    from its site's recording cell (seeded by ``seed``: the same table and seed give the same
    output; see :func:`sitecheck.harmonise.methods.dither`).
    """
    from sitecheck.harmonise.methods import (HarmonisationFit, _prevalence_warning, apply_harmoniser,
                                             clip_to_range, fit_harmoniser, grid_decimals, protected_design)
    from sitecheck.reading.intake import detect_format, read_table

    if _same_file(data, out):
        raise InputError("--out must not be the input file; the input is never overwritten")
    fmt_out = detect_format(out)
    raw = read_table(data, sep=sep, encoding=encoding)
    if fmt_out != raw.format:
        raise InputError(f"--out {out}: write the table in the input's format ({raw.format})")
    frame = raw.frame
    warnings: List[str] = []
    if apply_path is not None:
        if method is not None or protect:
            raise InputError("--apply takes the method and protected columns from the parameters file; "
                             "drop --method and --protect")
        if params_path is not None:
            raise InputError("--params names the file to write when fitting; with --apply it is not used")
        try:
            with open(apply_path, encoding="utf-8") as fh:
                doc = json.load(fh)
        except OSError as exc:
            raise InputError(f"--apply {apply_path}: cannot be read ({exc.strerror})") from None
        except json.JSONDecodeError as exc:
            raise InputError(f"--apply {apply_path}: not JSON ({exc.msg} at line {exc.lineno})") from None
        if not isinstance(doc, dict):
            raise InputError(f"--apply {apply_path}: not a parameters file")
        if _same_file(apply_path, out):
            raise InputError("--out must not be the parameters file")
        fit = HarmonisationFit.from_dict(doc)
        site_col = site or doc.get("site_column")
        if not site_col:
            raise InputError("no site column: pass --site COL")
        if site_col not in frame.columns:
            raise InputError(f"site column {site_col!r} is not in the table")
        for name in list(fit.features) + [s["name"] for s in fit.protect]:
            if name not in frame.columns:
                raise InputError(f"column {name!r} (in the parameters) is not in the table")
        has, codes = _site_codes(frame, site_col, fit.site_labels, fitted=True)
        X = _numeric_matrix(frame.loc[has], fit.features, raw)
        adjusted_cols = [f for f, a in zip(fit.features, fit.adjusted) if a]
        _check_findings(raw, site_col, adjusted_cols, identifiers, excluded, outcome, despite_findings,
                        warnings)
        D, _ = protected_design(frame.loc[has], [s["name"] for s in fit.protect], spec=fit.protect)
        Xh = apply_harmoniser(fit, X, codes, design=D, random_state=[int(seed), 2])
        Xh, clipped = clip_to_range(fit, Xh)
        left = dict(doc.get("left_unchanged", {}))
        written_params = None
    else:
        if not site:
            raise InputError("no site column: pass --site COL")
        if method is None:
            raise InputError("no method: pass --method centre, scale, quantile or combat")
        if site not in frame.columns:
            raise InputError(f"site column {site!r} is not in the table")
        params_path = params_path or out + ".params.json"
        if _same_file(params_path, data) or _same_file(params_path, out):
            raise InputError("--params must differ from the input and the --out file")
        adjust, left = _choose_columns(raw, site, protect, identifiers, excluded, outcome)
        labels = sorted({v for v in (_site_label(x) for x in frame[site].to_numpy(dtype=object)) if v is not None})
        if len(labels) < 2:
            raise InputError(f"site column {site!r} has fewer than two sites")
        has, codes = _site_codes(frame, site, labels, fitted=False)
        X = _numeric_matrix(frame.loc[has], adjust, raw)
        _check_findings(raw, site, adjust, identifiers, excluded, outcome, despite_findings, warnings)
        D, spec = protected_design(frame.loc[has], list(protect))
        fit = fit_harmoniser(X, codes, method=method, site_labels=labels, feature_names=adjust, design=D,
                             protect_spec=spec, log_skewed=True, random_state=[int(seed), 1])
        Xh = apply_harmoniser(fit, X, codes, design=D, random_state=[int(seed), 2])
        Xh, clipped = clip_to_range(fit, Xh)
        if outcome and outcome not in protect:
            y = pd.to_numeric(frame.loc[has, outcome], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            levels = np.unique(y[~np.isnan(y)])
            if len(levels) == 2:
                w = _prevalence_warning((y == levels[1]).astype(float) + np.where(np.isnan(y), np.nan, 0.0),
                                        codes, labels)
                if w:
                    warnings.append(w)
        doc = fit.to_dict()
        doc.update({"site_column": site, "input_sha256": raw.sha256, "rows_fitted": int(has.sum()),
                    "left_unchanged": left})
        from sitecheck.render.safety import atomic_write

        written_params = _publish(atomic_write(
            os.path.dirname(os.path.abspath(params_path)), os.path.basename(params_path),
            json.dumps(doc, indent=1, allow_nan=False, sort_keys=False) + "\n"))
    out_frame = _original_frame(data, raw.format, sep, encoding)
    if list(out_frame.columns) != list(frame.columns) or len(out_frame) != len(frame):
        out_frame = frame.copy()  # pragma: no cover - the two readers disagree; fall back to coerced values
    rows = np.flatnonzero(has)
    for j, name in enumerate(fit.features):
        if not fit.adjusted[j]:
            continue  # left unchanged: written back exactly as read
        g = fit.grid[j]
        if raw.format == "parquet":
            col = frame[name].to_numpy(dtype=float, na_value=np.nan).copy()
            col[rows] = Xh[:, j]
            out_frame[name] = col
        else:
            col = out_frame[name].to_numpy(dtype=object).copy()
            vals = Xh[:, j]
            if np.isfinite(g):  # at the reported precision: as many decimals as the grid step needs
                d = grid_decimals(float(g))
                text = ["" if np.isnan(v) else f"{v + 0.0:.{d}f}" for v in vals]
                text = [t[1:] if t.startswith("-") and float(t) == 0 else t for t in text]  # no "-0.0"
            else:
                text = ["" if np.isnan(v) else repr(float(v)) for v in vals]
            col[rows] = np.array(text, dtype=object)
            out_frame[name] = col
    moved = {name: (int(c[0]), int(c[1])) for name, c in zip(fit.features, clipped) if c.sum()}
    if moved:
        n_obs = (~np.isnan(Xh)).sum(axis=0)
        parts = []
        for j, name in enumerate(fit.features):
            if name in moved:
                lo_n, hi_n = moved[name]
                what = " and ".join(w for w in (f"{lo_n} below {fit.lower[j]:g}" if lo_n else "",
                                                f"{hi_n} above {fit.upper[j]:g}" if hi_n else "") if w)
                parts.append(f"{name} {what} ({(lo_n + hi_n) / max(int(n_obs[j]), 1):.1%})")
        warnings.append("harmonised values outside the range recorded in the fitting rows were set to its "
                        "nearest end: " + "; ".join(parts))
    n_no_site = int((~has).sum())
    if n_no_site:
        warnings.append(f"{n_no_site} rows have no site value and were written unchanged")
    unchanged = dict(fit.unchanged)
    written = _write_table(out_frame, out, raw.format, sep)
    return {"table": written, "params": written_params, "method": fit.method, "rows": int(has.sum()),
            "sites": len(fit.site_labels), "adjusted": [f for f, a in zip(fit.features, fit.adjusted) if a],
            "unchanged": {**left, **unchanged}, "protected": [s["name"] for s in fit.protect], "warnings": warnings,
            "grid": {f: float(g) for f, g, a in zip(fit.features, fit.grid, fit.adjusted) if a and np.isfinite(g)},
            "clipped": moved}


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
