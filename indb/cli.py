"""The ``indb`` command line: parse options, call the library, print.

No SQL and no numerics live here, and no text layout (``indb.render``). The fit's options
are generated from their one declaration (``indb.options.OPTIONS``, by ``indb.cli_options``)
and each maps onto the keyword of :func:`indb.api.fit` of the same name; options left out
are not passed on, so the library's defaults stay the only defaults. Errors raised by the
library become one line on stderr starting with ``indb: error:`` and an exit code per error
class (see ``EXIT_CODES``); ``indb retrain`` adds exit code 6 for a version held back by a
gate.

Commands: ``fit`` (optionally writing the model back with ``--name``), ``run`` and
``retrain`` (TOML spec files), the registry commands ``models``, ``versions``, ``show``,
``compare``, ``nested``, ``promote``, ``drop``, ``scoring-sql``, ``assess``, ``report`` (in
:mod:`indb.cli_report`) and ``demo``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click

from indb import cli_options as CO
from indb import options as O
from indb import render as R
from indb import writeback
from indb.api import dry_run as dry_run_model
from indb.api import fit as fit_model
from indb.api import registry as open_registry
from indb.cli_errors import (
    EXIT_CODES,
    OneLineErrors,
    echo_warnings,
    library_errors,
    one_line,
)
from indb.cli_explore import explore_command
from indb.cli_report import report_command
from indb.cli_shared import (
    _check_database_path,
    _is_memory,
    _is_url,
    database_option,
    deploy_options,
    dry_run_option,
    execution_options,
    model_options,
    output_options,
    progress_json_option,
    registry_database_option,
    registry_schema_option,
)
from indb.engines.backends import DIALECT_NAMES, SCORING_DIALECTS, dialect_for
from indb.engines.base_dialect import Dialect
from indb.errors import (
    NonConvergenceError,
    RegistryError,
    SpecError,
)
from indb.registry import DEFAULT_SCHEMA, Registry
from indb.results import FitResult, IterationRecord
from indb.retrain import EXIT_HELD, retrain
from indb.spec import Source
from indb.specfile import SpecFile, load_spec_file

__all__ = ["main", "EXIT_CODES"]

F = TypeVar("F", bound=Callable[..., Any])

EXIT_EPILOG = f"""\b
Exit codes (stable; for schedulers and scripts):
  0  success; for retrain: promoted, unchanged, or the first version
  1  any other indb error
  2  input error: an option, spec file, column or data value to fix
  3  engine error: the database failed while running the generated SQL
  4  the engine cannot express something the model needs
  5  IRLS did not converge (with --strict: nothing printed or recorded; without: the
     report is printed and a --name version is recorded held)
  {EXIT_HELD}  retrain: new version recorded but held back by a gate; the scoring
     view still serves the live version
  7  registry conflict: unknown model or version, dropping the live version,
     promoting a dropped one
"""

# -- progress -----------------------------------------------------------------------


def _echo_iteration(record: IterationRecord) -> None:
    click.echo(R.format_iteration(record), err=True)


def _echo_iteration_json(record: IterationRecord) -> None:
    click.echo(R.iteration_json(record), err=True)


def _progress(quiet: bool, as_json: bool, progress_json: bool) -> Callable[..., None] | None:
    # --progress-json is an explicit request for machine-readable lines, so it wins over -q
    # and --json (stdout stays the one JSON document either way).
    if progress_json:
        return _echo_iteration_json
    if quiet or as_json:
        return None
    return _echo_iteration


def _fit_arguments(options: dict[str, Any]) -> dict[str, Any]:
    """Map parsed CLI options onto ``indb.api.fit`` keywords, passing only what was given."""
    return CO.given_arguments(options, CO.on_cli("model", "engine"))


def _deploy_arguments(options: dict[str, Any]) -> dict[str, Any]:
    """Map --name and its companions onto ``indb.api.fit`` keywords (empty without --name)."""
    if options["name"] is None:
        # options that only mean something together with --name
        given = CO.given_flags(options, (o for o in O.group("deploy") if o.name != "name"))
        if given:
            raise SpecError(
                f"{', '.join(given)} "
                f"{'applies' if len(given) == 1 else 'apply'} only when the model is "
                "written back; "
                "add --name NAME (and --db PATH)"
            )
        return {}
    if _is_memory(options["db"]):
        raise SpecError(
            f"--name {options['name']!r} writes the model into a database, but no --db was "
            "given; add --db PATH (a DuckDB file, created if the source is a Parquet/CSV file)"
        )
    # Names are checked before the fit: the library checks them only when writing back,
    # after a fit that may have taken minutes.
    writeback.check_name(options["name"], "model name (--name)")
    for key in ("view_schema", "registry_schema"):
        if options[key] is not None:
            writeback.check_name(options[key], O.OPTION[key].flag)
    return CO.given_arguments(options, CO.on_cli("deploy"))


# -- printing -----------------------------------------------------------------------


def _print_sql(statements: Sequence[tuple[str, str]], as_json: bool, note: str = "") -> None:
    if as_json:
        click.echo(R.statements_json(statements, note))
    else:
        click.echo(R.statements_text(statements, note), nl=False)


def _emit_result(result: FitResult, as_json: bool, db: str | None) -> None:
    if as_json:
        click.echo(R.fit_json(result))
    else:
        click.echo(R.fit_text(result, db), nl=False)
    if not result.converged:
        # printed in full, and a version recorded held, but a scheduler must notice
        click.get_current_context().exit(dict(EXIT_CODES)[NonConvergenceError])


def _shown_warnings(result: FitResult, as_json: bool) -> tuple[str, ...]:
    # The text report lists the fit's warnings itself; JSON carries them too, but stderr
    # is the only place a reader of --json output sees them at once.
    return () if as_json else tuple(one_line(w) for w in result.warnings)


# -- spec files and the registry ------------------------------------------------------------


def _load_spec(path: str, command: str, *, dry_run: bool) -> SpecFile:
    spec = load_spec_file(path)
    _ = spec.name  # raises the spec file's "needs a model name" error before any work
    db = spec.engine.get("db")
    # as for `fit --name`: only a Parquet/CSV source may start a new database file
    _check_database_path(
        db,
        may_create=Source.parse(spec.model["source"]).kind == "file",
        hint="or make [model] source a Parquet/CSV path to start a new database",
        option=f"spec file {path}: [engine] db",
    )
    if dry_run:
        # A dry run writes nothing, not even a new empty database file: without the file
        # there is no registry and no live version, so plan against an in-memory database.
        local = isinstance(db, str) and not _is_url(db) and not _is_memory(db)
        if local and not Path(db).exists():
            engine = {k: v for k, v in spec.engine.items() if k != "db"}
            spec = dataclasses.replace(spec, engine=engine)
        return spec
    if _is_memory(db):
        raise SpecError(
            f"spec file {path}: [engine] has no db; `indb {command}` records the model in a "
            'database, so set db = "models.duckdb" (relative to the spec file)'
        )
    return spec


@contextmanager
def _open_registry(db: str, schema: str | None, *, writes: bool = False) -> Iterator[Registry]:
    """The registry of ``db``; opened read-only unless the command ``writes`` to it (so the
    reading commands work on a read-only filesystem or a file without write permission)."""
    _check_database_path(db, hint="the registry lives in the file a named fit wrote to")
    reg = open_registry(db, schema or DEFAULT_SCHEMA, read_only=not writes)
    try:
        yield reg
    finally:
        reg.engine.close()


def _dialect(name: str) -> Dialect:
    if name.strip().lower() not in DIALECT_NAMES:
        raise SpecError(
            f"--dialect {name!r} is not supported for scoring SQL; supported: "
            f"{', '.join(SCORING_DIALECTS)}"
        )
    return dialect_for(name)


# -- commands -----------------------------------------------------------------------


@click.group(
    cls=OneLineErrors,
    context_settings={"help_option_names": ["-h", "--help"]},
    epilog=EXIT_EPILOG,
)
@click.version_option(package_name="indb", prog_name="indb")
def main() -> None:
    """indb: fit generalized linear models inside the database.

    A fit named with --name is written back into the database: a registry version, a
    scoring view and a scoring macro. The registry commands list, compare, promote and
    drop versions; `run` and `retrain` work from TOML spec files.
    """


@main.command("fit", short_help="Fit a model; with --name, write it back.")
@database_option
@model_options
@execution_options
@deploy_options
@output_options
@progress_json_option
@dry_run_option
@click.argument("source")
def fit_command(
    source: str, as_json: bool, quiet: bool, progress_json: bool, dry_run: bool, **options: Any
) -> None:
    """Fit a model on SOURCE and print a report (or JSON with --json).

    SOURCE is a table or view name, a SELECT query, or a Parquet/CSV path (globs allowed).
    With --name the model is also written back into --db (see `indb models`).
    """
    with library_errors(quiet) as caught:
        deploy = _deploy_arguments(options)
        if deploy:
            creates = not dry_run and Source.parse(source).kind == "file"
            hint = "or give a Parquet/CSV path as SOURCE to create it (without --dry-run)"
            _check_database_path(options["db"], may_create=creates, hint=hint)
        else:
            _check_database_path(options["db"])
        kwargs = _fit_arguments(options)
        if dry_run:
            statements = dry_run_model(source, **kwargs)
        else:
            progress = _progress(quiet, as_json, progress_json)
            if progress is not None:
                kwargs["progress"] = progress
            result = fit_model(source, **kwargs, **deploy)
    if dry_run:
        echo_warnings(caught, quiet=quiet, already_shown=())
        note = (
            f"nothing was written; after the fit, --name writes registry rows and the view "
            f"{deploy['name']} (see `indb scoring-sql` for its SQL)"
            if deploy
            else "nothing was written"
        )
        _print_sql(statements, as_json, note)
        return
    echo_warnings(caught, quiet=quiet, already_shown=_shown_warnings(result, as_json))
    _emit_result(result, as_json, options["db"])


@main.command("run", short_help="Fit and deploy the model of a spec file.")
@output_options
@progress_json_option
@dry_run_option
@CO.click_options(
    O.OPTION["new_version"], help="Record a new version even when spec and data are unchanged."
)
@click.argument("spec_path", metavar="SPEC.toml")
def run_command(
    spec_path: str,
    as_json: bool,
    quiet: bool,
    progress_json: bool,
    dry_run: bool,
    new_version: bool | None,
) -> None:
    """Fit the model declared in SPEC.toml, record it and make it the live version.

    The spec file's [model] table gives the fit, [deploy] the model name and view, [engine]
    the database; [gates] apply to `indb retrain` only.
    """
    with library_errors(quiet) as caught:
        spec = _load_spec(spec_path, "run", dry_run=dry_run)
        if dry_run:
            statements = dry_run_model(**spec.model, **spec.engine)
        else:
            progress = _progress(quiet, as_json, progress_json)
            result = fit_model(
                **spec.model,
                **spec.engine,
                **spec.deploy,
                new_version=bool(new_version),
                progress=progress,
            )
    if dry_run:
        echo_warnings(caught, quiet=quiet, already_shown=())
        _print_sql(statements, as_json, "nothing was written")
        return
    echo_warnings(caught, quiet=quiet, already_shown=_shown_warnings(result, as_json))
    _emit_result(result, as_json, spec.engine.get("db"))


@main.command("retrain", short_help="Refit a spec file; promote if the gates pass.")
@output_options
@progress_json_option
@click.option(
    "--dry-run",
    "dry_run",
    is_flag=True,
    help="Print the SQL the refit would send (warm-started from the live version); write nothing.",
)
@click.option(
    "--force", is_flag=True, help="Record a new version even when spec and data are unchanged."
)
@click.argument("spec_path", metavar="SPEC.toml")
@click.pass_context
def retrain_command(
    ctx: click.Context,
    spec_path: str,
    as_json: bool,
    quiet: bool,
    progress_json: bool,
    dry_run: bool,
    force: bool,
) -> None:
    """Refit SPEC.toml warm-started from the live version; promote only if the gates pass.

    Exit code 0: promoted, unchanged or first version; 6: recorded but held back by a gate
    (the scoring view keeps serving the live version). See `indb --help` for the others.
    """
    with library_errors(quiet) as caught:
        spec = _load_spec(spec_path, "retrain", dry_run=dry_run)
        outcome = retrain(
            spec, dry_run=dry_run, progress=_progress(quiet, as_json, progress_json), force=force
        )
    echo_warnings(caught, quiet=quiet, already_shown=())
    if dry_run:
        _print_sql(outcome.sql, as_json, "nothing was written")
        return
    click.echo(
        R.retrain_json(outcome) if as_json else R.retrain_text(outcome, spec.engine.get("db"))
    )
    ctx.exit(outcome.exit_code)


@main.command("models", short_help="List the registered models.")
@registry_database_option
@registry_schema_option
@output_options
def models_command(db: str, registry_schema: str | None, as_json: bool, quiet: bool) -> None:
    """List the models in the registry: live version, number of versions, scoring view."""
    with library_errors(quiet), _open_registry(db, registry_schema) as reg:
        models = [(m, reg.versions(m["model_name"])) for m in reg.models()]
    click.echo(R.models_json(models) if as_json else R.models_text(models, db))


@main.command("versions", short_help="List the versions of a model.")
@registry_database_option
@registry_schema_option
@output_options
@click.argument("name")
def versions_command(
    name: str, db: str, registry_schema: str | None, as_json: bool, quiet: bool
) -> None:
    """List the versions of model NAME, one line each."""
    with library_errors(quiet), _open_registry(db, registry_schema) as reg:
        versions, done = reg.versions(name), reg.assessments(name)
    render = R.versions_json(name, versions, done) if as_json else R.versions_text(versions, done)
    click.echo(render)


@main.command("show", short_help="Print the stored report of a version.")
@registry_database_option
@registry_schema_option
@output_options
@click.option(
    "--version", "version", type=int, default=None, metavar="K", help="Version (default: live)."
)
@click.argument("name")
def show_command(
    name: str,
    version: int | None,
    db: str,
    registry_schema: str | None,
    as_json: bool,
    quiet: bool,
) -> None:
    """Print the stored report of one version of model NAME (the live one by default)."""
    with library_errors(quiet), _open_registry(db, registry_schema) as reg:
        if version is None:
            version = reg.model(name)["live_version"]
            if version is None:
                raise RegistryError(f"model {name!r} has no live version; give --version K")
        result = reg.load(name, version)
        row = next(v for v in reg.versions(name) if v["version"] == version)
        done = reg.assessments(name, version)
    if as_json:
        click.echo(R.show_json(name, version, row, result, done))
    else:
        click.echo(R.show_text(name, version, row, result, done), nl=False)


@main.command("compare", short_help="Compare two versions of a model.")
@registry_database_option
@registry_schema_option
@output_options
@click.argument("name")
@click.argument("a", type=int)
@click.argument("b", type=int)
def compare_command(
    name: str, a: int, b: int, db: str, registry_schema: str | None, as_json: bool, quiet: bool
) -> None:
    """Compare versions A and B of model NAME: coefficient changes in standard errors of A,
    deviance per row and rows used."""
    with library_errors(quiet), _open_registry(db, registry_schema) as reg:
        cmp = reg.compare(name, a, b)
    click.echo(R.compare_json(cmp) if as_json else R.compare_text(cmp))


@main.command("nested", short_help="Test a model within a larger one.")
@registry_database_option
@registry_schema_option
@output_options
@click.argument("small", metavar="SMALL")
@click.argument("big", metavar="BIG")
def nested_command(
    small: str, big: str, db: str, registry_schema: str | None, as_json: bool, quiet: bool
) -> None:
    """Test registered model SMALL within BIG, each NAME (its live version) or NAME:VERSION:
    the deviance change on the coefficients BIG adds, against chi-squared (fixed
    dispersion) or F with BIG's dispersion. Both must be fitted on the same rows with the
    same family, link, weights and offset, SMALL's terms among BIG's (exit code 2
    otherwise). Nothing is written."""
    with library_errors(quiet), _open_registry(db, registry_schema) as reg:
        test = reg.nested(small, big)
    click.echo(R.nested_json(test) if as_json else R.nested_text(test))


@main.command("promote", short_help="Make a version live (also the roll-back).")
@registry_database_option
@registry_schema_option
@CO.click_options(
    O.OPTION["view_schema"],
    help="Move the scoring view and macro to schema S (the old ones are dropped in the same "
    "transaction); default: where they are now.",
)
@output_options
@click.argument("name")
@click.argument("version", type=int)
def promote_command(
    name: str,
    version: int,
    db: str,
    registry_schema: str | None,
    view_schema: str | None,
    as_json: bool,
    quiet: bool,
) -> None:
    """Make VERSION of model NAME live: its scoring view and macro serve it from now on.

    Promoting an earlier version is the roll-back.
    """
    with library_errors(quiet), _open_registry(db, registry_schema, writes=True) as reg:
        previous = reg.model(name)["live_version"]
        reg.promote(name, version, view_schema=view_schema)
        view = R.view_label(reg.model(name))
    render = R.promote_json if as_json else R.promote_text
    click.echo(render(name, version, previous, view))


@main.command("drop", short_help="Drop a version that is not live.")
@registry_database_option
@registry_schema_option
@output_options
@click.argument("name")
@click.argument("version", type=int)
def drop_command(
    name: str, version: int, db: str, registry_schema: str | None, as_json: bool, quiet: bool
) -> None:
    """Drop VERSION of model NAME (its rows stay for audit; the live version cannot be
    dropped)."""
    with library_errors(quiet), _open_registry(db, registry_schema, writes=True) as reg:
        reg.drop(name, version)
    click.echo(R.drop_json(name, version) if as_json else R.drop_text(name, version))


@main.command("scoring-sql", short_help="Print a model's scoring view SQL.")
@registry_database_option
@registry_schema_option
@click.option(
    "--version", "version", type=int, default=None, metavar="K", help="Version (default: live)."
)
@click.option(
    "--source",
    "source",
    default=None,
    metavar="SRC",
    help="Table, query or file the view reads (default: the model's scoring source).",
)
@click.option(
    "--intervals/--no-intervals",
    default=None,
    help="Add the standard error of eta and the confidence interval columns "
    "(default: as the model is deployed).",
)
@click.option(
    "--dialect",
    default="duckdb",
    show_default=True,
    metavar="D",
    help=f"SQL dialect to write: {', '.join(SCORING_DIALECTS)}.",
)
@output_options
@click.argument("name")
def scoring_sql_command(
    name: str,
    db: str,
    registry_schema: str | None,
    version: int | None,
    source: str | None,
    intervals: bool | None,
    dialect: str,
    as_json: bool,
    quiet: bool,
) -> None:
    """Print the CREATE VIEW statement that scores with model NAME, to run elsewhere."""
    with library_errors(quiet):
        target = _dialect(dialect)
        with _open_registry(db, registry_schema) as reg:
            row = reg.model(name)
            sql = reg.scoring_sql(
                name,
                target,
                version=version,
                source=source,
                intervals=intervals,
                view_schema=row.get("view_schema"),
            )
    if as_json:
        chosen = row["live_version"] if version is None else version
        click.echo(R.scoring_sql_json(name, chosen, target.name, row, sql))
    else:
        click.echo(R.scoring_sql_text(sql))


@main.command("assess", short_help="Judge a stored model on rows it has not seen.")
@registry_database_option
@registry_schema_option
@click.option(
    "--on",
    required=True,
    metavar="SOURCE",
    help="Table, query or Parquet/CSV file of --db with the model's columns and response.",
)
@click.option("--version", type=int, default=None, metavar="K", help="Version (default: live).")
@click.option(
    "--by",
    multiple=True,
    metavar="COL",
    help="Actual against expected by this column of SOURCE too (repeatable; numeric: in bands).",
)
@click.option(
    "--bands",
    type=click.IntRange(min=2, max=1_000),
    default=10,
    show_default=True,
    metavar="N",
    help="Bands of equal exposure along the score (and a numeric --by column).",
)
@click.option(
    "--against",
    metavar="NAME2[:K]",
    help="Score this model too, in the same scans: its figures and the double-lift table.",
)
@click.option("--record", is_flag=True, default=None, help="Keep the figures in the registry.")
@execution_options
@output_options
@click.argument("name")
def assess_command(name: str, db: str, registry_schema: str | None, **options: Any) -> None:
    """Judge model NAME on the rows of --on SOURCE inside the database: deviance, actual
    against expected, Gini, bands, levels and a binomial model's calibration. Nothing is
    written (a DuckDB file is opened read-only) unless --record."""
    from indb import assess_report  # imported here, as the demo is: `fit` needs neither
    from indb.api import assess

    as_json, quiet = options.pop("as_json"), options.pop("quiet")
    with library_errors(quiet) as caught:
        _check_database_path(db, hint="the registry lives in the file a named fit wrote to")
        given = {k: v for k, v in options.items() if v is not None}
        result = assess(name, db=db, registry_schema=registry_schema or DEFAULT_SCHEMA, **given)
    echo_warnings(caught, quiet=quiet, already_shown=())
    render = assess_report.assess_json if as_json else assess_report.assess_text
    click.echo(render(result), nl=as_json)


@main.command("demo", short_help="Run the worked example on invented data.")
@click.option(
    "--rows",
    type=click.IntRange(min=1),
    default=None,
    metavar="N",
    help="Rows of invented data to generate (default: the demo's own size).",
)
@click.option(
    "--out",
    "out_dir",
    default="demo_out",
    show_default=True,
    metavar="DIR",
    help="Directory the demo writes its data, database and reports to.",
)
@click.option("--quick", is_flag=True, help="Small, fast version of the demo.")
def demo_command(rows: int | None, out_dir: str, quick: bool) -> None:
    """Run the worked example on invented data and write its outputs to DIR."""
    from indb import demo  # imported here: the demo pulls in more than `indb fit` needs

    with library_errors(quiet=False) as caught:
        demo.run(quick=quick, out_dir=out_dir, rows=rows, echo=click.echo)
    echo_warnings(caught, quiet=False, already_shown=())


main.add_command(report_command)


if __name__ == "__main__":  # pragma: no cover
    main()


main.add_command(explore_command)
