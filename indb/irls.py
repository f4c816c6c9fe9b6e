"""The IRLS loop: one aggregate scan per iteration, step-halving, the convergence test."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from indb import logsums, solver
from indb.design import Design
from indb.errors import SpecError
from indb.fitrun import FitRun
from indb.nullmodel import NullTrack
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query
from indb.plan.log_scan import log_scan_applies, log_scan_query
from indb.spec import ModelSpec
from indb.sqlexpr import Expr

MAX_HALVINGS = 30
# halvings (step 1/4) after which a rise too small for the convergence test ends IRLS
STALL_HALVINGS = 2


@dataclass(frozen=True)
class IrlsState:
    beta: np.ndarray
    sums: solver.Sums
    solution: solver.Solution
    converged: bool
    iterations: int
    #: stopped early: step-halving could not lower the deviance measurably (see irls)
    stalled: bool = False


# -- IRLS ------------------------------------------------------------------------------------


def _fallback_beta(ctx: PlanContext, design: Design, ybar: float) -> np.ndarray:
    """Intercept-only coefficients g(ybar): where a failing first step halves toward."""
    beta = np.zeros(design.p)
    if design.intercept:
        link = ctx.spec.link
        mu = min(max(ybar, 1e-6), 1 - 1e-6) if ctx.spec.family.unit_mean else ybar
        with np.errstate(all="ignore"):
            g = float(link.link(np.array([mu]))[0])
        beta[0] = g if math.isfinite(g) else 0.0
    return beta


def irls(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    ybar: float,
    *,
    start: np.ndarray | None = None,
    null_mu: Expr | None = None,
    null_track: NullTrack | None = None,
    off_mean: float = 0.0,
) -> tuple[IrlsState, float | None]:
    """Iterate scans until the deviance settles and the next step is negligible.

    Returns the state at the last scanned coefficients and the null deviance: from the
    first scan when ``null_mu`` (a per-row null mean) is given, or from ``null_track`` (the
    intercept-only model with the offset, iterated in the same scans) when it converged.
    """
    spec = ctx.spec
    cells: list[tuple[str, ...]] | None = None
    null_dev: float | None = None
    # the log-link scan (no join to factor effects; plan.log_scan.log_scan_query) where it applies
    log_scan = log_scan_applies(ctx, design)
    log_cache: logsums.LogCache | None = None
    power = ctx.spec.family.variance_power
    off_center = off_mean if math.isfinite(off_mean) else 0.0

    def scan(beta: np.ndarray | None) -> solver.Sums:
        nonlocal cells, null_dev, log_scan, log_cache
        if beta is not None and log_scan:
            gram, response, constants = logsums.scan_parts(power, log_cache)
            tree = log_scan_query(
                ctx,
                design,
                beta,
                gram=gram,
                response=response,
                constants=constants,
                off_center=off_center,
            )
            got = logsums.assemble_log_scan(
                design, run.query(tree), beta, power, log_cache, off_center
            )
            wants_null = (null_mu is not None and null_dev is None) or (
                null_track is not None and not null_track.done
            )
            b0, dev0 = logsums.null_model(power, got.cache) if wants_null else (0.0, 0.0)
            if got.digits_lost <= logsums.MAX_DIGITS_LOST and math.isfinite(dev0):
                log_cache = got.cache
                if wants_null and null_track is not None:
                    null_track.finish(b0, dev0)
                elif wants_null:
                    null_dev = dev0
                return got.sums
            # the model fits so closely that the split deviance lost too many digits:
            # per-row deviances from here on (this scan is run again below)
            log_scan = False
        with_mu = null_mu is not None and null_dev is None
        track = null_track is not None and not null_track.done
        tree = gram_query(
            ctx,
            design,
            beta,
            ybar=ybar,
            null_mu=null_mu if with_mu else None,
            cells=cells,
            null_intercept=null_track.b0 if track else None,
        )
        extra = ("nullw", "nullwz", "nulldev") if track else ("nulldev",) if with_mu else ()
        if spec.family.unit_mean:
            extra += ("edge", "near")
        out = solver.assemble(design, run.query(tree), extra)
        cells = out.cell_keys
        if with_mu:
            null_dev = out.extras["nulldev"]
        if track:
            null_track.update(out.extras)
        return out

    # Converged when the deviance settles AND the next Newton step is statistically
    # invisible: with linear convergence (non-canonical links) a small deviance change alone
    # can leave coefficients ~1e-4 standard errors from the optimum.
    step_tol = max(math.sqrt(spec.tol), 1e-7)

    t0 = time.perf_counter()
    if start is None:
        sums = scan(None)
        if sums.bad:
            raise SpecError(
                f"cannot find valid starting values for family {spec.family.name!r} with link "
                f"{spec.link.describe()!r} ({sums.bad} rows give an invalid mean); "
                "try another link or starting values"
            )
        dev_old = math.inf
        beta_prev = _fallback_beta(ctx, design, ybar)
        run.record(sums.deviance, math.nan, 0, time.perf_counter() - t0)
        sol = solver.solve(sums.xtwx, sums.xtwz)
        beta = sol.beta
        budget = spec.max_iter - 1  # the start scan counts as an iteration
    else:
        beta = np.asarray(start, float)
        beta_prev = beta.copy()
        dev_old = math.inf
        sol = None
        budget = spec.max_iter
    converged = False
    stalled = False
    iterations = 0
    sums_prev: solver.Sums | None = None
    for _ in range(max(budget, 0)):
        iterations += 1
        halvings = 0
        t0 = time.perf_counter()
        while True:
            sums = scan(beta)
            valid = sums.bad == 0 and math.isfinite(sums.deviance)
            # A rise is relative to the deviance only: deviance terms are >= 0, so their
            # sum's rounding error is a small multiple of eps times the sum (1e-9 covers
            # parallel partial sums over ~10^7 rows). No absolute slack: at a boundary MLE
            # the deviance itself falls towards 0 (~5e-9 after 20 iterations on 4 rows),
            # where a fixed 1e-12 accepted steps that raised it, over and over.
            rises = math.isfinite(dev_old) and sums.deviance > dev_old * (1 + 1e-9)
            if valid and not rises:
                break
            if (
                valid
                and halvings >= STALL_HALVINGS
                and solver.relative_change(sums.deviance, dev_old) < spec.tol
            ):
                # Flat: a quarter of the Newton step still does not lower the deviance and
                # the rise is below what the convergence test can see. Along the step the
                # deviance is ~ D0 - a t + b t^2; had its minimum t* been >= 1/4, t = 1/2
                # or 1/4 would have lowered it, and with t* < 1/4 the full step's rise
                # b (1 - 2 t*) >= b / 2 bounds the best gain b t*^2 below tol / 8 in the
                # same measure. Nothing measurable is left: keep the last accepted step.
                stalled = True
                break
            if halvings >= MAX_HALVINGS:
                raise SpecError(_halving_failure(spec, sums))
            beta = 0.5 * (beta + beta_prev)
            halvings += 1
        if stalled:
            iterations -= 1
            assert sums_prev is not None and sol is not None
            sums, beta = sums_prev, beta_prev
            phi = 1.0
            if not spec.family.dispersion_fixed:
                rank = int((~sol.aliased).sum())
                phi = sums.pearson / max(sums.n_weighted - rank, 1.0)
            # the deviance has settled; converged if the remaining step is invisible too
            converged = solver.step_in_se(beta, sol.beta, sol.inv_info, phi) < step_tol
            break
        sums_prev = sums
        change = (
            solver.relative_change(sums.deviance, dev_old) if math.isfinite(dev_old) else math.inf
        )
        run.record(sums.deviance, change, halvings, time.perf_counter() - t0)
        sol = solver.solve(sums.xtwx, sums.xtwz)
        phi = 1.0
        if not spec.family.dispersion_fixed:
            rank = int((~sol.aliased).sum())
            phi = sums.pearson / max(sums.n_weighted - rank, 1.0)
        if change < spec.tol and solver.step_in_se(beta, sol.beta, sol.inv_info, phi) < step_tol:
            converged = True
            break
        dev_old = sums.deviance
        beta_prev = beta
        beta = sol.beta
    assert sol is not None
    if null_track is not None and null_track.done:
        null_dev = null_track.deviance
    return IrlsState(
        beta=beta,
        sums=sums,
        solution=sol,
        converged=converged,
        iterations=iterations,
        stalled=stalled and not converged,
    ), null_dev


def _halving_failure(spec: ModelSpec, sums: solver.Sums) -> str:
    msg = (
        f"IRLS step-halving failed after {MAX_HALVINGS} halvings (deviance "
        f"{sums.deviance:g}, {sums.bad} rows with invalid means); the model may be "
        "unsuitable for the data (check the link and family)"
    )
    if spec.offset is not None:
        # an offset is added to every row's linear predictor unscaled: one on the wrong
        # scale (exposure instead of ln(exposure)) or spanning more than ~1400 on the log
        # scale (exp overflows past ~709) leaves no coefficients with representable means
        msg += (
            f", and the offset expression {spec.offset!r}: it enters the linear predictor "
            "as is, so with a log link values spanning more than ~700 overflow the fitted "
            "means; check that it is on the link scale (ln(exposure), not exposure) and "
            "rescale it"
        )
    return msg
