"""Extreme magnitudes: the points and powers of two the profile takes its moments about,
the internal rescaling of response and weights (:class:`indb.design.Scaling`, powers of two
so that nothing rounds), and warnings for the digits that no rescaling can save.

Everything here is decided from the head scan (:func:`indb.plan.profile.head_query`, the
range of each value and of the response over the first kept rows) and the profile.
"""

from __future__ import annotations

import dataclasses
import math

from indb.design import Scaling, Value
from indb.links import IdentityLink, PowerLink
from indb.plan.context import PlanContext
from indb.plan.profile import RESPONSE_KEY
from indb.prefit import Summary, moments
from indb.spec import ModelSpec


def shifts(head: dict[str, object], values: tuple[Value, ...]) -> dict[str, tuple[float, float]]:
    """Per value (and the response, key ``y``) the point c and the power of two g the
    profile takes moments of (v - c) g about (:func:`indb.plan.profile.profile_items`): c
    the lowest value among the first kept rows (0 where there is none, or it is not
    finite), g about one over their range when that lies outside ``MAGNITUDE_BAND`` (else
    1: the SQL of ordinary data stays as it was)."""
    out: dict[str, tuple[float, float]] = {}
    for alias in [*(v.alias for v in values[1:]), RESPONSE_KEY]:
        lo, hi = _finite_or_none(head.get(f"{alias}_lo")), _finite_or_none(head.get(f"{alias}_hi"))
        c = lo if lo is not None else 0.0
        width = (hi - c) if hi is not None else 0.0
        out[alias] = (c, 1.0 / _power_of_two(width))
    return out


#: magnitudes (powers of two) inside which nothing is rescaled: 2^-16 .. 2^16
MAGNITUDE_BAND = 16


def _power_of_two(magnitude: float) -> float:
    """The power of two nearest ``magnitude`` when it lies outside 2^+-MAGNITUDE_BAND, else 1
    (also for 0 and non-finite magnitudes: nothing to go by)."""
    if not (math.isfinite(magnitude) and magnitude > 0):
        return 1.0
    e = round(math.log2(magnitude))
    return math.ldexp(1.0, e) if abs(e) > MAGNITUDE_BAND else 1.0


def _finite_or_none(v: object) -> float | None:
    if v is None:
        return None
    x = float(v)
    return x if math.isfinite(x) else None


def response_scaling(spec: ModelSpec, head: dict[str, object]) -> Scaling:
    """How to rescale the response (from its range among the first kept rows).

    Gaussian with the identity link and an intercept: centred on a value of a kept row,
    y - c (the intercept takes c back), so residuals, deviance and X'Wz keep their digits
    however far the response lies from 0; then, like every power-variance family
    (V(mu) = mu^p) with a log link and an intercept or a power link, divided by the power
    of two nearest its size when that lies outside 2^+-MAGNITUDE_BAND, so that squares,
    mu^p and the deviance neither overflow nor underflow and the convergence test sees
    the deviance at its usual size. Binomial and negative binomial responses are not
    rescaled: their variance functions are not powers of the mean.
    """
    fam, link = spec.family, spec.link
    p = fam.variance_power
    if p is None:
        return Scaling()
    if link.name == "log":
        exponent = None
    elif isinstance(link, IdentityLink):
        exponent = 1.0
    elif isinstance(link, PowerLink):
        exponent = link.exponent
    else:
        return Scaling()
    lo = _finite_or_none(head.get(f"{RESPONSE_KEY}_lo"))
    hi = _finite_or_none(head.get(f"{RESPONSE_KEY}_hi"))
    if lo is None or hi is None:
        return Scaling()  # no finite response among the first rows: the profile explains
    shift = lo if _centres_response(spec) else 0.0
    size = hi - lo if shift != 0.0 else max(abs(lo), abs(hi))
    factor = 1.0 / _power_of_two(size if math.isfinite(size) else max(abs(lo), abs(hi)))
    if factor == 1.0 or (exponent is None and not spec.intercept):
        # a log link moves ln(factor) into the intercept: without one, leave y alone
        return Scaling(shift=shift, variance_power=p)
    return Scaling(
        shift=shift,
        factor=factor,
        coef_factor=1.0 if exponent is None else factor**exponent,
        log_shift=math.log(factor) if exponent is None else 0.0,
        variance_power=p,
    )


def _centres_response(spec: ModelSpec) -> bool:
    """Whether the fit runs on y - c: a gaussian-variance family with the identity link and
    an intercept to take c back (not a positive-mean one such as tweedie with power 0,
    whose response must stay > 0)."""
    fam = spec.family
    return (
        fam.variance_power == 0.0
        and isinstance(spec.link, IdentityLink)
        and spec.intercept
        and not fam.positive_mean
    )


def weight_scaling(ctx: PlanContext, summary: Summary) -> Scaling:
    """The response scaling plus the weights' powers of two: frequency weights divided by
    the one nearest their mean, prior weights by the one nearest their frequency-weighted
    mean (each only outside 2^+-MAGNITUDE_BAND). Every IRLS sum is then about as large
    as with unit weights, so the convergence test (a relative deviance change with an
    absolute floor, and a step measured in standard errors) stops where it would with
    unit weights: constant weights of 1e-12 or 1e50 give the unit-weight estimates."""
    inputs = ctx.inputs
    ff = 1.0
    if inputs.frequency_weight is not None:
        ff = 1.0 / _power_of_two(summary.sum_f / max(summary.n, 1))
    wf = 1.0
    if (inputs.weight is not None or inputs.trials is not None) and summary.sum_f > 0:
        wf = 1.0 / _power_of_two(summary.sum_fpw / summary.sum_f)
    return dataclasses.replace(ctx.scaling, weight_factor=wf, freq_factor=ff)


#: significant digits (of 16) a column's magnitude may cost before a PrecisionWarning
PRECISION_DIGITS = 8.0


def precision_notes(
    ctx: PlanContext, row: dict, shifts: dict[str, tuple[float, float]], summary: Summary
) -> list[str]:
    """Warnings for digits lost to a large level against a small spread where the fit
    cannot centre it away: a response the family or link cannot shift (the residual
    y - mu of two near-equal numbers keeps about 16 - log10(level / spread) digits), and a
    predictor left uncentred because it multiplies a categorical column or the model has
    no intercept (its design column is then nearly proportional to the intercept or to a
    level's indicator: X'WX loses about 2 log10(level / spread) digits)."""
    notes: list[str] = []
    spec = ctx.spec
    _, mean, sd, _ = moments(row, RESPONSE_KEY, shifts)
    lost = _digits(mean, sd)
    if not _centres_response(spec) and lost > PRECISION_DIGITS:
        gaussian_identity = spec.family.name == "gaussian" and isinstance(spec.link, IdentityLink)
        if gaussian_identity and not spec.intercept:
            why = "the model has no intercept to take a shift of it"
            fix = "fit an intercept, or subtract a constant from it in the source query"
        else:
            why = (
                f"family {spec.family.name!r} with link {spec.link.describe()!r} cannot be "
                "fitted to a shifted response"
            )
            fix = (
                "model its variation about a constant instead (gaussian with the identity "
                "link and an intercept is centred internally)"
            )
        notes.append(
            f"response column {ctx.inputs.response!r} varies by only {sd:.3g} around "
            f"{mean:.10g} and {why}, so about {lost:.0f} of 16 significant digits are lost in "
            f"its deviance, dispersion and standard errors; {fix}"
        )
    if not (spec.intercept or ctx.inputs.factors):
        return notes
    for v in summary.values[1:]:
        if v.centered:
            continue
        _, mean, sd, _ = moments(row, v.alias, shifts)
        lost = 2.0 * _digits(mean, sd)
        if lost > PRECISION_DIGITS:
            notes.append(
                f"predictor {v.label!r} varies by only {sd:.3g} around {mean:.10g} and is "
                "not centred (it multiplies a categorical column, or the model has no "
                "intercept), so its design column is nearly proportional to the intercept "
                f"or to a level's indicator and about {lost:.0f} of 16 significant digits "
                "of its coefficients are lost; subtract a round number near its mean from "
                "it in the source query"
            )
    return notes


def _digits(mean: float, sd: float) -> float:
    """log10(|mean| / sd): the decimal digits a difference of two values near the mean
    loses (0 when the spread is as large as the level)."""
    if not (sd > 0 and math.isfinite(sd) and math.isfinite(mean)) or abs(mean) <= sd:
        return 0.0
    return math.log10(abs(mean) / sd)
