"""Fits checked against published worked examples, with statsmodels as the sharp oracle.

Every case is a small data table typed in from a textbook (as literals below, with the
citation beside it). Each case is checked twice:

* against the values printed in the book, at the precision they were printed: a value
  printed with ``d`` decimals is the true value rounded to ``d`` decimals, so the
  tolerance is half a unit in the last printed place (``_half_unit``);
* against statsmodels GLM fitted to the same literals at tight tolerance
  (coefficients and standard errors rtol 1e-6, deviance rtol 1e-8).

A separate test checks that statsmodels itself reproduces every published value from the
typed-in literals, so a typing error in a data table shows up without indb involved.

All published numbers below were typed from memory of the cited tables, not read from
the page while writing this file: each is marked "(recalled from memory)". The data
tables are the well-known ones distributed with many copies of these examples.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

import indb

# statsmodels warns that the inverse link does not keep a gamma mean positive; the
# published clotting-time fits use exactly that link, so the warning is expected.
pytestmark = pytest.mark.filterwarnings(
    "ignore:The InversePower link function does not respect the domain"
)

# Oracle tolerances (from the task brief): statsmodels and indb solve the same likelihood
# equations, so agreement is limited only by the convergence tolerances of the two fits.
# Issue 18's target: coefficients within 1e-8 relative, standard errors within 1e-7.
COEF_RTOL = 1e-8
SE_RTOL = 1e-7
DEVIANCE_RTOL = 1e-8
# Coefficients whose true value is exactly 0 (Dobson's treatment effects) need an absolute
# floor: both fits return round-off of order 1e-15 there.
COEF_ATOL = 1e-9

L = sm.families.links


# --------------------------------------------------------------------------------------
# Data tables (typed-in literals, with their sources)
# --------------------------------------------------------------------------------------

# Dobson, A. J. (1990) An Introduction to Generalized Linear Models, Chapman & Hall,
# p. 93: randomized controlled trial, counts by outcome (1-3) and treatment (1-3).
# Rows: (outcome, treatment, counts).
DOBSON_ROWS: tuple[tuple[str, str, int], ...] = (
    ("1", "1", 18),
    ("2", "1", 17),
    ("3", "1", 15),
    ("1", "2", 20),
    ("2", "2", 10),
    ("3", "2", 20),
    ("1", "3", 25),
    ("2", "3", 13),
    ("3", "3", 12),
)

# Bliss, C. I. (1935) The calculation of the dosage-mortality curve, Annals of Applied
# Biology 22, 134-167; as tabulated in Dobson, A. J. & Barnett, A. G. (2008) An
# Introduction to Generalized Linear Models, 3rd ed., Chapman & Hall/CRC, Section 7.3
# (beetle mortality after 5 h exposure to gaseous carbon disulphide).
# Rows: (dose = log10 CS2 mg/l, number exposed, number killed).
BEETLE_ROWS: tuple[tuple[float, int, int], ...] = (
    (1.6907, 59, 6),
    (1.7242, 60, 13),
    (1.7552, 62, 18),
    (1.7842, 56, 28),
    (1.8113, 63, 52),
    (1.8369, 59, 53),
    (1.8610, 62, 61),
    (1.8839, 60, 60),
)

# McCullagh, P. & Nelder, J. A. (1989) Generalized Linear Models, 2nd ed., Chapman & Hall,
# Section 6.3.2, Table 6.2: damage incidents to cargo ships (Lloyd's Register).
# Rows: (ship type, year of construction, period of operation, aggregate months of
# service, number of damage incidents). The six cells with zero service are structural
# zeros (no such ships) and are left out of the fit, as in the book: 34 cells remain.
SHIP_ROWS: tuple[tuple[str, str, str, int, int], ...] = (
    ("A", "60", "60", 127, 0),
    ("A", "60", "75", 63, 0),
    ("A", "65", "60", 1095, 3),
    ("A", "65", "75", 1095, 4),
    ("A", "70", "60", 1512, 6),
    ("A", "70", "75", 3353, 18),
    ("A", "75", "60", 0, 0),
    ("A", "75", "75", 2244, 11),
    ("B", "60", "60", 44882, 39),
    ("B", "60", "75", 17176, 29),
    ("B", "65", "60", 28609, 58),
    ("B", "65", "75", 20370, 53),
    ("B", "70", "60", 7064, 12),
    ("B", "70", "75", 13099, 44),
    ("B", "75", "60", 0, 0),
    ("B", "75", "75", 7117, 18),
    ("C", "60", "60", 1179, 1),
    ("C", "60", "75", 552, 1),
    ("C", "65", "60", 781, 0),
    ("C", "65", "75", 676, 1),
    ("C", "70", "60", 783, 6),
    ("C", "70", "75", 1948, 2),
    ("C", "75", "60", 0, 0),
    ("C", "75", "75", 274, 1),
    ("D", "60", "60", 251, 0),
    ("D", "60", "75", 105, 0),
    ("D", "65", "60", 288, 0),
    ("D", "65", "75", 192, 0),
    ("D", "70", "60", 349, 2),
    ("D", "70", "75", 1208, 11),
    ("D", "75", "60", 0, 0),
    ("D", "75", "75", 2051, 4),
    ("E", "60", "60", 45, 0),
    ("E", "60", "75", 0, 0),
    ("E", "65", "60", 789, 7),
    ("E", "65", "75", 437, 7),
    ("E", "70", "60", 1157, 5),
    ("E", "70", "75", 2161, 12),
    ("E", "75", "60", 0, 0),
    ("E", "75", "75", 542, 1),
)

# McCullagh & Nelder (1989), 2nd ed., Section 8.4.2, pp. 300-302: mean clotting times of
# blood (seconds) for nine percentage concentrations u of normal plasma, two lots of
# clotting agent (data of Hurn et al., 1945). Rows: (lot, u, clotting time).
CLOTTING_U = (5, 10, 15, 20, 30, 40, 60, 80, 100)
CLOTTING_LOT1 = (118, 58, 42, 35, 27, 25, 21, 19, 18)
CLOTTING_LOT2 = (69, 35, 26, 21, 18, 16, 13, 12, 12)
CLOTTING_ROWS: tuple[tuple[str, float, float], ...] = tuple(
    [("1", float(u), float(t)) for u, t in zip(CLOTTING_U, CLOTTING_LOT1, strict=True)]
    + [("2", float(u), float(t)) for u, t in zip(CLOTTING_U, CLOTTING_LOT2, strict=True)]
)


# --------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------


def _half_unit(printed: str) -> float:
    """Half a unit in the last printed place of ``printed`` (e.g. "-60.72" -> 0.005).

    A value printed with d decimals is the exact value rounded to d decimals, so it is
    within 0.5 * 10**-d of the exact value; 1e-12 absorbs binary round-off at the edge.
    """
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    return 0.5 * 10.0**-decimals + 1e-12


def _assert_printed(actual: float, printed: str, what: str) -> None:
    assert_allclose(actual, float(printed), rtol=0, atol=_half_unit(printed), err_msg=what)


def _create_table(
    con: duckdb.DuckDBPyConnection,
    name: str,
    columns: Sequence[tuple[str, str]],
    rows: Sequence[Sequence[Any]],
) -> None:
    column_sql = ", ".join(f"{col} {sql_type}" for col, sql_type in columns)
    con.execute(f"CREATE TABLE {name} ({column_sql})")
    placeholders = ", ".join("?" for _ in columns)
    con.executemany(f"INSERT INTO {name} VALUES ({placeholders})", [list(r) for r in rows])


def _indicator(values: Sequence[str], level: str) -> np.ndarray:
    return np.array([1.0 if v == level else 0.0 for v in values])


def _design(*columns: np.ndarray) -> np.ndarray:
    """Intercept column followed by ``columns``, in the order indb names its terms."""
    n = len(columns[0])
    return np.column_stack([np.ones(n), *columns])


def _sm_fit(
    endog: np.ndarray, exog: np.ndarray, family: Any, offset: np.ndarray | None = None
) -> Any:
    # Converged on the coefficients themselves (|change| <= 1e-14 + 1e-13 |previous|), far
    # below the oracle tolerances, so statsmodels' own convergence is not a factor: its
    # default criterion, the deviance change, leaves a linearly converging fit (a
    # non-canonical link) ~1e-7 from its optimum. Checked: the Fisher-scoring step left at
    # these estimates is below 5e-14 standard errors on every case here (measured
    # 2026-12-05 with statsmodels' own score and expected information).
    return sm.GLM(endog, exog, family=family, offset=offset).fit(
        tol=1e-13, atol=1e-14, rtol=1e-13, tol_criterion="params", maxiter=2000
    )


# --------------------------------------------------------------------------------------
# Cases
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    """One published example: how to load it, how to fit it, what the book printed."""

    id: str
    tables: tuple[tuple[str, tuple[tuple[str, str], ...], tuple[tuple[Any, ...], ...]], ...]
    fit_args: tuple[Any, ...]
    fit_kwargs: dict[str, Any]
    terms: tuple[str, ...]
    statsmodels: Callable[[], Any]
    published_estimates: dict[str, str]
    published_std_errors: dict[str, str]
    published_deviance: str | None
    published_df_resid: int
    published_extra: dict[str, str] = field(default_factory=dict)


def _dobson_sm() -> Any:
    outcome = [r[0] for r in DOBSON_ROWS]
    treatment = [r[1] for r in DOBSON_ROWS]
    exog = _design(
        _indicator(outcome, "2"),
        _indicator(outcome, "3"),
        _indicator(treatment, "2"),
        _indicator(treatment, "3"),
    )
    counts = np.array([r[2] for r in DOBSON_ROWS], dtype=float)
    return _sm_fit(counts, exog, sm.families.Poisson())


def _beetle_sm(link: Any) -> Callable[[], Any]:
    def fit() -> Any:
        dose = np.array([r[0] for r in BEETLE_ROWS])
        exposed = np.array([r[1] for r in BEETLE_ROWS], dtype=float)
        killed = np.array([r[2] for r in BEETLE_ROWS], dtype=float)
        # Two-column response (successes, failures) = grouped binomial.
        endog = np.column_stack([killed, exposed - killed])
        return _sm_fit(endog, _design(dose), sm.families.Binomial(link=link))

    return fit


def _ships_used() -> list[tuple[str, str, str, int, int]]:
    return [r for r in SHIP_ROWS if r[3] > 0]


def _ships_sm() -> Any:
    rows = _ships_used()
    ship_type = [r[0] for r in rows]
    year = [r[1] for r in rows]
    period = [r[2] for r in rows]
    exog = _design(
        *(_indicator(ship_type, level) for level in "BCDE"),
        *(_indicator(year, level) for level in ("65", "70", "75")),
        _indicator(period, "75"),
    )
    incidents = np.array([r[4] for r in rows], dtype=float)
    log_service = np.log(np.array([r[3] for r in rows], dtype=float))
    return _sm_fit(incidents, exog, sm.families.Poisson(), offset=log_service)


def _clotting_sm(lot: str) -> Callable[[], Any]:
    def fit() -> Any:
        rows = [r for r in CLOTTING_ROWS if r[0] == lot]
        log_u = np.log(np.array([r[1] for r in rows]))
        seconds = np.array([r[2] for r in rows])
        return _sm_fit(seconds, _design(log_u), sm.families.Gamma(link=L.InversePower()))

    return fit


DOBSON_TABLE = (
    "dobson",
    (("outcome", "VARCHAR"), ("treatment", "VARCHAR"), ("counts", "INTEGER")),
    DOBSON_ROWS,
)
BEETLE_TABLE = (
    "beetle",
    (("dose", "DOUBLE"), ("exposed", "INTEGER"), ("killed", "INTEGER")),
    BEETLE_ROWS,
)
SHIP_TABLE = (
    "ships",
    (
        ("ship_type", "VARCHAR"),
        ("built", "VARCHAR"),
        ("operated", "VARCHAR"),
        ("service_months", "INTEGER"),
        ("incidents", "INTEGER"),
    ),
    SHIP_ROWS,
)
CLOTTING_TABLE = (
    "clotting",
    (("lot", "VARCHAR"), ("u", "DOUBLE"), ("clotting_seconds", "DOUBLE")),
    CLOTTING_ROWS,
)

# Dobson (1990) p. 93 fit of counts ~ outcome + treatment (Poisson, log link), printed to
# 4 significant figures; residual deviance 5.129 on 4 df (recalled from memory).
DOBSON = Case(
    id="dobson_poisson",
    tables=(DOBSON_TABLE,),
    fit_args=("dobson", "counts", "poisson"),
    fit_kwargs={"reference": {"outcome": "1", "treatment": "1"}},
    terms=("intercept", "outcome=2", "outcome=3", "treatment=2", "treatment=3"),
    statsmodels=_dobson_sm,
    published_estimates={  # (recalled from memory)
        "intercept": "3.045",
        "outcome=2": "-0.4543",
        "outcome=3": "-0.2930",
        "treatment=2": "0.0000",
        "treatment=3": "0.0000",
    },
    published_std_errors={  # (recalled from memory)
        "intercept": "0.1709",
        "outcome=2": "0.2022",
        "outcome=3": "0.1927",
        "treatment=2": "0.2000",
        "treatment=3": "0.2000",
    },
    published_deviance="5.129",  # (recalled from memory)
    published_df_resid=4,
    published_extra={"null_deviance": "10.58"},  # 10.58 on 8 df (recalled from memory)
)

# Dobson & Barnett (2008) 3rd ed., Section 7.3, table comparing the logistic, probit and
# extreme value (complementary log-log) dose-response models for the beetle data:
# b1, b2 (standard errors) and deviance D, printed to 2 decimals (recalled from memory).
BEETLE_PUBLISHED: dict[str, tuple[Any, dict[str, str], dict[str, str], str]] = {
    "logit": (
        L.Logit(),
        {"intercept": "-60.72", "dose": "34.27"},
        {"intercept": "5.18", "dose": "2.91"},
        "11.23",
    ),
    "probit": (
        L.Probit(),
        {"intercept": "-34.94", "dose": "19.73"},
        {"intercept": "2.65", "dose": "1.49"},
        "10.12",
    ),
    "cloglog": (
        L.CLogLog(),
        {"intercept": "-39.57", "dose": "22.04"},
        {"intercept": "3.24", "dose": "1.80"},
        "3.45",
    ),
}
BEETLE_CASES = [
    Case(
        id=f"beetle_{link}",
        tables=(BEETLE_TABLE,),
        fit_args=("beetle", "killed", "binomial", link),
        fit_kwargs={"trials": "exposed"},
        terms=("intercept", "dose"),
        statsmodels=_beetle_sm(sm_link),
        published_estimates=estimates,
        published_std_errors=std_errors,
        published_deviance=deviance,
        published_df_resid=6,
    )
    for link, (sm_link, estimates, std_errors, deviance) in BEETLE_PUBLISHED.items()
]

# McCullagh & Nelder (1989) 2nd ed., Section 6.3.2, Table 6.3: main-effects Poisson model
# with log(aggregate months of service) as offset. Estimates and (unscaled) standard
# errors to 4 decimals, intercept to 3; deviance 38.695 on 25 df; Pearson X^2 = 42.3
# (recalled from memory). The deviance is also quoted as "38.69", which is 38.695...
# truncated rather than rounded, so the 3-decimal form is the one asserted.
SHIPS = Case(
    id="ships_poisson_offset",
    tables=(SHIP_TABLE,),
    fit_args=(
        "SELECT ship_type, built, operated, service_months, incidents FROM ships "
        "WHERE service_months > 0",
        "incidents",
        "poisson",
    ),
    fit_kwargs={
        "offset": "ln(service_months)",
        "reference": {"ship_type": "A", "built": "60", "operated": "60"},
    },
    terms=(
        "intercept",
        "ship_type=B",
        "ship_type=C",
        "ship_type=D",
        "ship_type=E",
        "built=65",
        "built=70",
        "built=75",
        "operated=75",
    ),
    statsmodels=_ships_sm,
    published_estimates={  # (recalled from memory)
        "intercept": "-6.406",
        "ship_type=B": "-0.5433",
        "ship_type=C": "-0.6874",
        "ship_type=D": "-0.0760",
        "ship_type=E": "0.3256",
        "built=65": "0.6971",
        "built=70": "0.8184",
        "built=75": "0.4534",
        "operated=75": "0.3845",
    },
    published_std_errors={  # (recalled from memory)
        "intercept": "0.2174",
        "ship_type=B": "0.1776",
        "ship_type=C": "0.3290",
        "ship_type=D": "0.2906",
        "ship_type=E": "0.2359",
        "built=65": "0.1496",
        "built=70": "0.1698",
        "built=75": "0.2332",
        "operated=75": "0.1183",
    },
    published_deviance="38.695",  # (recalled from memory)
    published_df_resid=25,
    published_extra={"pearson_chi2": "42.3"},  # (recalled from memory)
)

# McCullagh & Nelder (1989) 2nd ed., Section 8.4.2, p. 302: gamma fits with inverse link,
# separately for each lot, printed to 5 decimals (recalled from memory):
#   lot 1: 1/mu = -0.01655 + 0.01534 log(u);  lot 2: 1/mu = -0.02391 + 0.02360 log(u).
CLOTTING_PUBLISHED = {
    "1": {"intercept": "-0.01655", "log_u": "0.01534"},
    "2": {"intercept": "-0.02391", "log_u": "0.02360"},
}
CLOTTING_CASES = [
    Case(
        id=f"clotting_lot{lot}_gamma_inverse",
        tables=(CLOTTING_TABLE,),
        fit_args=(
            f"SELECT ln(u) AS log_u, clotting_seconds FROM clotting WHERE lot = '{lot}'",
            "clotting_seconds",
            "gamma",
            "inverse",
        ),
        fit_kwargs={},
        terms=("intercept", "log_u"),
        statsmodels=_clotting_sm(lot),
        published_estimates=estimates,
        published_std_errors={},
        published_deviance=None,
        published_df_resid=7,
    )
    for lot, estimates in CLOTTING_PUBLISHED.items()
]

CASES = [DOBSON, *BEETLE_CASES, SHIPS, *CLOTTING_CASES]


# --------------------------------------------------------------------------------------
# Fixtures
# --------------------------------------------------------------------------------------


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    """A fresh in-memory DuckDB database per test."""
    connection = duckdb.connect(":memory:")
    try:
        yield connection
    finally:
        connection.close()


def _fit_case(case: Case, con: duckdb.DuckDBPyConnection) -> Any:
    for name, columns, rows in case.tables:
        _create_table(con, name, columns, rows)
    # tol=1e-13: non-canonical links (probit, cloglog) converge linearly, and Pearson's
    # chi-squared (unlike the deviance) moves to first order with the coefficients
    return indb.fit(*case.fit_args, db=con, tol=1e-13, **case.fit_kwargs)


# --------------------------------------------------------------------------------------
# Tests
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_typed_data_reproduces_published_values_in_statsmodels(case: Case) -> None:
    """The oracle fitted to the typed-in literals agrees with the book.

    Guards the literals themselves: a mistyped count would break this before any indb
    result is compared with statsmodels.
    """
    ref = case.statsmodels()
    for i, term in enumerate(case.terms):
        if term in case.published_estimates:
            _assert_printed(ref.params[i], case.published_estimates[term], f"{term} estimate")
        if term in case.published_std_errors:
            _assert_printed(ref.bse[i], case.published_std_errors[term], f"{term} std error")
    if case.published_deviance is not None:
        _assert_printed(ref.deviance, case.published_deviance, "deviance")
    assert ref.df_resid == case.published_df_resid
    for attribute, printed in case.published_extra.items():
        _assert_printed(getattr(ref, attribute), printed, attribute)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_fit_matches_published_values(case: Case, con: duckdb.DuckDBPyConnection) -> None:
    """indb against the book, at the precision the book printed (half a unit, last place)."""
    res = _fit_case(case, con)
    for term, printed in case.published_estimates.items():
        _assert_printed(res.coef(term).estimate, printed, f"{case.id}: {term} estimate")
    for term, printed in case.published_std_errors.items():
        _assert_printed(res.coef(term).std_error, printed, f"{case.id}: {term} std error")
    if case.published_deviance is not None:
        _assert_printed(res.deviance, case.published_deviance, f"{case.id}: deviance")
    assert res.residual_df == case.published_df_resid
    for attribute, printed in case.published_extra.items():
        _assert_printed(getattr(res, attribute), printed, f"{case.id}: {attribute}")


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_fit_matches_statsmodels(case: Case, con: duckdb.DuckDBPyConnection) -> None:
    """indb against statsmodels GLM on the same literals, at tight tolerance."""
    res = _fit_case(case, con)
    ref = case.statsmodels()
    assert res.converged
    assert res.terms == list(case.terms)
    assert_allclose(res.estimates, ref.params, rtol=COEF_RTOL, atol=COEF_ATOL)
    assert_allclose(res.std_errors, ref.bse, rtol=SE_RTOL)
    assert_allclose(res.covariance, ref.cov_params(), rtol=SE_RTOL, atol=1e-14)
    assert_allclose(res.deviance, ref.deviance, rtol=DEVIANCE_RTOL)
    # statsmodels' null deviance refits the intercept-only model with the offset, which is
    # the convention indb promises (api contract).
    assert_allclose(res.null_deviance, ref.null_deviance, rtol=DEVIANCE_RTOL)
    assert_allclose(res.pearson_chi2, ref.pearson_chi2, rtol=DEVIANCE_RTOL)
    # Gamma: dispersion = Pearson chi2 / residual_df, statsmodels' default scale.
    # Poisson/binomial: fixed at 1, as in statsmodels.
    assert_allclose(res.dispersion, ref.scale, rtol=DEVIANCE_RTOL)
    assert res.residual_df == ref.df_resid
    assert res.n_used == ref.nobs
    assert res.n_excluded == 0
    # Log-likelihood: same definition as statsmodels' llf for these families (for gamma
    # both use the Pearson-based dispersion). AIC differs by design: indb counts an
    # estimated dispersion as a parameter (k = rank + 1), statsmodels does not (k = rank).
    assert_allclose(res.log_likelihood, ref.llf, rtol=DEVIANCE_RTOL)
    k = ref.df_model + 1 + (1 if res.dispersion_estimated else 0)
    assert res.dispersion_estimated == (case.fit_args[2] == "gamma")
    assert_allclose(res.aic, -2.0 * ref.llf + 2.0 * k, rtol=DEVIANCE_RTOL)


def test_dobson_closed_form(con: duckdb.DuckDBPyConnection) -> None:
    """Dobson's table fits exactly: mu = row total * column total / grand total.

    For a Poisson log-linear main-effects model on a two-way table the ML fitted values
    are the independence fit (a standard closed form, e.g. Dobson 1990, Chapter 9), so
    the coefficients are logs of margin ratios and each treatment effect is exactly 0
    (every treatment total is 50). These are derived from the data by hand, not by a fit.
    """
    res = _fit_case(DOBSON, con)
    counts = np.array([r[2] for r in DOBSON_ROWS], dtype=float).reshape(3, 3)  # [treat, out]
    outcome_totals = counts.sum(axis=0)  # 63, 40, 47
    treatment_totals = counts.sum(axis=1)  # 50, 50, 50
    grand = counts.sum()
    mu = np.outer(treatment_totals, outcome_totals) / grand
    expected = {
        "intercept": math.log(mu[0, 0]),  # log(21)
        "outcome=2": math.log(outcome_totals[1] / outcome_totals[0]),
        "outcome=3": math.log(outcome_totals[2] / outcome_totals[0]),
        "treatment=2": 0.0,
        "treatment=3": 0.0,
    }
    for term, value in expected.items():
        assert_allclose(res.coef(term).estimate, value, rtol=1e-8, atol=1e-9, err_msg=term)
    # Poisson deviance 2 * sum(y log(y / mu)); sum(y - mu) = 0 for the independence fit.
    assert_allclose(res.deviance, 2.0 * np.sum(counts * np.log(counts / mu)), rtol=1e-8)


def test_clotting_both_lots_with_interaction(con: duckdb.DuckDBPyConnection) -> None:
    """Both lots in one gamma fit: separate intercepts and slopes per lot.

    The coefficients reproduce the two separate published lines (McCullagh & Nelder 1989,
    p. 302, recalled from memory): the lot 2 line is intercept + lot=2 and
    log_u + lot=2 & log_u. Standard errors use the dispersion pooled over both lots, so
    they are checked against statsmodels on the same pooled design.
    """
    _create_table(con, *CLOTTING_TABLE)
    res = indb.fit(
        "SELECT lot, ln(u) AS log_u, clotting_seconds FROM clotting",
        "clotting_seconds",
        "gamma",
        "inverse",
        db=con,
        tol=1e-10,
        reference={"lot": "1"},
        interactions=[("lot", "log_u")],
    )
    assert res.terms == ["intercept", "lot=2", "log_u", "lot=2 & log_u"]
    b = {term: res.coef(term).estimate for term in res.terms}
    lot1, lot2 = CLOTTING_PUBLISHED["1"], CLOTTING_PUBLISHED["2"]
    _assert_printed(b["intercept"], lot1["intercept"], "lot 1 intercept")
    _assert_printed(b["log_u"], lot1["log_u"], "lot 1 slope")
    _assert_printed(b["intercept"] + b["lot=2"], lot2["intercept"], "lot 2 intercept")
    _assert_printed(b["log_u"] + b["lot=2 & log_u"], lot2["log_u"], "lot 2 slope")

    lot = [r[0] for r in CLOTTING_ROWS]
    log_u = np.log(np.array([r[1] for r in CLOTTING_ROWS]))
    seconds = np.array([r[2] for r in CLOTTING_ROWS])
    lot2_indicator = _indicator(lot, "2")
    exog = _design(lot2_indicator, log_u, lot2_indicator * log_u)
    ref = _sm_fit(seconds, exog, sm.families.Gamma(link=L.InversePower()))
    assert_allclose(res.estimates, ref.params, rtol=COEF_RTOL)
    assert_allclose(res.std_errors, ref.bse, rtol=SE_RTOL)
    assert_allclose(res.deviance, ref.deviance, rtol=DEVIANCE_RTOL)
    assert_allclose(res.dispersion, ref.scale, rtol=DEVIANCE_RTOL)
    assert res.residual_df == 14


def test_ships_structural_zeros_left_out(con: duckdb.DuckDBPyConnection) -> None:
    """The book fits 34 of the 40 cells (six have no ships): 34 - 9 = 25 residual df."""
    res = _fit_case(SHIPS, con)
    assert res.n_used == len(_ships_used()) == 34
    assert res.residual_df == 25
