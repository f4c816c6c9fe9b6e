"""Options and checks shared by the command modules (:mod:`indb.cli` and the commands
kept in modules of their own, such as :mod:`indb.cli_explore`)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

import click

from indb import cli_options as CO
from indb import options as O
from indb.errors import SpecError

F = TypeVar("F", bound=Callable[..., object])


# -- shared option groups (defined once, applied by decorator) --------------------------


def _apply(*decorators: Callable[[F], F]) -> Callable[[F], F]:
    def wrap(func: F) -> F:
        for decorator in reversed(decorators):
            func = decorator(func)
        return func

    return wrap


# The fit's options, generated from their one declaration (indb.options.OPTIONS).
database_option = CO.click_options(O.OPTION["db"])
model_options = CO.click_options(*CO.on_cli("model"))
execution_options = CO.click_options(*(o for o in CO.on_cli("engine") if o.name != "db"))
deploy_options = CO.click_options(*CO.on_cli("deploy"))

output_options = _apply(
    click.option(
        "--json",
        "as_json",
        is_flag=True,
        help="Print exactly one JSON object on stdout instead of the report.",
    ),
    click.option("-q", "--quiet", is_flag=True, help="No progress lines or warnings on stderr."),
)

progress_json_option = click.option(
    "--progress-json",
    "progress_json",
    is_flag=True,
    help="One JSON object per IRLS iteration on stderr instead of the text line "
    "(printed even with -q or --json).",
)

registry_schema_option = CO.click_options(O.OPTION["registry_schema"])

registry_database_option = click.option(
    "--db",
    "db",
    metavar="DB",
    required=True,
    help="Where the model registry lives: a DuckDB database file, or postgresql://..., "
    "spark:local[N], sc://host:port. Commands that only read open a DuckDB file read-only.",
)

dry_run_option = click.option(
    "--dry-run",
    "dry_run",
    is_flag=True,
    help="Print the SQL the fit would send and stop; nothing is written (the read-only "
    "pre-fit scans do run).",
)


def _is_memory(db: str | None) -> bool:
    return db is None or db in ("", ":memory:")


def _is_url(db: str) -> bool:
    return "://" in db or db.strip().lower().startswith("spark:")


def _check_database_path(
    db: str | None,
    *,
    may_create: bool = False,
    hint: str = "or leave --db out to read Parquet/CSV files in an in-memory database",
    option: str = "--db",
) -> None:
    # DuckDB creates a missing database file on connect; for `fit`, `run` and `retrain` that
    # only turns a typo in the path into an empty database and a confusing "table does not
    # exist" later. A named fit of a Parquet/CSV file may create the file: it is where the
    # model is written. ``option`` names where the path was given.
    if _is_memory(db) or _is_url(db) or may_create:
        return
    if not Path(db).exists():
        raise SpecError(f"{option} {db!r}: no such database file; check the path, {hint}")
