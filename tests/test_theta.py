"""The negative binomial theta estimated with the coefficients in shared scans.

Oracle (test-only, outside the project): statsmodels' discrete ``NegativeBinomial`` (NB2,
maximum likelihood of alpha = 1/theta with the coefficients) on the RAND Health Insurance
Experiment data shipped as ``statsmodels.datasets.randhie`` (20,190 rows). Its alpha and
standard error are checked first: the score of the log-likelihood at its estimates is zero
to 1e-6 (its own ``score``), and its standard error of alpha agrees with the inverse of a
finite-difference Hessian of its ``loglike`` (a second route). theta's standard error then
follows by the delta method, se(theta) = se(alpha) / alpha^2.
"""

from __future__ import annotations

import warnings

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

import indb
from indb.errors import ConvergenceWarning

PREDICTORS = ["lncoins", "idp", "lpi", "fmde", "physlm", "disea"]


@pytest.fixture(scope="module")
def randhie():
    data = sm.datasets.randhie.load_pandas().data
    return data[["mdvis", *PREDICTORS]].astype(float)


@pytest.fixture(scope="module")
def oracle(randhie):
    x = sm.add_constant(randhie[PREDICTORS])
    model = sm.NegativeBinomial(randhie["mdvis"], x, loglike_method="nb2")
    res = model.fit(method="newton", maxiter=200, tol=1e-14, disp=0)
    assert np.max(np.abs(model.score(res.params.to_numpy()))) < 1e-6
    # second route to alpha's standard error: a central-difference Hessian of loglike
    p, h = res.params.to_numpy(), 1e-4
    k = len(p)
    hess = np.zeros((k, k))
    for i in range(k):
        for j in range(k):
            e_i, e_j = np.eye(k)[i] * h, np.eye(k)[j] * h
            hess[i, j] = (
                model.loglike(p + e_i + e_j)
                - model.loglike(p + e_i - e_j)
                - model.loglike(p - e_i + e_j)
                + model.loglike(p - e_i - e_j)
            ) / (4 * h * h)
    se_fd = np.sqrt(np.diag(np.linalg.inv(-hess)))
    assert_allclose(se_fd[-1], res.bse.iloc[-1], rtol=1e-4)
    return res


def _fit(randhie, threads: int | None = None):
    con = duckdb.connect()
    con.register("frame", randhie)
    con.execute("CREATE TABLE randhie AS SELECT * FROM frame")
    return indb.fit("randhie", "mdvis", "negative_binomial", db=con, threads=threads, tol=1e-10)


def test_theta_and_its_standard_error_match_the_maximum_likelihood_fit(randhie, oracle) -> None:
    res = _fit(randhie)
    alpha, se_alpha = oracle.params.iloc[-1], oracle.bse.iloc[-1]
    assert_allclose(res.family_params["theta"], 1 / alpha, rtol=1e-6)
    # indb's is the profile information of theta at the fitted means; the oracle's comes
    # from the full Hessian, whose theta-coefficient block has expectation 0 (NB2), so
    # the two agree closely but not to the last digit
    assert_allclose(res.family_param_errors["theta"], se_alpha / alpha**2, rtol=2e-3)
    assert res.converged
    assert "std error" in str(res)
    again = indb.FitResult.from_dict(res.to_dict())
    assert again.family_param_errors == res.family_param_errors


def test_theta_scans_are_logged_few_and_settle_whatever_the_thread_count(randhie) -> None:
    one, two = _fit(randhie, threads=1), _fit(randhie, threads=2)
    theta_scans = [r for r in one.iteration_log if r.phase == "theta"]
    # Poisson start (loose), histogram, moments, then shared scans: all in the log
    assert 4 <= len(theta_scans) <= 20, len(theta_scans)
    assert all(r.seconds >= 0 for r in theta_scans)
    # the stopping rule is in theta's standard errors, far above the rounding of a
    # parallel sum: the thread count moves theta by far less than its standard error
    diff = abs(one.family_params["theta"] - two.family_params["theta"])
    assert diff < 1e-3 * one.family_param_errors["theta"]
    assert_allclose(one.estimates, two.estimates, rtol=1e-6)


def test_a_theta_that_does_not_settle_is_reported_not_converged(randhie) -> None:
    con = duckdb.connect()
    con.register("frame", randhie)
    con.execute("CREATE TABLE randhie AS SELECT * FROM frame")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = indb.fit("randhie", "mdvis", "negative_binomial", db=con, max_iter=2)
    notes = [str(w.message) for w in caught if issubclass(w.category, ConvergenceWarning)]
    assert any("theta did not settle" in n for n in notes)
    assert not res.converged
    with pytest.raises(indb.NonConvergenceError, match="theta did not settle"):
        indb.fit("randhie", "mdvis", "negative_binomial", db=con, max_iter=2, strict=True)
