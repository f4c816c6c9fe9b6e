"""The diagnostics view on PostgreSQL and Spark (issue 15, item 4), and the nested test read
from a PostgreSQL registry (item 3).

Each engine fits the model itself and writes ``NAME_diagnostics`` over its own copy of the
data (on Spark a temporary view over a temporary view of Parquet files). The view's columns
are checked row by row

* against DuckDB's view of the same model, to 1e-9 relative on the column's scale (the
  spread is printed in the terminal summary);
* against statsmodels (test-only) at that engine's coefficients (``tests/diagnostics_cases.py``
  names each dataset, all shipped in statsmodels or scikit-learn, and how the oracle converts
  statsmodels' conventions).
"""

from __future__ import annotations

import uuid
import warnings
from functools import cache
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
from diagnostics_cases import CASE, COLUMNS, SAME_BETA_RTOL, DiagCase, grunfeld, oracle, sm_model
from engine_support import Loader, pg_load, record_spread
from numpy.testing import assert_allclose

import indb
from indb import registry_append
from indb import writeback as W
from indb.engines.duckdb import DuckDBEngine
from indb.errors import DeploymentWarning

ENGINE_RTOL = 1e-9
ENGINE_CASES = [
    "poisson-offset-weights-fair",
    "binomial-grouped-cloglog-star98",
    "gamma-log-firm-grunfeld",
    "gamma-log-214-coefficients-modechoice",
]


def fit_named(engine: Any, case: DiagCase, table: str, name: str, **kw: Any) -> indb.FitResult:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeploymentWarning)
        return indb.fit(table, db=engine, tol=1e-13, name=name, **case.fit_kwargs, **kw)


def view_frame(engine: Any, view: str) -> pd.DataFrame:
    cols = engine.fetch_columns(f"SELECT * FROM {engine.dialect.quote(view)}")
    return pd.DataFrame(cols).sort_values("row_id").reset_index(drop=True)


@cache
def duckdb_view(case_id: str) -> pd.DataFrame:
    """The DuckDB view of the case, the reference for the other engines."""
    case = CASE[case_id]
    engine = DuckDBEngine(duckdb.connect())
    try:
        Loader("duckdb", engine, None).load("data", case.frame())  # type: ignore[arg-type]
        fit_named(engine, case, "data", "m", diagnostics=True)
        return view_frame(engine, "m_diagnostics")
    finally:
        engine.close()


@pytest.mark.parametrize("case_id", ENGINE_CASES)
def test_diagnostics_view_on_every_engine(loader: Loader, case_id: str) -> None:
    case = CASE[case_id]
    frame = case.frame()
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"diag_{tag}", frame)
    name = f"m_{tag}"
    res = fit_named(
        loader.engine, case, table, name, diagnostics=True, registry_schema=f"reg_{tag}"
    )
    assert res.deployment["diagnostics_view"] == f"{name}_diagnostics"
    got = view_frame(loader.engine, f"{name}_diagnostics")
    assert list(got.columns) == [*frame.columns, *COLUMNS]
    want = oracle(case, sm_model(case, frame, res), res.estimates, res.dispersion)
    for column in COLUMNS:
        scale = float(np.max(np.abs(want[column])))
        values = got[column].to_numpy(float)
        assert_allclose(values, want[column], rtol=SAME_BETA_RTOL, atol=SAME_BETA_RTOL * scale)
        reference = duckdb_view(case_id)[column].to_numpy(float)
        spread = float(np.max(np.abs(values - reference))) / scale
        record_spread(loader.name, f"diagnostics {column}", spread, case_id)
        assert spread <= ENGINE_RTOL, (column, spread)


@pytest.mark.parametrize("loader", ["postgres", "spark-local"], indirect=True)
def test_a_registry_from_before_the_diagnostics_column(
    loader: Loader, monkeypatch: pytest.MonkeyPatch
) -> None:
    # a registry written by indb 0.2.0 (no model.diagnostics) gets the column on its next
    # write: ALTER TABLE ... ADD COLUMN (on Spark to the record table, its view made again)
    case = CASE["gamma-log-firm-grunfeld"]
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"diag_{tag}", case.frame())
    schema = f"reg_{tag}"
    old = [c for c in W.REGISTRY_TABLES["model"] if c[0] != "diagnostics"]
    reg = indb.api.registry(loader.engine, schema)
    with monkeypatch.context() as m:  # the tables as indb 0.2.0 created them
        m.setitem(W.REGISTRY_TABLES, "model", old)
        record = [*old, ("recorded_at", "TIMESTAMP")]
        m.setattr(registry_append, "MODEL_RECORD_COLUMNS", record)
        m.setitem(registry_append._RECORDS, "model", (registry_append.MODEL_RECORD, record))
        m.setattr(W, "ADDED_REGISTRY_COLUMNS", {})
        reg.ensure()
    columns = loader.engine.describe(f"SELECT * FROM {schema}.model")
    assert "diagnostics" not in [c for c, _ in columns]
    name = f"m_{tag}"
    fit_named(loader.engine, case, table, name, registry_schema=schema, diagnostics=True)
    assert reg.model(name)["diagnostics"] is True
    assert len(view_frame(loader.engine, f"{name}_diagnostics")) == len(case.frame())


def test_nested_on_a_postgres_registry(pg_url: str, pg_con: Any) -> None:
    # statsmodels.datasets.grunfeld; the numbers themselves are checked against statsmodels
    # refits in tests/test_nested.py: here the same test reads a PostgreSQL registry and
    # gives the DuckDB registry's answer
    frame = grunfeld()
    tag = uuid.uuid4().hex[:8]
    pg_load(pg_con, f"grunfeld_{tag}", frame)
    common = {"response": "invest", "family": "gamma", "link": "log", "tol": 1e-13}
    schema = f"reg_{tag}"
    answers = []
    duck = DuckDBEngine(duckdb.connect())
    try:
        Loader("duckdb", duck, None).load(f"grunfeld_{tag}", frame)  # type: ignore[arg-type]
        for engine, kw in ((pg_url, {"registry_schema": schema}), (duck, {})):
            indb.fit(f"grunfeld_{tag}", db=engine, name="small", predictors=["value", "capital"],
                     **common, **kw)  # fmt: skip
            indb.fit(f"grunfeld_{tag}", db=engine, name="big", predictors=["value", "capital",
                     "firm"], **common, **kw)  # fmt: skip
            answers.append(indb.nested("small", "big", db=engine, **kw))
    finally:
        duck.close()
    pg, dk = answers
    assert (pg.test, pg.df, pg.rows) == (dk.test, dk.df, dk.rows) == ("F", 10, 220)
    assert_allclose(
        [pg.deviance_change, pg.statistic, pg.p_value],
        [dk.deviance_change, dk.statistic, dk.p_value],
        rtol=1e-9,
    )
