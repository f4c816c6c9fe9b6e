"""Cross-validation's queries (indb.crossval): each row's fold, the rows and weights per
fold, and the conditions that restrict a scan to a fold's training or held-out rows.

A row's fold is ``((EXPR % K) + K) % K`` of the user's integer expression EXPR: ``%`` keeps
the sign of its left operand on DuckDB, PostgreSQL and Spark alike, so adding K once moves a
negative remainder into 0..K-1 and the folds read the same on every engine. A user can
write the same expression in SQL to see which rows a fold holds.
"""

from __future__ import annotations

from sqlglot import exp

from indb import sqlexpr as S
from indb.plan.context import PlanContext
from indb.sqlexpr import Expr

FOLD = "k"


def fold_key(ctx: PlanContext) -> Expr:
    """The row's fold, 0..K-1 (NULL when the fold expression is NULL)."""
    assert ctx.inputs.fold_by is not None and ctx.spec.folds is not None
    k = S.integer(ctx.spec.folds)
    return S.mod_(S.add(S.mod_(ctx.inputs.fold_by.copy(), k), k.copy()), k.copy())


def fold_type_query(ctx: PlanContext) -> exp.Select:
    """The fold expression over the source, for describing its type (never run)."""
    assert ctx.inputs.fold_by is not None
    return S.select([S.alias(ctx.inputs.fold_by.copy(), FOLD)], ctx.source())


def fold_counts_query(ctx: PlanContext) -> exp.Select:
    """Per fold (NULL: the expression was NULL) of the kept rows: rows, frequency-weighted
    rows and the weight total sum(f pw), as the scans see them (internal scaling)."""
    key = fold_key(ctx)
    f = ctx.freq_weight() or S.num(1.0)
    cols = [
        S.alias(key, FOLD),
        S.alias(S.count_star(), "n"),
        S.alias(S.psum(f), "nw"),
        S.alias(S.psum(S.mul(f.copy(), ctx.prior_weight())), "w"),
    ]
    return S.select(cols, ctx.source(), where=ctx.kept(), group_by=[fold_key(ctx)])


def training_rows(ctx: PlanContext, fold: int) -> Expr:
    """The condition of the rows outside ``fold`` (its model's training rows)."""
    return S.ne(fold_key(ctx), S.integer(fold))


def held_out_rows(ctx: PlanContext, fold: int) -> Expr:
    """The condition of the rows inside ``fold``."""
    return S.eq(fold_key(ctx), S.integer(fold))
