"""The repair loop's commands: ``sitecheck repair`` applies a repair plan to a table,
``sitecheck repair-schema`` prints the plan's JSON Schema (registered at the end of cli.py)."""
from __future__ import annotations

import json

import click


@click.command("repair", epilog="Example:\n\n  sitecheck repair pooled.csv --plan report/repair_plan.json --out pooled_repaired.csv")
@click.argument("data", type=click.Path(dir_okay=False))
@click.option("--plan", "plan_path", required=True, type=click.Path(dir_okay=False), metavar="FILE",
              help="The repair plan (repair_plan.json written by a scan; edit 'enabled' and 'params' first).")
@click.option("--out", "out", required=True, type=click.Path(dir_okay=False), metavar="FILE",
              help="The repaired table, in the input's format; the input is never modified.")
@click.option("--sep", metavar="CHAR", help="Field separator (default from the extension).")
@click.option("--encoding", default="utf-8", show_default=True, help="Text encoding of CSV/TSV input.")
def repair_cmd(data, plan_path, out, sep, encoding):
    """Apply the enabled entries of a repair plan to DATA and write the repaired table.

    Prints a per-site count of the cells changed; the full log goes to OUT.repair_log.json.
    """
    from sitecheck.table.repair import repair_file

    res = repair_file(data, plan_path, out, sep=sep, encoding=encoding)
    click.echo(f"repaired table: {res['out']} ({res['cells_total']} cells changed by "
               f"{len(res['applied'])} entries; {len(res['skipped'])} not enabled)")
    for site, cols in res["cells_by_site"].items():
        parts = ", ".join(f"{c} {op} {n}" for c, ops in cols.items() for op, n in ops.items())
        click.echo(f"  {site}: {parts}")
    for eid, n in res.get("rows_without_date", {}).items():
        if n:
            click.echo(f"  entry {eid}: {n} rows of its site have no usable date and were left as they were")
    click.echo(f"log: {res['log']}")


@click.command("repair-schema", epilog="Example:\n\n  sitecheck repair-schema > repair_plan.schema.json")
def repair_schema_cmd():
    """Print the JSON Schema of repair_plan.json (versioned)."""
    from sitecheck.table.repair import plan_schema

    click.echo(json.dumps(plan_schema(), indent=2))
