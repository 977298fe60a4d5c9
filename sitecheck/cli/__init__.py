"""Command-line interface: parse options, call the library, report progress,
map errors to exit codes (0 finished, 1 a gate failed, 2 usage or input error)."""
from __future__ import annotations

import os
import sys
import time
from typing import Optional

import click

from sitecheck import __version__
from sitecheck.errors import InputError

EXIT_OK, EXIT_GATE, EXIT_INPUT, EXIT_INTERNAL = 0, 1, 2, 3


class _Group(click.Group):
    def main(self, *args, **kwargs):  # one-line errors, never a traceback for bad input
        kwargs.setdefault("standalone_mode", True)
        try:
            return super().main(*args, **{**kwargs, "standalone_mode": False})
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            exc.show()
            sys.exit(EXIT_INPUT)
        except click.exceptions.Abort:
            click.echo("sitecheck: aborted", err=True)
            sys.exit(EXIT_INPUT)
        except InputError as exc:
            click.echo(f"sitecheck: error: {exc}", err=True)
            sys.exit(EXIT_INPUT)
        except KeyboardInterrupt:
            click.echo("sitecheck: interrupted", err=True)
            sys.exit(130)
        except Exception as exc:  # an internal fault: one line, with a way to see more
            if os.environ.get("SITECHECK_DEBUG"):
                raise
            click.echo(f"sitecheck: internal error: {type(exc).__name__}: {exc} "
                       "(set SITECHECK_DEBUG=1 for the traceback)", err=True)
            sys.exit(EXIT_INTERNAL)


class Progress:
    """Stage messages on stderr with elapsed seconds; silent with --quiet."""

    def __init__(self, quiet: bool):
        self.quiet = quiet
        self.t0 = time.perf_counter()

    def __call__(self, msg: str) -> None:
        if not self.quiet:
            click.echo(f"[{time.perf_counter() - self.t0:6.1f}s] {msg}", err=True)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]},
             epilog="Example:\n\n  sitecheck demo --out demo-report\n\n  sitecheck scan pooled.csv --site hospital --outcome died --covariate age --covariate sex")
@click.version_option(__version__, prog_name="sitecheck")
def main():
    """Check a pooled clinical table for site signal before training a model.

    Can the site (or a demographic group) be predicted from the features?
    Which features carry the signature, and why? Would harmonisation help?
    """


def _common_scan_options(f):
    opts = [
        click.option("--site", "site", metavar="COL", help="Column naming the site or hospital (required unless in --config)."),
        click.option("--outcome", metavar="COL", help="Binary outcome column."),
        click.option("--time", "time", metavar="COL", help="Date column (e.g. arrival date): adds the drift analysis, "
                     "when and where each site's measurements changed over the collection period."),
        click.option("--covariate", "covariates", multiple=True, metavar="COL", help="Case-mix column to condition on (repeatable)."),
        click.option("--group", "groups", multiple=True, metavar="COL", help="Demographic column to probe like a site (repeatable)."),
        click.option("--id", "identifiers", multiple=True, metavar="COL", help="Identifier column, never used as a feature (repeatable)."),
        click.option("--exclude", "excluded", multiple=True, metavar="COL", help="Column to leave out (repeatable)."),
        click.option("--config", type=click.Path(dir_okay=False), metavar="FILE", help="TOML file with roles, [panels] and [options]; flags override it."),
        click.option("--sep", metavar="CHAR", help="Field separator (default from the extension)."),
        click.option("--encoding", default="utf-8", show_default=True, help="Text encoding of CSV/TSV input."),
        click.option("--out", "out_dir", default="sitecheck-report", show_default=True, type=click.Path(file_okay=False), help="Output directory."),
        click.option("--seed", type=int, default=None, help="Random seed (default 0)."),
        click.option("--folds", type=click.IntRange(2, 20), default=None, help="Cross-validation folds (default 5)."),
        click.option("--max-rows", type=click.IntRange(100), default=None, help="Subsample cap for modelling (default 100000)."),
        click.option("--map-rows", type=click.IntRange(100), default=None, help="Subsample cap for the 2-D maps (default 10000)."),
        click.option("--min-site-rows", type=click.IntRange(1), default=None, help="Sites with fewer rows are left out (default 20)."),
        click.option("--min-cell", type=click.IntRange(1), default=None, help="Small-cell threshold for shared outputs (default 10)."),
        click.option("--include-datetime", is_flag=True, default=None, help="Use datetime columns as features."),
        click.option("--shareable", is_flag=True, help="Suppress small cells in report.json too and draw maps as densities, for reports that leave the data enclave."),
        click.option("--fail-above", type=click.FloatRange(0.5, 1.0), default=None, metavar="AUC",
                     help="Gate: exit 1 when the probe AUC's lower 95% bound exceeds AUC."),
        click.option("--fail-on", "fail_on", multiple=True, metavar="KIND",
                     help="Gate: exit 1 when a fingerprint of this kind is found (repeatable; e.g. unit_ratio, missing_code)."),
        click.option("--quiet", "-q", is_flag=True, help="No progress messages on stderr."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _options_from(cfg_options: dict, **flags):
    from sitecheck.scan import ScanOptions

    base = ScanOptions()
    kw = {}
    for key in ("seed", "folds", "max_rows", "map_rows", "min_site_rows", "min_cell", "include_datetime",
                "cluster_threshold", "threshold"):
        val = flags.get(key)
        if val is None:
            val = cfg_options.get(key, getattr(base, key))
        kw[key] = val
    return ScanOptions(**kw)


def _run_scan(data, *, site, outcome, covariates, groups, identifiers, excluded, config, sep, encoding,
              out_dir, quiet, shareable=False, fail_above=None, fail_on=(), time=None, **flags):
    from sitecheck.reading.intake import read_table
    from sitecheck.render import write_report
    from sitecheck.table.roles import RoleSpec
    from sitecheck.scan import build_table, scan_table
    from sitecheck.reading.config import load_config

    progress = Progress(quiet)
    t = lambda v: tuple(v) if v else None  # noqa: E731
    spec = RoleSpec(site=site, outcome=outcome, covariates=t(covariates), groups=t(groups),
                    identifiers=t(identifiers), excluded=t(excluded), time=time or None)
    cfg = load_config(config)
    _check_gate_kinds(tuple(fail_on) or tuple(cfg.options.get("fail_on", ())))
    progress(f"reading {data}")
    raw = read_table(data, sep=sep if sep is not None else cfg.options.get("sep"),
                     encoding=encoding if encoding != "utf-8" else cfg.options.get("encoding", "utf-8"))
    options = _options_from(cfg.options, **flags)
    table, _ = build_table(raw, spec, config_path=config, min_site_rows=options.min_site_rows,
                           include_datetime=options.include_datetime)
    progress(f"{len(table.frame)} rows, {len(table.site_labels)} sites, {len(table.features)} features")
    result = scan_table(table, options, progress=progress, config={"file": config} if config else {})
    _check_out_dir(out_dir, data)
    progress(f"writing report to {out_dir}")
    fail_above = fail_above if fail_above is not None else cfg.options.get("fail_above")
    fail_on = tuple(fail_on) or tuple(cfg.options.get("fail_on", ()))
    paths = write_report(result, out_dir, min_cell=options.min_cell, shareable=shareable)
    failed = evaluate_gates(result.to_dict(), fail_above=fail_above, fail_on=fail_on)
    click.echo(summary_text(result, paths, failed))
    if failed:
        sys.exit(EXIT_GATE)
    return result


FINGERPRINT_KINDS = ("unit_ratio", "precision", "heaping", "floor", "ceiling", "missing_code", "site_missing",
                     "exclusive_level", "shift", "scale")


def _check_gate_kinds(kinds) -> None:
    for k in kinds:
        if k not in FINGERPRINT_KINDS:
            raise InputError(f"--fail-on {k!r}: unknown fingerprint kind; choose from {', '.join(FINGERPRINT_KINDS)}")


def evaluate_gates(doc: dict, *, fail_above=None, fail_on=()) -> list:
    """Return one message per failed gate (empty when all pass)."""
    failed = []
    probe = doc.get("probe")
    if fail_above is not None and probe and probe.get("auc_ci"):
        lo = probe["auc_ci"][0]
        if lo is not None and lo > fail_above:
            failed.append(f"gate --fail-above {fail_above}: probe AUC lower bound {lo:.3f} exceeds it")
    if fail_on:
        found = [f for f in doc.get("fingerprints", []) or [] if f.get("kind") in fail_on]
        for kind in fail_on:
            hits = [f for f in found if f["kind"] == kind]
            if hits:
                where = ", ".join(f"{h['feature']} at {h['site']}" for h in hits[:5])
                failed.append(f"gate --fail-on {kind}: {len(hits)} finding(s) ({where})")
    return failed


def _check_out_dir(out_dir: str, data: str) -> None:
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise InputError(f"--out {out_dir}: exists and is not a directory")
    if os.path.realpath(data) == os.path.realpath(out_dir):
        raise InputError("--out must not be the input file")


def summary_text(result, paths, failed=()) -> str:
    """The one-screen summary printed on stdout at the end of a scan."""
    doc = result.to_dict()
    lines = [f"sitecheck {__version__}: {doc['input']['rows_used']} rows, {len(doc['input']['sites'])} sites"]
    probe = doc.get("probe")
    if probe:
        lines.append(f"site probe: AUC {probe['auc']:.3f} (95% CI {probe['auc_ci'][0]:.3f} to {probe['auc_ci'][1]:.3f}), "
                     f"p = {probe['p_value']:.3g}, verdict: {probe['verdict']}")
    drift = doc.get("drift")
    if isinstance(drift, dict):
        found = drift.get("findings") or []
        where = ", ".join(f"{c['feature']} at {c['site']} from {c['period']}" for c in found[:3])
        lines.append(f"drift over time: {len(found)} change(s) at a site" + (f" ({where})" if where else "")
                     + (f"; {len(drift.get('network') or [])} network-wide" if drift.get("network") else ""))
    for w in doc.get("warnings", [])[:5]:
        lines.append(f"warning: {w}")
    lines.append("report: " + ", ".join(paths[k] for k in ("report.html", "report.json", "findings.md") if k in paths))
    for msg in failed:
        lines.append(f"FAILED {msg}")
    return "\n".join(lines)


@main.command("scan", epilog="Example:\n\n  sitecheck scan pooled.csv --site hospital --outcome died --covariate age --covariate sex --out report")
@click.argument("data", type=click.Path(dir_okay=False))
@_common_scan_options
def scan_cmd(data, **kw):
    """Scan DATA (CSV, TSV, CSV.GZ or Parquet) for site signal and write a report."""
    _run_scan(data, **kw)


@main.command("demo", epilog="Example:\n\n  sitecheck demo --out demo-report")
@click.option("--out", "out_dir", default="sitecheck-demo", show_default=True, type=click.Path(file_okay=False),
              help="Directory for the demo table, its ground truth and the report.")
@click.option("--rows", type=click.IntRange(200, 1_000_000), default=6000, show_default=True, help="Attendances to generate.")
@click.option("--seed", type=int, default=7, show_default=True, help="Seed of the generator (the scan uses 0).")
@click.option("--quiet", "-q", is_flag=True, help="No progress messages on stderr.")
def demo_cmd(out_dir, rows, seed, quiet):
    """Write the invented four-hospital demo table into --out and scan it."""
    from sitecheck.demo import DEMO_ROLES, write_demo

    paths = write_demo(out_dir, n_rows=rows, seed=seed)
    if not quiet:
        click.echo(f"demo table: {paths['data']} (ground truth: {paths['truth']})", err=True)
    _run_scan(paths["data"], site=DEMO_ROLES["site"], outcome=DEMO_ROLES["outcome"],
              covariates=DEMO_ROLES["covariates"], groups=(), identifiers=DEMO_ROLES["identifiers"], excluded=(),
              time=DEMO_ROLES["time"],
              config=None, sep=None, encoding="utf-8", out_dir=os.path.join(out_dir, "report"), quiet=quiet,
              seed=None, folds=None, max_rows=None, map_rows=None, min_site_rows=None, min_cell=None,
              include_datetime=None)


@main.command("schema", epilog="Example:\n\n  sitecheck schema > report.schema.json")
def schema_cmd():
    """Print the JSON Schema of report.json (versioned)."""
    import json

    from sitecheck.report.schema import report_schema

    click.echo(json.dumps(report_schema(), indent=2))


from sitecheck.cli.harmonise import harmonise_cmd  # noqa: E402  (issue 6: the harmonise command)

main.add_command(harmonise_cmd)


if __name__ == "__main__":  # pragma: no cover
    main()
