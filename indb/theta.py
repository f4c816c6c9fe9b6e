"""The negative binomial theta, estimated with the coefficients in shared scans.

After a Poisson fit to a loose tolerance (its coefficients are the start) and one scan of
the response histogram and the moment estimate of theta, every scan is one IRLS scan of
the negative binomial at the current theta that also returns theta's two sums at its means
(:func:`indb.plan.irls_scan.theta_terms`): each scan moves the coefficients by an IRLS step
and theta by a Newton step on its profile log-likelihood, so theta costs no scans of its
own. The loop stops when the coefficient step is below the IRLS rule (in standard errors)
and theta's step is below :data:`THETA_STEP_IN_SE` of theta's own standard error: a
measure the rounding of a parallel sum (about 1e-7 relative at 10^6 rows) cannot defeat,
where a fixed relative tolerance of 1e-9 could. The fit proper then runs at that theta.
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass

import numpy as np

from indb import solver
from indb.design import Design
from indb.errors import SpecError
from indb.families import NegativeBinomial, Poisson
from indb.fitrun import FitRun
from indb.irls import MAX_HALVINGS, irls
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query, response_histogram_query, theta_query
from indb.prefit import Summary

#: theta's loop stops when its Newton step is below this many of theta's standard errors
#: (on the log scale), as the IRLS loop stops at a fraction of the coefficients' own
THETA_STEP_IN_SE = 1e-3
#: the Poisson start's tolerance: its coefficients only start the shared loop
START_TOL = 1e-4
#: theta above this: no overdispersion to speak of (the Poisson limit)
THETA_LIMIT = 1e8


@dataclass(frozen=True)
class ThetaEstimate:
    """Theta, its standard error (observed information at the final means), the
    coefficients it was found with, whether the loop settled, and its scans."""

    theta: float
    std_error: float
    beta: np.ndarray
    converged: bool
    scans: int
    note: str | None = None


def estimate_theta(
    ctx: PlanContext, design: Design, run: FitRun, summary: Summary
) -> ThetaEstimate:
    """Theta and the coefficients at it, in shared scans (see the module notes)."""
    run.phase = "theta"
    start = len(run.log)
    loose = dataclasses.replace(ctx.spec, family=Poisson(), tol=max(ctx.spec.tol, START_TOL))
    state, _ = irls(dataclasses.replace(ctx, spec=loose), design, run, summary.ybar)
    beta = state.beta
    t0 = time.perf_counter()
    hist = run.query(response_histogram_query(ctx, design))
    hy, hc = np.asarray(hist["y"], float), np.asarray(hist["c"], float)
    total = float(hc.sum())
    run.record(math.nan, math.nan, 0, time.perf_counter() - t0)
    t0 = time.perf_counter()
    row = run.one_row(theta_query(ctx, design, beta, 1.0))
    # moments: E[(y/mu - 1)^2] = 1/mu + 1/theta for the negative binomial
    excess = float(row["mom"]) - float(row["inv"])
    theta = min(max(total / excess if excess > 0 else 1e6, 1e-4), 1e6)
    run.record(math.nan, math.nan, 0, time.perf_counter() - t0)
    step_tol = max(math.sqrt(ctx.spec.tol), 1e-7)
    se_log = math.nan
    beta_prev = beta
    for _ in range(max(ctx.spec.max_iter, 1)):
        t0 = time.perf_counter()
        sums, beta, halvings = _shared_scan(ctx, design, run, beta, beta_prev, theta, summary.ybar)
        sol = solver.solve(sums.xtwx, sums.xtwz)
        a, b = sums.extras["thetaa"], sums.extras["thetab"]
        new = solver.theta_step(theta, hy, hc, total, a, b)
        se_log = _se_log(theta, hy, hc, total, a, b)
        change = abs(math.log(new / theta))
        run.record(sums.deviance, abs(new - theta) / theta, halvings, time.perf_counter() - t0)
        beta_step = solver.step_in_se(beta, sol.beta, sol.inv_info, 1.0)
        beta_prev, beta, theta = beta, sol.beta, new
        if theta > THETA_LIMIT:
            return _estimate(theta, beta, True, run, start, hy, hc, total, a, b, _NO_OVERDISPERSION)
        if beta_step < step_tol and change < THETA_STEP_IN_SE * se_log:
            return _estimate(theta, beta, True, run, start, hy, hc, total, a, b)
    note = (
        f"negative binomial theta did not settle in {ctx.spec.max_iter} shared scans (last "
        f"change {change:.2e} on the log scale, {change / se_log:.2g} of its standard error); "
        "the fit is reported at the last theta; raise max_iter (CLI --max-iter) or fix theta "
        "(theta=, --theta)"
    )
    return _estimate(theta, beta, False, run, start, hy, hc, total, a, b, note)


_NO_OVERDISPERSION = (
    "negative binomial theta runs off to infinity: the data show no overdispersion; a "
    "Poisson model fits as well"
)


def _shared_scan(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    beta: np.ndarray,
    beta_prev: np.ndarray,
    theta: float,
    ybar: float,
) -> tuple[solver.Sums, np.ndarray, int]:
    """One IRLS scan of the negative binomial at ``theta`` with theta's sums, the step
    halved toward ``beta_prev`` while some mean is invalid (a link other than log)."""
    family = NegativeBinomial(theta=theta)
    nb = dataclasses.replace(ctx, spec=dataclasses.replace(ctx.spec, family=family))
    extra = ("edge", "near") if family.unit_mean else ()
    for halvings in range(MAX_HALVINGS + 1):
        tree = gram_query(nb, design, beta, ybar=ybar, theta=theta)
        sums = solver.assemble(design, run.query(tree), (*extra, "thetaa", "thetab"))
        run.check_rows(sums)
        if sums.bad == 0 and math.isfinite(sums.deviance):
            return sums, beta, halvings
        beta = 0.5 * (beta + beta_prev)
    raise SpecError(
        f"negative binomial theta: {sums.bad:,} rows give an invalid mean however the step "
        f"is shortened (link {ctx.spec.link.describe()!r}); try the log link or fix theta "
        "(theta=, CLI --theta)"
    )


def _se_log(theta: float, hy, hc, total: float, a: float, b: float) -> float:
    """theta's standard error on the log scale from its observed information (NaN where
    the profile is not concave)."""
    _, hess = solver.theta_score(theta, hy, hc, total, a, b)
    return 1.0 / (theta * math.sqrt(-hess)) if hess < 0 else math.nan


def _estimate(theta, beta, converged, run, start, hy, hc, total, a, b, note=None) -> ThetaEstimate:
    _, hess = solver.theta_score(theta, hy, hc, total, a, b)
    se = 1.0 / math.sqrt(-hess) if hess < 0 and theta <= THETA_LIMIT else math.nan
    scans = sum(1 for r in run.log[start:] if r.phase == "theta") + 2  # histogram, moments
    return ThetaEstimate(theta, se, beta, converged, scans, note)
