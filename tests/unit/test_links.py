"""Unit tests for :mod:`indb.links`: every link's numpy and SQL forms against outside oracles.

Oracles: scipy (``special.expit``/``logit``/``ndtr``/``ndtri``, ``stats.norm``,
``stats.logistic``, ``stats.cauchy``, ``stats.gumbel_l``), closed-form formulas evaluated with
Python's ``math`` module, and ``statsmodels.genmod.families.links`` (a test-only second
implementation). The SQL forms run on an in-memory DuckDB (see
``unit_support.evaluate``).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest
import statsmodels.genmod.families as smf
import statsmodels.genmod.families.links as sml
from numpy.testing import assert_allclose, assert_array_equal
from scipy import special, stats
from unit_support import central_difference, evaluate

from indb import sqlexpr as S
from indb.errors import SpecError
from indb.families import FAMILY_NAMES, canonical_link, make_family
from indb.links import LINK_NAMES, Link, make_link

EPS = np.finfo(float).eps
TINY = np.finfo(float).tiny  # smallest normal double


def _vec(f: Callable[[float], float]) -> Callable[[np.ndarray], np.ndarray]:
    """Apply a scalar closed form element by element (Python floats, ``math`` module)."""
    return lambda x: np.array([f(float(v)) for v in np.asarray(x, dtype=float)])


@dataclass(frozen=True)
class Case:
    """One link with its grids and its outside oracles.

    ``eta``/``mu``: grids on which every form is defined (extremes included); ``sm_eta``/``sm_mu``:
    the part where statsmodels does not clip its argument (it trims unit means to
    [eps, 1 - eps] and log means to >= eps); ``fd_eta``: where a central difference is
    meaningful (the inverse neither saturates nor underflows); ``abs_tail``: the mean is
    accurate in absolute, not relative, terms as it nears 0 (the lower-tail test below checks
    the SQL forms in relative terms against mpmath).
    """

    link: Link
    eta: np.ndarray
    mu: np.ndarray
    inverse: Callable[[np.ndarray], np.ndarray]
    mu_eta: Callable[[np.ndarray], np.ndarray]
    link_fn: Callable[[np.ndarray], np.ndarray]
    sm: sml.Link
    sm_eta: np.ndarray
    sm_mu: np.ndarray
    fd_eta: np.ndarray
    abs_tail: bool = False


def _a(*v: float) -> np.ndarray:
    return np.array(v, dtype=float)


UNIT_MU = _a(1e-300, 1e-15, 1e-6, 0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-6, 1 - 1e-13)
UNIT_SM_MU = _a(1e-12, 1e-6, 0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-6, 1 - 1e-12)
POS_MU = _a(1e-300, 1e-20, 1e-6, 0.3, 1.0, 2.5, 1e6, 1e20, 1e300)
POS_SM_MU = _a(1e-6, 0.3, 1.0, 2.5, 1e6)
MID_ETA = _a(-4.0, -1.5, -0.3, 0.0, 0.2, 1.0, 3.0)


def _power_case(exponent: float, link: Link) -> Case:
    """mu = eta^(1/p) on eta > 0; statsmodels' ``Power(power=p)``."""
    q = 1.0 / exponent
    mus = _a(1e-6, 0.01, 0.3, 1.0, 2.5, 1e3, 1e6)
    return Case(
        link=link,
        eta=np.array([m**exponent for m in mus]),
        mu=mus,
        inverse=_vec(lambda e: math.pow(e, q)),
        mu_eta=_vec(lambda e: q * math.pow(e, q - 1.0)),
        link_fn=_vec(lambda m: math.pow(m, exponent)),
        sm=sml.Power(power=exponent),
        sm_eta=np.array([m**exponent for m in mus]),
        sm_mu=mus,
        fd_eta=np.array([m**exponent for m in _a(0.01, 0.3, 1.0, 2.5, 1e3)]),
    )


def _cases() -> dict[str, Case]:
    cases = {
        "identity": Case(
            link=make_link("identity"),
            eta=_a(-1e300, -1e8, -3.5, 0.0, 1e-300, 2.5, 1e8, 1e300),
            mu=_a(-1e300, -7.25, 0.0, 1e-12, 3.0, 1e300),
            inverse=lambda e: e,
            mu_eta=np.ones_like,
            link_fn=lambda m: m,
            sm=sml.Identity(),
            sm_eta=_a(-1e8, -3.5, 0.0, 2.5, 1e8),
            sm_mu=_a(-7.25, 0.0, 3.0),
            fd_eta=_a(-1e6, -3.5, 0.0, 2.5, 1e6),
        ),
        "log": Case(
            link=make_link("log"),
            eta=_a(-700, -300, -37, -1, 0, 1e-10, 1, 37, 300, 700),
            mu=POS_MU,
            inverse=_vec(math.exp),
            mu_eta=_vec(math.exp),
            link_fn=_vec(math.log),
            sm=sml.Log(),
            sm_eta=_a(-300, -37, -1, 0, 1, 37, 300),
            sm_mu=POS_SM_MU,
            fd_eta=_a(-5, -1, 0, 1, 5),
        ),
        # the logistic distribution's cdf/pdf/ppf are the logit link's inverse, dmu/deta, link
        "logit": Case(
            link=make_link("logit"),
            eta=_a(-700, -300, -37, -20, -1, 0, 1e-8, 1, 20, 36, 300, 700),
            mu=UNIT_MU,
            inverse=stats.logistic.cdf,
            mu_eta=stats.logistic.pdf,
            link_fn=stats.logistic.ppf,
            sm=sml.Logit(),
            sm_eta=_a(-300, -37, -1, 0, 1, 20),
            sm_mu=UNIT_SM_MU,
            fd_eta=MID_ETA,
        ),
        "probit": Case(
            link=make_link("probit"),
            eta=_a(-37, -26, -8, -1, 0, 1e-8, 1, 8, 26, 37),
            mu=UNIT_MU,
            inverse=stats.norm.cdf,
            mu_eta=stats.norm.pdf,
            link_fn=stats.norm.ppf,
            sm=sml.Probit(),
            sm_eta=_a(-37, -8, -1, 0, 1, 8),
            sm_mu=UNIT_SM_MU,
            fd_eta=MID_ETA,
        ),
        # the minimum-Gumbel distribution: cdf 1 - exp(-exp(x)), pdf exp(x - exp(x))
        "cloglog": Case(
            link=make_link("cloglog"),
            eta=_a(-700, -340, -37, -8, -1, 0, 1e-8, 1, 3.5, 5.8),
            mu=UNIT_MU,
            inverse=stats.gumbel_l.cdf,
            mu_eta=stats.gumbel_l.pdf,
            link_fn=stats.gumbel_l.ppf,
            sm=sml.CLogLog(),
            # statsmodels computes 1 - exp(-exp(eta)), which cancels for small means
            sm_eta=_a(-3, -1, 0, 1, 3.5),
            sm_mu=_a(0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-6),
            # beyond eta ~ 1.5 the mean is 1 - tiny and a difference of it cancels
            fd_eta=_a(-4.0, -1.5, -0.3, 0.0, 0.2, 1.0),
        ),
        "cauchit": Case(
            link=make_link("cauchit"),
            eta=_a(-1e300, -1e8, -40, -1, 0, 1e-8, 1, 40, 1e8, 1e300),
            mu=UNIT_MU[1:-1],  # tan(pi (mu - 1/2)) overflows at mu = 1e-300
            inverse=stats.cauchy.cdf,
            mu_eta=stats.cauchy.pdf,
            link_fn=stats.cauchy.ppf,
            sm=sml.Cauchy(),
            sm_eta=_a(-1e8, -40, -1, 0, 1, 40, 1e8),
            sm_mu=_a(0.01, 0.25, 0.5, 0.75, 0.99),
            fd_eta=_a(-40, -4, -1, 0, 1, 4, 40),
            abs_tail=True,
        ),
    }
    inverse = _power_case(-1.0, make_link("inverse"))
    # the inverse link is valid on eta < 0 too (1 / eta, any sign but 0)
    both = _a(-1e6, -2.0, -1e-3, 1e-3, 0.5, 1e6)
    cases["inverse"] = Case(
        **{
            **inverse.__dict__,
            "eta": both,
            "mu": 1.0 / both,
            "sm": sml.InversePower(),
            "sm_eta": both,
            "sm_mu": 1.0 / both,
            "fd_eta": both,
        }
    )
    cases["inverse_squared"] = Case(
        **{**_power_case(-2.0, make_link("inverse_squared")).__dict__, "sm": sml.InverseSquared()}
    )
    cases["sqrt"] = Case(**{**_power_case(0.5, make_link("sqrt")).__dict__, "sm": sml.Sqrt()})
    for p in (2.0, 3.0, 1.0 / 3.0, -0.5, 1.5):
        cases[f"power({p:g})"] = _power_case(p, make_link("power", p))
    return cases


CASES = _cases()


def _mu_eta(link: Link, eta: np.ndarray) -> np.ndarray:
    # cauchit's 1 + eta^2 overflows to inf at |eta| = 1e300, which gives the right 0
    with np.errstate(over="ignore"):
        return link.mu_eta(eta)


NAMES = list(CASES)


def test_every_registered_link_is_covered() -> None:
    # each name make_link resolves has a case here (power through several exponents)
    covered = {c.link.name for c in CASES.values()}
    assert set(LINK_NAMES) <= covered


# -- numpy forms against scipy / closed forms and statsmodels --------------------------------


@pytest.mark.parametrize("name", NAMES)
def test_numpy_forms_match_scipy_and_closed_forms(name: str) -> None:
    c = CASES[name]
    # scipy.stats distributions or Python's math module (see _cases); a link accurate in
    # absolute terms only near mu = 0 (cauchit) is held to eps there, and its link is checked
    # by the backward error: the oracle's inverse maps it back to mu within eps
    atol = EPS if c.abs_tail else 0.0
    assert_allclose(c.link.inverse(c.eta), c.inverse(c.eta), rtol=1e-14, atol=atol)
    if c.abs_tail:
        assert_allclose(c.inverse(c.link.link(c.mu)), c.mu, rtol=1e-14, atol=EPS)
        body = (c.mu >= 0.01) & (c.mu <= 0.99)
        assert_allclose(c.link.link(c.mu[body]), c.link_fn(c.mu[body]), rtol=1e-14, atol=0)
    else:
        assert_allclose(c.link.link(c.mu), c.link_fn(c.mu), rtol=1e-14, atol=0)
    # logit: m (1 - m) loses relative accuracy where 1 - m cancels (eta > 0); its absolute
    # error stays below eps. Every other link: relative 1e-14
    atol = EPS if name == "logit" else 0.0
    assert_allclose(_mu_eta(c.link, c.eta), c.mu_eta(c.eta), rtol=1e-14, atol=atol)


def test_oracles_agree_with_each_other() -> None:
    """The scipy oracles checked against independent special functions (second source)."""
    x = _a(-30, -8, -1, 0, 1, 8, 30)
    assert_allclose(stats.logistic.cdf(x), special.expit(x), rtol=1e-15)
    # erfc(x / sqrt 2) carries the rounding of its argument times ~x^2: 2e-13 at |x| = 30
    assert_allclose(stats.norm.cdf(x), 0.5 * special.erfc(-x / math.sqrt(2.0)), rtol=3e-13)
    assert_allclose(stats.gumbel_l.cdf(x), -np.expm1(-np.exp(x)), rtol=1e-15)
    # atan2(1, -x) / pi is the Cauchy cdf without the cancellation of 1/2 + atan(x) / pi
    assert_allclose(stats.cauchy.cdf(x), np.arctan2(1.0, -x) / np.pi, rtol=1e-15)
    u = UNIT_SM_MU
    assert_allclose(stats.logistic.ppf(u), special.logit(u), rtol=1e-14)
    assert_allclose(stats.norm.ppf(u), special.ndtri(u), rtol=1e-14)


@pytest.mark.parametrize("name", NAMES)
def test_numpy_forms_match_statsmodels(name: str) -> None:
    c = CASES[name]
    # statsmodels.genmod.families.links: __call__ = g, inverse = g^-1, inverse_deriv = dmu/deta
    assert_allclose(c.link.link(c.sm_mu), c.sm(c.sm_mu), rtol=1e-13)
    atol = EPS if c.abs_tail else 0.0  # see test_numpy_forms_match_scipy_and_closed_forms
    assert_allclose(c.link.inverse(c.sm_eta), c.sm.inverse(c.sm_eta), rtol=1e-13, atol=atol)
    atol = EPS if name == "logit" else 0.0  # as above
    assert_allclose(c.link.mu_eta(c.sm_eta), c.sm.inverse_deriv(c.sm_eta), rtol=1e-13, atol=atol)


@pytest.mark.parametrize("name", NAMES)
def test_mu_eta_is_the_derivative_of_the_inverse(name: str) -> None:
    c = CASES[name]
    # central difference: relative error ~eps^(2/3) ~ 4e-11 (common practice); 1e-7 leaves room
    # for the curvature of the power links at small eta
    assert_allclose(
        c.link.mu_eta(c.fd_eta), central_difference(c.link.inverse, c.fd_eta), rtol=1e-7
    )


@pytest.mark.parametrize("name", NAMES)
def test_inverse_undoes_link(name: str) -> None:
    c = CASES[name]
    # the round trip multiplies the rounding of eta by the condition number of the inverse,
    # |eta dmu/deta / mu|: up to ~700 at mu = 1e-300 (log, logit, cloglog) and ~1400 (probit,
    # plus ndtr/ndtri's own ~1e-14 in the tail): 2e-13. cauchit: tan has a pole at mu = 0 and
    # 1, so mu - 1/2 keeps only an absolute eps of mu
    atol = EPS if c.abs_tail else 0.0
    assert_allclose(c.link.inverse(c.link.link(c.mu)), c.mu, rtol=2e-13, atol=atol)


# -- SQL forms on DuckDB ----------------------------------------------------------------------

#: per link, the eta range inside which the SQL mu_eta is not clamped (probit, cloglog) and
#: the normal-CDF approximation keeps 13 digits (probit, see test_normal_cdf_*)
SQL_ETA_RANGE = {
    "probit": (-1.0, 26.0),
    "cloglog": (-340.0, 5.8),
}


def _sql_forms(link: Link, eta: np.ndarray, mu: np.ndarray) -> dict[str, np.ndarray]:
    n = max(len(eta), len(mu))
    eta_col = np.resize(eta, n)
    mu_col = np.resize(mu, n)
    got = evaluate(
        {"eta": eta_col, "mu": mu_col},
        {
            "inv": lambda e, m: link.inverse_sql(e),
            "me": lambda e, m: link.mu_eta_sql(e, link.inverse_sql(e.copy())),
            "g": lambda e, m: link.link_sql(m),
        },
    )
    return {"inv": got["inv"][: len(eta)], "me": got["me"][: len(eta)], "g": got["g"][: len(mu)]}


@pytest.mark.parametrize("name", NAMES)
def test_sql_inverse_and_mu_eta_equal_numpy_forms(name: str) -> None:
    c = CASES[name]
    lo, hi = SQL_ETA_RANGE.get(name, (-np.inf, np.inf))
    eta = c.eta[(c.eta >= lo) & (c.eta <= hi)]
    got = _sql_forms(c.link, eta, c.mu)
    # DuckDB's exp/ln/pow/atan and numpy's differ by a few ulp at most: 1e-13 relative
    assert_allclose(got["inv"], c.link.inverse(eta), rtol=1e-13, atol=0)
    atol = EPS if name == "logit" else 0.0  # both compute m (1 - m)
    assert_allclose(got["me"], _mu_eta(c.link, eta), rtol=1e-13, atol=atol)


@pytest.mark.parametrize("name", [n for n in NAMES if n not in ("probit", "cloglog")])
def test_sql_link_equals_numpy_link(name: str) -> None:
    c = CASES[name]
    got = _sql_forms(c.link, c.eta[:1], c.mu)
    assert_allclose(got["g"], c.link.link(c.mu), rtol=1e-13, atol=0)


def test_sql_cloglog_link_on_means_not_too_small() -> None:
    # ln(-ln(1 - mu)) without log1p: 1 - mu keeps an absolute eps, so the relative error of
    # -ln(1 - mu) is ~eps / mu; the SQL link only gives starting values (plan's start eta)
    link = make_link("cloglog")
    mu = _a(1e-4, 0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-6, 1 - 1e-13)
    got = _sql_forms(link, _a(0.0), mu)["g"]
    # scipy.stats.gumbel_l.ppf = ln(-log1p(-mu)); ~eps/mu / |ln mu| relative: 1e-12 at 1e-4
    assert_allclose(got, stats.gumbel_l.ppf(mu), rtol=1e-12)


def test_sql_probit_link_is_tukeys_approximation_within_its_stated_error() -> None:
    # links.ProbitLink.link_sql states: within 0.004 of the normal quantile on [0.01, 0.99]
    mu = np.linspace(0.01, 0.99, 99)
    got = _sql_forms(make_link("probit"), _a(0.0), mu)["g"]
    assert np.max(np.abs(got - special.ndtri(mu))) < 0.004


def _mills_tail(x: float) -> float:
    """Phi(-x) for x >= 8 from the asymptotic series phi(x)/x * sum (-1)^k (2k-1)!! / x^(2k),
    summed up to its smallest term (Abramowitz & Stegun 26.2.12); an oracle for the oracle."""
    terms, t, k = [], 1.0, 0
    while True:
        terms.append(t)
        nxt = -t * (2 * k + 1) / (x * x)
        if abs(nxt) >= abs(t):
            break
        t, k = nxt, k + 1
    return math.exp(-x * x / 2.0) / math.sqrt(2.0 * math.pi) / x * math.fsum(terms)


def test_ndtr_oracle_agrees_with_the_asymptotic_series() -> None:
    # the series' truncation error (its smallest term) is below 2e-14 relative from x = 8 and
    # far below eps from x = 10; ndtr agrees to 6e-14 (at x = 30): 1e-13 bounds the oracle
    for x in (8.0, 10.0, 15.0, 20.0, 30.0):
        assert_allclose(special.ndtr(-x), _mills_tail(x), rtol=1e-13)


NORMAL_GRID = np.linspace(-37.0, 37.0, 741)


def _sql_normal_cdf(x: np.ndarray) -> np.ndarray:
    return evaluate({"x": x}, {"p": lambda e: make_link("probit").inverse_sql(e)})["p"]


def test_normal_cdf_sql_absolute_error() -> None:
    got = _sql_normal_cdf(NORMAL_GRID)
    # links._normal_cdf_sql states an absolute error ~1e-16 (Hart 1968 / West 2005);
    # the oracle is scipy.special.ndtr (checked against the asymptotic series above)
    assert np.max(np.abs(got - special.ndtr(NORMAL_GRID))) <= 2.5e-16
    assert_array_equal(_sql_normal_cdf(_a(-37.5, 37.5)), [0.0, 1.0])  # beyond |x| = 37


def test_normal_cdf_sql_relative_error_in_the_body_and_upper_half() -> None:
    got = _sql_normal_cdf(NORMAL_GRID)
    keep = NORMAL_GRID >= -1.0
    assert_allclose(got[keep], special.ndtr(NORMAL_GRID[keep]), rtol=1e-13, atol=0)


LOWER_TAIL_ETA = {
    "probit": NORMAL_GRID[(NORMAL_GRID < -1.0) & (NORMAL_GRID > -37.0)],
    "cauchit": -np.logspace(1, 300, 60),
}


@pytest.mark.parametrize(
    ("name", "form"),
    [("probit", "sql"), ("cauchit", "sql"), ("cauchit", "numpy")],
)
def test_unit_link_means_keep_relative_accuracy_in_the_lower_tail(name: str, form: str) -> None:
    c = CASES[name]
    eta = LOWER_TAIL_ETA[name]
    got = _sql_forms(c.link, eta, _a(0.5))["inv"] if form == "sql" else c.link.inverse(eta)
    assert_allclose(got, _lower_tail_reference(name, eta), rtol=1e-14, atol=0)


def _lower_tail_reference(name: str, eta: np.ndarray) -> np.ndarray:
    """The mean at 40 significant digits (mpmath), rounded once to a double.

    scipy.special.ndtr is itself off by up to ~1e-13 relative far out in the lower tail (6e-14
    at -30, 1e-13 at -36.5, checked against mpmath.ncdf), so it cannot judge 1e-14 there;
    the Cauchy CDF is atan(1/|eta|)/pi for eta < 0 (mpmath, same precision).
    """
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(40):
        if name == "probit":
            return np.array([float(mpmath.ncdf(mpmath.mpf(float(v)))) for v in eta])
        return np.array([float(mpmath.atan(1 / mpmath.mpf(-float(v))) / mpmath.pi) for v in eta])


# -- clamps: large |eta| stays finite in SQL ----------------------------------------------------

HUGE_ETA = _a(-1e300, -1e5, -800.0, -710.0, 710.0, 800.0, 1e5, 1e300)


@pytest.mark.parametrize("name", ["log", "logit", "probit", "cloglog", "cauchit"])
def test_sql_forms_stay_finite_for_huge_eta(name: str) -> None:
    link = make_link(name)
    got = _sql_forms(link, HUGE_ETA, _a(0.5))
    assert np.isfinite(got["inv"]).all() and np.isfinite(got["me"]).all()
    assert (got["me"] >= 0).all()
    if link.unit_mean:
        assert ((got["inv"] >= 0) & (got["inv"] <= 1)).all()
        # each tail goes to the right end: 0 below, 1 above
        assert_array_equal(got["inv"][HUGE_ETA > 0] > 0.5, True)
        assert_array_equal(got["inv"][HUGE_ETA < 0] < 0.5, True)
    else:
        assert (got["inv"] > 0).all()


@pytest.mark.parametrize(
    ("name", "lo", "hi"),
    [("probit", -26.0, 26.0), ("cloglog", -340.0, 5.8)],
)
def test_sql_mu_eta_is_held_at_its_clamp(name: str, lo: float, hi: float) -> None:
    # outside [lo, hi] the SQL derivative is held at its value on the bound, where it and its
    # square are still normal doubles (PostgreSQL raises on underflow, see links.py)
    link = make_link(name)
    outside = _a(-1e5, lo - 100.0, lo - 1.0, hi + 1.0, hi + 100.0, 1e5)
    got = _sql_forms(link, outside, _a(0.5))["me"]
    at_bound = link.mu_eta(np.where(outside < lo, lo, hi))
    assert_allclose(got, at_bound, rtol=1e-13)
    assert (got**2 >= TINY).all()


# -- eta_ok: the valid linear predictors ---------------------------------------------------------


def test_eta_ok_log_caps_below_the_overflow_of_exp() -> None:
    # exp overflows a double just above 709.78 (Python's math.exp raises there): the log link
    # flags eta above its cap of 700, and every eta below (the SQL inverse clamps at -700)
    assert math.isfinite(math.exp(700.0))
    with pytest.raises(OverflowError):
        math.exp(710.0)
    eta = _a(-1e300, -800.0, -1.0, 0.0, 0.5, 700.0, 700.5, 705.0, 800.0, 1e300)
    link = make_link("log")
    got = evaluate({"eta": eta}, {"ok": link.eta_ok})["ok"].astype(bool)
    assert_array_equal(got, eta <= 700.0)


POWER_NAMES = [n for n in NAMES if isinstance(CASES[n].sm, sml.Power) and n != "identity"]
VALIDITY_ETA = _a(-800.0, -1.0, -1e-3, 0.0, 1e-3, 0.5, 2.0, 700.0)


@pytest.mark.parametrize("name", POWER_NAMES)
def test_eta_ok_power_links_mark_the_image_of_the_link(name: str) -> None:
    """An eta is valid when some mean in the link's domain maps to it: statsmodels' inverse
    gives a finite mean in that domain (> 0, or != 0 for the inverse link with any-sign means),
    and statsmodels' link maps that mean back to eta."""
    c = CASES[name]
    with np.errstate(all="ignore"):
        mu = c.sm.inverse(VALIDITY_ETA)
        back = c.sm(mu)
    inside = mu > 0 if c.link.positive_mean else mu != 0
    valid = np.isfinite(mu) & inside & np.isclose(back, VALIDITY_ETA, rtol=1e-12, atol=0)
    got = evaluate({"eta": VALIDITY_ETA}, {"ok": c.link.eta_ok})["ok"].astype(bool)
    assert_array_equal(got, valid)


@pytest.mark.parametrize("name", ["identity", "logit", "probit", "cloglog", "cauchit"])
def test_links_onto_their_mean_domain_need_no_eta_condition(name: str) -> None:
    # identity maps R onto R and the four CDF links map R onto (0, 1): every eta is valid
    # (their huge-eta SQL behaviour is checked above)
    assert CASES[name].link.eta_ok(S.col("eta")) is None


# -- make_link -----------------------------------------------------------------------------------


def test_make_link_resolves_every_listed_name() -> None:
    for name in LINK_NAMES:
        link = make_link(name, 2.0) if name == "power" else make_link(name)
        assert isinstance(link, Link)
    assert make_link("  LogIt ").name == "logit"  # case and surrounding spaces ignored


@pytest.mark.parametrize(
    ("exponent", "name"),
    [(0.0, "log"), (1.0, "identity"), (-1.0, "inverse"), (-2.0, "inverse_squared"), (0.5, "sqrt")],
)
def test_make_link_power_names_its_special_cases(exponent: float, name: str) -> None:
    # g(mu) = mu^p with p -> 0 is the log link (Box-Cox limit); the others are exact powers
    assert make_link("power", exponent).name == name
    assert make_link("power", exponent) == make_link(name)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (
            ("logistic",),
            "unknown link 'logistic'; allowed: cauchit, cloglog, identity, inverse, "
            "inverse_squared, log, logit, power, probit, sqrt",
        ),
        (("power",), "link 'power' needs an exponent: pass link_power= (CLI --link-power)"),
        (("power", math.inf), "link_power must be a finite number; got inf"),
        (("power", math.nan), "link_power must be a finite number; got nan"),
        (("log", 2.0), "link_power is only used with link 'power', not with link 'log'"),
    ],
)
def test_make_link_errors(args: tuple, message: str) -> None:
    with pytest.raises(SpecError) as err:
        make_link(*args)
    assert str(err.value) == message
    assert isinstance(err.value, ValueError)  # a spec error is also a ValueError


# -- which links each family allows --------------------------------------------------------------


def _family(name: str):
    return make_family(name, power=1.5) if name == "tweedie" else make_family(name)


def _sm_family(name: str):
    return {
        "gaussian": smf.Gaussian(),
        "binomial": smf.Binomial(),
        "poisson": smf.Poisson(),
        "gamma": smf.Gamma(),
        "inverse_gaussian": smf.InverseGaussian(),
        "tweedie": smf.Tweedie(var_power=1.5),
        "negative_binomial": smf.NegativeBinomial(alpha=1.0),
    }[name]


@pytest.mark.parametrize("family", FAMILY_NAMES)
def test_check_link_accepts_exactly_the_declared_links(family: str) -> None:
    fam = _family(family)
    for name in LINK_NAMES:
        link = make_link(name, 2.0) if name == "power" else make_link(name)
        if name in fam.links:
            fam.check_link(link)
            continue
        with pytest.raises(SpecError) as err:
            fam.check_link(link)
        assert str(err.value) == (
            f"family {family!r} does not take link {link.describe()!r}; "
            f"allowed: {', '.join(fam.links)}"
        )


#: statsmodels' link classes that indb implements, by indb name
SM_LINK_NAMES = {
    sml.Identity: "identity",
    sml.Log: "log",
    sml.Logit: "logit",
    sml.Probit: "probit",
    sml.CLogLog: "cloglog",
    sml.Cauchy: "cauchit",
    sml.InversePower: "inverse",
    sml.InverseSquared: "inverse_squared",
    sml.Sqrt: "sqrt",
    sml.Power: "power",
}


@pytest.mark.parametrize("family", FAMILY_NAMES)
def test_declared_links_cover_statsmodels_links(family: str) -> None:
    # statsmodels' Family.links lists the links it considers valid for each family; every one
    # indb implements is allowed, except negative binomial with cloglog (a mean in (0, 1) for
    # a count, which indb declines) and with a general power (indb offers sqrt only)
    sm_names = {SM_LINK_NAMES[k] for k in _sm_family(family).links if k in SM_LINK_NAMES}
    if family == "negative_binomial":
        sm_names -= {"cloglog", "power"}
    assert sm_names <= set(_family(family).links)


@pytest.mark.parametrize("family", FAMILY_NAMES)
def test_default_link_is_statsmodels_default(family: str) -> None:
    # statsmodels' default link per family: identity, logit, log, inverse, 1/mu^2, log, log
    expected = SM_LINK_NAMES[type(_sm_family(family).link)]
    fam = _family(family)
    assert canonical_link(fam).name == expected == fam.canonical
    assert fam.canonical in fam.links


# -- the second derivative d^2 mu / deta^2 (the observed information of a sandwich) ----------


@pytest.mark.parametrize("name", NAMES)
def test_mu_eta_deriv_matches_statsmodels(name: str) -> None:
    c = CASES[name]
    # statsmodels.genmod.families.links: inverse_deriv2 = d^2 mu / deta^2 (test-only oracle),
    # which it takes from the mean's side as -g''(mu) / g'(mu)^3: that loses digits where mu
    # nears 0 or 1 (|eta| large for log, logit, cloglog), so the comparison stays where
    # |eta| <= 3; the closed forms are checked against central differences below
    eta = c.sm_eta[np.abs(c.sm_eta) <= 3.0] if name in ("log", "logit", "cloglog") else c.sm_eta
    with np.errstate(over="ignore", under="ignore"):
        want = c.sm.inverse_deriv2(eta)
        got = c.link.mu_eta_deriv(eta)
    # logit, cauchit: 0 at eta = 0, where statsmodels leaves an eps-sized rounding
    atol = 1e-12 if name in ("logit", "cauchit") else 0.0
    assert_allclose(got, want, rtol=1e-10, atol=atol)


@pytest.mark.parametrize("name", NAMES)
def test_mu_eta_deriv_is_the_derivative_of_mu_eta(name: str) -> None:
    c = CASES[name]
    # central difference of dmu/deta, as test_mu_eta_is_the_derivative_of_the_inverse
    fd = central_difference(lambda e: _mu_eta(c.link, e), c.fd_eta)
    scale = np.abs(_mu_eta(c.link, c.fd_eta)) + np.abs(fd)
    assert np.all(np.abs(c.link.mu_eta_deriv(c.fd_eta) - fd) <= 1e-6 * scale + 1e-12)


@pytest.mark.parametrize("name", NAMES)
def test_sql_mu_eta_deriv_equals_numpy_form(name: str) -> None:
    c = CASES[name]
    lo, hi = SQL_ETA_RANGE.get(name, (-np.inf, np.inf))
    eta = c.fd_eta[(c.fd_eta >= lo) & (c.fd_eta <= hi)]
    got = evaluate(
        {"eta": eta},
        {"d2": lambda e: c.link.mu_eta_deriv_sql(e, c.link.inverse_sql(e.copy()))},
    )["d2"]
    # DuckDB's exp/pow and numpy's differ by a few ulp; logit's m (1 - m) (1 - 2m) is
    # accurate in absolute terms where 1 - 2m cancels (m near 1/2)
    atol = EPS if name == "logit" else 0.0
    assert_allclose(got, c.link.mu_eta_deriv(eta), rtol=1e-12, atol=atol)
