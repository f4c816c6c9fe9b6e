"""Robust and cluster-robust fits on every engine: DuckDB, PostgreSQL and Spark (in-process).

The same cases as ``tests/test_covariance.py`` (``covariance_cases``; datasets shipped in
statsmodels, named there), each checked against statsmodels' GLM with ``cov_type="HC0"`` /
``"cluster"`` (test-only oracle) to 1e-8, and PostgreSQL and Spark against DuckDB to 1e-9
(the same SQL; only summation order differs). The cases cover the robust meat carried by
the last IRLS scan (log link), the cluster scan with and without factor cells, a cluster
expression, the observed information of a non-canonical link, and the compressed route.
"""

from __future__ import annotations

from functools import cache
from typing import Any

import duckdb
import numpy as np
import pytest
from covariance_cases import CASES_BY_ID, CovCase, covariance_gap, statsmodels_fit
from engine_support import Loader, record_spread
from numpy.testing import assert_allclose

import indb

CASE_IDS = [
    "gaussian-grunfeld-firm-effects-cluster-year",
    "poisson-fair-offset-robust",
    "poisson-fair-offset-cluster-expression",
    "binomial-fair-probit-cluster",
    "poisson-fair-offset-folded-robust",
    "poisson-fair-offset-folded-cluster",
    "gamma-fair-log-cluster",
]
RTOL_ORACLE = 1e-8
RTOL_ENGINE = 1e-9


def _fit(case: CovCase, db: Any, source: str) -> indb.FitResult:
    return indb.fit(source, db=db, tol=case.tol, **case.fit)


@cache
def duckdb_fit(case_id: str) -> indb.FitResult:
    case = CASES_BY_ID[case_id]
    con = duckdb.connect()
    try:
        con.register("frame", case.load())
        con.execute("CREATE TABLE data AS SELECT * FROM frame")
        return _fit(case, con, "data")
    finally:
        con.close()


@cache
def oracle(case_id: str) -> dict[str, np.ndarray]:
    case = CASES_BY_ID[case_id]
    return statsmodels_fit(case, case.load())


@pytest.mark.parametrize("case_id", CASE_IDS)
def test_covariance_on_every_engine(loader: Loader, case_id: str) -> None:
    case = CASES_BY_ID[case_id]
    source = loader.load("cov_" + case_id.replace("-", "_"), case.load())
    res = _fit(case, loader.engine, source)
    ref = oracle(case_id)
    assert res.converged and res.covariance_kind == case.kind
    # statsmodels GLM, cov_type="HC0" / "cluster" (test-only oracle)
    assert_allclose(res.std_errors, ref["bse"], rtol=RTOL_ORACLE)
    assert covariance_gap(res.covariance, ref["cov"]) < 2 * RTOL_ORACLE
    if case.kind == "cluster":
        assert res.clusters == len(np.unique(case.groups(case.load())))
    assert [r.phase for r in res.iteration_log].count("covariance") == (
        1 if case.kind == "cluster" else 0
    )
    if loader.name == "duckdb":
        return
    duck = duckdb_fit(case_id)
    record_spread(loader.name, "covariance se", float(np.max(
        np.abs(res.std_errors / duck.std_errors - 1)
    )), case_id)  # fmt: skip
    assert res.terms == duck.terms and res.clusters == duck.clusters
    assert_allclose(res.std_errors, duck.std_errors, rtol=RTOL_ENGINE)
    assert covariance_gap(res.covariance, duck.covariance) < 2 * RTOL_ENGINE
