"""The pre-fit scans' queries: the source's columns, knot positions, the profile (row
counts, NULLs, domain checks, weighted sums, the moments that standardize values) and the
levels of the categorical columns."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from sqlglot import exp

from indb import sqlexpr as S
from indb.design import Value
from indb.plan.context import KEPT, PlanContext, reserved
from indb.splines import knot_quantiles
from indb.sqlexpr import Expr

# -- pre-fit scans ---------------------------------------------------------------------------


def describe_query(ctx: PlanContext) -> exp.Select:
    """SELECT * over the source (engines describe it without running it)."""
    return S.select([exp.Star()], ctx.source())


def knots_query(ctx: PlanContext) -> exp.Select:
    """Quantiles of each spline column over kept rows (knot positions)."""
    cols = []
    for c, k in ctx.inputs.spline_columns:
        x = S.as_double(S.col(c))
        # finite values only (NULL otherwise; quantiles skip NULLs): NaN/inf rows are
        # reported, with their count, by the profile's domain checks that need these knots
        finite_x = S.case([(S.is_finite(x), x.copy())])
        for i, q in enumerate(ctx.dialect.quantiles(finite_x, knot_quantiles(k))):
            cols.append(S.alias(q, f"k_{c}_{i}"))
    return S.select(cols, ctx.source(), where=ctx.kept())


def domain_checks(ctx: PlanContext) -> list[tuple[str, Expr]]:
    """(message stem, violation condition) pairs checked over kept rows."""
    spec = ctx.spec
    fam = spec.family
    y = ctx.raw_response()
    name = ctx.inputs.response
    checks: list[tuple[str, Expr]] = []
    checks.append((f"response column {name!r} is NaN or infinite", S.not_(S.is_finite(y))))
    t = ctx.raw_trials()
    if fam.name == "binomial" and t is not None:
        checks.append((f"trials expression {spec.trials!r} is negative", S.lt(t, S.num(0.0))))
        checks.append(
            (
                f"family 'binomial' needs successes >= 0; column {name!r} is negative",
                S.lt(y, S.num(0.0)),
            )
        )
        checks.append(
            (
                f"family 'binomial' needs successes <= trials; column {name!r} exceeds "
                f"trials expression {spec.trials!r}",
                S.gt(y, t),
            )
        )
    else:
        if fam.y_min is not None:
            op = S.le if fam.y_min_strict else S.lt
            rel = ">" if fam.y_min_strict else ">="
            checks.append(
                (
                    f"family {fam.name!r} needs a response {rel} {fam.y_min:g}; "
                    f"column {name!r} has values out of that range",
                    op(y, S.num(fam.y_min)),
                )
            )
        if fam.y_max is not None:
            checks.append(
                (
                    f"family {fam.name!r} needs a response <= {fam.y_max:g}; "
                    f"column {name!r} has values out of that range",
                    S.gt(y, S.num(fam.y_max)),
                )
            )
    for label, text, e in (
        ("offset", spec.offset, ctx.raw_offset()),
        ("weight", spec.weight, ctx.raw_weight()),
        ("frequency_weight", spec.frequency_weight, ctx.raw_freq()),
        ("trials", spec.trials, t),
    ):
        if e is not None:
            checks.append(
                (f"{label} expression {text!r} is NaN or infinite", S.not_(S.is_finite(e)))
            )
    if ctx.raw_weight() is not None:
        checks.append(
            (f"weight expression {spec.weight!r} is negative", S.lt(ctx.raw_weight(), S.num(0.0)))
        )
    if ctx.raw_freq() is not None:
        checks.append(
            (
                f"frequency_weight expression {spec.frequency_weight!r} is negative",
                S.lt(ctx.raw_freq(), S.num(0.0)),
            )
        )
    for c in ctx.inputs.numerics:
        checks.append(
            (
                f"predictor column {c!r} is NaN or infinite",
                S.not_(S.is_finite(S.as_double(S.col(c)))),
            )
        )
    # a numeric column listed in categorical=: NaN/inf would become levels 'nan'/'inf'; the
    # same rule as for every other model column (rejected, rows counted)
    types = dict(ctx.inputs.columns)
    for c in ctx.inputs.factors:
        if ctx.dialect.type_kind(types.get(c, "")) == "numeric":
            checks.append(
                (
                    f"categorical column {c!r} is NaN or infinite",
                    S.not_(S.is_finite(S.as_double(S.col(c)))),
                )
            )
    return checks


# -- the profile: one list of aggregates, run over the source or over its fold -------------


@dataclass(frozen=True)
class ProfileItem:
    """One profile aggregate: ``agg`` of the per-row ``arg``, over kept rows when ``kept``.

    ``agg`` is ``count`` (rows; ``arg`` unused), ``nulls`` (rows where ``arg`` is NULL),
    ``sum`` (integer flags), ``psum`` (a sum the dialect may compensate), ``min``, ``max`` or
    ``mean``. Every one decomposes over groups,
    so the same items run in one scan of the source (:func:`profile_query`) or, on the
    compressed route, as partial aggregates inside the fold (:func:`fold_query`) combined
    over the folded table (:func:`folded_profile_query`).
    """

    alias: str
    agg: str
    arg: Expr
    kept: bool = True
    #: needed only to explain an exclusion or an error (the fold skips it when it reads
    #: more than the keys, and the detail scan fills it in when it matters)
    detail: bool = False


#: alias of the response in :func:`head_query` and in the ``shifts`` of :func:`profile_items`
RESPONSE_KEY = "y"


def profile_items(
    ctx: PlanContext,
    values: Sequence[Value],
    knots: dict[str, tuple[float, ...]],
    shifts: dict[str, tuple[float, float]] | None = None,
) -> list[ProfileItem]:
    """The pre-fit profile: total rows, rows kept and NULL counts per model input (over all
    rows); over kept rows the domain-check violation counts, weighted response sums, weight
    range, saturated log-likelihood sums and the moments that standardize values.

    The moments of a value v are taken about ``shifts[v.alias] = (c, g)``, a value c of a
    kept row (:func:`head_query`) and a power of two g: mean and mean square of
    (v - c) g. The mean square is 0 exactly when v is constant, the variance from these
    moments keeps its digits however far the mean lies from 0, and g (about one over the
    spread) keeps the square finite for values near the largest doubles. The response
    (``shifts["y"]``) gets the same two moments, which tell how many digits a fit that
    cannot centre it loses."""
    one = exp.Literal.number(1)
    y, pw = ctx.response(), ctx.prior_weight()
    y_obs = ctx.observed_response()
    fw = ctx.raw_freq() or S.num(1.0)
    items = [ProfileItem("n_total", "count", one, kept=False), ProfileItem("n_kept", "count", one)]
    for i, (_, e) in enumerate(ctx.null_items()):
        items.append(ProfileItem(f"null_{i}", "nulls", e, kept=False))
    items += [
        ProfileItem("sum_f", "psum", fw),
        ProfileItem("sum_fpw", "psum", S.mul(fw.copy(), pw)),
        ProfileItem("sum_fpwy", "psum", S.mul(fw.copy(), pw.copy(), y)),
        ProfileItem(
            "sum_f_pos", "psum", S.case([(S.gt(pw.copy(), S.num(0.0)), fw.copy())], S.num(0.0))
        ),
        ProfileItem("n_zero_weight", "sum", S.flag(S.le(pw.copy(), S.num(0.0)))),
        ProfileItem("y_min", "min", y_obs.copy(), detail=True),
        ProfileItem("y_max", "max", y_obs.copy(), detail=True),
        ProfileItem("pw_min", "min", pw.copy()),
        ProfileItem("pw_max", "max", pw.copy()),
        ProfileItem("off_mean", "mean", ctx.offset() or S.num(0.0)),
    ]
    for i, (_, cond) in enumerate(domain_checks(ctx)):
        items.append(ProfileItem(f"chk_{i}", "sum", S.flag(cond), detail=True))
    for key, term in saturated_terms(ctx).items():
        positive = S.case([(S.gt(pw.copy(), S.num(0.0)), S.mul(fw.copy(), term))])
        items.append(ProfileItem(f"ll_{key}", "psum", positive))
    moments = [(v.alias, ctx.value_sql(v, knots, standardized=False)) for v in values[1:]]
    for alias, raw in [*moments, (RESPONSE_KEY, y_obs.copy())]:
        c, g = (shifts or {}).get(alias, (0.0, 1.0))
        dev = S.sub(raw, S.num(c)) if c != 0.0 else raw
        dev = S.mul(dev, S.num(g)) if g != 1.0 else dev
        # mean and mean square about c only (no MIN/MAX: they cost as much again): the
        # scale just conditions X'WX, and constancy shows as a mean square of exactly 0
        items += [
            ProfileItem(f"{alias}_mean", "mean", dev),
            ProfileItem(f"{alias}_ms", "mean", S.mul(dev.copy(), dev.copy())),
        ]
    return items


HEAD_ROWS = 1000  # kept rows head_query looks at


def head_query(
    ctx: PlanContext, values: Sequence[Value], knots: dict[str, tuple[float, ...]]
) -> exp.Select:
    """The range (``<alias>_lo``, ``<alias>_hi``) of every value and of the observed
    response (alias ``y``) over the first ``HEAD_ROWS`` kept rows (any rows: engines stop
    reading there) and their count (``head_rows``). The low
    end is a value of a kept row, the point the profile takes moments about; the width
    sets the power of two that keeps those moments (and, for the response, the fit) far
    from overflow."""
    cols = [S.alias(ctx.value_sql(v, knots, standardized=False), v.alias) for v in values[1:]]
    cols.append(S.alias(ctx.observed_response(), RESPONSE_KEY))
    head = S.select(cols, ctx.source(), where=ctx.kept()).limit(HEAD_ROWS, copy=False)
    out: list[Expr] = [S.alias(S.count_star(), HEAD_COUNT)]
    for alias in [*(v.alias for v in values[1:]), RESPONSE_KEY]:
        out += [
            S.alias(S.min_(S.col(alias)), f"{alias}_lo"),
            S.alias(S.max_(S.col(alias)), f"{alias}_hi"),
        ]
    return S.select(out, S.subquery(head, "head"))


#: The head scan's row count (:func:`head_query`).
HEAD_COUNT = "head_rows"


def distinct_head_query(ctx: PlanContext, columns: Sequence[str]) -> exp.Select:
    """Distinct values (``nd_<i>``) of ``columns`` over the head scan's rows: the check
    for identifier-like predictors, asked only of the few columns that could be one."""
    cols = [S.alias(S.col(c), f"c{i}") for i, c in enumerate(columns)]
    head = S.select(cols, ctx.source(), where=ctx.kept()).limit(HEAD_ROWS, copy=False)
    out = [
        S.alias(exp.Count(this=exp.Distinct(expressions=[S.col(f"c{i}")])), f"nd_{i}")
        for i in range(len(columns))
    ]
    return S.select(out, S.subquery(head, "head"))


AGGREGATES = {"sum": S.sum_, "psum": S.psum, "min": S.min_, "max": S.max_, "mean": S.avg}


def row_atoms(
    ctx: PlanContext, hoist: Sequence[tuple[str, Expr]] = ()
) -> tuple[list[Expr], Callable[[Expr], Expr]]:
    """The user's offset, weight and trials expressions (and the ``hoist`` expressions) as
    columns computed once per row (``indb_a_*``), and a function that rewrites an expression
    to read those columns. Engines do not share a subexpression between aggregates, so a
    per-row value used by several of them is cheaper as a column."""
    mapping: dict[Expr, str] = {}
    cols: list[Expr] = []
    inputs = ctx.inputs
    for name, e in (
        *hoist,
        (reserved("a_off"), inputs.offset),
        (reserved("a_w"), inputs.weight),
        (reserved("a_fw"), inputs.frequency_weight),
        (reserved("a_t"), inputs.trials),
    ):
        if e is not None and not isinstance(e, exp.Column) and e not in mapping:
            mapping[e] = name
            cols.append(S.alias(e.copy(), name))

    def rewrite(x: Expr) -> Expr:
        if not mapping:
            return x.copy()
        return x.transform(lambda n: S.col(mapping[n]) if n in mapping else n)

    return cols, rewrite


def profile_query(ctx: PlanContext, items: Sequence[ProfileItem]) -> exp.Select:
    """The profile in one scan of the source (every kept-row aggregate argument is NULL on
    other rows, and aggregates skip NULLs). No COUNT(DISTINCT ...): DuckDB plans each one
    as its own pass over the source."""
    atoms, rewrite = row_atoms(ctx)
    kept = S.col(KEPT)
    cols: list[Expr] = []
    for it in items:
        if it.agg == "count":
            agg = S.sum_(S.flag(kept.copy())) if it.kept else S.count_star()
        elif it.agg == "nulls":
            agg = S.sub(S.count_star(), exp.Count(this=rewrite(it.arg)))
        else:
            arg = rewrite(it.arg)
            agg = AGGREGATES[it.agg](S.case([(kept.copy(), arg)]) if it.kept else arg)
        cols.append(S.alias(agg, it.alias))
    with_atoms = S.select([exp.Star(), *atoms], ctx.source())
    inner = S.select([exp.Star(), S.alias(rewrite(ctx.kept()), KEPT)], S.subquery(with_atoms, "pa"))
    return S.select(cols, S.subquery(inner, "p"))


def saturated_terms(ctx: PlanContext) -> dict[str, Expr]:
    """Data-only per-row terms for the log-likelihood (see Family.saturated_sql); none when
    theta is still to be estimated. Logarithms are guarded: out-of-domain rows are reported
    by the domain checks of the same scan, and their terms are never used."""
    if ctx.spec.estimate_theta:
        return {}
    y = ctx.observed_response()
    yg = S.greatest(y, S.num(1e-300))
    return ctx.spec.family.saturated_sql(
        yg, S.greatest(ctx.prior_weight(), S.num(1e-300)), ctx.raw_trials()
    )


def levels_query(ctx: PlanContext, sets: Sequence[tuple[str, ...]], cap: int) -> exp.Select:
    """Level counts of every factor and observed combinations of factor sets, in one scan.

    GROUP BY GROUPING SETS over the factors (as text); ``g`` (the GROUPING bitmask) tells the
    sets apart. At most ``cap + 1`` rows per set come back, most frequent first, so a
    column with too many levels is detected without fetching them all.
    """
    factors = list(ctx.inputs.factors)
    alias = {c: f"f{i}" for i, c in enumerate(factors)}
    # the most frequent level is the default reference: count frequency-weighted rows
    freq = ctx.raw_freq()
    weight = [S.alias(freq, "rc")] if freq is not None else []
    inner = S.select(
        [*(S.alias(S.level_text(S.col(c)), alias[c]) for c in factors), *weight],
        ctx.source(),
        where=ctx.kept(),
    )
    all_sets = [(c,) for c in factors] + [tuple(s) for s in sets]
    gsets = exp.GroupingSets(
        expressions=[exp.Tuple(expressions=[S.col(alias[c]) for c in st]) for st in all_sets]
    )
    fcols = [S.col(alias[c]) for c in factors]
    grouping = exp.Anonymous(this="GROUPING", expressions=[c.copy() for c in fcols])
    counted = exp.Select(
        expressions=[
            S.alias(grouping, "g"),
            *(c.copy() for c in fcols),
            S.alias(S.sum_(S.col("rc")) if freq is not None else S.count_star(), "n"),
        ]
    )
    counted = counted.from_(S.subquery(inner, "lv"), copy=False)
    counted.set("group", exp.Group(grouping_sets=[gsets]))
    order = exp.Order(
        expressions=[
            exp.Ordered(this=S.col("n"), desc=True),
            *(exp.Ordered(this=c.copy()) for c in fcols),
        ]
    )
    rank = exp.Window(this=exp.RowNumber(), partition_by=[S.col("g")], order=order)
    ranked = S.select([exp.Star(), S.alias(rank, "rk")], S.subquery(counted, "c"))
    return S.select(
        [exp.Star()],
        S.subquery(ranked, "rk0"),
        where=S.le(S.col("rk"), exp.Literal.number(cap + 1)),
    )
