"""Whole fits on each engine (DuckDB, PostgreSQL, Spark local): NULLs, booleans, a query as the
source, bad responses, spline knots. Data: datasets shipped inside statsmodels (named below);
oracles: statsmodels (test-only) and the DuckDB fit of the same data.
"""

from __future__ import annotations

import warnings

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.datasets as smd
from engine_support import Loader
from numpy.testing import assert_allclose

import indb


def spector_with_gaps() -> pd.DataFrame:
    # statsmodels.datasets.spector (Spector & Mazzeo, 32 students); lower-case names so a
    # hand-written query reads the same on every engine, PSI as BOOLEAN, and the GPA of two
    # students blanked to exercise NULL exclusion.
    d = smd.spector.load_pandas().data
    out = pd.DataFrame(
        {
            "grade": d["GRADE"].astype("int64"),
            "gpa": d["GPA"].astype("Float64"),
            "tuce": d["TUCE"].astype("int64"),
            "psi": d["PSI"].astype(bool),
        }
    )
    out.loc[[3, 17], "gpa"] = pd.NA
    return out


def test_nulls_booleans_and_a_query_source(loader: Loader) -> None:
    frame = spector_with_gaps()
    loader.load("spector_gaps", frame)
    res = indb.fit(
        "SELECT * FROM spector_gaps WHERE tuce > 0",  # every row; a query as the source
        "grade",
        "binomial",
        db=loader.engine,
        tol=1e-13,
    )
    assert res.n_used == 30 and res.n_excluded == 2
    assert res.excluded_by_column == {"gpa": 2}
    # contract: booleans are categorical with levels "false"/"true"; reference = most
    # frequent (18 students without PSI)
    assert res.terms == ["intercept", "gpa", "tuce", "psi=true"]
    kept = frame.dropna()
    x = np.column_stack(
        [np.ones(len(kept)), kept["gpa"].astype(float), kept["tuce"], kept["psi"].astype(float)]
    )
    sm_res = sm.GLM(kept["grade"].to_numpy(float), x, family=sm.families.Binomial()).fit(
        tol=1e-14, maxiter=100
    )  # statsmodels (test-only oracle)
    assert_allclose(res.estimates, sm_res.params, rtol=1e-8)  # issue 18: 1e-8 relative
    assert_allclose(res.std_errors, sm_res.bse, rtol=1e-7)
    assert_allclose(res.deviance, sm_res.deviance, rtol=1e-8)


def test_infinite_response_is_rejected(loader: Loader) -> None:
    # statsmodels.datasets.scotland with one YES share replaced by +Infinity (bad input)
    d = smd.scotland.load_pandas().data[["YES", "COUTAX", "UNEMPF"]].copy()
    d = d.rename(columns=str.lower)
    d.loc[5, "yes"] = np.inf
    loader.load("scotland_inf", d)
    with pytest.raises(indb.SpecError, match=r"response column 'yes' is NaN or infinite in 1 of"):
        indb.fit("scotland_inf", "yes", "gamma", db=loader.engine)


def rcs_basis(x: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Restricted cubic spline basis (Harrell, Regression Modeling Strategies, 2.4.5)."""
    k = len(t)
    cols = []
    for j in range(k - 2):
        p = lambda c: np.maximum(x - c, 0.0) ** 3  # noqa: E731
        cols.append(
            p(t[j])
            - p(t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
            + p(t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2])
        )
    return np.column_stack(cols)


def test_spline_knots_and_fit(loader: Loader) -> None:
    # statsmodels.datasets.engel: food expenditure against income (235 households)
    d = smd.engel.load_pandas().data
    loader.load("engel", d)
    res = indb.fit("engel", "foodexp", db=loader.engine, splines={"income": 4}, tol=1e-13)
    # knots at the 5/35/65/95% quantiles (Harrell's default, common practice), linear
    # interpolation between order statistics as numpy.quantile does (test-only oracle)
    want_knots = np.quantile(d["income"], [0.05, 0.35, 0.65, 0.95])
    assert_allclose(res.design["knots"]["income"], want_knots, rtol=1e-14)
    # the same least-squares fit by statsmodels on a numpy spline basis: the deviance does
    # not depend on how the basis is scaled
    x = np.column_stack(
        [np.ones(len(d)), d["income"], rcs_basis(d["income"].to_numpy(), want_knots)]
    )
    ols = sm.OLS(d["foodexp"].to_numpy(), x).fit()
    assert_allclose(res.deviance, ols.ssr, rtol=1e-8)
    con = duckdb.connect()
    con.register("engel", d)
    ref = indb.fit("engel", "foodexp", db=con, splines={"income": 4}, tol=1e-13)
    con.close()
    assert res.terms == ref.terms
    assert_allclose(res.estimates, ref.estimates, rtol=1e-9)
    assert_allclose(res.std_errors, ref.std_errors, rtol=1e-9)


def test_double_column_declared_categorical_has_the_same_level_names(loader: Loader) -> None:
    # statsmodels.datasets.fair: rate_marriage is a DOUBLE (1.0 .. 5.0) declared categorical;
    # the level names are DuckDB's text of the double ('4.0') on every engine (PostgreSQL
    # writes 4.0 as '4', so its dialect appends '.0')
    d = smd.fair.load_pandas().data
    frame = pd.DataFrame(
        {"children": d["children"].round().astype("int64"), "rating": d["rate_marriage"]}
    )
    loader.load("fair_rating", frame)
    res = indb.fit(
        "fair_rating", "children", "poisson", db=loader.engine, categorical=["rating"], tol=1e-13
    )
    levels = sorted(f"{v:.1f}" for v in frame["rating"].unique())
    used = [t.split("=")[1] for t in res.terms[1:]]
    assert res.terms[1:] == [f"rating={v}" for v in used] and set(used) < set(levels)
    assert len(used) == len(levels) - 1  # every level but the reference
    # statsmodels (test-only oracle) on the same dummies
    dummies = pd.get_dummies(frame["rating"].map(lambda v: f"{v:.1f}"), dtype=float)
    x = np.column_stack([np.ones(len(frame)), dummies[used]])
    sm_res = sm.GLM(frame["children"].to_numpy(float), x, family=sm.families.Poisson()).fit(
        tol=1e-14, maxiter=100
    )
    assert_allclose(res.estimates, sm_res.params, rtol=1e-8, atol=1e-10)
    assert_allclose(res.std_errors, sm_res.bse, rtol=1e-7)


def test_sample_start_on_each_engine(loader: Loader, monkeypatch: pytest.MonkeyPatch) -> None:
    # statsmodels.datasets.fair (6366 respondents): the sample start's hashed pick (each
    # engine's own hash function) and temporary table, then IRLS on the whole table; the
    # answer is statsmodels' GLM (test-only oracle) whatever rows the hash picked
    from indb import sample_start

    monkeypatch.setattr(sample_start, "SAMPLE_START_ROWS", 1000)
    d = smd.fair.load_pandas().data
    frame = pd.DataFrame(
        {
            "rating": d["rate_marriage"].astype(int).astype(str),
            "educ": d["educ"].astype(float),
            "years": d["yrs_married"].astype(float),
            "children": d["children"].round().astype("int64"),
        }
    )
    loader.load("fair_sample", frame)
    res = indb.fit(
        "fair_sample",
        "children",
        "poisson",
        db=loader.engine,
        offset="ln(years)",
        categorical=["rating"],
        sample_start="always",
        compress="never",
        tol=1e-12,
    )
    assert "-row sample fit" in res.path, res.path
    X = pd.DataFrame({"intercept": np.ones(len(frame))})
    for term in res.terms[1:]:
        col, _, level = term.partition("=")
        X[term] = (frame[col] == level).astype(float) if level else frame[col]
    ref = sm.GLM(
        frame["children"].astype(float),
        X,
        family=sm.families.Poisson(),
        offset=np.log(frame["years"]),
    ).fit(tol=1e-13)
    assert_allclose(res.estimates, ref.params, rtol=1e-8, atol=1e-10)
    assert_allclose(res.std_errors, ref.bse, rtol=1e-7)
    assert_allclose(res.deviance, ref.deviance, rtol=1e-10)
    assert_allclose(res.null_deviance, ref.null_deviance, rtol=1e-10)


# -- extreme magnitudes and weights (issue 11): the rescaled SQL on every engine ---------------


def spector_magnitudes() -> pd.DataFrame:
    # statsmodels.datasets.spector with a response 1e13 + {0, 0.125}, a response 1e200 times
    # TUCE/100, a predictor GPA * 1e160 and a constant weight 1e50 (lower-case names)
    d = smd.spector.load_pandas().data
    return pd.DataFrame(
        {
            "far": 1e13 + 0.125 * d["GRADE"],
            "huge": 1e200 * d["TUCE"] / 100.0,
            "tuce": d["TUCE"].astype(float),
            "gpa": d["GPA"],
            "bigx": d["GPA"] * 1e160,
            "psi": d["PSI"].astype(float),
            "w": 1e50,
        }
    )


def test_extreme_magnitudes_on_every_engine(loader: Loader) -> None:
    # Oracles: statsmodels (test-only) on the data without the magnitude (each checked
    # against exact rational arithmetic in tests/robustness/test_magnitudes.py): OLS on
    # far - 1e13 (exact in doubles); gamma-log GLM on TUCE/100 (the intercept moves by
    # ln 1e200); OLS on GPA (the slope scales by 1e-160); Poisson with unit weights.
    d = spector_magnitudes()
    loader.load("magnitudes", d)
    x = sm.add_constant(d[["gpa", "psi"]])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        far = indb.fit("magnitudes", "far", db=loader.engine, predictors=["gpa", "psi"], tol=1e-13)
        huge = indb.fit(
            "magnitudes",
            "huge",
            "gamma",
            "log",
            db=loader.engine,
            predictors=["gpa", "psi"],
            tol=1e-13,
        )
        bigx = indb.fit(
            "magnitudes", "tuce", db=loader.engine, predictors=["bigx", "psi"], tol=1e-13
        )
        wide = indb.fit(
            "magnitudes",
            "tuce",
            "poisson",
            db=loader.engine,
            predictors=["gpa", "psi"],
            weight="w",
            tol=1e-13,
        )
    ols = sm.OLS((d["far"] - 1e13).to_numpy(), x).fit()
    assert_allclose(far.estimates[1:], ols.params.to_numpy()[1:], rtol=1e-9)
    assert_allclose(far.std_errors, ols.bse.to_numpy(), rtol=1e-9)
    assert_allclose(far.dispersion, ols.scale, rtol=1e-9)
    tight = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}
    gam = sm.GLM(d["tuce"] / 100.0, x, family=sm.families.Gamma(sm.families.links.Log())).fit(
        **tight
    )
    assert_allclose(huge.estimates, gam.params.to_numpy() + [np.log(1e200), 0, 0], rtol=1e-8)
    assert_allclose(huge.std_errors, gam.bse.to_numpy(), rtol=1e-7)
    lin = sm.OLS(d["tuce"].to_numpy(), x).fit()
    assert_allclose(bigx.coef("bigx").estimate, lin.params["gpa"] / 1e160, rtol=1e-9)
    assert_allclose(bigx.coef("bigx").std_error, lin.bse["gpa"] / 1e160, rtol=1e-9)
    poi = sm.GLM(d["tuce"], x, family=sm.families.Poisson()).fit(**tight)
    assert wide.converged
    assert_allclose(wide.estimates, poi.params.to_numpy(), rtol=1e-9)
    assert_allclose(wide.std_errors, poi.bse.to_numpy() / 1e25, rtol=1e-8)


RANDOM_ROWS = {
    "duckdb": "SELECT * FROM coin WHERE random() < 0.5",
    "postgres": "SELECT * FROM coin WHERE random() < 0.5",
    "spark-local": "SELECT * FROM coin WHERE rand() < 0.5",
}


def test_source_with_random_rows_is_named_on_every_engine(loader: Loader) -> None:
    # 4,000 rows of which a random half is read each time: every IRLS scan must count the
    # rows the profile counted. statsmodels.datasets.spector repeated 125 times.
    d = smd.spector.load_pandas().data
    frame = pd.concat([d] * 125, ignore_index=True).rename(columns=str.lower)
    loader.load("coin", frame)
    with pytest.raises(indb.SpecError, match=r"the source is not deterministic: IRLS scan"):
        indb.fit(RANDOM_ROWS[loader.name], "grade", "binomial", db=loader.engine)
