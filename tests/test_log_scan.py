"""The log-link scan: factor effects multiplied in after the scan instead of joined per row.

For a log link and V(mu) = mu^p the IRLS sums split into powers of m = e^(off + x'b) per
cell and a factor e^(k g_c) per cell (indb.logsums). The fits must agree with statsmodels'
GLM (test-only oracle) and with the per-row scan (``gram_query``, the route every other
model takes) on the same data. Data: statsmodels.datasets.fair (6366 respondents: two
categorical ratings, numeric columns, ``ln(age)`` as the offset and a prior weight derived
from the occupation code; ``reference_cases.fair_rated``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from reference_cases import design_matrix, duckdb_table, fair_rated

import indb
from indb import irls

CASES = {
    # name: (indb options, statsmodels family, response column)
    "poisson": ({"family": "poisson"}, sm.families.Poisson(), "children"),
    "gamma": (
        {"family": "gamma", "link": "log"},
        sm.families.Gamma(sm.families.links.Log()),
        "years",
    ),
    "tweedie_1.5": (
        {"family": "tweedie", "power": 1.5},
        sm.families.Tweedie(var_power=1.5, link=sm.families.links.Log()),
        "affairs",
    ),
    "inverse_gaussian": (
        {"family": "inverse_gaussian", "link": "log"},
        sm.families.InverseGaussian(sm.families.links.Log()),
        "years",
    ),
    "gaussian_log": (
        {"family": "gaussian", "link": "log"},
        sm.families.Gaussian(sm.families.links.Log()),
        "years",
    ),
}


@pytest.fixture(scope="module")
def fair() -> pd.DataFrame:
    return fair_rated()


def _fits(fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch, **opts):
    """The same fit twice: with the log-link scan, and with it switched off."""
    con = duckdb_table(fair, "fair")
    calls: list[int] = []
    real = irls.log_scan_query

    def counted(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(irls, "log_scan_query", counted)
    common = dict(db=con, tol=1e-12, compress="never", sample_start="never", **opts)
    fast = indb.fit("fair", **common)
    used = len(calls)
    monkeypatch.setattr(irls, "log_scan_applies", lambda ctx, design: False)
    per_row = indb.fit("fair", **common)
    return fast, per_row, used


@pytest.mark.parametrize("name", sorted(CASES))
def test_log_scan_matches_the_per_row_scan_and_statsmodels(
    fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch, name: str
) -> None:
    opts, family, response = CASES[name]
    frame = fair[fair[response] > 0] if name in ("gamma", "inverse_gaussian") else fair
    fast, per_row, used = _fits(
        frame,
        monkeypatch,
        response=response,
        predictors=["rating", "religious", "educ"],
        interactions=[("rating", "religious")],
        offset="ln(age)",
        weight="wt",
        **opts,
    )
    assert used >= 2, "the log-link scan did not run"
    assert fast.converged and per_row.converged
    assert fast.terms == per_row.terms
    # the two routes: the same sums, up to summation order and the split deviance
    assert_allclose(fast.estimates, per_row.estimates, rtol=1e-9, atol=1e-11)
    assert_allclose(fast.std_errors, per_row.std_errors, rtol=1e-9)
    assert_allclose(fast.deviance, per_row.deviance, rtol=1e-10)
    assert_allclose(fast.null_deviance, per_row.null_deviance, rtol=1e-10)
    assert_allclose(fast.pearson_chi2, per_row.pearson_chi2, rtol=1e-9)
    if np.isfinite(per_row.log_likelihood):
        assert_allclose(fast.log_likelihood, per_row.log_likelihood, rtol=1e-10)

    # statsmodels GLM on the same rows (test-only oracle)
    X = design_matrix(
        frame,
        ["rating", "religious", "educ"],
        categorical=["rating", "religious"],
        interactions=[("rating", "religious")],
    )[fast.terms]
    ref = sm.GLM(
        frame[response],
        X,
        family=family,
        offset=np.log(frame["age"]),
        var_weights=frame["wt"],
    ).fit(tol=1e-13, maxiter=200)
    assert_allclose(fast.estimates, ref.params, rtol=1e-8, atol=1e-9)
    assert_allclose(fast.std_errors, ref.bse, rtol=1e-7)
    assert_allclose(fast.deviance, ref.deviance, rtol=1e-8)
    assert_allclose(fast.null_deviance, ref.null_deviance, rtol=1e-8)
    assert_allclose(fast.pearson_chi2, ref.pearson_chi2, rtol=1e-7)


def test_a_factor_by_numeric_slope_keeps_the_per_row_scan(
    fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    # a slope per level varies within a cell: no constant factor per cell, no log-link scan
    fast, per_row, used = _fits(
        fair,
        monkeypatch,
        response="children",
        family="poisson",
        predictors=["rating", "educ"],
        interactions=[("rating", "educ")],
    )
    assert used == 0
    assert_allclose(fast.estimates, per_row.estimates, rtol=1e-12)


# the deviance is rounding noise, so the stall test of IRLS (and statsmodels' own check)
# call the fit a boundary one: expected here, not what this test is about
@pytest.mark.filterwarnings("ignore::indb.errors.SeparationWarning")
@pytest.mark.filterwarnings("ignore:Perfect separation")
def test_a_near_perfect_fit_returns_to_per_row_deviances(
    fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A gamma response that the model fits to 1e-9 (a multiplicative ripple of the fair
    # data's own columns): its deviance is ~1e-17 per row, far below the split deviance's
    # terms (~ln y per row), whose sum would lose all its digits. The fitter must notice
    # and finish on per-row deviances, matching statsmodels there too.
    frame = fair.copy()
    ripple = 1e-9 * np.sin(np.arange(len(frame)))
    frame["close"] = np.exp(0.3 + 0.05 * frame["educ"]) * (1.0 + ripple)
    fast, per_row, used = _fits(
        frame,
        monkeypatch,
        response="close",
        family="gamma",
        link="log",
        predictors=["rating", "educ"],
    )
    scans = sum(1 + r.step_halvings for r in fast.iteration_log)
    assert 1 <= used < scans - 1, (used, scans)  # the last scans ran per row
    assert_allclose(fast.estimates, per_row.estimates, rtol=1e-9, atol=1e-12)
    assert abs(fast.deviance - per_row.deviance) < 1e-11
    X = design_matrix(frame, ["rating", "educ"], categorical=["rating"])[fast.terms]
    ref = sm.GLM(frame["close"], X, family=sm.families.Gamma(sm.families.links.Log())).fit(
        tol=1e-15, maxiter=200
    )
    # coefficients that are 0 up to the ripple: both fits agree to 1e-11 absolute there
    assert_allclose(fast.estimates, ref.params, rtol=1e-8, atol=1e-11)
    # the deviance itself (~1e-14) is rounding noise of the per-row formula on any engine:
    # 6366 terms of (y/mu - 1)^2 ~ 1e-18, each computed from ln(y/mu) to ~1e-16
    assert abs(fast.deviance - ref.deviance) < 1e-11
