"""The queries of a one-way exploration (``indb explore``): three scans of the source.

1. :func:`explore_profile_query`: row counts, the rows set aside for a NULL response, offset
   or weight, the checks on those three (finite, weight >= 0, exp(offset) finite), and for
   every numeric column its range;
2. :func:`explore_cuts_query` (with a numeric column): each numeric column's distinct
   values around the order statistics its band quantiles interpolate between, from its
   values grouped and counted cumulatively in the engine (which sorts and spills within
   its memory limit, where an exact quantile aggregate would hold every value);
3. :func:`explore_grouped_query`: one GROUP BY GROUPING SETS scan with one set per explored
   column and the grand total, each group's rows, exposure and Σ weight·response; the
   levels of a categorical column beyond the ``cap`` with the most exposure are summed into
   one row in the engine, so a column with a million distinct values returns ``cap + 1``
   rows.

Rows used are those with a response, offset and weight (the explored columns may be NULL:
such rows form their own level). Per row, with w the weight (1 without one):
actual = w·y, exposure = w·exp(offset) with an offset (read as the log of exposure, as a
log-link model reads it), else w.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlglot import exp

from indb import sqlexpr as S
from indb.plan.context import PlanContext
from indb.sqlexpr import Expr

#: kinds of explored columns: levels as text, or quantile bands of a number
CATEGORICAL, NUMERIC = "categorical", "numeric"
#: the band code of a numeric value that is NaN or infinite (bands count from 1)
NOT_FINITE_BAND = 0


def band_quantiles(bands: int) -> tuple[float, ...]:
    """The quantiles whose values cut a column into ``bands`` bands of about equal rows."""
    return tuple(k / bands for k in range(1, bands))


# -- per-row values ----------------------------------------------------------------------------


def used_rows(ctx: PlanContext) -> Expr:
    """Rows with a response, an offset and a weight (NULL in any of them: set aside)."""
    conds = [S.not_(S.is_null(S.col(ctx.inputs.response)))]
    conds += [S.not_(S.is_null(e.copy())) for e in (ctx.inputs.offset, ctx.inputs.weight) if e]
    return S.and_(*conds)


def _response(ctx: PlanContext) -> Expr:
    # a BOOLEAN response reads as CASE WHEN y THEN 1 ELSE 0, which would turn NULL into 0
    y = S.col(ctx.inputs.response)
    return S.case([(S.not_(S.is_null(y)), ctx.raw_response())])


def exposure_sql(ctx: PlanContext) -> Expr:
    """A row's exposure: weight x exp(offset), the weight alone, or 1."""
    w, off = ctx.raw_weight(), ctx.raw_offset()
    if off is None:
        return w if w is not None else S.num(1.0)
    # IEEE exp: PostgreSQL raises on underflow (exp(-800)), where the exposure is just 0
    e = S.IeeeExp(this=off)
    return S.mul(w, e) if w is not None else e


def actual_sql(ctx: PlanContext) -> Expr:
    """A row's weight x response."""
    w = ctx.raw_weight()
    return S.mul(w, _response(ctx)) if w is not None else _response(ctx)


def band_sql(x: Expr, cuts: Sequence[float]) -> Expr:
    """The band of ``x`` between ascending distinct ``cuts``: 1 for x <= cuts[0], k for
    cuts[k-2] < x <= cuts[k-1], len(cuts) + 1 above the last; NULL for NULL and
    :data:`NOT_FINITE_BAND` for NaN and infinities."""
    whens: list[tuple[Expr, Expr]] = [
        (S.is_null(x.copy()), exp.Cast(this=S.null(), to=exp.DataType.build("INT"))),
        (S.not_(S.is_finite(x.copy())), S.integer(NOT_FINITE_BAND)),
    ]
    whens += [(S.le(x.copy(), S.num(c)), S.integer(k + 1)) for k, c in enumerate(cuts)]
    return S.case(whens, S.integer(len(cuts) + 1))


# -- scan 1: counts, checks and band edges ------------------------------------------------------

# aliases of the profile row (numeric column i adds lo_i, hi_i and q_i_k)
N_TOTAL, N_USED = "n_total", "n_used"
NULLS = {"response": "null_response", "offset": "null_offset", "weight": "null_weight"}
NOT_FINITE = {"response": "bad_response", "offset": "bad_offset", "weight": "bad_weight"}
NEGATIVE_WEIGHT, OFFSET_MAX = "neg_weight", "offset_max"


def explore_profile_query(ctx: PlanContext, numerics: Sequence[str]) -> exp.Select:
    """One scan: total and used rows, NULL counts of response/offset/weight over all rows,
    their non-finite counts, negative weights and the largest offset over used rows, and for
    the i-th of ``numerics`` the smallest (``lo_i``) and largest (``hi_i``) finite value over
    the used rows."""
    values = {"response": _response(ctx), "offset": ctx.raw_offset(), "weight": ctx.raw_weight()}
    given = {k: v for k, v in values.items() if v is not None}
    inner_cols = [S.alias(S.flag(used_rows(ctx)), "u")]
    inner_cols += [S.alias(v, k) for k, v in given.items()]
    inner_cols += [S.alias(S.as_double(S.col(c)), f"x{i}") for i, c in enumerate(numerics)]
    inner = S.select(inner_cols, ctx.source())
    used = S.eq(S.col("u"), S.integer(1))

    def over_used(cond: Expr) -> Expr:
        return S.sum_(S.flag(S.and_(used.copy(), cond)))

    cols: list[Expr] = [
        S.alias(S.count_star(), N_TOTAL),
        S.alias(S.sum_(S.col("u")), N_USED),
    ]
    for k in given:
        cols.append(S.alias(S.sub(S.count_star(), exp.Count(this=S.col(k))), NULLS[k]))
        cols.append(S.alias(over_used(S.not_(S.is_finite(S.col(k)))), NOT_FINITE[k]))
    if "weight" in given:
        cols.append(S.alias(over_used(S.lt(S.col("weight"), S.num(0.0))), NEGATIVE_WEIGHT))
    if "offset" in given:
        cols.append(S.alias(S.max_(S.case([(used.copy(), S.col("offset"))])), OFFSET_MAX))
    for i in range(len(numerics)):
        x = S.col(f"x{i}")
        finite = S.case([(S.and_(used.copy(), S.is_finite(x.copy())), x.copy())])
        cols.append(S.alias(S.min_(finite.copy()), f"lo_{i}"))
        cols.append(S.alias(S.max_(finite), f"hi_{i}"))
    return S.select(cols, S.subquery(inner, "xp"))


# -- scan 2: the order statistics the band edges need ----------------------------------------

#: columns of the order-statistics result: the column's index, a distinct value, its rows,
#: the rows up to and including it, and the column's finite values in all
COLUMN, VALUE, COUNT, UP_TO, FINITE = "col", "v", "c", "cum", "nf"


def explore_cuts_query(ctx: PlanContext, numerics: Sequence[str], bands: int) -> exp.Select:
    """The distinct values around the order statistics that the :func:`band_quantiles` of
    each of ``numerics`` interpolate between, over the used rows with a finite value.

    One GROUP BY GROUPING SETS gives each column's distinct values and their rows; a window
    sum in value order their cumulative rows (``cum``) and one over the column its finite
    rows (``nf``). With h = (nf - 1) q for a quantile q, the rows kept hold the 0-based ranks
    floor(h) - 1 to floor(h) + 2 (a margin for how an engine rounds h): at most a few rows
    per quantile. The engine groups, sorts and spills as its memory allows; no aggregate
    holds a column's values (exact quantile aggregates do, which breaks on large tables).
    """
    keys = [f"x{i}" for i in range(len(numerics))]
    inner = S.select(
        [
            S.alias(S.case([(S.is_finite(S.as_double(S.col(c))), S.as_double(S.col(c)))]), k)
            for k, c in zip(keys, numerics, strict=True)
        ],
        ctx.source(),
        where=used_rows(ctx),
    )
    grouped = exp.Select(
        expressions=[
            S.alias(
                S.case(
                    [
                        (S.eq(_grouping(S.col(k)), S.integer(0)), S.integer(i))
                        for i, k in enumerate(keys)
                    ]
                ),
                COLUMN,
            ),
            S.alias(_first([S.col(k) for k in keys], "DOUBLE"), VALUE),
            S.alias(S.count_star(), COUNT),
        ]
    ).from_(S.subquery(inner, "xq"), copy=False)
    sets = [exp.Tuple(expressions=[S.col(k)]) for k in keys]
    grouped.set("group", exp.Group(grouping_sets=[exp.GroupingSets(expressions=sets)]))
    valued = S.select(
        [S.col(COLUMN), S.col(VALUE), S.col(COUNT)],
        S.subquery(grouped, "xg"),
        where=S.not_(S.is_null(S.col(VALUE))),
    )
    running = S.select(
        [
            *(S.col(n) for n in (COLUMN, VALUE, COUNT)),
            S.alias(S.partition_sum(S.col(COUNT), COLUMN, VALUE), UP_TO),
            S.alias(S.partition_sum(S.col(COUNT), COLUMN), FINITE),
        ],
        S.subquery(valued, "xv"),
    )
    first, last = S.sub(S.col(UP_TO), S.col(COUNT)), S.sub(S.col(UP_TO), S.integer(1))
    near = []
    for q in band_quantiles(bands):
        h = S.floor_(S.mul(S.sub(S.as_double(S.col(FINITE)), S.num(1.0)), S.num(q)))
        # the value's ranks [first, last] meet [floor(h) - 1, floor(h) + 2]
        near.append(
            S.and_(
                S.le(first.copy(), S.add(h.copy(), S.num(2.0))),
                S.ge(last.copy(), S.sub(h, S.num(1.0))),
            )
        )
    return S.select(
        [S.col(n) for n in (COLUMN, VALUE, COUNT, UP_TO, FINITE)],
        S.subquery(running, "xr"),
        where=S.or_(*near),
    )


# -- scan 3: one GROUPING SETS scan ------------------------------------------------------------

#: the slot of the row that sums a categorical column's levels beyond the cap (ranks
#: count from 1)
OTHER_SLOT = 0

# columns of the grouped result
SET, SLOT, LEVEL, BAND, ROWS, EXPOSURE, ACTUAL, LEVELS = (
    "g",
    "slot",
    "lv",
    "bd",
    "n",
    "e",
    "a",
    "levels",
)


def explore_grouped_query(
    ctx: PlanContext,
    columns: Sequence[tuple[str, str]],
    cuts: dict[str, tuple[float, ...]],
    cap: int,
) -> exp.Select:
    """Rows, exposure and Σ weight·response of the used rows per level of each of
    ``columns`` ((name, :data:`CATEGORICAL` or :data:`NUMERIC`), categorical ones first) and
    over all of them, in one GROUP BY GROUPING SETS scan.

    One result row per (``g``, ``slot``): ``g`` is the column's index in ``columns`` (its
    length for the grand total); ``lv`` the level's text (categorical) or ``bd`` the band
    (numeric, :func:`band_sql` with ``cuts[name]``), both NULL for NULL in the column. A
    categorical column's levels are ranked by exposure: ``slot`` is the rank of the first
    ``cap`` and of the NULL level (always shown), and :data:`OTHER_SLOT` sums the rest, with
    their number in ``levels``. Bands are never summed.
    """
    n_cat = sum(1 for _, kind in columns if kind == CATEGORICAL)
    if any(kind == CATEGORICAL for _, kind in columns[n_cat:]):
        raise ValueError("categorical columns must come first")
    keys = [f"c{i}" for i in range(len(columns))]
    level_cols = []
    for key, (name, kind) in zip(keys, columns, strict=True):
        if kind == CATEGORICAL:
            level = S.level_text(S.col(name))
        else:
            level = band_sql(S.as_double(S.col(name)), cuts[name])
        level_cols.append(S.alias(level, key))
    rows = S.select(
        [
            *level_cols,
            S.alias(exposure_sql(ctx), EXPOSURE),
            S.alias(actual_sql(ctx), ACTUAL),
        ],
        ctx.source(),
        where=used_rows(ctx),
    )
    grouped = _grouping_sets(keys, n_cat, len(columns))
    grouped = grouped.from_(S.subquery(rows, "xr"), copy=False)
    # the NULL level ranks last, so the first ``cap`` ranks go to levels with a value
    missing = S.and_(S.is_null(S.col(LEVEL)), S.is_null(S.col(BAND)))
    order = exp.Order(
        expressions=[
            exp.Ordered(this=S.flag(missing.copy())),
            exp.Ordered(this=S.col(EXPOSURE), desc=True),
            exp.Ordered(this=S.col(ROWS), desc=True),
            exp.Ordered(this=S.col(LEVEL)),
            exp.Ordered(this=S.col(BAND)),
        ]
    )
    rank = exp.Window(this=exp.RowNumber(), partition_by=[S.col(SET)], order=order)
    ranked = S.select([exp.Star(), S.alias(rank, "rk")], S.subquery(grouped, "xg"))
    shown = S.or_(S.le(S.col("rk"), S.integer(cap)), S.ge(S.col(SET), S.integer(n_cat)), missing)
    slotted = S.select(
        [exp.Star(), S.alias(S.case([(shown, S.col("rk"))], S.integer(OTHER_SLOT)), SLOT)],
        S.subquery(ranked, "xk"),
    )
    return S.select(
        [
            S.col(SET),
            S.col(SLOT),
            S.alias(S.min_(S.col(LEVEL)), LEVEL),
            S.alias(S.min_(S.col(BAND)), BAND),
            S.alias(S.sum_(S.col(ROWS)), ROWS),
            S.alias(S.sum_(S.col(EXPOSURE)), EXPOSURE),
            S.alias(S.sum_(S.col(ACTUAL)), ACTUAL),
            S.alias(S.count_star(), LEVELS),
        ],
        S.subquery(slotted, "xs"),
        group_by=[S.col(SET), S.col(SLOT)],
    )


def _grouping_sets(keys: Sequence[str], n_cat: int, n_sets: int) -> exp.Select:
    """SELECT g, lv, bd, COUNT(*), Σ exposure, Σ actual GROUP BY GROUPING SETS ((c0), ...,
    ()). ``g`` comes from one-column GROUPING calls (0 where the column is grouped), not
    from one bitmask over all columns: PostgreSQL's GROUPING takes at most 31 arguments."""
    which = S.case(
        [(S.eq(_grouping(S.col(k)), S.integer(0)), S.integer(i)) for i, k in enumerate(keys)],
        S.integer(n_sets),
    )
    text = [S.col(k) for k in keys[:n_cat]]
    band = [S.col(k) for k in keys[n_cat:]]
    q = exp.Select(
        expressions=[
            S.alias(which, SET),
            S.alias(_first(text, "VARCHAR"), LEVEL),
            S.alias(_first(band, "INT"), BAND),
            S.alias(S.count_star(), ROWS),
            S.alias(S.psum(S.col(EXPOSURE)), EXPOSURE),
            S.alias(S.psum(S.col(ACTUAL)), ACTUAL),
        ]
    )
    sets = [exp.Tuple(expressions=[S.col(k)]) for k in keys] + [exp.Tuple(expressions=[])]
    q.set("group", exp.Group(grouping_sets=[exp.GroupingSets(expressions=sets)]))
    return q


def _grouping(column: Expr) -> Expr:
    # GROUPING(c): 1 where c is not grouped in the row's set
    return exp.Anonymous(this="GROUPING", expressions=[column])


def _first(columns: Sequence[Expr], type_name: str) -> Expr:
    """The one non-NULL grouping column of a set (the others are NULL there), or a typed
    NULL when there is none."""
    if not columns:
        return exp.Cast(this=S.null(), to=exp.DataType.build(type_name))
    if len(columns) == 1:
        return columns[0]
    return exp.Coalesce(this=columns[0], expressions=list(columns[1:]))
