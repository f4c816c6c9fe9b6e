"""The log-link scan: factor effects multiplied in after the scan instead of joined per row.

For a log link and V(mu) = mu^p the IRLS sums split into powers of m = e^(off + x'b) per
cell and a factor e^(k g_c) per cell (indb.logsums). The fits must agree with statsmodels'
GLM (test-only oracle) and with the per-row scan (``gram_query``, the route every other
model takes) on the same data. Data: statsmodels.datasets.fair (6366 respondents: two
categorical ratings, numeric columns, ``ln(age)`` as the offset and a prior weight derived
from the occupation code; ``reference_cases.fair_rated``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from reference_cases import design_matrix, duckdb_table, fair_rated

import indb
from indb import fitter, irls, logsums, sample_start

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


def _case(fair: pd.DataFrame, name: str) -> tuple[dict, Any, str, pd.DataFrame]:
    """A case's options, statsmodels family, response and rows (positive responses only
    for the families whose means must be positive)."""
    opts, family, response = CASES[name]
    frame = fair[fair[response] > 0] if name in ("gamma", "inverse_gaussian") else fair
    return opts, family, response, frame


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
    opts, family, response, frame = _case(fair, name)
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


@pytest.mark.parametrize("name", sorted(CASES))
def test_a_gradient_only_scan_gives_the_full_scans_update(
    fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch, name: str
) -> None:
    # Every full log-link scan of a fit is assembled a second time as the gradient-only
    # scan would be (the s_a_b with a >= 1 dropped, X'WX handed in): X'Wz, the deviance and
    # Pearson's chi-squared must come out the same, so a chord step with the exact X'WX is
    # the Newton step. (Power 2, gamma, sums X'WX once and never takes this form.)
    opts, _, response, frame = _case(fair, name)
    real = logsums.assemble_log_scan
    checked: list[int] = []

    def both(design, cells, beta, p, cache, off_center=0.0, hessian=None):
        got = real(design, cells, beta, p, cache, off_center, hessian)
        if hessian is None and "s_1_1" in cells:
            part = {k: v for k, v in cells.items() if not k.startswith("s_") or k[2] == "0"}
            again = real(design, part, beta, p, got.cache, off_center, got.sums.xtwx)
            assert_allclose(again.sums.xtwz, got.sums.xtwz, rtol=1e-11, atol=1e-9)
            assert_allclose(again.sums.deviance, got.sums.deviance, rtol=1e-13)
            assert_allclose(again.sums.pearson, got.sums.pearson, rtol=1e-13)
            checked.append(1)
        return got

    monkeypatch.setattr(logsums, "assemble_log_scan", both)
    res = indb.fit(
        "fair",
        response,
        db=duckdb_table(frame, "fair"),
        predictors=["rating", "religious", "educ"],
        interactions=[("rating", "religious")],
        offset="ln(age)",
        weight="wt",
        compress="never",
        sample_start="never",
        **opts,
    )
    assert res.converged
    assert len(checked) >= (0 if name == "gamma" else 2)


@pytest.mark.parametrize("name", sorted(CASES))
def test_the_first_scan_after_a_sample_start_sums_the_gradient_only(
    fair: pd.DataFrame, monkeypatch: pytest.MonkeyPatch, name: str
) -> None:
    # After a sample start the first scan of the table takes X'WX from the sample (scaled
    # to the table) and sums only the gradient; the fit must still reach statsmodels' GLM
    # (test-only oracle) and the fit whose first scan sums X'WX.
    opts, family, response, frame = _case(fair, name)
    monkeypatch.setattr(sample_start, "SAMPLE_START_ROWS", 1500)
    kinds: list[bool] = []
    real = irls.log_scan_query

    def noted(*args, **kwargs):
        kinds.append(kwargs.get("gradient_only", False))
        return real(*args, **kwargs)

    monkeypatch.setattr(irls, "log_scan_query", noted)
    common = dict(
        db=duckdb_table(frame, "fair"),
        predictors=["rating", "religious", "educ"],
        categorical=["rating", "religious"],
        offset="ln(age)",
        weight="wt",
        tol=1e-12,
        compress="never",
        sample_start="always",
        **opts,
    )
    chord = indb.fit("fair", response, **common)
    first_fit_scan = sum(1 for r in chord.iteration_log if r.phase == "sample")
    real_start = fitter.sample_start
    monkeypatch.setattr(fitter, "sample_start", lambda *a: (*real_start(*a)[:2], None))
    full = indb.fit("fair", response, **common)

    gradient_only = name != "gamma"  # gamma sums X'WX once anyway, in the first scan
    assert kinds.count(True) == (1 if gradient_only else 0)
    if gradient_only:
        # the sample's first scan, at the family's starting means, is not a log-link scan
        assert kinds.index(True) == first_fit_scan - 1
        assert chord.path.endswith(
            "the first scan summed the gradient only, with the sample's X'WX"
        )
    assert "gradient only" not in full.path
    assert chord.converged and full.converged
    assert_allclose(chord.estimates, full.estimates, rtol=1e-9, atol=1e-11)
    assert_allclose(chord.std_errors, full.std_errors, rtol=1e-8)
    assert_allclose(chord.deviance, full.deviance, rtol=1e-12)

    X = design_matrix(frame, ["rating", "religious", "educ"], categorical=["rating", "religious"])[
        chord.terms
    ]
    ref = sm.GLM(
        frame[response], X, family=family, offset=np.log(frame["age"]), var_weights=frame["wt"]
    ).fit(tol=1e-13, maxiter=200)
    assert_allclose(chord.estimates, ref.params, rtol=1e-8, atol=1e-9)
    assert_allclose(chord.std_errors, ref.bse, rtol=1e-7)
    assert_allclose(chord.deviance, ref.deviance, rtol=1e-8)
