"""How the command line reports failure: one ``indb: error:`` line on stderr per error (click's
own usage errors too), a JSON error object on stdout under ``--json``, and an exit code per
error class (:data:`EXIT_CODES`)."""

from __future__ import annotations

import json
import sys
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import click

from indb.errors import (
    EngineError,
    IndbError,
    NonConvergenceError,
    RegistryError,
    SpecError,
    UnsupportedError,
)

# Most specific class first: the first match decides the exit code.
EXIT_CODES: tuple[tuple[type[IndbError], int], ...] = (
    (SpecError, 2),
    (EngineError, 3),
    (UnsupportedError, 4),
    (NonConvergenceError, 5),
    (RegistryError, 7),
    (IndbError, 1),
)


class CommandFailure(click.ClickException):
    """A library error turned into one stderr line and an exit code."""

    def __init__(self, message: str, exit_code: int) -> None:
        super().__init__(message)
        self.exit_code = exit_code

    def show(self, file: Any = None) -> None:
        click.echo(f"indb: error: {self.message}", err=True)


def one_line(text: str) -> str:
    parts = [line.strip() for line in text.splitlines() if line.strip()]
    return " ".join(parts) if parts else "(no message)"


def _exit_code(exc: IndbError) -> int:
    for cls, code in EXIT_CODES:
        if isinstance(exc, cls):
            return code
    return 1


@contextmanager
def library_errors(quiet: bool) -> Iterator[list[warnings.WarningMessage]]:
    """Collect warnings raised inside and turn an ``IndbError`` into a ``CommandFailure``."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield caught
        except IndbError as exc:
            echo_warnings(caught, quiet=quiet, already_shown=())
            raise CommandFailure(one_line(str(exc)), _exit_code(exc)) from None


def echo_warnings(
    caught: Sequence[warnings.WarningMessage], *, quiet: bool, already_shown: Sequence[str]
) -> None:
    if quiet:
        return
    seen: set[str] = set(already_shown)
    for w in caught:
        text = one_line(str(w.message))
        if text in seen:
            continue
        seen.add(text)
        click.echo(f"indb: warning: {text}", err=True)


class OneLineErrors(click.Group):
    """The command group, with every error as one ``indb: error:`` line on stderr (click's
    own usage errors too) and, under ``--json``, a JSON error object on stdout."""

    def main(  # type: ignore[override]
        self, args: Sequence[str] | None = None, *a: Any, standalone_mode: bool = True, **kw: Any
    ) -> Any:
        argv = list(sys.argv[1:] if args is None else args)
        try:
            code = super().main(argv, *a, standalone_mode=False, **kw)
        except click.ClickException as exc:
            code = exc.exit_code
            message = exc.message if isinstance(exc, CommandFailure) else _usage_message(exc)
            if "--json" in argv:
                click.echo(json.dumps({"error": message, "exit_code": code}))
            click.echo(f"indb: error: {message}", err=True)
        except click.Abort:
            code = 1
            click.echo("indb: error: aborted", err=True)
        if not standalone_mode:
            return code
        sys.exit(code if isinstance(code, int) else 0)


def _usage_message(exc: click.ClickException) -> str:
    """click's usage error as one line, with where to look for the options."""
    text = one_line(exc.format_message())
    ctx = getattr(exc, "ctx", None)
    if isinstance(exc, click.UsageError) and ctx is not None:
        # the program is indb however it was started (python -m, a test runner)
        path = " ".join(["indb", *ctx.command_path.split()[1:]])
        text += f" (see `{path} --help`)"
    return text
