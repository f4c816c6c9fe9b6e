"""Drop-one likelihood-ratio tests on every engine: DuckDB, PostgreSQL and Spark (in-process).

One case (``statsmodels.datasets.fair`` as ``reference_cases.fair_rated``: Poisson with an
offset, prior weights, two categorical and two numeric terms): the batch scan's VALUES
tables keyed by model id and levels, the CROSS JOIN and the GROUP BY model id on each
engine. DuckDB's figures are checked against statsmodels refits in ``tests/test_drop_one.py``;
here PostgreSQL and Spark are held to DuckDB's (the same SQL; only summation order differs),
and every engine to statsmodels' refit without ``rating`` (test-only oracle).
"""

from __future__ import annotations

from functools import cache

import duckdb
import numpy as np
import statsmodels.api as sm
import statsmodels.formula.api as smf
from engine_support import Loader
from numpy.testing import assert_allclose
from reference_cases import fair_rated

import indb

FIT = {
    "response": "children",
    "family": "poisson",
    "predictors": ["rating", "religious", "age", "educ"],
    "offset": "ln(years)",
    "weight": "wt",
    "drop_one": True,
    "tol": 1e-13,
}


@cache
def duckdb_fit() -> indb.FitResult:
    con = duckdb.connect()
    try:
        con.register("frame", fair_rated())
        con.execute("CREATE TABLE data AS SELECT * FROM frame")
        return indb.fit("data", db=con, **FIT)
    finally:
        con.close()


def test_drop_one_on_every_engine(loader: Loader) -> None:
    data = fair_rated()
    source = loader.load("drop_one_fair", data)
    res = indb.fit(source, db=loader.engine, **FIT)
    got = {t.term: t for t in res.term_tests}
    assert set(got) == {"rating", "religious", "age", "educ"}
    # statsmodels GLM refits (test-only oracle), full and without rating
    kw = {"family": sm.families.Poisson(), "offset": np.log(data["years"]),
          "var_weights": data["wt"]}  # fmt: skip
    full = smf.glm("children ~ C(rating) + C(religious) + age + educ", data, **kw).fit(tol=1e-14)
    small = smf.glm("children ~ C(religious) + age + educ", data, **kw).fit(tol=1e-14)
    assert_allclose(got["rating"].drop_deviance, small.deviance - full.deviance, rtol=1e-7)
    if loader.name == "duckdb":
        return
    duck = {t.term: t for t in duckdb_fit().term_tests}
    for term, t in got.items():
        assert t.drop_df == duck[term].drop_df
        assert_allclose(t.drop_deviance, duck[term].drop_deviance, rtol=1e-8, atol=1e-8)
        assert_allclose(t.lr_p_value, duck[term].lr_p_value, rtol=1e-6, atol=1e-300)
