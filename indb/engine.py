"""Engine adapters: connect, run SQL text, describe columns, fetch small results.

Adapters know nothing about models. They translate driver errors into
:class:`~indb.errors.EngineError` (keeping the SQL that failed) and run write-back
statements in one transaction.
"""

from __future__ import annotations

import contextlib
import math
import numbers
import os
import re
import time
import warnings
from collections.abc import Iterator, Sequence
from decimal import Decimal
from typing import Any

import numpy as np
from sqlglot import exp
from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

from indb import sqlexpr as S
from indb.dialect import (
    Dialect,
    DuckDBDialect,
    qualified_name,
    set_table_parts,
    split_qualified,
    table_parts,
    table_references,
)
from indb.errors import EngineError, SpecError
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


#: what to give instead when DuckDB refuses an engine setting's value
_SETTING_HINTS = {
    "memory_limit": "give a number and a unit, such as '4GB' or '512MiB'",
    "temp_directory": "give a folder DuckDB may create and write to",
    "threads": "give a whole number >= 1",
}


def check_engine_settings(
    *, memory_limit: Any = None, temp_directory: Any = None, threads: Any = None
) -> dict[str, Any]:
    """The engine settings that were given, with their types checked (``SpecError``).

    Checked before a connection is opened or changed; DuckDB itself judges the values (a
    size it cannot parse is refused when set, see ``DuckDBEngine._set_option``).
    """
    out: dict[str, Any] = {}
    if threads is not None:
        if isinstance(threads, bool) or not isinstance(threads, numbers.Integral) or threads < 1:
            raise SpecError(f"threads must be a whole number >= 1; got {threads!r}")
        out["threads"] = int(threads)
    if memory_limit is not None:
        if not isinstance(memory_limit, str) or not memory_limit.strip():
            raise SpecError(
                f"memory_limit must be a size as text, such as '4GB' or '512MiB'; got "
                f"{memory_limit!r}"
            )
        out["memory_limit"] = memory_limit.strip()
    if temp_directory is not None:
        if not isinstance(temp_directory, str | os.PathLike) or not os.fspath(temp_directory):
            raise SpecError(f"temp_directory must be a folder path; got {temp_directory!r}")
        out["temp_directory"] = os.fspath(temp_directory)
    return out


_SIZE_UNITS = {
    "bytes": (1024, 0),
    "KiB": (1024, 1),
    "MiB": (1024, 2),
    "GiB": (1024, 3),
    "TiB": (1024, 4),
    "PiB": (1024, 5),
    "kB": (1000, 1),
    "MB": (1000, 2),
    "GB": (1000, 3),
    "TB": (1000, 4),
    "PB": (1000, 5),
}


def shown_size_range(text: str) -> tuple[int, int] | None:
    """The byte counts (lowest, highest) DuckDB shows as ``text`` ('3.7 GiB'), or None.

    DuckDB writes a size as whole units, a point, and the remainder in the next smaller unit
    times 10 divided by the base, cut down (StringUtil::BytesToHumanReadableString).
    """
    m = re.fullmatch(r"(\d+)\.(\d) (\w+)", text.strip())
    if m is None or m.group(3) not in _SIZE_UNITS:
        return None
    base, power = _SIZE_UNITS[m.group(3)]
    if power == 0:
        return None
    whole, tenth = int(m.group(1)), int(m.group(2))
    unit = base ** (power - 1)
    # remainders r (in the smaller unit) with r * 10 // base == tenth
    low_rest = -(-tenth * base // 10)
    high_rest = -(-(tenth + 1) * base // 10) - 1
    return (whole * base + low_rest) * unit, (whole * base + high_rest + 1) * unit - 1


def size_shown_as(text: str) -> int | None:
    """The byte count to write back for a size DuckDB shows as ``text``, or None.

    DuckDB reports sizes only as cut-down text (duckdb/duckdb#11803), so the exact value is
    lost; this picks the roundest count that DuckDB shows the same way: the fewest
    significant digits in decimal units (kB, MB, GB) or binary units (KiB, MiB, GiB). A
    limit set as a round number ('4GB', '8GiB', '500MB') usually comes back exactly (not
    when a rounder one shows the same: '3.75GiB' and '4GB' are both '3.7 GiB'); any other
    comes back within a tenth of the unit shown, always shown with the same text.
    """
    span = shown_size_range(text)
    if span is None:
        return None
    low, high = span
    best: tuple[int, int] | None = None
    for base, unit_base in ((10, 1000), (2, 1024)):
        step = 1
        while step * base <= high:
            step *= base
        while -(-low // step) * step > high:  # the largest step with a multiple in the span
            step //= base
        value = -(-low // step) * step
        candidate = (_significant_digits(value, unit_base), value)
        best = candidate if best is None else min(best, candidate)
    return None if best is None else best[1]


def _significant_digits(value: int, unit_base: int) -> int:
    # digits of the value written in its largest unit: 4e9 B = 4 GB (1), 3.75 GiB (3)
    unit = 1
    while unit * unit_base <= value:
        unit *= unit_base
    return len((Decimal(value) / Decimal(unit)).normalize().as_tuple().digits)


def _setting_literal(value: Any) -> str:
    # SET takes a literal, not an expression: booleans and integers as such, anything else
    # (sizes, paths, DuckDB's own text of a value) as a quoted string literal
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    return "'" + str(value).replace("'", "''") + "'"


def _one_line(text: str) -> str:
    return " ".join(part.strip() for part in text.splitlines() if part.strip())


class DuckDBEngine(Engine):
    """DuckDB adapter (embedded; a file, ``:memory:``, or an existing connection).

    Parameters
    ----------
    database:
        ``None`` or ``":memory:"`` for an in-memory database, a file path, or an open
        ``duckdb.DuckDBPyConnection``. A connection of the caller's is used as is and not
        closed; it must have no open transaction (``SpecError`` otherwise, before anything
        runs), and :meth:`close` puts back every setting this engine changed on it
        (``enable_progress_bar``, ``disabled_optimizers`` and the settings below; most are
        global to the database instance, so they apply to its other connections meanwhile).
    read_only:
        Open an existing database file read-only (for work that writes nothing: a fit without
        write-back, a dry run, reading the registry). A file on a read-only filesystem or
        without write permission opens this way. Temporary tables still work.
    compensated_sums:
        Render indb's sums as DuckDB's compensated ``KAHAN_SUM`` (slower, for tables of
        ~10^10 rows or extreme magnitudes).
    memory_limit, temp_directory, threads:
        Passed to DuckDB's settings of the same names (out-of-core work spills to
        ``temp_directory`` when ``memory_limit`` is reached).
    """

    def __init__(
        self,
        database: Any = None,
        *,
        read_only: bool = False,
        memory_limit: str | None = None,
        temp_directory: str | None = None,
        threads: int | None = None,
        compensated_sums: bool = False,
    ) -> None:
        import duckdb

        self._duckdb = duckdb
        self.dialect = DuckDBDialect(compensated_sums=compensated_sums)
        # checked before anything is opened or changed
        settings = check_engine_settings(
            memory_limit=memory_limit, temp_directory=temp_directory, threads=threads
        )
        #: the caller's settings as found (DuckDB's text), put back by close()
        self._found: dict[str, str] = {}
        if isinstance(database, duckdb.DuckDBPyConnection):
            self.con = database
            self._owned = False
            self._refuse_open_transaction()
        else:
            self.con = self._open(database, read_only)
            self._owned = True
        try:
            # the progress bar would write to the terminal from inside library calls
            self._set("enable_progress_bar", False)
            self._tune_optimizer()
            for key, val in settings.items():
                self._set_option(key, val)
        except BaseException:
            self.close()
            raise

    def _open(self, database: Any, read_only: bool) -> Any:
        """Connect to a file or ``:memory:``; ``read_only`` opens an existing file read-only.

        DuckDB holds one database instance per file and process, with one configuration: when
        this process already has the file open for writing (a caller's connection, another
        engine), a read-only connection is refused, so the open instance is shared instead.
        A missing file is created (read-write) as before: there is nothing to read-protect.
        """
        duckdb = self._duckdb
        path = ":memory:" if database in (None, "", ":memory:") else str(database)
        ro = read_only and path != ":memory:" and os.path.exists(path)
        try:
            try:
                return duckdb.connect(path, read_only=ro)
            except duckdb.ConnectionException as err:
                if not (ro and "different configuration" in str(err)):
                    raise
                return duckdb.connect(path)
        except duckdb.Error as err:
            hint = ""
            if "lock" in str(err).lower():
                hint = " (another process, perhaps another indb job, has it open for writing)"
            raise EngineError(f"cannot open DuckDB database {path!r}{hint}: {err}") from err

    def _refuse_open_transaction(self) -> None:
        """Refuse a caller's connection inside a transaction, before running anything else.

        DuckDB has no flag for it: in autocommit mode every statement runs in a transaction
        of its own, so two reads of the transaction id differ; inside an open transaction
        they are the same.
        """
        probe = "SELECT current_transaction_id()"
        try:
            first = self.con.execute(probe).fetchall()
            second = self.con.execute(probe).fetchall()
        except self._duckdb.Error as err:
            if "transaction" in str(err).lower():  # "Current transaction is aborted ..."
                raise open_transaction_error("DuckDB", "a failed transaction") from err
            raise _wrap(err, probe) from err
        if first == second:
            raise open_transaction_error("DuckDB", "an open transaction")

    def _tune_optimizer(self) -> None:
        """Turn off DuckDB's partial aggregate pushdown for this connection.

        With the IRLS scan's aggregate over a join to the small coefficient table, that
        rule (new in DuckDB 2.0) spends 0.3-1 s per query in planning, more than the scan
        itself on 10^6 rows; without it planning takes ~20 ms. Other disabled rules the
        connection already had are kept.
        """
        try:
            names = {
                r[0] for r in self.con.execute("SELECT name FROM duckdb_optimizers()").fetchall()
            }
            if "partial_aggregate_pushdown" not in names:
                return
            current = (
                self.con.execute("SELECT current_setting('disabled_optimizers')").fetchall()[0][0]
                or ""
            )
            parts = [p.strip() for p in str(current).split(",") if p.strip()]
            if "partial_aggregate_pushdown" not in parts:
                parts.append("partial_aggregate_pushdown")
                self._set("disabled_optimizers", ",".join(parts))
        except (self._duckdb.Error, EngineError):
            pass  # an older DuckDB without these settings plans the query fine

    def _setting(self, key: str) -> str:
        """A setting's current value as DuckDB's text (bound as a parameter, not pasted)."""
        rows = self.con.execute(
            "SELECT value FROM duckdb_settings() WHERE name = ?", [key]
        ).fetchall()
        return "" if not rows or rows[0][0] is None else str(rows[0][0])

    def _set(self, key: str, value: Any) -> None:
        """SET ``key``; on a caller's connection remember the value found, for :meth:`close`."""
        if not self._owned and key not in self._found:
            try:
                self._found[key] = self._setting(key)
            except self._duckdb.Error as err:
                raise _wrap(err, "SELECT value FROM duckdb_settings()") from err
        self.execute(f"SET {key} = {_setting_literal(value)}")

    def _set_option(self, key: str, value: Any) -> None:
        """SET a setting the user gave; a value DuckDB rejects is the user's input to fix."""
        try:
            self._set(key, value)
        except EngineError as err:
            cause = _one_line(str(err.__cause__ or err))
            raise SpecError(
                f"{key}={value!r} was refused by DuckDB ({cause}); {_SETTING_HINTS[key]}"
            ) from None

    def _restore_settings(self) -> None:
        """Put the caller's settings back as they were found (newest change undone first).

        DuckDB shows sizes cut to a tenth of a unit (a memory_limit of 4GB shows as '3.7 GiB')
        and has no exact read-out, so writing the text back would lower the limit each time
        (3.7 GiB shows as '3.6 GiB'). RESET restores a default exactly; a value found that
        is not the default is written back as the roundest size DuckDB shows with the same
        text (:func:`size_shown_as`: exact for round limits such as '4GB').
        """
        failed: list[str] = []
        for key, value in reversed(list(self._found.items())):
            try:
                self.con.execute(f"RESET {key}")
                if self._setting(key) == value:
                    continue
                size = size_shown_as(value)
                literal = value if size is None else f"{size}B"
                self.con.execute(f"SET {key} = {_setting_literal(literal)}")
            except self._duckdb.Error as err:
                failed.append(f"{key} (was {value!r}: {_one_line(str(err))})")
        self._found.clear()
        if failed:
            warnings.warn(
                "indb could not put back these settings of your DuckDB connection: "
                + "; ".join(failed),
                RuntimeWarning,
                stacklevel=3,
            )

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        t0 = time.perf_counter()
        try:
            rows = self.con.execute(sql).fetchall()
        except self._duckdb.Error as err:
            raise _wrap(err, sql) from err
        self.last_seconds = time.perf_counter() - t0
        return rows

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        t0 = time.perf_counter()
        try:
            columns = self.con.sql(sql).fetchnumpy()
        except self._duckdb.Error as err:
            raise _wrap(err, sql) from err
        self.last_seconds = time.perf_counter() - t0
        return unmasked_columns(columns)

    def describe(self, sql: str) -> list[tuple[str, str]]:
        try:
            rel = self.con.sql(sql)
            return [(str(n), str(t)) for n, t in zip(rel.columns, rel.types, strict=True)]
        except self._duckdb.Error as err:
            raise _wrap(err, sql) from err

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        self.execute("BEGIN TRANSACTION")
        try:
            yield
        except BaseException:
            with contextlib.suppress(Exception):
                self.con.execute("ROLLBACK")
            raise
        self.execute("COMMIT")

    def close(self) -> None:
        """Close a connection this engine opened; on a caller's, restore its settings."""
        if self._owned:
            self.con.close()
        else:
            self._restore_settings()

    def current_location(self) -> tuple[str, str]:
        catalog, schema = self.execute("SELECT current_catalog(), current_schema()")[0]
        return str(catalog), str(schema)

    def resolve_table(self, parts: Sequence[str]) -> tuple[str, ...] | None:
        # DuckDB tells where a name leads only by binding a query, so the lookup follows
        # its rules over information_schema (which lists every attached database and the
        # temp catalog): a 3-part name is exact; a 2-part name is a schema of a catalog on
        # the search path, else a catalog's main schema; a 1-part name goes through the
        # search path (https://duckdb.org/docs/sql/statements/set#search_path).
        candidates = self.execute(self.dialect.render(_relations_named(parts[-1])))
        if not candidates:
            return None
        catalog, path = self.execute("SELECT current_catalog(), current_setting('search_path')")[0]
        order = duckdb_search_order(str(catalog), str(path or ""))
        found = pick_relation(parts, candidates, order)
        if found is None:
            return None
        # DuckDB writes a view's own database out of the view's SQL (so that the file may
        # be renamed or attached under another name); a stored name does the same
        if found[0].lower() == str(catalog).lower():
            return found[1:]
        return found

    def absolute_path(self, path: str) -> str:
        # DuckDB reads a relative path from the process's working directory (this one:
        # DuckDB runs in-process) unless file_search_path names folders to look in; a
        # URL (s3://, https://) or a home-relative path is left to DuckDB.
        if "://" in path or path.startswith("~") or os.path.isabs(path):
            return path
        folders = self.execute("SELECT current_setting('file_search_path')")[0][0]
        if folders:
            return path
        return os.path.abspath(path)


def _relations_named(name: str) -> exp.Select:
    """(catalog, schema, name) of every table and view called ``name`` (any case)."""
    return S.select(
        [S.col("table_catalog"), S.col("table_schema"), S.col("table_name")],
        exp.Table(this=S.ident("tables"), db=S.ident("information_schema")),
        where=S.eq(exp.Lower(this=S.col("table_name")), S.text(name.lower())),
    )


def duckdb_search_order(catalog: str, search_path: str) -> list[tuple[str, str]]:
    """(catalog, schema) pairs in the order DuckDB looks an unqualified name up: the temp
    catalog, the ``search_path`` setting's entries, the current database's main schema,
    then the system catalog. An entry without a catalog is a schema of the current
    database, or else a database's main schema. A name ``db.t`` looks in db's schemas on
    this path, then in db.main."""
    order = [("temp", "main")]
    for entry in _comma_list(search_path):
        parts = split_qualified(entry)
        if len(parts) == 2:
            order.append((parts[0], parts[1]))
        elif len(parts) == 1:
            order += [(catalog, parts[0]), (parts[0], "main")]
    order += [(catalog, "main"), ("system", "main"), ("system", "pg_catalog")]
    return order


def _comma_list(text: str) -> list[str]:
    """Split a setting's comma-separated list, keeping commas inside double quotes."""
    items, buf, quoted = [], [], False
    for ch in text:
        if ch == '"':
            quoted = not quoted  # "" inside quotes toggles twice: the escape survives
        if ch == "," and not quoted:
            items.append("".join(buf))
            buf = []
            continue
        buf.append(ch)
    items.append("".join(buf))
    return [i.strip() for i in items if i.strip()]


def pick_relation(
    parts: Sequence[str],
    candidates: Sequence[Sequence[Any]],
    order: Sequence[tuple[str, str]],
) -> tuple[str, str, str] | None:
    """The (catalog, schema, name) among ``candidates`` that the name ``parts`` binds to,
    following the search ``order`` (see :func:`duckdb_search_order`); names ignore case."""
    low = [p.lower() for p in parts]
    rows = [(str(c), str(s), str(n)) for c, s, n in candidates]

    def key(c: str, s: str) -> tuple[str, str]:
        return c.lower(), s.lower()

    if len(low) == 3:
        return next((r for r in rows if key(r[0], r[1]) == (low[0], low[1])), None)
    if len(low) == 2:
        catalogs: list[str] = []
        for c, _ in order:
            if c.lower() not in catalogs:
                catalogs.append(c.lower())
        in_schema = [r for r in rows if r[1].lower() == low[0] and r[0].lower() in catalogs]
        if in_schema:
            return min(in_schema, key=lambda r: catalogs.index(r[0].lower()))
        # a catalog: its schemas on the search path, then its main schema
        schemas = [s.lower() for c, s in order if c.lower() == low[0]] + ["main"]
        in_catalog = [r for r in rows if r[0].lower() == low[0] and r[1].lower() in schemas]
        if in_catalog:
            return min(in_catalog, key=lambda r: schemas.index(r[1].lower()))
        return None
    ranks = {key(c, s): i for i, (c, s) in reversed(list(enumerate(order)))}
    on_path = [r for r in rows if key(r[0], r[1]) in ranks]
    return min(on_path, key=lambda r: ranks[key(r[0], r[1])]) if on_path else None


def unmasked_columns(columns: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """DuckDB's ``fetchnumpy`` result with NULLs written out: NaN in float columns (integer
    columns with NULLs become floats), None in object columns. Reading results this way,
    not through pyarrow, keeps pandas out of the process (pyarrow's conversion to numpy
    imports it: a third of a second for every fresh ``indb`` command)."""
    out: dict[str, np.ndarray] = {}
    for name, values in columns.items():
        if not isinstance(values, np.ma.MaskedArray):
            out[name] = np.asarray(values)
            continue
        mask = np.ma.getmaskarray(values)
        kind = values.dtype.kind
        if kind == "f":
            out[name] = values.filled(np.nan)
        elif kind in "iu":
            data = np.asarray(values.data, dtype=float)
            data[mask] = np.nan
            out[name] = data
        else:
            data = np.asarray(values.data, dtype=object).copy()
            data[mask] = None
            out[name] = data
    return out


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


def _wrap(err: Exception, sql: str) -> EngineError:
    # The whole message: DuckDB often puts the cause and the fix on later lines (an
    # out-of-memory error names max_temp_directory_size, memory_limit and threads there).
    # The CLI joins the lines into one when it prints the error.
    msg = str(err).strip() or type(err).__name__
    return EngineError(f"DuckDB failed: {msg}", sql=sql)


def connect(db: Any = None, *, read_only: bool = False, **settings: Any) -> Engine:
    """Open an engine from ``db``.

    ``db`` is None (in-memory DuckDB), a DuckDB file path or connection, an :class:`Engine`,
    a ``postgresql://`` / ``postgres://`` URL or open ``psycopg`` connection (PostgreSQL),
    ``spark:MASTER`` such as ``spark:local[2]`` (an in-process Spark driver), ``sc://host:port``
    (a Spark Connect server) or an open ``SparkSession``. ``settings`` (memory_limit,
    temp_directory, threads) apply to DuckDB only; ``view_kind`` (temporary | persistent
    scoring views, see :class:`indb.spark.SparkEngine`) to Spark only. ``read_only`` says
    that nothing will be written: a DuckDB file is then opened read-only (servers and Spark
    sessions are opened as usual; their permissions are the server's business).
    """
    if isinstance(db, Engine):
        return db
    module = type(db).__module__
    low = db.strip().lower() if isinstance(db, str) else ""
    is_pg = low.startswith(("postgresql://", "postgres://")) or module.startswith("psycopg")
    is_spark = low.startswith(("spark:", "sc://")) or (
        module.startswith("pyspark") and type(db).__name__ == "SparkSession"
    )
    view_kind = settings.pop("view_kind", None)
    if view_kind is not None and not is_spark:
        raise SpecError(f"view_kind={view_kind!r} applies to Spark only")
    if is_pg or is_spark:
        given = sorted(k for k, v in settings.items() if v is not None)
        if given:
            raise SpecError(
                f"engine settings {given} apply to DuckDB only; configure "
                f"{'PostgreSQL' if is_pg else 'Spark'} on the server or session instead"
            )
    if is_pg:
        from indb.postgres import PostgresEngine

        return PostgresEngine(db)
    if is_spark:
        from indb.spark import SparkEngine

        if not isinstance(db, str):
            return SparkEngine(db, view_kind=view_kind)
        if low.startswith("sc://"):
            return SparkEngine(remote=db.strip(), view_kind=view_kind)
        master = db.strip()[len("spark:") :]
        if not master:
            raise SpecError(f"database URL {db!r} needs a Spark master, e.g. spark:local[2]")
        return SparkEngine(master=master, view_kind=view_kind)
    if isinstance(db, str) and "://" in db:
        raise SpecError(
            f"database URL {db!r} names an engine indb does not support; use "
            "postgresql://..., spark:local[N], sc://host:port, a DuckDB file path, or omit "
            "--db for an in-memory DuckDB database"
        )
    return DuckDBEngine(db, read_only=read_only, **settings)
