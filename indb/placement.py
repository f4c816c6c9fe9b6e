"""Where a model's scoring view and macro live, and the statements that put them there.

A mixin of :class:`indb.registry.Registry`: the registry records versions; this part decides
the objects a deployment writes (names resolved as the engine resolves them, a move to
another schema dropping the old objects, never replacing an object indb did not create).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlglot import exp

from indb import diagnostics as DG
from indb import sqlexpr as S
from indb import writeback as W
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine, qualify_source, relative_source
from indb.errors import EngineError, RegistryError, SpecError
from indb.results import FitResult
from indb.spec import Source


class ViewPlacement:
    """Placement of the scoring view and macro (mixed into the registry classes)."""

    engine: Engine
    d: Dialect

    def exists(self) -> bool:  # provided by the registry
        raise NotImplementedError

    def models(self) -> list[dict[str, Any]]:  # provided by the registry
        raise NotImplementedError

    def _columns_of(self, relation: Any) -> list[str] | None:  # provided by the registry
        raise NotImplementedError

    def check_model_name(self, name: str) -> str:  # provided by the registry
        raise NotImplementedError

    def _current_or_twin(self, name: str) -> dict[str, Any] | None:  # provided by the registry
        raise NotImplementedError

    def _source_types(self, model: dict[str, Any]) -> dict[str, str] | None:  # by the registry
        raise NotImplementedError

    def check_before_fit(
        self,
        name: str,
        *,
        view_schema: str | None = None,
        promote: bool | None = True,
        inputs: Sequence[str] = (),
        score_source: str | None = None,
        diagnostics: bool | None = None,
    ) -> None:
        """The checks of :meth:`save` that need no fitted result, run before a fit's first
        scan so that a name it cannot take costs no scans: names of the engine's own
        objects, a name differing only in case from a model's, and (for a version to be made
        live) a view or macro of that name which indb did not create for this model, and
        a scoring source without the model's ``inputs`` when the version is sure to go live."""
        self.check_model_name(name)
        if view_schema is not None:
            W.check_name(view_schema, "view schema")
        current = self._current_or_twin(name)
        if promote is False:  # None may promote: checked as if it will
            return
        live = current is not None and current.get("live_version") is not None
        if inputs and (promote or not live):
            self._check_scoring_inputs(current, inputs, score_source)
        target = {"view_schema": view_schema, "view_name": name, "macro_name": f"{name}_score"}
        if current is not None:
            target = {
                "view_schema": current["view_schema"] if view_schema is None else view_schema,
                "view_name": current["view_name"],
                "macro_name": current["macro_name"],
            }
        keep = current is not None and diagnostics is None
        target["diagnostics"] = bool(current.get("diagnostics")) if keep else bool(diagnostics)
        self._check_not_foreign(name, target, current)

    def _check_scoring_inputs(
        self, current: dict[str, Any] | None, inputs: Sequence[str], score_source: str | None
    ) -> None:
        """Refuse, before any scan, a scoring source that lacks columns the model reads
        (the view would otherwise fail to build after the whole fit)."""
        row = {"score_source": score_source} if score_source else current
        if row is None or not row.get("score_source"):
            return  # a new model scores its own source
        types = self._source_types(row)
        if types is None:
            return  # unreadable: the write-back's own check says why
        missing = [c for c in inputs if c not in types]
        if missing:
            raise SpecError(
                f"the scoring source {Source.parse(row['score_source']).label()!r} lacks "
                f"model input column(s) {missing}; give a scoring source that has them "
                "(score_source=, CLI --score-source) or leave them out of the model "
                "(exclude=, --exclude); checked before the fit, nothing was read or written"
            )

    def scoring_source_for(self, model_row: dict[str, Any], dialect: Dialect) -> str | None:
        """The model's scoring source as SQL for ``dialect`` should name it: as stored for
        this engine's own dialect; for another engine, without this engine's current
        catalog and schema (names that mean nothing there)."""
        text = model_row.get("score_source")
        if not text or dialect.name == self.d.name:
            return text
        return relative_source(self.engine, Source.parse(text)).text

    def _view_label(self, model_row: dict[str, Any]) -> str:
        schema = model_row.get("view_schema")
        return f"{schema}.{model_row['view_name']}" if schema else model_row["view_name"]

    def _macro_label(self, model_row: dict[str, Any]) -> str:
        schema = model_row.get("view_schema")
        return f"{schema}.{model_row['macro_name']}" if schema else model_row["macro_name"]

    def _qualified_source(self, text: str) -> str:
        """A scoring source's text with its tables named as the engine resolves them now."""
        return qualify_source(self.engine, Source.parse(text)).text

    def _schema_key(self, schema: str | None) -> str:
        """The schema a view_schema setting puts objects in (None: the current schema),
        spelled as the engine compares names."""
        name = schema if schema is not None else self.engine.current_location()[1]
        return name.lower() if self.d.names_ignore_case else name

    def _same_place(self, a: dict[str, Any], b: dict[str, Any]) -> bool:
        """Whether two model rows put the scoring view and macro on the same objects."""

        def names(row: dict[str, Any]) -> tuple[str, ...]:
            out = (row["view_name"], row.get("macro_name") or "")
            return tuple(n.lower() for n in out) if self.d.names_ignore_case else out

        if names(a) != names(b):
            return False
        if a.get("view_schema") == b.get("view_schema"):
            return True
        return self._schema_key(a.get("view_schema")) == self._schema_key(b.get("view_schema"))

    def _live_elsewhere(self, live: dict[str, Any] | None, target: dict[str, Any]) -> bool:
        """Whether ``live`` (a model row) has a live view and macro that ``target`` would
        place elsewhere."""
        return (
            live is not None
            and live.get("live_version") is not None
            and not self._same_place(live, target)
        )

    def _live_model_row(self, name: str) -> dict[str, Any] | None:
        if not self.exists():
            return None
        return next((m for m in self.models() if m["model_name"] == name), None)

    def _check_not_foreign(
        self, name: str, model_row: dict[str, Any], current: dict[str, Any] | None
    ) -> None:
        """Refuse to replace a view, table or macro that indb did not deploy for ``name``.

        The deployment writes CREATE OR REPLACE; the objects are this model's own only when
        its live version was deployed to the same schema and names.
        """
        schema, view = model_row.get("view_schema"), model_row["view_name"]
        macros: list[str | None] = [None]
        if self.d.supports_macros:
            macros = [model_row["macro_name"], W.unseen_macro_name(model_row["macro_name"])]
        ours = (
            current is not None
            and current.get("live_version") is not None
            and self._same_place(current, model_row)
        )
        checks = [] if ours else [(view, macro) for macro in macros]
        if model_row.get("diagnostics") and not (ours and current and current.get("diagnostics")):
            # the diagnostics view is this model's own only where its live version has one
            checks.append((DG.view_name(view), None))
        found: list[tuple[str, str]] = []
        for object_name, macro in checks:
            for obj in self._existing(schema, object_name, macro):
                if obj not in found:
                    found.append(obj)
        if found:
            where = f"schema {schema!r}" if schema else "the default schema"
            objects = ", ".join(f"{kind.lower()} {obj!r}" for kind, obj in found)
            raise RegistryError(
                f"model {name!r} would replace {objects} in {where}, which indb did not "
                "create for this model; choose another model name (or view_schema), or "
                "drop that object first; nothing was written"
            )

    def _existing(self, schema: str | None, view: str, macro: str | None) -> list[tuple[str, str]]:
        """(kind, name) of the catalog objects named ``view`` (or ``macro``) in ``schema``."""
        try:
            cols = self.engine.fetch_columns(self.d.existing_objects_sql(schema, view, macro))
        except EngineError:
            if schema is None:
                raise
            # a schema that does not exist yet holds nothing to replace (Spark's SHOW
            # TABLES IN a missing schema fails; information_schema just has no rows)
            return []
        return self.d.existing_objects(cols, view, macro) if cols else []

    def _deploy_statements(
        self, name: str, result: FitResult, model_row: dict[str, Any]
    ) -> list[str]:
        src_text = model_row.get("score_source")
        if not src_text:
            raise SpecError(f"model {name!r} has no scoring source; give score_source=")
        source = Source.parse(src_text)
        rel = self.d.relation(source)
        try:
            described = self.engine.describe(self.d.render(S.select([star()], aliased(rel))))
        except EngineError as err:
            # a missing table, file or column is the user's input, as for the fit's source
            raise SpecError(
                f"cannot read the scoring source {source.label()!r} (option score_source): "
                f"{err}; check the table name, file path or query, or give another "
                "score_source="
            ) from err
        cols = [c for c, _ in described]
        missing = [c for c in W.model_inputs(result, self.d) if c not in cols]
        if missing:
            raise SpecError(
                f"the scoring source {source.label()!r} lacks model input column(s) {missing}"
            )
        query = W.scoring_query(
            result, self.d, rel, intervals=bool(model_row.get("intervals")), source_columns=cols
        )
        stmts = []
        live = self._live_model_row(name)
        if self._live_elsewhere(live, model_row):
            # the view and macro move: the old ones would go on serving a retired version,
            # unknown to the registry. Dropped first, in the same transaction; on Spark
            # (no transactions) a failure after this leaves no stale view, and promoting
            # again with the new view_schema completes the move.
            stmts += self._drop_statements(live)
        if model_row.get("view_schema"):
            stmts.append(self.d.render(_create_schema(model_row["view_schema"])))
        view = W.create_view(model_row.get("view_schema"), model_row["view_name"], query)
        names = W.ScoreColumns()
        out_cols = [*cols, names.eta, names.mean]
        if model_row.get("intervals"):
            out_cols += [names.se, names.low, names.high]
        out_cols.append(names.unseen)
        stmts += self.d.replace_view(view, out_cols, self._columns_of(view.this))
        if self.d.supports_macros:
            params = W.model_inputs(result, self.d)
            stmts.append(
                self.d.create_macro(
                    model_row.get("view_schema"),
                    model_row["macro_name"],
                    params,
                    W.mean_expression(result, self.d),
                )
            )
            # its companion counts what the view's score_unseen counts, which a scalar
            # macro returning the mean cannot carry
            stmts.append(
                self.d.create_macro(
                    model_row.get("view_schema"),
                    W.unseen_macro_name(model_row["macro_name"]),
                    params,
                    W.unseen_expression(result, self.d),
                )
            )
        return stmts + self._diagnostics_statements(name, result, model_row, live)

    def _diagnostics_statements(
        self,
        name: str,
        result: FitResult,
        model_row: dict[str, Any],
        live: dict[str, Any] | None,
    ) -> list[str]:
        """(Re)create the view ``NAME_diagnostics`` over the training source, or drop the
        one this model had when a deployment switches it off."""
        schema = model_row.get("view_schema")
        view = DG.view_name(model_row["view_name"])
        if not model_row.get("diagnostics"):
            had = live is not None and live.get("live_version") is not None
            if had and live.get("diagnostics") and self._same_place(live, model_row):
                return [self.d.render(W.drop_view(schema, view))]
            return []  # (a move dropped it with the other objects at the old place)
        source = Source.parse(result.spec["source"]["text"])
        rel = self.d.relation(source)
        try:
            described = self.engine.describe(self.d.render(S.select([star()], aliased(rel))))
        except EngineError as err:
            raise SpecError(
                f"cannot read the training source {source.label()!r} of model {name!r} for "
                f"its diagnostics view: {err}; deploy without diagnostics, or make the "
                "source readable again"
            ) from err
        cols = [c for c, _ in described]
        query = DG.diagnostics_query(result, self.d, rel, cols, model=name)
        create = W.create_view(schema, view, query)
        return self.d.replace_view(create, [*cols, *DG.COLUMNS], self._columns_of(create.this))

    def _drop_statements(self, model_row: dict[str, Any]) -> list[str]:
        """DROP the scoring view and macro a model row names."""
        schema = model_row.get("view_schema")
        stmts = [self.d.render(W.drop_view(schema, model_row["view_name"]))]
        if self.d.supports_macros and model_row.get("macro_name"):
            stmts.append(self.d.drop_macro(schema, model_row["macro_name"]))
            stmts.append(self.d.drop_macro(schema, W.unseen_macro_name(model_row["macro_name"])))
        if model_row.get("diagnostics"):
            view = DG.view_name(model_row["view_name"])
            stmts.append(self.d.render(W.drop_view(schema, view)))
        return stmts

    def diagnostics_label(self, model_row: dict[str, Any]) -> str | None:
        """Where the model's diagnostics view is (None when it has none)."""
        if not model_row.get("diagnostics"):
            return None
        schema = model_row.get("view_schema")
        view = DG.view_name(model_row["view_name"])
        return f"{schema}.{view}" if schema else view


def star() -> exp.Star:
    """``*`` in a select list."""
    return exp.Star()


def aliased(rel: exp.Expression) -> exp.Expression:
    """A copy of relation ``rel`` under the writeback module's source alias."""
    r = rel.copy()
    r.set("alias", exp.TableAlias(this=S.ident(W.SRC)))
    return r


def _create_schema(schema: str) -> exp.Create:
    return exp.Create(kind="SCHEMA", this=exp.Table(db=S.ident(schema)), exists=True)


#: the deployment settings that are switches (compared as booleans; None in a row: off)
SWITCHES = ("intervals", "diagnostics")


def deployment_changes(
    current: dict[str, Any],
    view_schema: str | None,
    score_source: str | None,
    intervals: Any,
    diagnostics: Any = None,
) -> list[str]:
    """The deployment settings a save asks to change on a model (None keeps the current)."""
    asked = {
        "view_schema": view_schema,
        "score_source": score_source,
        "intervals": intervals,
        "diagnostics": diagnostics,
    }
    return [
        key
        for key, value in asked.items()
        if value is not None
        and (
            bool(value) != bool(current.get(key)) if key in SWITCHES else value != current.get(key)
        )
    ]


def model_updates(row: dict[str, Any]) -> dict[str, Any]:
    """The columns of a model row that a deployment sets (where and how it is served)."""
    keys = ("live_version", "view_schema", "view_name", "macro_name", "score_source")
    # a row of a registry written before a switch existed has no column for it: off
    return {**{k: row[k] for k in keys}, **{k: bool(row.get(k)) for k in SWITCHES}}
