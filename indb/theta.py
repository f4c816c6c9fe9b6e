"""The negative binomial theta: IRLS at fixed theta alternating with Newton steps on theta
at fixed means."""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np

from indb import solver
from indb.design import Design
from indb.errors import ConvergenceWarning
from indb.families import NegativeBinomial, Poisson
from indb.fitrun import FitRun
from indb.irls import irls
from indb.plan.context import PlanContext
from indb.plan.irls_scan import response_histogram_query, theta_query
from indb.prefit import Summary


def estimate_theta(
    ctx: PlanContext, design: Design, run: FitRun, summary: Summary
) -> tuple[float, np.ndarray]:
    """Alternate IRLS at fixed theta and Newton steps on theta at fixed means."""
    run.phase = "theta"
    poisson_ctx = dataclasses.replace(ctx, spec=dataclasses.replace(ctx.spec, family=Poisson()))
    state, _ = irls(poisson_ctx, design, run, summary.ybar)
    beta = state.beta
    hist = run.query(response_histogram_query(ctx, design))
    hy, hc = np.asarray(hist["y"], float), np.asarray(hist["c"], float)
    total = float(hc.sum())
    row = run.one_row(theta_query(ctx, design, beta, 1.0))
    mom = float(row["mom"])
    theta = total / mom if mom > 0 else 1e3
    theta = min(max(theta, 1e-4), 1e6)
    for _ in range(50):
        theta_outer = theta
        for _ in range(25):
            row = run.one_row(theta_query(ctx, design, beta, theta))
            new = solver.theta_step(theta, hy, hc, total, float(row["a"]), float(row["b"]))
            done = abs(math.log(new / theta)) < 1e-10
            theta = new
            if done:
                break
        nb_ctx = dataclasses.replace(
            ctx, spec=dataclasses.replace(ctx.spec, family=NegativeBinomial(theta=theta))
        )
        state, _ = irls(nb_ctx, design, run, summary.ybar, start=beta)
        beta = state.beta
        if abs(theta - theta_outer) / theta < 1e-9:
            break
        if theta > 1e8:
            warnings.warn(
                "negative binomial theta runs off to infinity: the data show no "
                "overdispersion; a Poisson model fits as well",
                ConvergenceWarning,
                stacklevel=3,
            )
            break
    return theta, beta
