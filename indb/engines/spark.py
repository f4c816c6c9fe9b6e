"""Apache Spark SQL: dialect and engine adapter (pyspark; in-process or Spark Connect).

Engine differences handled here rather than in the shared plan:

* No ``lgamma`` SQL function: the portable :func:`indb.sqlexpr.log_gamma_series` is used.
* No ``isfinite``: ``NOT isnan(x) AND abs(x) <> Infinity`` (Spark treats NaN = NaN as true
  and NaN as larger than every number, https://spark.apache.org/docs/latest/sql-ref-datatypes.html#nan-semantics).
* Quantiles: the exact ``percentile(x, q)`` (linear interpolation, like DuckDB's
  ``quantile_cont``), not the approximate ``percentile_approx``.
* Files: ``parquet.`path``` (also orc, json); CSV needs options, so it goes through a view.
* String literals: backslash is an escape character; sqlglot's Spark renderer escapes it.
* ANSI mode (the default since Spark 4) raises on division by zero; the shared plan guards
  every division whose divisor can be zero with CASE, and ln(0) (NULL in Spark) likewise.
"""

from __future__ import annotations

import contextlib
import os
import re
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine, rows_to_columns
from indb.errors import EngineError, SpecError, UnsupportedError
from indb.sqlexpr import as_operand, log_gamma_series

_SPARK_NUMERIC = {"tinyint", "smallint", "int", "integer", "bigint", "float", "double", "decimal"}
_SPARK_NUMERIC |= {"byte", "short", "long", "real"}
_SPARK_TEXT = {"string", "varchar", "char"}
_SPARK_BOOL = {"boolean"}
_FILE_FORMATS = {".parquet": "parquet", ".pq": "parquet", ".orc": "orc", ".json": "json"}
#: formats Spark reads as format.`path` with no reader options (CSV needs a header option)
_DIRECT_FORMATS = frozenset(_FILE_FORMATS.values())
_FORMAT_PATH = re.compile(r"(\w+)\.`([^`]+)`")
VIEW_KINDS = ("temporary", "persistent")


def check_view_kind(value: str) -> str:
    if value not in VIEW_KINDS:
        raise SpecError(f"view_kind {value!r} is not one of {', '.join(VIEW_KINDS)}")
    return value


ROW_PICK_MODULUS = 1_000_003  # a prime; sample fractions resolve to 1e-6


class SparkDialect(Dialect):
    """Spark SQL (tested with Spark 4): log-gamma series, isnan-based finiteness, percentile."""

    name = "spark"
    sqlglot_name = "spark"
    # Spark's built-in file tables have no constraints and no UPDATE/DELETE (those need a
    # table format such as Delta or Iceberg): the registry is kept append-only there.
    supports_primary_keys = False
    supports_update = False
    table_format = "parquet"

    def __init__(self, view_kind: str = "temporary") -> None:
        #: "temporary": scoring views live in the Spark session; "persistent": in the catalog
        self.view_kind = check_view_kind(view_kind)

    def replace_view(
        self, create: exp.Create, columns: Sequence[str], existing: Sequence[str] | None
    ) -> list[str]:
        # Spark replaces a view's whole definition, columns included, in one catalog call.
        if self.view_kind == "persistent":
            return [self.render(create)]
        target = create.this
        if target.args.get("db") is not None:
            raise SpecError(
                f"a temporary Spark view cannot be in a schema (view schema "
                f"{target.db!r}); drop the view schema or use view_kind='persistent'"
            )
        temp = create.copy()
        temp.set("properties", exp.Properties(expressions=[exp.TemporaryProperty()]))
        return [self.render(temp)]

    def render(self, tree: exp.Expression) -> str:
        tree = tree.copy()
        for node in list(tree.find_all(exp.Anonymous)):
            # GROUPING(a, b, ...) -- the bitmask over several grouping columns, as in
            # DuckDB and PostgreSQL -- is GROUPING_ID(a, b, ...) in Spark, whose GROUPING
            # takes one column (same bit order: the first column is the most significant).
            # GROUPING(a) of one column stays: Spark's GROUPING_ID must list every column of
            # the GROUP BY (GROUPING_ID_COLUMN_MISMATCH)
            if str(node.this).upper() == "GROUPING" and len(node.expressions) > 1:
                node.set("this", "GROUPING_ID")
        return super().render(tree)

    def existing_objects_sql(self, schema, view, macro):
        # Spark has no information_schema; SHOW TABLES lists tables, views and the
        # session's temporary views (https://spark.apache.org/docs/latest/sql-ref-syntax-aux-show-tables.html)
        return "SHOW TABLES" + (f" IN {self.quote(schema)}" if schema else "")

    def existing_objects(self, cols, view, macro):
        return [
            ("TEMPORARY VIEW" if bool(temp) else "TABLE OR VIEW", str(name))
            for name, temp in zip(cols["tableName"], cols["isTemporary"], strict=True)
            if str(name).lower() == view.lower()
        ]

    def materialize(self, name: str, query: exp.Expression) -> list[str]:
        # a session-private temporary view, computed once and kept in executor memory
        return [f"CACHE TABLE {self.quote(name)} AS {self.render(query)}"]

    def drop_materialized(self, name: str) -> str:
        return f"DROP VIEW IF EXISTS {self.quote(name)}"  # uncaches it too

    def row_pick(self, values: list[exp.Expression], fraction: float) -> exp.Expression:
        # HASH(...) is Spark's 32-bit Murmur3 of the values (fixed seed 42): PMOD of it by a
        # prime spreads rows evenly over [0, m)
        m = ROW_PICK_MODULUS
        hashed = exp.Anonymous(this="HASH", expressions=values)
        spread = exp.Anonymous(this="PMOD", expressions=[hashed, exp.Literal.number(m)])
        return exp.LT(this=spread, expression=exp.Literal.number(max(1, round(fraction * m))))

    def _translate(self, node: exp.Expression) -> exp.Expression:
        return as_operand(super()._translate(node))

    def log_gamma(self, x: exp.Expression) -> exp.Expression:
        return log_gamma_series(x)

    def is_finite(self, x: exp.Expression) -> exp.Expression:
        inf = exp.Cast(this=S.text("Infinity"), to=exp.DataType.build("DOUBLE"))
        not_nan = S.not_(exp.Anonymous(this="ISNAN", expressions=[x]))
        return S.and_(not_nan, S.ne(S.abs_(x.copy()), inf))

    def quantile(self, x: exp.Expression, q: float) -> exp.Expression:
        return exp.Anonymous(this="PERCENTILE", expressions=[x, S.num(q)])

    def quantiles(self, x: exp.Expression, qs: Sequence[float]) -> list[exp.Expression]:
        # PERCENTILE(x, ARRAY(q1, ...)) counts the values once for all of them (separate
        # PERCENTILE calls would each keep a map of every distinct value); Spark computes the
        # repeated identical aggregate once and [i] picks one (0-based; offset=0 tells
        # sqlglot the literal is counted from 0 already)
        listed = exp.Anonymous(
            this="PERCENTILE", expressions=[x, exp.Array(expressions=[S.num(q) for q in qs])]
        )
        return [
            exp.Bracket(this=listed.copy(), expressions=[exp.Literal.number(i)], offset=0)
            for i in range(len(qs))
        ]

    # Spark's `/` is true division and returns NULL for a zero divisor (an error in ANSI mode,
    # the default from Spark 4); ln and log return NULL for x <= 0; sqrt and exp follow Java's
    # Math (IEEE-754), and so does pow except 1 ^ NaN and (-1) ^ +/-inf (NaN in Java, 1 in C).
    # `DIV` truncates (its result is a BIGINT).
    log_nonpositive = "null"
    zero_division = "null"

    def ieee(self, node: exp.Expression) -> exp.Expression:
        a = node.this
        if isinstance(node, S.IeeeLn):
            return S.ieee_log_guarded(a, exp.Ln(this=a.copy()))
        if isinstance(node, S.IeeeLog10):
            return S.ieee_log_guarded(a, exp.Anonymous(this="LOG10", expressions=[a.copy()]))
        if isinstance(node, S.IeeeSqrt):
            return exp.Sqrt(this=a)
        if isinstance(node, S.IeeeExp):
            return exp.Exp(this=a)
        if isinstance(node, S.IeeePow):
            b = node.expression
            return S.ieee_pow_unit_base(a, b, exp.Pow(this=a.copy(), expression=b.copy()))
        return S.ieee_div_guarded(a, node.expression)

    def file_scan(self, path: str) -> exp.Expression:
        named = _FORMAT_PATH.fullmatch(path.strip())
        if named and named.group(1).lower() in _DIRECT_FORMATS:
            # already in Spark's own form, format.`path` (how its docs write a file source)
            return exp.Table(this=S.ident(named.group(2)), db=S.ident(named.group(1).lower()))
        low = path.lower().rstrip("/")
        fmt = next((f for suffix, f in _FILE_FORMATS.items() if low.endswith(suffix)), None)
        if fmt is None and (".parquet" in low or Path(path).is_dir()):
            fmt = "parquet"  # a partitioned Parquet directory or glob
        if fmt is None:
            raise UnsupportedError(
                f"Spark reads {path!r} only through a view with reader options: run "
                "CREATE TEMPORARY VIEW v USING csv OPTIONS (path '...', header 'true', "
                "inferSchema 'true') and pass the view name v"
            )
        # Spark's "run SQL on files directly": format.`path`
        return exp.Table(this=S.ident(path), db=S.ident(fmt))

    def type_kind(self, type_name: str) -> str:
        t = type_name.strip().lower()
        base = t.split("(", 1)[0].strip()
        if base in _SPARK_BOOL:
            return "boolean"
        if base in _SPARK_NUMERIC:
            return "numeric"
        if base in _SPARK_TEXT:
            return "text"
        return super().type_kind(type_name)


class SparkEngine(Engine):
    """Spark SQL adapter (``pip install 'indb[spark]'``).

    Parameters
    ----------
    session:
        An existing ``SparkSession`` (classic or Spark Connect), used as is and not stopped.
    master:
        A master URL for an in-process driver: ``local[2]``, ``spark://host:7077``, ...
    remote:
        A Spark Connect URL ``sc://host:port``.
    conf:
        Extra Spark settings for a session this engine creates.
    view_kind:
        Where write-back puts scoring views: ``"temporary"`` (session-scoped, gone when the
        session ends) or ``"persistent"`` (in the catalog; the scoring source must then be a
        catalog table or a file, not a temporary view). By default temporary for a session
        given by the caller, persistent for a session this engine opens (and stops at
        :meth:`close`, which would take a temporary view with it).

    Spark has no transactions: :meth:`transaction` runs the statements inside one by one
    and cannot undo the earlier ones when a later one fails.
    """

    def __init__(
        self,
        session: Any = None,
        *,
        master: str | None = None,
        remote: str | None = None,
        conf: dict[str, str] | None = None,
        view_kind: str | None = None,
    ) -> None:
        if view_kind is not None:
            check_view_kind(view_kind)
        if sum(x is not None for x in (session, master, remote)) != 1:
            raise SpecError("SparkEngine needs exactly one of session=, master= or remote=")
        try:
            from pyspark.errors import PySparkException
            from pyspark.sql import SparkSession
        except ImportError as err:  # pragma: no cover - depends on the installation
            raise UnsupportedError("Spark needs pyspark: pip install 'indb[spark]'") from err
        errors: list[type[BaseException]] = [PySparkException]
        with contextlib.suppress(ImportError):
            from py4j.protocol import Py4JError

            errors.append(Py4JError)
        self._errors = tuple(errors)
        self.dialect = SparkDialect(view_kind or "temporary")
        if session is not None:
            self.session = session
            self._owned = False
            return
        # a driver inside a library call: no web UI, no progress bar on the terminal
        settings = {
            "spark.ui.enabled": "false",
            "spark.ui.showConsoleProgress": "false",
        }
        settings.update(conf or {})
        try:
            if remote is not None:
                builder = SparkSession.builder.remote(remote)
                settings = dict(conf or {})  # server-side settings belong to the server
            else:
                # spark-class finds `java` on PATH when JAVA_HOME is unset
                builder = SparkSession.builder.master(master).appName("indb")
            for key, val in settings.items():
                builder = builder.config(key, val)
            if remote is not None:
                # a new server-side session of our own (getOrCreate could hand back the
                # caller's default session, which close() must not stop)
                self.session = builder.create()
                self._owned = True
            else:
                # SparkSession.getActiveSession() would route to Spark Connect once a Connect
                # session exists in this process; the classic one is the instantiated session.
                running = SparkSession._instantiatedSession
                if running is not None and running._sc._jsc is not None:
                    self.session, self._owned = running, False
                else:
                    with _classic_mode():
                        self.session = builder.getOrCreate()
                    self._owned = True
        except self._errors as err:
            where = remote if remote is not None else master
            raise EngineError(f"cannot start a Spark session for {where!r}: {_first(err)}") from err
        if view_kind is None and self._owned:
            self.dialect.view_kind = "persistent"

    def _df(self, sql: str) -> Any:
        try:
            return self.session.sql(sql)
        except self._errors as err:
            raise _wrap(err, sql) from err

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        t0 = time.perf_counter()
        df = self._df(sql)
        try:
            rows = [tuple(r) for r in df.collect()]
        except self._errors as err:
            raise _wrap(err, sql) from err
        self.last_seconds = time.perf_counter() - t0
        return rows

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        t0 = time.perf_counter()
        df = self._df(sql)
        try:
            if hasattr(df, "toArrow"):  # pyspark >= 4
                table = df.toArrow()
                out = {
                    name: col.to_numpy(zero_copy_only=False)
                    for name, col in zip(table.column_names, table.columns, strict=True)
                }
            else:
                out = rows_to_columns(df.columns, [tuple(r) for r in df.collect()])
        except self._errors as err:
            raise _wrap(err, sql) from err
        self.last_seconds = time.perf_counter() - t0
        return out

    def describe(self, sql: str) -> list[tuple[str, str]]:
        """Column names and Spark type names from the analysed plan (nothing is run)."""
        df = self._df(sql)
        try:
            fields = df.schema.fields
        except self._errors as err:
            raise _wrap(err, sql) from err
        return [(f.name, f.dataType.simpleString()) for f in fields]

    def current_location(self) -> tuple[str, str]:
        try:
            catalog = self.session.catalog.currentCatalog()
            database = self.session.catalog.currentDatabase()
        except self._errors as err:
            raise _wrap(err, "-- catalog.currentDatabase()") from err
        return str(catalog), str(database)

    def resolve_table(self, parts: Sequence[str]) -> tuple[str, ...] | None:
        # The catalog API resolves a name as a query does (temporary views first) and
        # returns its catalog and namespace. A session's temporary view has no name in the
        # catalog: it stays as written (a persistent view may not read one anyway).
        name = ".".join(self.dialect.quote(p) for p in parts)
        try:
            if not self.session.catalog.tableExists(name):
                return None
            table = self.session.catalog.getTable(name)
        except self._errors:
            return None
        namespace = [str(n) for n in (table.namespace or [])]
        if table.isTemporary:
            # a global temporary view is reached through its namespace global_temp
            return (*namespace, str(table.name)) if namespace else None
        catalog = getattr(table, "catalog", None)
        return tuple(p for p in (catalog, *namespace, str(table.name)) if p)

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        """No transaction: Spark SQL runs each statement on its own (no rollback)."""
        yield

    def close(self) -> None:
        if self._owned:
            self.session.stop()


@contextlib.contextmanager
def _classic_mode() -> Iterator[None]:
    """Let pyspark start a classic driver although a Connect session exists in this process.

    pyspark marks the process as Connect-only (``SPARK_CONNECT_MODE_ENABLED``) when a Connect
    session is created, and then refuses classic sessions (SESSION_ALREADY_EXIST); the two
    kinds work side by side, so the mark is lifted while the classic driver starts.
    """
    mark = os.environ.pop("SPARK_CONNECT_MODE_ENABLED", None)
    try:
        yield
    finally:
        if mark is not None:
            os.environ["SPARK_CONNECT_MODE_ENABLED"] = mark


def _first(err: BaseException) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__


def _wrap(err: BaseException, sql: str) -> EngineError:
    return EngineError(f"Spark failed: {_first(err)}", sql=sql)


def open_engine(db: Any, *, view_kind: str | None = None) -> SparkEngine:
    """The engine factory of the backends table: ``db`` is ``spark:MASTER`` (an in-process
    driver), ``sc://host:port`` (Spark Connect) or an open ``SparkSession``."""
    if not isinstance(db, str):
        return SparkEngine(db, view_kind=view_kind)
    if db.strip().lower().startswith("sc://"):
        return SparkEngine(remote=db.strip(), view_kind=view_kind)
    master = db.strip()[len("spark:") :]
    if not master:
        raise SpecError(f"database URL {db!r} needs a Spark master, e.g. spark:local[2]")
    return SparkEngine(master=master, view_kind=view_kind)
