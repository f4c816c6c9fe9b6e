"""Engine adapters: connect, run SQL text, describe columns, fetch small results.

Adapters know nothing about models. They translate driver errors into
:class:`~indb.errors.EngineError` (keeping the SQL that failed) and run write-back
statements in one transaction.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Iterator, Sequence
from decimal import Decimal
from typing import Any

import numpy as np

from indb.dialect import Dialect, DuckDBDialect
from indb.errors import EngineError, SpecError


class Engine:
    """Interface every engine adapter implements."""

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

    #: seconds spent in the last execute/fetch (for iteration timing)
    last_seconds: float = 0.0


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


def connect(db: Any = None, **settings: Any) -> Engine:
    """Open an engine from ``db``.

    ``db`` is None (in-memory DuckDB), a DuckDB file path or connection, an :class:`Engine`,
    a ``postgresql://`` / ``postgres://`` URL or open ``psycopg`` connection (PostgreSQL),
    ``spark:MASTER`` such as ``spark:local[2]`` (an in-process Spark driver), ``sc://host:port``
    (a Spark Connect server) or an open ``SparkSession``. ``settings`` (memory_limit,
    temp_directory, threads) apply to DuckDB only; ``view_kind`` (temporary | persistent
    scoring views, see :class:`indb.spark.SparkEngine`) to Spark only.
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
    return DuckDBEngine(db, **settings)
