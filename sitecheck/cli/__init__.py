"""Command-line interface: parse options, call the library, report progress,
map errors to exit codes (0 finished, 1 a gate failed, 2 usage or input error,
3 the report was written but an analysis failed, or an internal error stopped the scan)."""
from __future__ import annotations

import os
import sys
import time
from typing import Optional

import click

from sitecheck import __version__
from sitecheck.errors import InputError
from sitecheck.report.gates import FINGERPRINT_KINDS, check_gates

EXIT_OK, EXIT_GATE, EXIT_INPUT, EXIT_INTERNAL = 0, 1, 2, 3
#: Report written, but an analysis failed (its sections are missing; ``failed_analyses`` says why).
EXIT_ANALYSIS_FAILED = EXIT_INTERNAL

#: The flag of each library setting that an InputError may name (``InputError.option``).
OPTION_FLAGS = {"encoding": "--encoding", "sep": "--sep", "min_site_rows": "--min-site-rows", "site": "--site",
                "min_cell": "--min-cell", "folds": "--folds", "seed": "--seed", "max_rows": "--max-rows",
                "map_rows": "--map-rows", "outcome": "--outcome", "despite_findings": "--despite-findings",
                "out": "--out"}


class _Group(click.Group):
    def main(self, *args, **kwargs):  # one-line errors, never a traceback for bad input
        kwargs.setdefault("standalone_mode", True)
        try:
            return super().main(*args, **{**kwargs, "standalone_mode": False})
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except click.ClickException as exc:  # usage errors too: one line, with where to find help
            msg = exc.format_message().replace("\n", " ")
            ctx = getattr(exc, "ctx", None)
            hint = f" (see '{ctx.command_path} --help')" if ctx is not None else ""
            click.echo(f"sitecheck: error: {msg}{hint}", err=True)
            sys.exit(EXIT_INPUT)
        except click.exceptions.Abort:
            click.echo("sitecheck: aborted", err=True)
            sys.exit(EXIT_INPUT)
        except InputError as exc:
            flag = OPTION_FLAGS.get(getattr(exc, "option", None) or "")
            click.echo(f"sitecheck: error: {exc}" + (f" (option {flag})" if flag and flag not in str(exc) else ""),
                       err=True)
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
        click.option("--encoding", default=None, help="Text encoding of CSV/TSV input (default utf-8)."),
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
        click.option("--fail-on", "fail_on", multiple=True, metavar="KIND", type=click.Choice(FINGERPRINT_KINDS),
                     help="Gate: exit 1 when a fingerprint of this kind is found (repeatable; one of "
                          + ", ".join(FINGERPRINT_KINDS) + ")."),
        click.option("--as-given", "as_given", is_flag=True, default=None,
                     help="Run the maps, the harmonisation check and the outcome analysis on the values as given "
                          "(default: after the repair plan's safe entries, applied in memory)."),
        click.option("--censor-policy", type=click.Choice(["limit", "limit_over_sqrt2", "limit_over_2", "missing"]),
                     default=None, help="Value for censored cells such as '<5' in the repair plan (default: "
                                        "limit / sqrt(2) below a limit, after Hornung & Reed 1990; the limit above)."),
        click.option("--quiet", "-q", is_flag=True, help="No progress messages on stderr."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


#: The command-line flag of each gate (the library names gates by their option key).
GATE_FLAGS = {"fail_above": "--fail-above", "fail_on": "--fail-on"}


def _run_scan(data, *, site, outcome, covariates, groups, identifiers, excluded, config, sep, encoding,
              out_dir, quiet, shareable=False, fail_above=None, fail_on=(), time=None, **flags):
    """Resolve the configuration (the library's one loader), scan, write, print the summary and
    the failed gates; exit 1 when a gate failed."""
    from sitecheck.reading.config import resolve_config
    from sitecheck.render import write_report
    from sitecheck.scan import scan_configured
    from sitecheck.table.roles import RoleSpec

    progress = Progress(quiet)
    t = lambda v: tuple(v) if v else None  # noqa: E731
    spec = RoleSpec(site=site, outcome=outcome, covariates=t(covariates), groups=t(groups),
                    identifiers=t(identifiers), excluded=t(excluded), time=time or None)
    if encoding is not None:
        import codecs

        try:
            codecs.lookup(encoding)
        except LookupError:
            raise InputError(f"--encoding {encoding!r}: not a known text encoding (for example utf-8, latin-1)") from None
    if sep is not None and len(sep) != 1:
        raise InputError(f"--sep {sep!r}: must be a single character")
    if flags.pop("as_given", None):
        flags["repair"] = False
    run = resolve_config(config, roles=spec, options=flags, sep=sep, encoding=encoding,
                         fail_above=fail_above, fail_on=tuple(fail_on) or None)
    if run.roles.site is None:
        raise InputError("no site column given; pass --site COLUMN or set site in the config file")
    _check_out_dir(out_dir, data)
    result = scan_configured(data, run, progress=progress)
    progress(f"writing report to {out_dir}")
    paths = write_report(result, out_dir, min_cell=run.options.min_cell, shareable=shareable)
    failed = check_gates(result, run.gates)
    residual = result.sections.get("residual")
    lines = [result.summary()]
    if residual is not None and getattr(residual, "statement", None):
        lines.append(residual.statement)
    lines.append("report: " + ", ".join(paths[k] for k in ("report.html", "report.json", "findings.md",
                                                           "repair_plan.json") if k in paths))
    for f in failed:
        setting = f"{f.setting:g}" if isinstance(f.setting, float) else f.setting
        lines.append(f"FAILED gate {GATE_FLAGS[f.gate]} {setting}: {f.message}")
    click.echo("\n".join(lines))
    if result.failures:
        click.echo(failure_line(result.failures, out_dir), err=True)
        sys.exit(EXIT_ANALYSIS_FAILED)
    if failed:
        sys.exit(EXIT_GATE)
    return result


def failure_line(failures, out_dir: str) -> str:
    """One line naming the failed analyses (exit code 3: the report was written without their sections)."""
    hard = [f for f in failures if f.get("status") == "failed"] or list(failures)
    first = hard[0]
    what = f"{first['analysis']} ({first['error']}: {first['message']})" if first.get("error") else first["analysis"]
    more = [f["analysis"] for f in failures if f is not first]
    extra = f"; also missing: {', '.join(more)}" if more else ""
    return (f"sitecheck: analysis failed: {what}{extra}; report written to {out_dir} without its sections "
            "(set SITECHECK_DEBUG=1 for the traceback)")


def _check_out_dir(out_dir: str, data: str) -> None:
    if os.path.realpath(data) == os.path.realpath(out_dir):
        raise InputError(f"--out {out_dir}: is the input file; choose a directory for the report")
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise InputError(f"--out {out_dir}: exists and is not a directory")


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
              config=None, sep=None, encoding=None, out_dir=os.path.join(out_dir, "report"), quiet=quiet,
              seed=None, folds=None, max_rows=None, map_rows=None, min_site_rows=None, min_cell=None,
              include_datetime=None, as_given=None, censor_policy=None)


@main.command("schema", epilog="Example:\n\n  sitecheck schema > report.schema.json")
def schema_cmd():
    """Print the JSON Schema of report.json (versioned)."""
    import json

    from sitecheck.report.schema import report_schema

    click.echo(json.dumps(report_schema(), indent=2))


from sitecheck.cli.harmonise import harmonise_cmd  # noqa: E402  (issue 6: the harmonise command)
from sitecheck.cli.repair import repair_cmd, repair_schema_cmd  # noqa: E402  (issue 17: the repair loop)

main.add_command(harmonise_cmd)
main.add_command(repair_cmd)
main.add_command(repair_schema_cmd)


if __name__ == "__main__":  # pragma: no cover
    main()
