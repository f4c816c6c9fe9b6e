"""The Spark adapter on the shared in-process session: types, errors, files, URLs, caching."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import statsmodels.datasets as smd
from engine_support import spark_view, write_parquet
from numpy.testing import assert_allclose

import indb
from indb.engines.spark import SparkEngine
from indb.errors import EngineError, UnsupportedError


@pytest.fixture
def engine(spark_local: Any) -> SparkEngine:
    return SparkEngine(spark_local)


def test_describe_names_and_kinds(engine: SparkEngine) -> None:
    sql = (
        "SELECT CAST(1 AS TINYINT) a, CAST(1 AS SMALLINT) b, 1 c, CAST(1 AS BIGINT) d, "
        "CAST(1 AS FLOAT) e, 1D f, CAST(1 AS DECIMAL(10, 2)) g, 'x' h, true i, "
        "DATE'2020-01-01' j"
    )
    cols = engine.describe(sql)
    names = ["tinyint", "smallint", "int", "bigint", "float", "double", "decimal(10,2)"]
    names += ["string", "boolean", "date"]
    assert cols == list(zip("abcdefghij", names, strict=True))
    kinds = [engine.dialect.type_kind(t) for _, t in cols]
    assert kinds == ["numeric"] * 7 + ["text", "boolean", "other"]


def test_engine_error_keeps_the_sql(engine: SparkEngine) -> None:
    sql = "SELECT * FROM no_such_table_anywhere"
    with pytest.raises(EngineError, match="Spark failed: .*TABLE_OR_VIEW_NOT_FOUND") as info:
        engine.fetch_columns(sql)
    assert info.value.sql == sql


def test_no_transactions(engine: SparkEngine) -> None:
    """Spark has no transactions: what ran inside stays when a later statement fails."""
    engine.execute("DROP VIEW IF EXISTS tx_view")
    with pytest.raises(EngineError), engine.transaction():
        engine.execute("CREATE TEMPORARY VIEW tx_view AS SELECT 1 AS v")
        engine.execute("SELECT * FROM no_such_table_anywhere")
    assert engine.execute("SELECT v FROM tx_view") == [(1,)]
    engine.execute("DROP VIEW tx_view")


def test_connect_reuses_the_running_session(spark_local: Any) -> None:
    eng = indb.connect("spark:local[2]")
    assert isinstance(eng, SparkEngine) and eng.session is spark_local
    eng.close()  # not ours to stop
    assert spark_local.sql("SELECT 1 AS x").collect()[0].x == 1


def cancer_parts(root: Path) -> Path:
    # statsmodels.datasets.cancer (301 rows) written as two Parquet files in one folder
    d = smd.cancer.load_pandas().data
    root.mkdir()
    half = len(d) // 2
    for i, part in enumerate([d.iloc[:half], d.iloc[half:]]):
        pq.write_table(pa.Table.from_pandas(part, preserve_index=False), root / f"part-{i}.parquet")
    return root


def test_parquet_glob_source_matches_duckdb(engine: SparkEngine, tmp_path: Path) -> None:
    source = str(cancer_parts(tmp_path / "cancer") / "*.parquet")
    kw = {"offset": "ln(population)", "tol": 1e-13}
    res = indb.fit(source, "cancer", "poisson", db=engine, **kw)
    ref = indb.fit(source, "cancer", "poisson", db=duckdb.connect(), **kw)
    assert res.n_used == ref.n_used == 301
    assert res.terms == ref.terms
    assert_allclose(res.estimates, ref.estimates, rtol=1e-9)
    assert_allclose(res.std_errors, ref.std_errors, rtol=1e-9)
    assert_allclose(res.log_likelihood, ref.log_likelihood, rtol=1e-9)


def test_csv_needs_a_view(engine: SparkEngine, tmp_path: Path) -> None:
    path = tmp_path / "x.csv"
    path.write_text("y,x\n1,2\n")
    with pytest.raises(UnsupportedError, match="USING csv OPTIONS"):
        indb.fit(str(path), "y", db=engine)


def test_compressed_fit_uses_a_cached_view(engine: SparkEngine, tmp_path: Path) -> None:
    # statsmodels.datasets.fair: 6366 respondents fold to 20 distinct design rows
    d = smd.fair.load_pandas().data
    frame = d.assign(had_affair=d["affairs"] > 0)[["had_affair", "rate_marriage", "religious"]]
    frame = frame.astype("int64")
    path = tmp_path / "fair.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    kw = {"categorical": ["rate_marriage", "religious"], "tol": 1e-13}
    res = indb.fit(str(path), "had_affair", "binomial", db=engine, compress="always", **kw)
    assert res.path.startswith("compressed: 6,366 rows folded to 20 distinct design rows")
    views = [r.viewName for r in engine.session.sql("SHOW VIEWS").collect()]
    assert not [v for v in views if v.startswith("indb_fold_")]  # dropped after the fit
    ref = indb.fit(str(path), "had_affair", "binomial", db=duckdb.connect(), **kw)
    assert res.terms == ref.terms
    assert_allclose(res.estimates, ref.estimates, rtol=1e-9)
    assert_allclose(res.std_errors, ref.std_errors, rtol=1e-9)


def test_a_callers_session_keeps_its_settings_and_views(spark_local: Any, tmp_path: Path) -> None:
    """indb changes no setting of a session it is given (Spark has no transactions, so
    there is none to refuse), and the temporary view of the folded route is dropped.

    Oracle: statsmodels GLM on statsmodels.datasets.spector (binomial logit)."""
    import statsmodels.api as sm

    d = smd.spector.load_pandas().data
    spark_view(spark_local, "spector_caller", write_parquet(d, tmp_path / "spector.parquet"))
    conf = spark_local.conf.getAll
    views = {t.name for t in spark_local.catalog.listTables() if t.isTemporary}
    res = indb.fit(
        "spector_caller", "GRADE", "binomial", db=spark_local, compress="always", tol=1e-13
    )
    ref = sm.GLM(d["GRADE"], sm.add_constant(d[["GPA", "TUCE", "PSI"]]), sm.families.Binomial())
    ref = ref.fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=200)
    assert_allclose(res.estimates, ref.params.to_numpy(), rtol=1e-9)
    assert_allclose(res.std_errors, ref.bse.to_numpy(), rtol=1e-8)
    assert spark_local.conf.getAll == conf
    assert {t.name for t in spark_local.catalog.listTables() if t.isTemporary} == views
    spark_local.catalog.dropTempView("spector_caller")
