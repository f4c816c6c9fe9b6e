"""Summation accuracy of the engine's aggregates, checked against exactly rounded sums.

The X'WX entries are sums over every row, so their rounding error bounds the accuracy of
the coefficients. References: Python's ``math.fsum`` (exactly rounded, Shewchuk's
algorithm) and numpy's pairwise summation.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from sqlglot import exp

from indb import sqlexpr as S
from indb.engines.duckdb import DuckDBEngine

N = 2_000_000  # large enough for rounding to accumulate, small enough for CI


@pytest.fixture(scope="module")
def values() -> np.ndarray:
    rng = np.random.default_rng(20261202)
    # products like those X'WX accumulates: positive weights times squared predictors,
    # magnitudes spread over several orders
    w = rng.gamma(2.0, 1.0, N)
    x = rng.lognormal(0.0, 2.0, N)
    return w * x * x


def _engine(values: np.ndarray, compensated: bool) -> DuckDBEngine:
    con = duckdb.connect()
    con.register("values_arrow", pa.table({"x": values}))
    con.execute("CREATE TABLE v AS SELECT x FROM values_arrow")
    return DuckDBEngine(con, compensated_sums=compensated)


@pytest.mark.parametrize("compensated", [False, True])
def test_engine_sum_is_close_to_the_exact_sum(values: np.ndarray, compensated: bool) -> None:
    eng = _engine(values, compensated)
    tree = S.select([S.alias(S.psum(S.col("x")), "s")], exp.Table(this=S.ident("v")))
    got = float(eng.fetch_columns(eng.dialect.render(tree))["s"][0])
    exact = math.fsum(values)
    rel = abs(got - exact) / exact
    # plain parallel summation: error grows ~ sqrt(n) * eps in practice (measured 9e-15 at
    # 2e6 rows); 1e-12 leaves room for 10^9-row tables. Compensated: within a few ulps.
    assert rel < (1e-15 if compensated else 1e-12), rel
    # numpy's pairwise sum is a second, independent reference
    assert abs(got - float(np.sum(values))) / exact < 1e-12


def test_compensated_sum_is_rendered_only_when_asked(values: np.ndarray) -> None:
    tree = S.select([S.psum(S.col("x"))], exp.Table(this=S.ident("v")))
    assert "KAHAN_SUM" in _engine(values[:10], True).dialect.render(tree)
    assert "KAHAN_SUM" not in _engine(values[:10], False).dialect.render(tree)
