"""DuckDB: dialect (translations of indb's custom nodes) and engine adapter (embedded).

DuckDB is the default backend: :func:`indb.connect` opens it for ``None``, a file path or an
open ``duckdb`` connection.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from typing import Any

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine
from indb.errors import EngineError

# -- the dialect ------------------------------------------------------------------------------


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


class DuckDBEngine(Engine):
    """DuckDB adapter (embedded; a file, ``:memory:``, or an existing connection).

    Parameters
    ----------
    database:
        ``None`` or ``":memory:"`` for an in-memory database, a file path, or an open
        ``duckdb.DuckDBPyConnection`` (which is used as is and not closed).
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
        if isinstance(database, duckdb.DuckDBPyConnection):
            self.con = database
            self._owned = False
        else:
            path = ":memory:" if database in (None, "", ":memory:") else str(database)
            try:
                self.con = duckdb.connect(path, read_only=read_only)
            except duckdb.Error as err:
                hint = ""
                if "lock" in str(err).lower():
                    hint = " (another process, perhaps another indb job, has it open for writing)"
                raise EngineError(f"cannot open DuckDB database {path!r}{hint}: {err}") from err
            self._owned = True
        # the progress bar would write to the terminal from inside library calls
        self.con.execute("SET enable_progress_bar = false")
        self._tune_optimizer()
        settings = {
            "memory_limit": memory_limit,
            "temp_directory": temp_directory,
            "threads": threads,
        }
        for key, val in settings.items():
            if val is not None:
                self._set(key, val)

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
        except self._duckdb.Error:
            pass  # an older DuckDB without these settings plans the query fine

    def _set(self, key: str, value: Any) -> None:
        # SET takes a literal; values are validated types (str/int), quoted as literals.
        lit = (
            str(int(value)) if isinstance(value, int) else "'" + str(value).replace("'", "''") + "'"
        )
        self.execute(f"SET {key} = {lit}")

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
        if self._owned:
            self.con.close()


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
