"""The sample start's query: a reproducible sample of the kept rows."""

from __future__ import annotations

from sqlglot import exp

from indb import sqlexpr as S
from indb.plan.context import PlanContext

SAMPLE_HASHED = 4  # columns the sample start's hash reads


def sample_rows_query(ctx: PlanContext, fraction: float) -> exp.Select:
    """About ``fraction`` of the kept rows, every model column as it is in the source: the
    table the sample start fits on. Rows are picked by a hash (:func:`indb.sqlexpr.row_pick`)
    of a few of their model columns, numeric ones first (the most distinct values; engines
    then decode the other columns only for the picked rows), so a rerun on the same data
    picks the same rows. Rows alike in those columns are picked together: the sample is
    clustered, which costs a start nothing."""
    cols = [S.col(c) for c in ctx.inputs.model_columns]
    inputs = ctx.inputs
    order = [*inputs.numerics, *(c for c in inputs.model_columns if c not in inputs.factors)]
    order += list(inputs.factors)
    hashed = list(dict.fromkeys(c for c in order if c in inputs.model_columns))[:SAMPLE_HASHED]
    pick = S.row_pick([S.col(c) for c in hashed], fraction)
    return S.select([c.copy() for c in cols], ctx.source(), where=S.and_(ctx.kept(), pick))
