"""The intercept-only (null) model whose deviance the result reports: without an offset its
mean is the response mean; with one it is fitted by IRLS carried along in the main scans."""

from __future__ import annotations

import math

import numpy as np

from indb import solver
from indb.design import INTERCEPT, Design, DesignColumn
from indb.families import Family
from indb.fitrun import FitRun
from indb.links import Link
from indb.plan.context import PlanContext
from indb.prefit import Summary
from indb.sqlexpr import Expr


class NullTrack:
    """IRLS of the intercept-only model with the offset, carried along in the main scans.

    One parameter: each scan returns sum(w) and sum(w z) at the current intercept ``b0``, so
    the next intercept is their ratio. Halves its step when its deviance rises.
    """

    def __init__(self, b0: float, tol: float) -> None:
        self.b0 = b0
        self.prev = b0
        self.tol = tol
        self.dev_old = math.inf
        self.deviance = math.nan
        self.done = False

    def finish(self, b0: float, deviance: float) -> None:
        """The model's closed-form answer (:func:`indb.logsums.null_model`)."""
        if math.isfinite(b0) and math.isfinite(deviance):
            self.b0, self.deviance, self.done = b0, deviance, True

    def update(self, extras: dict[str, float]) -> None:
        dev = extras["nulldev"]
        if math.isfinite(self.dev_old) and not (dev <= self.dev_old * (1 + 1e-9) + 1e-12):
            self.b0 = 0.5 * (self.b0 + self.prev)  # rose (or NaN): halve and rescan
            return
        w, wz = extras["nullw"], extras["nullwz"]
        new = wz / w if w > 0 else self.b0
        change = solver.relative_change(dev, self.dev_old) if math.isfinite(self.dev_old) else 1.0
        self.deviance = dev
        step = abs(new - self.b0) * math.sqrt(max(w, 0.0))
        if change < self.tol and step < max(math.sqrt(self.tol), 1e-7):
            self.done = True
            return
        self.dev_old, self.prev, self.b0 = dev, self.b0, new


def null_deviance(
    ctx: PlanContext, design: Design, run: FitRun, ybar: float
) -> tuple[Expr | None, bool]:
    """How to get the null deviance (intercept-only model, offset and weights honoured).

    Without an offset its mean is the weighted response mean, whose deviance the first scan
    adds up; with an offset the intercept-only model is refitted by IRLS. The null model has
    an intercept even when the fitted model has none (statsmodels' convention).
    """
    from indb import sqlexpr as S

    if ctx.spec.offset is not None:
        return None, True
    mu = min(max(ybar, 1e-300), 1 - 2.2e-16) if ctx.spec.family.unit_mean else ybar
    return S.num(mu), False


def null_start(ctx: PlanContext, summary: Summary) -> float:
    """Starting intercept of the null model with an offset: g(mean y) - mean offset."""
    return start_intercept(ctx.spec.family, ctx.spec.link, summary.ybar, summary.off_mean)


def start_intercept(fam: Family, link: Link, ybar: float, off_mean: float) -> float:
    """g(ybar) - off_mean (ybar kept inside (0, 1) for a binomial; 0 where g is not finite):
    where IRLS of the intercept-only model with an offset starts."""
    mu = min(max(ybar, 1e-6), 1 - 1e-6) if fam.unit_mean else ybar
    with np.errstate(all="ignore"):
        g = float(link.link(np.array([mu]))[0])
    return (g if math.isfinite(g) else 0.0) - off_mean


def intercept_only(design: Design) -> Design:
    """The design of the null model: the intercept alone."""
    return Design(
        intercept=True,
        factors=(),
        values=(design.values[0],),
        columns=(DesignColumn(term=INTERCEPT, factors=(), levels=(), value=0, source_columns=()),),
    )
