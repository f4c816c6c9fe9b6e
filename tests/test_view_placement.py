"""Where scoring views and macros read from and where they live (issue 11, items 3 and 4).

* Item 3: a view in another schema (``--view-schema``) must read the table the model was
  fitted on, not a same-named table of its own schema: every stored source names its schema
  (and a catalog other than the database's own), as the engine resolved it at fit time.
* Item 4: a refit or promotion that moves the view to another schema drops the old view and
  macro in the same transaction, and the registry always names where the live ones are.
* Names of the engine's own catalog objects (``sqlite_master``) are refused as model names.

Data: the issue's reproduction, the table ``pol`` of ``pol_cases.py`` (5,000 rows) with a
decoy ``mart.pol`` of its first 3 rows. Oracle for the scores: statsmodels GLM (Poisson,
offset ln(exposure)) on the same 5,000 rows (``pol_cases.oracle_means``). Which table a name
binds to is checked against DuckDB's own binder (the table an ``EXPLAIN`` scans).
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from numpy.testing import assert_allclose
from pol_cases import ROWS, oracle_means, pol_frame

import indb
from indb.cli import main
from indb.engines.base_dialect import split_qualified
from indb.engines.base_engine import qualify_source
from indb.engines.duckdb import DuckDBEngine
from indb.errors import DeploymentWarning, EngineError, SpecError
from indb.registry import Registry
from indb.spec import Source

# indb at tol 1e-12 and statsmodels at tol 1e-13 both sit far below this; a mean from the
# decoy's 3 rows would differ in the first digits
PREDICT_RTOL = 1e-8
FIT = ["--family", "poisson", "--response", "claims", "--offset", "ln(exposure)"]


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return pol_frame()


@pytest.fixture
def db(tmp_path: Path, frame: pd.DataFrame) -> str:
    """A DuckDB file with main.pol (5,000 rows) and the decoy mart.pol (its first 3 rows)."""
    path = str(tmp_path / "r.duckdb")
    with duckdb.connect(path) as con:
        con.register("frame", frame)
        con.execute("CREATE TABLE pol AS SELECT * FROM frame")
        con.unregister("frame")
        con.execute("CREATE SCHEMA mart")
        con.execute("CREATE TABLE mart.pol AS SELECT * FROM main.pol WHERE id < 3")
    return path


def cli(*args: str) -> Any:
    out = CliRunner().invoke(main, list(args))
    assert out.exit_code == 0, out.output
    return out


def query(db: str, sql: str) -> list[tuple[Any, ...]]:
    with duckdb.connect(db, read_only=True) as con:
        return con.execute(sql).fetchall()


def scores(db: str, view: str) -> np.ndarray:
    with duckdb.connect(db, read_only=True) as con:
        rows = con.execute(f"SELECT id, score_mean FROM {view} ORDER BY id").fetchall()
    return np.array([m for _, m in rows])


def objects(db: str) -> set[tuple[str, str, str]]:
    """(kind, schema, name) of the user views and macros in the database."""
    views = query(db, "SELECT schema_name, view_name FROM duckdb_views() WHERE NOT internal")
    macros = query(
        db,
        "SELECT schema_name, function_name FROM duckdb_functions() "
        "WHERE function_type = 'macro' AND NOT internal",
    )
    return {("view", s, n) for s, n in views} | {("macro", s, n) for s, n in macros}


def model_row(db: str, name: str) -> dict[str, Any]:
    with duckdb.connect(db, read_only=True) as con:
        cur = con.execute("SELECT * FROM indb_registry.model WHERE model_name = ?", [name])
        cols = [d[0] for d in cur.description]
        return dict(zip(cols, cur.fetchone(), strict=True))


@contextmanager
def registry(db: str) -> Iterator[Registry]:
    reg = indb.api.registry(db)
    try:
        yield reg
    finally:
        reg.engine.close()


def bound_table(con: duckdb.DuckDBPyConnection, name: str) -> str:
    """catalog.schema.table that DuckDB's binder reads for ``name`` (the EXPLAIN scan)."""
    plan = json.loads(con.execute(f"EXPLAIN (FORMAT JSON) SELECT * FROM {name}").fetchall()[0][1])
    node = plan[0]
    while node["name"] != "SEQ_SCAN":
        node = node["children"][0]
    return node["extra_info"]["Table"]


# -- item 3: the view reads the table the model was fitted on ------------------------------------


def test_view_in_another_schema_reads_the_fitted_table_not_a_decoy(db, frame):
    # the reproduction: before, mart.vs1 served the 3 rows of mart.pol
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "vs1",
        "--view-schema",
        "mart",
        "pol",
    )
    assert query(db, "SELECT count(*) FROM mart.vs1") == [(ROWS,)]
    assert_allclose(
        scores(db, "mart.vs1"), oracle_means(frame, ["age", "region"]), rtol=PREDICT_RTOL
    )
    # the macro in mart scores the same rows the same way
    with duckdb.connect(db, read_only=True) as con:
        macro = con.execute(
            "SELECT mart.vs1_score(age, region, exposure) FROM main.pol ORDER BY id"
        ).fetchall()
    assert_allclose([m for (m,) in macro], scores(db, "mart.vs1"), rtol=1e-15)
    # the stored spec and the model's scoring source name the schema
    spec = json.loads(query(db, "SELECT spec_json FROM indb_registry.model_version")[0][0])
    assert spec["source"] == {"kind": "table", "text": "main.pol"}
    assert model_row(db, "vs1")["score_source"] == "main.pol"
    # the view's own SQL names main.pol (DuckDB leaves the database's name out of it)
    (sql,) = query(db, "SELECT sql FROM duckdb_views() WHERE view_name = 'vs1'")[0]
    assert "FROM main.pol AS indb_src" in sql


def test_promotion_from_a_session_in_another_schema_reads_the_same_table(db, frame):
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "vs1",
        "--view-schema",
        "mart",
        "pol",
    )
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--exclude",
        "age",
        "--tol",
        "1e-12",
        "--name",
        "vs1",
        "pol",
    )
    # a session whose unqualified names lead to mart.pol redeploys the stored source
    con = duckdb.connect(db)
    con.execute("USE mart")
    assert bound_table(con, "pol").endswith(".mart.pol")
    indb.api.registry(con).promote("vs1", 1)
    con.close()
    assert_allclose(
        scores(db, "mart.vs1"), oracle_means(frame, ["age", "region"]), rtol=PREDICT_RTOL
    )


def test_query_and_explicit_scoring_sources_are_qualified(db, frame):
    source = "WITH p AS (SELECT * FROM pol WHERE age >= 30) SELECT * FROM p"
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "q1",
        "--view-schema",
        "mart",
        source,
    )
    stored = json.loads(query(db, "SELECT spec_json FROM indb_registry.model_version")[0][0])
    text = stored["source"]["text"]
    assert 'FROM "main"."pol" WHERE' in text and text.endswith("FROM p")  # CTE as written
    kept = frame[frame["age"] >= 30].reset_index(drop=True)
    assert query(db, "SELECT count(*) FROM mart.q1") == [(len(kept),)]
    assert_allclose(scores(db, "mart.q1"), oracle_means(kept, ["age", "region"]), rtol=PREDICT_RTOL)

    # an explicit --score-source is resolved the same way when it is deployed
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "q2",
        "--view-schema",
        "mart",
        "--score-source",
        "pol",
        "pol",
    )
    assert model_row(db, "q2")["score_source"] == "main.pol"
    assert query(db, "SELECT count(*) FROM mart.q2") == [(ROWS,)]


def test_relative_file_source_becomes_absolute(tmp_path, frame, monkeypatch):
    data = tmp_path / "data"
    data.mkdir()
    with duckdb.connect() as con:
        con.register("frame", frame)
        con.execute(f"COPY frame TO '{data / 'pol.parquet'}' (FORMAT parquet)")
    monkeypatch.chdir(tmp_path)
    db = str(tmp_path / "files.duckdb")
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "fq",
        "data/pol.parquet",
    )
    assert model_row(db, "fq")["score_source"] == str(data / "pol.parquet")
    # the view reads the same file from any working directory
    monkeypatch.chdir(data)
    assert_allclose(scores(db, "fq"), oracle_means(frame, ["age", "region"]), rtol=PREDICT_RTOL)


def test_a_renamed_database_file_still_promotes(db, tmp_path, frame):
    # the database's own name is left out of stored sources, as DuckDB leaves it out of view
    # SQL: a copy of the file (another catalog name) promotes and scores as the original
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--tol",
        "1e-12",
        "--name",
        "vs1",
        "--view-schema",
        "mart",
        "pol",
    )
    cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--exclude",
        "age",
        "--tol",
        "1e-12",
        "--name",
        "vs1",
        "pol",
    )
    copy = str(tmp_path / "copy_of_r.duckdb")
    shutil.copy(db, copy)
    cli("promote", "vs1", "1", "--db", copy)
    assert_allclose(
        scores(copy, "mart.vs1"), oracle_means(frame, ["age", "region"]), rtol=PREDICT_RTOL
    )


def test_names_resolve_as_duckdbs_binder_resolves_them():
    # oracle: the table DuckDB's own binder scans for the same name (EXPLAIN)
    con = duckdb.connect()
    con.execute("ATTACH ':memory:' AS other")
    con.execute("CREATE SCHEMA mart")
    con.execute("CREATE SCHEMA other.s2")
    tables = ("main.t", "mart.t", "other.main.t", "other.s2.t", "main.u", "other.s2.w", "other.v")
    for table in tables:
        con.execute(f"CREATE TABLE {table} AS SELECT 1 AS x")
    engine = DuckDBEngine(con)

    def resolved(name: str) -> list[str]:
        found = split_qualified(qualify_source(engine, Source.parse(name)).text)
        catalog = con.execute("SELECT current_catalog()").fetchall()[0][0]
        return found if len(found) == 3 else [catalog, *found]

    cases = ["t", "mart.t", "s2.t", "other.t", "other.s2.w", "u", '"T"', "other.v", "v", "s2.w"]
    settings = [
        None,
        "SET search_path = 'mart,main'",
        "SET search_path = 'other.s2,main'",
        "USE other",
        "USE memory.mart",
        "CREATE TEMP TABLE t AS SELECT 2 AS x",
    ]
    checked = 0
    for setting in settings:
        if setting:
            con.execute(setting)
        for name in cases:
            try:
                expected = bound_table(con, name)
            except duckdb.Error:
                continue  # DuckDB itself cannot bind it here (not on the path)
            assert resolved(name) == split_qualified(expected), (setting, name)
            checked += 1
    assert checked >= 40  # of 60: the rest DuckDB itself cannot bind in that state
    con.close()


def test_scoring_sql_names_the_source_for_its_dialect(db):
    cli("fit", "--db", db, *FIT, "--exclude", "id", "--name", "vs1", "--view-schema", "mart", "pol")
    duck = cli("scoring-sql", "vs1", "--db", db).output
    assert 'FROM "main"."pol" AS "indb_src"' in duck  # run in DuckDB: the fitted table
    # another engine has no schema main: the name relative to DuckDB's current schema
    pg = cli("scoring-sql", "vs1", "--db", db, "--dialect", "postgres").output
    assert 'FROM "pol" AS "indb_src"' in pg
    assert indb.api.scoring_sql("vs1", db=db, dialect="spark").count("FROM `pol` AS") == 1


# -- item 4: a moved view leaves nothing behind --------------------------------------------------


def test_refit_into_another_schema_moves_the_view_and_macro(db, frame):
    cli("fit", "--db", db, *FIT, "--exclude", "id", "--tol", "1e-12", "--name", "freq", "pol")
    assert objects(db) == {
        ("view", "main", "freq"),
        ("macro", "main", "freq_score"),
        ("macro", "main", "freq_unseen"),
    }
    out = cli(
        "fit",
        "--db",
        db,
        *FIT,
        "--exclude",
        "id",
        "--exclude",
        "age",
        "--tol",
        "1e-12",
        "--name",
        "freq",
        "--view-schema",
        "mart",
        "pol",
    )
    assert "scoring view mart.freq" in out.output and "macro mart.freq_score" in out.output
    # before: main.freq and main.freq_score went on serving version 1, untracked
    assert objects(db) == {
        ("view", "mart", "freq"),
        ("macro", "mart", "freq_score"),
        ("macro", "mart", "freq_unseen"),
    }
    row = model_row(db, "freq")
    assert (row["live_version"], row["view_schema"]) == (2, "mart")
    assert_allclose(scores(db, "mart.freq"), oracle_means(frame, ["region"]), rtol=PREDICT_RTOL)

    # promoting the older version keeps the view where the model's view is now
    cli("promote", "freq", "1", "--db", db)
    assert objects(db) == {
        ("view", "mart", "freq"),
        ("macro", "mart", "freq_score"),
        ("macro", "mart", "freq_unseen"),
    }
    v1 = oracle_means(frame, ["age", "region"])
    assert_allclose(scores(db, "mart.freq"), v1, rtol=PREDICT_RTOL)
    # ... unless the promotion moves it: back to main, mart's dropped in the same transaction
    cli("promote", "freq", "1", "--db", db, "--view-schema", "main")
    assert objects(db) == {
        ("view", "main", "freq"),
        ("macro", "main", "freq_score"),
        ("macro", "main", "freq_unseen"),
    }
    assert model_row(db, "freq")["view_schema"] == "main"
    assert_allclose(scores(db, "main.freq"), v1, rtol=PREDICT_RTOL)
    # main and the default schema are the same place: nothing is dropped
    cli("fit", "--db", db, *FIT, "--exclude", "id", "--exclude", "region", "--name", "freq", "pol")
    assert objects(db) == {
        ("view", "main", "freq"),
        ("macro", "main", "freq_score"),
        ("macro", "main", "freq_unseen"),
    }
    with registry(db) as reg:
        events = [e["detail"] for e in reg.events("freq") if e["action"] == "promote"]
    assert events == [
        "view freq",
        "view mart.freq",
        "view mart.freq",
        "view main.freq",
        "view main.freq",
    ]


def test_held_version_does_not_move_the_view_and_says_so(db, frame):
    indb.fit(
        "pol",
        "claims",
        "poisson",
        db=db,
        offset="ln(exposure)",
        exclude=["id"],
        tol=1e-12,
        name="freq",
    )
    with pytest.warns(DeploymentWarning, match=r"view_schema 'mart' was not applied: version 2"):
        res = indb.fit(
            "pol",
            "claims",
            "poisson",
            db=db,
            offset="ln(exposure)",
            exclude=["id", "age"],
            name="freq",
            view_schema="mart",
            promote=False,
        )
    assert any("indb promote freq 2 --view-schema mart" in w for w in res.warnings)
    assert objects(db) == {
        ("view", "main", "freq"),
        ("macro", "main", "freq_score"),
        ("macro", "main", "freq_unseen"),
    }
    row = model_row(db, "freq")
    assert (row["live_version"], row["view_schema"]) == (1, None)  # where the live view is
    with registry(db) as reg:
        reg.promote("freq", 2, view_schema="mart")
    assert objects(db) == {
        ("view", "mart", "freq"),
        ("macro", "mart", "freq_score"),
        ("macro", "mart", "freq_unseen"),
    }
    assert_allclose(scores(db, "mart.freq"), oracle_means(frame, ["region"]), rtol=1e-6)


def test_a_failed_move_changes_nothing(db):
    indb.fit("pol", "claims", "poisson", db=db, offset="ln(exposure)", exclude=["id"], name="freq")
    before = objects(db), model_row(db, "freq")
    # the old view was replaced by a table of the user's: dropping the old view fails inside
    # the transaction, which rolls back the new view, macro and registry rows with it
    with duckdb.connect(db) as con:
        con.execute("DROP VIEW freq")
        con.execute("CREATE TABLE freq AS SELECT 1 AS mine")
    with pytest.raises(EngineError, match="freq"):
        indb.fit(
            "pol",
            "claims",
            "poisson",
            db=db,
            offset="ln(exposure)",
            exclude=["id", "age"],
            name="freq",
            view_schema="mart",
        )
    assert objects(db) == before[0] - {("view", "main", "freq")}
    assert model_row(db, "freq") == before[1]
    assert query(db, "SELECT count(*) FROM indb_registry.model_version") == [(1,)]
    assert query(db, "SELECT * FROM main.freq") == [(1,)]


# -- item 10: names of the engine's own objects --------------------------------------------------


@pytest.mark.parametrize("name", ["sqlite_master", "SQLite_Schema", "duckdb_tables", "pg_class"])
def test_model_named_like_a_builtin_view_is_refused_before_the_fit(db, name):
    with pytest.raises(SpecError, match=rf"model name '{name}' is taken by the duckdb built-in"):
        indb.fit("pol", "claims", "poisson", db=db, offset="ln(exposure)", name=name)
    assert query(
        db, "SELECT count(*) FROM duckdb_schemas() WHERE schema_name = 'indb_registry'"
    ) == [(0,)]
    # the built-in still answers
    assert query(db, "SELECT count(*) > 0 FROM sqlite_master") == [(True,)]


def test_builtin_names_are_an_input_error_on_the_cli(db):
    out = CliRunner().invoke(main, ["fit", "--db", db, *FIT, "--name", "sqlite_master", "pol"])
    assert out.exit_code == 2, out.output
    assert "model name 'sqlite_master'" in out.output and "built-in" in out.output


def test_macro_named_like_a_builtin_function_is_found(duck=None):
    # DuckDB looks functions up through the same path: a macro in main hides a built-in
    # (no built-in name ends in _score today, so the lookup is checked with abs and exp)
    con = duckdb.connect()
    con.execute("CREATE MACRO abs(x) AS 42")
    assert con.execute("SELECT abs(-1)").fetchall() == [(42,)]  # the hiding, as DuckDB does it
    con.execute("DROP MACRO abs")
    engine = DuckDBEngine(con)
    query = engine.dialect.reserved_objects_query("freq", "ABS")
    assert sorted(set(engine.fetch_columns(engine.dialect.render(query))["name"])) == ["abs"]
    query = engine.dialect.reserved_objects_query("freq", "freq_score")
    assert list(engine.fetch_columns(engine.dialect.render(query))["name"]) == []
    con.close()
