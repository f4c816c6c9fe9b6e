"""Kinds of option values: what shape a value an option takes must have (:class:`Kind`,
``TEXT``, ``NUMBER``, ``WHOLE``, ...), and :func:`check_options`, which checks given values
against them before any work starts (:mod:`indb.options` declares the options)."""

from __future__ import annotations

import json
import math
import numbers
import os
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass
from typing import Any

from indb.errors import SpecError


@dataclass(frozen=True)
class Kind:
    """A shape of option value: a test and how an error message names it.

    Parameters
    ----------
    expected:
        Completes "KEY must be ...", e.g. ``"a whole number"``.
    accepts:
        True for a value of this kind. None is never passed: it means "not given".
    """

    expected: str
    accepts: Callable[[Any], bool]


def _is_text(v: Any) -> bool:
    return isinstance(v, str)


def _is_number(v: Any) -> bool:
    # bool is an int in Python but never a number here (TOML's true is not 1); NaN compares
    # false with every limit, so it would silently disable a gate or a tolerance. numbers.Real
    # also takes numpy's scalars, which Python callers pass.
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and not math.isnan(v)


def _is_whole(v: Any) -> bool:
    return isinstance(v, numbers.Integral) and not isinstance(v, bool)


def _is_bool(v: Any) -> bool:
    return isinstance(v, bool)


def _is_list(v: Any) -> bool:
    # a bare string is a collection too, but "age" as a list of names would be ["a", "g",
    # "e"]; a Collection (sized, so not a one-shot generator) covers lists, tuples and the
    # column indexes Python callers pass
    return isinstance(v, Collection) and not isinstance(v, str | bytes | Mapping)


def _is_names(v: Any) -> bool:
    return _is_list(v) and all(_is_text(x) for x in v)


def _is_column_groups(v: Any) -> bool:
    return _is_list(v) and all(_is_text(g) or _is_names(g) for g in v)


def _is_map(value_ok: Callable[[Any], bool]) -> Callable[[Any], bool]:
    def accepts(v: Any) -> bool:
        return isinstance(v, Mapping) and all(_is_text(k) and value_ok(x) for k, x in v.items())

    return accepts


TEXT = Kind("text (a quoted string)", _is_text)
NUMBER = Kind("a number", _is_number)
WHOLE = Kind("a whole number", _is_whole)
BOOLEAN = Kind("true or false", _is_bool)
NAMES = Kind('a list of column names, e.g. ["age", "region"]', _is_names)
COLUMN_GROUPS = Kind(
    'a list of column lists, e.g. [["age", "region"]] or ["age,region"]', _is_column_groups
)
LEVELS = Kind(
    'a table of column = level, e.g. { region = "North" }',
    _is_map(lambda x: _is_text(x) or _is_number(x)),
)
KNOTS = Kind("a table of column = number of knots, e.g. { age = 4 }", _is_map(_is_whole))
VALUES = Kind("a table of term = number, e.g. { age = 0.5 }", _is_map(_is_number))
TABLE = Kind("a table of keys", lambda v: isinstance(v, Mapping))


def _is_database(v: Any) -> bool:
    # a path or URL as text; Python callers may also pass a pathlib path, an open
    # connection (DuckDB, psycopg), a SparkSession or an indb Engine: anything that runs SQL
    runs_sql = any(callable(getattr(v, m, None)) for m in ("execute", "sql"))
    return _is_text(v) or isinstance(v, os.PathLike) or runs_sql


# spelt as TEXT's: in a spec file (and on the command line) a database is text
DATABASE = Kind(TEXT.expected, _is_database)
CALLBACK = Kind("a function taking one iteration record", callable)


def check_options(
    values: Mapping[str, Any],
    declared: Mapping[str, Kind],
    *,
    label: Callable[[str], str] = str,
    show: Callable[[Any], str] = repr,
) -> None:
    """Raise :class:`SpecError` for the first declared option whose value has the wrong kind.

    Keys of ``values`` that are not declared, and None values (not given), are left alone.
    ``label`` turns a key into the words that name it ("[gates] min_rows"), ``show`` a
    value into how the reader wrote it (Python's repr, or TOML's form with :func:`toml_text`).
    """
    for key, kind in declared.items():
        value = values.get(key)
        if value is not None and not kind.accepts(value):
            raise SpecError(f"{label(key)} must be {kind.expected}, got {show(value)}")


def toml_text(value: Any, limit: int = 80) -> str:
    """A TOML value as it reads in the file: "lots", true, 1.5, ["a", 2] (shortened)."""
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)  # TOML spells them nan, inf, -inf (JSON would say NaN)
    text = json.dumps(value, default=str, ensure_ascii=False)
    return text if len(text) <= limit else text[: limit - 3] + "..."
