"""The result of a fit: estimates on the original scale and their Wald inference, the
dispersion, log-likelihood and information criteria, the aliasing, separation, residual
degrees of freedom and magnitude warnings, and a description of the route the fit took."""

from __future__ import annotations

import dataclasses
import math
import sys
import time
import warnings

import numpy as np
from scipy import sparse

from indb import solver, termtests
from indb import sqlexpr as S
from indb.colpairs import PairColumn, compatible_pairs
from indb.design import Design, DesignColumn, Inputs, Scaling
from indb.errors import AliasingWarning, PrecisionWarning, ResidualDfWarning, SeparationWarning
from indb.fitrun import FitRun
from indb.plan.context import PlanContext
from indb.plan.irls_scan import EDGE, NEAR_EDGE, loglik_query
from indb.prefit import Summary
from indb.results import COVARIANCE_MAX_TERMS, Coefficient, FitResult, InverseEntries
from indb.sandwich import Sandwich

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
    sandwich: Sandwich | None = None,
) -> FitResult:
    """The :class:`~indb.results.FitResult` of a converged (or stopped) IRLS ``state``:
    estimates back on the original scale, Wald inference with the dispersion (or the
    ``sandwich`` covariance of the spec's kind), warnings about aliased columns,
    separation, residual degrees of freedom and magnitudes, log-likelihood, AIC and BIC,
    the fingerprint."""
    spec = report_spec
    fam = spec.family
    sol = state.solution
    sums = state.sums  # on the scale of the internally rescaled fit (run.scaling)
    sc = run.scaling
    rank = int((~sol.aliased).sum())
    residual_df = summary.n_df - rank
    if residual_df <= 0:
        msg = _residual_df_message(ctx, summary, rank, residual_df)
        warnings.warn(msg, ResidualDfWarning, stacklevel=3)
        warn_msgs.append(msg)
    # the dispersion of the rescaled fit (a fixed dispersion 1 becomes the rescaling's
    # power of two there), and the covariance of its coefficients, coef_factor times the
    # source's: both stay finite where the source's overflow (a response near 1e200)
    phi = solver.dispersion(sums.pearson, residual_df, fam.dispersion_fixed)
    phi_fit = sc.rescale(phi) if fam.dispersion_fixed else phi
    dispersion = 1.0 if fam.dispersion_fixed else sc.unscale(phi_fit)
    beta_std = sc.to_original(np.where(sol.aliased, 0.0, state.beta), design.intercept)
    clusters = sandwich.clusters if sandwich is not None else None
    inf = _inference(
        design,
        sol,
        beta_std,
        sc.coef_factor,
        phi_fit,
        None if fam.dispersion_fixed else wald_df(residual_df, clusters),
        spec.confidence,
        None if sandwich is None else sandwich.covariance,
    )
    coefs = tuple(
        Coefficient(
            term=c.term,
            columns=tuple(c.source_columns),
            levels=tuple(_levels_for(design, c)),
            estimate=float(inf.estimate[j]),
            std_error=float(inf.std_error[j]),
            wald=float(inf.wald[j]),
            p_two_sided=float(inf.p_two_sided[j]),
            lower_bound=float(inf.lower_bound[j]),
            upper_bound=float(inf.upper_bound[j]),
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
        ff = sc.freq_factor
        exact = int(round(sums.extras["edge"] / ff))
        near = int(round(sums.extras["near"] / ff))
        # standard errors on the standardized design: ordinary fits have them well below 1
        # per unit; a coefficient drifting to infinity under separation has them in the
        # hundreds or thousands (common practice: flag huge standard errors, not estimates)
        std_se = np.sqrt(np.clip(sol.inv_info.diagonal() * phi_fit, 0.0, None))
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
    deviance = sc.unscale(sums.deviance)
    # beyond the doubles, or below the normal ones (a subnormal keeps few digits)
    lost = not math.isfinite(deviance) or (deviance < sys.float_info.min < sums.deviance)
    if math.isfinite(sums.deviance) and lost:
        big = not math.isfinite(deviance)
        msg = (
            f"response column {spec.response!r} is so {'large' if big else 'small'} that "
            f"the deviance ({sums.deviance:.6g} x 2^{-sc.log2_deviance_factor:g}), Pearson's "
            f"chi-squared and the dispersion {'exceed' if big else 'fall below'} the range "
            f"of doubles and are reported as {'infinite' if big else '0'}; the fit ran on "
            "the response divided by a power of two, so estimates, standard errors, tests "
            "and the log-likelihood are exact (rescale the response by a round number in "
            "the source query to see the deviance)"
        )
        warnings.warn(msg, PrecisionWarning, stacklevel=3)
        warn_msgs.append(msg)
    ll = _log_likelihood(ctx, design, run, beta_std, sums.deviance, summary, phi_fit)
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
        term_tests=termtests.term_tests(coefs, inf.covariance),
        collinearity=termtests.collinearity(coefs, inf.covariance),
        deviance=deviance,
        null_deviance=sc.unscale(null_dev),
        pearson_chi2=sc.unscale(sums.pearson),
        dispersion=dispersion,
        dispersion_estimated=not fam.dispersion_fixed,
        log_likelihood=ll,
        aic=aic,
        bic=bic,
        model_df=rank - (1 if design.intercept else 0),
        residual_df=residual_df,
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
        condition_number=solver.condition_number(sums.xtwx, sol),
        warnings=tuple(warn_msgs),
        confidence=spec.confidence,
        covariance_kind=spec.covariance,
        clusters=clusters,
        # the dialect and column types the user's expressions (offset, weights) were
        # written against: scoring SQL for another engine reads them in that dialect
        # (indb.portable)
        spec={**spec.to_dict(), "sql_dialect": ctx.dialect.name},
        design={
            **design.to_dict(),
            "column_types": _column_types((run.original_ctx or ctx).inputs),
        },
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
        inverse_entries=inverse_entries(design, sol, sc),
    )


def inverse_entries(design: Design, sol: solver.Solution, sc: Scaling) -> InverseEntries | None:
    """(X'WX)^-1 of the source's problem on the standardized design, at the column pairs
    one row can use together (None beyond ``colpairs.MAX_PAIRS`` of them).

    The rescaled fit's information is the source's times coef_factor^2 / d
    (:class:`~indb.design.Scaling`), so its inverse is the source's times d / coef_factor^2."""
    columns = [
        PairColumn(tuple(design.factors[i].column for i in c.factors), c.levels, c.value)
        for c in design.columns
    ]
    pairs = compatible_pairs(columns)
    if pairs is None:
        return None
    rows, cols = pairs
    # in powers of two: d and coef_factor^2 can each be far outside the doubles (a response
    # near 1e200) where their ratio is 1
    e = sc.log2_deviance_factor - 2.0 * math.log2(sc.coef_factor)
    with np.errstate(over="ignore", under="ignore"):
        factor = float(np.ldexp(1.0, round(e)) * 2.0 ** (e - round(e)))
        values = sol.inv_info.entries(rows, cols) * factor
    return InverseEntries(rows, cols, values)


def _inference(
    design: Design,
    sol: solver.Solution,
    beta_std: np.ndarray,
    coef_factor: float,
    phi_fit: float,
    df: float | None,
    confidence: float,
    sandwich: np.ndarray | None = None,
) -> solver.Inference:
    """Wald inference on the source's scale, computed in units where nothing overflows.

    The covariance of the rescaled fit's standardized coefficients is ``phi_fit`` times
    its inverse information; mapping it to the source's coefficients multiplies row and
    column j by u_j / ``coef_factor``, where u_j = 1 / scale_j can be 1e-160 for a value
    near 1e160 (its variance, ~1e-325, underflows where its standard error does not). So
    the statistics are taken on coefficients divided by u_j' (the power of two nearest
    u_j / ``coef_factor``), exactly, and estimates, standard errors and limits multiplied
    back; only the covariance matrix itself over- or underflows where it must.

    ``sandwich``, when given, is the covariance of the rescaled fit's standardized
    coefficients (:mod:`indb.sandwich`) in place of ``phi_fit`` times the inverse
    information."""
    t = solver.back_transform(design)
    est = t @ beta_std
    units = np.array([_nearest_power_of_two(abs(d) / coef_factor) for d in t.diagonal()])
    # t_u maps the rescaled fit's coefficients to est / units: t / coef_factor, row-scaled
    t_u = sparse.csr_array(sparse.diags_array(1.0 / (units * coef_factor)) @ t)
    # the whole covariance only while it is small; standard errors need its diagonal only
    if sandwich is None:
        var_u, cov_u = solver.original_scale(
            sol.inv_info, t_u, phi_fit, full=design.p <= COVARIANCE_MAX_TERMS
        )
    else:
        var_u, cov_u = solver.mapped_covariance(sandwich, t_u)
    inf = solver.wald(est / units, var_u, sol.aliased, df, confidence, cov_u)
    if np.all(units == 1.0):
        return inf
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        return dataclasses.replace(
            inf,
            estimate=np.where(sol.aliased, np.nan, est),
            std_error=inf.std_error * units,
            lower_bound=inf.lower_bound * units,
            upper_bound=inf.upper_bound * units,
            covariance=None
            if inf.covariance is None
            else inf.covariance * units[:, None] * units[None, :],
        )


def wald_df(residual_df: float, clusters: int | None) -> float:
    """Degrees of freedom of a t-referred Wald statistic: the residual df, or with
    cluster-robust errors the clusters less one (statsmodels' ``df_correction``, on by
    default for ``cov_type="cluster"``; common practice)."""
    return residual_df if clusters is None else clusters - 1.0


def _nearest_power_of_two(x: float) -> float:
    if not (math.isfinite(x) and x > 0):
        return 1.0
    return math.ldexp(1.0, round(math.log2(x)))


def _residual_df_message(ctx: PlanContext, summary: Summary, rank: int, df: float) -> str:
    fam = ctx.spec.family
    msg = (
        f"the residual degrees of freedom are {df:g}: {summary.n_df:g} rows with a positive "
        f"weight minus {rank} estimated coefficients"
    )
    if ctx.inputs.frequency_weight is not None:
        msg += (
            f" (frequency weights count rows: theirs sum to {summary.sum_f:g} over "
            f"{summary.n} rows; weights that are not counts belong in weight=, CLI --weight, "
            "as prior weights)"
        )
    if fam.dispersion_fixed:
        return msg + "; nothing is left to judge the fit by (deviance-based tests are void)"
    return (
        msg + "; the dispersion cannot be estimated, so standard errors, t statistics, "
        "p-values and intervals are NaN"
    )


def _column_types(inputs: Inputs) -> dict[str, str]:
    """Type names of the source columns the model reads (its predictors and the columns of
    its expressions), as the engine describes them."""
    used = set(inputs.model_columns)
    return {name: kind for name, kind in inputs.columns if name in used}


def _levels_for(design: Design, c: DesignColumn) -> list[str | None]:
    by_col = {design.factors[i].column: lv for i, lv in zip(c.factors, c.levels, strict=True)}
    return [by_col.get(col) for col in c.source_columns]


def _path_label(run: FitRun, design: Design, sums: solver.Sums) -> str:
    scan = f"grouped scan ({sums.cells} cells)" if design.factors else "single-group scan"
    if isinstance(run.sample, tuple):
        rows, scans, secs = run.sample
        scan += f", started from a {rows:,}-row sample fit ({scans} scans, {secs:.2f} s)"
        if run.chord_start:
            scan += "; the first scan summed the gradient only, with the sample's X'WX"
    elif isinstance(run.sample, str):
        scan += f", {run.sample}"
    if run.compressed is None:
        return scan
    rows, groups, secs = run.compressed
    return (
        f"compressed: {rows:,} rows folded to {groups:,} distinct design rows "
        f"({rows / max(groups, 1):.0f}x, {secs:.2f} s), then {scan}"
    )


#: families whose log-likelihood depends on the dispersion only through D / phi and
#: n ln(phi): rescaling D and phi by one factor d moves it by -n ln(d) / 2 exactly
_LOG_PHI_FAMILIES = ("gaussian", "inverse_gaussian")


def _log_likelihood(ctx, design, run, beta, deviance_fit, summary, phi_fit) -> float:
    """The log-likelihood at the fitted means, on the source's scale.

    ``beta`` are the standardized coefficients of the source's problem; ``deviance_fit``
    and ``phi_fit`` the deviance and dispersion of the internally rescaled fit
    (:class:`indb.design.Scaling`). Where the source's deviance exceeds the largest double
    (a gaussian response near 1e200) the families of ``_LOG_PHI_FAMILIES`` still give it
    exactly from the rescaled numbers."""
    fam = ctx.spec.family
    sc = run.scaling
    dev = sc.unscale(deviance_fit)
    phi = 1.0 if fam.dispersion_fixed else sc.unscale(phi_fit)
    if fam.name == "gaussian":
        phi = dev / summary.n_df  # maximum-likelihood dispersion
        phi_fit = deviance_fit / summary.n_df
    if not (math.isfinite(phi) and phi > 0 and math.isfinite(dev)):
        rescaled = math.isfinite(phi_fit) and phi_fit > 0 and math.isfinite(deviance_fit)
        if fam.name in _LOG_PHI_FAMILIES and summary.ll_sums and rescaled:
            ll = fam.log_likelihood(
                deviance_fit, phi_fit, summary.ll_sums, summary.n_df, summary.constant_weight
            )
            if ll is not None:
                return float(ll) + 0.5 * summary.n_df * sc.log2_deviance_factor * math.log(2.0)
        return math.nan
    if summary.ll_sums or not fam.saturated_sql(S.col("y"), S.col("pw"), None):
        # loglik = saturated loglik - D / (2 phi): from the profile sums, no extra scan
        ll = fam.log_likelihood(dev, phi, summary.ll_sums, summary.n_df, summary.constant_weight)
        if ll is not None:
            return float(ll)
    # a pass over the rows as the source has them (no internal rescaling)
    source_ctx = run.original_ctx if run.original_ctx is not None else ctx
    ctx = dataclasses.replace(
        source_ctx,
        spec=dataclasses.replace(source_ctx.spec, family=ctx.spec.family),
        scaling=Scaling(),
    )
    tree = loglik_query(ctx, design, beta, phi)
    if tree is None:
        return math.nan
    return float(run.one_row(tree)["ll"])
