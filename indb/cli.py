"""The ``indb`` command line: parse options, call the library, print.

No SQL and no numerics live here. Every option maps onto one keyword of :func:`indb.api.fit`;
options left out are not passed on, so the library's defaults stay the only defaults.
Errors raised by the library become one line on stderr starting with ``indb: error:`` and an
exit code per error class (see ``EXIT_CODES``).
"""

from __future__ import annotations

import inspect
import math
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click

from indb.api import fit as fit_model
from indb.errors import (
    EngineError,
    IndbError,
    NonConvergenceError,
    SpecError,
    UnsupportedError,
)
from indb.report import render_json, render_report
from indb.results import IterationRecord

__all__ = ["main", "EXIT_CODES"]

F = TypeVar("F", bound=Callable[..., Any])

# Most specific class first: the first match decides the exit code.
EXIT_CODES: tuple[tuple[type[IndbError], int], ...] = (
    (SpecError, 2),
    (EngineError, 3),
    (UnsupportedError, 4),
    (NonConvergenceError, 5),
    (IndbError, 1),
)

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
_PHASE_LABELS = {"theta": "theta-estimation", "null": "null-model"}


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
    metavar="PATH",
    default=None,
    help="DuckDB database file. Leave out to work in a fresh in-memory database.",
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
        help="Most levels a categorical column may have." + _default("max_levels"),
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


def _check_database_path(db: str | None) -> None:
    # DuckDB creates a missing database file on connect; for `fit` that only turns a typo in
    # --db into an empty database and a confusing "table does not exist" later.
    if db is not None and db != ":memory:" and not Path(db).exists():
        raise SpecError(
            f"--db {db!r}: no such database file; check the path, or leave --db out to read "
            "Parquet/CSV files in an in-memory database"
        )


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


# -- commands -----------------------------------------------------------------------


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="indb", prog_name="indb")
def main() -> None:
    """indb: fit generalized linear models inside the database."""


@main.command("fit")
@database_option
@model_options
@output_options
@click.argument("source")
def fit_command(source: str, as_json: bool, quiet: bool, **options: Any) -> None:
    """Fit a model on SOURCE and print a report (or JSON with --json).

    SOURCE is a table or view name, a SELECT query, or a Parquet/CSV path (globs allowed).
    """
    with _library_errors(quiet) as caught:
        _check_database_path(options["db"])
        kwargs = _fit_arguments(options)
        if not (quiet or as_json):
            kwargs["progress"] = _echo_iteration
        result = fit_model(source, options["response"], **kwargs)
    _echo_warnings(
        caught,
        quiet=quiet,
        # The text report lists the fit's warnings itself; JSON carries them too, but stderr
        # is the only place a reader of --json output sees them at once.
        already_shown=() if as_json else tuple(_one_line(w) for w in result.warnings),
    )
    if as_json:
        click.echo(render_json(result))
    else:
        click.echo(render_report(result), nl=False)


@main.command("demo")
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
