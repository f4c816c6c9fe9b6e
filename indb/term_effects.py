"""The effect of each model term, on the scale a reader compares, from a stored result.

numpy/scipy only, no scan. A term is the set of coefficients that come from the same source
columns (as :func:`indb.termtests.term_blocks` groups them), and is shown as one of:

* :class:`FactorEffect`: a categorical column's levels, the reference level included at
  the reference value (1 on a multiplicative scale, 0 otherwise), each with its interval
  and the training rows of the level (the fit's level counts);
* :class:`CurveEffect`: a numeric column (a straight line, or a restricted cubic spline and
  its linear part) over a range, relative to the training mean, with a pointwise band;
* :class:`CoefficientEffect`: anything else (interactions), one point per coefficient.

The scale follows the link: ``exp`` of the linear predictor for a log link (a relativity)
and a logit link (an odds factor); the linear predictor itself otherwise.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from indb.results import Coefficient, FitResult
from indb.splines import spline_basis

#: points along a numeric term's range
CURVE_POINTS = 121


@dataclass(frozen=True)
class Scale:
    """How an effect on the linear predictor is shown: its name, and whether it is
    exponentiated (a multiplicative factor with reference 1) or not (reference 0)."""

    name: str
    exponentiate: bool

    @property
    def reference(self) -> float:
        return 1.0 if self.exponentiate else 0.0

    def apply(self, eta: np.ndarray | float) -> np.ndarray:
        """The effect ``eta`` on this scale (exp overflows to inf, not to an error)."""
        values = np.asarray(eta, dtype=float)
        if not self.exponentiate:
            return values
        with np.errstate(over="ignore"):
            return np.exp(values)


def scale_for(link: str) -> Scale:
    """The scale of a model's effects: relativity (log), odds factor (logit), else the
    linear predictor."""
    name = str(link).strip().lower()
    if name == "log":
        return Scale("relativity", True)
    if name == "logit":
        return Scale("odds factor", True)
    return Scale("effect on the linear predictor", False)


@dataclass(frozen=True)
class PointEffect:
    """One level or coefficient: the estimate and its interval on the linear predictor and
    on the scale (``value``, ``lower``, ``upper``). ``rows`` are the training rows of a
    level (NaN where the fit does not count them); the reference level has estimate 0 and
    no interval; an aliased coefficient has NaN throughout."""

    label: str
    term: str | None
    estimate: float
    std_error: float
    lower_estimate: float
    upper_estimate: float
    value: float
    lower: float
    upper: float
    rows: float = math.nan
    reference: bool = False
    aliased: bool = False


@dataclass(frozen=True)
class FactorEffect:
    """A categorical column's levels in the fit's order, the reference among them."""

    term: str
    column: str
    levels: tuple[PointEffect, ...]


@dataclass(frozen=True)
class CurveEffect:
    """A numeric column's effect over ``x``: ``value`` with the pointwise band ``lower`` ..
    ``upper`` (NaN when the result carries no covariance for a spline), relative to
    ``x_ref`` (where the value is the scale's reference). ``range_note`` says where the
    range of ``x`` comes from."""

    term: str
    column: str
    kind: str  # "linear" or "spline"
    x: np.ndarray
    value: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    x_ref: float
    range_note: str
    knots: tuple[float, ...] = ()
    coefficients: tuple[str, ...] = ()


@dataclass(frozen=True)
class CoefficientEffect:
    """A term shown coefficient by coefficient (an interaction)."""

    term: str
    points: tuple[PointEffect, ...]


Effect = FactorEffect | CurveEffect | CoefficientEffect


@dataclass(frozen=True)
class ValueRange:
    """Where a numeric column's curve is drawn, and why there."""

    low: float
    high: float
    note: str


# -- public ---------------------------------------------------------------------------------


def quantile(result: FitResult) -> float:
    """The interval's quantile, as the fit took it (:func:`indb.solver.wald`): the normal's,
    or t's on the residual df when the dispersion was estimated."""
    from scipy import stats

    level = 0.5 + float(result.confidence) / 2.0
    if str(result.test).strip().lower().startswith("t"):
        return float(stats.t.ppf(level, max(float(result.residual_df), 1e-12)))
    return float(stats.norm.ppf(level))


def term_effects(result: FitResult, ranges: Mapping[str, ValueRange] | None = None) -> list[Effect]:
    """Each term of ``result`` in design order, as a factor, a curve or coefficients.

    ``ranges`` gives a numeric column's range (from a holdout's bands, say); without one,
    a spline is drawn between its outer knots and a straight line over the training mean
    +/- 2 standard deviations (the fit records no minimum or maximum).
    """
    scale = scale_for(result.link)
    design = result.design or {}
    factors = {f["column"]: f for f in design.get("factors", [])}
    columns = {c["term"]: c for c in design.get("columns", [])}
    blocks: dict[tuple[str, ...], list[int]] = {}
    for j, c in enumerate(result.coefficients):
        if c.columns:
            blocks.setdefault(tuple(c.columns), []).append(j)
    out: list[Effect] = []
    for cols, idx in blocks.items():
        coefs = [result.coefficients[j] for j in idx]
        shape = [columns.get(c.term, {}) for c in coefs]
        if len(cols) == 1 and cols[0] in factors and all(not s.get("numerics") for s in shape):
            out.append(factor_effect(result, factors[cols[0]], coefs, scale))
        elif len(cols) == 1 and shape and all(_plain_numeric(s, cols[0]) for s in shape):
            given = (ranges or {}).get(cols[0])
            out.append(curve_effect(result, cols[0], idx, shape, scale, given))
        else:
            name = " & ".join(cols)
            points = tuple(_point(c, c.term, scale) for c in coefs)
            out.append(CoefficientEffect(term=name, points=points))
    return out


def factor_effect(
    result: FitResult, factor: Mapping, coefs: Sequence[Coefficient], scale: Scale
) -> FactorEffect:
    """A categorical column's levels (the fit's order), the reference at the scale's
    reference value, each with the training rows the fit counted."""
    column = factor["column"]
    by_level = {c.levels[0]: c for c in coefs}
    counts = dict(zip(factor["levels"], factor.get("counts", []), strict=False))
    levels = []
    for level in factor["levels"]:
        rows = float(counts.get(level, math.nan))
        c = by_level.get(level)
        if c is None:  # the reference level (or one the design left out)
            ref = level == factor.get("reference")
            zero = 0.0 if ref else math.nan
            value = scale.reference if ref else math.nan
            point = PointEffect(str(level), None, zero, math.nan, zero, zero, value, value, value)
            levels.append(replace(point, rows=rows, reference=ref, aliased=not ref))
            continue
        levels.append(_point(c, str(level), scale, rows))
    return FactorEffect(term=column, column=column, levels=tuple(levels))


def curve_effect(
    result: FitResult,
    column: str,
    idx: Sequence[int],
    shape: Sequence[Mapping],
    scale: Scale,
    given: ValueRange | None = None,
    points: int = CURVE_POINTS,
) -> CurveEffect:
    """A numeric column's effect over its range, relative to its training mean: the
    estimate b'g(x) with g(x) = basis(x) - basis(x_ref), and the band from
    g' V g (V the covariance of the term's coefficients; a straight line needs only its
    standard error)."""
    coefs = [result.coefficients[j] for j in idx]
    knots = tuple(float(k) for k in (result.design.get("knots") or {}).get(column, ()))
    spline = any(s.get("basis") is not None for s in shape)
    span = given or default_range(result, column, knots if spline else ())
    x = np.linspace(span.low, span.high, points)
    x_ref = training_mean(result, column)
    if not (span.low <= x_ref <= span.high):
        x_ref = min(max(x_ref, span.low), span.high)
    basis = np.column_stack([_basis(x, s, knots) for s in shape])
    at_ref = np.array([_basis(np.array([x_ref]), s, knots)[0] for s in shape])
    g = basis - at_ref[None, :]
    beta = np.array([c.estimate for c in coefs], dtype=float)
    kept = ~np.array([c.aliased or not math.isfinite(c.estimate) for c in coefs])
    eta = g[:, kept] @ beta[kept]
    sd = _curve_sd(result, idx, kept, g, coefs)
    q = quantile(result)
    return CurveEffect(
        term=column,
        column=column,
        kind="spline" if spline else "linear",
        x=x,
        value=scale.apply(eta),
        lower=scale.apply(eta - q * sd),
        upper=scale.apply(eta + q * sd),
        x_ref=float(x_ref),
        range_note=span.note,
        knots=knots,
        coefficients=tuple(c.term for c in coefs),
    )


def default_range(result: FitResult, column: str, knots: Sequence[float] = ()) -> ValueRange:
    """A numeric column's range from the stored design: a spline's outer knots, else the
    training mean +/- 2 standard deviations."""
    if len(knots) >= 2:
        return ValueRange(
            float(knots[0]),
            float(knots[-1]),
            "between the spline's outer knots (quantiles of the training rows)",
        )
    mean, sd = training_mean(result, column), _training_sd(result, column)
    if not (math.isfinite(sd) and sd > 0):
        sd = abs(mean) if mean else 1.0
    return ValueRange(
        mean - 2.0 * sd,
        mean + 2.0 * sd,
        "the training mean +/- 2 standard deviations (the fit stores no minimum or maximum)",
    )


def training_mean(result: FitResult, column: str) -> float:
    """The (frequency-weighted) mean of a numeric column over the training rows, from the
    data fingerprint's column sums; the design's centre if the fingerprint lacks it."""
    fp = result.fingerprint or {}
    sums, total = (fp.get("column_sums") or {}).get(column), fp.get("sum_weights")
    if sums is not None and total:
        return float(sums) / float(total)
    value = _design_value(result, column)
    return float(value.get("center", 0.0)) if value else 0.0


# -- helpers --------------------------------------------------------------------------------


def _plain_numeric(shape: Mapping, column: str) -> bool:
    return not shape.get("factors") and list(shape.get("numerics") or []) == [column]


def _basis(x: np.ndarray, shape: Mapping, knots: Sequence[float]) -> np.ndarray:
    j = shape.get("basis")
    return np.asarray(x, dtype=float) if j is None else spline_basis(x, knots, int(j))


def _design_value(result: FitResult, column: str) -> Mapping | None:
    for v in (result.design or {}).get("values", []):
        if v.get("label") == column and v.get("basis") is None and v.get("center"):
            return v
    return None


def _training_sd(result: FitResult, column: str) -> float:
    value = _design_value(result, column)
    return float(value["scale"]) if value and value.get("scale") is not None else math.nan


def _curve_sd(
    result: FitResult,
    idx: Sequence[int],
    kept: np.ndarray,
    g: np.ndarray,
    coefs: Sequence[Coefficient],
) -> np.ndarray:
    """Pointwise standard error of g'b: sqrt(g' V g) over the estimated coefficients."""
    live = [j for j, k in zip(idx, kept, strict=True) if k]
    gk = g[:, kept]
    if len(live) == 1:
        se = [c.std_error for c, k in zip(coefs, kept, strict=True) if k][0]
        return np.abs(gk[:, 0]) * float(se)
    cov = result.covariance
    if cov is None or not live:
        return np.full(g.shape[0], math.nan)
    block = np.asarray(cov, dtype=float)[np.ix_(live, live)]
    var = np.einsum("ij,jk,ik->i", gk, block, gk)
    return np.sqrt(np.clip(var, 0.0, None))


def _point(c: Coefficient, label: str, scale: Scale, rows: float = math.nan) -> PointEffect:
    if c.aliased or not math.isfinite(c.estimate):
        nan = math.nan
        return PointEffect(label, c.term, nan, nan, nan, nan, nan, nan, nan, rows, aliased=True)
    return PointEffect(
        label=label,
        term=c.term,
        estimate=float(c.estimate),
        std_error=float(c.std_error),
        lower_estimate=float(c.lower_bound),
        upper_estimate=float(c.upper_bound),
        value=float(scale.apply(c.estimate)),
        lower=float(scale.apply(c.lower_bound)),
        upper=float(scale.apply(c.upper_bound)),
        rows=rows,
    )
