"""The dialect base: the one place where generated syntax trees become SQL text.

Each backend module of :mod:`indb.engines` subclasses :class:`Dialect` to translate indb's
custom nodes (``LogGamma``, ``IsFinite``, ``PreciseSum``) and engine-specific constructs
(file scans, type names); this module never imports them. A custom node without a
translation raises :class:`~indb.errors.UnsupportedError` instead of being passed through as
generic SQL.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import Any

from sqlglot import exp

from indb import sqlexpr as S
from indb.errors import SpecError, UnsupportedError

_NUMERIC_TYPES = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|INT|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|"
    r"UHUGEINT|FLOAT|REAL|DOUBLE|DOUBLE PRECISION|DECIMAL(\(.*\))?|NUMERIC(\(.*\))?|INT[248]|"
    r"FLOAT[48]|SMALLINT|LONG|SHORT|BYTE)$",
    re.IGNORECASE,
)
#: whole-number types (cross-validation's fold key is taken mod K only for these)
_INTEGER_TYPES = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|INT|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|"
    r"UHUGEINT|INT[248]|LONG|SHORT|BYTE|SERIAL|BIGSERIAL|SMALLSERIAL)$",
    re.IGNORECASE,
)
_TEXT_TYPES = re.compile(
    r"^(VARCHAR(\(.*\))?|TEXT|STRING|CHAR(\(.*\))?|BPCHAR|CHARACTER VARYING(\(.*\))?|"
    r"BOOLEAN|BOOL|ENUM\(.*\)|UUID)$",
    re.IGNORECASE | re.DOTALL,
)
_BOOL_TYPES = re.compile(r"^(BOOLEAN|BOOL)$", re.IGNORECASE)


class Dialect:
    """Base dialect: rendering through sqlglot plus overridable translations."""

    name = "generic"
    sqlglot_name = ""

    def render(self, tree: exp.Expression) -> str:
        """Translate custom nodes, then render SQL text for this engine."""
        tree = tree.copy()
        # children before parents, so a translated node keeps translated arguments
        for node in reversed(list(tree.walk(bfs=False))):
            if isinstance(node, S.CUSTOM_NODES):
                new = self._translate(node)
                if node is tree:
                    tree = new
                else:
                    node.replace(new)
        for node in tree.walk():
            if isinstance(node, S.CUSTOM_NODES):
                raise UnsupportedError(
                    f"engine {self.name!r} has no translation for {type(node).__name__}"
                )
        # the tree is our own copy already: the generator need not copy it again
        return tree.sql(dialect=self.sqlglot_name, copy=False)

    def _translate(self, node: exp.Expression) -> exp.Expression:
        if isinstance(node, S.LogGamma):
            return self.log_gamma(node.this)
        if isinstance(node, S.IsFinite):
            return self.is_finite(node.this)
        if isinstance(node, S.PreciseSum):
            return self.precise_sum(node.this)
        if isinstance(node, S.LevelText):
            return self.level_text(node.this)
        if isinstance(node, S.RowPick):
            if node.share >= 1.0:
                return S.true()
            return self.row_pick(list(node.expressions), node.share)
        if isinstance(node, S.IEEE_NODES):
            return self.ieee(node)
        return node

    def ieee(self, node: exp.Expression) -> exp.Expression:
        """An ``Ieee*`` node (see :mod:`indb.sqlexpr`) as SQL that gives IEEE-754's NaN and
        infinities where this engine would raise or return NULL."""
        raise UnsupportedError(
            f"engine {self.name!r} has no IEEE-754 translation for {type(node).__name__}"
        )

    # -- translations (override per engine) --------------------------------------------------
    def log_gamma(self, x: exp.Expression) -> exp.Expression:
        raise UnsupportedError(f"engine {self.name!r} has no log-gamma function")

    def is_finite(self, x: exp.Expression) -> exp.Expression:
        raise UnsupportedError(f"engine {self.name!r} cannot test doubles for NaN/Inf")

    def precise_sum(self, x: exp.Expression) -> exp.Expression:
        return exp.Sum(this=x)

    def level_text(self, x: exp.Expression) -> exp.Expression:
        """A categorical value's level name: its cast to text (DuckDB's and Spark's text)."""
        return S.as_text(x)

    def quantile(self, x: exp.Expression, q: float) -> exp.Expression:
        raise UnsupportedError(f"engine {self.name!r} has no quantile aggregate")

    def quantiles(self, x: exp.Expression, qs: Sequence[float]) -> list[exp.Expression]:
        """The quantiles ``qs`` of ``x`` (linear interpolation, as :meth:`quantile`), one
        expression each. Exact quantiles hold every value of ``x``; engines whose
        quantile aggregates would each keep a copy override this to read all of them from one
        aggregate (PostgreSQL shares one sort among ordered-set aggregates over the same
        input, so the base form costs it one copy)."""
        return [self.quantile(x.copy(), q) for q in qs]

    def row_pick(self, values: list[exp.Expression], fraction: float) -> exp.Expression:
        """A condition TRUE on about ``fraction`` of the rows, from a hash of ``values``
        (deterministic: the same rows on every run)."""
        raise UnsupportedError(f"engine {self.name!r} cannot pick a hashed row sample")

    @property
    def can_sample(self) -> bool:
        """Whether this dialect implements :meth:`row_pick` (the sample start needs it)."""
        return type(self).row_pick is not Dialect.row_pick

    def file_scan(self, path: str) -> exp.Expression:
        raise UnsupportedError(f"engine {self.name!r} cannot read files directly: {path}")

    # -- how the engine evaluates a user's expression (read by indb.portable) ---------------
    #: ``/`` of two integers: "exact" (true division, a double) or "truncate" (toward zero)
    integer_slash = "exact"
    #: the integer-division operator (DuckDB ``//``, Spark ``DIV``, PostgreSQL ``div()``) with
    #: a non-integer operand: "exact" (plain division) or "truncate"
    int_div_fraction = "truncate"
    #: ln and log of x <= 0, and division by zero: "ieee" (NaN, +/-inf), "error" or "null"
    log_nonpositive = "ieee"
    zero_division = "ieee"

    # -- write-back ---------------------------------------------------------------------------
    supports_macros = False
    #: registry tables may declare PRIMARY KEY constraints (a second writer of the same
    #: version then fails instead of duplicating it)
    supports_primary_keys = True
    #: registry rows can be changed with UPDATE; without it the registry is append-only
    #: (:mod:`indb.registry_append`)
    supports_update = True
    #: storage clause of registry tables (``USING <format>``), for engines that need one
    table_format: str | None = None
    #: the engine treats quoted names that differ only in case as one object (DuckDB,
    #: Spark); PostgreSQL keeps "Mart" and "mart" apart
    names_ignore_case = True

    def replace_view(
        self, create: exp.Create, columns: Sequence[str], existing: Sequence[str] | None
    ) -> list[str]:
        """Statements that (re)define a scoring view from its ``CREATE OR REPLACE VIEW`` tree.

        ``columns`` are the new view's output columns and ``existing`` those of the view
        already there (None when there is none); engines whose ``OR REPLACE`` cannot change
        a view's columns use them to drop and recreate it instead.
        """
        return [self.render(create)]

    def create_macro(
        self, schema: str | None, name: str, params: list[str], body: exp.Expression
    ) -> str:
        """DDL for a reusable scalar scoring function (engines that have one)."""
        raise UnsupportedError(f"engine {self.name!r} has no scoring macros in indb yet")

    def drop_macro(self, schema: str | None, name: str) -> str:
        raise UnsupportedError(f"engine {self.name!r} has no scoring macros in indb yet")

    def existing_objects_query(self, schema: str | None, view: str, macro: str | None) -> exp.Query:
        """Catalog objects a deployment would replace: rows (kind, name) of the tables and
        views named ``view`` (and macros named ``macro``, where the engine has them) in
        ``schema`` (None: the current schema). Names compare without regard to case.

        Standard ``information_schema.tables``; an engine without it overrides this.
        """
        where = S.and_(
            S.eq(S.col("table_schema"), S.text(schema) if schema else exp.CurrentSchema()),
            S.eq(exp.Lower(this=S.col("table_name")), S.text(view.lower())),
        )
        return S.select(
            [S.alias(S.col("table_type"), "kind"), S.alias(S.col("table_name"), "name")],
            exp.Table(this=S.ident("tables"), db=S.ident("information_schema")),
            where=where,
        )

    def existing_objects_sql(self, schema: str | None, view: str, macro: str | None) -> str:
        """The catalog lookup of :meth:`existing_objects_query`, as text to run."""
        return self.render(self.existing_objects_query(schema, view, macro))

    def existing_objects(
        self, cols: dict[str, Any], view: str, macro: str | None
    ) -> list[tuple[str, str]]:
        """(kind, name) pairs from the result of :meth:`existing_objects_sql`."""
        return [(str(k), str(n)) for k, n in zip(cols["kind"], cols["name"], strict=True)]

    @property
    def can_materialize(self) -> bool:
        """Whether this engine's dialect implements :meth:`materialize`."""
        return type(self).materialize is not Dialect.materialize

    def materialize(self, name: str, query: exp.Expression) -> list[str]:
        """Statements that store ``query`` as a session-private table ``name``."""
        raise UnsupportedError(f"engine {self.name!r} cannot hold a temporary table in indb yet")

    def drop_materialized(self, name: str) -> str:
        return f"DROP TABLE IF EXISTS {self.quote(name)}"

    def quote(self, name: str) -> str:
        """A quoted identifier as text (through the renderer, never by hand)."""
        return S.ident(name).sql(dialect=self.sqlglot_name)

    # -- types ----------------------------------------------------------------------------
    def type_kind(self, type_name: str) -> str:
        """Classify an engine type name as 'numeric', 'boolean', 'text' or 'other'."""
        t = type_name.strip()
        if _BOOL_TYPES.match(t):
            return "boolean"
        if _NUMERIC_TYPES.match(t):
            return "numeric"
        if _TEXT_TYPES.match(t):
            return "text"
        return "other"

    def is_integer_type(self, type_name: str) -> bool:
        """Whether an engine type name is a whole-number type."""
        return bool(_INTEGER_TYPES.match(type_name.strip()))

    # -- relations -------------------------------------------------------------------------
    def table(self, name: str) -> exp.Expression:
        """A table reference from a user-given (possibly dotted, possibly quoted) name."""
        parts = _split_qualified(name)
        if not parts or len(parts) > 3:
            raise SpecError(f"cannot read {name!r} as a table name (use catalog.schema.table)")
        ids = [S.ident(p) for p in parts]
        kwargs: dict[str, exp.Expression] = {"this": ids[-1]}
        if len(ids) >= 2:
            kwargs["db"] = ids[-2]
        if len(ids) == 3:
            kwargs["catalog"] = ids[-3]
        return exp.Table(**kwargs)

    def relation(self, source: Any) -> exp.Expression:
        """The FROM item for a :class:`indb.spec.Source` (table, file path or query)."""
        if source.kind == "table":
            return self.table(source.text)
        if source.kind == "file":
            return self.file_scan(source.text)
        return self.query(source.text)

    def query(self, sql: str) -> exp.Expression:
        """Parse a user's SELECT query in this dialect (it runs as written)."""
        import sqlglot
        from sqlglot.errors import SqlglotError, TokenError

        try:
            tree = sqlglot.parse_one(sql, read=self.sqlglot_name)
        except SqlglotError as err:  # ParseError, and TokenError for an unterminated quote
            first = str(err).splitlines()[0]
            if isinstance(err, TokenError):
                first += " (is a quote left unclosed?)"
            shown = sql if len(sql) <= 200 else sql[:200] + "..."
            raise SpecError(
                f"cannot parse the source query {shown!r} for {self.name}: {first}; "
                "fix the query, or create a view with it and pass the view name instead"
            ) from None
        if not isinstance(tree, exp.Query):
            raise SpecError("the source query must be a single SELECT (or WITH ... SELECT)")
        return exp.Subquery(this=tree)

    def query_text(self, tree: exp.Expression) -> str:
        """A user's query as text again, after indb changed its table names.

        Rendered by sqlglot alone: indb's own translations (such as PostgreSQL's casts of
        float literals) are for the SQL indb generates, not for what the user wrote.
        """
        return tree.sql(dialect=self.sqlglot_name)

    # -- engine catalog objects ----------------------------------------------------------------
    def reserved_objects_query(self, view: str, macro: str | None) -> exp.Query | None:
        """Built-in objects of the engine (rows: ``name``) that a scoring view named ``view``
        or a macro named ``macro`` would hide or be hidden by; None when the engine has none
        in the schemas names are looked up in."""
        return None


def table_references(query: exp.Expression) -> list[exp.Table]:
    """The named tables and views a query reads: not its CTEs, derived tables or table
    functions (``read_parquet(...)``, ``range(...)``), each node once."""
    from sqlglot.optimizer.scope import traverse_scope

    seen: dict[int, exp.Table] = {}
    for scope in traverse_scope(query):
        for source in scope.sources.values():
            # a CTE or derived table is a Scope here; a table function has no identifier
            if isinstance(source, exp.Table) and isinstance(source.this, exp.Identifier):
                seen.setdefault(id(source), source)
    return list(seen.values())


def table_parts(table: exp.Table) -> list[str]:
    """[catalog, schema, name] of a table reference, without the parts it leaves out."""
    return [p for p in (table.catalog, table.db, table.name) if p]


def set_table_parts(table: exp.Table, parts: Sequence[str]) -> None:
    """Point a table reference at ``parts`` (1 to 3 names), keeping its alias."""
    ids = [S.ident(p) for p in parts]
    table.set("this", ids[-1])
    table.set("db", ids[-2] if len(ids) >= 2 else None)
    table.set("catalog", ids[-3] if len(ids) == 3 else None)


_PLAIN_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def qualified_name(parts: Sequence[str]) -> str:
    """Dotted text of a table name that :func:`split_qualified` reads back into ``parts``:
    a part that is not a plain identifier is written in double quotes (``""`` for ``"``)."""
    return ".".join(
        p if _PLAIN_NAME.fullmatch(p) else '"' + p.replace('"', '""') + '"' for p in parts
    )


def split_qualified(name: str) -> list[str]:
    """The parts of a dotted, possibly double-quoted table name (see :meth:`Dialect.table`)."""
    return _split_qualified(name)


def _split_qualified(name: str) -> list[str]:
    """Split ``a.b."c d"`` into parts, honouring double quotes ("" escapes a quote)."""
    parts: list[str] = []
    buf: list[str] = []
    i, n = 0, len(name)
    quoted_part = False
    while i < n:
        ch = name[i]
        if ch == '"':
            quoted_part = True
            i += 1
            while i < n:
                if name[i] == '"':
                    if i + 1 < n and name[i + 1] == '"':
                        buf.append('"')
                        i += 2
                        continue
                    break
                buf.append(name[i])
                i += 1
            else:
                raise SpecError(f"unbalanced double quote in name {name!r}")
            i += 1
            continue
        if ch == ".":
            parts.append("".join(buf) if quoted_part else "".join(buf).strip())
            buf, quoted_part = [], False
            i += 1
            continue
        buf.append(ch)
        i += 1
    parts.append("".join(buf) if quoted_part else "".join(buf).strip())
    if any(p == "" for p in parts):
        raise SpecError(f"empty part in name {name!r}")
    return parts
