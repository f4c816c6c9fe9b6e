"""The registry's record of assessments: each time a version was judged on a SOURCE (which
source, when, for what, the figures), as a retrain's holdout gates and ``indb assess
--record`` keep them in table ``version_assessment``.

:class:`AssessmentLog` is mixed into :class:`~indb.registry.Registry`, whose low-level
reads and writes (``_rows``, ``_run``, ``_insert``) it uses; an append-only registry (Spark)
appends these rows as it appends every other.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

from indb import writeback as W
from indb.assessment import AssessResult
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine
from indb.errors import EngineError

TABLE = "version_assessment"
#: why a version was judged: a retrain's holdout gates, or ``indb assess --record``
PURPOSES = ("holdout gates", "assess")


def assessment_rows(
    result: AssessResult, *, purpose: str, at: str, version: int | None = None
) -> list[dict[str, Any]]:
    """The rows that record ``result``: one for the version judged and, with a second
    model, one for that version, each naming the other as the one it was compared with.
    ``version`` numbers the first (None: a retrain's new version, numbered when saved)."""
    first = version
    common = {
        "assessed_at": at,
        "purpose": purpose,
        "source": result.source,
        "engine": result.engine,
        "n_used": result.rows,
        "weight": result.weight,
        "actual": result.actual,
    }
    two = result.against
    if two is not None and (two.model, two.version) == (result.model, first):
        two = None  # a version judged against itself (a refit that changed nothing)
    rows = [
        {
            **common,
            "model_name": result.model,
            "version": first,
            "compared_model": two.model if two else None,
            "compared_version": two.version if two else None,
            **_figures(result),
            "figures_json": _json(result.to_dict()),
        }
    ]
    if two is not None:
        rows.append(
            {
                **common,
                "model_name": two.model,
                "version": two.version,
                "compared_model": result.model,
                "compared_version": first,
                **_figures(two),
                "figures_json": _json(
                    {"source": result.source, "rows": result.rows, **two.to_dict()}
                ),
            }
        )
    return rows


def _figures(r: Any) -> dict[str, float]:
    return {
        "expected": r.expected,
        "deviance": r.deviance,
        "deviance_explained": r.deviance_explained,
        "gini": r.gini,
        "gini_normalized": r.gini_normalized,
    }


def _numbered(row: dict[str, Any], version: int | None) -> dict[str, Any]:
    out = dict(row)
    if out["version"] is None:
        out["version"] = version
    if out["compared_model"] is not None and out["compared_version"] is None:
        out["compared_version"] = version
    return out


def _json(doc: dict[str, Any]) -> str:
    # the row's own columns say which model and version (a retrain's new version has no
    # number until it is saved)
    rest = {k: v for k, v in doc.items() if k not in ("model", "version")}
    return json.dumps(rest, allow_nan=False, sort_keys=True)


class AssessmentLog:
    """Record and list assessments (mixed into the registry classes)."""

    engine: Engine
    d: Dialect
    schema: str

    def _rows(self, tree: Any) -> list[dict[str, Any]]:  # provided by the registry
        raise NotImplementedError

    def _run(self, tree: Any) -> None:  # provided by the registry
        raise NotImplementedError

    def _insert(self, table: str, rows: list[dict[str, Any]]) -> None:  # by the registry
        raise NotImplementedError

    def record_assessment(self, result: AssessResult, *, purpose: str, at: str) -> None:
        """Keep ``result`` (and its second model's figures) in one transaction."""
        rows = assessment_rows(result, purpose=purpose, at=at, version=result.version)
        with self.engine.transaction():
            self._insert_assessments(rows)

    def _insert_assessments(
        self, rows: Sequence[dict[str, Any]], version: int | None = None
    ) -> None:
        """Append assessment rows (a ``version`` or ``compared_version`` of None that names
        a version becomes ``version``); the table is created first where a registry written
        before assessments were kept lacks it (CREATE TABLE IF NOT EXISTS)."""
        if not rows:
            return
        filled = [_numbered(r, version) for r in rows]
        cols = W.REGISTRY_TABLES[TABLE]
        self._run(W.create_table(self.schema, TABLE, cols, W.PRIMARY_KEYS.get(TABLE), self.d))
        self._insert(TABLE, filled)

    def assessments(self, name: str, version: int | None = None) -> list[dict[str, Any]]:
        """The recorded assessments of model ``name`` (of one ``version``), oldest first,
        without their full figures (``figures_json``)."""
        query = W.select_rows(
            self.schema, TABLE, W.where_model(name, version), order=["assessed_at", "version"]
        )
        try:
            rows = self._rows(query)
        except EngineError:
            # a registry written before assessments were kept has no such table; reading
            # never creates it (a DuckDB file is opened read-only)
            return []
        for r in rows:
            r.pop("figures_json", None)
            # whole numbers with a NULL among them come back from numpy as floats
            for key in ("version", "compared_version", "n_used"):
                if r[key] is not None:
                    r[key] = int(r[key])
        return rows
