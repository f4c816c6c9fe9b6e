"""Penalised fits: the penalty in the fit's coordinates, the lambda path, the result's
inference.

The penalised Newton step itself is :mod:`indb.penalty` (numpy only); this module wires it
to the scans. A single ``penalty`` is one IRLS run with the penalised step. A ``path``
first fits the model with every penalised coefficient held at 0 (its last scan gives the
gradient, hence lambda_max), then walks N lambdas down on a log scale, each IRLS run
started from the previous one's last scan (:meth:`indb.irls.IrlsSolver.start_warm`), so a
lambda costs the scans of its own iterations only (usually two or three). A gaussian
identity-link model walks the path with no scan (:func:`quadratic_walk`): one scan's sums
hold at every coefficient.

Inference: penalised estimates are biased towards 0 by design, and the unpenalised
covariance (X'WX)^-1 does not describe their spread, so standard errors, Wald statistics,
p-values, intervals, term tests, generalized VIFs, AIC and BIC are not reported (NaN /
absent); the result's ``penalty`` says so in its ``note``, and the text report prints it.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
from scipy import sparse

from indb import solver
from indb.design import Design
from indb.families import Gaussian
from indb.fitrun import FitRun
from indb.irls import IrlsSolver, IrlsState
from indb.links import IdentityLink
from indb.penalty import Penalty, column_units, weighted_spread
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query
from indb.prefit import Summary
from indb.results import FitResult

NOTE = (
    "penalised fit: estimates are shrunk towards 0, so standard errors, Wald tests, "
    "intervals, term tests, AIC and BIC are not reported"
)


def make_penalty(ctx: PlanContext, design: Design, run: FitRun, summary: Summary) -> Penalty:
    """The spec's penalty in the fit's internal coordinates (strength ``inf`` for a path,
    whose first fit holds every penalised coefficient at 0)."""
    spec = ctx.spec
    sc = run.scaling
    # W' d' = (sum of f pw on the fit's scale) x (internal deviance / source deviance over
    # the weight factors) = sum_fpw x 2^log2_deviance_factor (indb.design.Scaling)
    total = summary.sum_fpw * 2.0**sc.log2_deviance_factor
    spread = _weighted_spread(ctx, design, run, summary) if spec.standardize else None
    unit = column_units(design, sc, dict(spec.penalty_for), spread)
    strength = math.inf if spec.path is not None else float(spec.penalty or 0.0)
    return Penalty(strength, spec.l1_share, unit, total)


def _weighted_spread(ctx: PlanContext, design: Design, run: FitRun, summary: Summary) -> np.ndarray:
    """Each internal column's standard deviation weighted by prior x frequency weight: X'WX
    of one scan whose working weights are those (the gaussian family, identity link). Without
    an intercept the spread is taken about 0, as that model measures its columns."""
    sums = _plain_gram(ctx, design, run, summary)
    if design.intercept:
        return weighted_spread(sums.xtwx, float(sums.xtwx.diagonal()[0]))
    sc = run.scaling
    total = summary.sum_fpw * sc.weight_factor * sc.freq_factor
    return np.sqrt(np.clip(sums.xtwx.diagonal() / total, 0.0, None))


def _plain_gram(ctx: PlanContext, design: Design, run: FitRun, summary: Summary) -> solver.Sums:
    spec = dataclasses.replace(ctx.spec, family=Gaussian(), link=IdentityLink())
    plain = dataclasses.replace(ctx, spec=spec)
    tree = gram_query(plain, design, np.zeros(design.p), ybar=summary.ybar)
    return solver.assemble(design, run.query(tree))


def path(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    summary: Summary,
    penalty: Penalty,
    state: IrlsState,
) -> tuple[list[IrlsState], list[dict[str, Any]], float]:
    """Walk the lambda path from the held-at-0 fit ``state``: (one state per lambda, one
    record per lambda, lambda_max)."""
    spec = ctx.spec
    lam_max = penalty.lambda_max(state.sums.xtwx, state.sums.xtwz, state.beta)
    n = int(spec.path or 2)
    lambdas = lam_max * spec.path_ratio ** (np.arange(n) / (n - 1))
    states = walk(ctx, design, run, summary, penalty, state, lambdas)
    records = [
        _record(design, run, s, penalty.at(float(lam)))
        for s, lam in zip(states, lambdas, strict=True)
    ]
    return states, records, lam_max


def walk(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    summary: Summary,
    penalty: Penalty,
    state: IrlsState,
    lambdas: np.ndarray,
) -> list[IrlsState]:
    """From ``state``, the fit at ``lambdas[0]``, fit each further lambda warm-started from
    the one before (on ``ctx``'s rows): one state per lambda."""
    if quadratic_exact(ctx):
        return quadratic_walk(penalty, state, lambdas)
    states = [state]
    n = len(lambdas)
    # one loop for the whole path: the scans' caches carry over from lambda to lambda
    loop = IrlsSolver(ctx, design, run, summary.ybar, off_mean=summary.off_mean)
    for k, lam in enumerate(lambdas[1:], start=2):
        loop.with_penalty(penalty.at(float(lam)), predicted_settle=k < n)
        state, _ = loop.fit(warm=state)
        states.append(state)
    return states


def quadratic_exact(ctx: PlanContext) -> bool:
    """A gaussian model with the identity link: its working weights and response do not
    depend on the coefficients, so one scan's X'WX and X'Wz are every iteration's, and the
    deviance at any coefficients follows from them (:func:`quadratic_deviance`)."""
    spec = ctx.spec
    return spec.family.name == "gaussian" and spec.link.name == "identity"


def quadratic_deviance(sums: solver.Sums, at: np.ndarray, beta: np.ndarray) -> float:
    """The deviance at ``beta`` from a scan at ``at``: D(b) = D(a) - 2 d'(X'Wz - X'WX a)
    + d'X'WX d with d = b - a (internal scale); exact for a gaussian identity-link model,
    to third order in d under a canonical link."""
    a = sparse.csr_array(sums.xtwx)
    at = np.nan_to_num(at)
    d = np.nan_to_num(beta) - at
    return float(sums.deviance - 2.0 * d @ (sums.xtwz - a @ at) + d @ (a @ d))


def quadratic_walk(penalty: Penalty, state: IrlsState, lambdas: np.ndarray) -> list[IrlsState]:
    """:func:`walk` for a gaussian identity-link model, with no scan: every lambda's fit is
    the exact penalised least-squares solution of ``state``'s sums, its deviance (and
    Pearson's chi-squared, the same sum for the gaussian family) from
    :func:`quadratic_deviance`. The refit at the reported lambda scans its rows again."""
    states = [state]
    beta = state.beta
    for lam in lambdas[1:]:
        sol = penalty.at(float(lam)).step(state.sums.xtwx, state.sums.xtwz, beta)
        dev = quadratic_deviance(state.sums, state.beta, sol.beta)
        sums = dataclasses.replace(state.sums, deviance=dev, pearson=dev, matrices={})
        beta = sol.beta
        states.append(IrlsState(beta=beta, sums=sums, solution=sol, converged=True, iterations=0))
    return states


def refit(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    summary: Summary,
    penalty: Penalty,
    warm: IrlsState,
) -> IrlsState:
    """The fit at ``penalty`` on ``ctx``'s rows, warm-started from ``warm`` (the path's
    state at that lambda: usually one scan confirms it)."""
    loop = IrlsSolver(ctx, design, run, summary.ybar, off_mean=summary.off_mean)
    state, _ = loop.with_penalty(penalty).fit(warm=warm)
    return state


def original_estimates(design: Design, run: FitRun, beta: np.ndarray) -> np.ndarray:
    """Internal coefficients on the source's scale."""
    std = run.scaling.to_original(np.nan_to_num(beta), design.intercept)
    return np.asarray(solver.back_transform(design) @ std)


def _record(design: Design, run: FitRun, state: IrlsState, penalty: Penalty) -> dict[str, Any]:
    est = original_estimates(design, run, state.beta)
    on = penalty.penalised
    deviance = state.sums.deviance
    if state.scanned is not None:
        # the stop added its solved step to the scanned coefficients: at a penalised
        # optimum the deviance's gradient is not 0, so it moved to first order
        deviance = quadratic_deviance(state.sums, state.scanned, state.beta)
    return {
        "penalty": penalty.strength,
        "deviance": run.scaling.unscale(deviance),
        "nonzero": int(np.count_nonzero(est[on])),
        "coefficients": dict(zip(design.terms, (float(v) for v in est), strict=True)),
    }


def penalised_result(
    result: FitResult,
    penalty: Penalty,
    records: list[dict[str, Any]],
    lam_max: float | None,
) -> FitResult:
    """The result of a penalised fit: no standard errors or tests (module docstring), the
    penalty and the path recorded."""
    coefs = tuple(
        dataclasses.replace(
            c,
            std_error=math.nan,
            wald=math.nan,
            p_two_sided=math.nan,
            lower_bound=math.nan,
            upper_bound=math.nan,
        )
        for c in result.coefficients
    )
    on = penalty.penalised
    info = {
        "penalty": penalty.strength,
        "l1_share": penalty.l1_share,
        "lambda_max": lam_max,
        "nonzero": int(np.count_nonzero(np.array([c.estimate for c in coefs])[on])),
        "penalised_terms": int(on.sum()),
        "note": NOTE,
    }
    return dataclasses.replace(
        result,
        coefficients=coefs,
        covariance=None,
        inverse_entries=None,
        term_tests=(),
        collinearity=(),
        aic=math.nan,
        bic=math.nan,
        penalty=info,
        penalty_path=tuple(records),
    )


__all__ = [
    "NOTE",
    "make_penalty",
    "original_estimates",
    "path",
    "penalised_result",
    "refit",
    "walk",
]
