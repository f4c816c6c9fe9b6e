"""PostgreSQL: dialect (translations of indb's custom nodes) and engine adapter (psycopg 3).

Engine differences handled here rather than in the shared plan:

* Float literals such as ``1.5e0`` are NUMERIC in PostgreSQL (arbitrary precision, slower,
  and NUMERIC arithmetic differs from double arithmetic); every literal in scientific
  notation, which is how :func:`indb.sqlexpr.num` writes doubles, is cast to DOUBLE PRECISION.
* No ``lgamma`` before PostgreSQL 18: :func:`indb.sqlexpr.log_gamma_series` builds a
  portable expression (Stirling's series after shifting small arguments), accurate to
  ~1e-15 for x > 0.
* No ``isfinite`` for doubles: ``abs(x) < 'Infinity'`` is false for +/-Infinity and for NaN
  (PostgreSQL sorts NaN above every number, so NaN < Infinity is false; NaN = NaN is true).
* Quantiles: the ordered-set aggregate ``percentile_cont(q) WITHIN GROUP (ORDER BY x)``.
* PostgreSQL raises on float overflow/underflow, ln(0) and division by zero where DuckDB
  returns inf/NULL; the shared plan clamps exp arguments and guards ln and division with CASE.
"""

from __future__ import annotations

import contextlib
import re
import time
import warnings
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine, open_transaction_error, rows_to_columns
from indb.errors import EngineError, UnsupportedError
from indb.sqlexpr import as_operand, log_gamma_series

# -- the dialect ------------------------------------------------------------------------------

_PG_NUMERIC = {
    "int2",
    "int4",
    "int8",
    "float4",
    "float8",
    "numeric",
    "smallint",
    "integer",
    "bigint",
    "real",
    "double precision",
    "decimal",
}
_PG_TEXT = {"text", "varchar", "bpchar", "char", "name", "citext", "character varying", "uuid"}
_PG_BOOL = {"bool", "boolean"}
# pg_type.typcategory: N numeric, S string, E enum, B boolean
# (https://www.postgresql.org/docs/current/catalog-pg-type.html#CATALOG-TYPCATEGORY-TABLE)
_PG_CATEGORY_KIND = {"N": "numeric", "S": "text", "E": "text", "B": "boolean"}


def _is_float_literal(node: exp.Expression) -> bool:
    return (
        isinstance(node, exp.Literal)
        and not node.is_string
        and ("e" in node.this or "E" in node.this)
    )


def cast_float_literals(tree: exp.Expression, to: str) -> exp.Expression:
    """Cast every numeric literal written in scientific notation to ``to`` (in place)."""
    for node in list(tree.walk()):
        if _is_float_literal(node) and not isinstance(node.parent, exp.Cast):
            cast = exp.Cast(this=node.copy(), to=exp.DataType.build(to))
            if node is tree:
                return cast
            node.replace(cast)
    return tree


def fence_subqueries(tree: exp.Expression) -> exp.Expression:
    """Add ``OFFSET 0`` to every derived table so the planner keeps it as its own scan.

    The IRLS plan stacks derived tables (eta, mean, working weights), each column reading
    several of the stage below. PostgreSQL pulls simple subqueries up into the parent and
    substitutes column references by their expressions, with no common-subexpression
    elimination, so the expression size grows geometrically with the stage count (a gram
    query ran for minutes instead of milliseconds). A subquery with LIMIT or OFFSET is never
    pulled up (PostgreSQL source, src/backend/optimizer/prep/prepjointree.c,
    is_simple_subquery), the classic optimization fence.
    """
    for node in tree.find_all(exp.Subquery):
        inner = node.this
        if (
            isinstance(inner, exp.Select)
            and not inner.args.get("offset")
            and not inner.args.get("limit")
        ):
            inner.offset(0, copy=False)
    return tree


class PostgresDialect(Dialect):
    """PostgreSQL (tested with 15): double literals, log-gamma series, ordered-set quantiles.

    Parameters
    ----------
    server_version:
        ``server_version_num`` of the server (e.g. 150004); from 180000 on the native
        ``lgamma`` is used.
    """

    name = "postgres"
    sqlglot_name = "postgres"
    names_ignore_case = False

    def __init__(self, server_version: int = 150000) -> None:
        self.server_version = server_version
        #: pg_type.typcategory of type names seen by :meth:`PostgresEngine.describe`
        self.type_categories: dict[str, str] = {}

    def render(self, tree: exp.Expression) -> str:
        tree = cast_float_literals(tree.copy(), "DOUBLE")
        return super().render(fence_subqueries(tree))

    def _translate(self, node: exp.Expression) -> exp.Expression:
        return cast_float_literals(as_operand(super()._translate(node)), "DOUBLE")

    def replace_view(
        self, create: exp.Create, columns: Sequence[str], existing: Sequence[str] | None
    ) -> list[str]:
        # CREATE OR REPLACE VIEW may only append columns: the existing ones must keep their
        # names, order and types (https://www.postgresql.org/docs/current/sql-createview.html).
        # Otherwise (intervals switched on or off, source columns changed) the view is dropped
        # and created again; DDL is transactional in PostgreSQL, so inside the registry's
        # transaction no reader ever sees the view missing. DROP without CASCADE: a view of
        # the user's that reads this one makes the whole write fail and roll back rather than
        # being dropped silently.
        if existing is None or list(columns[: len(existing)]) == list(existing):
            return [self.render(create)]
        fresh = create.copy()
        fresh.set("replace", False)
        drop = exp.Drop(kind="VIEW", tables=[create.this.copy()], exists=True)
        return [self.render(drop), self.render(fresh)]

    def reserved_objects_query(self, view: str, macro: str | None) -> exp.Query | None:
        # pg_catalog is searched before the search_path's schemas unless the path names it
        # (https://www.postgresql.org/docs/current/ddl-schemas.html#DDL-SCHEMAS-CATALOG): a
        # scoring view named pg_class would itself be hidden by the catalog's table
        cls = exp.Table(this=S.ident("pg_class"), db=S.ident("pg_catalog"))
        cls.set("alias", exp.TableAlias(this=S.ident("c")))
        nsp = exp.Table(this=S.ident("pg_namespace"), db=S.ident("pg_catalog"))
        nsp.set("alias", exp.TableAlias(this=S.ident("n")))
        query = S.select(
            [S.alias(S.col("relname", "c"), "name")],
            cls,
            where=S.and_(
                S.eq(S.col("nspname", "n"), S.text("pg_catalog")),
                S.eq(exp.Lower(this=S.col("relname", "c")), S.text(view.lower())),
            ),
        )
        return query.join(nsp, on=S.eq(S.col("oid", "n"), S.col("relnamespace", "c")), copy=False)

    def materialize(self, name: str, query: exp.Expression) -> list[str]:
        # a temporary table lives in the session's own schema and disappears with it
        return [f"CREATE TEMPORARY TABLE {self.quote(name)} AS {self.render(query)}"]

    def row_pick(self, values: list[exp.Expression], fraction: float) -> exp.Expression:
        # a 64-bit hash of the row's values, uniform over [-2^63, 2^63): below
        # -2^63 + fraction * 2^64 on that share. hash_record_extended (PostgreSQL 14+) hashes
        # the values themselves; older servers hash their text.
        row = exp.Anonymous(this="ROW", expressions=values)
        if self.server_version >= 140000:
            hashed = exp.Anonymous(this="hash_record_extended", expressions=[row, S.integer(0)])
        else:
            hashed = exp.Anonymous(
                this="hashtextextended", expressions=[S.as_text(row), S.integer(0)]
            )
        bound = S.integer(int(-(2.0**63) + fraction * 2.0**64))
        return exp.LT(this=hashed, expression=bound)

    def log_gamma(self, x: exp.Expression) -> exp.Expression:
        if self.server_version >= 180000:
            return exp.Anonymous(this="LGAMMA", expressions=[x])
        return log_gamma_series(x)

    def level_text(self, x: exp.Expression) -> exp.Expression:
        # PostgreSQL writes the double 2.0 as '2' where DuckDB and Spark write '2.0': append
        # '.0' to an integral double's text so a DOUBLE column declared categorical gets the
        # same level names on every engine. pg_typeof and a cast to text type-check for any
        # operand type (a cast to a number would not, for booleans).
        text = S.as_text(x)
        is_double = exp.In(
            this=S.as_text(exp.Anonymous(this="pg_typeof", expressions=[x.copy()])),
            expressions=[S.text("double precision"), S.text("real")],
        )
        integral = exp.RegexpLike(this=text.copy(), expression=S.text("^-?[0-9]+$"))
        return S.case(
            [(S.and_(is_double, integral), exp.DPipe(this=text.copy(), expression=S.text(".0")))],
            text,
        )

    def is_finite(self, x: exp.Expression) -> exp.Expression:
        inf = exp.Cast(this=S.text("Infinity"), to=exp.DataType.build("DOUBLE"))
        return S.lt(S.abs_(x), inf)

    # PostgreSQL's `/` truncates two integers; ln, log, sqrt, exp, power and division raise on
    # arguments outside their domain ("cannot take logarithm of a negative number", "division
    # by zero", "value out of range: overflow"), so the Ieee* nodes guard them with CASE.
    integer_slash = "truncate"
    log_nonpositive = "error"
    zero_division = "error"

    def ieee(self, node: exp.Expression) -> exp.Expression:
        a = node.this
        if isinstance(node, S.IeeeLn):
            return S.ieee_log_guarded(a, exp.Ln(this=a.copy()))
        if isinstance(node, S.IeeeLog10):
            return S.ieee_log_guarded(a, exp.Anonymous(this="LOG10", expressions=[a.copy()]))
        if isinstance(node, S.IeeeSqrt):
            return S.ieee_sqrt_guarded(a)
        if isinstance(node, S.IeeeExp):
            return S.ieee_exp_guarded(a)
        if isinstance(node, S.IeeePow):
            return S.ieee_pow_guarded(a, node.expression)
        return S.ieee_div_guarded(a, node.expression)

    def quantile(self, x: exp.Expression, q: float) -> exp.Expression:
        return exp.WithinGroup(
            this=exp.PercentileCont(this=S.num(q)),
            expression=exp.Order(expressions=[exp.Ordered(this=x)]),
        )

    def file_scan(self, path: str) -> exp.Expression:
        raise UnsupportedError(
            f"PostgreSQL cannot read the file {path!r} from a query; load it into a table "
            "(e.g. with COPY or psql's \\copy) and pass the table name (for scoring-sql: "
            "--source TABLE, or source= in Python)"
        )

    def type_kind(self, type_name: str) -> str:
        t = type_name.strip().lower()
        t = re.sub(r"\(.*\)$", "", t).strip()
        if t in _PG_BOOL:
            return "boolean"
        if t in _PG_NUMERIC:
            return "numeric"
        if t in _PG_TEXT:
            return "text"
        if t in self.type_categories:
            return _PG_CATEGORY_KIND.get(self.type_categories[t], "other")
        return super().type_kind(type_name)


# -- the engine adapter -----------------------------------------------------------------------


def redact(url: str) -> str:
    """A connection URL without its password (for error messages)."""
    return re.sub(r"(://[^:/@]*:)[^@]*@", r"\1***@", url)


class PostgresEngine(Engine):
    """PostgreSQL adapter through psycopg 3 (``pip install 'indb[postgres]'``).

    Parameters
    ----------
    conninfo:
        A ``postgresql://`` URL, a libpq key/value DSN, or an open ``psycopg.Connection``
        (used as is and not closed). A connection of the caller's must have no open
        transaction (``SpecError`` otherwise, before anything runs); indb switches it to
        autocommit while it works and :meth:`close` puts back its autocommit flag and the
        session settings changed here (``extra_float_digits``,
        ``standard_conforming_strings``).

    Queries run in autocommit mode; :meth:`transaction` wraps write-back statements in one
    real transaction (all or nothing).
    """

    def __init__(self, conninfo: Any) -> None:
        try:
            import psycopg
        except ImportError as err:  # pragma: no cover - depends on the installation
            raise UnsupportedError(
                "PostgreSQL needs psycopg 3: pip install 'indb[postgres]'"
            ) from err
        self._psycopg = psycopg
        #: a caller's settings as found (name -> text), and its autocommit flag: put back by
        #: close()
        self._found: dict[str, str] = {}
        self._autocommit_found: bool | None = None
        if isinstance(conninfo, psycopg.Connection):
            self.con = conninfo
            self._owned = False
            self._borrow()
        else:
            try:
                self.con = psycopg.connect(str(conninfo), autocommit=True)
            except psycopg.Error as err:
                first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
                raise EngineError(
                    f"cannot connect to PostgreSQL at {redact(str(conninfo))!r}: {first}"
                ) from err
            self._owned = True
        try:
            self.dialect = PostgresDialect(int(self.con.info.server_version))
            self._types: dict[int, tuple[str, str]] = {}
            # Exact doubles in text results (the default since PostgreSQL 12, set for older
            # servers) and backslashes in string literals taken literally, as sqlglot writes
            # them.
            self._set("extra_float_digits", "3")
            self._set("standard_conforming_strings", "on")
        except BaseException:
            self.close()
            raise

    def _borrow(self) -> None:
        """Take a caller's connection: refuse an open transaction, then run in autocommit.

        Without autocommit, indb's first query would open a transaction that stays open on
        the caller's connection (holding locks), the write-back would become a savepoint
        that only the caller's COMMIT makes durable, and a failed probe query would abort
        it. psycopg lets autocommit change only outside a transaction, which was just checked.
        """
        from psycopg.pq import TransactionStatus

        status = self.con.info.transaction_status
        if status == TransactionStatus.UNKNOWN:
            raise EngineError("the PostgreSQL connection passed as db= is closed or broken")
        states = {
            TransactionStatus.INTRANS: "an open transaction",
            TransactionStatus.INERROR: "a failed transaction",
            TransactionStatus.ACTIVE: "a command running",
        }
        if status in states:
            raise open_transaction_error("PostgreSQL", states[status])
        if not self.con.autocommit:
            self._autocommit_found = False
            self.con.autocommit = True

    def _set(self, name: str, value: str) -> None:
        """Set a session setting when it differs; on a caller's connection remember it.

        ``set_config`` with bound parameters: names and values are never pasted into SQL.
        """
        current = self._run_params("SELECT current_setting(%s)", (name,))[0][0]
        if str(current) == value:
            return
        if not self._owned:
            self._found.setdefault(name, str(current))
        self._run_params("SELECT set_config(%s, %s, false)", (name, value))

    def _run_params(self, sql: str, params: tuple[Any, ...]) -> list[tuple[Any, ...]]:
        try:
            with self.con.cursor() as cur:
                cur.execute(sql, params)
                return cur.fetchall()
        except self._psycopg.Error as err:
            raise _wrap(err, sql) from err

    def _run(self, sql: str) -> tuple[list[str], list[tuple[Any, ...]]]:
        t0 = time.perf_counter()
        try:
            with self.con.cursor() as cur:
                cur.execute(sql)
                if cur.description is None:
                    names, rows = [], []
                else:
                    names = [d.name for d in cur.description]
                    rows = cur.fetchall()
        except self._psycopg.Error as err:
            raise _wrap(err, sql) from err
        self.last_seconds = time.perf_counter() - t0
        return names, rows

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        return self._run(sql)[1]

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        names, rows = self._run(sql)
        return rows_to_columns(names, rows)

    def describe(self, sql: str) -> list[tuple[str, str]]:
        """Column names and pg_type names of a query, from a ``LIMIT 0`` run."""
        probe = f"SELECT * FROM ({sql}) AS indb_describe LIMIT 0"
        try:
            with self.con.cursor() as cur:
                cur.execute(probe)
                desc = [(d.name, int(d.type_code)) for d in cur.description or ()]
        except self._psycopg.Error as err:
            raise _wrap(err, sql) from err
        self._learn_types([oid for _, oid in desc])
        return [(name, self._types.get(oid, (f"oid {oid}", "X"))[0]) for name, oid in desc]

    def _learn_types(self, oids: list[int]) -> None:
        missing = sorted({o for o in oids if o not in self._types})
        if not missing:
            return
        try:
            with self.con.cursor() as cur:
                cur.execute(
                    "SELECT oid::int8, typname, typcategory FROM pg_catalog.pg_type "
                    "WHERE oid = ANY(%s::oid[])",
                    (missing,),
                )
                found = cur.fetchall()
        except self._psycopg.Error as err:
            raise _wrap(err, "SELECT ... FROM pg_catalog.pg_type") from err
        for oid, name, category in found:
            self._types[int(oid)] = (str(name), str(category))
            self.dialect.type_categories[str(name).lower()] = str(category)

    def current_location(self) -> tuple[str, str]:
        database, schema = self.execute("SELECT current_database(), current_schema()")[0]
        return str(database), str(schema)

    def resolve_table(self, parts: Sequence[str]) -> tuple[str, ...] | None:
        # to_regclass resolves a name exactly as a query would (search_path, pg_catalog
        # first) and gives NULL for a missing relation. The schema alone qualifies it: a
        # query cannot reach another database, and leaving the database name out keeps
        # the name valid in a restored copy under another name. The session's own
        # temporary schema is written pg_temp, its name in every session.
        name = self.dialect.render(exp.Table(**_table_args(parts)))
        sql = (
            "SELECT CASE WHEN n.oid = pg_catalog.pg_my_temp_schema() THEN 'pg_temp' "
            "ELSE n.nspname END, c.relname FROM pg_catalog.pg_class c "
            "JOIN pg_catalog.pg_namespace n ON n.oid = c.relnamespace "
            "WHERE c.oid = pg_catalog.to_regclass(%s)"
        )
        try:
            with self.con.cursor() as cur:
                cur.execute(sql, (name,))
                row = cur.fetchone()
        except self._psycopg.Error:
            # a name to_regclass cannot even parse (another database's): the fit's own
            # read of it gives the error
            return None
        return (str(row[0]), str(row[1])) if row else None

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        """Run the statements inside as one PostgreSQL transaction (rolled back on error)."""
        try:
            with self.con.transaction():
                yield
        except self._psycopg.Error as err:
            raise _wrap(err, None) from err

    def close(self) -> None:
        """Close a connection this engine opened; on a caller's, put back what it changed."""
        if self._owned:
            self.con.close()
            return
        failed: list[str] = []
        for name, value in reversed(list(self._found.items())):
            try:
                self._run_params("SELECT set_config(%s, %s, false)", (name, value))
            except EngineError as err:
                failed.append(f"{name} (was {value!r}: {err})")
        self._found.clear()
        if self._autocommit_found is not None:
            try:
                self.con.autocommit = self._autocommit_found
            except self._psycopg.Error as err:
                failed.append(f"autocommit (was {self._autocommit_found}: {err})")
            self._autocommit_found = None
        if failed:
            warnings.warn(
                "indb could not put back these settings of your PostgreSQL connection: "
                + "; ".join(failed),
                RuntimeWarning,
                stacklevel=3,
            )


def _table_args(parts: Sequence[str]) -> dict[str, exp.Identifier]:
    ids = [S.ident(p) for p in parts]
    args = {"this": ids[-1]}
    if len(ids) >= 2:
        args["db"] = ids[-2]
    if len(ids) == 3:
        args["catalog"] = ids[-3]
    return args


def _wrap(err: Exception, sql: str | None) -> EngineError:
    text = str(err).strip()
    msg = text.splitlines()[0] if text else type(err).__name__
    return EngineError(f"PostgreSQL failed: {msg}", sql=sql)


def open_engine(db: Any) -> PostgresEngine:
    """The engine factory of the backends table: ``db`` is a URL, a DSN or a connection."""
    return PostgresEngine(db)
