"""Bad input: each case raises one exact error class with a message that names the culprit.

Every case runs the real :func:`indb.fit` on a fresh in-memory DuckDB database holding the
Spector & Mazzeo grade data (``statsmodels.datasets.spector``, 32 rows: GRADE 0/1, GPA,
TUCE, PSI) as table ``spector``. The defect is introduced by the source query (a cast, a
shifted column, an injected NULL/NaN), so the data itself is the shipped dataset.

Messages are pinned by their key phrases (``pytest.raises(..., match=...)``): the option or
column named, the value seen where there is one, and what is allowed or how to fix it.
Cases where indb's current behaviour is wrong or unclear are written with the behaviour we
want and marked ``xfail(strict=True)`` with the behaviour observed in the reason.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import duckdb
import pytest
import statsmodels.datasets as smd

import indb
from indb import EngineError, SpecError


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    """Fresh in-memory database with ``spector`` (statsmodels.datasets.spector, 32 rows)."""
    c = duckdb.connect()
    frame = smd.spector.load_pandas().data.reset_index(drop=True)
    c.register("spector_frame", frame)
    c.execute("CREATE TABLE spector AS SELECT * FROM spector_frame")
    c.unregister("spector_frame")
    yield c
    c.close()


@dataclass(frozen=True)
class Case:
    """One bad input: source, fit options, the error class and the message phrases."""

    id: str
    source: str
    options: dict[str, Any]
    match: str  # regular expression searched in str(error)
    error: type[Exception] = SpecError
    xfail: str | None = None  # reason (the behaviour observed) when indb gets it wrong


def q(*phrases: str) -> str:
    """Regex that finds the literal phrases in this order (anything in between, line breaks
    included: engine messages keep the driver's lines)."""
    return "(?s)" + ".*".join(re.escape(p) for p in phrases)


ALL = "spector"  # the table as it ships
CASES: list[Case] = [
    # -- response type and domain ------------------------------------------------------------
    Case(
        "varchar-response",
        "SELECT CAST(GRADE AS VARCHAR) AS GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("response column 'GRADE' has type VARCHAR", "must be numeric", "cast it"),
    ),
    Case(
        "boolean-response-not-binomial",
        "SELECT GRADE = 1 AS GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "poisson"},
        q("response column 'GRADE' is BOOLEAN", "only family 'binomial'"),
    ),
    Case(
        "poisson-negative-counts",
        # TUCE ranges 12..29, so TUCE - 15 is negative in some rows (counted in a test below)
        "SELECT TUCE - 15 AS TUCE, GPA FROM spector",
        {"response": "TUCE", "family": "poisson"},
        q("family 'poisson' needs a response >= 0", "column 'TUCE'", "of 32 rows", "fix"),
    ),
    Case(
        "binomial-response-above-one",
        "SELECT TUCE, GPA FROM spector",
        {"response": "TUCE", "family": "binomial"},
        q("family 'binomial' needs a response <= 1", "column 'TUCE'", "in 32 of 32 rows"),
    ),
    Case(
        "binomial-response-below-zero",
        "SELECT GRADE - 1 AS GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("family 'binomial' needs a response >= 0", "column 'GRADE'"),
    ),
    Case(
        "binomial-successes-above-trials",
        # TUCE scores 12..29 as "successes" out of 20 trials (rows above 20 counted below)
        "SELECT TUCE, 20 AS n_items, GPA FROM spector",
        {"response": "TUCE", "family": "binomial", "trials": "n_items"},
        q("needs successes <= trials", "column 'TUCE'", "trials expression 'n_items'"),
    ),
    Case(
        "binomial-negative-trials",
        "SELECT GRADE, PSI - 1 AS n_items, GPA FROM spector",
        {"response": "GRADE", "family": "binomial", "trials": "n_items"},
        q("trials expression 'n_items' is negative"),
    ),
    Case(
        "gamma-zero-response",
        "SELECT GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "gamma"},
        q("family 'gamma' needs a response > 0", "column 'GRADE'", "in 21 of 32 rows"),
    ),
    Case(
        "inverse-gaussian-negative-response",
        "SELECT GPA - 3 AS GPA, TUCE FROM spector",
        {"response": "GPA", "family": "inverse_gaussian"},
        q("family 'inverse_gaussian' needs a response > 0", "column 'GPA'"),
    ),
    Case(
        "inverse-gaussian-zero-response",
        "SELECT GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "inverse_gaussian"},
        q("family 'inverse_gaussian' needs a response > 0", "column 'GRADE'"),
    ),
    # -- empty, NULL, constant, single level ---------------------------------------------------
    Case(
        "empty-source",
        "SELECT * FROM spector WHERE GPA > 10",
        {"response": "GRADE", "family": "binomial"},
        q("has no rows"),
    ),
    Case(
        "all-null-predictor",
        "SELECT *, CAST(NULL AS DOUBLE) AS attendance FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("column 'attendance' is NULL in all 32 rows", "exclude=['attendance']"),
    ),
    Case(
        "all-null-categorical",
        "SELECT *, CAST(NULL AS VARCHAR) AS class FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("column 'class' is NULL in all 32 rows", "exclude=['class']"),
    ),
    Case(
        "all-null-response",
        "SELECT CAST(NULL AS DOUBLE) AS GRADE, GPA FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("response column 'GRADE' is NULL in all 32 rows"),
    ),
    Case(
        "constant-numeric-predictor",
        "SELECT *, 4.0 AS max_gpa FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("predictor 'max_gpa' is constant (4)", "intercept", "leave it out"),
    ),
    Case(
        "single-level-categorical",
        "SELECT *, 'spring' AS term FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("categorical column 'term' has a single level ('spring')", "leave it out"),
    ),
    Case(
        "response-single-outcome",
        "SELECT GRADE, GPA FROM spector WHERE GRADE = 1",
        {"response": "GRADE", "family": "binomial"},
        q("column 'GRADE' is 1 in every row used", "needs both outcomes"),
    ),
    # -- unknown names -------------------------------------------------------------------------
    Case(
        "unknown-response",
        ALL,
        {"response": "grade_points", "family": "binomial"},
        q("response column 'grade_points' is not in the source", "columns are 'GPA'"),
    ),
    Case(
        "unknown-offset-column",
        ALL,
        {"response": "GRADE", "family": "poisson", "offset": "ln(exposure)"},
        q("offset expression 'ln(exposure)'", "'exposure' is not in the source", "columns are"),
    ),
    Case(
        "unknown-weight-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "weight": "class_size"},
        q("weight expression 'class_size'", "'class_size' is not in the source"),
    ),
    Case(
        "unknown-trials-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "trials": "n_items"},
        q("trials expression 'n_items'", "'n_items' is not in the source"),
    ),
    Case(
        "unknown-exclude-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "exclude": ["tuce"]},
        q("column 'tuce' is not in the source", "columns are 'GPA', 'TUCE', 'PSI', 'GRADE'"),
    ),
    Case(
        "unknown-exclude-column-names-option",
        ALL,
        {"response": "GRADE", "family": "binomial", "exclude": ["tuce"]},
        q("exclude", "'tuce' is not in the source"),
    ),
    Case(
        "unknown-predictor",
        ALL,
        {"response": "GRADE", "family": "binomial", "predictors": ["GPA", "SAT"]},
        q("predictor column 'SAT' is not in the source"),
    ),
    Case(
        "unknown-interaction-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "interactions": [("GPA", "SAT")]},
        q("interaction column 'SAT' is not in the source"),
    ),
    Case(
        "unknown-spline-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "splines": {"SAT": 4}},
        q("spline column 'SAT' is not in the source"),
    ),
    Case(
        "unknown-reference-level",
        "SELECT GRADE, GPA, CASE WHEN PSI = 1 THEN 'new' ELSE 'old' END AS method FROM spector",
        {"response": "GRADE", "family": "binomial", "reference": {"method": "none"}},
        q("reference level 'none' of column 'method' does not occur", "levels are ['new', 'old']"),
    ),
    Case(
        "unknown-table",
        "spector_2024",
        {"response": "GRADE", "family": "binomial"},
        q("cannot read the source 'spector_2024'", "does not exist", "check the table name"),
    ),
    Case(
        "missing-parquet-file",
        "/nonexistent/dir/claims.parquet",
        {"response": "GRADE", "family": "binomial"},
        q("cannot read the source '/nonexistent/dir/claims.parquet'", "check the"),
    ),
    Case(
        "offset-unknown-function",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "no_such_fn(GPA)"},
        q("no_such_fn does not exist"),
        error=EngineError,
    ),
    # -- family, link and their options --------------------------------------------------------
    Case(
        "unknown-family",
        ALL,
        {"response": "GRADE", "family": "binomal"},
        q("unknown family 'binomal'", "allowed: gaussian, binomial, poisson"),
    ),
    Case(
        "unknown-link",
        ALL,
        {"response": "GRADE", "family": "binomial", "link": "logistic"},
        q("unknown link 'logistic'", "allowed:", "logit", "probit"),
    ),
    Case(
        "link-not-allowed-for-family",
        ALL,
        {"response": "GRADE", "family": "poisson", "link": "logit"},
        q("family 'poisson' does not take link 'logit'", "allowed: log, identity, sqrt, power"),
    ),
    Case(
        "link-not-allowed-gamma-probit",
        ALL,
        {"response": "GPA", "family": "gamma", "link": "probit"},
        q("family 'gamma' does not take link 'probit'", "allowed: inverse, log"),
    ),
    Case(
        "tweedie-without-power",
        ALL,
        {"response": "GPA", "family": "tweedie"},
        q("family 'tweedie' needs a variance power", "pass power="),
    ),
    Case(
        "tweedie-power-in-gap",
        ALL,
        {"response": "GPA", "family": "tweedie", "power": 0.5},
        q("tweedie power must be 0 or >= 1", "got 0.5"),
    ),
    Case(
        "power-for-non-tweedie",
        ALL,
        {"response": "GPA", "family": "gamma", "power": 1.5},
        q("power is the tweedie variance power", "family 'gamma' does not take it"),
    ),
    Case(
        "power-link-without-link-power",
        ALL,
        {"response": "GPA", "family": "gaussian", "link": "power"},
        q("link 'power' needs an exponent", "link_power="),
    ),
    Case(
        "link-power-with-other-link",
        ALL,
        {"response": "GPA", "family": "gaussian", "link": "log", "link_power": 2.0},
        q("link_power is only used with link 'power'", "not with link 'log'"),
    ),
    Case(
        "theta-for-non-negative-binomial",
        ALL,
        {"response": "TUCE", "family": "poisson", "theta": 2.0},
        q("theta belongs to negative_binomial", "family 'poisson'"),
    ),
    Case(
        "trials-without-binomial",
        ALL,
        {"response": "TUCE", "family": "poisson", "trials": "GPA"},
        q("trials is for grouped binomial data", "family is 'poisson'"),
    ),
    # -- NaN / Inf (DuckDB DOUBLE 'nan' / 'inf') -----------------------------------------------
    Case(
        "nan-predictor",
        "SELECT GRADE, CASE WHEN TUCE = 12 THEN 'nan'::DOUBLE ELSE GPA END AS GPA FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("predictor column 'GPA' is NaN or infinite in 1 of 32 rows", "fix those rows"),
    ),
    Case(
        "inf-predictor",
        "SELECT GRADE, CASE WHEN PSI = 1 THEN '-inf'::DOUBLE ELSE GPA END AS GPA FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("predictor column 'GPA' is NaN or infinite in 14 of 32 rows"),
    ),
    Case(
        "nan-response",
        "SELECT CASE WHEN TUCE = 12 THEN 'nan'::DOUBLE ELSE GPA END AS GPA, TUCE FROM spector",
        {"response": "GPA", "family": "gaussian"},
        q("response column 'GPA' is NaN or infinite in 1 of 32 rows"),
    ),
    Case(
        "inf-response",
        "SELECT CASE WHEN TUCE = 12 THEN 'inf'::DOUBLE ELSE GPA END AS GPA, TUCE FROM spector",
        {"response": "GPA", "family": "gamma"},
        q("response column 'GPA' is NaN or infinite in 1 of 32 rows"),
    ),
    Case(
        "nan-offset",
        "SELECT TUCE, GPA, CASE WHEN PSI = 1 THEN 'nan'::DOUBLE ELSE 1.0 END AS t FROM spector",
        {"response": "TUCE", "family": "poisson", "offset": "t"},
        q("offset expression 't' is NaN or infinite in 14 of 32 rows"),
    ),
    Case(
        "offset-log-of-zero",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "ln(PSI)"},
        q("offset expression", "is NaN or infinite in 18 of 32 rows"),
    ),
    Case(
        "inf-weight",
        "SELECT GPA, TUCE, CASE WHEN PSI = 1 THEN 'inf'::DOUBLE ELSE 1.0 END AS w FROM spector",
        {"response": "GPA", "weight": "w"},
        q("weight expression 'w' is NaN or infinite in 14 of 32 rows"),
    ),
    # -- user expressions ----------------------------------------------------------------------
    Case(
        "offset-subquery",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "(SELECT max(GPA) FROM spector)"},
        q("offset expression", "not a per-row expression", "subqueries are not allowed"),
    ),
    Case(
        "offset-aggregate",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "ln(avg(GPA))"},
        q("offset expression 'ln(avg(GPA))' must be a plain per-row expression"),
    ),
    Case(
        "offset-window",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "ln(max(GPA) OVER ())"},
        q("must be a plain per-row expression"),
    ),
    Case(
        "weight-aggregate",
        ALL,
        {"response": "GPA", "weight": "TUCE / sum(TUCE)"},
        q("weight expression 'TUCE / sum(TUCE)' must be a plain per-row expression"),
    ),
    Case(
        "offset-unparsable",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "ln(GPA) +"},
        q("cannot parse offset expression 'ln(GPA) +'"),
    ),
    Case(
        "offset-two-statements",
        ALL,
        {"response": "TUCE", "family": "poisson", "offset": "GPA; DROP TABLE spector"},
        q("offset expression 'GPA; DROP TABLE spector'", "not"),
    ),
    Case(
        "negative-weights",
        ALL,
        {"response": "GPA", "weight": "TUCE - 20"},
        q("weight expression 'TUCE - 20' is negative in", "of 32 rows"),
    ),
    Case(
        "negative-frequency-weights",
        ALL,
        {"response": "GPA", "frequency_weight": "PSI - 0.5"},
        q("frequency_weight expression 'PSI - 0.5' is negative in 18 of 32 rows"),
    ),
    Case(
        "all-zero-weights",
        ALL,
        {"response": "GPA", "weight": "0 * TUCE"},
        q("every row has zero weight", "nothing to fit"),
    ),
    # -- levels, NULL policy, other options ------------------------------------------------------
    Case(
        "too-many-levels",
        "SELECT GRADE, GPA, CAST(TUCE AS VARCHAR) AS tuce_score FROM spector",
        {"response": "GRADE", "family": "binomial", "max_levels": 5},
        q("categorical column 'tuce_score' has", "5", "raise max_levels"),
    ),
    Case(
        "on-null-error",
        "SELECT GRADE, CASE WHEN TUCE = 12 THEN NULL ELSE GPA END AS GPA FROM spector",
        {"response": "GRADE", "family": "binomial", "on_null": "error"},
        q("1 rows have NULLs in model columns", "{'GPA': 1}", "on_null='exclude'"),
    ),
    Case(
        "on-null-unknown-policy",
        ALL,
        {"response": "GRADE", "family": "binomial", "on_null": "drop"},
        q("on_null must be 'exclude' or 'error'", "got 'drop'"),
    ),
    Case(
        "date-predictor",
        "SELECT GRADE, GPA, DATE '1980-01-01' + CAST(TUCE AS INTEGER) AS exam_day FROM spector",
        {"response": "GRADE", "family": "binomial"},
        q("column 'exam_day' has type DATE", "exclude=['exam_day']", "or cast it"),
    ),
    Case(
        "spline-too-few-knots",
        ALL,
        {"response": "GRADE", "family": "binomial", "splines": {"GPA": 2}},
        q("spline on column 'GPA' needs 3 to 10 knots", "got 2"),
    ),
    Case(
        "interaction-single-column",
        ALL,
        {"response": "GRADE", "family": "binomial", "interactions": [("GPA",)]},
        q("an interaction needs two or more column names"),
    ),
    Case(
        "max-iter-zero",
        ALL,
        {"response": "GRADE", "family": "binomial", "max_iter": 0},
        q("max_iter must be a positive integer", "got 0"),
    ),
]


def _param(case: Case) -> Any:
    marks = [pytest.mark.xfail(strict=True, reason=case.xfail)] if case.xfail else []
    return pytest.param(case, id=case.id, marks=marks)


@pytest.mark.parametrize("case", [_param(c) for c in CASES])
def test_bad_input_raises_specific_error(con: duckdb.DuckDBPyConnection, case: Case) -> None:
    with pytest.raises(case.error, match=case.match) as info:
        indb.fit(case.source, db=con, **case.options)
    # exact class, not a subclass that happens to match
    assert type(info.value) is case.error


def test_spec_error_is_a_value_error(con: duckdb.DuckDBPyConnection) -> None:
    # Contract: SpecError is also a ValueError, so generic callers can catch ValueError.
    with pytest.raises(ValueError, match="unknown family"):
        indb.fit("spector", "GRADE", "binomal", db=con)


def test_engine_error_keeps_the_failing_sql(con: duckdb.DuckDBPyConnection) -> None:
    # A user expression DuckDB cannot bind: the engine error carries the SQL that failed.
    with pytest.raises(EngineError) as info:
        indb.fit("spector", "TUCE", "poisson", offset="no_such_fn(GPA)", db=con)
    assert info.value.sql is not None and "no_such_fn(gpa)" in info.value.sql.lower()


def test_domain_error_counts_the_offending_rows(con: duckdb.DuckDBPyConnection) -> None:
    # statsmodels.datasets.spector: TUCE < 15 in exactly these rows (counted with DuckDB).
    n_bad = con.execute("SELECT count(*) FROM spector WHERE TUCE < 15").fetchone()[0]
    assert n_bad > 0
    with pytest.raises(SpecError, match=q(f"in {n_bad} of 32 rows")):
        indb.fit("SELECT TUCE - 15 AS TUCE, GPA FROM spector", "TUCE", "poisson", db=con)


def test_domain_error_shows_the_observed_range_as_plain_numbers(
    con: duckdb.DuckDBPyConnection,
) -> None:
    # statsmodels.datasets.spector: TUCE ranges from 12 to 29, so TUCE - 15 is -3 .. 14.
    with pytest.raises(SpecError, match=r"\(min -3(\.0)?, max 14(\.0)?\)"):
        indb.fit("SELECT TUCE - 15 AS TUCE, GPA FROM spector", "TUCE", "poisson", db=con)


def test_successes_above_trials_counts_rows(con: duckdb.DuckDBPyConnection) -> None:
    n_bad = con.execute("SELECT count(*) FROM spector WHERE TUCE > 20").fetchone()[0]
    with pytest.raises(SpecError, match=q(f"in {n_bad} of 32 rows")):
        indb.fit(
            "SELECT TUCE, 20 AS n_items, GPA FROM spector",
            "TUCE",
            "binomial",
            trials="n_items",
            db=con,
        )


def test_bad_input_leaves_the_database_unchanged(con: duckdb.DuckDBPyConnection) -> None:
    # A rejected fit must not create, drop or alter anything in the user's database.
    before = con.execute("SELECT table_name FROM information_schema.tables").fetchall()
    with pytest.raises(SpecError):
        indb.fit("spector", "TUCE", "poisson", offset="ln(exposure)", db=con)
    after = con.execute("SELECT table_name FROM information_schema.tables").fetchall()
    assert before == after
    assert con.execute("SELECT count(*) FROM spector").fetchone()[0] == 32


def test_identifier_like_column_in_a_default_design_is_named() -> None:
    # statsmodels.datasets.fair (6,366 marriages, shipped with statsmodels) with a row key
    # added: whole numbers, distinct on every row. fair's own columns all repeat values,
    # and yrs_married has fractions, so only the key is named.
    frame = smd.fair.load_pandas().data.reset_index(drop=True)
    frame.insert(0, "marriage_id", range(100_001, 100_001 + len(frame)))
    with duckdb.connect() as c:
        c.register("fair_frame", frame)
        c.execute("CREATE TABLE fair AS SELECT * FROM fair_frame")
        res = indb.fit("fair", "children", "poisson", db=c, exclude=["affairs"])
        notes = [w for w in res.warnings if "identifier" in w]
        assert len(notes) == 1 and "['marriage_id']" in notes[0] and "--exclude" in notes[0]
        # named predictors are the user's choice: no note
        named = indb.fit("fair", "children", "poisson", db=c, predictors=["marriage_id", "age"])
        assert not [w for w in named.warnings if "identifier" in w]
        # without the key, a default design gets no note (continuous columns never do)
        clean = indb.fit("fair", "children", "poisson", db=c, exclude=["affairs", "marriage_id"])
        assert not [w for w in clean.warnings if "identifier" in w]
