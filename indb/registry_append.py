"""The registry on engines without UPDATE or transactions (Spark's file tables).

The tables people query keep the layout they have on DuckDB and PostgreSQL, but
``model`` and ``model_version`` are views over append-only tables:

* ``model_record``: one row per change of a model's deployment settings (``recorded_at``);
  the ``model`` view shows the latest row of each model.
* ``version_record``: one row per fitted version, written once.
* ``registry_event`` (as everywhere): fit, promote and drop events. A version's status and
  the model's live version are derived from them: the live version is the one promoted
  last; a version ever promoted and no longer live is retired; a dropped one is dropped;
  any other is held.

Nothing is ever updated or deleted, so every statement is one append (one Spark job commit)
or one catalog change, each atomic on its own. Without transactions across statements the
write order gives the guarantee:

1. a version's coefficients and iteration log are written before its ``version_record``
   row, and that row before the model's first ``model_record`` row, so a failure leaves
   either no visible version or a complete one;
2. a promotion replaces the scoring view first and appends the ``promote`` event last (the
   commit point): a failure before the event leaves the registry as it was and the new
   version held; a failure *between* the view and the event (the process dies in between)
   leaves the view scoring the new version while the registry still names the old one
   live -- running ``promote`` again repairs that;
3. there are no constraints, so two writers saving the same model at the same moment can
   both take the same version number; run one writer per model.

:func:`open_registry` picks the registry class an engine needs (this one where the dialect
has no UPDATE); it lives here because this module is the one that knows both classes.
"""

from __future__ import annotations

from typing import Any

from sqlglot import exp

from indb import sqlexpr as S
from indb import writeback as W
from indb.engines.base_engine import Engine
from indb.errors import EngineError, RegistryError
from indb.registry import DEFAULT_SCHEMA, Registry, _now

MODEL_RECORD = "model_record"
VERSION_RECORD = "version_record"
MODEL_RECORD_COLUMNS = [*W.REGISTRY_TABLES["model"], ("recorded_at", "TIMESTAMP")]
_RECORDS = {
    "model": (MODEL_RECORD, MODEL_RECORD_COLUMNS),
    "model_version": (VERSION_RECORD, W.REGISTRY_TABLES["model_version"]),
}
_RANK = "indb_rank"


def _latest(table: exp.Table, order: str, where: exp.Expression | None = None) -> exp.Select:
    """Rows of ``table`` ranked newest first per model (``indb_rank`` = 1 is the newest)."""
    rank = exp.Window(
        this=exp.RowNumber(),
        partition_by=[S.col("model_name")],
        order=exp.Order(expressions=[exp.Ordered(this=S.col(order), desc=True)]),
    )
    return S.select([exp.Star(), S.alias(rank, _RANK)], table, where=where)


def _event_kind(action: str) -> exp.Expression:
    return S.eq(S.col("action"), S.text(action))


def model_view_query(schema: str) -> exp.Select:
    """``model``: each model's latest record, with the version promoted last as live."""
    cols: list[exp.Expression] = []
    for c, _ in W.REGISTRY_TABLES["model"]:
        if c == "live_version":
            cols.append(S.alias(S.col("version", "p"), c))
        else:
            cols.append(S.alias(S.col(c, "r"), c))
    promotes = _latest(W.table_ref(schema, "registry_event"), "at", _event_kind("promote"))
    q = S.select(cols, S.subquery(_latest(W.table_ref(schema, MODEL_RECORD), "recorded_at"), "r"))
    on = S.and_(
        S.eq(S.col("model_name", "p"), S.col("model_name", "r")),
        S.eq(S.col(_RANK, "p"), S.integer(1)),
    )
    q = q.join(S.subquery(promotes, "p"), on=on, join_type="left", copy=False)
    return q.where(S.eq(S.col(_RANK, "r"), S.integer(1)), copy=False)


def _versions_with(schema: str, action: str, alias: str) -> exp.Subquery:
    q = S.select(
        [S.col("model_name"), S.col("version")],
        W.table_ref(schema, "registry_event"),
        where=_event_kind(action),
    )
    q.set("distinct", exp.Distinct())
    return S.subquery(q, alias)


def version_view_query(schema: str) -> exp.Select:
    """``model_version``: every recorded version with its status derived from the events."""
    status = S.case(
        [
            (
                exp.Not(this=exp.Is(this=S.col("version", "d"), expression=exp.Null())),
                S.text("dropped"),
            ),
            (S.eq(S.col("version", "v"), S.col("live_version", "m")), S.text("live")),
            (
                exp.Not(this=exp.Is(this=S.col("version", "e"), expression=exp.Null())),
                S.text("retired"),
            ),
        ],
        S.text("held"),
    )
    cols = [
        S.alias(status, c) if c == "status" else S.alias(S.col(c, "v"), c)
        for c, _ in W.REGISTRY_TABLES["model_version"]
    ]
    v = W.table_ref(schema, VERSION_RECORD)
    v.set("alias", exp.TableAlias(this=S.ident("v")))
    m = W.table_ref(schema, "model")
    m.set("alias", exp.TableAlias(this=S.ident("m")))
    q = S.select(cols, v)
    q = q.join(
        m, on=S.eq(S.col("model_name", "m"), S.col("model_name", "v")), join_type="left", copy=False
    )
    for alias, action in (("d", "drop"), ("e", "promote")):
        on = S.and_(
            S.eq(S.col("model_name", alias), S.col("model_name", "v")),
            S.eq(S.col("version", alias), S.col("version", "v")),
        )
        q = q.join(_versions_with(schema, action, alias), on=on, join_type="left", copy=False)
    return q


def append_registry_ddl(schema: str, dialect: Any) -> list[exp.Expression]:
    """Schema, append-only tables and the ``model`` / ``model_version`` views."""
    out: list[exp.Expression] = [
        exp.Create(kind="SCHEMA", this=exp.Table(db=S.ident(schema)), exists=True)
    ]
    tables = {
        MODEL_RECORD: MODEL_RECORD_COLUMNS,
        VERSION_RECORD: W.REGISTRY_TABLES["model_version"],
        **{t: W.REGISTRY_TABLES[t] for t in ("version_term", "version_iteration")},
        "registry_event": W.REGISTRY_TABLES["registry_event"],
        "version_assessment": W.REGISTRY_TABLES["version_assessment"],
    }
    for table, cols in tables.items():
        out.append(W.create_table(schema, table, cols, None, dialect))
    for name, query in (
        ("model", model_view_query(schema)),
        ("model_version", version_view_query(schema)),
    ):
        out.append(W.create_view(schema, name, query))
    return out


class AppendOnlyRegistry(Registry):
    """:class:`~indb.registry.Registry` that only appends rows (see the module notes)."""

    def ensure(self) -> None:
        try:
            for stmt in append_registry_ddl(self.schema, self.d):
                self._run(stmt)
        except EngineError as err:
            if "LOCATION_ALREADY_EXISTS" in str(err):
                raise RegistryError(
                    f"the warehouse folder already holds files of a registry table in schema "
                    f"{self.schema!r} that the catalog does not know (written by an earlier "
                    "Spark application whose catalog was kept in memory); run Spark with a "
                    "persistent catalog (spark.sql.catalogImplementation=hive) to keep the "
                    f"registry across applications, or move that folder away: {err}"
                ) from err
            raise
        self._upgrade_earlier_layout()

    def _upgrade_earlier_layout(self) -> None:
        # Spark's file tables cannot rename a column in place, so say how to move on; an
        # added column is appended to the record table and the view over it made again.
        for table, added in W.ADDED_REGISTRY_COLUMNS.items():
            target = _RECORDS.get(table, (table, None))[0]
            columns = Registry._columns_of(self, W.table_ref(self.schema, target)) or []
            missing = [(c, kind) for c, kind in added if columns and c not in columns]
            for column, kind in missing:
                self._run(W.add_column(self.schema, target, column, kind))
            if missing and table == "model":
                self._run(W.create_view(self.schema, "model", model_view_query(self.schema)))
        for table, renames in W.RENAMED_REGISTRY_COLUMNS.items():
            target = _RECORDS.get(table, (table, None))[0]
            columns = Registry._columns_of(self, W.table_ref(self.schema, target)) or []
            stale = [old for old in renames if old in columns]
            if stale:
                raise RegistryError(
                    f"registry table {self.schema}.{target} was written by indb 0.1 and has "
                    f"columns {stale} that are now named "
                    f"{[renames[old] for old in stale]}; Spark cannot rename columns of "
                    "parquet tables, so keep using indb 0.1 for this registry or start a new "
                    "one with --registry-schema"
                )

    def exists(self) -> bool:
        # catalog listings instead of a failing probe query (pyspark logs every failed query)
        schemas = {str(r[0]).lower() for r in self.engine.execute("SHOW SCHEMAS")}
        if self.schema.lower() not in schemas:
            return False
        listing = f"SHOW VIEWS IN {self.d.quote(self.schema)}"
        return "model" in {str(r[1]).lower() for r in self.engine.execute(listing)}

    def _insert(self, table: str, rows: list[dict[str, Any]]) -> None:
        target, columns = _RECORDS.get(table, (table, None))
        if table == "model":
            rows = [{**r, "recorded_at": _now()} for r in rows]
        self._run(W.insert_rows(self.schema, target, rows, columns))

    def _set_status(self, name: str, version: int | None, status: str) -> None:
        # statuses are derived from the promote and drop events the caller appends next
        return None

    def _update_model(self, name: str, row: dict[str, Any]) -> None:
        # live_version in a record is informational: the view takes it from the events
        self._insert("model", [row])

    def _columns_of(self, relation: Any) -> list[str] | None:
        return None  # Spark replaces a view whatever its columns were

    def _make_live(
        self, name: str, version: int, model_row: dict[str, Any], deploy: list[str], now: str
    ) -> None:
        try:
            super()._make_live(name, version, model_row, deploy, now)
        except EngineError as err:
            raise RegistryError(
                f"version {version} of {name!r} is recorded but was not made live (Spark has "
                f"no transactions; the registry still names the previous version live): "
                f"{err}; fix the cause and run promote"
            ) from err


def open_registry(engine: Engine, schema: str = DEFAULT_SCHEMA) -> Registry:
    """Registry operations on ``engine`` (schema ``indb_registry`` unless told otherwise).

    On an engine without UPDATE (Spark's file tables) this is an
    :class:`AppendOnlyRegistry`, which keeps the same tables readable but only ever appends
    rows.
    """
    cls = Registry if engine.dialect.supports_update else AppendOnlyRegistry
    return cls(engine, schema)
