"""Unit tests for :mod:`indb.families`: variance, unit deviance, its split, log-likelihood
and domains of every family. The SQL forms run on an in-memory DuckDB
(``unit_support.evaluate``); the response-domain checks run real fits, each on a fresh
in-memory DuckDB.

Oracles: ``statsmodels.genmod.families`` (test-only: ``variance``, ``_resid_dev`` -- the unit
deviance, the square of ``resid_dev`` --, ``loglike_obs``, ``starting_mu``, ``GLM``), scipy's
distributions (``norm``, ``binom``, ``poisson``, ``gamma``, ``invgauss``, ``nbinom``) and the
deviances of McCullagh & Nelder, *Generalized Linear Models*, 2nd ed., table 2.1.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest
import statsmodels.api as sm
import statsmodels.genmod.families as smf
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special, stats
from unit_support import evaluate

import indb
from indb import sqlexpr as S
from indb.errors import SpecError
from indb.families import (
    FAMILY_NAMES,
    Family,
    Gaussian,
    NegativeBinomial,
    Tweedie,
    canonical_link,
    make_family,
)
from indb.links import LINK_NAMES, make_link
from indb.logsums import LogCache, null_model

EPS = np.finfo(float).eps


def _sm_zero_log() -> np.errstate:
    """statsmodels' Tweedie(var_power=1) deviance evaluates y ln(y / mu) at y = 0 inside
    np.where and discards it: silence that warning only."""
    return np.errstate(divide="ignore", invalid="ignore")


def _a(*v: float) -> np.ndarray:
    return np.array(v, dtype=float)


def _grid(ys: np.ndarray, mus: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every (y, mu) pair of two grids, flattened."""
    y, mu = np.meshgrid(ys, mus, indexing="ij")
    return y.ravel(), mu.ravel()


# -- the split d(y, mu) = h(y) + a(mu) y + b(mu) (McCullagh & Nelder table 2.1, rearranged) ----


def _power_ab(p: float) -> tuple[Callable, Callable]:
    """a and b for V(mu) = mu^p, as indb.logsums uses them (its _deviance_terms docstring)."""
    if p == 1.0:
        return (lambda mu: -2.0 * np.log(mu)), (lambda mu: 2.0 * mu)
    if p == 2.0:
        return (lambda mu: 2.0 / mu), (lambda mu: 2.0 * np.log(mu))
    return (
        (lambda mu: -2.0 * mu ** (1.0 - p) / (1.0 - p)),
        (lambda mu: 2.0 * mu ** (2.0 - p) / (2.0 - p)),
    )


def _binomial_ab() -> tuple[Callable, Callable]:
    # d = 2 [y ln y + (1-y) ln(1-y)] - 2 y ln(mu / (1-mu)) - 2 ln(1-mu)
    return (lambda mu: -2.0 * np.log(mu / (1.0 - mu))), (lambda mu: -2.0 * np.log1p(-mu))


def _nb_ab(theta: float) -> tuple[Callable, Callable]:
    # d = 2 [y ln y - (y+theta) ln(y+theta)] + 2 y ln((mu+theta)/mu) + 2 theta ln(mu+theta)
    return (
        (lambda mu: 2.0 * np.log((mu + theta) / mu)),
        (lambda mu: 2.0 * theta * np.log(mu + theta)),
    )


# -- one case per family ---------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    """A family, statsmodels' twin, grids (y on the domain, its boundary included where the
    family allows it) and the deviance split's a and b."""

    family: Family
    sm: smf.Family
    ys: np.ndarray
    mus: np.ndarray
    ab: tuple[Callable, Callable]


COUNTS = _a(0, 1, 2, 5, 17, 1000)
COUNT_MU = _a(1e-8, 0.01, 1.0, 3.7, 5.0, 1e3, 1e6)
POSITIVE = _a(1e-8, 0.3, 1.0, 2.5, 1e6)
POSITIVE_MU = _a(1e-8, 0.3, 1.0, 2.5, 7.0, 1e6)


def _tweedie(p: float) -> Case:
    if p == 0:
        ys = _a(-3.0, 0.0, 0.3, 1.0, 2.5, 1e4)
    elif p < 2:
        ys = _a(0.0, 0.3, 1.0, 2.5, 1e4)
    else:
        ys = _a(1e-8, 0.3, 1.0, 2.5, 1e4)
    return Case(
        make_family("tweedie", power=p),
        smf.Tweedie(var_power=p),
        ys,
        _a(1e-6, 0.3, 1.0, 2.5, 7.0, 1e4),
        _power_ab(p),
    )


def _nb(theta: float) -> Case:
    # statsmodels writes the negative binomial with alpha = 1 / theta
    return Case(
        make_family("negative_binomial", theta=theta),
        smf.NegativeBinomial(alpha=1.0 / theta),
        COUNTS,
        COUNT_MU,
        _nb_ab(theta),
    )


CASES: dict[str, Case] = {
    "gaussian": Case(
        make_family("gaussian"),
        smf.Gaussian(),
        _a(-1e3, -2.5, 0.0, 1e-8, 3.0, 1e4),
        _a(-50.0, -1.0, 0.0, 0.3, 3.0, 7.0, 1e4),
        _power_ab(0.0),
    ),
    "binomial": Case(
        make_family("binomial"),
        smf.Binomial(),
        _a(0.0, 0.1, 0.5, 0.9, 1.0),
        _a(1e-10, 1e-6, 0.1, 0.2, 0.5, 0.8, 1 - 1e-6, 1 - 1e-10),
        _binomial_ab(),
    ),
    "poisson": Case(
        make_family("poisson"),
        smf.Poisson(),
        _a(0.0, 0.5, 1.0, 2.0, 5.0, 17.0, 1000.0),
        COUNT_MU,
        _power_ab(1.0),
    ),
    "gamma": Case(make_family("gamma"), smf.Gamma(), POSITIVE, POSITIVE_MU, _power_ab(2.0)),
    "inverse_gaussian": Case(
        make_family("inverse_gaussian"),
        smf.InverseGaussian(),
        POSITIVE,
        POSITIVE_MU,
        _power_ab(3.0),
    ),
    **{f"tweedie({p:g})": _tweedie(p) for p in (0.0, 1.0, 1.2, 1.5, 1.8, 2.0, 2.5, 3.0)},
    **{f"negative_binomial({t:g})": _nb(t) for t in (0.5, 1.0, 7.3)},
}
NAMES = list(CASES)


def test_every_family_is_covered() -> None:
    assert {c.family.name for c in CASES.values()} == set(FAMILY_NAMES)


def _split_size(c: Case, h: np.ndarray, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """The size of the terms the deviance is a difference of -- |h|, |a y|, |b| and the
    y ln y, (y + theta) ln(y + theta) inside h -- so rounding bounds are eps times this, not
    times the (possibly cancelled) deviance."""
    a, b = c.ab
    ay = np.abs(y)
    theta = c.family.params().get("theta", 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        inner = 2.0 * np.nan_to_num(
            ay * np.abs(np.log(ay)) + (ay + theta) * np.abs(np.log(ay + theta))
        )
    return np.abs(h) + np.abs(a(mu) * y) + np.abs(b(mu)) + inner


def _forms(c: Case) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]]:
    y, mu = _grid(c.ys, c.mus)
    f = c.family
    got = evaluate(
        {"y": y, "mu": mu},
        {
            "d": f.unit_deviance_sql,
            "v": lambda y_, mu_: f.variance_sql(mu_),
            "h": lambda y_, mu_: f.deviance_h_sql(y_),
        },
    )
    return y, mu, got


# -- variance and unit deviance against statsmodels ------------------------------------------


@pytest.mark.parametrize("name", NAMES)
def test_variance_matches_statsmodels(name: str) -> None:
    c = CASES[name]
    y, mu, got = _forms(c)
    # statsmodels.genmod.families.<Family>.variance(mu)
    assert_allclose(got["v"], c.sm.variance(mu), rtol=1e-14, atol=0)
    p = c.family.variance_power
    if p is not None:  # V(mu) = mu^p for the power-variance families
        assert_allclose(got["v"], np.abs(mu) ** p, rtol=1e-14, atol=0)


@pytest.mark.parametrize("name", NAMES)
def test_unit_deviance_matches_statsmodels(name: str) -> None:
    c = CASES[name]
    y, mu, got = _forms(c)
    with _sm_zero_log():
        ref = c.sm._resid_dev(y, mu)  # the unit deviance (resid_dev is its signed square root)
        public = c.sm.resid_dev(y, mu)
    size = _split_size(c, got["h"], y, mu)
    # the public form agrees (up to rounding where statsmodels' own value is -0)
    assert np.all(np.abs(public**2 - ref) <= 1e-13 * np.abs(ref) + 50 * EPS * size)
    # relative 1e-12, or eps-sized rounding of the terms where y ~ mu cancels them;
    # binomial: statsmodels adds 1e-20 to mu and 1 - mu, a relative 1e-10 at 1 - mu = 1e-10
    rtol = 1e-10 if name == "binomial" else 1e-12
    assert np.all(np.abs(got["d"] - ref) <= rtol * np.abs(ref) + 50 * EPS * size)
    assert np.all(got["d"] >= -50 * EPS * size)  # a deviance is never negative


def test_binomial_unit_deviance_matches_xlogy_form() -> None:
    # the same deviance with scipy.special.xlogy (0 ln 0 = 0), without statsmodels' 1e-20
    c = CASES["binomial"]
    y, mu, got = _forms(c)
    ref = 2.0 * (special.xlogy(y, y / mu) + special.xlogy(1 - y, (1 - y) / (1 - mu)))
    assert_allclose(got["d"], ref, rtol=1e-12, atol=1e-15)


#: scipy log-likelihood ll(y; mu) at dispersion 1, for d(y, mu) = 2 [ll(y; y) - ll(y; mu)]
SCIPY_UNIT_LL: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    "gaussian": lambda y, mu: stats.norm.logpdf(y, mu, 1.0),
    "poisson": lambda y, mu: stats.poisson.logpmf(y, mu),
    "gamma": lambda y, mu: stats.gamma.logpdf(y, a=1.0, scale=mu),
    "inverse_gaussian": lambda y, mu: stats.invgauss.logpdf(y, mu, scale=1.0),
    "negative_binomial(1)": lambda y, mu: stats.nbinom.logpmf(y, 1.0, 1.0 / (1.0 + mu)),
    "negative_binomial(7.3)": lambda y, mu: stats.nbinom.logpmf(y, 7.3, 7.3 / (7.3 + mu)),
}


@pytest.mark.parametrize("name", list(SCIPY_UNIT_LL))
def test_statsmodels_deviance_is_twice_the_scipy_likelihood_ratio(name: str) -> None:
    """Second source for the oracle: d(y, mu) = 2 [ll(y; y) - ll(y; mu)] at dispersion 1."""
    c = CASES[name]
    ys = c.ys[c.ys == np.round(c.ys)] if name == "poisson" else c.ys  # scipy: integer counts
    mus = c.mus[(c.mus > 1e-6) & (c.mus < 1e5)]  # moderate means: the difference cancels
    y, mu = _grid(ys, mus)
    ll = SCIPY_UNIT_LL[name]
    ratio = 2.0 * (ll(y, y) - ll(y, mu))
    # the log-likelihoods are ~|y ln y| in size and cancel: 1e-9 relative, 1e-9 absolute
    assert_allclose(c.sm._resid_dev(y, mu), ratio, rtol=1e-9, atol=1e-9)


# -- the deviance split h(y) + a(mu) y + b(mu) --------------------------------------------------


@pytest.mark.parametrize("name", NAMES)
def test_deviance_split_adds_up_to_the_unit_deviance(name: str) -> None:
    c = CASES[name]
    y, mu, got = _forms(c)
    a, b = c.ab
    split = got["h"] + a(mu) * y + b(mu)
    # eps-sized rounding of each of the three terms (they cancel where y ~ mu), and an
    # absolute eps: at y = 0 the SQL deviances take ln((1-y)/(1-mu)) (binomial) and
    # ln((y+theta)/(mu+theta)) (negative binomial) of a ratio near 1 without log1p, so for a
    # small mu they are accurate to an absolute eps, not a relative one (8e-8 relative at
    # mu = 1e-10), where the split's a and b above use log1p
    size = _split_size(c, got["h"], y, mu)
    assert np.all(np.abs(split - got["d"]) <= 1e-13 * np.abs(got["d"]) + 50 * EPS * size + EPS)


#: (p, family) for the log-link scan's closed-form intercept-only model
NULL_MODEL_CASES = [
    (0.0, "gaussian"),
    (1.0, "poisson"),
    (1.5, "tweedie(1.5)"),
    (2.0, "gamma"),
    (2.5, "tweedie(2.5)"),
    (3.0, "inverse_gaussian"),
]


@pytest.mark.parametrize(("p", "name"), NULL_MODEL_CASES)
def test_logsums_null_model_uses_the_families_split(p: float, name: str) -> None:
    """indb.logsums.null_model adds a(mu) y + b(mu) to the sums of the family's h(y): its
    intercept and deviance for mu_i = exp(b0 + offset_i) against statsmodels' GLM."""
    c = CASES[name]
    rng = np.random.default_rng(12)
    n = 40
    y = rng.gamma(2.0, 1.5, n)
    if p in (1.0, 1.5):
        y = np.floor(y)  # counts, zeros included
    pw = rng.uniform(0.5, 2.0, n)
    off = rng.normal(0.3, 0.4, n)
    c0 = float(off.mean())
    u = off - c0
    h = evaluate({"y": y}, {"h": c.family.deviance_h_sql})["h"]
    consts = {
        "h": float(np.sum(pw * h)),
        "cy": float(np.sum(pw * y)),
        "cw": float(np.sum(pw)),
        "co": float(np.sum(pw * y * u)),
        "cp": float(np.sum(pw * u)),
        "n1": float(np.sum(pw * y * np.exp((1.0 - p) * u))),
        "n2": float(np.sum(pw * np.exp((2.0 - p) * u))),
        "noff": 0.0,
    }
    cache = LogCache(keys=None, gram={}, resp={}, consts=consts, off_center=c0)
    b0, dev = null_model(p, cache)
    # statsmodels GLM, Tweedie variance mu^p with a log link, intercept and offset
    fam = smf.Tweedie(var_power=p, link=smf.links.Log())
    with _sm_zero_log():
        ref = sm.GLM(y, np.ones((n, 1)), family=fam, offset=off, var_weights=pw).fit(tol=1e-14)
        ref_deviance = float(ref.deviance)
    assert_allclose(b0, ref.params[0], rtol=1e-10)
    mu = np.exp(b0 + off)
    d = evaluate({"y": y, "mu": mu}, {"d": c.family.unit_deviance_sql})["d"]
    assert_allclose(dev, float(np.sum(pw * d)), rtol=1e-11)
    assert_allclose(dev, ref_deviance, rtol=1e-9)
    # an offset too far from the rest for the sums: NaN, so the caller falls back
    far = LogCache(keys=None, gram={}, resp={}, consts={**consts, "noff": 1.0}, off_center=c0)
    assert all(math.isnan(v) for v in null_model(p, far))


# -- log-likelihood against scipy and statsmodels -----------------------------------------------

PW = 2.5
PHI = 0.7

#: scipy log-likelihood per row with prior weight pw and dispersion phi (fixed-dispersion
#: families take phi = 1; their prior weight multiplies the log-likelihood)
SCIPY_LL: dict[str, Callable[..., np.ndarray]] = {
    "gaussian": lambda y, mu, pw, phi: stats.norm.logpdf(y, mu, np.sqrt(phi / pw)),
    "poisson": lambda y, mu, pw, phi: pw * stats.poisson.logpmf(y, mu),
    # shape nu = pw / phi, scale mu / nu: mean mu, variance phi mu^2 / pw
    "gamma": lambda y, mu, pw, phi: stats.gamma.logpdf(y, a=pw / phi, scale=mu * phi / pw),
    # shape lambda = pw / phi: scipy's invgauss(mu / lambda, scale=lambda)
    "inverse_gaussian": (
        lambda y, mu, pw, phi: stats.invgauss.logpdf(y, mu * phi / pw, scale=pw / phi)
    ),
    **{
        f"negative_binomial({t:g})": (
            lambda y, mu, pw, phi, t=t: pw * stats.nbinom.logpmf(y, t, t / (t + mu))
        )
        for t in (0.5, 1.0, 7.3)
    },
}


def _ll_grid(name: str) -> tuple[np.ndarray, np.ndarray]:
    c = CASES[name]
    mus = c.mus[(c.mus > 1e-6) & (c.mus < 1e5)]
    ys = c.ys[c.ys == np.round(c.ys)] if name == "poisson" else c.ys  # scipy: integer counts
    return _grid(ys, mus)


def _ll_sql(c: Case, y: np.ndarray, mu: np.ndarray, pw: float, phi: float) -> np.ndarray:
    make = lambda y_, mu_: c.family.log_likelihood_sql(y_, mu_, S.num(pw), phi, None)  # noqa: E731
    return evaluate({"y": y, "mu": mu}, {"ll": make})["ll"]


@pytest.mark.parametrize("name", list(SCIPY_LL))
def test_log_likelihood_sql_matches_scipy(name: str) -> None:
    c = CASES[name]
    y, mu = _ll_grid(name)
    phi = 1.0 if c.family.dispersion_fixed else PHI
    got = _ll_sql(c, y, mu, PW, phi)
    assert_allclose(got, SCIPY_LL[name](y, mu, PW, phi), rtol=1e-12, atol=1e-12)
    # statsmodels' loglike_obs with var_weights and scale: a second source
    ref = c.sm.loglike_obs(y, mu, var_weights=PW, scale=phi)
    assert_allclose(got, ref, rtol=1e-12, atol=1e-12)


def test_binomial_log_likelihood_without_trials() -> None:
    c = CASES["binomial"]
    y, mu = _grid(_a(0.0, 1.0), c.mus)
    got = _ll_sql(c, y, mu, PW, 1.0)
    # 0/1 responses: the prior weight times scipy's Bernoulli log-pmf
    assert_allclose(got, PW * stats.bernoulli.logpmf(y, mu), rtol=1e-12, atol=1e-14)
    # and statsmodels' Binomial.loglike_obs (n = 1); it adds 1e-20 to mu and 1 - mu
    assert_allclose(got, c.sm.loglike_obs(y, mu, var_weights=PW), rtol=1e-9, atol=1e-12)
    # proportions: pw [y ln mu + (1-y) ln(1-mu)] (scipy.special.xlogy), the Bernoulli form
    # without a binomial coefficient (statsmodels keeps ln Gamma terms of a fractional y)
    y, mu = _grid(c.ys, c.mus)
    got = _ll_sql(c, y, mu, PW, 1.0)
    ref = PW * (special.xlogy(y, mu) + special.xlogy(1.0 - y, 1.0 - mu))
    assert_allclose(got, ref, rtol=1e-12, atol=1e-14)


def _trials_rows() -> dict[str, np.ndarray]:
    rows = [
        (k, n, w, mu)
        for n in (1.0, 4.0, 10.0)
        for k in range(int(n) + 1)
        for w in (1.0, 2.0)
        for mu in (1e-6, 0.3, 0.5, 0.9)
    ]
    k, n, w, mu = (np.array(col, dtype=float) for col in zip(*rows, strict=True))
    return {"k": k, "n": n, "w": w, "mu": mu}


def test_binomial_log_likelihood_with_trials_matches_scipy_binom() -> None:
    r = _trials_rows()
    fam = make_family("binomial")
    # y is the proportion k / n, the prior weight n times the user weight
    got = evaluate(
        {**r, "y": r["k"] / r["n"]},
        {"ll": lambda k, n, w, mu, y: fam.log_likelihood_sql(y, mu, S.mul(n, w), 1.0, n.copy())},
    )["ll"]
    ref = r["w"] * stats.binom.logpmf(r["k"], r["n"], r["mu"])
    assert_allclose(got, ref, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("p", [1.2, 1.5, 2.5])
def test_tweedie_has_no_closed_form_log_likelihood(p: float) -> None:
    # a series density (Dunn & Smyth 2005): neither the per-row nor the deviance form
    fam = make_family("tweedie", power=p)
    assert fam.log_likelihood_sql(S.col("y"), S.col("mu"), S.num(1.0), 1.0, None) is None
    assert fam.log_likelihood(1.0, 1.0, {}, 10.0, 1.0) is None


# -- log-likelihood from the deviance and the data-only sums -------------------------------------

LL_FROM_DEVIANCE = ["gaussian", "poisson", "gamma", "inverse_gaussian", "negative_binomial(7.3)"]


def _from_deviance(
    fam: Family, y: np.ndarray, mu: np.ndarray, pw: np.ndarray, phi: float, trials=None
) -> float | None:
    cols = {"y": y, "mu": mu, "pw": pw}
    if trials is not None:
        cols["n"] = trials
    keys = list(
        fam.saturated_sql(S.col("y"), S.col("pw"), S.col("n") if trials is not None else None)
    )
    exprs = {
        "d": lambda y_, mu_, pw_, *n: S.mul(pw_, fam.unit_deviance_sql(y_, mu_)),
        **{
            key: (
                lambda y_, mu_, pw_, *n, key=key: fam.saturated_sql(y_, pw_, n[0] if n else None)[
                    key
                ]
            )
            for key in keys
        },
    }
    got = evaluate(cols, exprs)
    sums = {key: float(got[key].sum()) for key in keys}
    constant = float(pw[0]) if np.all(pw == pw[0]) else None
    return fam.log_likelihood(float(got["d"].sum()), phi, sums, float(len(y)), constant)


@pytest.mark.parametrize("name", LL_FROM_DEVIANCE)
@pytest.mark.parametrize("weights", ["constant", "varying"])
def test_log_likelihood_from_deviance_matches_scipy(name: str, weights: str) -> None:
    """loglik = loglik_saturated - D / (2 phi), the saturated part from the data-only sums."""
    c = CASES[name]
    rng = np.random.default_rng(7)
    y, mu = _ll_grid(name)
    pw = np.full(len(y), PW) if weights == "constant" else rng.uniform(0.5, 3.0, len(y))
    phi = 1.0 if c.family.dispersion_fixed else PHI
    got = _from_deviance(c.family, y, mu, pw, phi)
    if name == "gamma" and weights == "varying":
        assert got is None  # ln Gamma(pw / phi) with varying weights needs the rows
        return
    # scipy's log-likelihood per row, summed; statsmodels' loglike_obs as a second source
    ref = float(np.sum(SCIPY_LL[name](y, mu, pw, phi)))
    assert_allclose(got, ref, rtol=1e-11)
    assert_allclose(
        got, float(np.sum(c.sm.loglike_obs(y, mu, var_weights=pw, scale=phi))), rtol=1e-11
    )


def test_binomial_log_likelihood_from_deviance_with_and_without_trials() -> None:
    fam = make_family("binomial")
    r = _trials_rows()
    pw = r["n"] * r["w"]
    got = _from_deviance(fam, r["k"] / r["n"], r["mu"], pw, 1.0, trials=r["n"])
    ref = float(np.sum(r["w"] * stats.binom.logpmf(r["k"], r["n"], r["mu"])))  # scipy
    assert_allclose(got, ref, rtol=1e-11)
    y, mu = _grid(_a(0.0, 1.0), _a(1e-6, 0.3, 0.5, 0.9))
    got = _from_deviance(fam, y, mu, np.full(len(y), PW), 1.0)
    assert_allclose(got, float(np.sum(PW * stats.bernoulli.logpmf(y, mu))), rtol=1e-11)


# -- domains ------------------------------------------------------------------------------------

#: scipy's distribution for each family (y on the proportion scale for the binomial)
SCIPY_DIST = {
    "gaussian": stats.norm(),
    "binomial": stats.binom(1, 0.5),
    "poisson": stats.poisson(1.0),
    "gamma": stats.gamma(2.0),
    "inverse_gaussian": stats.invgauss(0.5),
    "negative_binomial": stats.nbinom(2.0, 0.5),
}


@pytest.mark.parametrize("name", list(SCIPY_DIST))
def test_response_domain_is_the_distributions_support(name: str) -> None:
    fam = make_family(name)
    dist = SCIPY_DIST[name]
    lo, hi = dist.support()
    assert fam.y_min == (None if np.isinf(lo) else lo)
    # the binomial proportion k / n lies in [0, 1]
    expected_max = 1.0 if name == "binomial" else (None if np.isinf(hi) else hi)
    assert fam.y_max == expected_max
    # the lower end is allowed (non-strict) exactly when it has positive probability: the
    # discrete distributions; the continuous ones put no mass on it (and ln y diverges there)
    continuous = isinstance(dist.dist, stats.rv_continuous)
    assert fam.y_min_strict == (continuous and np.isfinite(lo))
    if not fam.y_min_strict and fam.y_min is not None:
        assert dist.pmf(fam.y_min) > 0


@pytest.mark.parametrize("p", [1.0, 1.2, 1.5, 1.8])
def test_tweedie_allows_zero_below_power_two(p: float) -> None:
    # compound Poisson-gamma: P(Y = 0) = exp(-mu^(2-p) / (phi (2-p))) > 0 (Jorgensen 1997,
    # recalled from memory); statsmodels' Tweedie.loglike_obs at y = 0 gives that log-probability
    fam = make_family("tweedie", power=p)
    assert fam.y_min == 0.0 and not fam.y_min_strict and fam.y_max is None
    if p > 1:
        for mu, phi in ((0.3, 1.0), (2.5, 0.7)):
            ll0 = smf.Tweedie(var_power=p).loglike_obs(_a(0.0), _a(mu), scale=phi)[0]
            assert_allclose(ll0, -(mu ** (2 - p)) / (phi * (2 - p)), rtol=1e-12)
            assert ll0 > -np.inf


@pytest.mark.parametrize("p", [2.0, 2.5, 3.0, 4.0])
def test_tweedie_needs_positive_response_from_power_two(p: float) -> None:
    # p >= 2: continuous on (0, inf) (gamma at 2, inverse Gaussian at 3); the deviance has
    # ln y (p = 2) or y^(2-p) (p > 2), infinite at 0
    fam = make_family("tweedie", power=p)
    assert fam.y_min == 0.0 and fam.y_min_strict and fam.y_max is None


def test_tweedie_power_zero_takes_any_real_response() -> None:
    fam = make_family("tweedie", power=0)
    assert fam.y_min is None and not fam.positive_mean


def _fit_error(values: list[float], family: str, **kw) -> str | None:
    eng = indb.connect()
    try:
        rows = ", ".join(f"({v!r})" for v in values)
        eng.execute(f"CREATE TABLE t AS SELECT * FROM (VALUES {rows}) v(y)")
        try:
            indb.fit("t", "y", family, db=eng, **kw)
        except SpecError as err:
            return str(err)
        return None
    finally:
        eng.close()


@pytest.mark.parametrize(
    ("family", "kw", "values", "message"),
    [
        (
            "gamma",
            {},
            [0.0, 1.0, 2.5],
            "needs a response > 0; column 'y' has values out of that range"
            " in 1 of 3 rows (min 0, max 2.5)",
        ),
        (
            "inverse_gaussian",
            {},
            [2.0, 0.0, 1.0],
            "needs a response > 0; column 'y' has values out of that range"
            " in 1 of 3 rows (min 0, max 2)",
        ),
        (
            "poisson",
            {},
            [-1.0, 1.0, 2.0, 0.0],
            "needs a response >= 0; column 'y' has values out of that range"
            " in 1 of 4 rows (min -1, max 2)",
        ),
        (
            "negative_binomial",
            {"theta": 2.0},
            [3.0, -2.0, -1.0],
            "needs a response >= 0; column 'y' has values out of that range"
            " in 2 of 3 rows (min -2, max 3)",
        ),
        (
            "binomial",
            {},
            [0.0, 1.5, 1.0],
            "needs a response <= 1; column 'y' has values out of that range"
            " in 1 of 3 rows (min 0, max 1.5)",
        ),
        (
            "binomial",
            {},
            [-0.5, 0.5, 1.0],
            "needs a response >= 0; column 'y' has values out of that range"
            " in 1 of 3 rows (min -0.5, max 1)",
        ),
        (
            "tweedie",
            {"power": 1.5},
            [-0.1, 0.0, 2.0],
            "needs a response >= 0; column 'y' has values out of that range"
            " in 1 of 3 rows (min -0.1, max 2)",
        ),
        (
            "tweedie",
            {"power": 2.5},
            [0.0, 1.0, 2.0],
            "needs a response > 0; column 'y' has values out of that range"
            " in 1 of 3 rows (min 0, max 2)",
        ),
    ],
)
def test_out_of_domain_response_is_refused_with_a_pinned_message(
    family: str, kw: dict, values: list[float], message: str
) -> None:
    expected = f"family {family!r} {message}; filter or fix those rows in the source query"
    assert _fit_error(values, family, **kw) == expected


@pytest.mark.parametrize(
    ("family", "kw", "values"),
    [
        ("poisson", {}, [0.0, 1.0, 2.0, 0.0]),
        ("negative_binomial", {"theta": 2.0}, [0.0, 3.0, 1.0]),
        ("binomial", {}, [0.0, 1.0, 1.0, 0.0, 0.5]),
        ("tweedie", {"power": 1.5}, [0.0, 1.0, 2.5]),
        ("gaussian", {}, [-3.0, 0.0, 2.0]),
    ],
)
def test_response_on_a_non_strict_bound_is_accepted(
    family: str, kw: dict, values: list[float]
) -> None:
    assert _fit_error(values, family, **kw) is None


# -- make_family and the family parameters -------------------------------------------------------


@pytest.mark.parametrize(
    ("alias", "name"),
    [
        ("normal", "gaussian"),
        ("Inverse-Gaussian", "inverse_gaussian"),
        ("inverse.gaussian", "inverse_gaussian"),
        ("negbin", "negative_binomial"),
        ("NB", "negative_binomial"),
        (" Poisson ", "poisson"),
    ],
)
def test_make_family_aliases(alias: str, name: str) -> None:
    assert make_family(alias).name == name


@pytest.mark.parametrize(
    ("args", "kw", "message"),
    [
        (
            ("binomal",),
            {},
            "unknown family 'binomal'; allowed: gaussian, binomial, poisson, gamma, "
            "inverse_gaussian, tweedie, negative_binomial",
        ),
        (
            ("gamma",),
            {"power": 1.5},
            "power is the tweedie variance power; family 'gamma' does not take it",
        ),
        (
            ("poisson",),
            {"theta": 2.0},
            "theta belongs to negative_binomial; family 'poisson' does not take it",
        ),
        (
            ("tweedie",),
            {},
            "family 'tweedie' needs a variance power: pass power= (CLI --power)",
        ),
        (
            ("tweedie",),
            {"power": 0.5},
            "tweedie power must be 0 or >= 1 (1 < p < 2 for compound Poisson-gamma); got 0.5",
        ),
        (
            ("tweedie",),
            {"power": -1.0},
            "tweedie power must be 0 or >= 1 (1 < p < 2 for compound Poisson-gamma); got -1.0",
        ),
        (
            ("tweedie",),
            {"power": math.inf},
            "tweedie power must be 0 or >= 1 (1 < p < 2 for compound Poisson-gamma); got inf",
        ),
        (
            ("negative_binomial",),
            {"theta": 0.0},
            "negative_binomial theta must be a positive number; got 0.0",
        ),
        (
            ("negative_binomial",),
            {"theta": math.nan},
            "negative_binomial theta must be a positive number; got nan",
        ),
    ],
)
def test_make_family_errors(args: tuple, kw: dict, message: str) -> None:
    with pytest.raises(SpecError) as err:
        make_family(*args, **kw)
    assert str(err.value) == message


def test_make_family_parameters_and_descriptions() -> None:
    tw = make_family("tweedie", power=1.5)
    assert isinstance(tw, Tweedie) and tw.params() == {"power": 1.5}
    assert tw.describe() == "tweedie(power=1.5)"
    nb = make_family("negative_binomial", theta=2.25)
    assert isinstance(nb, NegativeBinomial) and nb.params() == {"theta": 2.25}
    assert nb.describe() == "negative_binomial(theta=2.25)"
    assert make_family("negative_binomial").params() == {"theta": 1.0}  # the default theta
    assert isinstance(make_family("gaussian"), Gaussian) and make_family("gaussian").params() == {}


# -- canonical links ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "ratio"),
    [
        ("gaussian", 1.0),
        ("binomial", 1.0),
        ("poisson", 1.0),
        ("gamma", -1.0),
        ("inverse_gaussian", -0.5),
    ],
)
def test_canonical_link_has_dmu_deta_proportional_to_the_variance(name: str, ratio: float) -> None:
    """The canonical link is theta(mu) up to scale, so dmu/deta = c V(mu) (McCullagh & Nelder
    sec. 2.2.4): c = 1 for identity, logit and log; 1/mu gives -1 and 1/mu^2 gives -1/2."""
    fam = make_family(name)
    link = canonical_link(fam)
    # eta > 0 where the link has a domain condition (1/mu, 1/mu^2), any sign otherwise
    eta = _a(0.05, 0.3, 1.0, 2.0) if link.eta_ok(S.col("eta")) is not None else _a(-3, 0, 0.7, 2)
    mu = link.inverse(eta)
    v = evaluate({"mu": mu}, {"v": fam.variance_sql})["v"]
    assert_allclose(link.mu_eta(eta), ratio * v, rtol=1e-14)


@pytest.mark.parametrize("name", ["tweedie", "negative_binomial"])
def test_tweedie_and_negative_binomial_take_log_by_convention(name: str) -> None:
    # not canonical (theta = mu^(1-p)/(1-p) and ln(mu / (mu + theta))) but statsmodels'
    # default link for both too
    fam = make_family(name, power=1.5) if name == "tweedie" else make_family(name)
    assert canonical_link(fam).name == "log"
    sm_fam = smf.Tweedie(var_power=1.5) if name == "tweedie" else smf.NegativeBinomial(alpha=1.0)
    assert isinstance(sm_fam.link, smf.links.Log)


# -- starting values, mean clamps and mean conditions ---------------------------------------------


@pytest.mark.parametrize(
    "name", ["poisson", "gamma", "inverse_gaussian", "tweedie(1.5)", "negative_binomial(1)"]
)
def test_start_is_statsmodels_starting_mu(name: str) -> None:
    c = CASES[name]
    y = c.ys
    ybar = float(y.mean())
    got = evaluate({"y": y}, {"m": lambda y_: c.family.start_sql(y_, S.num(1.0), ybar)})["m"]
    # statsmodels Family.starting_mu: (y + mean(y)) / 2
    assert_allclose(got, c.sm.starting_mu(y), rtol=1e-15)


def test_binomial_start() -> None:
    fam = make_family("binomial")
    y = _a(0.0, 0.25, 0.5, 1.0)
    got = evaluate({"y": y}, {"m": lambda y_: fam.start_sql(y_, S.num(1.0), 0.5)})["m"]
    assert_allclose(got, smf.Binomial().starting_mu(y), rtol=1e-15)  # (y + 1/2) / 2
    # with n trials: (n y + 1/2) / (n + 1), R's binomial()$initialize (recalled from memory):
    # strictly inside (0, 1) for y = 0 and y = 1
    got = evaluate({"y": y}, {"m": lambda y_: fam.start_sql(y_, S.num(4.0), 0.5)})["m"]
    assert_allclose(got, (4.0 * y + 0.5) / 5.0, rtol=1e-15)
    assert ((got > 0) & (got < 1)).all()


MU_GRID = _a(-5.0, -1e-300, 0.0, 1e-300, 1e-120, 0.3, 1.0 - 1e-17, 1.0, 2.0, 1e100)


@pytest.mark.parametrize("name", NAMES)
def test_clamped_mean_keeps_variance_and_deviance_finite(name: str) -> None:
    c = CASES[name]
    fam = c.family
    if fam.unit_mean:
        mu = MU_GRID
    elif fam.positive_mean:
        mu = MU_GRID[MU_GRID >= 0]
    else:
        mu = MU_GRID
    y = np.resize(c.ys, len(mu))
    got = evaluate(
        {"y": y, "mu": mu},
        {
            "m": lambda y_, mu_: fam.clamp_mu_sql(mu_),
            "v": lambda y_, mu_: fam.variance_sql(fam.clamp_mu_sql(mu_)),
            "d": lambda y_, mu_: fam.unit_deviance_sql(y_, fam.clamp_mu_sql(mu_)),
        },
    )
    if fam.unit_mean:
        assert ((got["m"] > 0) & (got["m"] < 1)).all()
    if fam.positive_mean:
        assert (got["m"] > 0).all()
    # a variance that is a normal double > 0 (so 1 / V and V^-1/2 stay finite), finite
    # deviances; gaussian means pass unchanged
    assert np.isfinite(got["v"]).all() and np.isfinite(got["d"]).all()
    if fam.unit_mean or fam.positive_mean:
        assert (got["v"] >= np.finfo(float).tiny).all()
    else:
        assert_array_equal(got["m"], mu)


def _maps_into_domain(fam: Family, link_name: str) -> bool:
    """Whether every valid eta gives a mean in the family's mean domain (numpy inverse on a
    wide grid, eta restricted to the link's valid set)."""
    link = make_link(link_name, 2.0) if link_name == "power" else make_link(link_name)
    eta = np.linspace(-3.0, 3.0, 61)  # where no unit link saturates to 0 or 1 in doubles
    if link.positive_mean or link.name == "inverse":
        eta = eta[eta != 0]
        if link.positive_mean:
            eta = eta[eta > 0]
    with np.errstate(all="ignore"):
        mu = link.inverse(eta)
    if fam.unit_mean:
        return bool(((mu > 0) & (mu < 1)).all())
    if fam.positive_mean:
        return bool((mu > 0).all())
    return True


@pytest.mark.parametrize("name", FAMILY_NAMES)
def test_mean_condition_exactly_where_the_link_can_leave_the_domain(name: str) -> None:
    fam = make_family(name, power=1.5) if name == "tweedie" else make_family(name)
    mu = _a(-2.0, -1e-9, 0.0, 1e-9, 0.5, 1.0 - 1e-9, 1.0, 1.5)
    in_domain = (mu > 0) & (mu < 1) if fam.unit_mean else (mu > 0 if fam.positive_mean else None)
    for link_name in fam.links:
        link = make_link(link_name, 2.0) if link_name == "power" else make_link(link_name)
        cond = fam.mu_ok(S.col("mu"), link)
        assert (cond is None) == _maps_into_domain(fam, link_name), link_name
        if cond is not None:
            got = evaluate({"mu": mu}, {"ok": lambda m, link=link: fam.mu_ok(m, link)})["ok"]
            assert_array_equal(got.astype(bool), in_domain)


def test_every_link_name_is_known_to_some_family() -> None:
    assert set(LINK_NAMES) == {
        n
        for f in FAMILY_NAMES
        for n in (make_family(f, power=1.5) if f == "tweedie" else make_family(f)).links
    }


# -- dV/dmu and canonical links (the observed information of a sandwich) ---------------------


@pytest.mark.parametrize("name", NAMES)
def test_variance_deriv_matches_statsmodels(name: str) -> None:
    c = CASES[name]
    mu = c.mus
    got = evaluate({"mu": mu}, {"dv": c.family.variance_deriv_sql})["dv"]
    # statsmodels.genmod.families.<Family>.variance.deriv(mu) (test-only oracle)
    assert_allclose(got, c.sm.variance.deriv(mu), rtol=1e-13, atol=0)


@pytest.mark.parametrize("name", NAMES)
def test_is_canonical_where_the_observed_information_is_the_expected(name: str) -> None:
    """A link is canonical exactly where g'(mu) V(mu) = 1, i.e. V'/V = mu''/mu'^2 (mu' and
    mu'' the derivatives in eta): the correction to X'WX of the observed information is then
    0 for every mu. Checked with statsmodels' link and variance derivatives (test-only
    oracle) on the family's means."""
    c = CASES[name]
    fam = c.family
    links = [make_link(n, 0.3 if n == "power" else None) for n in fam.links]
    p = fam.variance_power
    if "power" in fam.links and p is not None and p != 1.0:
        links.append(make_link("power", 1.0 - p))  # mu^(1-p): Tweedie's canonical link
    for link in links:
        link_name = link.describe()
        sm_link = _SM_LINKS[link.name if link.name == "power" else link_name](link)
        mu = c.mus[(c.mus > 1e-6) & (c.mus < 1e6)]
        if fam.unit_mean:
            mu = mu[mu < 1.0]
        eta = sm_link(mu)
        d1, d2 = sm_link.inverse_deriv(eta), sm_link.inverse_deriv2(eta)
        v, dv = c.sm.variance(mu), c.sm.variance.deriv(mu)
        gap = dv / v - d2 / d1**2
        vanishes = bool(np.all(np.abs(gap) <= 1e-9 * (np.abs(dv / v) + np.abs(d2 / d1**2))))
        assert fam.is_canonical(link) == vanishes, (name, link_name)


_SM_LINKS = {
    "identity": lambda lk: smf.links.Identity(),
    "log": lambda lk: smf.links.Log(),
    "logit": lambda lk: smf.links.Logit(),
    "probit": lambda lk: smf.links.Probit(),
    "cloglog": lambda lk: smf.links.CLogLog(),
    "cauchit": lambda lk: smf.links.Cauchy(),
    "inverse": lambda lk: smf.links.InversePower(),
    "inverse_squared": lambda lk: smf.links.InverseSquared(),
    "sqrt": lambda lk: smf.links.Sqrt(),
    "power": lambda lk: smf.links.Power(power=lk.exponent),
}
