"""indb against statsmodels (test-only oracle) on datasets shipped inside PyPI packages.

The cases, their datasets (named beside each loader and case) and the statsmodels oracles live
in ``reference_cases.py``. Each case is fitted once per module on a fresh in-memory DuckDB
database holding the dataset as table ``data``.

Conventions where indb deliberately differs from statsmodels (the oracle converts; see
``reference_cases._glm_oracle``):

* Gaussian log-likelihood: always the ML dispersion sum(w*(y-mu)^2)/n; statsmodels uses it only
  for the identity link and the Pearson dispersion otherwise.
* AIC/BIC count the dispersion as a parameter when it is estimated (statsmodels counts only
  the rank); BIC uses n = sum of frequency weights (as statsmodels does) else the row count.
* Tweedie: no log-likelihood (NaN, like statsmodels without EQL); llf/AIC/BIC not compared.
* Negative binomial with theta estimated: coefficients and theta from statsmodels' discrete NB2
  maximum likelihood; standard errors, deviance, Pearson chi2 and llf from the GLM family at
  alpha = 1/theta-hat; AIC/BIC count the rank plus the estimated theta.
"""

from __future__ import annotations

import math
from functools import cache
from typing import Any

import duckdb
import numpy as np
import pytest
from numpy.testing import assert_allclose
from reference_cases import CASES, CASES_BY_ID, ReferenceCase

import indb

# Tolerances (indb runs with tol=1e-13 because non-canonical links converge linearly and a
# deviance change of 1e-10 still leaves coefficients ~1e-6 from the optimum; the oracles are
# converged to ~1e-13, see
# reference_cases.fit_check). The deviance is stationary at the optimum, so it is compared
# more tightly than the coefficients; the llf depends on the Pearson dispersion, which moves
# to first order with the coefficients, hence 1e-7 rather than 1e-8.
RTOL_COEF = 1e-8
RTOL_SE = 1e-7
RTOL_DEVIANCE = 1e-8
RTOL_STAT = 1e-6  # null deviance, Pearson chi2, dispersion, theta
RTOL_LLF = 1e-7
# A coefficient whose true value is near zero cannot meet a relative tolerance; an absolute
# error of 1e-7 of its standard error is statistically invisible, so that is the atol.
ATOL_COEF_IN_SE = 1e-8


@cache
def oracle(case_id: str) -> dict[str, Any]:
    return CASES_BY_ID[case_id].oracle()


@pytest.fixture(scope="module", params=CASES, ids=[c.id for c in CASES])
def fitted(request: pytest.FixtureRequest) -> tuple[ReferenceCase, Any, dict[str, Any]]:
    case: ReferenceCase = request.param
    con = duckdb.connect()  # fresh in-memory database per case
    try:
        frame = case.load()
        con.register("reference_frame", frame)
        con.execute("CREATE TABLE data AS SELECT * FROM reference_frame")
        con.unregister("reference_frame")
        res = indb.fit("data", **case.fit_kwargs, db=con, tol=1e-13)
    finally:
        con.close()
    return case, res, oracle(case.id)


def _assert_terms(
    res: Any, want: dict[str, float], attr: str, rtol: float, atol: dict[str, float]
) -> None:
    """assert_allclose term by term, reporting every term that fails."""
    failures = []
    for term, value in want.items():
        got = getattr(res.coef(term), attr)
        try:
            assert_allclose(got, value, rtol=rtol, atol=atol.get(term, 0.0), err_msg=term)
        except AssertionError:
            rel = abs(got - value) / abs(value) if value else math.inf
            failures.append(f"{term}: indb {got!r} statsmodels {value!r} rel.diff {rel:.2e}")
    if failures:
        raise AssertionError(f"{attr} differs (rtol {rtol}):\n" + "\n".join(failures))


def test_converged(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, _ = fitted
    assert res.converged


def test_terms(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, want = fitted
    assert sorted(res.terms) == sorted(want["terms"])
    # Contract: intercept, then main effects in the source's column order, then interactions.
    main = [t for t in want["terms"] if " & " not in t]
    assert res.terms[: len(main)] == main


def test_coefficients(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, want = fitted
    atol = {t: ATOL_COEF_IN_SE * se for t, se in want["bse"].items()}
    _assert_terms(res, want["params"], "estimate", RTOL_COEF, atol)


def test_standard_errors(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, want = fitted
    _assert_terms(res, want["bse"], "std_error", RTOL_SE, {})


def test_deviance(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, want = fitted
    assert_allclose(res.deviance, want["deviance"], rtol=RTOL_DEVIANCE)


def test_null_deviance(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    # statsmodels GLMResults.null_deviance convention: intercept-only model refitted with the
    # same offset and weights, also for models fitted without an intercept.
    _, res, want = fitted
    assert_allclose(res.null_deviance, want["null_deviance"], rtol=RTOL_STAT)


def test_pearson_chi2(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    _, res, want = fitted
    assert_allclose(res.pearson_chi2, want["pearson_chi2"], rtol=RTOL_STAT)


def test_dispersion(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    # Same as statsmodels' default scale: 1 for binomial/poisson/negative binomial, Pearson
    # chi2 / residual_df otherwise.
    _, res, want = fitted
    assert res.dispersion_estimated == want["dispersion_estimated"]
    assert_allclose(res.dispersion, want["scale"], rtol=RTOL_STAT)


def test_degrees_of_freedom(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    # statsmodels: residual_df = sum of frequency weights (or rows) - rank.
    _, res, want = fitted
    assert res.n_used == want["rows"]
    assert res.residual_df == pytest.approx(want["residual_df"], abs=1e-9)


def test_log_likelihood(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    case, res, want = fitted
    if case.fit_kwargs["family"] == "tweedie":
        # Contract: no Tweedie log-likelihood (statsmodels' non-EQL llf is NaN as well).
        assert math.isnan(res.log_likelihood)
        return
    assert_allclose(res.log_likelihood, want["llf"], rtol=RTOL_LLF)


def test_information_criteria(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    case, res, want = fitted
    if case.fit_kwargs["family"] == "tweedie":
        pytest.skip("no Tweedie log-likelihood, so no AIC/BIC to compare")
    # indb's convention on the oracle's llf: k = rank, +1 when the dispersion is estimated,
    # +1 when the negative binomial theta is estimated (statsmodels' discrete NB2 counts
    # alpha the same way).
    k = want["rank"] + (1 if want["dispersion_estimated"] else 0)
    k += 1 if "theta" in want["family_params"] else 0
    assert_allclose(res.aic, -2.0 * want["llf"] + 2.0 * k, rtol=RTOL_LLF)
    assert_allclose(res.bic, -2.0 * want["llf"] + math.log(want["nobs"]) * k, rtol=RTOL_LLF)


def test_estimated_theta(fitted: tuple[ReferenceCase, Any, dict[str, Any]]) -> None:
    case, res, want = fitted
    if "theta" not in want["family_params"]:
        pytest.skip("theta is not estimated in this case")
    # statsmodels discrete NB2: variance mu + alpha mu^2, theta = 1/alpha.
    assert_allclose(res.family_params["theta"], want["family_params"]["theta"], rtol=RTOL_STAT)


def test_catalogue_covers_the_brief() -> None:
    """Every family and link combination the catalogue promises is present."""
    seen = {(c.fit_kwargs["family"], c.fit_kwargs.get("link")) for c in CASES}
    for family_link in [
        ("gaussian", None),
        ("gaussian", "log"),
        ("gaussian", "inverse"),
        ("binomial", None),
        ("binomial", "probit"),
        ("binomial", "cloglog"),
        ("binomial", "log"),
        ("binomial", "cauchit"),
        ("poisson", None),
        ("poisson", "identity"),
        ("poisson", "sqrt"),
        ("gamma", None),
        ("gamma", "log"),
        ("gamma", "identity"),
        ("gamma", "power"),
        ("inverse_gaussian", None),
        ("inverse_gaussian", "inverse"),
        ("inverse_gaussian", "log"),
        ("inverse_gaussian", "identity"),
        ("tweedie", "log"),
        ("negative_binomial", None),
    ]:
        assert family_link in seen, family_link
    kwargs = [c.fit_kwargs for c in CASES]
    for option in ("trials", "offset", "weight", "frequency_weight", "categorical", "reference"):
        assert any(option in k for k in kwargs), option
    assert any(k.get("intercept") is False for k in kwargs)
    assert {k["power"] >= 2 for k in kwargs if k["family"] == "tweedie"} == {True, False}
    assert {"theta" in k for k in kwargs if k["family"] == "negative_binomial"} == {True, False}
    assert all(np.isfinite(oracle(c.id)["deviance"]) for c in CASES)
