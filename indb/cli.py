"""The ``indb`` command line: parse options, call the library, print.

No SQL and no numerics live here. Every option maps onto one keyword of :func:`indb.api.fit`
(or of the registry and retrain functions); options left out are not passed on, so the
library's defaults stay the only defaults. Errors raised by the library become one line on
stderr starting with ``indb: error:`` and an exit code per error class (see ``EXIT_CODES``);
``indb retrain`` adds exit code 6 for a version held back by a gate.

Commands: ``fit`` (optionally writing the model back with ``--name``), ``run`` and
``retrain`` (TOML spec files), the registry commands ``models``, ``versions``, ``show``,
``compare``, ``promote``, ``drop``, ``scoring-sql``, and ``demo``.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import inspect
import json
import math
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click

from indb import writeback
from indb.api import dry_run as dry_run_model
from indb.api import fit as fit_model
from indb.api import registry as open_registry
from indb.dialect import SCORING_DIALECTS, Dialect, dialect_for
from indb.errors import (
    EngineError,
    IndbError,
    NonConvergenceError,
    RegistryError,
    SpecError,
    UnsupportedError,
)
from indb.registry import DEFAULT_SCHEMA, Registry
from indb.report import render_json, render_report
from indb.results import FitResult, IterationRecord
from indb.retrain import EXIT_HELD, RetrainOutcome, retrain
from indb.spec import MAX_LEVELS_LIMIT, Source
from indb.specfile import SpecFile, load_spec_file

__all__ = ["main", "EXIT_CODES"]

F = TypeVar("F", bound=Callable[..., Any])

# Most specific class first: the first match decides the exit code.
EXIT_CODES: tuple[tuple[type[IndbError], int], ...] = (
    (SpecError, 2),
    (EngineError, 3),
    (UnsupportedError, 4),
    (NonConvergenceError, 5),
    (RegistryError, 7),
    (IndbError, 1),
)

EXIT_EPILOG = f"""\b
Exit codes (stable; for schedulers and scripts):
  0  success; for retrain: promoted, unchanged, or the first version
  1  any other indb error
  2  input error: an option, spec file, column or data value to fix
  3  engine error: the database failed while running the generated SQL
  4  the engine cannot express something the model needs
  5  IRLS did not converge and strict mode was asked (--strict)
  {EXIT_HELD}  retrain: new version recorded but held back by a gate; the scoring
     view still serves the live version
  7  registry conflict: unknown model or version, dropping the live version,
     promoting a dropped one
"""

_FIT_DEFAULTS = {
    name: p.default
    for name, p in inspect.signature(fit_model).parameters.items()
    if p.default is not inspect.Parameter.empty
}


def _default(name: str) -> str:
    return f" [library default: {_FIT_DEFAULTS.get(name)}]" if name in _FIT_DEFAULTS else ""


# -- errors -------------------------------------------------------------------------


class CommandFailure(click.ClickException):
    """A library error turned into one stderr line and an exit code."""

    def __init__(self, message: str, exit_code: int) -> None:
        super().__init__(message)
        self.exit_code = exit_code

    def show(self, file: Any = None) -> None:
        click.echo(f"indb: error: {self.message}", err=True)


def _one_line(text: str) -> str:
    parts = [line.strip() for line in text.splitlines() if line.strip()]
    return " ".join(parts) if parts else "(no message)"


def _exit_code(exc: IndbError) -> int:
    for cls, code in EXIT_CODES:
        if isinstance(exc, cls):
            return code
    return 1


@contextmanager
def _library_errors(quiet: bool) -> Iterator[list[warnings.WarningMessage]]:
    """Collect warnings raised inside and turn an ``IndbError`` into a ``CommandFailure``."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield caught
        except IndbError as exc:
            _echo_warnings(caught, quiet=quiet, already_shown=())
            raise CommandFailure(_one_line(str(exc)), _exit_code(exc)) from None


def _echo_warnings(
    caught: Sequence[warnings.WarningMessage], *, quiet: bool, already_shown: Sequence[str]
) -> None:
    if quiet:
        return
    seen: set[str] = set(already_shown)
    for w in caught:
        text = _one_line(str(w.message))
        if text in seen:
            continue
        seen.add(text)
        click.echo(f"indb: warning: {text}", err=True)


# -- option parsing helpers (input mistakes are SpecErrors: exit code 2) ---------------


def _parse_pairs(
    values: Sequence[str], option: str, example: str, shape: str = "COLUMN=VALUE"
) -> dict[str, str]:
    pairs: dict[str, str] = {}
    for raw in values:
        column, sep, value = raw.partition("=")
        column = column.strip()
        if not sep or not column or value == "":
            raise SpecError(
                f"{option} expects {shape}, got {raw!r}; write it like {option} {example}"
            )
        if column in pairs:
            raise SpecError(
                f"{option} names column {column!r} twice ({pairs[column]!r} and {value!r}); "
                "give each column once"
            )
        pairs[column] = value
    return pairs


def _parse_splines(values: Sequence[str]) -> dict[str, int]:
    knots: dict[str, int] = {}
    for raw, (column, text) in zip(
        values, _parse_pairs(values, "--spline", "age=4", "COLUMN=KNOTS").items(), strict=True
    ):
        try:
            knots[column] = int(text)
        except ValueError:
            raise SpecError(
                f"--spline expects COLUMN=KNOTS with a whole number of knots, got {raw!r}; "
                f"write it like --spline {column}=4"
            ) from None
    return knots


def _parse_interactions(values: Sequence[str]) -> list[tuple[str, ...]]:
    out: list[tuple[str, ...]] = []
    for raw in values:
        columns = tuple(part.strip() for part in raw.split(","))
        if len(columns) < 2 or any(not c for c in columns):
            raise SpecError(
                f"--interact expects two or more comma-separated column names, got {raw!r}; "
                "write it like --interact age,region"
            )
        out.append(columns)
    return out


# -- progress -----------------------------------------------------------------------


def _fmt_number(value: float, spec: str) -> str:
    return format(value, spec) if math.isfinite(value) else "n/a"


# Scans that are not steps of the main IRLS fit (see IterationRecord.phase).
_PHASE_LABELS = {"theta": "theta-estimation", "null": "null-model", "sample": "sample-start"}


def format_iteration(record: IterationRecord) -> str:
    """One progress line for one IRLS iteration (written to stderr by ``indb fit``)."""
    phase = getattr(record, "phase", "fit")
    label = "iteration" if phase == "fit" else f"{_PHASE_LABELS.get(phase, phase)} iteration"
    return (
        f"indb: {label} {record.iteration:>3}"
        f"  deviance {_fmt_number(record.deviance, '.10g')}"
        f"  relative change {_fmt_number(record.relative_change, '.3e')}"
        f"  step halvings {record.step_halvings}"
        f"  {_fmt_number(record.seconds, '.3f')} s"
    )


def _echo_iteration(record: IterationRecord) -> None:
    click.echo(format_iteration(record), err=True)


def iteration_json(record: IterationRecord) -> str:
    """One iteration as a single-line JSON object (``--progress-json``; NaN/inf -> null)."""
    fields = {k: _finite_or_none(v) for k, v in dataclasses.asdict(record).items()}
    return json.dumps(fields, allow_nan=False, separators=(",", ":"))


def _echo_iteration_json(record: IterationRecord) -> None:
    click.echo(iteration_json(record), err=True)


def _progress(quiet: bool, as_json: bool, progress_json: bool) -> Callable[..., None] | None:
    # --progress-json is an explicit request for machine-readable lines, so it wins over -q
    # and --json (stdout stays the one JSON document either way).
    if progress_json:
        return _echo_iteration_json
    if quiet or as_json:
        return None
    return _echo_iteration


# -- shared option groups (defined once, applied by decorator) --------------------------


def _apply(*decorators: Callable[[F], F]) -> Callable[[F], F]:
    def wrap(func: F) -> F:
        for decorator in reversed(decorators):
            func = decorator(func)
        return func

    return wrap


database_option = click.option(
    "--db",
    "db",
    metavar="DB",
    default=None,
    help="DuckDB database file, or postgresql://..., spark:local[N], sc://host:port. Leave "
    "out to work in a fresh in-memory DuckDB database. A DuckDB file is opened read-only "
    "unless --name writes to it.",
)

model_options = _apply(
    click.option(
        "--family", required=True, metavar="F", help="Distribution family of the response."
    ),
    click.option("--link", default=None, metavar="L", help="Link function (default: canonical)."),
    click.option("--response", required=True, metavar="COL", help="Response column."),
    click.option(
        "--trials", default=None, metavar="EXPR", help="Binomial trials per row (SQL expression)."
    ),
    click.option("--offset", default=None, metavar="EXPR", help="Offset, e.g. 'ln(exposure)'."),
    click.option("--weight", default=None, metavar="EXPR", help="Prior (variance) weight."),
    click.option(
        "--frequency-weight",
        "frequency_weight",
        default=None,
        metavar="EXPR",
        help="Each row counts this many times.",
    ),
    click.option("--power", type=float, default=None, metavar="P", help="Tweedie variance power."),
    click.option(
        "--theta",
        type=float,
        default=None,
        metavar="T",
        help="Negative binomial theta; leave out to estimate it.",
    ),
    click.option(
        "--link-power",
        "link_power",
        type=float,
        default=None,
        metavar="X",
        help="Exponent for --link power.",
    ),
    click.option(
        "--no-intercept", "no_intercept", is_flag=True, help="Fit without an intercept term."
    ),
    click.option(
        "--only",
        "only",
        multiple=True,
        metavar="COL",
        help="Use only these predictor columns (repeatable).",
    ),
    click.option(
        "--exclude",
        multiple=True,
        metavar="COL",
        help="Leave this column out of the predictors (repeatable).",
    ),
    click.option(
        "--categorical",
        multiple=True,
        metavar="COL",
        help="Treat this numeric column as categorical (repeatable).",
    ),
    click.option(
        "--reference",
        multiple=True,
        metavar="COL=LEVEL",
        help="Reference level of a categorical column (repeatable).",
    ),
    click.option(
        "--interact",
        multiple=True,
        metavar="A,B",
        help="Add the interaction of these comma-separated columns (repeatable).",
    ),
    click.option(
        "--spline",
        multiple=True,
        metavar="COL=KNOTS",
        help="Restricted cubic spline of COL with KNOTS knots (repeatable).",
    ),
    click.option(
        "--nulls",
        type=click.Choice(["exclude", "error"]),
        default=None,
        help="Rows with NULL in a model column: set them aside or stop." + _default("on_null"),
    ),
    click.option(
        "--tol",
        type=float,
        default=None,
        help="Relative deviance change that ends IRLS." + _default("tol"),
    ),
    click.option(
        "--max-iter",
        "max_iter",
        type=int,
        default=None,
        help="Iteration cap." + _default("max_iter"),
    ),
    click.option(
        "--strict", is_flag=True, help="Fail (exit 5) instead of warning when IRLS does not settle."
    ),
    click.option(
        "--max-levels",
        "max_levels",
        type=int,
        default=None,
        help=f"Most levels a categorical column may have (at most {MAX_LEVELS_LIMIT:,})."
        + _default("max_levels"),
    ),
    click.option(
        "--confidence",
        type=float,
        default=None,
        help="Confidence level of the intervals." + _default("confidence"),
    ),
)

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

registry_schema_option = click.option(
    "--registry-schema",
    "registry_schema",
    default=None,
    metavar="S",
    help=f"Schema holding the model registry [default: {DEFAULT_SCHEMA}].",
)

registry_database_option = click.option(
    "--db",
    "db",
    metavar="DB",
    required=True,
    help="Where the model registry lives: a DuckDB database file, or postgresql://..., "
    "spark:local[N], sc://host:port. Commands that only read open a DuckDB file read-only.",
)

execution_options = _apply(
    click.option(
        "--compress",
        type=click.Choice(["auto", "always", "never"]),
        default=None,
        help="Fold the source to its distinct design rows before IRLS." + _default("compress"),
    ),
    click.option(
        "--sample-start",
        "sample_start",
        type=click.Choice(["auto", "always", "never"]),
        default=None,
        help="Start IRLS from a fit on a hashed sample of about 100,000 rows (auto: tables "
        "of 2,000,000 rows or more)." + _default("sample_start"),
    ),
    click.option(
        "--memory-limit",
        "memory_limit",
        default=None,
        metavar="SIZE",
        help="DuckDB memory limit, e.g. 4GB; work beyond it spills to --temp-directory.",
    ),
    click.option(
        "--temp-directory",
        "temp_directory",
        default=None,
        metavar="DIR",
        help="Folder DuckDB spills to when over --memory-limit.",
    ),
    click.option(
        "--threads",
        type=click.IntRange(min=1),
        default=None,
        metavar="N",
        help="DuckDB worker threads.",
    ),
)

# (option key, flag as typed): options that only mean something together with --name.
_DEPLOY_FLAGS = (
    ("hold", "--hold"),
    ("new_version", "--new-version"),
    ("view_schema", "--view-schema"),
    ("score_source", "--score-source"),
    ("intervals", "--intervals"),
    ("registry_schema", "--registry-schema"),
)

deploy_options = _apply(
    click.option(
        "--name",
        default=None,
        metavar="NAME",
        help="Write the model back into --db: a new registry version, the scoring view NAME "
        "and the scoring macro NAME_score.",
    ),
    click.option(
        "--hold", is_flag=True, help="With --name: record the version without making it live."
    ),
    click.option(
        "--new-version",
        "new_version",
        is_flag=True,
        help="With --name: record a new version even when spec and data are unchanged.",
    ),
    click.option(
        "--view-schema",
        "view_schema",
        default=None,
        metavar="S",
        help="With --name: schema for the scoring view and macro (default: the main schema).",
    ),
    click.option(
        "--score-source",
        "score_source",
        default=None,
        metavar="SRC",
        help="With --name: table, query or file the scoring view reads instead of SOURCE; it "
        "needs the model's input columns.",
    ),
    click.option(
        "--intervals",
        is_flag=True,
        help="With --name: add the standard error of eta and a confidence interval for the "
        "mean to the scoring view.",
    ),
    registry_schema_option,
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


def _fit_arguments(options: dict[str, Any]) -> dict[str, Any]:
    """Map parsed CLI options onto ``indb.api.fit`` keywords, passing only what was given."""
    kwargs: dict[str, Any] = {"family": options["family"]}
    for name in (
        "link",
        "db",
        "trials",
        "offset",
        "weight",
        "frequency_weight",
        "power",
        "theta",
        "link_power",
        "tol",
        "max_iter",
        "max_levels",
        "confidence",
        "compress",
        "sample_start",
        "memory_limit",
        "temp_directory",
        "threads",
    ):
        if options[name] is not None:
            kwargs[name] = options[name]
    if options["nulls"] is not None:
        kwargs["on_null"] = options["nulls"]
    if options["no_intercept"]:
        kwargs["intercept"] = False
    if options["strict"]:
        kwargs["strict"] = True
    if options["only"]:
        kwargs["predictors"] = list(options["only"])
    if options["exclude"]:
        kwargs["exclude"] = list(options["exclude"])
    if options["categorical"]:
        kwargs["categorical"] = list(options["categorical"])
    if options["reference"]:
        kwargs["reference"] = _parse_pairs(
            options["reference"], "--reference", "region=North", "COLUMN=LEVEL"
        )
    if options["interact"]:
        kwargs["interactions"] = _parse_interactions(options["interact"])
    if options["spline"]:
        kwargs["splines"] = _parse_splines(options["spline"])
    return kwargs


def _deploy_arguments(options: dict[str, Any]) -> dict[str, Any]:
    """Map --name and its companions onto ``indb.api.fit`` keywords (empty without --name)."""
    given = [flag for key, flag in _DEPLOY_FLAGS if options[key] not in (None, False)]
    if options["name"] is None:
        if given:
            raise SpecError(
                f"{', '.join(given)} only apply when the model is written back; "
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
    for key, what in (("view_schema", "--view-schema"), ("registry_schema", "--registry-schema")):
        if options[key] is not None:
            writeback.check_name(options[key], what)
    kwargs: dict[str, Any] = {"name": options["name"]}
    if options["hold"]:
        kwargs["promote"] = False
    if options["new_version"]:
        kwargs["new_version"] = True
    if options["intervals"]:
        kwargs["intervals"] = True
    for key in ("view_schema", "score_source", "registry_schema"):
        if options[key] is not None:
            kwargs[key] = options[key]
    return kwargs


# -- printing -----------------------------------------------------------------------


def _finite_or_none(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _plain(value: Any) -> Any:
    """JSON-ready copy: non-finite floats -> null, timestamps -> ISO text, tuples -> lists."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, _dt.datetime | _dt.date):
        return value.isoformat()
    return _finite_or_none(value)


def _dumps(value: Any) -> str:
    return json.dumps(_plain(value), indent=2, allow_nan=False, default=str)


def _num(value: Any, spec: str = ".6g") -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    return _fmt_number(float(value), spec)


def _when(value: Any) -> str:
    if isinstance(value, _dt.datetime):
        return value.strftime("%Y-%m-%d %H:%M:%S")
    return "n/a" if value is None else str(value)


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], right: Sequence[int]) -> str:
    """Columns separated by two spaces; the columns numbered in ``right`` are right-aligned."""
    widths = [len(h) for h in headers]
    for row in rows:
        widths = [max(w, len(cell)) for w, cell in zip(widths, row, strict=True)]

    def line(cells: Sequence[str]) -> str:
        parts = [
            c.rjust(w) if i in right else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ]
        return "  ".join(parts).rstrip()

    return "\n".join([line(headers), *(line(r) for r in rows)])


def _print_sql(statements: Sequence[tuple[str, str]], as_json: bool, note: str = "") -> None:
    if as_json:
        click.echo(_dumps({"sql": [{"purpose": p, "sql": s} for p, s in statements], "note": note}))
        return
    for purpose, sql in statements:
        click.echo(f"-- {purpose}\n{sql};\n")
    if note:
        click.echo(f"-- {note}")


def _deployment_text(deployment: dict[str, Any], db: str | None) -> str:
    name, version = deployment["model"], deployment["version"]
    if not deployment["created"]:
        state = "live" if deployment["promoted"] else "held"
        return (
            f"Model {name}: same spec and data as version {version} ({state}); nothing new "
            "recorded (--new-version records one anyway)."
        )
    if not deployment["promoted"]:
        return (
            f"Model {name}: version {version} recorded but not live; make it live with "
            f"`indb promote {name} {version} --db {db}`."
        )
    macro = f", scoring macro {deployment['macro']}" if deployment.get("macro") else ""
    return (
        f"Model {name}: version {version} is live; scoring view {deployment['scoring_view']} "
        f"(predicted mean in column {deployment['mean_column']}){macro}."
    )


def _emit_result(result: FitResult, as_json: bool, db: str | None) -> None:
    if as_json:
        click.echo(render_json(result))
        return
    click.echo(render_report(result), nl=False)
    if result.deployment:
        click.echo("\n" + _deployment_text(result.deployment, db))


def _shown_warnings(result: FitResult, as_json: bool) -> tuple[str, ...]:
    # The text report lists the fit's warnings itself; JSON carries them too, but stderr
    # is the only place a reader of --json output sees them at once.
    return () if as_json else tuple(_one_line(w) for w in result.warnings)


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


def _view_label(model_row: dict[str, Any]) -> str:
    schema = model_row.get("view_schema")
    return f"{schema}.{model_row['view_name']}" if schema else str(model_row["view_name"])


def _dialect(name: str) -> Dialect:
    if name.strip().lower() not in (*SCORING_DIALECTS, "postgresql"):
        raise SpecError(
            f"--dialect {name!r} is not supported for scoring SQL; supported: "
            f"{', '.join(SCORING_DIALECTS)}"
        )
    return dialect_for(name)


def _compare_text(cmp: dict[str, Any]) -> str:
    a, b = cmp["a"], cmp["b"]
    lines = [f"Model {cmp['model']}: version {a} compared with version {b}", ""]
    rows = [
        [
            t["term"],
            _num(t["estimate_a"]),
            _num(t["estimate_b"]),
            _num(t["change"], ".4g"),
            _num(t["change_in_se"], ".3f"),
            _num(t["relative_change"], ".3g"),
        ]
        for t in cmp["terms"]
    ]
    headers = [
        "term",
        f"version {a}",
        f"version {b}",
        "change",
        f"change in SE of v{a}",
        "relative change",
    ]
    lines.append(_table(headers, rows, right=(1, 2, 3, 4, 5)))
    if cmp["terms_only_in_b"]:
        lines.append(f"terms only in version {b}: {', '.join(cmp['terms_only_in_b'])}")
    lines.append("")
    stats = [
        ["rows used", *(_num(v) for v in cmp["rows"])],
        ["deviance", *(_num(v, ".10g") for v in cmp["deviance"])],
        ["deviance per row", *(_num(v, ".6g") for v in cmp["deviance_per_row"])],
        ["AIC", *(_num(v, ".10g") for v in cmp["aic"])],
        ["converged", *(_num(v) for v in cmp["converged"])],
    ]
    lines.append(_table(["", f"version {a}", f"version {b}"], stats, right=(1, 2)))
    return "\n".join(lines)


def _retrain_text(outcome: RetrainOutcome, db: str | None) -> str:
    name, v, prev = outcome.model, outcome.version, outcome.previous_version
    view = outcome.result.deployment.get("scoring_view") if outcome.result else None
    failed = [c.gate for c in outcome.checks if not c.passed]
    if outcome.status == "first":
        head = f"Model {name}: first version {v} recorded and live; scoring view {view}."
    elif outcome.status == "promoted":
        head = f"Model {name}: version {v} promoted, replacing version {prev}; view {view}."
    elif outcome.status == "unchanged":
        head = (
            f"Model {name}: spec and data unchanged; version {v} stays live "
            "(--force records a new version)."
        )
    else:
        keep = f"version {prev} stays live" if prev is not None else "no version is live"
        head = (
            f"Model {name}: version {v} recorded but HELD BACK by gate(s) "
            f"{', '.join(failed)}; {keep}. Promote it anyway with "
            f"`indb promote {name} {v} --db {db}`."
        )
    if outcome.previous_iterations is None:
        iters = f"IRLS iterations: {outcome.iterations} (cold start: no live version)."
    else:
        iters = (
            f"IRLS iterations: {outcome.iterations}, warm-started from version {prev} "
            f"(version {prev} took {outcome.previous_iterations})."
        )
    lines = [head, iters]
    if outcome.checks:
        rows = [
            [c.gate, _num(c.value, ".6g"), _num(c.limit, ".6g"), "pass" if c.passed else "FAIL"]
            for c in outcome.checks
        ]
        lines += ["", _table(["gate", "value", "limit", "result"], rows, right=(1, 2))]
    return "\n".join(lines)


# -- commands -----------------------------------------------------------------------


@click.group(context_settings={"help_option_names": ["-h", "--help"]}, epilog=EXIT_EPILOG)
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
    with _library_errors(quiet) as caught:
        deploy = _deploy_arguments(options)
        if deploy:
            creates = not dry_run and Source.parse(source).kind == "file"
            hint = "or give a Parquet/CSV path as SOURCE to create it (without --dry-run)"
            _check_database_path(options["db"], may_create=creates, hint=hint)
        else:
            _check_database_path(options["db"])
        kwargs = _fit_arguments(options)
        if dry_run:
            statements = dry_run_model(source, options["response"], **kwargs)
        else:
            progress = _progress(quiet, as_json, progress_json)
            if progress is not None:
                kwargs["progress"] = progress
            result = fit_model(source, options["response"], **kwargs, **deploy)
    if dry_run:
        _echo_warnings(caught, quiet=quiet, already_shown=())
        note = (
            f"nothing was written; after the fit, --name writes registry rows and the view "
            f"{deploy['name']} (see `indb scoring-sql` for its SQL)"
            if deploy
            else "nothing was written"
        )
        _print_sql(statements, as_json, note)
        return
    _echo_warnings(caught, quiet=quiet, already_shown=_shown_warnings(result, as_json))
    _emit_result(result, as_json, options["db"])


@main.command("run", short_help="Fit and deploy the model of a spec file.")
@output_options
@progress_json_option
@dry_run_option
@click.option(
    "--new-version",
    "new_version",
    is_flag=True,
    help="Record a new version even when spec and data are unchanged.",
)
@click.argument("spec_path", metavar="SPEC.toml")
def run_command(
    spec_path: str,
    as_json: bool,
    quiet: bool,
    progress_json: bool,
    dry_run: bool,
    new_version: bool,
) -> None:
    """Fit the model declared in SPEC.toml, record it and make it the live version.

    The spec file's [model] table gives the fit, [deploy] the model name and view, [engine]
    the database; [gates] apply to `indb retrain` only.
    """
    with _library_errors(quiet) as caught:
        spec = _load_spec(spec_path, "run", dry_run=dry_run)
        if dry_run:
            statements = dry_run_model(**spec.model, **spec.engine)
        else:
            progress = _progress(quiet, as_json, progress_json)
            result = fit_model(
                **spec.model,
                **spec.engine,
                **spec.deploy,
                new_version=new_version,
                progress=progress,
            )
    if dry_run:
        _echo_warnings(caught, quiet=quiet, already_shown=())
        _print_sql(statements, as_json, "nothing was written")
        return
    _echo_warnings(caught, quiet=quiet, already_shown=_shown_warnings(result, as_json))
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
    with _library_errors(quiet) as caught:
        spec = _load_spec(spec_path, "retrain", dry_run=dry_run)
        outcome = retrain(
            spec, dry_run=dry_run, progress=_progress(quiet, as_json, progress_json), force=force
        )
    _echo_warnings(caught, quiet=quiet, already_shown=())
    if dry_run:
        _print_sql(outcome.sql, as_json, "nothing was written")
        return
    if as_json:
        out = outcome.to_dict()
        if outcome.comparison:
            out["comparison"] = outcome.comparison
        click.echo(_dumps(out))
    else:
        click.echo(_retrain_text(outcome, spec.engine.get("db")))
    ctx.exit(outcome.exit_code)


@main.command("models", short_help="List the registered models.")
@registry_database_option
@registry_schema_option
@output_options
def models_command(db: str, registry_schema: str | None, as_json: bool, quiet: bool) -> None:
    """List the models in the registry: live version, number of versions, scoring view."""
    with _library_errors(quiet), _open_registry(db, registry_schema) as reg:
        models = [(m, reg.versions(m["model_name"])) for m in reg.models()]
    if as_json:
        click.echo(
            _dumps(
                {
                    "models": [
                        {
                            "model": m["model_name"],
                            "live_version": m["live_version"],
                            "versions": len(vs),
                            "scoring_view": _view_label(m),
                            "macro": m["macro_name"],
                            "score_source": m["score_source"],
                            "intervals": m["intervals"],
                            "created_at": m["created_at"],
                        }
                        for m, vs in models
                    ]
                }
            )
        )
        return
    if not models:
        click.echo(f"No models in the registry of {db}.")
        return
    rows = [
        [
            m["model_name"],
            "none" if m["live_version"] is None else str(m["live_version"]),
            str(len(vs)),
            _view_label(m),
        ]
        for m, vs in models
    ]
    click.echo(_table(["model", "live version", "versions", "scoring view"], rows, right=(1, 2)))


@main.command("versions", short_help="List the versions of a model.")
@registry_database_option
@registry_schema_option
@output_options
@click.argument("name")
def versions_command(
    name: str, db: str, registry_schema: str | None, as_json: bool, quiet: bool
) -> None:
    """List the versions of model NAME, one line each."""
    with _library_errors(quiet), _open_registry(db, registry_schema) as reg:
        versions = reg.versions(name)
    if as_json:
        click.echo(_dumps({"model": name, "versions": versions}))
        return
    rows = [
        [
            str(v["version"]),
            str(v["status"]),
            _when(v["created_at"]),
            str(v["family"]),
            str(v["link"]),
            _num(v["deviance"], ".10g"),
            _num(v["n_used"]),
            _num(v["iterations"]),
            _num(v["converged"]),
        ]
        for v in versions
    ]
    headers = [
        "version",
        "status",
        "created (UTC)",
        "family",
        "link",
        "deviance",
        "rows",
        "iterations",
        "converged",
    ]
    click.echo(_table(headers, rows, right=(0, 5, 6, 7)))


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
    with _library_errors(quiet), _open_registry(db, registry_schema) as reg:
        if version is None:
            version = reg.model(name)["live_version"]
            if version is None:
                raise RegistryError(f"model {name!r} has no live version; give --version K")
        result = reg.load(name, version)
        row = next(v for v in reg.versions(name) if v["version"] == version)
    if as_json:
        out = result.to_dict()
        out.update({"model": name, "version": version, "status": row["status"]})
        click.echo(_dumps(out))
        return
    click.echo(
        f"Model {name}, version {version} ({row['status']}), recorded "
        f"{_when(row['created_at'])} UTC\n"
    )
    click.echo(render_report(result), nl=False)


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
    with _library_errors(quiet), _open_registry(db, registry_schema) as reg:
        cmp = reg.compare(name, a, b)
    click.echo(_dumps(cmp) if as_json else _compare_text(cmp))


@main.command("promote", short_help="Make a version live (also the roll-back).")
@registry_database_option
@registry_schema_option
@click.option(
    "--view-schema",
    "view_schema",
    default=None,
    metavar="S",
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
    with _library_errors(quiet), _open_registry(db, registry_schema, writes=True) as reg:
        previous = reg.model(name)["live_version"]
        reg.promote(name, version, view_schema=view_schema)
        view = _view_label(reg.model(name))
    if as_json:
        click.echo(
            _dumps(
                {
                    "model": name,
                    "live_version": version,
                    "previous_live_version": previous,
                    "scoring_view": view,
                }
            )
        )
        return
    was = f" (was version {previous})" if previous is not None else ""
    click.echo(f"Model {name}: version {version} is live{was}; scoring view {view} serves it.")


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
    with _library_errors(quiet), _open_registry(db, registry_schema, writes=True) as reg:
        reg.drop(name, version)
    if as_json:
        click.echo(_dumps({"model": name, "version": version, "status": "dropped"}))
        return
    click.echo(f"Model {name}: version {version} dropped (its registry rows are kept).")


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
    with _library_errors(quiet):
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
        click.echo(
            _dumps(
                {
                    "model": name,
                    "version": chosen,
                    "dialect": target.name,
                    "scoring_view": _view_label(row),
                    "sql": sql,
                }
            )
        )
        return
    click.echo(sql + ";")


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

    with _library_errors(quiet=False) as caught:
        demo.run(quick=quick, out_dir=out_dir, rows=rows, echo=click.echo)
    _echo_warnings(caught, quiet=False, already_shown=())


if __name__ == "__main__":  # pragma: no cover
    main()
