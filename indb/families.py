"""Exponential-dispersion families: variance, unit deviance, log-likelihood, start values.

All per-row formulas are SQL syntax trees over ``y`` (the response; for binomial the
proportion of successes), ``mu`` and the prior weight ``pw`` (for grouped binomial the
number of trials times any user weight). Deviances are the usual ones (McCullagh & Nelder,
*Generalized Linear Models*, 2nd ed., table 2.1); constants dropped are stated per family.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from indb import sqlexpr as S
from indb.errors import SpecError
from indb.links import IdentityLink, InverseLink, Link, LogitLink, LogLink, PowerLink
from indb.sqlexpr import Expr

BINOMIAL_EPS = 2.220446049250313e-16  # clamp for binomial means (machine epsilon)
POSITIVE_FLOOR = 1e-100  # smallest mean used in formulas; mu^3 stays a normal double


def _xlogy_ratio(y: Expr, mu: Expr) -> Expr:
    """y * ln(y / mu), taken as 0 where y = 0."""
    return S.case([(S.gt(y, S.num(0.0)), S.mul(y, S.ln(S.div(y, mu))))], S.num(0.0))


def _xlog(y: Expr, x: Expr) -> Expr:
    """y * ln(x), taken as 0 where y = 0."""
    return S.case([(S.gt(y, S.num(0.0)), S.mul(y, S.ln(x)))], S.num(0.0))


@dataclass(frozen=True)
class Family:
    """Base family. Subclasses set the class attributes and override the formulas.

    ``y_min``/``y_min_strict``/``y_max`` state the response domain; ``dispersion_fixed``
    says whether the dispersion is 1 or estimated from Pearson's chi-squared.
    """

    name: str = "family"
    canonical: str = "identity"
    links: tuple[str, ...] = ()
    dispersion_fixed: bool = False
    y_min: float | None = None
    y_min_strict: bool = False
    y_max: float | None = None
    unit_mean: bool = False  # mean lives in (0, 1)
    positive_mean: bool = False  # mean lives in (0, inf)

    #: p in V(mu) = mu^p for the power-variance families (None for binomial and NB)
    @property
    def variance_power(self) -> float | None:
        return None

    def deviance_h_sql(self, y: Expr) -> Expr:
        """h(y) with d(y, mu) = h(y) + a(mu) y + b(mu): the part of the unit deviance that
        does not involve mu (what lets rows with one design row be folded exactly)."""
        raise NotImplementedError

    def variance_sql(self, mu: Expr) -> Expr:
        raise NotImplementedError

    def variance_deriv_sql(self, mu: Expr) -> Expr:
        """dV/dmu, which the observed information of a non-canonical link reads."""
        raise NotImplementedError

    def is_canonical(self, link: Link) -> bool:
        """Whether ``link`` is the canonical link of this family, g'(mu) = 1 / V(mu): then
        the observed information equals the expected one (X'WX) at every coefficient."""
        return link.describe() == self.canonical

    def unit_deviance_sql(self, y: Expr, mu: Expr) -> Expr:
        raise NotImplementedError

    def start_sql(self, y: Expr, pw: Expr, ybar: float) -> Expr:
        """Initial mean per row (the family's standard start)."""
        return S.div(S.add(y, S.num(ybar)), S.num(2.0))

    def log_likelihood_sql(
        self, y: Expr, mu: Expr, pw: Expr, dispersion: float, trials: Expr | None
    ) -> Expr | None:
        """Per-row log-likelihood (None where the family has no closed form)."""
        return None

    def clamp_mu_sql(self, mu: Expr) -> Expr:
        if self.unit_mean:
            return S.clamp(mu, BINOMIAL_EPS, 1.0 - BINOMIAL_EPS)
        if self.positive_mean:
            return S.greatest(mu, S.num(POSITIVE_FLOOR))
        return mu

    def mu_ok(self, mu: Expr, link: Link) -> Expr | None:
        """Condition for a valid mean given how the link maps eta."""
        if self.unit_mean and not link.unit_mean:
            return S.and_(S.gt(mu, S.num(0.0)), S.lt(mu, S.num(1.0)))
        if self.positive_mean and not (link.positive_mean or link.unit_mean):
            return S.gt(mu, S.num(0.0))
        return None

    def params(self) -> dict[str, float]:
        return {}

    def saturated_sql(self, y: Expr, pw: Expr, trials: Expr | None) -> dict[str, Expr]:
        """Per-row data-only terms whose sums give the log-likelihood from the deviance.

        Every family here satisfies loglik = loglik_saturated - D / (2 phi); the saturated
        part depends on the data (and phi) only, so its sums are taken once in the profile
        scan and no pass over the data is needed after the fit. Keys: ``sat`` (the
        saturated log-likelihood at phi = 1, for fixed-dispersion families), ``lny``
        (ln y) and ``lpw`` (ln pw). Rows with pw = 0 are left out by the caller.
        """
        return {}

    def log_likelihood(
        self,
        deviance: float,
        phi: float,
        sums: dict[str, float],
        n: float,
        constant_weight: float | None,
    ) -> float | None:
        """Log-likelihood from the deviance and the profile sums (None: needs a pass)."""
        return None

    def describe(self) -> str:
        return self.name

    def check_link(self, link: Link) -> None:
        lname = link.name
        if lname not in self.links and not (lname == "power" and "power" in self.links):
            allowed = ", ".join(self.links)
            raise SpecError(
                f"family {self.name!r} does not take link {link.describe()!r}; allowed: {allowed}"
            )


@dataclass(frozen=True)
class Gaussian(Family):
    """Normal: V(mu) = 1, d(y, mu) = (y - mu)^2. Any real response."""

    name: str = "gaussian"
    canonical: str = "identity"
    links: tuple[str, ...] = ("identity", "log", "inverse", "power", "sqrt", "inverse_squared")

    def variance_sql(self, mu):
        return S.num(1.0)

    def variance_deriv_sql(self, mu):
        return S.num(0.0)

    def unit_deviance_sql(self, y, mu):
        r = S.sub(y, mu)
        return S.mul(r, r)

    def start_sql(self, y, pw, ybar):
        return y

    @property
    def variance_power(self):
        return 0.0

    def deviance_h_sql(self, y):
        return S.mul(y, y)

    def saturated_sql(self, y, pw, trials):
        return {"lpw": S.ln(pw)}

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        # -1/2 [ D / phi + n ln(2 pi phi) - sum ln pw ]
        return -0.5 * (deviance / phi + n * math.log(2 * math.pi * phi) - sums["lpw"])

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        # -1/2 [ pw (y - mu)^2 / phi + ln(2 pi phi / pw) ]
        r = S.sub(y, mu)
        return S.mul(
            S.num(-0.5),
            S.add(
                S.div(S.mul(pw, r, r), S.num(dispersion)),
                S.ln(S.div(S.num(2.0 * math.pi * dispersion), pw)),
            ),
        )


@dataclass(frozen=True)
class Binomial(Family):
    """Binomial proportion y in [0, 1] with prior weight = trials.

    V(mu) = mu (1 - mu); d = 2 [y ln(y/mu) + (1-y) ln((1-y)/(1-mu))].
    The log-likelihood keeps the binomial coefficient when trials are given.
    """

    name: str = "binomial"
    canonical: str = "logit"
    links: tuple[str, ...] = ("logit", "probit", "cloglog", "log", "cauchit", "identity")
    dispersion_fixed: bool = True
    y_min: float | None = 0.0
    y_max: float | None = 1.0
    unit_mean: bool = True

    def variance_sql(self, mu):
        return S.mul(mu, S.sub(S.num(1.0), mu))

    def variance_deriv_sql(self, mu):
        return S.sub(S.num(1.0), S.mul(S.num(2.0), mu))

    def unit_deviance_sql(self, y, mu):
        one = S.num(1.0)
        return S.mul(
            S.num(2.0), S.add(_xlogy_ratio(y, mu), _xlogy_ratio(S.sub(one, y), S.sub(one, mu)))
        )

    def start_sql(self, y, pw, ybar):
        return S.div(S.add(S.mul(pw, y), S.num(0.5)), S.add(pw, S.num(1.0)))

    def deviance_h_sql(self, y):
        one = S.num(1.0)
        return S.mul(S.num(2.0), S.add(_xlog(y, y), _xlog(S.sub(one, y), S.sub(one, y))))

    def saturated_sql(self, y, pw, trials):
        one = S.num(1.0)
        if trials is None:
            return {"sat": S.mul(pw, S.add(_xlog(y, y), _xlog(S.sub(one, y), S.sub(one, y))))}
        n, k = trials, S.mul(y, trials)
        comb = S.sub(
            S.sub(S.log_gamma(S.add(n, one)), S.log_gamma(S.add(k, one))),
            S.log_gamma(S.add(S.sub(n, k), one)),
        )
        return {
            "sat": S.mul(S.div(pw, n), S.add(comb, _xlog(k, y), _xlog(S.sub(n, k), S.sub(one, y))))
        }

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        return sums["sat"] - deviance / 2.0

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        one = S.num(1.0)
        if trials is None:
            # Bernoulli / proportion form, scaled by the prior weight.
            return S.mul(pw, S.add(_xlog(y, mu), _xlog(S.sub(one, y), S.sub(one, mu))))
        # pw = trials * user weight; k = y * trials successes.
        n = trials
        k = S.mul(y, n)
        user_w = S.div(pw, n)
        comb = S.sub(
            S.sub(S.log_gamma(S.add(n, one)), S.log_gamma(S.add(k, one))),
            S.log_gamma(S.add(S.sub(n, k), one)),
        )
        return S.mul(user_w, S.add(comb, _xlog(k, mu), _xlog(S.sub(n, k), S.sub(one, mu))))


@dataclass(frozen=True)
class Poisson(Family):
    """Poisson: V(mu) = mu; d = 2 [y ln(y/mu) - (y - mu)]; y >= 0."""

    name: str = "poisson"
    canonical: str = "log"
    links: tuple[str, ...] = ("log", "identity", "sqrt", "power")
    dispersion_fixed: bool = True
    y_min: float | None = 0.0
    positive_mean: bool = True

    def variance_sql(self, mu):
        return mu

    def variance_deriv_sql(self, mu):
        return S.num(1.0)

    def unit_deviance_sql(self, y, mu):
        return S.mul(S.num(2.0), S.sub(_xlogy_ratio(y, mu), S.sub(y, mu)))

    @property
    def variance_power(self):
        return 1.0

    def deviance_h_sql(self, y):
        return S.mul(S.num(2.0), S.sub(_xlog(y, y), y))

    def saturated_sql(self, y, pw, trials):
        # y ln y - y - ln Gamma(y + 1) is 0 at y = 0 and -1 at y = 1: most counts, and no
        # ln Gamma call for them (y arrives floored at 1e-300 by the caller)
        full = S.sub(S.sub(_xlog(y, y), y), S.log_gamma(S.add(y, S.num(1.0))))
        term = S.case(
            [(S.le(y, S.num(1e-300)), S.num(0.0)), (S.eq(y.copy(), S.num(1.0)), S.num(-1.0))], full
        )
        return {"sat": S.mul(pw, term)}

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        return sums["sat"] - deviance / 2.0

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        return S.mul(pw, S.sub(S.sub(_xlog(y, mu), mu), S.log_gamma(S.add(y, S.num(1.0)))))


@dataclass(frozen=True)
class Gamma(Family):
    """Gamma: V(mu) = mu^2; d = 2 [-ln(y/mu) + (y - mu)/mu]; y > 0."""

    name: str = "gamma"
    canonical: str = "inverse"
    links: tuple[str, ...] = ("inverse", "log", "identity", "power", "sqrt", "inverse_squared")
    y_min: float | None = 0.0
    y_min_strict: bool = True
    positive_mean: bool = True

    def variance_sql(self, mu):
        return S.mul(mu, mu)

    def variance_deriv_sql(self, mu):
        return S.mul(S.num(2.0), mu)

    def unit_deviance_sql(self, y, mu):
        return S.mul(S.num(2.0), S.add(S.neg(S.ln(S.div(y, mu))), S.div(S.sub(y, mu), mu)))

    @property
    def variance_power(self):
        return 2.0

    def deviance_h_sql(self, y):
        return S.sub(S.mul(S.num(-2.0), S.ln(y)), S.num(2.0))

    def saturated_sql(self, y, pw, trials):
        return {"lny": S.ln(y)}

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        if constant_weight is None:
            return None  # ln Gamma(pw / phi) with varying pw needs the rows
        nu = constant_weight / phi
        return -deviance / (2 * phi) + n * (nu * math.log(nu) - nu - math.lgamma(nu)) - sums["lny"]

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        # nu = pw / phi: nu ln(nu y / mu) - nu y / mu - lgamma(nu) - ln y
        nu = S.div(pw, S.num(dispersion))
        ratio = S.div(y, mu)
        return S.sub(
            S.sub(S.sub(S.mul(nu, S.ln(S.mul(nu, ratio))), S.mul(nu, ratio)), S.log_gamma(nu)),
            S.ln(y),
        )


@dataclass(frozen=True)
class InverseGaussian(Family):
    """Inverse Gaussian: V(mu) = mu^3; d = (y - mu)^2 / (y mu^2); y > 0."""

    name: str = "inverse_gaussian"
    canonical: str = "inverse_squared"
    links: tuple[str, ...] = ("inverse_squared", "inverse", "log", "identity", "power", "sqrt")
    y_min: float | None = 0.0
    y_min_strict: bool = True
    positive_mean: bool = True

    def variance_sql(self, mu):
        return S.mul(mu, mu, mu)

    def variance_deriv_sql(self, mu):
        return S.mul(S.num(3.0), mu, mu)

    def unit_deviance_sql(self, y, mu):
        r = S.sub(y, mu)
        return S.div(S.mul(r, r), S.mul(y, mu, mu))

    @property
    def variance_power(self):
        return 3.0

    def deviance_h_sql(self, y):
        return S.div(S.num(1.0), y)

    def saturated_sql(self, y, pw, trials):
        return {"lny": S.ln(y), "lpw": S.ln(pw)}

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        # -1/2 [ D / phi + n ln(2 pi phi) + 3 sum ln y - sum ln pw ]
        return -0.5 * (
            deviance / phi + n * math.log(2 * math.pi * phi) + 3.0 * sums["lny"] - sums["lpw"]
        )

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        r = S.sub(y, mu)
        phi = S.num(dispersion)
        return S.mul(
            S.num(-0.5),
            S.add(
                S.div(S.mul(pw, r, r), S.mul(phi, y, mu, mu)),
                S.ln(S.div(S.mul(S.num(2.0 * math.pi * dispersion), y, y, y), pw)),
            ),
        )


@dataclass(frozen=True)
class Tweedie(Family):
    """Tweedie with variance power p: V(mu) = mu^p (p = 0 or p >= 1).

    Domain: y >= 0 and mu > 0 for 1 <= p < 2, y > 0 for p >= 2; p = 0 is the normal
    distribution, with any real response and mean.

    d = 2 [ y^(2-p) / ((1-p)(2-p)) - y mu^(1-p) / (1-p) + mu^(2-p) / (2-p) ], with the
    Poisson (p = 1) and gamma (p = 2) limits. The log-likelihood has no closed form (a series
    density), so it is not reported.
    """

    name: str = "tweedie"
    canonical: str = "log"
    links: tuple[str, ...] = ("log", "identity", "inverse", "power", "sqrt", "inverse_squared")
    y_min: float | None = 0.0
    positive_mean: bool = True
    var_power: float = 1.5

    def __post_init__(self) -> None:
        p = self.var_power
        if not math.isfinite(p) or (0 < p < 1) or p < 0:
            raise SpecError(
                f"tweedie power must be 0 or >= 1 (1 < p < 2 for compound Poisson-gamma); got {p}"
            )
        if p >= 2:
            object.__setattr__(self, "y_min_strict", True)
        if p == 0:
            # power 0 is the normal distribution: any real response, any real mean
            object.__setattr__(self, "y_min", None)
            object.__setattr__(self, "positive_mean", False)

    def variance_sql(self, mu):
        return S.power(mu, S.num(self.var_power))

    def variance_deriv_sql(self, mu):
        p = self.var_power
        if p == 0:
            return S.num(0.0)
        if p == 1:
            return S.num(1.0)
        return S.mul(S.num(p), S.power(mu, S.num(p - 1.0)))

    def is_canonical(self, link):
        # g(mu) = mu^(1-p) / (1-p), the log at p = 1 (the "canonical" attribute is the
        # default link, log, which is canonical only for p = 1)
        p = self.var_power
        if p == 1:
            return link.name == "log"
        if p == 0:
            return link.name == "identity"
        return isinstance(link, PowerLink) and link.exponent == 1.0 - p

    def unit_deviance_sql(self, y, mu):
        p = self.var_power
        if p == 1:
            return Poisson().unit_deviance_sql(y, mu)
        if p == 2:
            return Gamma().unit_deviance_sql(y, mu)
        if p == 0:
            return Gaussian().unit_deviance_sql(y, mu)
        a = S.div(S.power(y, S.num(2 - p)), S.num((1 - p) * (2 - p)))
        b = S.div(S.mul(y, S.power(mu, S.num(1 - p))), S.num(1 - p))
        c = S.div(S.power(mu, S.num(2 - p)), S.num(2 - p))
        return S.mul(S.num(2.0), S.add(S.sub(a, b), c))

    def params(self):
        return {"power": self.var_power}

    @property
    def variance_power(self):
        return self.var_power

    def deviance_h_sql(self, y):
        p = self.var_power
        if p == 1:
            return Poisson().deviance_h_sql(y)
        if p == 2:
            return Gamma().deviance_h_sql(y)
        if p == 0:
            return Gaussian().deviance_h_sql(y)
        return S.div(S.mul(S.num(2.0), S.power(y, S.num(2 - p))), S.num((1 - p) * (2 - p)))

    def describe(self) -> str:
        return f"tweedie(power={self.var_power:g})"


@dataclass(frozen=True)
class NegativeBinomial(Family):
    """Negative binomial (NB2) with shape theta: V(mu) = mu + mu^2 / theta; y >= 0.

    d = 2 [ y ln(y/mu) - (y + theta) ln((y + theta)/(mu + theta)) ].
    """

    name: str = "negative_binomial"
    canonical: str = "log"
    links: tuple[str, ...] = ("log", "identity", "sqrt")
    dispersion_fixed: bool = True
    y_min: float | None = 0.0
    positive_mean: bool = True
    theta: float = 1.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.theta) and self.theta > 0):
            raise SpecError(f"negative_binomial theta must be a positive number; got {self.theta}")

    def variance_sql(self, mu):
        return S.add(mu, S.div(S.mul(mu, mu), S.num(self.theta)))

    def variance_deriv_sql(self, mu):
        return S.add(S.num(1.0), S.div(S.mul(S.num(2.0), mu), S.num(self.theta)))

    def is_canonical(self, link):
        # the canonical link ln(mu / (mu + theta)) is not offered ("canonical" names the
        # default link, log)
        return False

    def unit_deviance_sql(self, y, mu):
        th = S.num(self.theta)
        return S.mul(
            S.num(2.0),
            S.sub(
                _xlogy_ratio(y, mu), S.mul(S.add(y, th), S.ln(S.div(S.add(y, th), S.add(mu, th))))
            ),
        )

    def log_likelihood_sql(self, y, mu, pw, dispersion, trials):
        th = S.num(self.theta)
        one = S.num(1.0)
        const = S.sub(
            S.sub(S.log_gamma(S.add(y, th)), S.log_gamma(S.add(y, one))),
            S.num(math.lgamma(self.theta)),
        )
        core = S.sub(
            S.add(S.mul(th, S.ln(th)), _xlog(y, mu)), S.mul(S.add(y, th), S.ln(S.add(mu, th)))
        )
        return S.mul(pw, S.add(const, core))

    def params(self):
        return {"theta": self.theta}

    def deviance_h_sql(self, y):
        th = S.num(self.theta)
        return S.mul(S.num(2.0), S.sub(_xlog(y, y), S.mul(S.add(y, th), S.ln(S.add(y, th)))))

    def saturated_sql(self, y, pw, trials):
        th = S.num(self.theta)
        one = S.num(1.0)
        row = S.add(
            S.sub(
                S.sub(S.log_gamma(S.add(y, th)), S.log_gamma(S.add(y, one))),
                S.num(math.lgamma(self.theta) - self.theta * math.log(self.theta)),
            ),
            S.sub(_xlog(y, y), S.mul(S.add(y, th), S.ln(S.add(y, th)))),
        )
        return {"sat": S.mul(pw, row)}

    def log_likelihood(self, deviance, phi, sums, n, constant_weight):
        return sums["sat"] - deviance / 2.0

    def describe(self) -> str:
        return f"negative_binomial(theta={self.theta:.6g})"


FAMILY_NAMES = (
    "gaussian",
    "binomial",
    "poisson",
    "gamma",
    "inverse_gaussian",
    "tweedie",
    "negative_binomial",
)


def make_family(name: str, *, power: float | None = None, theta: float | None = None) -> Family:
    """Resolve a family by name; ``power`` is Tweedie's, ``theta`` the negative binomial's."""
    key = name.strip().lower().replace("-", "_")
    aliases = {
        "normal": "gaussian",
        "inverse.gaussian": "inverse_gaussian",
        "negbin": "negative_binomial",
        "nb": "negative_binomial",
    }
    key = aliases.get(key, key)
    if key not in FAMILY_NAMES:
        raise SpecError(f"unknown family {name!r}; allowed: {', '.join(FAMILY_NAMES)}")
    if power is not None and key != "tweedie":
        raise SpecError(f"power is the tweedie variance power; family {key!r} does not take it")
    if theta is not None and key != "negative_binomial":
        raise SpecError(f"theta belongs to negative_binomial; family {key!r} does not take it")
    if key == "tweedie":
        if power is None:
            raise SpecError("family 'tweedie' needs a variance power: pass power= (CLI --power)")
        return Tweedie(var_power=float(power))
    if key == "negative_binomial":
        return NegativeBinomial(theta=float(theta) if theta is not None else 1.0)
    return {
        "gaussian": Gaussian,
        "binomial": Binomial,
        "poisson": Poisson,
        "gamma": Gamma,
        "inverse_gaussian": InverseGaussian,
    }[key]()


def canonical_link(family: Family) -> Link:
    """The family's canonical link (log for Tweedie and negative binomial, by convention)."""
    return {
        "identity": IdentityLink(),
        "logit": LogitLink(),
        "log": LogLink(),
        "inverse": InverseLink(),
        "inverse_squared": PowerLink(name="inverse_squared", exponent=-2.0),
    }[family.canonical]
