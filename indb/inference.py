"""The result of a fit: estimates on the original scale and their Wald inference, the
dispersion, log-likelihood and information criteria, the aliasing and separation warnings,
and a description of the route the fit took."""

from __future__ import annotations

import dataclasses
import math
import time
import warnings

import numpy as np

from indb import solver
from indb import sqlexpr as S
from indb.design import Design, DesignColumn
from indb.errors import AliasingWarning, SeparationWarning
from indb.fitrun import FitRun
from indb.plan.irls_scan import EDGE, NEAR_EDGE, loglik_query
from indb.results import Coefficient, FitResult

SEPARATION_STD_SE = 100.0


def result(
    ctx,
    design,
    run,
    state,
    summary,
    n_total,
    n_kept,
    by_col,
    null_dev,
    warn_msgs,
    t_start,
    report_spec,
) -> FitResult:
    """The :class:`~indb.results.FitResult` of a converged (or stopped) IRLS ``state``:
    estimates back on the original scale, Wald inference with the dispersion, warnings
    about aliased columns and separation, log-likelihood, AIC and BIC, the fingerprint."""
    spec = report_spec
    fam = spec.family
    sol = state.solution
    sums = state.sums
    rank = int((~sol.aliased).sum())
    df_resid = summary.n_df - rank
    dispersion = solver.dispersion(sums.pearson, df_resid, fam.dispersion_fixed)
    t = solver.back_transform(design)
    beta_std = np.where(sol.aliased, 0.0, state.beta)
    est = t @ beta_std
    cov = dispersion * (t @ sol.inv_info @ t.T)
    inf = solver.wald(
        est, cov, sol.aliased, None if fam.dispersion_fixed else df_resid, spec.confidence
    )
    coefs = tuple(
        Coefficient(
            term=c.term,
            columns=tuple(c.source_columns),
            levels=tuple(_levels_for(design, c)),
            estimate=float(inf.estimate[j]),
            std_error=float(inf.std_error[j]),
            statistic=float(inf.statistic[j]),
            p_value=float(inf.p_value[j]),
            ci_low=float(inf.ci_low[j]),
            ci_high=float(inf.ci_high[j]),
            aliased=bool(sol.aliased[j]),
        )
        for j, c in enumerate(design.columns)
    )
    aliased_terms = tuple(c.term for c, a in zip(design.columns, sol.aliased, strict=True) if a)
    if aliased_terms:
        msg = (
            f"{len(aliased_terms)} design column(s) are linear combinations of earlier ones "
            f"and were set aside: {list(aliased_terms)[:10]}"
        )
        warnings.warn(msg, AliasingWarning, stacklevel=3)
        warn_msgs.append(msg)
    if fam.unit_mean:
        # counted by the last IRLS scan, at state.beta (plan.irls_scan.edge_counts)
        exact, near = int(round(sums.extras["edge"])), int(round(sums.extras["near"]))
        # standard errors on the standardized design: ordinary fits have them well below 1
        # per unit; a coefficient drifting to infinity under separation has them in the
        # hundreds or thousands (common practice: flag huge standard errors, not estimates)
        std_se = np.sqrt(np.clip(np.diag(sol.inv_info), 0.0, None))
        drifting = near > 0 and float(std_se.max(initial=0.0)) > SEPARATION_STD_SE
        if exact or drifting or (near and not state.converged):
            count = exact or near
            limit = EDGE if exact else NEAR_EDGE
            msg = (
                f"separation: {count} rows have fitted probabilities within {limit:.0e} of 0 "
                "or 1"
                + (" and some standard errors are huge" if drifting else "")
                + "; the data are (quasi-)separated or the fit sits on the boundary, so those "
                "estimates drift to infinity and their standard errors are unreliable (merge "
                "levels or drop the separating predictor)"
            )
            warnings.warn(msg, SeparationWarning, stacklevel=3)
            warn_msgs.append(msg)
    ll = _log_likelihood(ctx, design, run, state.beta, sums, summary, dispersion)
    # parameters counted by AIC/BIC: the coefficients, plus an estimated dispersion or theta
    k = rank + (0 if fam.dispersion_fixed else 1) + (1 if spec.estimate_theta else 0)
    aic = -2.0 * ll + 2.0 * k
    bic = -2.0 * ll + math.log(summary.n_df) * k if summary.n_df > 0 else math.nan
    return FitResult(
        family=fam.name,
        link=spec.link.describe(),
        response=spec.response,
        source=spec.source.label(),
        coefficients=coefs,
        covariance=inf.covariance,
        deviance=sums.deviance,
        null_deviance=null_dev,
        pearson_chi2=sums.pearson,
        dispersion=dispersion,
        dispersion_estimated=not fam.dispersion_fixed,
        log_likelihood=ll,
        aic=aic,
        bic=bic,
        df_model=rank - (1 if design.intercept else 0),
        df_resid=df_resid,
        n_used=n_kept,
        n_excluded=n_total - n_kept,
        n_weighted=summary.sum_f,
        iterations=sum(1 for r in run.log if r.phase == "fit"),
        converged=state.converged,
        iteration_log=tuple(run.log),
        test="z" if fam.dispersion_fixed else "t",
        path=_path_label(run, design, sums),
        seconds=time.perf_counter() - t_start,
        family_params=fam.params(),
        excluded_by_column=by_col,
        aliased_terms=aliased_terms,
        condition_number=solver.condition_number(sums.xtwx, sol.aliased),
        warnings=tuple(warn_msgs),
        confidence=spec.confidence,
        spec=spec.to_dict(),
        design=design.to_dict(),
        fingerprint={
            "rows": n_total,
            "rows_used": n_kept,
            "sum_weights": summary.sum_fpw,
            "sum_weighted_response": summary.sum_fpwy,
            "column_sums": summary.column_sums,
            "level_counts": {
                f.column: dict(zip(f.levels, f.counts, strict=True)) for f in design.factors
            },
        },
    )


def _levels_for(design: Design, c: DesignColumn) -> list[str | None]:
    by_col = {design.factors[i].column: lv for i, lv in zip(c.factors, c.levels, strict=True)}
    return [by_col.get(col) for col in c.source_columns]


def _path_label(run: FitRun, design: Design, sums: solver.Sums) -> str:
    scan = f"grouped scan ({sums.cells} cells)" if design.factors else "single-group scan"
    if isinstance(run.sample, tuple):
        rows, scans, secs = run.sample
        scan += f", started from a {rows:,}-row sample fit ({scans} scans, {secs:.2f} s)"
    elif isinstance(run.sample, str):
        scan += f", {run.sample}"
    if run.compressed is None:
        return scan
    rows, groups, secs = run.compressed
    return (
        f"compressed: {rows:,} rows folded to {groups:,} distinct design rows "
        f"({rows / max(groups, 1):.0f}x, {secs:.2f} s), then {scan}"
    )


def _log_likelihood(ctx, design, run, beta, sums, summary, dispersion) -> float:
    fam = ctx.spec.family
    phi = dispersion
    if fam.name == "gaussian":
        phi = sums.deviance / summary.n_df  # maximum-likelihood dispersion
    if not (math.isfinite(phi) and phi > 0):
        return math.nan
    if summary.ll_sums or not fam.saturated_sql(S.col("y"), S.col("pw"), None):
        # loglik = saturated loglik - D / (2 phi): from the profile sums, no extra scan
        ll = fam.log_likelihood(
            sums.deviance, phi, summary.ll_sums, summary.n_df, summary.constant_weight
        )
        if ll is not None:
            return float(ll)
    if run.original_ctx is not None:
        # folded rows carry no per-row terms such as ln Gamma(y + 1): sum over the source
        ctx = dataclasses.replace(
            run.original_ctx,
            spec=dataclasses.replace(run.original_ctx.spec, family=ctx.spec.family),
        )
    tree = loglik_query(ctx, design, beta, phi)
    if tree is None:
        return math.nan
    return float(run.one_row(tree)["ll"])
