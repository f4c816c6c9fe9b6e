"""``indb report``: one self-contained HTML page about a stored model version."""

from __future__ import annotations

import json
from dataclasses import asdict
from typing import Any

import click

from indb.cli_errors import echo_warnings, library_errors
from indb.cli_shared import (
    _check_database_path,
    execution_options,
    registry_database_option,
    registry_schema_option,
)
from indb.registry import DEFAULT_SCHEMA


@click.command("report", short_help="Write a model's report as one HTML file.")
@registry_database_option
@registry_schema_option
@click.option("--version", type=int, default=None, metavar="K", help="Version (default: live).")
@click.option(
    "--on",
    default=None,
    metavar="HOLDOUT",
    help="Also judge the version on these rows (a table, query or Parquet/CSV file of --db "
    "with the model's columns and response): lift, Lorenz curve, actual against expected.",
)
@click.option(
    "--by",
    multiple=True,
    metavar="COL",
    help="With --on: actual against expected by this column of HOLDOUT too (repeatable).",
)
@click.option(
    "--bands",
    type=click.IntRange(min=2, max=1_000),
    default=None,
    metavar="N",
    help="With --on: bands of equal exposure along the score (default 10).",
)
@click.option(
    "--against",
    default=None,
    metavar="NAME2[:K]",
    help="With --on: judge this second model (its live version, or version K) in the same "
    "scans; the report adds the double-lift chart and both models' figures side by side.",
)
@click.option(
    "--out",
    required=True,
    metavar="FILE.html",
    help="The HTML file to write (replaced whole; never left half-written).",
)
@execution_options
@click.option(
    "--json", "as_json", is_flag=True, help="Print one JSON object about the file written."
)
@click.option("-q", "--quiet", is_flag=True, help="No warnings on stderr.")
@click.argument("name")
def report_command(name: str, db: str, registry_schema: str | None, **options: Any) -> None:
    """Write the report of model NAME (the live version unless --version) to --out: the
    model and its history, fit quality and the iteration trace, a chart per term, the
    coefficients and, with --on, the holdout assessment as charts. Everything comes from the
    registry and grouped scans inside the database; nothing is written to it."""
    from indb.api import report_html  # imported here: the charts pull in matplotlib

    as_json, quiet = options.pop("as_json"), options.pop("quiet")
    with library_errors(quiet) as caught:
        _check_database_path(db, hint="the registry lives in the file a named fit wrote to")
        given = {k: v for k, v in options.items() if v not in (None, ())}
        written = report_html(
            name, db=db, registry_schema=registry_schema or DEFAULT_SCHEMA, **given
        )
    echo_warnings(caught, quiet=quiet, already_shown=())
    if as_json:
        click.echo(json.dumps(asdict(written)))
        return
    on = f", judged on {written.assessed_on}" if written.assessed_on else ""
    if written.compared_with:
        on += f" against {written.compared_with}"
    click.echo(
        f"Report of {written.model} version {written.version}{on}: {written.path} "
        f"({written.bytes / 1024:,.0f} KB, {written.seconds:.1f} s). Open it in a browser."
    )
