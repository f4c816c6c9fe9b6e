"""The fitting procedure: pre-fit scans, the fit's route, the IRLS fit, the result.

This module wires the steps, each in a module of its own: :mod:`indb.prefit` (the pre-fit
scans), :mod:`indb.folding` (the compressed route), :mod:`indb.sample_start` (where IRLS
starts), :mod:`indb.theta` (the negative binomial theta), :mod:`indb.irls` (the loop) with
:mod:`indb.nullmodel` (the null deviance), and :mod:`indb.inference` (the result). It also
records the SQL of a dry run. Each IRLS iteration is exactly one aggregate query.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numpy as np

from indb import batchfit, covariance, crossval, folding, magnitudes, pathfit, prefit, solver
from indb.design import build_design, plan_values
from indb.engines.base_engine import Engine, qualify_source
from indb.errors import (
    ConvergenceWarning,
    DesignWarning,
    NonConvergenceError,
    PrecisionWarning,
    SeparationWarning,
    SpecError,
)
from indb.families import NegativeBinomial
from indb.fitrun import FitRun, Progress
from indb.inference import result
from indb.irls import irls
from indb.nullmodel import NullTrack, intercept_only, null_deviance, null_start
from indb.plan.context import PlanContext
from indb.plan.cv_scan import fold_counts_query
from indb.plan.irls_scan import gram_query
from indb.plan.profile import head_query, profile_items
from indb.results import FitResult
from indb.sample_start import sample_start, start_from
from indb.spec import ModelSpec
from indb.theta import estimate_theta


def _prepare(spec: ModelSpec, engine: Engine, run: FitRun):
    """Pre-fit scans (read only): columns, knots, the profile (on the compressed route, the
    fold and its profile in one scan), levels and combinations."""
    run.phase = "prepare"
    inputs = prefit.describe(spec, engine)
    ctx = PlanContext(spec, inputs, engine.dialect)
    knots = prefit.knots(ctx, run)
    values = plan_values(inputs, spec.intercept)
    head = run.one_row(head_query(ctx, values, knots))
    shifts = magnitudes.shifts(head, values)
    ctx = dataclasses.replace(ctx, scaling=magnitudes.response_scaling(spec, head))
    items = profile_items(ctx, values, knots, shifts)
    folded = folding.fold(ctx, run, items) if folding.should_fold(ctx, run) else None
    row = folded[0] if folded else prefit.profile(ctx, run, items)
    n_total, n_kept, by_col = prefit.check_nulls(ctx, row)
    summary = prefit.summarize(ctx, row, values, shifts)
    run.scaling = magnitudes.weight_scaling(ctx, summary)
    run.notes += magnitudes.precision_notes(ctx, row, shifts, summary)
    run.design_notes += prefit.identifier_notes(ctx, run, head, values)
    ctx = dataclasses.replace(ctx, scaling=run.scaling)
    if folded:
        ctx = folding.folded_context(ctx, run, folded[1], n_kept)
    factors, combos = prefit.factors(ctx, run)
    design = build_design(
        inputs, spec.intercept, summary.values, factors, combos, tuple(knots.items())
    )
    if design.p == 0:
        raise SpecError("the model has no coefficients to estimate")
    solver.check_size(design)
    covariance.check_size(spec, design)
    batchfit.check_drop_one(spec, design)
    run.phase = "fit"
    return ctx, design, summary, n_total, n_kept, by_col


def plan_spec(spec: ModelSpec, engine: Engine) -> list[tuple[str, str]]:
    """The SQL a fit would send, for a dry run: (purpose, SQL text) pairs.

    The pre-fit scans run (they only read); the first IRLS scan is returned, not run. Later
    scans differ only in the coefficient literals.
    """
    spec = dataclasses.replace(spec, source=qualify_source(engine, spec.source))
    sent: list[tuple[str, str]] = []
    recorder = _RecordingEngine(engine, sent)
    run = FitRun(engine=recorder, progress=None, log=[])
    ctx, design, summary, *_ = _prepare(spec, recorder, run)
    start = start_from(spec, design, run.scaling)
    tree = gram_query(ctx, design, start, ybar=summary.ybar)
    sent.append(("IRLS scan (one per iteration; coefficients change)", engine.dialect.render(tree)))
    # at the final coefficients in a fit; any coefficients show the SQL
    sent += covariance.dry_run_sql(ctx, design, start if start is not None else np.zeros(design.p))
    if spec.drop_one:
        sent.append(
            (
                "drop-one scan (one per iteration for all models without a term; "
                "coefficients change)",
                engine.dialect.render(batchfit.batch_sql(design, ctx, start)),
            )
        )
    if spec.folds is not None:
        sent.append(
            ("rows per fold (cross-validation)", engine.dialect.render(fold_counts_query(ctx)))
        )
    return sent


class _RecordingEngine(Engine):
    """Passes calls to a real engine and records the SQL text with a purpose label."""

    def __init__(self, inner: Engine, sent: list[tuple[str, str]]) -> None:
        self.inner = inner
        self.dialect = inner.dialect
        self.sent = sent

    def execute(self, sql: str):
        self.sent.append(("pre-fit scan", sql))
        return self.inner.execute(sql)

    def fetch_columns(self, sql: str):
        self.sent.append(("pre-fit scan", sql))
        return self.inner.fetch_columns(sql)

    def describe(self, sql: str):
        self.sent.append(("describe source", sql))
        return self.inner.describe(sql)


def fit_spec(spec: ModelSpec, engine: Engine, progress: Progress = None) -> FitResult:
    """Fit ``spec`` on ``engine``; see :func:`indb.fit` for the user-facing description."""
    t_start = time.perf_counter()
    # the name as the engine resolves it now: the stored spec and the scoring view then
    # read this table whatever schema or session reads them later
    spec = dataclasses.replace(spec, source=qualify_source(engine, spec.source))
    run = FitRun(engine=engine, progress=progress, log=[])
    try:
        return _fit(spec, run, t_start)
    finally:
        run.drop_temp()


def _fit(spec: ModelSpec, run: FitRun, t_start: float) -> FitResult:
    report_spec = spec
    ctx, design, summary, n_total, n_kept, by_col = _prepare(spec, run.engine, run)
    spec = ctx.spec
    counts = None
    if spec.folds is not None:  # refused before any IRLS scan when a fold is unusable
        run.phase = "prepare"
        counts = crossval.count_folds(ctx, run)
        run.phase = "fit"
    report_summary = summary
    if run.fit_ybar is not None:  # folded rows: the response mean of the folded problem
        summary = dataclasses.replace(summary, ybar=run.fit_ybar)

    warn_msgs: list[str] = []
    for msg in run.notes:
        warnings.warn(msg, PrecisionWarning, stacklevel=2)
        warn_msgs.append(msg)
    for msg in run.design_notes:
        warnings.warn(msg, DesignWarning, stacklevel=2)
        warn_msgs.append(msg)
    # every scan of the fit's table must see the rows the profile saw
    rows = run.compressed[1] if run.compressed is not None else n_kept
    run.expected = (rows, summary.sum_f * run.scaling.freq_factor)
    theta_est = None
    if spec.estimate_theta:
        theta_est = estimate_theta(ctx, design, run, summary)
        if theta_est.note is not None:
            if not theta_est.converged and spec.strict:
                raise NonConvergenceError(theta_est.note)
            warnings.warn(theta_est.note, ConvergenceWarning, stacklevel=2)
            warn_msgs.append(theta_est.note)
        spec = dataclasses.replace(spec, family=NegativeBinomial(theta=theta_est.theta))
        report_spec = dataclasses.replace(report_spec, family=spec.family)
        ctx = dataclasses.replace(ctx, spec=spec)
        start = theta_est.beta
    else:
        start = start_from(spec, design, run.scaling)
    null_mu, refit_null = null_deviance(ctx, design, run, summary.ybar)
    null_b0 = null_start(ctx, summary) if refit_null else None
    hessian = None
    if start is None:
        start, null_b0, hessian = sample_start(ctx, design, run, summary, n_kept, null_b0)
    run.phase = "fit"
    penalty = pathfit.make_penalty(ctx, design, run, summary) if spec.penalised else None
    if penalty is not None and start is not None and spec.path is not None:
        start = np.where(penalty.penalised, 0.0, start)  # the path's first fit holds them at 0
        hessian = None  # the start moved: the sample's X'WX belongs to other coefficients
    track = NullTrack(null_b0, spec.tol) if null_b0 is not None else None
    state, null_dev = irls(
        ctx,
        design,
        run,
        summary.ybar,
        start=start,
        null_mu=null_mu,
        null_track=track,
        off_mean=summary.off_mean,
        covariance=covariance.carried_sums(spec),
        penalty=penalty,
        start_hessian=hessian,
    )
    records: list = []
    lam_max = None
    cv = None
    if penalty is not None and spec.path is not None:
        states, records, lam_max = pathfit.path(ctx, design, run, summary, penalty, state)
        state = states[-1]
        if counts is not None:
            lambdas = np.array([r["penalty"] for r in records])
            cv = crossval.cross_validate(
                ctx, design, run, summary, penalty, states, lambdas, counts
            )
            state = cv.state
        penalty = penalty.at(cv.chosen_penalty if cv is not None else records[-1]["penalty"])
    if track is not None and null_dev is None:
        # the fitted model settled first: finish the intercept-only model on its own
        run.phase = "null"
        null_state, _ = irls(
            ctx, intercept_only(design), run, summary.ybar, start=np.array([track.b0])
        )
        null_dev = null_state.sums.deviance
    if state.stalled:
        # The deviance has settled but the Newton step still moves coefficients by many
        # standard errors: an estimate on its way to infinity (the MLE is on the boundary).
        # A boundary warning, not a plain non-convergence one; strict mode still refuses it.
        msg = (
            f"IRLS stopped after {sum(r.phase == 'fit' for r in run.log)} iterations: "
            "step-halving cannot lower the "
            f"deviance ({run.scaling.unscale(state.sums.deviance):.6g}) any further while the "
            "next step still "
            "moves coefficients by many standard errors; the fit sits on the boundary "
            "(fitted means at the edge of the family's range, e.g. Poisson means at 0, "
            "probabilities at 0 or 1), so some estimates drift to infinity and their "
            "standard errors are unreliable (merge levels or drop the predictor that "
            "separates the data)"
        )
        if spec.strict:
            raise NonConvergenceError(msg)
        warnings.warn(msg, SeparationWarning, stacklevel=2)
        warn_msgs.append(msg)
    elif not state.converged:
        msg = (
            f"IRLS did not converge in {spec.max_iter} iterations (last relative deviance "
            f"change {run.log[-1].relative_change:.3g}, tolerance {spec.tol:g})"
        )
        if spec.strict:
            raise NonConvergenceError(msg)
        warnings.warn(msg, ConvergenceWarning, stacklevel=2)
        warn_msgs.append(msg)
    sandwich = covariance.sandwich_at(ctx, design, run, state, n_kept)
    if sandwich is not None and sandwich.bread_note:
        warnings.warn(sandwich.bread_note, ConvergenceWarning, stacklevel=2)
        warn_msgs.append(sandwich.bread_note)
    res = result(
        ctx,
        design,
        run,
        state,
        report_summary,
        n_total,
        n_kept,
        by_col,
        float(null_dev) if null_dev is not None else math.nan,
        warn_msgs,
        t_start,
        report_spec,
        sandwich,
    )
    if theta_est is not None:
        res = dataclasses.replace(
            res,
            converged=res.converged and theta_est.converged,
            family_param_errors={"theta": theta_est.std_error},
        )
    if penalty is not None:
        res = pathfit.penalised_result(res, penalty, records, lam_max)
        if cv is None:
            return res
        return dataclasses.replace(
            res, cv=tuple(cv.table), chosen_penalty=cv.chosen_penalty, chosen_rule=cv.rule
        )
    if spec.drop_one:
        res = batchfit.drop_one(ctx, design, run, state, res)
    return res
