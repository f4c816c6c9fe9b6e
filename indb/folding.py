"""The compressed route: whether to fold the source by design row, the fold (the profile
rides in the same scan), and the fit's context on the folded rows."""

from __future__ import annotations

import dataclasses
import time
import uuid

from indb import sqlexpr as S
from indb.errors import UnsupportedError
from indb.fitrun import FitRun, fetched_count
from indb.plan.context import FOLD_F, FOLD_PW, FOLD_Y, ROWCOUNT, PlanContext
from indb.plan.fold import (
    FOLD_BAD,
    FOLD_NK_NULL,
    detail_items,
    fold_query,
    folded_profile_query,
    folded_rows_query,
    folds_offset,
    key_columns,
    sample_distinct_query,
)
from indb.plan.profile import ProfileItem, profile_query
from indb.spec import Source

AUTO_COMPRESS_MIN_ROWS = 50_000
COMPRESS_RATIO = 10  # compress when the sample shows >= 10 rows per distinct design row


def should_fold(ctx: PlanContext, run: FitRun) -> bool:
    """Whether to take the compressed route (``compress`` option; ``auto`` decides from the
    distinct design rows among the first kept rows). Never when the negative binomial theta
    is estimated (its deviance constants move with theta), the rows are cross-validated
    (a group would mix folds) or the engine cannot hold a
    temporary table (unless ``always``, which then raises)."""
    spec = ctx.spec
    if spec.compress == "never" or spec.estimate_theta:
        return False
    if spec.folds is not None:  # the groups would lose each row's fold
        return False
    if not ctx.dialect.can_materialize:
        if spec.compress == "always":
            raise UnsupportedError(
                f"engine {ctx.dialect.name!r} cannot hold the folded table; use compress='auto'"
            )
        return False
    if spec.compress == "always":
        return True
    row = run.one_row(sample_distinct_query(ctx))
    d, s = fetched_count(row["d"]), fetched_count(row["s"])
    # the sample holds every kept row when it is smaller than SAMPLE_ROWS
    return s >= AUTO_COMPRESS_MIN_ROWS and d * COMPRESS_RATIO <= s


def fold(ctx: PlanContext, run: FitRun, items: list[ProfileItem]) -> tuple[dict[str, object], str]:
    """The compressed route's one scan of the source: group it by design-row keys (with the
    profile's partial aggregates), then profile the groups. Returns the profile row and the
    name of the temporary table of groups."""
    t0 = time.perf_counter()
    groups = f"indb_fold_{uuid.uuid4().hex[:12]}"
    stmts = ctx.dialect.materialize(groups, fold_query(ctx, items))
    run.temp_tables.append(groups)
    for stmt in stmts:
        run.engine.execute(stmt)
    row = run.one_row(folded_profile_query(ctx, items, ctx.dialect.table(groups)))
    bad = fetched_count(row.pop(FOLD_BAD))
    row.pop(FOLD_NK_NULL)
    if bad:
        # a domain error to explain: one more, ungrouped scan counts it by check
        row.update(run.one_row(profile_query(ctx, detail_items(ctx, items))))
    run.fold_seconds = time.perf_counter() - t0
    return row, groups


def folded_context(ctx: PlanContext, run: FitRun, groups: str, n_kept: int) -> PlanContext:
    """The fit's context on the folded rows (:func:`indb.plan.fold.folded_rows_query`): summed
    weights, the weighted mean response and the constants that keep deviance and Pearson
    chi-squared exact; a log-link offset folded into response and weight. The
    log-likelihood still comes from the profile's sums over the original rows."""
    t0 = time.perf_counter()
    spec = ctx.spec
    name = f"indb_rows_{uuid.uuid4().hex[:12]}"
    stmts = ctx.dialect.materialize(name, folded_rows_query(ctx, ctx.dialect.table(groups)))
    run.temp_tables.append(name)
    t_fold = time.perf_counter()
    for stmt in stmts:
        run.engine.execute(stmt)
    run.prepared(time.perf_counter() - t_fold)
    table = ctx.dialect.table(name)
    sums = run.one_row(
        S.select(
            [
                S.alias(S.count_star(), "n"),
                S.alias(S.sum_(S.mul(S.col(FOLD_F), S.col(FOLD_PW), S.col(FOLD_Y))), "sy"),
                S.alias(S.sum_(S.mul(S.col(FOLD_F), S.col(FOLD_PW))), "sw"),
            ],
            table,
        )
    )
    n_groups = int(sums["n"])
    sw = float(sums["sw"] or 0.0)
    run.fit_ybar = float(sums["sy"]) / sw if sw > 0 else None
    folded_offset = folds_offset(ctx)
    keys = key_columns(ctx)
    inputs = dataclasses.replace(
        ctx.inputs,
        response=FOLD_Y,
        response_kind="numeric",
        offset=None if folded_offset else ctx.inputs.offset,
        weight=S.col(FOLD_PW),
        frequency_weight=S.col(FOLD_F),
        trials=None,
        model_columns=(*keys, FOLD_Y, FOLD_PW, FOLD_F),
    )
    new_spec = dataclasses.replace(
        spec,
        source=Source("table", name),
        response=FOLD_Y,
        offset=None if folded_offset else spec.offset,
        weight=None,
        frequency_weight=None,
        trials=None,
    )
    run.original_ctx = ctx
    run.compressed = (n_kept, n_groups, run.fold_seconds + time.perf_counter() - t0)
    return PlanContext(
        new_spec,
        inputs,
        ctx.dialect,
        row_count=ROWCOUNT,
        folded=True,
        scaling=ctx.scaling.for_folded_rows(),
    )
