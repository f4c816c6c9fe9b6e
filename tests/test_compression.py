"""The compressed route (rows folded to distinct design rows) gives the same fit as the
row-by-row route, and both match statsmodels' GLM (the external oracle) on the full rows.

Data: statsmodels.datasets.fair (6366 respondents; few distinct design rows once the
predictors are the categorical ratings), with an exposure-like offset made from the
continuous ``yrs_married`` column so the offset differs within design rows.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from reference_cases import design_matrix, duckdb_table, fair_rated

import indb

TOL = 1e-13


@pytest.fixture(scope="module")
def fair() -> pd.DataFrame:
    return fair_rated()


CASES = {
    # name: (family options, statsmodels family, response, offset?, weight?)
    "poisson_offset": (
        {"family": "poisson", "offset": "ln(years)"},
        sm.families.Poisson(),
        "children",
        True,
        None,
    ),
    "gamma_log_offset": (
        {"family": "gamma", "link": "log", "offset": "ln(years)"},
        sm.families.Gamma(sm.families.links.Log()),
        "years_pos",
        True,
        None,
    ),
    "tweedie_offset": (
        {"family": "tweedie", "power": 1.5, "offset": "ln(years)"},
        sm.families.Tweedie(var_power=1.5, link=sm.families.links.Log()),
        "affairs",
        True,
        None,
    ),
    "binomial": ({"family": "binomial"}, sm.families.Binomial(), "had", False, None),
    "gaussian_weighted": (
        {"family": "gaussian", "weight": "years"},
        sm.families.Gaussian(),
        "affairs",
        False,
        "years",
    ),
}


@pytest.mark.parametrize("name", list(CASES))
def test_compressed_equals_row_by_row_and_statsmodels(fair: pd.DataFrame, name: str) -> None:
    opts, smfam, response, with_offset, weight = CASES[name]
    frame = fair.copy()
    frame["years_pos"] = frame["years"] + 1.0
    con = duckdb_table(frame, "fair")
    source = f"SELECT rating, religious, years, {response} FROM fair"
    if response == "years_pos":
        source = "SELECT rating, religious, years, years_pos FROM fair"
    common = {"db": con, "tol": TOL, "reference": {"rating": "5", "religious": "3"}}
    folded = indb.fit(source, response, compress="always", **opts, **common)
    rows = indb.fit(source, response, compress="never", **opts, **common)
    assert folded.path.startswith("compressed") and not rows.path.startswith("compressed")
    # Both routes stop within the convergence tolerance of the same optimum (the folded
    # route takes other steps), so coefficients agree to ~1e-7 of a standard error; the
    # deviance is stationary there and agrees much more closely.
    assert_allclose(
        folded.estimates, rows.estimates, rtol=0, atol=1e-6 * float(rows.std_errors.min())
    )
    assert_allclose(folded.std_errors, rows.std_errors, rtol=1e-7)
    for attr in ("deviance", "null_deviance", "residual_df"):
        assert_allclose(getattr(folded, attr), getattr(rows, attr), rtol=1e-10, err_msg=attr)
    for attr in ("pearson_chi2", "dispersion"):
        assert_allclose(getattr(folded, attr), getattr(rows, attr), rtol=1e-7, err_msg=attr)
    if name != "tweedie_offset":
        assert_allclose(folded.log_likelihood, rows.log_likelihood, rtol=1e-10)
    assert folded.n_used == rows.n_used == len(frame)
    # statsmodels GLM on the full rows
    X = design_matrix(
        frame,
        ["rating", "religious", "years"],
        categorical=["rating", "religious"],
        reference={"rating": "5", "religious": "3"},
    )[rows.terms]
    kw = {}
    if with_offset:
        kw["offset"] = np.log(frame["years"])
    if weight:
        kw["var_weights"] = frame[weight]
    ref = sm.GLM(frame[response], X, family=smfam, **kw).fit(tol=1e-13, maxiter=300)
    assert_allclose(folded.estimates, ref.params.to_numpy(), rtol=1e-8, atol=1e-9)
    assert_allclose(folded.std_errors, ref.bse.to_numpy(), rtol=1e-7)
    assert_allclose(folded.deviance, ref.deviance, rtol=1e-8)
    assert_allclose(folded.pearson_chi2, ref.pearson_chi2, rtol=1e-6)


# -- the compressed route profiles the fold: the same counts, exclusions and errors ----------


def _dirty(fair: pd.DataFrame) -> duckdb.DuckDBPyConnection:
    """fair with NULLs in a key, in the response and in the offset's column, and a
    frequency weight column (statsmodels.datasets.fair; the damage is ours)."""
    frame = fair.copy()
    frame.loc[frame.index[::97], "rating"] = None
    frame.loc[frame.index[5::89], "children"] = np.nan
    frame.loc[frame.index[7::101], "years"] = np.nan
    frame["copies"] = (np.arange(len(frame)) % 3 + 1).astype(float)
    con = duckdb_table(frame, "fair")
    return con


def test_folded_profile_counts_exclusions_like_the_row_route(fair: pd.DataFrame) -> None:
    con = _dirty(fair)
    source = "SELECT rating, religious, years, children, copies FROM fair"
    opts = {
        "family": "poisson",
        "offset": "ln(years)",
        "frequency_weight": "copies",
        "db": con,
        "tol": TOL,
    }
    folded = indb.fit(source, "children", compress="always", **opts)
    rows = indb.fit(source, "children", compress="never", **opts)
    assert folded.path.startswith("compressed") and not rows.path.startswith("compressed")
    assert folded.n_used == rows.n_used and folded.n_excluded == rows.n_excluded > 0
    assert folded.to_dict()["excluded_by_column"] == rows.to_dict()["excluded_by_column"]
    for attr in ("deviance", "null_deviance", "log_likelihood", "aic"):
        assert_allclose(getattr(folded, attr), getattr(rows, attr), rtol=1e-10, err_msg=attr)
    assert_allclose(
        folded.estimates, rows.estimates, rtol=0, atol=1e-6 * float(rows.std_errors.min())
    )
    # pandas drops the same rows (the external count): a row is used when it has no NULL
    keep = fair.copy()
    keep.loc[keep.index[::97], "rating"] = None
    keep.loc[keep.index[5::89], "children"] = np.nan
    keep.loc[keep.index[7::101], "years"] = np.nan
    assert folded.n_used == len(keep.dropna(subset=["rating", "children", "years"]))


@pytest.mark.parametrize(
    ("expr", "message"),
    [
        ("CASE WHEN religious = '2' THEN -1 ELSE children END", "needs a response >= 0"),
        ("CASE WHEN religious = '2' THEN 'NaN'::DOUBLE ELSE children END", "NaN or infinite"),
    ],
)
def test_folded_route_reports_domain_errors_like_the_row_route(
    fair: pd.DataFrame, expr: str, message: str
) -> None:
    con = _dirty(fair)
    source = f"SELECT rating, religious, years, {expr} AS kids FROM fair"
    errors = []
    for mode in ("always", "never"):
        with pytest.raises(indb.SpecError, match=message) as info:
            indb.fit(source, "kids", family="poisson", db=con, compress=mode)
        errors.append(str(info.value))
    assert errors[0] == errors[1]
    # nothing left behind by the compressed route
    left = con.execute("SELECT count(*) FROM duckdb_tables() WHERE table_name LIKE 'indb_%'")
    assert left.fetchone()[0] == 0
