"""DuckDB: dialect (translations of indb's custom nodes) and engine adapter (embedded).

DuckDB is the default backend: :func:`indb.connect` opens it for ``None``, a file path or an
open ``duckdb`` connection.
"""

from __future__ import annotations

import contextlib
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

from indb import sqlexpr as S
from indb.engines.base_dialect import Dialect, split_qualified
from indb.engines.base_engine import Engine, open_transaction_error
from indb.errors import EngineError, SpecError

# -- the dialect ------------------------------------------------------------------------------


def _element(array: exp.Expression, index: int) -> exp.Expression:
    """``array[index]`` with the index as DuckDB counts (from 1); ``offset=1`` tells sqlglot
    the literal is already 1-based, so it renders it unchanged."""
    return exp.Bracket(this=array, expressions=[exp.Literal.number(index)], offset=1)


class DuckDBDialect(Dialect):
    """DuckDB: lgamma, isfinite, read_parquet/read_csv_auto; IEEE doubles (1/0 = inf)."""

    name = "duckdb"
    sqlglot_name = "duckdb"

    def __init__(self, compensated_sums: bool = False) -> None:
        # SUM(DOUBLE) adds in parallel partial sums (error ~ sqrt(n) eps in practice);
        # KAHAN_SUM is compensated but about twice as slow (see benchmarks/RESULTS.md).
        self.compensated_sums = compensated_sums

    def precise_sum(self, x):
        if self.compensated_sums:
            return exp.Anonymous(this="KAHAN_SUM", expressions=[x])
        return exp.Sum(this=x)

    def log_gamma(self, x):
        return exp.Anonymous(this="LGAMMA", expressions=[x])

    def is_finite(self, x):
        return exp.Anonymous(this="ISFINITE", expressions=[x])

    def quantile(self, x, q):
        return exp.Anonymous(this="QUANTILE_CONT", expressions=[x, S.num(q)])

    def quantiles(self, x, qs):
        # QUANTILE_CONT(x, [q1, q2, ...]) keeps one copy of the values for all of them;
        # DuckDB's binder computes the repeated identical aggregate once (one state per
        # column, as EXPLAIN shows), and [i] picks one (1-based lists)
        listed = exp.Anonymous(
            this="QUANTILE_CONT", expressions=[x, exp.Array(expressions=[S.num(q) for q in qs])]
        )
        return [_element(listed.copy(), i + 1) for i in range(len(qs))]

    # DuckDB's `//` divides integers (truncating) and divides anything else exactly
    # (7.5 // 2 = 3.75); its `/` is true division, and ln, sqrt, exp, pow and division by
    # zero give IEEE-754's NaN and infinities (checked in tests/test_portable.py).
    int_div_fraction = "exact"

    def ieee(self, node):
        a = node.this
        if isinstance(node, S.IeeeLn):
            return exp.Ln(this=a)
        if isinstance(node, S.IeeeLog10):
            return exp.Anonymous(this="LOG10", expressions=[a])
        if isinstance(node, S.IeeeSqrt):
            return exp.Sqrt(this=a)
        if isinstance(node, S.IeeeExp):
            return exp.Exp(this=a)
        if isinstance(node, S.IeeePow):
            return exp.Pow(this=a, expression=node.expression)
        return S.div(a, node.expression)  # IeeeDiv

    supports_macros = True

    def materialize(self, name, query):
        return [f"CREATE OR REPLACE TEMP TABLE {self.quote(name)} AS {self.render(query)}"]

    def row_pick(self, values, fraction):
        # HASH(...) is a UBIGINT spread over [0, 2^64): below fraction * 2^64 on that share
        bound = exp.Literal.number(int(fraction * 2.0**64))
        return exp.LT(this=exp.Anonymous(this="HASH", expressions=values), expression=bound)

    def _qualified(self, schema: str | None, name: str) -> str:
        return (self.quote(schema) + "." if schema else "") + self.quote(name)

    def create_macro(self, schema, name, params, body):
        # DuckDB scalar macro; parameters are the model's input columns, so column
        # references in the body bind to them (https://duckdb.org/docs/sql/statements/create_macro)
        args = ", ".join(self.quote(p) for p in params)
        return (
            f"CREATE OR REPLACE MACRO {self._qualified(schema, name)}({args}) AS "
            f"{self.render(body)}"
        )

    def drop_macro(self, schema, name):
        return f"DROP MACRO IF EXISTS {self._qualified(schema, name)}"

    def existing_objects_query(self, schema, view, macro):
        # information_schema.tables lists every attached database: keep the current one.
        # Macros live in duckdb_functions() (https://duckdb.org/docs/sql/meta/duckdb_table_functions)
        q = super().existing_objects_query(schema, view, macro)
        q = q.where(S.eq(S.col("table_catalog"), exp.CurrentCatalog()), copy=False)
        if macro is None:
            return q
        macros = S.select(
            [S.alias(S.text("MACRO"), "kind"), S.alias(S.col("function_name"), "name")],
            exp.Table(this=exp.Anonymous(this="duckdb_functions", expressions=[])),
            where=S.and_(
                S.eq(S.col("database_name"), exp.CurrentCatalog()),
                S.eq(S.col("schema_name"), S.text(schema) if schema else exp.CurrentSchema()),
                S.eq(exp.Lower(this=S.col("function_name")), S.text(macro.lower())),
                S.eq(S.col("function_type"), S.text("macro")),
            ),
        )
        return exp.union(q, macros, distinct=False)

    def reserved_objects_query(self, view, macro):
        # DuckDB looks unqualified names up in the temp catalog, then the database's own
        # schemas, then the system catalog's main and pg_catalog schemas: a view named
        # sqlite_master in main would hide the built-in view of that name from every query,
        # and a macro in main hides a built-in function (https://duckdb.org/docs/sql/statements/set#search_path)
        def internal(table_fn: str, column: str, name: str) -> exp.Select:
            return S.select(
                [S.alias(S.col(column), "name")],
                exp.Table(this=exp.Anonymous(this=table_fn, expressions=[])),
                where=S.and_(
                    S.col("internal"),
                    S.eq(exp.Lower(this=S.col(column)), S.text(name.lower())),
                ),
            )

        parts: list[exp.Select] = [
            internal("duckdb_views", "view_name", view),
            internal("duckdb_tables", "table_name", view),
        ]
        if macro is not None:
            parts.append(internal("duckdb_functions", "function_name", macro))
        query: exp.Query = parts[0]
        for part in parts[1:]:
            query = exp.union(query, part, distinct=False)
        return query

    def file_scan(self, path: str) -> exp.Expression:
        low = path.lower()
        if low.endswith((".parquet", ".pq")) or ".parquet" in low:
            fn = "read_parquet"
        elif low.endswith((".json", ".ndjson")):
            fn = "read_json_auto"
        else:
            fn = "read_csv_auto"
        return exp.Table(this=exp.Anonymous(this=fn, expressions=[S.text(path)]))


# -- the engine adapter -----------------------------------------------------------------------

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


def _wrap(err: Exception, sql: str) -> EngineError:
    # The whole message: DuckDB often puts the cause and the fix on later lines (an
    # out-of-memory error names max_temp_directory_size, memory_limit and threads there).
    # The CLI joins the lines into one when it prints the error.
    msg = str(err).strip() or type(err).__name__
    return EngineError(f"DuckDB failed: {msg}", sql=sql)


def open_engine(db: Any = None, **settings: Any) -> DuckDBEngine:
    """The engine factory of the backends table: ``db`` is None, a path or a connection;
    ``settings`` are :class:`DuckDBEngine`'s keyword arguments."""
    return DuckDBEngine(db, **settings)
