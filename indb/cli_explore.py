"""``indb explore``: one-way figures of a response by column, before a model exists."""

from __future__ import annotations

from typing import Any

import click

from indb import cli_options as CO
from indb import options as O
from indb.cli_errors import echo_warnings, library_errors
from indb.cli_shared import (
    _check_database_path,
    database_option,
    execution_options,
    output_options,
)


@click.command("explore", short_help="One-way figures of a response by column, before a model.")
@database_option
@CO.click_options(O.OPTION["response"], help="Response column (numeric, or BOOLEAN read as 0/1).")
@CO.click_options(
    O.OPTION["offset"],
    help="Log of each row's exposure, e.g. 'ln(exposure)': exposure is weight x exp(offset).",
)
@CO.click_options(
    O.OPTION["weight"],
    help="Weight of each row: multiplies the response and the exposure (without an "
    "offset it is the exposure).",
)
@CO.click_options(*O.EXPLORE_OWN)
@CO.click_options(
    O.OPTION["exclude"], help="Leave this column out of the default columns (repeatable)."
)
@CO.click_options(
    O.OPTION["categorical"], help="Treat this numeric column as categorical (repeatable)."
)
@execution_options
@output_options
@click.argument("source")
def explore_command(source: str, as_json: bool, quiet: bool, **options: Any) -> None:
    """Per level of each categorical column and per quantile band of each numeric column of
    SOURCE: rows, exposure, actual (the sum of weight x response), rate (actual / exposure).

    Three scans of SOURCE inside the database; nothing is written. Rows with a NULL response,
    offset or weight are set aside and counted; NULL in an explored column is a level.
    """
    # imported here so that this command stays one block of this module
    from indb import exploration_report as XR
    from indb.api import explore as explore_model

    with library_errors(quiet) as caught:
        _check_database_path(options["db"])
        found = explore_model(source, **CO.given_arguments(options, O.EXPLORE_OPTIONS))
    echo_warnings(caught, quiet=quiet, already_shown=())
    if as_json:
        click.echo(XR.exploration_json(found))
    else:
        click.echo(XR.exploration_text(found), nl=False)
