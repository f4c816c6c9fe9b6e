"""The engine adapter interface: connect, run SQL text, describe columns, fetch small results.

Adapters know nothing about models. They translate driver errors into
:class:`~indb.errors.EngineError` (keeping the SQL that failed), run write-back statements in
one transaction, and say where a table name leads (:meth:`Engine.resolve_table`, read by
:func:`qualify_source` and :func:`relative_source`). Each backend module of
:mod:`indb.engines` subclasses :class:`Engine`; this module never imports them.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator, Sequence
from decimal import Decimal
from typing import Any

import numpy as np
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

from indb.engines.base_dialect import (
    Dialect,
    qualified_name,
    set_table_parts,
    split_qualified,
    table_parts,
    table_references,
)
from indb.errors import SpecError
from indb.spec import Source


class Engine:
    """Interface every engine adapter implements.

    An adapter either opens its own connection (and closes it in :meth:`close`) or borrows
    one the caller passed in. A borrowed connection must not be inside a transaction (the
    adapter refuses it before running anything, see :func:`open_transaction_error`), and
    every setting the adapter changes on it is put back by :meth:`close`.
    """

    dialect: Dialect

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        raise NotImplementedError

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        """Run a query and return its columns as numpy arrays (small results only)."""
        raise NotImplementedError

    def describe(self, sql: str) -> list[tuple[str, str]]:
        """(column name, type name) pairs of a query's result, without running it."""
        raise NotImplementedError

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        raise NotImplementedError
        yield

    def close(self) -> None:
        pass

    # -- where names lead (write-back stores names that mean the same in any session) ----------
    def resolve_table(self, parts: Sequence[str]) -> tuple[str, ...] | None:
        """The table or view that the name ``parts`` (1 to 3 names) reads in this session,
        as the parts that name it from any session and schema: (schema, table) or
        (catalog, schema, table). None when the engine has no such table or the name
        cannot be qualified (a session's temporary view on Spark)."""
        return None

    def current_location(self) -> tuple[str, str]:
        """(catalog or database, schema) that unqualified names are created in."""
        raise NotImplementedError

    def absolute_path(self, path: str) -> str:
        """A file source's path as the engine reads it from any working directory."""
        return path

    #: seconds spent in the last execute/fetch (for iteration timing)
    last_seconds: float = 0.0


def qualify_source(engine: Engine, source: Source) -> Source:
    """``source`` with every table name qualified as the engine resolves it now.

    A scoring view resolves an unqualified name in its own schema first (DuckDB), and a
    stored spec is read again in other sessions: both must name the table the fit read.
    Table names inside a query are qualified too (not its CTEs or table functions); a
    relative file path becomes absolute where the engine reads files itself. Names the
    engine cannot find are left as written (reading them fails with the usual message).
    """
    if source.kind == "table":
        found = engine.resolve_table(split_qualified(source.text))
        return Source("table", qualified_name(found)) if found else source
    if source.kind == "file":
        return Source("file", engine.absolute_path(source.text))
    tree = engine.dialect.query(source.text).this
    changed = False
    for table in table_references(tree):
        # an unquoted name folds as the engine folds it (PostgreSQL: to lower case)
        parts = table_parts(normalize_identifiers(table.copy(), engine.dialect.sqlglot_name))
        found = engine.resolve_table(parts)
        if found and list(found) != parts:
            set_table_parts(table, found)
            changed = True
    return Source("query", engine.dialect.query_text(tree)) if changed else source


def relative_source(engine: Engine, source: Source) -> Source:
    """``source`` with the engine's current catalog and schema left out of its table names
    (for SQL printed to run on another engine, where those names mean nothing)."""
    here = [p.lower() for p in engine.current_location()]

    def shortened(parts: list[str]) -> list[str]:
        if len(parts) == 3 and parts[0].lower() == here[0]:
            parts = parts[1:]
        if len(parts) == 2 and parts[0].lower() == here[1]:
            parts = parts[1:]
        return parts

    if source.kind == "table":
        return Source("table", qualified_name(shortened(split_qualified(source.text))))
    if source.kind == "file":
        return source
    tree = engine.dialect.query(source.text).this
    changed = False
    for table in table_references(tree):
        parts = table_parts(table)
        short = shortened(parts)
        if short != parts:
            set_table_parts(table, short)
            changed = True
    return Source("query", engine.dialect.query_text(tree)) if changed else source


def open_transaction_error(engine: str, state: str) -> SpecError:
    """The refusal of a caller's connection that is inside a transaction.

    indb runs statements and transactions of its own; inside the caller's transaction a
    BEGIN of indb's (or any statement that fails) would abort it, and the caller's later
    COMMIT would then discard their work without an error.
    """
    return SpecError(
        f"the {engine} connection passed as db= has {state}; indb runs its own statements "
        "and transactions on it, and a failure among them would abort your transaction "
        "(your COMMIT would then discard your work). Commit or roll back first, or pass a "
        "connection with no transaction open; nothing was changed"
    )


def rows_to_columns(names: Sequence[str], rows: Sequence[Sequence[Any]]) -> dict[str, np.ndarray]:
    """Column arrays from driver rows, typed like DuckDB's Arrow results.

    Integers become int64 (float64 with NaN when NULLs occur), floats and decimals float64
    with NaN for NULL, booleans bool, anything else an object array.
    """
    out: dict[str, np.ndarray] = {}
    for i, name in enumerate(names):
        values = [r[i] for r in rows]
        kinds = {type(v) for v in values if v is not None}
        has_null = any(v is None for v in values)
        if kinds and kinds <= {bool} and not has_null:
            out[name] = np.array(values, dtype=bool)
        elif kinds and kinds <= {int} and not has_null:
            out[name] = np.array(values, dtype=np.int64)
        elif kinds <= {int, float, Decimal} and not (kinds & {bool}):
            out[name] = np.array(
                [math.nan if v is None else float(v) for v in values], dtype=np.float64
            )
        else:
            out[name] = np.array(values, dtype=object)
    return out
