"""The compressed route's queries: whether to fold, the fold of the source by design row
with the profile's partial aggregates, the profile combined from the groups, and the folded
rows the fit then runs on."""

from __future__ import annotations

from collections.abc import Sequence

from sqlglot import exp

from indb import sqlexpr as S
from indb.plan.context import (
    FOLD_DCONST,
    FOLD_F,
    FOLD_PW,
    FOLD_Q,
    FOLD_R2A,
    FOLD_R2Q,
    FOLD_R2Y,
    FOLD_Y,
    KEPT,
    ROWCOUNT,
    PlanContext,
    reserved,
)
from indb.plan.profile import AGGREGATES, ProfileItem, domain_checks, row_atoms
from indb.sqlexpr import Expr

SAMPLE_ROWS = 100_000
SAMPLE_COUNT = reserved("c")


def folds_offset(ctx: PlanContext) -> bool:
    """With a log link and V(mu) = mu^p, an offset folds into the response and weight:
    d(y, e mu) = e^(2-p) d(y/e, mu) (and the same for the score and information), so rows
    with different offsets but one design row can be merged."""
    return (
        ctx.inputs.offset is not None
        and ctx.spec.link.name == "log"
        and ctx.spec.family.variance_power is not None
    )


def key_columns(ctx: PlanContext) -> list[str]:
    """Columns that define a distinct design row: the predictors, plus the offset's
    columns when the offset cannot be folded into the weights, plus the cluster's columns
    (covariance 'cluster'): rows of one design row are merged only within a cluster, so
    the sum of a cluster's scores is a sum over its folded rows."""
    inputs = ctx.inputs
    out = [*inputs.factors, *inputs.numerics]
    if inputs.offset is not None and not folds_offset(ctx):
        out += S.referenced_columns(inputs.offset)
    if inputs.cluster is not None:
        out += S.referenced_columns(inputs.cluster)
    seen: list[str] = []
    for c in out:
        if c not in seen:
            seen.append(c)
    return seen


def sample_distinct_query(ctx: PlanContext) -> exp.Select:
    """Distinct design rows among the first kept rows: ``d`` distinct of ``s`` sampled."""
    keys = [S.col(c) for c in key_columns(ctx)]
    picked = [k.copy() for k in keys] or [S.alias(exp.Literal.number(1), reserved("one"))]
    sample = S.select(picked, ctx.source(), where=ctx.kept())
    sample = sample.limit(SAMPLE_ROWS, copy=False)
    grouped = S.select(
        [*(k.copy() for k in keys), S.alias(S.count_star(), SAMPLE_COUNT)],
        S.subquery(sample, "smp"),
        group_by=[k.copy() for k in keys],
    )
    return S.select(
        [S.alias(S.count_star(), "d"), S.alias(S.sum_(S.col(SAMPLE_COUNT)), "s")],
        S.subquery(grouped, "grp"),
    )


# -- the compressed route: fold first, profile the fold ----------------------------------------

FOLD_ROWS, FOLD_OK, FOLD_BAD, FOLD_NK_NULL = (
    reserved("nrows"),
    reserved("ok"),
    reserved("bad"),
    reserved("nk_null"),
)


def _key_only(e: Expr, keys: Sequence[str]) -> bool:
    return set(S.referenced_columns(e)) <= set(keys)


def fold_query(
    ctx: PlanContext,
    items: Sequence[ProfileItem],
    keys: Sequence[str] | None = None,
    folding: bool = True,
) -> exp.Select:
    """Stage 1 of the compressed route: the source grouped by its design-row keys, all rows.

    One scan, grouped by the keys and two row flags: ``indb_kept`` (no NULL outside the
    keys) and ``indb_ok`` (kept and inside every domain check). Per group: rows
    (``indb_nrows``), the folding sums of :func:`folded_rows_query`, and a partial aggregate
    of every profile item that reads more than the keys; items that read only keys are
    computed from the groups afterwards, and detail items only when they are needed
    (:func:`detail_items`). NULL and NaN keys form groups of their own, so nothing is lost
    before the profile has looked at it. Grouping by the flags keeps CASE out of the
    aggregates, and per-row quantities are computed once in stacked projections (engines
    do not share subexpressions across aggregates); both matter for speed.

    With ``keys=()`` and ``folding=False`` the same scan is the row route's profile
    (:func:`grouped_profile_query`): grouped by the two flags only, without folding sums.
    """
    fam = ctx.spec.family
    keys = key_columns(ctx) if keys is None else list(keys)
    _, row_cond = ctx.kept_parts(keys)
    y_raw = ctx.observed_response()
    # the response (its floored copy inside the saturated terms, its rescaled copy in the
    # folding sums) once per row
    hoist = [(reserved("a_yg"), S.greatest(y_raw, S.num(1e-300))), (reserved("a_y"), y_raw.copy())]
    if ctx.scaling.response_changed:
        hoist.append((reserved("a_yt"), ctx.response()))
    atoms, rewrite = row_atoms(ctx, hoist)
    domain_ok = S.and_(row_cond.copy(), *(S.not_(c) for _, c in domain_checks(ctx)))
    ok = S.col(FOLD_OK)
    f = ctx.raw_freq()
    y, pw = ctx.response(), ctx.prior_weight()
    extra: list[Expr] = []
    if folding and folds_offset(ctx):
        off = ctx.offset()
        assert off is not None
        # e = exp(offset) only on rows inside the domain checks: no engine sees the
        # overflow of an offset that the profile is about to reject; exp(ln(x)) is x
        given = ctx.inputs.offset
        e_row = S.as_double(given.this.copy()) if isinstance(given, exp.Ln) else S.exp_(off.copy())
        extra.append(S.alias(S.case([(ok.copy(), rewrite(e_row))]), reserved("e")))
        e = S.col(reserved("e"))
        y = S.div(y, e)
        p = fam.variance_power
        if p == 1.0:
            pw = S.mul(pw, e.copy())
        elif p != 2.0:
            pw = S.mul(pw, S.exp_(S.mul(S.num(2.0 - p), off.copy())))
    stage = S.select([exp.Star(), *atoms], ctx.source())
    stage = S.select(
        [exp.Star(), S.alias(rewrite(row_cond), KEPT), S.alias(rewrite(domain_ok), FOLD_OK)],
        S.subquery(stage, "fold_a"),
    )
    if extra:
        stage = S.select([exp.Star(), *extra], S.subquery(stage, "fold_b"))
    cols: list[Expr] = [
        *(S.col(k) for k in (*keys, KEPT, FOLD_OK)),
        S.alias(S.count_star(), FOLD_ROWS),
    ]
    if folding:
        fw_row = S.mul(f, pw) if f is not None else pw
        robust = ctx.spec.covariance == "robust"
        stage = S.select(
            [
                exp.Star(),
                S.alias(rewrite(fw_row), reserved("fw")),
                S.alias(rewrite(y), reserved("fy")),
                # y for h(y) only where the row is inside the domain (ln of y <= 0 is an error)
                S.alias(S.case([(ok.copy(), rewrite(y))]), reserved("hy")),
                # the robust meat squares each row's score: f pw^2 (y - mu)^2 summed over
                # the rows a folded row stands for (folded_rows_query)
                *(
                    [S.alias(rewrite(S.mul(fw_row.copy(), pw.copy())), reserved("fw2"))]
                    if robust
                    else []
                ),
            ],
            S.subquery(stage, "fold_c"),
        )
        w, yf = S.col(reserved("fw")), S.col(reserved("fy"))
        h = fam.deviance_h_sql(S.col(reserved("hy")))
        cols += [
            S.alias(S.psum(rewrite(f)) if f is not None else S.count_star(), reserved("sf")),
            S.alias(S.psum(w), reserved("sw")),
            S.alias(S.psum(S.mul(w.copy(), yf)), reserved("sy")),
            S.alias(S.psum(S.mul(w.copy(), yf.copy(), yf.copy())), reserved("sy2")),
            S.alias(S.psum(S.mul(w.copy(), h)), reserved("sh")),
        ]
        if robust:
            w2 = S.col(reserved("fw2"))
            cols += [
                S.alias(S.psum(w2), reserved("s2")),
                S.alias(S.psum(S.mul(w2.copy(), yf.copy())), reserved("s2y")),
                S.alias(S.psum(S.mul(w2.copy(), yf.copy(), yf.copy())), reserved("s2y2")),
            ]
    for i, it in enumerate(items):
        if it.agg == "count" or it.detail or _key_only(it.arg, keys):
            continue
        arg = rewrite(it.arg)
        if it.agg == "nulls":
            cols.append(S.alias(S.sub(S.count_star(), exp.Count(this=arg)), reserved(f"p{i}")))
        elif it.agg == "mean":
            cols.append(S.alias(S.psum(arg), reserved(f"p{i}")))
            cols.append(S.alias(exp.Count(this=arg.copy()), reserved(f"c{i}")))
        else:
            cols.append(S.alias(AGGREGATES[it.agg](arg), reserved(f"p{i}")))
    return S.select(
        cols,
        S.subquery(stage, "fold_d"),
        group_by=[S.col(k) for k in (*keys, KEPT, FOLD_OK)],
    )


def folded_profile_query(
    ctx: PlanContext,
    items: Sequence[ProfileItem],
    table: Expr,
    keys: Sequence[str] | None = None,
) -> exp.Select:
    """Stage 2: the profile of the source, combined from the groups of :func:`fold_query`
    (the same values :func:`profile_query` gives, up to summation order). Kept-row partial
    aggregates come from the groups inside the domain checks: when any kept row is outside
    (``indb_bad`` > 0) the fit stops with the detail scan's error, so they are exact
    whenever they are used."""
    keys = key_columns(ctx) if keys is None else list(keys)
    key_cond, _ = ctx.kept_parts(keys)
    rows, kept, ok = S.col(FOLD_ROWS), S.col(KEPT), S.col(FOLD_OK)
    kept_rows = S.case([(S.and_(key_cond, kept), rows)])
    ok_group = S.and_(key_cond.copy(), ok)
    cols: list[Expr] = []
    for i, it in enumerate(items):
        mult = kept_rows.copy() if it.kept else rows.copy()
        if it.agg == "count":
            agg = S.sum_(mult)
        elif it.detail and not _key_only(it.arg, keys):
            # 0 unless the detail scan (detail_items) runs and fills it in: it runs
            # whenever a row is excluded or fails a check outside the keys
            agg = exp.Literal.number(0) if it.agg == "sum" else exp.Null()
        elif _key_only(it.arg, keys):
            some = S.gt(mult.copy(), exp.Literal.number(0))
            if it.agg == "nulls":
                agg = S.sum_(S.case([(some, S.mul(mult.copy(), S.flag(S.is_null(it.arg))))]))
            elif it.agg in ("min", "max"):
                agg = AGGREGATES[it.agg](S.case([(some, it.arg.copy())]))
            else:
                weighted = S.case([(some, S.mul(mult.copy(), it.arg.copy()))])
                agg = (S.sum_ if it.agg == "sum" else S.psum)(weighted)
                if it.agg == "mean":
                    agg = _ratio(agg, S.sum_(mult))
        else:
            part = S.col(reserved(f"p{i}"))
            if it.kept:
                part = S.case([(ok_group.copy(), part)])
            if it.agg == "nulls":
                agg = S.sum_(part)
            elif it.agg == "mean":
                count = S.col(reserved(f"c{i}"))
                if it.kept:
                    count = S.case([(ok_group.copy(), count)])
                agg = _ratio(S.psum(part), S.sum_(count))
            else:
                agg = AGGREGATES[it.agg](part)
        cols.append(S.alias(agg, it.alias))
    cols += [
        S.alias(S.sum_(S.case([(S.and_(kept.copy(), S.not_(ok.copy())), rows.copy())])), FOLD_BAD),
        # rows excluded for a NULL outside the keys
        S.alias(
            S.sum_(S.case([(S.and_(key_cond.copy(), S.not_(kept.copy())), rows.copy())])),
            FOLD_NK_NULL,
        ),
    ]
    return S.select(cols, table)


def grouped_profile_query(ctx: PlanContext, items: Sequence[ProfileItem]) -> exp.Select:
    """The row route's profile in one scan, grouped by the row flags of :func:`fold_query`
    (at most four groups) instead of a CASE inside every aggregate; detail items are left
    for :func:`detail_items`' scan, which runs only when a kept row fails a check."""
    grouped = fold_query(ctx, items, keys=(), folding=False)
    return folded_profile_query(ctx, items, S.subquery(grouped, "pg"), keys=())


def _ratio(num: Expr, den: Expr) -> Expr:
    """num / den, NULL when den is 0 (an AVG over no rows)."""
    return S.case([(S.gt(den, exp.Literal.number(0)), S.div(num, den.copy()))])


def folded_rows_query(ctx: PlanContext, table: Expr) -> exp.Select:
    """Stage 3: the groups of :func:`fold_query` inside every check, as the rows the fit
    runs on.

    Per design row: F = sum(f), W = sum(f pw), Y = sum(f pw y), and the constants that keep
    the deviance and Pearson chi-squared exact: d(y, mu) = h(y) + a(mu) y + b(mu), so the
    rows' deviance is W d(Y/W, mu) + [sum(f pw h(y)) - W h(Y/W)], and their Pearson sum is
    W (Y/W - mu)^2 / V + [sum(f pw y^2) - Y^2 / W] / V. A foldable offset e = exp(offset)
    became y/e and pw e^(2-p) in the fold.
    """
    fam = ctx.spec.family
    keys = key_columns(ctx)
    key_cond, _ = ctx.kept_parts(keys)
    sf, sw, sy = S.col(reserved("sf")), S.col(reserved("sw")), S.col(reserved("sy"))
    pos = S.gt(sw, S.num(0.0))
    ybar = S.case([(pos, S.div(sy, sw.copy()))], S.num(0.0))
    fold_pw = S.case([(S.gt(sf.copy(), S.num(0.0)), S.div(sw.copy(), sf.copy()))], S.num(0.0))
    dconst = S.sub(S.col(reserved("sh")), S.mul(sw.copy(), fam.deviance_h_sql(ybar.copy())))
    q = S.sub(S.col(reserved("sy2")), S.div(S.mul(sy.copy(), sy.copy()), sw.copy()))
    return S.select(
        [
            *(S.col(k) for k in keys),
            S.alias(S.as_double(sf.copy()), FOLD_F),
            S.alias(fold_pw, FOLD_PW),
            S.alias(ybar, FOLD_Y),
            S.alias(S.case([(pos.copy(), dconst)], S.num(0.0)), FOLD_DCONST),
            S.alias(S.case([(pos.copy(), q)], S.num(0.0)), FOLD_Q),
            *(_robust_columns() if ctx.spec.covariance == "robust" else []),
            S.alias(S.col(FOLD_ROWS), ROWCOUNT),
        ],
        table,
        where=S.and_(key_cond, S.col(FOLD_OK)),
    )


def _robust_columns() -> list[Expr]:
    """A folded row's sums for the robust meat: sum(f pw^2 (y - mu)^2) over its rows is
    R2A (R2Y - mu)^2 + R2Q, with R2A = sum(f pw^2), R2Y = sum(f pw^2 y) / R2A and
    R2Q = sum(f pw^2 y^2) - R2A R2Y^2 (centred as FOLD_Q is, so the fit's mu enters only
    through a difference from the rows' own mean)."""
    s2, s2y = S.col(reserved("s2")), S.col(reserved("s2y"))
    pos = S.gt(s2, S.num(0.0))
    spread = S.sub(S.col(reserved("s2y2")), S.div(S.mul(s2y.copy(), s2y.copy()), s2.copy()))
    return [
        S.alias(S.case([(pos.copy(), s2.copy())], S.num(0.0)), FOLD_R2A),
        S.alias(S.case([(pos.copy(), S.div(s2y.copy(), s2.copy()))], S.num(0.0)), FOLD_R2Y),
        S.alias(S.case([(pos.copy(), spread)], S.num(0.0)), FOLD_R2Q),
    ]


def detail_items(
    ctx: PlanContext, items: Sequence[ProfileItem], keys: Sequence[str] | None = None
) -> list[ProfileItem]:
    """The detail items the fold left out (those that read more than the keys)."""
    keys = key_columns(ctx) if keys is None else keys
    return [it for it in items if it.detail and not _key_only(it.arg, keys)]
