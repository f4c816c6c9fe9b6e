"""k-fold cross-validation of a lambda path: folds, each fold's path, the fold table, the
chosen lambda.

A row's fold is ``((EXPR % K) + K) % K`` of the integer expression ``fold_by``
(:mod:`indb.plan.cv_scan`). Every fold's model is fitted exactly, on the kept rows outside
the fold, along the full path's lambdas (lambda_max from all rows, common practice), each
lambda warm-started from the one before (:func:`indb.pathfit.walk`); the penalty's weight
total W is the training rows' own. The model's columns keep the design, centring and (with
``standardize``) the penalised scale of all rows, so the fold's objective is the full
objective on its training rows.

The out-of-fold deviance of fold k at lambda j is the family's deviance, summed over the
fold's rows (frequency x prior weights), at fold k's coefficients for lambda j, divided by
the fold's weight total sum(f pw): a mean deviance per unit weight, comparable between folds
of unequal size. Its mean over the K folds is their plain average and its standard error
sd / sqrt(K) (sd with K - 1 degrees of freedom). The rule ``min`` chooses the lambda with the
least mean; ``one_se`` the largest lambda whose mean is within one standard error of that
least mean (common practice).

A gaussian identity-link model takes :func:`quadratic_fold_fits` instead: one scan of each
fold's rows gives its X'WX and X'Wz, which hold at every coefficient; training sums are the
total less the fold's, every lambda's fit is solved from them exactly, and the held-out
deviances follow from the fold's sums (K scans in all).

Scans (:func:`fold_fits` is the one boundary to swap for a batch scan of many models): one
describe and one grouped count of the folds before the fit; per fold, its path's IRLS scans
on the training rows (a WHERE on the fold key), then one scan of the fold's rows for the
held-out deviances at every lambda (a batch scan, one model per lambda); then one scan
(usually) to refit all rows at the chosen lambda, warm-started from the path's state there.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse

from indb import solver
from indb.batchfit import split_by_model
from indb.design import Design
from indb.errors import SpecError
from indb.fitrun import FitRun
from indb.irls import IrlsState, irls
from indb.pathfit import quadratic_deviance, quadratic_exact, refit, walk
from indb.penalty import Penalty
from indb.plan.batch_scan import batch_query
from indb.plan.context import PlanContext
from indb.plan.cv_scan import (
    FOLD,
    fold_counts_query,
    fold_type_query,
    held_out_rows,
    training_rows,
)
from indb.prefit import Summary
from indb.sqlexpr import Expr


@dataclass(frozen=True)
class FoldCounts:
    """Kept rows per fold as the scans count them: rows, frequency-weighted rows and the
    weight total sum(f pw), all on the fit's internal scale."""

    n: np.ndarray
    nw: np.ndarray
    w: np.ndarray


@dataclass(frozen=True)
class FoldFits:
    """Per fold (rows) and lambda (columns): the out-of-fold deviance per unit weight, and
    the fold models' internal coefficients (folds x lambdas x p)."""

    deviance: np.ndarray
    beta: np.ndarray


def count_folds(ctx: PlanContext, run: FitRun) -> FoldCounts:
    """Check the fold expression (an integer type, never NULL on a kept row, no fold
    empty) and count each fold's rows: one describe and one grouped scan."""
    spec = ctx.spec
    k = int(spec.folds or 0)
    text = spec.fold_by
    ((_, type_name),) = run.engine.describe(ctx.dialect.render(fold_type_query(ctx)))
    if not ctx.dialect.is_integer_type(type_name):
        raise SpecError(
            f"fold_by expression {text!r} has type {type_name}; a row's fold is "
            f"((EXPR % {k}) + {k}) % {k} of a whole number: give an integer expression, e.g. "
            "a row id or a hash of your choice cast to BIGINT"
        )
    cols = run.query(fold_counts_query(ctx))
    keys = [None if _missing(v) else int(v) for v in cols[FOLD]]
    n = {key: int(c) for key, c in zip(keys, cols["n"], strict=True)}
    if None in n:
        raise SpecError(
            f"fold_by expression {text!r} is NULL on {n[None]:,} kept rows; every row needs a "
            "fold: make the expression whole (e.g. coalesce(EXPR, 0)) or leave those rows "
            "out of the source"
        )
    empty = [f for f in range(k) if f not in n]
    if empty:
        raise SpecError(
            f"fold {empty[0]} of {k} is empty: no kept row has ((fold_by % {k}) + {k}) % {k} "
            f"= {empty[0]} for fold_by {text!r}; give fewer folds or an expression spread "
            "over more values"
        )
    order = np.argsort(np.array(keys, dtype=float))
    return FoldCounts(
        n=np.asarray(cols["n"], float)[order],
        nw=np.asarray(cols["nw"], float)[order],
        w=np.asarray(cols["w"], float)[order],
    )


def _missing(v: object) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def fold_fits(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    summary: Summary,
    penalty: Penalty,
    lambdas: np.ndarray,
    counts: FoldCounts,
    start: np.ndarray,
) -> FoldFits:
    """Fit every fold's path on its training rows and score it on the fold's rows.

    ``penalty`` is the full fit's (its weight total is rescaled to each fold's training
    rows); ``start`` the full path's first coefficients. Leaves ``run.expected`` as it was.
    """
    k, n_lam = len(counts.n), len(lambdas)
    dev = np.empty((k, n_lam))
    beta = np.empty((k, n_lam, design.p))
    expected, phase = run.expected, run.phase
    source_w = _source_weights(counts, run)
    try:
        for f in range(k):
            run.phase = "cv"
            train = _restricted(ctx, training_rows(ctx, f))
            run.expected = (
                int(counts.n.sum() - counts.n[f]),
                float(counts.nw.sum() - counts.nw[f]),
            )
            pen = _training_penalty(penalty, counts, f)
            first, _ = irls(
                train,
                design,
                run,
                summary.ybar,
                start=start,
                off_mean=summary.off_mean,
                penalty=pen.at(float(lambdas[0])),
            )
            states = walk(train, design, run, summary, pen, first, lambdas)
            run.phase = "cv_score"
            held = _restricted(ctx, held_out_rows(ctx, f))
            run.expected = (int(counts.n[f]), float(counts.nw[f]))
            beta[f] = [state.beta for state in states]
            dev[f] = held_out_deviances(held, design, run, states) / source_w[f]
    finally:
        run.expected, run.phase = expected, phase
    return FoldFits(deviance=dev, beta=beta)


def _source_weights(counts: FoldCounts, run: FitRun) -> np.ndarray:
    """Each fold's sum of f pw on the source's scale (the held-out deviance per unit
    weight divides by it)."""
    return counts.w / (run.scaling.weight_factor * run.scaling.freq_factor)


def _training_penalty(penalty: Penalty, counts: FoldCounts, fold: int) -> Penalty:
    """The full fit's penalty with its weight total scaled to ``fold``'s training rows."""
    share = (counts.w.sum() - counts.w[fold]) / counts.w.sum()
    return dataclasses.replace(penalty, total=penalty.total * share)


def _restricted(ctx: PlanContext, rows: Expr) -> PlanContext:
    return dataclasses.replace(ctx, row_filter=rows)


def held_out_deviances(
    held: PlanContext, design: Design, run: FitRun, states: Sequence[IrlsState]
) -> np.ndarray:
    """The deviance (source scale) of ``held``'s rows at each state's coefficients, all in
    one read of the rows (:func:`indb.plan.batch_scan.batch_query`, one model per state)."""
    # a coefficient the training rows left aliased: 0
    sums = batch_sums(held, design, run, [np.nan_to_num(s.beta) for s in states])
    return np.array([run.scaling.unscale(s.deviance) for s in sums])


def batch_sums(
    rows: PlanContext, design: Design, run: FitRun, betas: Sequence[np.ndarray]
) -> list[solver.Sums]:
    """The IRLS sums of ``rows`` at each of ``betas``, in one read (one logged scan)."""
    t0 = time.perf_counter()
    models = dict(enumerate(betas))
    parts = split_by_model(run.query(batch_query(rows, design, models)), models)
    out = []
    for j in models:
        sums = solver.assemble(design, parts[j])
        run.check_rows(sums)
        out.append(sums)
    run.record(math.nan, math.nan, 0, time.perf_counter() - t0)
    return out


# -- gaussian, identity link: the sums at one set of coefficients give them at any -----------


def quadratic_fold_fits(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    penalty: Penalty,
    lambdas: np.ndarray,
    counts: FoldCounts,
    start: np.ndarray,
) -> FoldFits:
    """:func:`fold_fits` for a gaussian identity-link model: one scan of each fold's rows
    (at ``start``) gives the fold's X'WX and X'Wz; a fold model's training sums are the
    total less the fold's, and every lambda's penalised fit is the penalised least-squares
    solution of those sums (:meth:`indb.penalty.Penalty.step`, exact: no IRLS iteration is
    left), its held-out deviance :func:`quadratic_deviance` of the fold's own sums. K scans
    in all, where IRLS on each fold's training rows reads the table about twice per lambda.
    """
    k, n_lam = len(counts.n), len(lambdas)
    dev = np.empty((k, n_lam))
    beta = np.empty((k, n_lam, design.p))
    expected, phase = run.expected, run.phase
    source_w = _source_weights(counts, run)
    start = np.nan_to_num(start)
    try:
        run.phase = "cv_score"
        folds = []
        for f in range(k):
            run.expected = (int(counts.n[f]), float(counts.nw[f]))
            held = _restricted(ctx, held_out_rows(ctx, f))
            folds.append(batch_sums(held, design, run, [start])[0])
    finally:
        run.expected, run.phase = expected, phase
    total_xtwx = sum((sparse.csr_array(s.xtwx) for s in folds[1:]), sparse.csr_array(folds[0].xtwx))
    total_xtwz = np.sum([s.xtwz for s in folds], axis=0)
    for f, own in enumerate(folds):
        pen = _training_penalty(penalty, counts, f)
        xtwx, xtwz = total_xtwx - sparse.csr_array(own.xtwx), total_xtwz - own.xtwz
        b = start
        for j, lam in enumerate(lambdas):
            b = pen.at(float(lam)).step(xtwx, xtwz, b).beta
            beta[f, j] = b
            dev[f, j] = run.scaling.unscale(quadratic_deviance(own, start, b)) / source_w[f]
    return FoldFits(deviance=dev, beta=beta)


@dataclass(frozen=True)
class CrossValidation:
    """The fold table, the rule and the chosen lambda, and the refit at it on all rows."""

    table: list[dict[str, Any]]
    rule: str
    chosen: int
    state: IrlsState

    @property
    def chosen_penalty(self) -> float:
        return float(self.table[self.chosen]["penalty"])


def cross_validate(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    summary: Summary,
    penalty: Penalty,
    states: list[IrlsState],
    lambdas: np.ndarray,
    counts: FoldCounts,
) -> CrossValidation:
    """Cross-validate the path (``states`` at ``lambdas``, on all rows), choose lambda by
    the spec's rule and refit all rows there, warm-started from the path's state."""
    if quadratic_exact(ctx):
        fits = quadratic_fold_fits(ctx, design, run, penalty, lambdas, counts, states[0].beta)
    else:
        fits = fold_fits(ctx, design, run, summary, penalty, lambdas, counts, states[0].beta)
    table = cv_table(lambdas, fits)
    rule = ctx.spec.cv_rule
    j = choose(table, rule)
    run.phase = "fit"
    state = refit(ctx, design, run, summary, penalty.at(float(lambdas[j])), states[j])
    return CrossValidation(table=table, rule=rule, chosen=j, state=state)


def cv_table(lambdas: np.ndarray, fits: FoldFits) -> list[dict[str, Any]]:
    """One row per lambda: the mean out-of-fold deviance, its standard error, per fold."""
    dev = fits.deviance
    k = dev.shape[0]
    mean = dev.mean(axis=0)
    se = dev.std(axis=0, ddof=1) / math.sqrt(k)
    return [
        {
            "penalty": float(lam),
            "mean_deviance": float(mean[j]),
            "se": float(se[j]),
            "per_fold": [float(v) for v in dev[:, j]],
        }
        for j, lam in enumerate(lambdas)
    ]


def choose(table: list[dict[str, Any]], rule: str) -> int:
    """The index of the chosen lambda (rows ordered from the largest lambda): ``min`` the
    least mean deviance, ``one_se`` the largest lambda within one standard error of it."""
    mean = np.array([r["mean_deviance"] for r in table])
    best = int(np.argmin(mean))
    if rule == "min":
        return best
    limit = mean[best] + table[best]["se"]
    return int(np.flatnonzero(mean <= limit)[0])


__all__ = [
    "CrossValidation",
    "FoldCounts",
    "FoldFits",
    "choose",
    "count_folds",
    "cross_validate",
    "cv_table",
    "fold_fits",
    "held_out_deviances",
]
