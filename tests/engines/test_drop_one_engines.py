"""Drop-one likelihood-ratio tests on every engine: DuckDB, PostgreSQL and Spark (in-process).

Two cases on ``statsmodels.datasets.fair`` (as ``reference_cases.fair_rated``): Poisson with
an offset and prior weights (the batch as log-link scans) and logistic (the batch as IRLS
scans, the factor effects from a VALUES table keyed by model id and cell), each with two
categorical and two numeric terms: the CROSS JOIN with the model ids and the GROUP BY model
id on each engine. DuckDB's figures are checked against statsmodels refits in
``tests/test_drop_one.py``; here PostgreSQL and Spark are held to DuckDB's (the same SQL;
only summation order differs), and every engine to statsmodels' refit without ``rating``
(test-only oracle).
"""

from __future__ import annotations

from functools import cache

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from engine_support import Loader
from numpy.testing import assert_allclose
from reference_cases import fair_rated

import indb

PREDICTORS = ["rating", "religious", "age", "educ"]
FITS = {
    "poisson": {"response": "children", "family": "poisson", "offset": "ln(years)",
                "weight": "wt"},
    "binomial": {"response": "had", "family": "binomial"},
}  # fmt: skip


def _fit(case: str, db, source: str) -> indb.FitResult:
    return indb.fit(source, db=db, predictors=PREDICTORS, drop_one=True, tol=1e-13, **FITS[case])


@cache
def duckdb_fit(case: str) -> indb.FitResult:
    con = duckdb.connect()
    try:
        con.register("frame", fair_rated())
        con.execute("CREATE TABLE data AS SELECT * FROM frame")
        return _fit(case, con, "data")
    finally:
        con.close()


def _oracle_kw(case: str, data) -> dict:
    if case == "poisson":
        return {"family": sm.families.Poisson(), "offset": np.log(data["years"]),
                "var_weights": data["wt"]}  # fmt: skip
    return {"family": sm.families.Binomial()}


@pytest.mark.parametrize("case", list(FITS))
def test_drop_one_on_every_engine(loader: Loader, case: str) -> None:
    data = fair_rated()
    source = loader.load("drop_one_fair", data)
    res = _fit(case, loader.engine, source)
    got = {t.term: t for t in res.term_tests}
    assert set(got) == set(PREDICTORS)
    # statsmodels GLM refits (test-only oracle), full and without rating
    y = FITS[case]["response"]
    kw = _oracle_kw(case, data)
    full = smf.glm(f"{y} ~ C(rating) + C(religious) + age + educ", data, **kw).fit(tol=1e-14)
    small = smf.glm(f"{y} ~ C(religious) + age + educ", data, **kw).fit(tol=1e-14)
    assert_allclose(got["rating"].drop_deviance, small.deviance - full.deviance, rtol=1e-7)
    if loader.name == "duckdb":
        return
    duck = {t.term: t for t in duckdb_fit(case).term_tests}
    for term, t in got.items():
        assert t.drop_df == duck[term].drop_df
        assert_allclose(t.drop_deviance, duck[term].drop_deviance, rtol=1e-8, atol=1e-8)
        assert_allclose(t.lr_p_value, duck[term].lr_p_value, rtol=1e-6, atol=1e-300)
