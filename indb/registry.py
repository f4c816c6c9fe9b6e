"""The model registry inside the database, and deployment of scoring views and macros.

Every change (a new version, a promotion, a drop) runs in one transaction together with the
view and macro it implies, so a failure or an interrupted process leaves the registry and
the views exactly as they were.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from indb import diagnostics as DG
from indb import sqlexpr as S
from indb import writeback as W
from indb.assessment_log import AssessmentLog
from indb.comparison import NestedTest, nested_test, parse_reference, version_changes
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine
from indb.errors import DeploymentWarning, EngineError, RegistryError, SpecError, UnsupportedError
from indb.placement import ViewPlacement, aliased, deployment_changes, model_updates, star
from indb.promotion import jsonable as _jsonable
from indb.promotion import promote_by_default, signature_changes
from indb.results import FitResult
from indb.spec import Source
from indb.version import __version__

DEFAULT_SCHEMA = "indb_registry"


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M:%S.%f")


def spec_hash(spec: dict[str, Any]) -> str:
    """Stable hash of a spec's plain-data form (what was asked, not what was estimated)."""
    keep = {k: v for k, v in spec.items() if k not in ("family_params",)}
    if spec.get("estimate_theta"):
        keep["family_params"] = {}
    else:
        keep["family_params"] = spec.get("family_params", {})
    text = json.dumps(keep, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


@dataclass(frozen=True)
class SaveOutcome:
    """What :meth:`Registry.save` did."""

    model: str
    version: int
    created: bool  # False when an identical live version was kept
    promoted: bool
    scoring_view: str
    mean_column: str
    macro: str | None
    #: deployment settings that were not applied, and why (also issued as warnings)
    warnings: tuple[str, ...] = ()
    #: the view of residuals and influence (``--diagnostics``), where it is
    diagnostics_view: str | None = None


class Registry(ViewPlacement, AssessmentLog):
    """Registry operations on one engine (schema ``indb_registry`` unless told otherwise).

    Open one with :func:`indb.registry_append.open_registry`, which gives an engine without
    UPDATE (Spark's file tables) the append-only subclass.
    """

    def __init__(self, engine: Engine, schema: str = DEFAULT_SCHEMA) -> None:
        self.engine = engine
        self.schema = W.check_name(schema, "registry schema")
        self.d = engine.dialect

    # -- low level -------------------------------------------------------------------------
    def _run(self, tree) -> None:
        self.engine.execute(self.d.render(tree))

    def _rows(self, tree) -> list[dict[str, Any]]:
        cols = self.engine.fetch_columns(self.d.render(tree))
        names = list(cols)
        n = len(cols[names[0]]) if names else 0
        return [{k: _py(cols[k][i]) for k in names} for i in range(n)]

    def exists(self) -> bool:
        try:
            self._rows(S.select([S.alias(S.count_star(), "n")], W.table_ref(self.schema, "model")))
            return True
        except EngineError:
            return False

    def ensure(self) -> None:
        """Create the registry schema and tables if missing."""
        for stmt in W.registry_ddl(self.schema, self.d):
            self._run(stmt)
        self._upgrade_earlier_layout()

    def _upgrade_earlier_layout(self) -> None:
        """Give a registry written by an earlier indb today's columns: renamed (0.1) and
        added ones (one ALTER each)."""
        for table, renames in W.RENAMED_REGISTRY_COLUMNS.items():
            columns = self._columns_of(W.table_ref(self.schema, table)) or []
            for old, new in renames.items():
                if old in columns and new not in columns:
                    self._run(W.rename_column(self.schema, table, old, new))
        for table, added in W.ADDED_REGISTRY_COLUMNS.items():
            columns = self._columns_of(W.table_ref(self.schema, table)) or []
            for column, kind in added:
                if columns and column not in columns:
                    self._run(W.add_column(self.schema, table, column, kind))

    # -- reading ---------------------------------------------------------------------------
    def models(self) -> list[dict[str, Any]]:
        if not self.exists():
            return []
        return self._rows(W.select_rows(self.schema, "model", order=["model_name"]))

    def model(self, name: str) -> dict[str, Any]:
        rows = (
            self._rows(W.select_rows(self.schema, "model", W.where_model(name)))
            if self.exists()
            else []
        )
        if not rows:
            known = [m["model_name"] for m in self.models()]
            raise RegistryError(f"no model named {name!r} in the registry; models: {known}")
        return rows[0]

    def versions(self, name: str) -> list[dict[str, Any]]:
        self.model(name)
        rows = self._rows(
            W.select_rows(self.schema, "model_version", W.where_model(name), order=["version"])
        )
        for r in rows:
            for big in ("result_json", "spec_json", "fingerprint_json"):
                r.pop(big, None)
        return rows

    def _version_row(self, name: str, version: int | None) -> dict[str, Any]:
        if version is None:
            version = self.model(name)["live_version"]
            if version is None:
                raise RegistryError(f"model {name!r} has no live version")
        rows = self._rows(
            W.select_rows(self.schema, "model_version", W.where_model(name, int(version)))
        )
        if not rows:
            raise RegistryError(f"model {name!r} has no version {version}")
        return rows[0]

    def load(self, name: str, version: int | None = None) -> FitResult:
        """The stored result of one version (the live one by default)."""
        return self._result(self._version_row(name, version))

    def _result(self, row: dict[str, Any]) -> FitResult:
        """A version row's result. Versions stored before results recorded the dialect of
        their expressions were fitted on this engine (``fit(name=...)`` writes where it
        fits), so their offset is read in this engine's dialect."""
        result = FitResult.from_dict(json.loads(row["result_json"]))
        if result.spec.get("sql_dialect"):
            return result
        return dataclasses.replace(result, spec=self._spec_with_dialect(result.spec))

    def _spec_with_dialect(self, spec: dict[str, Any]) -> dict[str, Any]:
        return spec if spec.get("sql_dialect") else {**spec, "sql_dialect": self.d.name}

    def scoring_sql(
        self,
        name: str,
        target: Dialect,
        *,
        version: int | None = None,
        source: str | None = None,
        intervals: bool | None = None,
        view_schema: str | None = None,
        view_name: str | None = None,
    ) -> str:
        """CREATE VIEW text (no trailing semicolon) that scores with a stored version on the
        engine of ``target``.

        The offset is read in the dialect it was written in and carried over with its
        meaning (:mod:`indb.portable`). ``source`` (a table, file or query written for
        ``target``) defaults to the model's scoring source; a stored query is only reused on
        the engine it was written for.
        """
        model = self.model(name)
        result = self.load(name, version)
        if not result.design.get("column_types"):
            # a version stored before fits recorded the types: describe the source here
            result = dataclasses.replace(
                result, design={**result.design, "column_types": self._source_types(model)}
            )
        text = source or self.scoring_source_for(model, target)
        if not text:
            raise SpecError(f"model {name!r} has no scoring source; give a source")
        src = Source.parse(text)
        if source is None and src.kind == "query" and target.name != self.d.name:
            raise UnsupportedError(
                f"the scoring source of model {name!r} is a query written for {self.d.name}; "
                f"its meaning on {target.name} is not known to indb: give a source (a "
                f"table, or a query written for {target.name})"
            )
        use_intervals = bool(model.get("intervals")) if intervals is None else intervals
        query = W.scoring_query(result, target, target.relation(src), intervals=use_intervals)
        view = W.create_view(view_schema, view_name or model["view_name"], query)
        return target.render(view)

    def _source_types(self, model: dict[str, Any]) -> dict[str, str] | None:
        """Column types of the model's stored scoring source on this engine (None if it
        cannot be read)."""
        text = model.get("score_source")
        if not text:
            return None
        try:
            rel = self.d.relation(Source.parse(text))
            return dict(self.engine.describe(self.d.render(S.select([star()], aliased(rel)))))
        except (EngineError, SpecError, UnsupportedError):
            return None

    def events(self, name: str) -> list[dict[str, Any]]:
        return self._rows(
            W.select_rows(self.schema, "registry_event", W.where_model(name), order=["at"])
        )

    # -- writing ---------------------------------------------------------------------------
    def save(
        self,
        name: str,
        result: FitResult,
        *,
        promote: bool | None = True,
        force_new: bool = False,
        view_schema: str | None = None,
        score_source: str | None = None,
        intervals: bool | None = None,
        note: str | None = None,
        parent_version: int | None = None,
        assessments: Sequence[dict[str, Any]] = (),
        diagnostics: bool | None = None,
    ) -> SaveOutcome:
        """Record ``result`` as the next version of ``name`` and (by default) make it live.

        ``promote=None`` decides by the live version: a first version, or one with the live
        version's spec (a refit on new data), goes live; a version whose spec differs is
        recorded held (a :class:`~indb.errors.DeploymentWarning` names what differs), so an
        ad-hoc fit never replaces a live model, and the signature of its macro, silently.
        ``promote=True`` over a live version whose scoring inputs change warns which.

        An identical spec on unchanged data (same spec hash and data fingerprint as the
        newest version) keeps that version unless ``force_new`` or a deployment setting
        (``view_schema``, ``score_source``, ``intervals``, ``diagnostics``; None keeps the
        model's own) differs
        from the model's: then a new version is recorded so the change takes effect.
        ``assessments``: rows of ``version_assessment`` recorded with a new version (a
        ``version`` of None is this one's).
        """
        self.check_model_name(name)
        if view_schema is not None:
            W.check_name(view_schema, "view schema")
        fresh = not self.exists()
        h = spec_hash(result.spec)
        current = self._current_or_twin(name)
        match = self._same_fit_version(name, result) if current is not None else None
        # a changed view schema, scoring source or intervals flag is not "unchanged":
        # keeping the version would silently drop the request (it is applied below, as for
        # any new version, by the same path that deploys and records it)
        if (
            match is not None
            and not force_new
            and not deployment_changes(current, view_schema, score_source, intervals, diagnostics)
        ):
            return SaveOutcome(
                name,
                int(match["version"]),
                False,
                match["status"] == "live",
                self._view_label(current),
                "score_mean",
                self._macro_label(current) if self.d.supports_macros else None,
                diagnostics_view=self.diagnostics_label(current),
            )
        version = 1
        if current is not None:  # numbers are never reused, dropped versions included
            rows = self._rows(
                S.select(
                    [S.alias(exp_max("version"), "v")],
                    W.table_ref(self.schema, "model_version"),
                    where=W.where_model(name),
                )
            )
            version = int(rows[0]["v"] or 0) + 1 if rows else 1
        now = _now()
        source_text = score_source or result.spec.get("source", {}).get("text")
        model_row = {
            "model_name": name,
            "created_at": now,
            "live_version": None,
            "view_schema": view_schema,
            "view_name": name,
            "macro_name": f"{name}_score",
            "score_source": source_text,
            "intervals": bool(intervals) if intervals is not None else False,
            "diagnostics": bool(diagnostics),
        }
        if current is not None:
            model_row.update({"created_at": current["created_at"], **model_updates(current)})
            if view_schema is not None:
                model_row["view_schema"] = view_schema
            if score_source is not None:
                model_row["score_source"] = score_source
            if intervals is not None:
                model_row["intervals"] = bool(intervals)
            if diagnostics is not None:
                model_row["diagnostics"] = bool(diagnostics)
        if model_row["score_source"]:
            model_row["score_source"] = self._qualified_source(model_row["score_source"])
        notes: list[str] = []
        live_result = self._live_result(name, current)
        if promote is None:
            promote, why = promote_by_default(name, version, result, live_result)
            if why:
                notes.append(why)
        elif promote and live_result is not None:
            notes += signature_changes(name, live_result, result, self.d)
        if not promote and self._live_elsewhere(current, model_row):
            # the model row says where the live view and macro are: a version that is not
            # made live must not move them, nor make the row point where they are not
            notes.append(
                f"view_schema {view_schema!r} was not applied: version {version} of {name!r} "
                f"is held, and the live version {current['live_version']} keeps serving "
                f"from {self._view_label(current)}; to serve version {version} from schema "
                f"{view_schema!r}, promote it with view_schema={view_schema!r} (CLI: indb "
                f"promote {name} {version} --view-schema {view_schema})"
            )
            model_row["view_schema"] = current["view_schema"]
        if not promote and current is not None and current.get("live_version") is not None:
            notes += self._keep_live_diagnostics(name, version, model_row, current)
        status = "live" if promote else "held"
        vrow = {
            "model_name": name,
            "version": version,
            "created_at": now,
            "status": status,
            "family": result.family,
            "link": result.link,
            "response": result.response,
            "source": result.spec.get("source", {}).get("text"),
            "deviance": result.deviance,
            "null_deviance": result.null_deviance,
            "pearson_chi2": result.pearson_chi2,
            "dispersion": result.dispersion,
            "log_likelihood": result.log_likelihood,
            "aic": result.aic,
            "bic": result.bic,
            "residual_df": result.residual_df,
            "n_used": result.n_used,
            "n_excluded": result.n_excluded,
            "iterations": result.iterations,
            "converged": result.converged,
            "seconds": result.seconds,
            "spec_hash": h,
            "spec_json": json.dumps(result.spec, sort_keys=True),
            "fingerprint_json": json.dumps(_jsonable(result.fingerprint), sort_keys=True),
            # (X'WX)^-1 for the diagnostics view only where the model has one (up to
            # colpairs.MAX_PAIRS numbers, megabytes for a model of many levels)
            "result_json": json.dumps(
                result.to_dict(storage=bool(model_row.get("diagnostics"))), allow_nan=False
            ),
            "package_version": __version__,
            "parent_version": parent_version,
            "note": note,
        }
        terms = [
            {
                "model_name": name,
                "version": version,
                "position": i,
                "term": c.term,
                "estimate": c.estimate,
                "std_error": c.std_error,
                "wald": c.wald,
                "p_two_sided": c.p_two_sided,
                "aliased": c.aliased,
            }
            for i, c in enumerate(result.coefficients)
        ]
        iters = [
            {
                "model_name": name,
                "version": version,
                "iteration": r.iteration,
                "phase": r.phase,
                "deviance": r.deviance,
                "relative_change": r.relative_change,
                "step_halvings": r.step_halvings,
                "seconds": r.seconds,
            }
            for r in result.iteration_log
        ]
        # Build every statement before opening the transaction: a bad source or name fails
        # here, with nothing written.
        if promote:
            self._check_not_foreign(name, model_row, current)
        deploy = self._deploy_statements(name, result, model_row) if promote else []
        try:
            with self.engine.transaction():
                if fresh:  # registry tables are created in the same transaction
                    self.ensure()
                else:
                    self._upgrade_earlier_layout()
                # a version's details before its row, and the row before the model's: an
                # engine without transactions (Spark) then never shows a half-written version
                self._insert("version_term", terms)
                if iters:
                    self._insert("version_iteration", iters)
                self._insert_assessments(assessments, version)
                self._insert("model_version", [vrow])
                if current is None:
                    self._insert("model", [model_row])
                self._event(
                    name,
                    version,
                    "fit",
                    f"status {status}; {result.n_used} rows; deviance {result.deviance:.10g}",
                    now,
                )
                if promote:
                    self._make_live(name, version, model_row, deploy, now)
                elif current is not None:
                    self._update_model(name, model_row)
        except EngineError as err:
            raise _conflict(err, name, version) from err
        for note in notes:
            warnings.warn(note, DeploymentWarning, stacklevel=2)
        return SaveOutcome(
            name,
            version,
            True,
            promote,
            self._view_label(model_row),
            "score_mean",
            self._macro_label(model_row) if self.d.supports_macros else None,
            tuple(notes),
            self.diagnostics_label(model_row if promote else (current or {})),
        )

    def _keep_live_diagnostics(
        self, name: str, version: int, model_row: dict[str, Any], current: dict[str, Any]
    ) -> list[str]:
        """A held version leaves the live diagnostics view as it is: the model row says
        whether there is one (its drop and the check for foreign objects read it)."""
        live = bool(current.get("diagnostics"))
        if bool(model_row.get("diagnostics")) == live:
            return []
        model_row["diagnostics"] = live
        return [
            f"diagnostics={not live} was not applied: version {version} of {name!r} is held, "
            f"and the live version {current['live_version']} keeps "
            f"{'its' if live else 'no'} diagnostics view; refit with promote=True (CLI: "
            f"--promote) and diagnostics={not live} to change it"
        ]

    def _live_result(self, name: str, current: dict[str, Any] | None) -> FitResult | None:
        """The live version's result (None without a model or a live version)."""
        if current is None or current.get("live_version") is None:
            return None
        return self.load(name, int(current["live_version"]))

    def _current_or_twin(self, name: str) -> dict[str, Any] | None:
        """The model row of ``name`` (None for a new model); a new name that differs only in
        case from a registered model's is refused."""
        existing = self.models()
        current = next((m for m in existing if m["model_name"] == name), None)
        twin = next(
            (m["model_name"] for m in existing if m["model_name"].lower() == name.lower()), name
        )
        if current is None and twin != name:
            # DuckDB (and Spark) identifiers ignore case: the view and macro of one would
            # replace the other's
            raise RegistryError(
                f"model name {name!r} differs only in case from model {twin!r} in the "
                f"registry; their scoring views would be the same object. Refit {twin!r} "
                "under that name, or choose another name; nothing was written"
            )
        return current

    def _same_fit_version(self, name: str, result: FitResult) -> dict[str, Any] | None:
        """The version that ``result`` repeats (same spec hash and data fingerprint): the
        newest version, or else a held one. The same spec on unchanged data adds no version,
        so a scheduled job that keeps failing a gate does not pile up identical versions."""
        rows = self._undropped_versions(name)
        candidates = rows[-1:] + [r for r in reversed(rows[:-1]) if r["status"] == "held"]
        # hashed again from the stored spec: one stored before specs recorded their SQL
        # dialect is this engine's (see _result), and matches a refit of it here
        want = spec_hash(self._spec_with_dialect(result.spec))
        prints = _jsonable(result.fingerprint)
        for row in candidates:
            stored = self._spec_with_dialect(json.loads(row["spec_json"]))
            if spec_hash(stored) == want and json.loads(row["fingerprint_json"]) == prints:
                return row
        return None

    def _undropped_versions(self, name: str) -> list[dict[str, Any]]:
        """The versions that were not dropped, oldest first."""
        return self._rows(
            W.select_rows(
                self.schema,
                "model_version",
                S.and_(W.where_model(name), S.ne(S.col("status"), S.text("dropped"))),
                order=["version"],
            )
        )

    def promote(self, name: str, version: int, *, view_schema: str | None = None) -> None:
        """Point the stable view (and macro) at ``version``; the previous live version retires.

        The view and macro stay where the model's live ones are, unless ``view_schema``
        moves them: the old ones are then dropped in the same transaction.
        """
        current = self.model(name)
        self.check_model_name(name)
        model_row = dict(current)
        if view_schema is not None:
            model_row["view_schema"] = W.check_name(view_schema, "view schema")
        row = self._version_row(name, version)
        if row["status"] == "dropped":
            raise RegistryError(f"version {version} of {name!r} was dropped")
        result = self._result(row)
        if model_row.get("score_source"):
            model_row["score_source"] = self._qualified_source(model_row["score_source"])
        why = DG.unsupported(result) if model_row.get("diagnostics") else None
        if why is not None:
            # a roll-back must not be blocked by the diagnostics view: it goes, and says so
            model_row["diagnostics"] = False
        self._check_not_foreign(name, model_row, current)
        deploy = self._deploy_statements(name, result, model_row)
        now = _now()
        with self.engine.transaction():
            self._upgrade_earlier_layout()
            self._make_live(name, int(version), model_row, deploy, now)
        if why is not None:
            warnings.warn(
                f"version {version} of {name!r} is live without its diagnostics view: {why}; "
                "the view was dropped (a refit deployed with diagnostics brings it back)",
                DeploymentWarning,
                stacklevel=2,
            )

    def drop(self, name: str, version: int) -> None:
        """Mark a version dropped (its rows stay for audit); the live version cannot be dropped."""
        model_row = self.model(name)
        row = self._version_row(name, version)
        if model_row["live_version"] == int(version):
            raise RegistryError(
                f"version {version} of {name!r} is live; promote another version first"
            )
        if row["status"] == "dropped":
            return
        now = _now()
        with self.engine.transaction():
            self._set_status(name, int(version), "dropped")
            self._event(name, int(version), "drop", "", now)

    def compare(self, name: str, a: int, b: int) -> dict[str, Any]:
        """Coefficient changes between two versions, in standard errors of version ``a``."""
        return version_changes(name, a, b, self.load(name, a), self.load(name, b))

    def nested(self, small: str, big: str) -> NestedTest:
        """The deviance test of model ``small`` within model ``big`` (each ``NAME``, its
        live version, or ``NAME:VERSION``): same rows, ``small``'s terms among ``big``'s."""
        found = []
        for ref in (small, big):
            name, version = parse_reference(ref)
            row = self._version_row(name, version)
            found += [f"{name}:{row['version']}", self._result(row)]
        return nested_test(*found)

    def check_model_name(self, name: str) -> str:
        """Refuse a model name that is not a plain name, or whose scoring view or macro
        would hide a built-in object of the engine (or be hidden by one), such as DuckDB's
        ``sqlite_master`` view."""
        W.check_name(name, "model name")
        macros = [f"{name}_score", f"{name}_unseen"] if self.d.supports_macros else [None]
        found_names: set[str] = set()
        for macro in macros:
            query = self.d.reserved_objects_query(name, macro)
            if query is None:
                return name
            found_names |= {str(n) for n in self.engine.fetch_columns(self.d.render(query))["name"]}
        found = sorted(found_names)
        if found:
            raise SpecError(
                f"model name {name!r} is taken by the {self.d.name} built-in object(s) "
                f"{found}: its scoring view or macro would hide them (or be hidden by them); "
                "choose another model name"
            )
        return name

    # -- internals ---------------------------------------------------------------------------
    def _make_live(
        self, name: str, version: int, model_row: dict[str, Any], deploy: list[str], now: str
    ) -> None:
        for stmt in deploy:
            self.engine.execute(stmt)
        self._set_status(name, None, "retired")
        self._set_status(name, version, "live")
        row = dict(model_row)
        row["live_version"] = version
        self._update_model(name, row)
        self._event(name, version, "promote", f"view {self._view_label(model_row)}", now)

    # -- row writes (an append-only registry overrides these) -----------------------------------
    def _insert(self, table: str, rows: list[dict[str, Any]]) -> None:
        self._run(W.insert_rows(self.schema, table, rows))

    def _set_status(self, name: str, version: int | None, status: str) -> None:
        """Set a version's status (``version=None``: whichever version is live now)."""
        where = (
            S.and_(W.where_model(name), S.eq(S.col("status"), S.text("live")))
            if version is None
            else W.where_model(name, version)
        )
        self._run(W.update_rows(self.schema, "model_version", {"status": status}, where))

    def _update_model(self, name: str, row: dict[str, Any]) -> None:
        self._run(W.update_rows(self.schema, "model", model_updates(row), W.where_model(name)))

    def _columns_of(self, relation: Any) -> list[str] | None:
        """Column names of a table or view, or None when there is none by that name."""
        try:
            return [c for c, _ in self.engine.describe(self.d.render(S.select([star()], relation)))]
        except EngineError:
            return None

    def _event(self, name: str, version: int, action: str, detail: str, now: str) -> None:
        self._run(
            W.insert_rows(
                self.schema,
                "registry_event",
                [
                    {
                        "model_name": name,
                        "version": version,
                        "at": now,
                        "action": action,
                        "detail": detail,
                    }
                ],
            )
        )


_CONFLICT_WORDS = (
    "primary key",
    "duplicate key",
    "constraint",
    "conflict",
    "could not set lock",
    "serializ",
    "unique",
)


def _conflict(err: EngineError, name: str, version: int) -> Exception:
    """A write that lost a race to another writer becomes a clear registry conflict."""
    text = str(err).lower()
    if any(w in text for w in _CONFLICT_WORDS):
        return RegistryError(
            f"another job wrote to model {name!r} at the same time (version {version} is taken "
            f"or the database is locked); nothing was written by this run — rerun it: {err}"
        )
    return err


def exp_max(column: str):
    from sqlglot import exp

    return exp.Max(this=S.col(column))


def _py(v: Any) -> Any:
    import numpy as np

    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and math.isnan(v):
        return None
    return v
