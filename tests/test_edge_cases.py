"""Edge cases of the in-database fit, each compared with statsmodels (test-only oracle).

Datasets ship inside PyPI packages (named beside each loader): ``statsmodels.datasets``
(fair, spector, engel) and ``sklearn.datasets.load_diabetes``. Edge conditions (NULLs, zero
weights, collinear columns, odd identifiers and levels, ...) are derived from those columns.
Each test uses a fresh in-memory DuckDB database and fits with ``tol=1e-13`` so that the
comparison is limited by the oracle tolerances below, not by the stopping rule.

Conventions where indb deliberately differs from statsmodels are noted where they matter:
rows with zero prior weight are kept but do not count in the residual degrees of freedom
(R's convention; statsmodels counts every row), and the null deviance is always that of the
intercept-only model (statsmodels' convention, also without an intercept).
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.datasets as smd
from numpy.testing import assert_allclose
from reference_cases import design_matrix
from sklearn.datasets import load_diabetes, load_iris

import indb

# Oracle tolerances: indb and statsmodels solve the same likelihood equations; agreement is
# limited by the two convergence tolerances. The deviance is stationary at the optimum.
RTOL_COEF = 1e-8
RTOL_SE = 1e-7
RTOL_DEV = 1e-8
# a coefficient near 0 cannot meet a relative tolerance; 1e-7 of its standard error is
# statistically invisible (same choice as test_reference_statsmodels)
ATOL_COEF_IN_SE = 1e-8
TOL = 1e-13

# statsmodels IRLS stopped on the coefficients at a tight tolerance (as in reference_cases).
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}
F = sm.families


# ---------------------------------------------------------------------------------------------
# Data (all shipped inside the statsmodels / scikit-learn wheels)
# ---------------------------------------------------------------------------------------------
def diabetes() -> pd.DataFrame:
    # sklearn.datasets.load_diabetes(scaled=False): 442 patients, raw features; sex coded 1/2.
    df = load_diabetes(as_frame=True, scaled=False).frame
    cols = ["target", "age", "sex", "bmi", "bp", "s1", "s5"]
    return df[cols].assign(sex=df["sex"].astype("int64")).reset_index(drop=True)


def fair() -> pd.DataFrame:
    # statsmodels.datasets.fair: 1974 Redbook survey on extramarital affairs (6366 rows);
    # rate_marriage (1-5) and religious (1-4) are integer codes.
    df = smd.fair.load_pandas().data
    return pd.DataFrame(
        {
            "had_affair": (df["affairs"] > 0).astype("int64"),
            "rate_marriage": df["rate_marriage"].astype("int64"),
            "religious": df["religious"].astype("int64"),
            "age": df["age"],
            "children": df["children"],
        }
    )


def spector() -> pd.DataFrame:
    # statsmodels.datasets.spector: Spector & Mazzeo grade improvement after PSI (32 rows).
    return smd.spector.load_pandas().data[["GRADE", "GPA", "TUCE", "PSI"]].reset_index(drop=True)


def engel() -> pd.DataFrame:
    # statsmodels.datasets.engel: household food expenditure vs income (235 rows).
    return smd.engel.load_pandas().data[["foodexp", "income"]].reset_index(drop=True)


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    c = duckdb.connect()
    yield c
    c.close()


def load(con: duckdb.DuckDBPyConnection, name: str, frame: pd.DataFrame) -> None:
    """Copy a DataFrame into table ``name`` (quoted as an identifier)."""
    con.register("frame_to_load", frame)
    quoted = '"' + name.replace('"', '""') + '"'
    con.execute(f"CREATE TABLE {quoted} AS SELECT * FROM frame_to_load")
    con.unregister("frame_to_load")


# ---------------------------------------------------------------------------------------------
# Oracle
# ---------------------------------------------------------------------------------------------
def sm_fit(y: Any, X: pd.DataFrame, family: Any, **kwargs: Any) -> Any:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.DomainWarning)
        res = sm.GLM(np.asarray(y, dtype=float), X, family=family, **kwargs).fit(**SM_FIT)
    assert res.converged
    return res


def assert_matches(res: indb.FitResult, ref: Any, terms: Sequence[str] | None = None) -> None:
    """Coefficients, standard errors and deviance of ``res`` against a statsmodels fit whose
    exog columns carry indb term names."""
    terms = list(ref.params.index) if terms is None else list(terms)
    for term in terms:
        c = res.coef(term)
        se = float(ref.bse[term])
        assert_allclose(
            c.estimate, ref.params[term], rtol=RTOL_COEF, atol=ATOL_COEF_IN_SE * se, err_msg=term
        )
        assert_allclose(c.std_error, se, rtol=RTOL_SE, err_msg=term)
    assert_allclose(res.deviance, ref.deviance, rtol=RTOL_DEV)


# ---------------------------------------------------------------------------------------------
# NULLs, zero weights
# ---------------------------------------------------------------------------------------------
def test_null_rows_are_excluded_and_counted(con: duckdb.DuckDBPyConnection) -> None:
    frame = diabetes().assign(rid=np.arange(442))
    load(con, "diabetes", frame)
    nulls = {"target": [301], "sex": [400], "bmi": [3, 17, 99], "bp": [17, 200]}
    for column, rows in nulls.items():
        con.execute(f"UPDATE diabetes SET {column} = NULL WHERE list_contains(?, rid)", [rows])
    # NULLs in a column the model does not use exclude nothing
    con.execute("UPDATE diabetes SET s1 = NULL WHERE rid IN (5, 6, 7)")

    res = indb.fit(
        "diabetes",
        "target",
        db=con,
        exclude=["rid", "s1", "s5"],
        categorical=["sex"],
        tol=TOL,
    )
    dropped = sorted({r for rows in nulls.values() for r in rows})
    assert res.n_excluded == len(dropped) == 6
    assert res.n_used == 442 - 6
    assert res.excluded_by_column == {"target": 1, "sex": 1, "bmi": 3, "bp": 2}

    kept = frame.drop(index=dropped)
    X = design_matrix(kept, ["age", "sex", "bmi", "bp"], categorical=["sex"])
    ref = sm_fit(kept["target"], X, F.Gaussian())
    assert res.terms == list(X.columns)
    assert_matches(res, ref)
    assert res.residual_df == ref.df_resid


def test_zero_prior_weights_keep_rows_without_influence(con: duckdb.DuckDBPyConnection) -> None:
    # statsmodels.datasets.engel with prior weight 1/income (variance proportional to income);
    # every 20th household gets weight 0.
    frame = engel()
    w = 1.0 / frame["income"].to_numpy()
    w[::20] = 0.0
    frame = frame.assign(w=w)
    load(con, "engel", frame)
    res = indb.fit("engel", "foodexp", db=con, weight="w", tol=TOL)

    n_zero = int((w == 0).sum())
    assert n_zero == 12
    assert res.n_used == 235 and res.n_excluded == 0  # zero-weight rows are kept
    # Oracle: the same model without the zero-weight rows. indb drops zero-weight rows from
    # the residual df (as R does); statsmodels with zero var_weights would count them.
    pos = frame[frame["w"] > 0]
    X = design_matrix(pos, ["income"])
    ref = sm_fit(pos["foodexp"], X, F.Gaussian(), var_weights=pos["w"].to_numpy())
    assert_matches(res, ref)
    assert res.residual_df == ref.df_resid == 235 - n_zero - 2
    assert_allclose(res.dispersion, ref.scale, rtol=RTOL_COEF)
    # no influence: statsmodels on all rows with the zero weights gives the same estimates
    full = sm_fit(frame["foodexp"], design_matrix(frame, ["income"]), F.Gaussian(), var_weights=w)
    assert_allclose(res.estimates, full.params, rtol=RTOL_COEF)


# ---------------------------------------------------------------------------------------------
# Collinearity
# ---------------------------------------------------------------------------------------------
def test_exactly_collinear_column_is_aliased(con: duckdb.DuckDBPyConnection) -> None:
    base = diabetes()[["target", "bmi", "bp", "s5"]]
    frame = base.assign(combo=2.0 * base["bmi"] - base["bp"])  # x3 = 2 x1 - x2
    load(con, "diabetes", frame)
    with pytest.warns(indb.AliasingWarning, match="combo"):
        res = indb.fit("diabetes", "target", db=con, tol=TOL)

    assert res.aliased_terms == ("combo",)
    combo = res.coef("combo")
    assert combo.aliased and np.isnan(combo.estimate) and np.isnan(combo.std_error)
    # the other coefficients: statsmodels on the reduced design
    X = design_matrix(frame, ["bmi", "bp", "s5"])
    ref = sm_fit(frame["target"], X, F.Gaussian())
    assert_matches(res, ref)
    assert res.residual_df == ref.df_resid == 442 - 4
    assert_allclose(res.dispersion, ref.scale, rtol=RTOL_COEF)


def test_nearly_collinear_column_reports_condition_number(
    con: duckdb.DuckDBPyConnection,
) -> None:
    base = diabetes()
    # bmi plus a small multiple of a column outside the model (s1, total serum cholesterol):
    # nearly, but not exactly, a copy of bmi
    frame = base.assign(near=base["bmi"] + 1e-4 * base["s1"])[["target", "bmi", "bp", "s5", "near"]]
    load(con, "diabetes", frame)
    with warnings.catch_warnings():
        warnings.simplefilter("error", indb.AliasingWarning)  # still estimable: no aliasing
        res = indb.fit("diabetes", "target", db=con, tol=TOL)
    assert res.aliased_terms == ()

    # numpy oracle: condition number of the correlation-scaled information matrix of the
    # centred design, i.e. of diag(1, R) with R the correlation matrix of the predictors
    R = np.corrcoef(frame[["bmi", "bp", "s5", "near"]].to_numpy().T)
    ev = np.concatenate([[1.0], np.linalg.eigvalsh(R)])
    cond = ev.max() / ev.min()
    assert cond > 1e6
    assert_allclose(res.condition_number, cond, rtol=1e-4)

    X = design_matrix(frame, ["bmi", "bp", "s5", "near"])
    ref = sm_fit(frame["target"], X, F.Gaussian())
    assert_matches(res, ref)


def test_well_conditioned_design_has_small_condition_number(
    con: duckdb.DuckDBPyConnection,
) -> None:
    frame = diabetes()[["target", "bmi", "bp", "s5"]]
    load(con, "diabetes", frame)
    res = indb.fit("diabetes", "target", db=con, tol=TOL)
    ev = np.concatenate([[1.0], np.linalg.eigvalsh(np.corrcoef(frame.iloc[:, 1:].to_numpy().T))])
    assert_allclose(res.condition_number, ev.max() / ev.min(), rtol=1e-6)
    assert res.condition_number < 10


# ---------------------------------------------------------------------------------------------
# Identifiers and levels
# ---------------------------------------------------------------------------------------------
ODD_RELIGIOUS = {1: "it's", 2: "a;b", 3: "x -- y", 4: "line\nbreak"}
ODD_RATING = {1: "très mauvais", 2: "mauvais", 3: "'); DROP TABLE t; --", 4: "bon", 5: "très bon ✓"}


def test_quoted_and_unicode_identifiers_and_levels(con: duckdb.DuckDBPyConnection) -> None:
    f = fair()
    frame = pd.DataFrame(
        {
            'claim "count"': f["had_affair"],
            "région": f["age"],
            "select": f["religious"].map(ODD_RELIGIOUS),
            "ünï cødé": f["rate_marriage"].map(ODD_RATING),
            "yrs of kids": f["children"],
        }
    )
    load(con, 'my "odd" table', frame)
    source = '"my ""odd"" table"'  # the table name as a quoted SQL identifier
    res = indb.fit(source, 'claim "count"', "binomial", db=con, tol=TOL)

    predictors = ["région", "select", "ünï cødé", "yrs of kids"]
    X = design_matrix(frame, predictors)
    ref = sm_fit(frame['claim "count"'], X, F.Binomial())
    # term names carry column names and levels verbatim
    assert res.terms == list(X.columns)
    assert "select=line\nbreak" in res.terms and "ünï cødé='); DROP TABLE t; --" in res.terms
    assert_matches(res, ref)
    # the level text "'); DROP TABLE t; --" stayed data
    assert con.execute(f"SELECT count(*) FROM {source}").fetchone() == (len(frame),)


def test_odd_names_in_expressions_and_options(con: duckdb.DuckDBPyConnection) -> None:
    # Quoted identifiers inside user SQL expressions and option lists.
    f = engel()
    frame = pd.DataFrame(
        {"food €": f["foodexp"], "income (BEF)": f["income"], "w'eight": 1.0 / f["income"]}
    )
    load(con, "engel", frame)
    res = indb.fit("engel", "food €", db=con, weight='"w\'eight"', tol=TOL)
    X = design_matrix(frame, ["income (BEF)"])
    ref = sm_fit(frame["food €"], X, F.Gaussian(), var_weights=frame["w'eight"].to_numpy())
    assert res.terms == ["intercept", "income (BEF)"]
    assert_matches(res, ref)


# ---------------------------------------------------------------------------------------------
# Types: BOOLEAN response, BOOLEAN and ENUM predictors, integers forced categorical
# ---------------------------------------------------------------------------------------------
def test_boolean_response_for_binomial(con: duckdb.DuckDBPyConnection) -> None:
    frame = spector()
    load(con, "spector", frame)
    res = indb.fit(
        "SELECT GRADE = 1 AS passed, GPA, TUCE, PSI FROM spector",
        "passed",
        "binomial",
        db=con,
        tol=TOL,
    )
    X = design_matrix(frame, ["GPA", "TUCE", "PSI"])
    ref = sm_fit(frame["GRADE"], X, F.Binomial())
    assert res.terms == list(X.columns)
    assert_matches(res, ref)


def test_boolean_and_enum_predictors_are_categorical(con: duckdb.DuckDBPyConnection) -> None:
    f = fair()
    religion = f["religious"].map({1: "none", 2: "slightly", 3: "fairly", 4: "strongly"})
    frame = pd.DataFrame(
        {
            "had_affair": f["had_affair"],
            "has_children": f["children"] > 0,
            "religion": religion,
            "age": f["age"],
        }
    )
    load(con, "fair_raw", frame)
    con.execute("CREATE TYPE devotion AS ENUM ('none', 'slightly', 'fairly', 'strongly')")
    con.execute(
        "CREATE TABLE fair AS SELECT had_affair, has_children, "
        "CAST(religion AS devotion) AS religion, age FROM fair_raw"
    )
    types = dict(con.execute("SELECT column_name, column_type FROM (DESCRIBE fair)").fetchall())
    assert types["has_children"] == "BOOLEAN" and types["religion"].startswith("ENUM")

    res = indb.fit("fair", "had_affair", "binomial", db=con, tol=TOL)
    # contract: levels as text (booleans 'true'/'false'), ascending string order, reference
    # the most frequent level
    X = design_matrix(frame, ["has_children", "religion", "age"], categorical=["has_children"])
    ref = sm_fit(frame["had_affair"], X, F.Binomial())
    assert res.terms == list(X.columns)
    assert "has_children=false" in res.terms  # 'true' (children > 0) is the most frequent
    assert_matches(res, ref)


@pytest.mark.parametrize("reference", [None, {"rate_marriage": "1"}])
def test_integer_column_forced_categorical(
    con: duckdb.DuckDBPyConnection, reference: dict[str, str] | None
) -> None:
    frame = fair()[["had_affair", "rate_marriage", "age"]]
    load(con, "fair", frame)
    res = indb.fit(
        "fair",
        "had_affair",
        "binomial",
        db=con,
        categorical=["rate_marriage"],
        reference=reference,
        tol=TOL,
    )
    X = design_matrix(
        frame, ["rate_marriage", "age"], categorical=["rate_marriage"], reference=reference
    )
    ref = sm_fit(frame["had_affair"], X, F.Binomial())
    assert res.terms == list(X.columns)
    # default reference: the most frequent rating (5); overridden: 1
    dropped = "1" if reference else "5"
    assert f"rate_marriage={dropped}" not in res.terms
    assert_matches(res, ref)


@pytest.mark.parametrize(
    "selection",
    [{"predictors": ["age", "religious"]}, {"exclude": ["rate_marriage", "children"]}],
    ids=["predictors", "exclude"],
)
def test_predictors_and_exclude_select_columns(
    con: duckdb.DuckDBPyConnection, selection: dict[str, list[str]]
) -> None:
    frame = fair()
    load(con, "fair", frame)
    res = indb.fit(
        "fair", "had_affair", "binomial", db=con, categorical=["religious"], tol=TOL, **selection
    )
    # contract: terms follow the source's column order, not the order listed
    X = design_matrix(frame, ["religious", "age"], categorical=["religious"])
    ref = sm_fit(frame["had_affair"], X, F.Binomial())
    assert res.terms == list(X.columns)
    assert_matches(res, ref)


def test_no_intercept_keeps_full_dummy_set_of_first_factor(
    con: duckdb.DuckDBPyConnection,
) -> None:
    frame = fair()[["had_affair", "rate_marriage", "religious", "age"]]
    load(con, "fair", frame)
    res = indb.fit(
        "fair",
        "had_affair",
        "binomial",
        db=con,
        intercept=False,
        categorical=["rate_marriage", "religious"],
        tol=TOL,
    )
    # design built here: every level of the first factor, treatment coding for the second
    cols: dict[str, np.ndarray] = {}
    for lvl in sorted(frame["rate_marriage"].astype(str).unique()):
        cols[f"rate_marriage={lvl}"] = (frame["rate_marriage"].astype(str) == lvl).to_numpy(float)
    treat = design_matrix(frame, ["religious"], categorical=["religious"], intercept=False)
    X = pd.concat([pd.DataFrame(cols, index=frame.index), treat, frame[["age"]]], axis=1)
    ref = sm_fit(frame["had_affair"], X, F.Binomial())
    assert res.terms == list(X.columns)
    assert_matches(res, ref)
    # null deviance: intercept-only model even without an intercept (statsmodels' convention)
    assert_allclose(res.null_deviance, ref.null_deviance, rtol=RTOL_DEV)
    assert res.residual_df == ref.df_resid


# ---------------------------------------------------------------------------------------------
# Restricted cubic spline
# ---------------------------------------------------------------------------------------------
def rcs_basis(x: np.ndarray, knots: np.ndarray) -> np.ndarray:
    """Restricted cubic spline basis, nonlinear part, written from the published formula.

    Harrell, *Regression Modeling Strategies* (2nd ed.), section 2.4.5: for knots
    t_1 < ... < t_k and j = 1 .. k-2,
    X_{j+1} = (x - t_j)_+^3 - (x - t_{k-1})_+^3 (t_k - t_j)/(t_k - t_{k-1})
              + (x - t_k)_+^3 (t_{k-1} - t_j)/(t_k - t_{k-1}),
    here divided by (t_k - t_1)^2 so the basis has the units of x (the normalisation of
    Harrell's rcspline.eval, norm=2).
    """
    t = np.asarray(knots, dtype=float)
    k = len(t)

    def cube(c: float) -> np.ndarray:
        return np.maximum(x - c, 0.0) ** 3

    out = []
    for j in range(k - 2):
        b = (
            cube(t[j])
            - cube(t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
            + cube(t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2])
        )
        out.append(b / (t[k - 1] - t[0]) ** 2)
    return np.column_stack(out)


def test_restricted_cubic_spline_matches_numpy_basis(con: duckdb.DuckDBPyConnection) -> None:
    frame = diabetes()[["target", "bmi", "bp"]]
    load(con, "diabetes", frame)
    res = indb.fit(
        "diabetes", "target", db=con, predictors=["bmi", "bp"], splines={"bmi": 4}, tol=TOL
    )
    x = frame["bmi"].to_numpy()
    # Harrell's default knot quantiles for 4 knots (common practice); DuckDB quantile_cont is
    # linear interpolation between order statistics = numpy's default "linear" method
    knots = np.quantile(x, [0.05, 0.35, 0.65, 0.95], method="linear")
    basis = rcs_basis(x, knots)
    X = pd.DataFrame(
        {
            "intercept": 1.0,
            "bp": frame["bp"],
            "bmi": x,
            "bmi spline 1": basis[:, 0],
            "bmi spline 2": basis[:, 1],
        }
    )
    ref = sm_fit(frame["target"], X, F.Gaussian())
    assert sorted(res.terms) == sorted(X.columns)
    assert_matches(res, ref)


# ---------------------------------------------------------------------------------------------
# Sources: a SELECT query and a CSV file
# ---------------------------------------------------------------------------------------------
def test_source_as_select_query(con: duckdb.DuckDBPyConnection) -> None:
    frame = diabetes()
    load(con, "diabetes", frame)
    res = indb.fit(
        "SELECT target, bmi, bp, s5 FROM diabetes WHERE age >= 40",
        "target",
        "gamma",
        "log",
        db=con,
        tol=TOL,
    )
    sub = frame[frame["age"] >= 40]
    X = design_matrix(sub, ["bmi", "bp", "s5"])
    ref = sm_fit(sub["target"], X, F.Gamma(F.links.Log()))
    assert res.n_used == len(sub)
    assert_matches(res, ref)
    assert_allclose(res.dispersion, ref.scale, rtol=RTOL_COEF)


def test_source_as_csv_path(tmp_path: Path) -> None:
    frame = diabetes()[["target", "bmi", "bp", "s5"]]
    path = tmp_path / "diabetes data.csv"
    frame.to_csv(path, index=False)
    res = indb.fit(str(path), "target", "poisson", tol=TOL)
    X = design_matrix(frame, ["bmi", "bp", "s5"])
    ref = sm_fit(frame["target"], X, F.Poisson())
    assert res.n_used == len(frame)
    assert_matches(res, ref)


# ---------------------------------------------------------------------------------------------
# Frequency weights
# ---------------------------------------------------------------------------------------------
def test_frequency_weights_equal_expanded_rows(con: duckdb.DuckDBPyConnection) -> None:
    rows = fair()[["had_affair", "rate_marriage", "religious"]]
    # statsmodels.datasets.fair collapsed to one row per distinct combination (40 rows)
    counts = rows.groupby(list(rows.columns)).size().rename("respondents").reset_index()
    assert len(counts) < 50 and counts["respondents"].sum() == len(rows)
    load(con, "fair_counts", counts)
    load(con, "fair_rows", rows)
    # explicit references, so both fits share one design whatever the default rule counts
    reference = {"rate_marriage": "5", "religious": "3"}
    options = {"categorical": ["rate_marriage", "religious"], "reference": reference, "tol": TOL}
    res = indb.fit(
        "fair_counts", "had_affair", "binomial", db=con, frequency_weight="respondents", **options
    )
    expanded = indb.fit("fair_rows", "had_affair", "binomial", db=con, **options)

    # oracle: statsmodels on the 6366 expanded rows
    X = design_matrix(
        rows,
        ["rate_marriage", "religious"],
        categorical=options["categorical"],
        reference=reference,
    )
    ref = sm_fit(rows["had_affair"], X, F.Binomial())
    for r in (res, expanded):
        assert r.terms == list(X.columns)
        assert_matches(r, ref)
        assert r.residual_df == ref.df_resid == len(rows) - X.shape[1]
        assert_allclose(r.null_deviance, ref.null_deviance, rtol=RTOL_DEV)
        assert_allclose(r.log_likelihood, ref.llf, rtol=RTOL_DEV)
    assert res.n_used == len(counts) and res.n_weighted == len(rows)


def test_default_reference_counts_frequency_weights(con: duckdb.DuckDBPyConnection) -> None:
    # Contract: a frequency weight means "this row counts this many times", and the default
    # reference is the most frequent level; so the collapsed table must pick the same
    # reference as the expanded rows.
    rows = fair()[["had_affair", "rate_marriage"]]
    counts = rows.groupby(list(rows.columns)).size().rename("respondents").reset_index()
    load(con, "fair_counts", counts)
    res = indb.fit(
        "fair_counts",
        "had_affair",
        "binomial",
        db=con,
        frequency_weight="respondents",
        categorical=["rate_marriage"],
    )
    # the most frequent rating among the 6366 respondents (counted with pandas) is 5
    assert rows["rate_marriage"].value_counts().idxmax() == 5
    assert "rate_marriage=5" not in res.terms


# ---------------------------------------------------------------------------------------------
# Separation
# ---------------------------------------------------------------------------------------------
def test_complete_separation_warns(con: duckdb.DuckDBPyConnection) -> None:
    # sklearn.datasets.load_iris: setosa (target 0) and versicolor (target 1) are completely
    # separated by petal length (setosa below 2 cm, versicolor above 3 cm).
    iris = load_iris(as_frame=True).frame
    frame = pd.DataFrame({"versicolor": iris["target"], "petal_length": iris["petal length (cm)"]})[
        iris["target"] < 2
    ]
    assert (
        frame.groupby("versicolor")["petal_length"]
        .agg(["min", "max"])
        .pipe(lambda t: t.loc[0, "max"] < t.loc[1, "min"])
    )
    load(con, "iris", frame)
    with pytest.warns(indb.SeparationWarning, match="separation"):
        res = indb.fit("iris", "versicolor", "binomial", db=con)
    slope = res.coef("petal_length")
    assert slope.estimate > 10 and slope.std_error > 100 * slope.estimate


def test_quasi_separation_warns(con: duckdb.DuckDBPyConnection) -> None:
    # statsmodels.datasets.spector: the three students with GPA >= 3.9 all improved, so the
    # indicator GPA >= 3.9 separates those rows (quasi-separation: the others are mixed).
    frame = spector()
    assert frame.loc[frame["GPA"] >= 3.9, "GRADE"].eq(1).all()
    load(con, "spector", frame)
    with pytest.warns(indb.SeparationWarning, match="separation"):
        indb.fit(
            "SELECT GRADE, PSI, TUCE, GPA >= 3.9 AS top_gpa FROM spector",
            "GRADE",
            "binomial",
            db=con,
        )


def test_quasi_separated_estimate_is_flagged_by_its_standard_error(
    con: duckdb.DuckDBPyConnection,
) -> None:
    # Whatever the warning, the quasi-separated coefficient shows itself: a large estimate
    # with a standard error orders of magnitude larger (statsmodels GLM agrees: ~23 +- 1.5e4).
    frame = spector()
    load(con, "spector", frame)
    res = indb.fit(
        "SELECT GRADE, PSI, TUCE, GPA >= 3.9 AS top_gpa FROM spector", "GRADE", "binomial", db=con
    )
    top = res.coef("top_gpa=true")
    assert top.estimate > 10 and top.std_error > 100 * top.estimate
    # the other coefficients are finite and agree with statsmodels (they converge normally)
    X = design_matrix(frame.assign(top_gpa=frame["GPA"] >= 3.9), ["PSI", "TUCE", "top_gpa"])
    ref = sm_fit(frame["GRADE"], X, F.Binomial())
    for term in ("intercept", "PSI", "TUCE"):
        assert_allclose(res.coef(term).estimate, ref.params[term], rtol=1e-5, err_msg=term)


# -- predictors far from zero: the profile's moments about a value of one kept row ---------


def test_a_predictor_far_from_zero_is_standardized_without_cancellation() -> None:
    # statsmodels.datasets.engel (food expenditure on income): income shifted by 1e9. Plain
    # moments E[x^2] - E[x]^2 would lose every digit of the variance (x^2 ~ 1e18, var ~ 1e5),
    # the moments about one row's value keep them; the fit must still match statsmodels.
    d = smd.engel.load_pandas().data
    frame = pd.DataFrame({"food": d["foodexp"], "income": d["income"] + 1e9})
    con = duckdb.connect()
    con.register("engel_frame", frame)
    res = indb.fit("SELECT * FROM engel_frame", "food", "gamma", "log", db=con, tol=1e-13)
    X = sm.add_constant(frame["income"] - 1e9)  # the same model, income unshifted
    ref = sm.GLM(frame["food"], X, family=sm.families.Gamma(sm.families.links.Log())).fit(
        tol=1e-13
    )  # statsmodels (test-only oracle)
    # the slope is the same on either scale; the intercept absorbs 1e9 x slope
    assert_allclose(res.coef("income").estimate, ref.params["income"], rtol=RTOL_COEF)
    assert_allclose(res.coef("income").std_error, ref.bse["income"], rtol=RTOL_SE)
    assert_allclose(res.deviance, ref.deviance, rtol=RTOL_DEV)
    centre = {v["label"]: v for v in res.design["values"]}["income"]["center"]
    assert_allclose(centre, frame["income"].mean(), rtol=1e-15)


@pytest.mark.parametrize("value", [0.1, 1e9 + 0.1, -3.7])
def test_a_constant_predictor_is_found_exactly(value: float) -> None:
    # 0.1 summed 235 times and divided by 235 is not exactly 0.1, so a mean-based test would
    # miss it; the mean square about one row's value is exactly 0. Rows: engel (235).
    d = smd.engel.load_pandas().data
    frame = pd.DataFrame({"food": d["foodexp"], "income": d["income"], "k": value})
    con = duckdb.connect()
    con.register("engel_frame", frame)
    with pytest.raises(indb.SpecError, match=re.escape(f"predictor 'k' is constant ({value:g})")):
        indb.fit("SELECT * FROM engel_frame", "food", "gamma", "log", db=con)
