"""The command line's options, generated from the one declaration of the fit options.

Every :class:`indb.options.Option` with a command-line form becomes one click option spelt
``--`` + its name with ``-`` for ``_``, with its type, metavar, help (the allowed values and
the library's default appended) and, for the repeatable kinds (column names, levels,
interactions, splines), ``multiple=True``. A boolean becomes a switch that changes its
default: ``--no-intercept``, ``--strict``, ``--intervals/--no-intervals``.

Former spellings (``--only``, ``--nulls``, ``--interact``, ``--spline``, ``--hold``) are
separate hidden click options, so ``--help`` shows one spelling while both work and a
message can name the spelling that was typed. Every option has the library's default
None here: :func:`given_arguments` passes on only what was given, so the library's
defaults stay the only defaults.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import click

from indb import options as O
from indb.errors import SpecError
from indb.options import Option

F = TypeVar("F", bound=Callable[..., Any])

# -- values as typed (input mistakes are SpecErrors: exit code 2) -------------------------


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


def _parse_levels(values: Sequence[str], option: str) -> dict[str, str]:
    return _parse_pairs(values, option, "region=North", "COLUMN=LEVEL")


def _parse_splines(values: Sequence[str], option: str) -> dict[str, int]:
    knots: dict[str, int] = {}
    for raw, (column, text) in zip(
        values, _parse_pairs(values, option, "age=4", "COLUMN=KNOTS").items(), strict=True
    ):
        try:
            knots[column] = int(text)
        except ValueError:
            raise SpecError(
                f"{option} expects COLUMN=KNOTS with a whole number of knots, got {raw!r}; "
                f"write it like {option} {column}=4"
            ) from None
    return knots


def _parse_factors(values: Sequence[str], option: str) -> dict[str, float]:
    factors: dict[str, float] = {}
    for raw, (column, text) in zip(
        values, _parse_pairs(values, option, "age=0.5", "COLUMN=NUMBER").items(), strict=True
    ):
        try:
            factors[column] = float(text)
        except ValueError:
            raise SpecError(
                f"{option} expects COLUMN=NUMBER, got {raw!r}; write it like {option} {column}=0.5"
            ) from None
    return factors


def _parse_interactions(values: Sequence[str], option: str) -> list[tuple[str, ...]]:
    out: list[tuple[str, ...]] = []
    for raw in values:
        columns = tuple(part.strip() for part in raw.split(","))
        if len(columns) < 2 or any(not c for c in columns):
            raise SpecError(
                f"{option} expects two or more comma-separated column names, got {raw!r}; "
                f"write it like {option} age,region"
            )
        out.append(columns)
    return out


def _parse_names(values: Sequence[str], option: str) -> list[str]:
    return list(values)


# The kinds given as repeated options, and how the strings typed become the Python value
# (the option as typed is passed for messages).
_REPEATED: dict[O.Kind, Callable[[Sequence[str], str], Any]] = {
    O.NAMES: _parse_names,
    O.LEVELS: _parse_levels,
    O.COLUMN_GROUPS: _parse_interactions,
    O.KNOTS: _parse_splines,
    O.VALUES: _parse_factors,
}
_SCALAR_TYPES: dict[O.Kind, Any] = {
    O.TEXT: click.STRING,
    O.DATABASE: click.STRING,
    O.NUMBER: click.FLOAT,
    O.WHOLE: click.INT,
}


# -- spellings ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Spelling:
    """One click option of an option: the flag as typed and the click parameter it fills."""

    option: Option
    flag: str
    dest: str
    hidden: bool = False


def _switch(option: Option) -> str:
    """A boolean's switch: the one that changes its default, both when it has none."""
    stem = option.flag[2:]
    if option.default is True:
        return f"--no-{stem}"
    if option.default is False:
        return f"--{stem}"
    return f"--{stem}/--no-{stem}"


def spellings(option: Option) -> tuple[Spelling, ...]:
    """The spelling ``--help`` shows, then the hidden former ones."""
    main = _switch(option) if option.kind is O.BOOLEAN else option.flag
    old = (
        Spelling(option, a, f"{option.name}__{a[2:].replace('-', '_')}", True)
        for a in option.aliases
    )
    return (Spelling(option, main, option.name), *old)


def typed(spelling: Spelling, value: Any) -> str:
    """The flag as the user typed it (a ``--x/--no-x`` switch by the value it set)."""
    on, _, off = spelling.flag.partition("/")
    return off if off and value is False else on


def _click_option(sp: Spelling, help: str | None) -> Callable[[F], F]:
    option = sp.option
    text = option.help_text() if help is None else help
    common: dict[str, Any] = {"default": None, "help": text, "hidden": sp.hidden}
    if option.kind is O.BOOLEAN:
        switch = sp.flag
        if "/" not in switch:
            # a one-way switch sets the value that is not the default (a former spelling:
            # the value it is declared to set)
            alias = sp.hidden and option.alias_value is not None
            common["flag_value"] = option.alias_value if alias else not option.default
        return click.option(switch, sp.dest, **common)
    required = not sp.hidden and (option.required or option.cli_required)
    kw: dict[str, Any] = {**common, "metavar": option.metavar, "required": required}
    if required:
        kw["callback"] = _required
    if option.kind in _REPEATED:
        return click.option(sp.flag, sp.dest, **{**kw, "default": (), "multiple": True})
    if option.choices and not option.resolved:
        kind_type: Any = click.Choice(option.choices)
    elif option.kind is O.WHOLE and option.minimum is not None:
        kind_type = click.IntRange(min=option.minimum)
    else:
        kind_type = _SCALAR_TYPES[option.kind]
    return click.option(sp.flag, sp.dest, type=kind_type, **kw)


def _required(ctx: click.Context, param: click.Parameter, value: Any) -> Any:
    # click 8.3 and later take the explicit default None (kept so that the library's
    # defaults stay the only ones) as a value given, so required=True alone let a missing
    # --response through: the call failed with a TypeError (exit 1), not a usage error (2)
    if value is None:
        raise click.MissingParameter(ctx=ctx, param=param)
    return value


def click_options(*options: Option, help: str | None = None) -> Callable[[F], F]:
    """A decorator adding the click options of ``options`` (hidden spellings included), in
    the order given; ``help`` replaces the declared help (for one option)."""
    decorators = [
        _click_option(sp, help) for option in options if option.cli for sp in spellings(option)
    ]

    def wrap(func: F) -> F:
        for decorator in reversed(decorators):
            func = decorator(func)
        return func

    return wrap


def on_cli(*groups: str) -> tuple[Option, ...]:
    """The options of ``groups`` that have a command-line form, in declaration order."""
    return tuple(o for g in groups for o in O.group(g) if o.cli)


# -- from parsed values to the library's keywords ----------------------------------------------


def _given(value: Any) -> bool:
    return value not in (None, ())


def given_flags(values: Mapping[str, Any], options: Iterable[Option]) -> list[str]:
    """The flags of ``options`` that were given, as typed (for messages)."""
    return [
        typed(sp, values[sp.dest])
        for option in options
        for sp in spellings(option)
        if option.cli and _given(values[sp.dest])
    ]


def given_arguments(values: Mapping[str, Any], options: Iterable[Option]) -> dict[str, Any]:
    """The library's keywords for the ``options`` given on the command line, converted from
    what was typed; options left out are not passed on.

    A repeated option typed under both spellings (``--predictors a --only b``) adds up;
    a single value typed under both must be the same.
    """
    out: dict[str, Any] = {}
    for option in options:
        if not option.cli:
            continue
        parse = _REPEATED.get(option.kind)
        seen: list[tuple[str, Any]] = []
        for sp in spellings(option):
            raw = values[sp.dest]
            if _given(raw):
                seen.append((typed(sp, raw), parse(raw, sp.flag) if parse else raw))
        if seen:
            out[option.name] = _combine(option, seen)
    return out


def _combine(option: Option, seen: list[tuple[str, Any]]) -> Any:
    if len(seen) == 1:
        return seen[0][1]
    flags = " and ".join(flag for flag, _ in seen)
    if isinstance(seen[0][1], list):
        return [x for _, value in seen for x in value]
    if isinstance(seen[0][1], dict):
        merged: dict[str, Any] = {}
        for _, value in seen:
            twice = sorted(set(merged) & set(value))
            if twice:
                raise SpecError(
                    f"{flags} are one option ({option.flag}); column {twice[0]!r} is given "
                    "under both: give each column once"
                )
            merged.update(value)
        return merged
    values = {repr(v) for _, v in seen}
    if len(values) > 1:
        raise SpecError(
            f"{flags} are one option ({option.flag}) given different values "
            f"({', '.join(sorted(values))}); give it once"
        )
    return seen[0][1]
