"""Link functions: eta = g(mu), in SQL (syntax trees) and in numpy.

Each link states its formula, the inverse ``mu = g^-1(eta)`` and ``dmu/deta``. The SQL forms
clamp arguments of ``exp`` so no engine overflows (PostgreSQL raises on overflow where
DuckDB and Spark return infinity); rows whose eta leaves the link's valid domain are flagged
by :meth:`Link.eta_ok` so IRLS can halve its step instead of producing NaN. The clamp assumes
a number (the fit's profile rejects NaN and infinite inputs and drops NULLs); scoring, whose
rows nobody checked, goes through :meth:`Link.mean_sql`, which gives no mean for NULL, NaN,
infinite or out-of-range eta.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from indb import sqlexpr as S
from indb.sqlexpr import Expr

EXP_CAP = 700.0  # exp(700) ~ 1e304 is still finite in double precision
UNIT_ETA_CAP = 37.0  # |eta| beyond which logistic-type means round to 0 or 1
CLOGLOG_CAP = math.log(EXP_CAP)  # exp(-exp(eta)) stays a normal double below this
CF_FROM = 3.0  # |x| from which the normal tail uses the continued fraction
CF_TERMS = 50  # its terms: ~1e-15 relative from |x| = 3 on (mpmath, 40 digits)


def _normal_cdf_sql(x: Expr) -> Expr:
    """Standard normal CDF as a portable expression.

    Hart's (1968) rational approximation as published by G. West, "Better approximations
    to cumulative normal functions" (Wilmott, 2005) for |x| < 3, Laplace's continued
    fraction beyond; relative error ~1e-14 over the whole range (checked against
    scipy.special.ndtr in tests/unit).
    """
    xa = S.abs_(x)
    # exp(-x^2/2) loses ~x^2/2 ulps when x^2 is rounded (1e-13 relative at x = 36): split
    # x = h + l with h on a 1/16 grid, so h^2 is exact and (x - h)(x + h) is accurate
    # (Cody's device; the same split scipy's ndtr relies on through erfc).
    h = S.div(S.floor_(S.mul(xa.copy(), S.num(16.0))), S.num(16.0))
    e = S.mul(
        S.exp_(S.div(S.neg(S.mul(h.copy(), h.copy())), S.num(2.0))),
        S.exp_(
            S.div(S.neg(S.mul(S.sub(xa.copy(), h.copy()), S.add(xa.copy(), h.copy()))), S.num(2.0))
        ),
    )
    num_c = [
        3.52624965998911e-02,
        0.700383064443688,
        6.37396220353165,
        33.912866078383,
        112.079291497871,
        221.213596169931,
        220.206867912376,
    ]
    den_c = [
        8.83883476483184e-02,
        1.75566716318264,
        16.064177579207,
        86.7807322029461,
        296.564248779674,
        637.333633378831,
        793.826512519948,
        440.413735824752,
    ]

    def horner(coefs: list[float]) -> Expr:
        acc: Expr = S.num(coefs[0])
        for c in coefs[1:]:
            acc = S.add(S.mul(acc, xa), S.num(c))
        return acc

    small = S.div(S.mul(e, horner(num_c)), horner(den_c))
    # Beyond |x| = 3 Hart's form keeps only absolute accuracy (relative 1e-13 at 4, 5e-11
    # at 5, 3e-9 at 10): Laplace's continued fraction phi(x) / (x + 1/(x + 2/(x + ...))),
    # cut after CF_TERMS terms, is within 1e-14 relative there (checked against mpmath's ncdf
    # to 40 digits in tests/unit; scipy.special.ndtr is itself off by ~1e-13 out there).
    b: Expr = xa.copy()
    for k in range(CF_TERMS - 1, 0, -1):
        b = S.add(xa.copy(), S.div(S.num(float(k)), b))
    big = S.div(S.div(e.copy(), b), S.num(math.sqrt(2.0 * math.pi)))
    tail = S.case([(S.gt(xa, S.num(37.0)), S.num(0.0)), (S.lt(xa, S.num(CF_FROM)), small)], big)
    return S.case([(S.gt(x, S.num(0.0)), S.sub(S.num(1.0), tail))], tail)


@dataclass(frozen=True)
class Link:
    """Base class: a monotone link g with inverse and derivative.

    Class attributes declare the domain: ``unit_mean`` links map every real eta into (0, 1);
    ``positive_mean`` links map every valid eta to a positive mean.
    """

    name: str = "link"
    unit_mean: bool = False
    positive_mean: bool = False

    # SQL forms ---------------------------------------------------------------------------
    def link_sql(self, mu: Expr) -> Expr:
        raise NotImplementedError

    def inverse_sql(self, eta: Expr) -> Expr:
        raise NotImplementedError

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        """dmu/deta at eta (``mu`` is the already computed inverse)."""
        raise NotImplementedError

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        """d^2 mu / deta^2 at eta, over the same clamped eta as :meth:`mu_eta_sql` (the
        observed information of a non-canonical link reads it)."""
        raise NotImplementedError

    def eta_ok(self, eta: Expr) -> Expr | None:
        """Condition for a valid eta (None: every finite eta is valid)."""
        return None

    safe_eta: float = 1.0  # substituted where eta is invalid, so formulas stay finite

    @property
    def increasing(self) -> bool:
        """Whether the mean rises with eta (every link here is monotone)."""
        return True

    def valid_eta_sql(self, eta: Expr) -> Expr:
        """TRUE where eta is a finite number inside :meth:`eta_ok`; FALSE or NULL where it is
        NULL, NaN, +/-inf or outside (the rows :meth:`mean_sql` gives no mean)."""
        ok = S.is_finite(eta)
        inside = self.eta_ok(eta.copy())
        return ok if inside is None else S.and_(ok, inside)

    def mean_sql(self, eta: Expr) -> Expr:
        """The mean for scoring: :meth:`inverse_sql` where :meth:`valid_eta_sql` holds, else
        NULL.

        Scoring rows were never checked by a fit, and the inverse link alone would turn an
        invalid eta into a number: its clamp ``LEAST(GREATEST(eta, -700), 700)`` makes NULL
        -700 (GREATEST skips NULLs) and NaN 700 (NaN sorts above every number) on DuckDB,
        PostgreSQL and Spark alike; the probit CDF makes NaN 1. A mean beyond what a double
        holds (log link, eta > 700) is NULL too, not the clamp's 1e304.
        """
        return S.case([(self.valid_eta_sql(eta), self.inverse_sql(eta.copy()))])

    # numpy forms -------------------------------------------------------------------------
    def link(self, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def inverse(self, eta: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def mu_eta(self, eta: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def mu_eta_deriv(self, eta: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def describe(self) -> str:
        return self.name

    def params(self) -> dict[str, float]:
        """What :func:`make_link` needs beside ``name``, keyed as ``ModelSpec.build`` takes
        it: empty, except ``link_power`` for a power link that has no name of its own."""
        return {}


@dataclass(frozen=True)
class IdentityLink(Link):
    """g(mu) = mu; valid everywhere."""

    name: str = "identity"

    def link_sql(self, mu: Expr) -> Expr:
        return mu

    def inverse_sql(self, eta: Expr) -> Expr:
        return eta

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        return S.num(1.0)

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        return S.num(0.0)

    def link(self, mu):
        return np.asarray(mu, float)

    def inverse(self, eta):
        return np.asarray(eta, float)

    def mu_eta(self, eta):
        return np.ones_like(np.asarray(eta, float))

    def mu_eta_deriv(self, eta):
        return np.zeros_like(np.asarray(eta, float))


@dataclass(frozen=True)
class LogLink(Link):
    """g(mu) = ln(mu); mu = exp(eta) > 0. eta above 700 is flagged (exp would overflow)."""

    name: str = "log"
    positive_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        return S.ln(mu)

    def inverse_sql(self, eta: Expr) -> Expr:
        # clamped on both sides: PostgreSQL raises on overflow *and* underflow of exp()
        return S.exp_(S.clamp(eta, -EXP_CAP, EXP_CAP))

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        return mu

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        return mu

    def eta_ok(self, eta: Expr) -> Expr | None:
        return S.le(eta, S.num(EXP_CAP))

    def link(self, mu):
        return np.log(mu)

    def inverse(self, eta):
        return np.exp(eta)

    def mu_eta(self, eta):
        return np.exp(eta)

    def mu_eta_deriv(self, eta):
        return np.exp(eta)


@dataclass(frozen=True)
class LogitLink(Link):
    """g(mu) = ln(mu / (1 - mu)); mu = 1 / (1 + exp(-eta)) in (0, 1)."""

    name: str = "logit"
    unit_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        return S.ln(S.div(mu, S.sub(S.num(1.0), mu)))

    def inverse_sql(self, eta: Expr) -> Expr:
        e = S.clamp(eta, -EXP_CAP, EXP_CAP)
        return S.div(S.num(1.0), S.add(S.num(1.0), S.exp_(S.neg(e))))

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        return S.mul(mu, S.sub(S.num(1.0), mu))

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        # d/deta mu (1 - mu) = mu (1 - mu) (1 - 2 mu)
        return S.mul(mu, S.sub(S.num(1.0), mu), S.sub(S.num(1.0), S.mul(S.num(2.0), mu)))

    def link(self, mu):
        return special.logit(mu)

    def inverse(self, eta):
        return special.expit(eta)

    def mu_eta(self, eta):
        m = special.expit(eta)
        return m * (1 - m)

    def mu_eta_deriv(self, eta):
        m = special.expit(eta)
        return m * (1 - m) * (1 - 2 * m)


@dataclass(frozen=True)
class ProbitLink(Link):
    """g(mu) = Phi^-1(mu), the standard normal quantile; mu = Phi(eta)."""

    name: str = "probit"
    unit_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        # Only used for starting values, where an approximation is enough: Tukey's lambda
        # approximation 4.91 (mu^0.14 - (1-mu)^0.14) stays within 0.004 of Phi^-1 on
        # [0.01, 0.99] (checked against scipy.special.ndtri in tests).
        return S.mul(
            S.num(4.91),
            S.sub(S.power(mu, S.num(0.14)), S.power(S.sub(S.num(1.0), mu), S.num(0.14))),
        )

    def inverse_sql(self, eta: Expr) -> Expr:
        return _normal_cdf_sql(eta)

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        # |eta| <= 26 keeps the density (~1e-147) and its square in the working weight normal
        # doubles: PostgreSQL raises on underflow; beyond 26 the weight is 0 in effect
        e = S.clamp(eta, -26.0, 26.0)
        return S.div(S.exp_(S.div(S.neg(S.mul(e, e)), S.num(2.0))), S.num(math.sqrt(2.0 * math.pi)))

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        # the density's slope -eta phi(eta), over the same clamp
        e = S.clamp(eta, -26.0, 26.0)
        return S.neg(S.mul(e, self.mu_eta_sql(eta.copy(), mu)))

    def link(self, mu):
        return special.ndtri(mu)

    def inverse(self, eta):
        return special.ndtr(eta)

    def mu_eta(self, eta):
        # the standard normal density, written out: importing scipy.stats for it alone cost
        # every command (indb --help too) a third of a second
        return np.exp(-0.5 * np.square(eta)) / math.sqrt(2.0 * math.pi)

    def mu_eta_deriv(self, eta):
        return -np.asarray(eta, float) * self.mu_eta(eta)


@dataclass(frozen=True)
class CLogLogLink(Link):
    """g(mu) = ln(-ln(1 - mu)); mu = 1 - exp(-exp(eta))."""

    name: str = "cloglog"
    unit_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        return S.ln(S.neg(S.ln(S.sub(S.num(1.0), mu))))

    def inverse_sql(self, eta: Expr) -> Expr:
        # 1 - exp(-x) with x = exp(eta) cancels for small x (relative error ~eps/x) and
        # engines lack expm1: below x = 1e-3 use the series x - x^2/2 + ... + x^5/120, whose
        # relative truncation error is under x^5/720 < 2e-18.
        x = S.exp_(S.clamp(eta, -EXP_CAP, CLOGLOG_CAP))
        acc: Expr = S.num(1.0 / 120.0)
        for c in (-1.0 / 24.0, 1.0 / 6.0, -0.5, 1.0):
            acc = S.add(S.num(c), S.mul(x.copy(), acc))
        series = S.mul(x.copy(), acc)
        return S.case(
            [(S.lt(x.copy(), S.num(1e-3)), series)], S.sub(S.num(1.0), S.exp_(S.neg(x.copy())))
        )

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        # [-340, 5.8] keeps dmu/deta (>= ~1e-148) and its square normal doubles (PostgreSQL
        # raises on underflow); outside, the working weight is 0 in effect
        e = S.clamp(eta, -340.0, 5.8)
        return S.exp_(S.sub(e, S.exp_(e)))

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        # d/deta exp(eta - exp(eta)) = exp(eta - exp(eta)) (1 - exp(eta)), same clamp
        e = S.clamp(eta, -340.0, 5.8)
        return S.mul(self.mu_eta_sql(eta.copy(), mu), S.sub(S.num(1.0), S.exp_(e)))

    def link(self, mu):
        return np.log(-np.log1p(-np.asarray(mu, float)))

    def inverse(self, eta):
        return -np.expm1(-np.exp(eta))

    def mu_eta(self, eta):
        return np.exp(eta - np.exp(eta))

    def mu_eta_deriv(self, eta):
        return np.exp(eta - np.exp(eta)) * (1.0 - np.exp(eta))


@dataclass(frozen=True)
class CauchitLink(Link):
    """g(mu) = tan(pi (mu - 1/2)); mu = 1/2 + atan(eta) / pi = atan2(1, -eta) / pi.

    The atan2 form is the same function without the cancellation of 1/2 + atan(eta)/pi as
    eta -> -inf (relative error ~eps/mu there).
    """

    name: str = "cauchit"
    unit_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        return S.fn("tan", S.mul(S.num(math.pi), S.sub(mu, S.num(0.5))))

    def inverse_sql(self, eta: Expr) -> Expr:
        return S.div(S.fn("atan2", S.num(1.0), S.neg(eta)), S.num(math.pi))

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        return S.div(S.num(1.0), S.mul(S.num(math.pi), S.add(S.num(1.0), S.mul(eta, eta))))

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        # -2 eta / (pi (1 + eta^2)^2) = -2 eta h / (1 + eta^2)
        one_plus = S.add(S.num(1.0), S.mul(eta.copy(), eta.copy()))
        h = self.mu_eta_sql(eta.copy(), mu)
        return S.div(S.mul(S.num(-2.0), eta.copy(), h), one_plus)

    def link(self, mu):
        return np.tan(np.pi * (np.asarray(mu, float) - 0.5))

    def inverse(self, eta):
        return np.arctan2(1.0, -np.asarray(eta, float)) / np.pi

    def mu_eta(self, eta):
        return 1.0 / (np.pi * (1.0 + np.asarray(eta, float) ** 2))

    def mu_eta_deriv(self, eta):
        e = np.asarray(eta, float)
        return -2.0 * e / (np.pi * (1.0 + e**2) ** 2)


@dataclass(frozen=True)
class PowerLink(Link):
    """g(mu) = mu ** exponent (exponent != 0; exponent 0 means the log link).

    The inverse eta ** (1 / exponent) needs eta > 0, which is the valid domain.
    ``inverse`` (exponent -1), ``inverse_squared`` (-2) and ``sqrt`` (1/2) are named cases.
    """

    name: str = "power"
    exponent: float = 1.0
    positive_mean: bool = True

    def link_sql(self, mu: Expr) -> Expr:
        if self.exponent == -1.0:
            return S.div(S.num(1.0), mu)
        if self.exponent == 0.5:
            return S.sqrt(mu)
        return S.power(mu, S.num(self.exponent))

    def inverse_sql(self, eta: Expr) -> Expr:
        if self.exponent == -1.0:
            return S.div(S.num(1.0), eta)
        if self.exponent == 0.5:
            return S.mul(eta, eta)
        return S.power(eta, S.num(1.0 / self.exponent))

    def mu_eta_sql(self, eta: Expr, mu: Expr) -> Expr:
        if self.exponent == -1.0:
            return S.neg(S.div(S.num(1.0), S.mul(eta, eta)))
        if self.exponent == 0.5:
            return S.mul(S.num(2.0), eta)
        q = 1.0 / self.exponent
        return S.mul(S.num(q), S.power(eta, S.num(q - 1.0)))

    def mu_eta_deriv_sql(self, eta: Expr, mu: Expr) -> Expr:
        if self.exponent == -1.0:
            return S.div(S.num(2.0), S.mul(eta, eta.copy(), eta.copy()))
        if self.exponent == 0.5:
            return S.num(2.0)
        q = 1.0 / self.exponent
        return S.mul(S.num(q * (q - 1.0)), S.power(eta, S.num(q - 2.0)))

    def eta_ok(self, eta: Expr) -> Expr | None:
        return S.gt(eta, S.num(0.0))

    @property
    def increasing(self) -> bool:
        return self.exponent > 0

    def link(self, mu):
        return np.power(np.asarray(mu, float), self.exponent)

    def inverse(self, eta):
        return np.power(np.asarray(eta, float), 1.0 / self.exponent)

    def mu_eta(self, eta):
        q = 1.0 / self.exponent
        return q * np.power(np.asarray(eta, float), q - 1.0)

    def mu_eta_deriv(self, eta):
        q = 1.0 / self.exponent
        return q * (q - 1.0) * np.power(np.asarray(eta, float), q - 2.0)

    def describe(self) -> str:
        named = {-1.0: "inverse", -2.0: "inverse_squared", 0.5: "sqrt"}
        return named.get(self.exponent, f"power({self.exponent:g})")

    def params(self) -> dict[str, float]:
        return {"link_power": self.exponent} if self.name == "power" else {}


@dataclass(frozen=True)
class InverseLink(PowerLink):
    """g(mu) = 1 / mu. With a positive-mean family eta must be > 0; otherwise eta != 0."""

    name: str = "inverse"
    exponent: float = -1.0
    positive_mean: bool = False

    def eta_ok(self, eta: Expr) -> Expr | None:
        return S.ne(eta, S.num(0.0))


def make_link(name: str, exponent: float | None = None) -> Link:
    """Resolve a link by name (``power`` needs ``exponent``)."""
    from indb.errors import SpecError

    key = name.strip().lower()
    if key == "power":
        if exponent is None:
            raise SpecError("link 'power' needs an exponent: pass link_power= (CLI --link-power)")
        if not math.isfinite(exponent):
            raise SpecError(f"link_power must be a finite number; got {exponent!r}")
        if exponent == 0:
            return LogLink()
        if exponent == 1:
            return IdentityLink()
        if exponent == -1:
            return InverseLink()
        named = {-2.0: "inverse_squared", 0.5: "sqrt"}
        return PowerLink(name=named.get(float(exponent), "power"), exponent=float(exponent))
    simple: dict[str, Link] = {
        "identity": IdentityLink(),
        "log": LogLink(),
        "logit": LogitLink(),
        "probit": ProbitLink(),
        "cloglog": CLogLogLink(),
        "cauchit": CauchitLink(),
        "inverse": InverseLink(),
        "inverse_squared": PowerLink(name="inverse_squared", exponent=-2.0),
        "sqrt": PowerLink(name="sqrt", exponent=0.5),
    }
    if key not in simple:
        allowed = ", ".join(sorted([*simple, "power"]))
        raise SpecError(f"unknown link {name!r}; allowed: {allowed}")
    if exponent is not None:
        raise SpecError(f"link_power is only used with link 'power', not with link {name!r}")
    return simple[key]


LINK_NAMES = (
    "identity",
    "log",
    "logit",
    "probit",
    "cloglog",
    "cauchit",
    "inverse",
    "inverse_squared",
    "sqrt",
    "power",
)
