"""SQL plans: pure functions from a spec, its resolved design and coefficients to syntax trees.

Nothing here touches a connection. The iteration query computes, in one aggregate scan and
grouped by the factor cells, every sum the solver needs:

* ``s_a_b`` = sum(f w v_a v_b) for value pairs a <= b (v_0 = 1),
* ``t_a``   = sum(f w z v_a),
* ``dev``, ``pear`` (deviance and Pearson chi-squared contributions), ``bad`` (rows whose
  eta left the valid domain), ``n`` (rows) and ``nw`` (frequency-weighted rows),

where f is the frequency weight, w the working weight and z the working response. Dummy
columns are never multiplied out per row: factor blocks of X'WX come from the GROUP BY.
Stable aliases keep the generated text reproducible for snapshot tests.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.design import (
    RESERVED_PREFIX,
    Design,
    Inputs,
    Scaling,
    Value,
    cell_columns,
    column_groups,
    level_codes,
)
from indb.engines.base_dialect import Dialect
from indb.spec import ModelSpec
from indb.sqlexpr import Expr

SRC = "indb_src"
ROWS = "r"

# Harrell's default knot quantiles for restricted cubic splines (common practice).
KNOT_QUANTILES = {
    3: (0.10, 0.50, 0.90),
    4: (0.05, 0.35, 0.65, 0.95),
    5: (0.05, 0.275, 0.50, 0.725, 0.95),
    6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
    7: (0.025, 0.1833, 0.3417, 0.50, 0.6583, 0.8167, 0.975),
}


def knot_quantiles(k: int) -> tuple[float, ...]:
    if k in KNOT_QUANTILES:
        return KNOT_QUANTILES[k]
    return tuple(float(q) for q in np.linspace(0.05, 0.95, k))


@dataclass(frozen=True)
class PlanContext:
    """What every query builder needs: the spec, its checked inputs and the dialect."""

    spec: ModelSpec
    inputs: Inputs
    dialect: Dialect
    #: on a compressed table: the column holding how many source rows each row stands for
    row_count: str | None = None
    #: rows are folded design rows carrying deviance and Pearson constants (folded_rows_query)
    folded: bool = False
    #: the internal rescaling of response, offset and weights (identity: none)
    scaling: Scaling = Scaling()

    def count_rows(self) -> Expr:
        """COUNT(*) of source rows (SUM of the row-count column on a compressed table)."""
        return S.sum_(S.col(self.row_count)) if self.row_count else S.count_star()

    # -- the source ------------------------------------------------------------------------
    def source(self) -> Expr:
        rel = self.dialect.relation(self.spec.source).copy()
        rel.set("alias", exp.TableAlias(this=S.ident(SRC)))
        return rel

    # -- raw per-row inputs ----------------------------------------------------------------
    def raw_response(self) -> Expr:
        y = S.col(self.inputs.response)
        if self.inputs.response_kind == "boolean":
            return S.case([(y, S.num(1.0))], S.num(0.0))
        return S.as_double(y)

    def raw_trials(self) -> Expr | None:
        return S.as_double(self.inputs.trials.copy()) if self.inputs.trials is not None else None

    def raw_weight(self) -> Expr | None:
        w = self.inputs.weight
        return S.as_double(w.copy()) if w is not None else None

    def raw_freq(self) -> Expr | None:
        f = self.inputs.frequency_weight
        return S.as_double(f.copy()) if f is not None else None

    def raw_offset(self) -> Expr | None:
        o = self.inputs.offset
        return S.as_double(o.copy()) if o is not None else None

    def kept_conditions(self) -> list[Expr]:
        """One NOT NULL condition per model column and model expression."""
        conds = [S.not_(S.is_null(S.col(c))) for c in self.inputs.model_columns]
        for e in (
            self.inputs.offset,
            self.inputs.weight,
            self.inputs.frequency_weight,
            self.inputs.trials,
        ):
            if e is not None:
                conds.append(S.not_(S.is_null(e.copy())))
        return conds

    def kept(self) -> Expr:
        """Rows with no NULL in any model column or model expression."""
        return S.and_(*self.kept_conditions())

    def kept_parts(self, keys: Sequence[str]) -> tuple[Expr, Expr]:
        """:meth:`kept` split in two: the conditions on ``keys`` alone, and the rest."""
        on_keys: list[Expr] = []
        rest: list[Expr] = []
        for c in self.kept_conditions():
            (on_keys if set(S.referenced_columns(c)) <= set(keys) else rest).append(c)
        return S.and_(*on_keys), S.and_(*rest)

    def null_items(self) -> list[tuple[str, Expr]]:
        """(label, expression) for every input whose NULLs exclude a row."""
        items: list[tuple[str, Expr]] = [(c, S.col(c)) for c in self.inputs.model_columns]
        for label, e in (
            ("offset", self.inputs.offset),
            ("weight", self.inputs.weight),
            ("frequency_weight", self.inputs.frequency_weight),
            ("trials", self.inputs.trials),
        ):
            if e is not None:
                items.append((f"{label} expression", e.copy()))
        return items

    # -- derived per-row quantities --------------------------------------------------------
    def observed_response(self) -> Expr:
        """y as observed: the response, as a proportion for grouped binomial data."""
        y = self.raw_response()
        t = self.raw_trials()
        if t is None:
            return y
        return S.case([(S.gt(t, S.num(0.0)), S.div(y, t))], S.num(0.0))

    def response(self) -> Expr:
        """y as the scans fit it: :meth:`observed_response` shifted and scaled by
        :attr:`scaling` (y' = (y - shift) * factor)."""
        y = self.observed_response()
        sc = self.scaling
        if sc.shift != 0.0:
            y = S.sub(y, S.num(sc.shift))
        return S.mul(y, S.num(sc.factor)) if sc.factor != 1.0 else y

    def prior_weight(self) -> Expr:
        parts = [e for e in (self.raw_trials(), self.raw_weight()) if e is not None]
        if self.scaling.weight_factor != 1.0:
            parts.append(S.num(self.scaling.weight_factor))
        return S.mul(*parts) if parts else S.num(1.0)

    def freq_weight(self) -> Expr | None:
        """The frequency weight as the scans use it (times :attr:`scaling`'s factor)."""
        f = self.raw_freq()
        if f is None or self.scaling.freq_factor == 1.0:
            return f
        return S.mul(f, S.num(self.scaling.freq_factor))

    def offset(self) -> Expr | None:
        """The offset as the scans use it: on a power link's rescaled eta scale."""
        o = self.raw_offset()
        if o is None or self.scaling.coef_factor == 1.0:
            return o
        return S.mul(o, S.num(self.scaling.coef_factor))

    def value_sql(
        self, v: Value, knots: dict[str, tuple[float, ...]] | None = None, standardized: bool = True
    ) -> Expr:
        """The per-row value v (a product of numeric columns or a spline basis function)."""
        if v.basis is None:
            raw = S.mul(*(S.as_double(S.col(c)) for c in v.numerics))
        else:
            raw = spline_basis_sql(
                S.as_double(S.col(v.numerics[0])), (knots or {})[v.numerics[0]], v.basis
            )
        if not standardized:
            return raw
        if v.centered:
            raw = S.sub(raw, S.num(v.center))
        return S.div(raw, S.num(v.scale)) if v.scale != 1.0 else raw


def spline_basis_sql(x: Expr, knots: Sequence[float], j: int) -> Expr:
    """Restricted cubic spline basis function j (1 <= j <= k-2), linear beyond the outer knots.

    Truncated-power form (Stone & Koo 1985; Harrell, *Regression Modeling Strategies*, 2.4.5),
    divided by (t_k - t_1)^2 so the basis has the scale of x.
    """
    t = list(knots)
    k = len(t)
    tj, tk1, tk = t[j - 1], t[k - 2], t[k - 1]

    def cube_plus(c: float) -> Expr:
        d = S.greatest(S.sub(x, S.num(c)), S.num(0.0))
        return S.mul(d, d, d)

    a = cube_plus(tj)
    b = S.mul(cube_plus(tk1), S.num((tk - tj) / (tk - tk1)))
    c = S.mul(cube_plus(tk), S.num((tk1 - tj) / (tk - tk1)))
    return S.div(S.add(S.sub(a, b), c), S.num((tk - t[0]) ** 2))


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
        for i, q in enumerate(knot_quantiles(k)):
            cols.append(S.alias(ctx.dialect.quantile(finite_x.copy(), q), f"k_{c}_{i}"))
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
                    f"column {name!r} has values outside",
                    op(y, S.num(fam.y_min)),
                )
            )
        if fam.y_max is not None:
            checks.append(
                (
                    f"family {fam.name!r} needs a response <= {fam.y_max:g}; "
                    f"column {name!r} has values outside",
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


# Names of columns that sit next to the source's own columns (SELECT *, or the key columns)
# carry the reserved prefix, which resolve_inputs refuses in source columns: no collision.
KEPT = RESERVED_PREFIX + "kept"
FREQ = RESERVED_PREFIX + "freq"
ROWCOUNT = RESERVED_PREFIX + "rows"
SAMPLE_ROWS = 100_000


def _r(name: str) -> str:
    """An internal column name (reserved prefix: no source column can take it)."""
    return RESERVED_PREFIX + name


FOLD_Y, FOLD_PW, FOLD_F = (RESERVED_PREFIX + n for n in ("y", "pw", "f"))
FOLD_DCONST, FOLD_Q = RESERVED_PREFIX + "dconst", RESERVED_PREFIX + "q"
SAMPLE_COUNT = RESERVED_PREFIX + "c"


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
    columns when the offset cannot be folded into the weights."""
    inputs = ctx.inputs
    out = [*inputs.factors, *inputs.numerics]
    if inputs.offset is not None and not folds_offset(ctx):
        out += S.referenced_columns(inputs.offset)
    seen: list[str] = []
    for c in out:
        if c not in seen:
            seen.append(c)
    return seen


def sample_distinct_query(ctx: PlanContext) -> exp.Select:
    """Distinct design rows among the first kept rows: ``d`` distinct of ``s`` sampled."""
    keys = [S.col(c) for c in key_columns(ctx)]
    picked = [k.copy() for k in keys] or [S.alias(exp.Literal.number(1), _r("one"))]
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
    reading there). The low end is a value of a kept row, the point the profile takes
    moments about; the width sets the power of two that keeps those moments (and, for the
    response, the fit) far from overflow."""
    cols = [S.alias(ctx.value_sql(v, knots, standardized=False), v.alias) for v in values[1:]]
    cols.append(S.alias(ctx.observed_response(), RESPONSE_KEY))
    head = S.select(cols, ctx.source(), where=ctx.kept()).limit(HEAD_ROWS, copy=False)
    out: list[Expr] = []
    for alias in [*(v.alias for v in values[1:]), RESPONSE_KEY]:
        out += [
            S.alias(S.min_(S.col(alias)), f"{alias}_lo"),
            S.alias(S.max_(S.col(alias)), f"{alias}_hi"),
        ]
    return S.select(out, S.subquery(head, "head"))


_AGGS = {"sum": S.sum_, "psum": S.psum, "min": S.min_, "max": S.max_, "mean": S.avg}


def _atoms(
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
        (_r("a_off"), inputs.offset),
        (_r("a_w"), inputs.weight),
        (_r("a_fw"), inputs.frequency_weight),
        (_r("a_t"), inputs.trials),
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
    atoms, rewrite = _atoms(ctx)
    kept = S.col(KEPT)
    cols: list[Expr] = []
    for it in items:
        if it.agg == "count":
            agg = S.sum_(S.flag(kept.copy())) if it.kept else S.count_star()
        elif it.agg == "nulls":
            agg = S.sub(S.count_star(), exp.Count(this=rewrite(it.arg)))
        else:
            arg = rewrite(it.arg)
            agg = _AGGS[it.agg](S.case([(kept.copy(), arg)]) if it.kept else arg)
        cols.append(S.alias(agg, it.alias))
    with_atoms = S.select([exp.Star(), *atoms], ctx.source())
    inner = S.select([exp.Star(), S.alias(rewrite(ctx.kept()), KEPT)], S.subquery(with_atoms, "pa"))
    return S.select(cols, S.subquery(inner, "p"))


# -- the compressed route: fold first, profile the fold ----------------------------------------

FOLD_ROWS, FOLD_OK, FOLD_BAD, FOLD_NK_NULL = _r("nrows"), _r("ok"), _r("bad"), _r("nk_null")


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
    hoist = [(_r("a_yg"), S.greatest(y_raw, S.num(1e-300))), (_r("a_y"), y_raw.copy())]
    if ctx.scaling.response_changed:
        hoist.append((_r("a_yt"), ctx.response()))
    atoms, rewrite = _atoms(ctx, hoist)
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
        extra.append(S.alias(S.case([(ok.copy(), rewrite(e_row))]), _r("e")))
        e = S.col(_r("e"))
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
        stage = S.select(
            [
                exp.Star(),
                S.alias(rewrite(fw_row), _r("fw")),
                S.alias(rewrite(y), _r("fy")),
                # y for h(y) only where the row is inside the domain (ln of y <= 0 is an error)
                S.alias(S.case([(ok.copy(), rewrite(y))]), _r("hy")),
            ],
            S.subquery(stage, "fold_c"),
        )
        w, yf = S.col(_r("fw")), S.col(_r("fy"))
        h = fam.deviance_h_sql(S.col(_r("hy")))
        cols += [
            S.alias(S.psum(rewrite(f)) if f is not None else S.count_star(), _r("sf")),
            S.alias(S.psum(w), _r("sw")),
            S.alias(S.psum(S.mul(w.copy(), yf)), _r("sy")),
            S.alias(S.psum(S.mul(w.copy(), yf.copy(), yf.copy())), _r("sy2")),
            S.alias(S.psum(S.mul(w.copy(), h)), _r("sh")),
        ]
    for i, it in enumerate(items):
        if it.agg == "count" or it.detail or _key_only(it.arg, keys):
            continue
        arg = rewrite(it.arg)
        if it.agg == "nulls":
            cols.append(S.alias(S.sub(S.count_star(), exp.Count(this=arg)), _r(f"p{i}")))
        elif it.agg == "mean":
            cols.append(S.alias(S.psum(arg), _r(f"p{i}")))
            cols.append(S.alias(exp.Count(this=arg.copy()), _r(f"c{i}")))
        else:
            cols.append(S.alias(_AGGS[it.agg](arg), _r(f"p{i}")))
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
                agg = _AGGS[it.agg](S.case([(some, it.arg.copy())]))
            else:
                weighted = S.case([(some, S.mul(mult.copy(), it.arg.copy()))])
                agg = (S.sum_ if it.agg == "sum" else S.psum)(weighted)
                if it.agg == "mean":
                    agg = _ratio(agg, S.sum_(mult))
        else:
            part = S.col(_r(f"p{i}"))
            if it.kept:
                part = S.case([(ok_group.copy(), part)])
            if it.agg == "nulls":
                agg = S.sum_(part)
            elif it.agg == "mean":
                count = S.col(_r(f"c{i}"))
                if it.kept:
                    count = S.case([(ok_group.copy(), count)])
                agg = _ratio(S.psum(part), S.sum_(count))
            else:
                agg = _AGGS[it.agg](part)
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
    sf, sw, sy = S.col(_r("sf")), S.col(_r("sw")), S.col(_r("sy"))
    pos = S.gt(sw, S.num(0.0))
    ybar = S.case([(pos, S.div(sy, sw.copy()))], S.num(0.0))
    fold_pw = S.case([(S.gt(sf.copy(), S.num(0.0)), S.div(sw.copy(), sf.copy()))], S.num(0.0))
    dconst = S.sub(S.col(_r("sh")), S.mul(sw.copy(), fam.deviance_h_sql(ybar.copy())))
    q = S.sub(S.col(_r("sy2")), S.div(S.mul(sy.copy(), sy.copy()), sw.copy()))
    return S.select(
        [
            *(S.col(k) for k in keys),
            S.alias(S.as_double(sf.copy()), FOLD_F),
            S.alias(fold_pw, FOLD_PW),
            S.alias(ybar, FOLD_Y),
            S.alias(S.case([(pos.copy(), dconst)], S.num(0.0)), FOLD_DCONST),
            S.alias(S.case([(pos.copy(), q)], S.num(0.0)), FOLD_Q),
            S.alias(S.col(FOLD_ROWS), ROWCOUNT),
        ],
        table,
        where=S.and_(key_cond, S.col(FOLD_OK)),
    )


def detail_items(
    ctx: PlanContext, items: Sequence[ProfileItem], keys: Sequence[str] | None = None
) -> list[ProfileItem]:
    """The detail items the fold left out (those that read more than the keys)."""
    keys = key_columns(ctx) if keys is None else keys
    return [it for it in items if it.detail and not _key_only(it.arg, keys)]


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


# -- the per-row stages of the IRLS scan -------------------------------------------------------


def rows_select(ctx: PlanContext, design: Design) -> exp.Select:
    """Stage r: factor levels as text, standardized values, y, pw, fw, off (kept rows)."""
    knots = dict(design.knots)
    cols: list[Expr] = [S.alias(S.level_text(S.col(f.column)), f.alias) for f in design.factors]
    cols += [S.alias(ctx.value_sql(v, knots), v.alias) for v in design.values[1:]]
    cols += [
        S.alias(ctx.response(), "y"),
        S.alias(ctx.prior_weight(), "pw"),
        S.alias(ctx.freq_weight() or S.num(1.0), "fw"),
        S.alias(ctx.offset() or S.num(0.0), "off"),
    ]
    t = ctx.raw_trials()
    if t is not None:
        cols.append(S.alias(t, "nt"))
    if ctx.folded:
        # sums of f pw (...) over the folded rows: rescaled with the weights
        wf = ctx.scaling.weight_factor * ctx.scaling.freq_factor
        consts = [S.col(FOLD_DCONST), S.col(FOLD_Q)]
        if wf != 1.0:
            consts = [S.mul(c, S.num(wf)) for c in consts]
        cols += [S.alias(consts[0], "dconst"), S.alias(consts[1], "q")]
    return S.select(cols, ctx.source(), where=ctx.kept())


def _passthrough(design: Design, extra: Sequence[str] = ()) -> list[Expr]:
    names = [f.alias for f in design.factors] + [v.alias for v in design.values[1:]]
    names += ["y", "pw", "fw", "off", *extra]
    return [S.col(n) for n in names]


MAX_CELL_JOIN = 50_000  # above this many observed cells, join one table per factor set


def _cell_table(
    design: Design, beta: np.ndarray, cells: Sequence[tuple[str, ...]]
) -> tuple[list[int], list[tuple[tuple[str, ...], list[float]]]]:
    """Per observed cell (one level of every factor) the summed factor coefficients, one
    column per value they multiply; cells whose coefficients are all 0 are left out."""
    arr = np.array(cells, dtype=object).reshape(len(cells), len(design.factors))
    codes = [level_codes(f.levels, arr[:, i]) for i, f in enumerate(design.factors)]
    groups = column_groups(design)
    vals = sorted({g.value for g in groups if g.factors})
    vpos = {v: i for i, v in enumerate(vals)}
    coef = np.zeros((len(cells), len(vals)))
    for g, where in zip(groups, cell_columns(design, codes), strict=True):
        if g.factors:
            hit = where >= 0
            coef[hit, vpos[g.value]] += beta[where[hit]]
    rows = [
        (tuple(str(x) for x in arr[i]), coef[i].tolist())
        for i in np.flatnonzero(np.any(coef != 0.0, axis=1))
    ]
    return vals, rows


def _values_table(name: str, colnames: list[str], rows: list[exp.Tuple]) -> exp.Values:
    return exp.Values(
        expressions=rows,
        alias=exp.TableAlias(this=S.ident(name), columns=[S.ident(n) for n in colnames]),
    )


def _eta_from_beta(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray,
    cells: Sequence[tuple[str, ...]] | None = None,
) -> exp.Select:
    """Stage e: eta = off + X beta; factor parts come from small VALUES tables.

    With the observed ``cells`` known (after the first scan), one table keyed by the whole
    cell is joined; otherwise one table per factor set.
    """
    r = ROWS
    terms: list[Expr] = [S.col("off", r)]
    groups: dict[tuple[int, ...], list[int]] = {}
    for j, c in enumerate(design.columns):
        b = float(beta[j])
        if c.factors:
            groups.setdefault(c.factors, []).append(j)
            continue
        if b == 0.0:
            continue
        v = S.num(b) if c.value == 0 else S.mul(S.num(b), S.col(design.values[c.value].alias, r))
        terms.append(v)
    joins: list[tuple[Expr, Expr]] = []
    if groups and cells is not None and 0 < len(cells) <= MAX_CELL_JOIN:
        vals, table_rows = _cell_table(design, beta, cells)
        if table_rows:
            nf = len(design.factors)
            rows = [
                exp.Tuple(expressions=[*(S.text(lv) for lv in lv_t), *(S.num(x) for x in co)])
                for lv_t, co in table_rows
            ]
            colnames = [f"l{i}" for i in range(nf)] + [f"c{v}" for v in vals]
            on = S.and_(
                *(
                    S.eq(S.col(f.alias, r), S.col(f"l{i}", "k"))
                    for i, f in enumerate(design.factors)
                )
            )
            joins.append((_values_table("k", colnames, rows), on))
            for v in vals:
                coef = exp.Coalesce(this=S.col(f"c{v}", "k"), expressions=[S.num(0.0)])
                terms.append(coef if v == 0 else S.mul(coef, S.col(design.values[v].alias, r)))
        groups = {}
    for g, (fset, idx) in enumerate(groups.items()):
        vals = sorted({design.columns[j].value for j in idx})
        table: dict[tuple[str, ...], dict[int, float]] = {}
        for j in idx:
            c = design.columns[j]
            table.setdefault(c.levels, {})[c.value] = float(beta[j])
        kname = f"k{g}"
        rows = [
            exp.Tuple(
                expressions=[
                    *(S.text(lv) for lv in lvls),
                    *(S.num(coefs.get(v, 0.0)) for v in vals),
                ]
            )
            for lvls, coefs in sorted(table.items())
        ]
        colnames = [f"l{i}" for i in range(len(fset))] + [f"c{v}" for v in vals]
        values = exp.Values(
            expressions=rows,
            alias=exp.TableAlias(this=S.ident(kname), columns=[S.ident(n) for n in colnames]),
        )
        on = S.and_(
            *(
                S.eq(S.col(design.factors[fi].alias, r), S.col(f"l{i}", kname))
                for i, fi in enumerate(fset)
            )
        )
        joins.append((values, on))
        for v in vals:
            coef = exp.Coalesce(this=S.col(f"c{v}", kname), expressions=[S.num(0.0)])
            terms.append(coef if v == 0 else S.mul(coef, S.col(design.values[v].alias, r)))
    q = S.select(
        [
            *(S.col(c.name, r) for c in _passthrough(design, _extra_row_cols(ctx))),
            S.alias(S.add(*terms), "eta"),
        ],
        S.subquery(rows_select(ctx, design), r),
    )
    for values, on in joins:
        q = q.join(values, on=on, join_type="left", copy=False)
    return q


def _extra_row_cols(ctx: PlanContext) -> list[str]:
    out = ["nt"] if ctx.raw_trials() is not None else []
    return out + (["dconst", "q"] if ctx.folded else [])


def _folded_dev(ctx: PlanContext, dev: Expr) -> Expr:
    """Add a folded row's deviance constant (0 on ordinary rows)."""
    return S.add(dev, S.col("dconst")) if ctx.folded else dev


def _eta_start(ctx: PlanContext, design: Design, ybar: float) -> exp.Select:
    """Stage e for the first scan: eta = g(mu0) from the family's standard start."""
    fam, link = ctx.spec.family, ctx.spec.link
    y, pw = S.col("y"), S.col("pw")
    if ctx.scaling.weight_factor != 1.0:
        # the start (binomial's uses the weight) as without the internal rescaling
        pw = S.div(pw, S.num(ctx.scaling.weight_factor))
    mu0 = fam.start_sql(y, pw, ybar)
    needs_positive = (
        link.positive_mean or link.eta_ok(S.col("eta")) is not None or fam.positive_mean
    ) and not fam.unit_mean
    if needs_positive:
        fallback = ybar if ybar > 0 else 1.0
        mu0 = S.case([(S.gt(mu0, S.num(0.0)), mu0)], S.num(fallback))
    if fam.unit_mean:
        mu0 = S.clamp(mu0, 1e-6, 1 - 1e-6)
    eta0 = link.link_sql(mu0)
    return S.select(
        [*_passthrough(design, _extra_row_cols(ctx)), S.alias(eta0, "eta")],
        S.subquery(rows_select(ctx, design), ROWS),
    )


def _mean_stage(ctx: PlanContext, design: Design, eta_stage: exp.Select) -> exp.Select:
    """Stage m: safe eta, raw and clamped mean, and the 'bad row' flag."""
    fam, link = ctx.spec.family, ctx.spec.link
    eta = S.col("eta")
    ok_eta = link.eta_ok(eta)
    safe = S.case([(ok_eta, eta)], S.num(link.safe_eta)) if ok_eta is not None else eta
    inner = S.select(
        [
            *_passthrough(design, [*_extra_row_cols(ctx), "eta"]),
            S.alias(safe, "seta"),
            S.alias(
                S.flag(S.not_(ok_eta)) if ok_eta is not None else exp.Literal.number(0), "eta_bad"
            ),
        ],
        S.subquery(eta_stage, "e"),
    )
    mid = S.select(
        [
            *_passthrough(design, [*_extra_row_cols(ctx), "eta", "seta", "eta_bad"]),
            S.alias(link.inverse_sql(S.col("seta")), "mu_raw"),
        ],
        S.subquery(inner, "e1"),
    )
    mu_raw = S.col("mu_raw")
    mu_ok = fam.mu_ok(mu_raw, link)
    bad_conds = [S.gt(S.col("eta_bad"), exp.Literal.number(0)), S.not_(S.is_finite(mu_raw))]
    if mu_ok is not None:
        bad_conds.append(S.not_(mu_ok))
    bad = S.flag(S.or_(*bad_conds))
    safe_mu = S.case([(S.is_finite(mu_raw), mu_raw)], S.num(1.0 if not fam.unit_mean else 0.5))
    return S.select(
        [
            *_passthrough(design, [*_extra_row_cols(ctx), "eta", "seta"]),
            S.alias(bad, "bad"),
            S.alias(fam.clamp_mu_sql(safe_mu), "mu"),
        ],
        S.subquery(mid, "m0"),
    )


def _null_stage(ctx: PlanContext, design: Design, mean_stage: exp.Select, b0: float) -> exp.Select:
    """Add the intercept-only model's mean (eta = offset + b0) next to the fitted model's,
    so the null model with an offset is fitted in the same scans."""
    fam, link = ctx.spec.family, ctx.spec.link
    e0 = S.add(S.col("off"), S.num(b0))
    mu0 = fam.clamp_mu_sql(link.inverse_sql(e0))
    keep = _passthrough(design, [*_extra_row_cols(ctx), "eta", "seta", "bad", "mu"])
    inner = S.select([*keep, S.alias(mu0, "n_mu")], S.subquery(mean_stage, "nm"))
    keep = _passthrough(design, [*_extra_row_cols(ctx), "eta", "seta", "bad", "mu", "n_mu"])
    n_mu = S.col("n_mu")
    return S.select(
        [
            *keep,
            S.alias(link.mu_eta_sql(S.add(S.col("off"), S.num(b0)), n_mu), "n_dmu"),
            S.alias(fam.variance_sql(n_mu), "n_var"),
        ],
        S.subquery(inner, "nm1"),
    )


def _null_extras(ctx: PlanContext, b0: float) -> list[tuple[str, Expr]]:
    """Per-row sums of the intercept-only IRLS step and its deviance."""
    fam = ctx.spec.family
    y, pw, fw = S.col("y"), S.col("pw"), S.col("fw")
    n_mu, n_dmu, n_var = S.col("n_mu"), S.col("n_dmu"), S.col("n_var")
    w0 = S.div(S.mul(pw, n_dmu, n_dmu), n_var)
    step = S.case([(S.ne(n_dmu, S.num(0.0)), S.div(S.sub(y, n_mu), n_dmu))], S.num(0.0))
    z0 = S.add(S.num(b0), step)
    return [
        ("fnullw", S.mul(fw, w0)),
        ("fnullwz", S.mul(fw, w0.copy(), z0)),
        ("fnulldev", _folded_dev(ctx, S.mul(fw, pw, fam.unit_deviance_sql(y, n_mu)))),
    ]


NULL_COLUMNS = ("n_mu", "n_dmu", "n_var")


def _work_stage(
    ctx: PlanContext,
    design: Design,
    mean_stage: exp.Select,
    extra: Sequence[tuple[str, Expr]] = (),
    keep: Sequence[str] = (),
) -> exp.Select:
    """Stage w: working weight and response, deviance and Pearson contributions."""
    fam, link = ctx.spec.family, ctx.spec.link
    y, mu, pw, fw = S.col("y"), S.col("mu"), S.col("pw"), S.col("fw")
    dmu = link.mu_eta_sql(S.col("seta"), mu)
    inner = S.select(
        [
            *_passthrough(design, [*_extra_row_cols(ctx), "eta", "bad", "mu", *keep]),
            S.alias(dmu, "dmu"),
            S.alias(fam.variance_sql(mu), "var"),
        ],
        S.subquery(mean_stage, "m"),
    )
    dmu_c, var = S.col("dmu"), S.col("var")
    w = S.div(S.mul(pw, dmu_c, dmu_c), var)
    step = S.case([(S.ne(dmu_c, S.num(0.0)), S.div(S.sub(y, mu), dmu_c))], S.num(0.0))
    z = S.add(S.sub(S.col("eta"), S.col("off")), step)
    resid = S.sub(y, mu)
    cols = [
        *(S.col(f.alias) for f in design.factors),
        *(S.col(v.alias) for v in design.values[1:]),
        S.alias(S.mul(fw, w), "fww"),
        S.alias(S.mul(fw, w, z), "fwwz"),
        S.alias(_folded_dev(ctx, S.mul(fw, pw, fam.unit_deviance_sql(y, mu))), "fdev"),
        S.alias(
            S.div(
                S.add(S.mul(fw, pw, resid, resid), S.col("q"))
                if ctx.folded
                else S.mul(fw, pw, resid, resid),
                var,
            ),
            "fpear",
        ),
        S.col("bad"),
        S.col("fw"),
    ]
    cols += [S.alias(e, name) for name, e in extra]
    return S.select(cols, S.subquery(inner, "w0"))


def gram_query(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray | None,
    *,
    ybar: float,
    null_mu: Expr | None = None,
    cells: Sequence[tuple[str, ...]] | None = None,
    null_intercept: float | None = None,
) -> exp.Select:
    """The IRLS scan: all sums for X'WX, X'Wz, deviance and Pearson, grouped by factor cells.

    ``beta`` are the standardized coefficients (None: the family's starting means).
    ``null_mu`` adds ``nulldev``, the deviance at a per-row null-model mean;
    ``null_intercept`` adds ``nullw``, ``nullwz`` and ``nulldev``: one IRLS step of the
    intercept-only model with the offset, at that intercept.
    """
    eta = (
        _eta_start(ctx, design, ybar) if beta is None else _eta_from_beta(ctx, design, beta, cells)
    )
    mean = _mean_stage(ctx, design, eta)
    extra: list[tuple[str, Expr]] = []
    keep: tuple[str, ...] = ()
    if null_intercept is not None:
        mean = _null_stage(ctx, design, mean, null_intercept)
        extra += _null_extras(ctx, null_intercept)
        keep = NULL_COLUMNS
    elif null_mu is not None:
        fam = ctx.spec.family
        extra.append(
            (
                "fnulldev",
                _folded_dev(
                    ctx, S.mul(S.col("fw"), S.col("pw"), fam.unit_deviance_sql(S.col("y"), null_mu))
                ),
            )
        )
    if ctx.spec.family.unit_mean:
        extra += edge_counts()
    work = _work_stage(ctx, design, mean, extra, keep)
    vals = [None, *(S.col(v.alias) for v in design.values[1:])]
    aggs: list[Expr] = []
    m = len(design.values)
    for a in range(m):
        for b in range(a, m):
            prod = [S.col("fww")] + [vals[i] for i in (a, b) if i]
            aggs.append(S.alias(S.psum(S.mul(*prod)), f"s_{a}_{b}"))
    for a in range(m):
        prod = [S.col("fwwz")] + ([vals[a]] if a else [])
        aggs.append(S.alias(S.psum(S.mul(*prod)), f"t_{a}"))
    aggs += [
        S.alias(S.psum(S.col("fdev")), "dev"),
        S.alias(S.psum(S.col("fpear")), "pear"),
        S.alias(S.sum_(S.col("bad")), "bad"),
        S.alias(S.count_star(), "n"),
        S.alias(S.psum(S.col("fw")), "nw"),
    ]
    for name, _ in extra:
        aggs.append(S.alias(S.psum(S.col(name)), name.replace("f", "", 1)))
    groups = [S.col(f.alias) for f in design.factors]
    return S.select([*groups, *aggs], S.subquery(work, "w"), group_by=groups)


EDGE = 10 * 2.220446049250313e-16  # fitted probabilities numerically 0 or 1 (common practice)
NEAR_EDGE = 1e-8  # with huge standard errors, this close to 0 or 1 also signals separation


def edge_counts() -> list[tuple[str, Expr]]:
    """Per-row terms counting (frequency-weighted) rows whose fitted probability lies within
    ``EDGE`` and ``NEAR_EDGE`` of 0 or 1: the separation check rides in every binomial scan,
    so the last one answers it at the final coefficients without a scan of its own."""
    mu = S.col("mu")

    def count(limit: float) -> Expr:
        cond = S.and_(
            S.gt(S.col("pw"), S.num(0.0)),
            S.or_(S.le(mu.copy(), S.num(limit)), S.ge(mu.copy(), S.num(1 - limit))),
        )
        return S.case([(cond, S.col("fw"))], S.num(0.0))

    return [("fedge", count(EDGE)), ("fnear", count(NEAR_EDGE))]


def loglik_query(
    ctx: PlanContext, design: Design, beta: np.ndarray, dispersion: float
) -> exp.Select | None:
    """Sum of per-row log-likelihood at the fitted means (None if the family has none)."""
    fam = ctx.spec.family
    mean = _mean_stage(ctx, design, _eta_from_beta(ctx, design, beta))
    trials = S.col("nt") if ctx.raw_trials() is not None else None
    ll = fam.log_likelihood_sql(S.col("y"), S.col("mu"), S.col("pw"), dispersion, trials)
    if ll is None:
        return None
    guarded = S.case([(S.gt(S.col("pw"), S.num(0.0)), S.mul(S.col("fw"), ll))], S.num(0.0))
    return S.select([S.alias(S.psum(guarded), "ll")], S.subquery(mean, "m"))


def theta_query(ctx: PlanContext, design: Design, beta: np.ndarray, theta: float) -> exp.Select:
    """Sums for a Newton step on the negative binomial theta at fixed means.

    ``a`` = sum(c [ln(theta+mu) + (y+theta)/(theta+mu)]), ``b`` = sum(c [1/(theta+mu) +
    (mu-y)/(theta+mu)^2]) and ``mom`` = sum(c (y/mu - 1)^2), with c = f * pw.
    """
    mean = _mean_stage(ctx, design, _eta_from_beta(ctx, design, beta))
    y, mu = S.col("y"), S.col("mu")
    c = S.mul(S.col("fw"), S.col("pw"))
    th = S.num(theta)
    tm = S.add(th, mu)
    a = S.mul(c, S.add(S.ln(tm), S.div(S.add(y, th), tm)))
    b = S.mul(c, S.add(S.div(S.num(1.0), tm), S.div(S.sub(mu, y), S.mul(tm, tm))))
    r = S.sub(S.div(y, mu), S.num(1.0))
    mom = S.mul(c, r, r)
    return S.select(
        [S.alias(S.psum(a), "a"), S.alias(S.psum(b), "b"), S.alias(S.psum(mom), "mom")],
        S.subquery(mean, "m"),
    )


def response_histogram_query(ctx: PlanContext, design: Design) -> exp.Select:
    """Distinct response values with their summed weights f * pw."""
    rows = S.subquery(rows_select(ctx, design), ROWS)
    return S.select(
        [S.alias(S.col("y"), "y"), S.alias(S.psum(S.mul(S.col("fw"), S.col("pw"))), "c")],
        rows,
        group_by=[S.col("y")],
    )


def offset_null_mu(ctx: PlanContext) -> Expr:
    """Per-row null mean without intercept: the inverse link of the offset (clamped)."""
    fam, link = ctx.spec.family, ctx.spec.link
    return fam.clamp_mu_sql(link.inverse_sql(S.col("off")))


def finite(x: float) -> bool:
    return math.isfinite(x)


# -- the log-link scan: factor effects multiplied in after the scan ---------------------------

LOG_ETA_MAX = 700.0  # exp overflows a double past ~709
#: the log-link scan's sums that do not depend on the coefficients (first scan only)
LOG_SCAN_CONSTANTS = ("h", "cy", "cw", "co", "cp", "n1", "n2", "noff")


def log_scan_applies(ctx: PlanContext, design: Design) -> bool:
    """Whether :func:`log_scan_query` can stand for :func:`gram_query`: a log link, a
    variance function mu^p, row-level data (not folded), and factor terms that only shift
    eta by a constant per cell (main effects and factor x factor interactions; a factor x
    numeric slope varies within a cell)."""
    return (
        ctx.spec.link.name == "log"
        and ctx.spec.family.variance_power is not None
        and not ctx.folded
        and ctx.raw_trials() is None
        and all(c.value == 0 for c in design.columns if c.factors)
    )


def log_scan_query(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray,
    *,
    gram: bool,
    response: bool,
    constants: bool,
    off_center: float = 0.0,
) -> exp.Select:
    """The IRLS scan of a log-link, V(mu) = mu^p model without a join to factor effects.

    With g_c the cell's summed factor coefficients and t = off + x'b the rest of eta, the
    mean is mu = e^(g_c) m with m = e^t, so every weight is a power of m times a power of
    e^(g_c) that is the same for the whole cell. Grouped by cell, the scan sums

    * ``s_a_b`` = sum(f pw m^(2-p) v_a v_b) (``gram``): X'WX is e^((2-p) g_c) times these;
    * ``r_a``   = sum(f pw y m^(1-p) v_a) (``response``): with the above it gives X'Wz;
    * ``pq``    = sum(f pw y^2 m^(-p)): Pearson's chi-squared with the two above;
    * ``bad`` (rows whose t left [-700, 700]), ``n`` and ``nw``;

    and, with ``constants``, the sums that do not depend on the coefficients, with u = off -
    ``off_center`` (the offset's mean: a large constant offset then cancels nowhere): ``h``
    = sum(f pw h(y)) (d(y, mu) = h(y) + a(mu) y + b(mu)), ``cy`` = sum(f pw y), ``cw`` =
    sum(f pw), ``co`` = sum(f pw y u), ``cp`` = sum(f pw u), ``n1`` = sum(f pw y
    e^((1-p) u)) and ``n2`` = sum(f pw e^((2-p) u)) (the intercept-only model with the
    offset in closed form), and ``noff``, the rows whose u is too large for those
    exponentials (the closed form is then not used). For Poisson (p = 1) the ``r_a`` and
    for gamma (p = 2) the ``s_a_b`` do not depend on the coefficients either, so later
    scans leave them out. :func:`indb.logsums.assemble_log_scan` turns the sums into X'WX,
    X'Wz, the deviance and Pearson's chi-squared exactly as :func:`gram_query`'s per-row
    terms would give them.
    """
    fam = ctx.spec.family
    p = float(fam.variance_power)
    terms: list[Expr] = [S.col("off")]
    for j, c in enumerate(design.columns):
        if c.factors or float(beta[j]) == 0.0:
            continue
        b = S.num(float(beta[j]))
        terms.append(b if c.value == 0 else S.mul(b, S.col(design.values[c.value].alias)))
    keep = [S.col(f.alias) for f in design.factors] + [S.col(v.alias) for v in design.values[1:]]
    base = [S.col(n) for n in ("y", "pw", "fw", "off")]
    t = S.col("t")
    staged = S.select(
        [*keep, *base, S.alias(S.add(*terms), "t")], S.subquery(rows_select(ctx, design), ROWS)
    )
    # every exponent below is k t with |k| <= kmax: t within +-700/kmax keeps e^(k t) a
    # finite, non-zero double on every engine (PostgreSQL raises on over- and underflow)
    tmax = log_scan_t_max(p)
    inside = S.and_(S.le(t, S.num(tmax)), S.ge(t.copy(), S.num(-tmax)))
    clamped = S.select(
        [
            *(k.copy() for k in keep),
            *(b.copy() for b in base),
            S.alias(S.flag(S.not_(inside)), "bad"),
            S.alias(S.clamp(t.copy(), -tmax, tmax), "tc"),
        ],
        S.subquery(staged, "lt"),
    )
    y, pw, fw, off, tc = (S.col(n) for n in ("y", "pw", "fw", "off", "tc"))

    def m_pow(k: float, x: Expr) -> Expr:
        """f pw x e^(k t): the row's weight for a power k of m."""
        w = S.mul(fw.copy(), pw.copy(), x) if x is not None else S.mul(fw.copy(), pw.copy())
        if k == 0.0:
            return w
        return S.mul(w, S.exp_(tc.copy() if k == 1.0 else S.mul(S.num(k), tc.copy())))

    cols: list[Expr] = [*(k.copy() for k in keep), S.col("bad"), fw.copy()]
    if gram:
        cols.append(S.alias(m_pow(2.0 - p, None), "q"))
    if response:
        cols.append(S.alias(m_pow(1.0 - p, y.copy()), "r"))
    cols.append(S.alias(m_pow(-p, S.mul(y.copy(), y.copy())), "qq"))
    offset_sums: tuple[str, ...] = ()
    if constants:
        fpw = S.mul(fw.copy(), pw.copy())
        cols += [
            S.alias(S.mul(fpw.copy(), fam.deviance_h_sql(y.copy())), "hh"),
            S.alias(S.mul(fpw.copy(), y.copy()), "cy"),
            S.alias(fpw.copy(), "cw"),
        ]
        if ctx.raw_offset() is not None:  # without one: co = cp = noff = 0, n1 = cy, n2 = cw
            offset_sums = LOG_SCAN_CONSTANTS[3:]
            u = S.sub(off.copy(), S.num(off_center)) if off_center != 0.0 else off.copy()
            far = S.not_(S.and_(S.le(u.copy(), S.num(tmax)), S.ge(u.copy(), S.num(-tmax))))
            cols += [
                S.alias(S.mul(fpw.copy(), y.copy(), u.copy()), "co"),
                S.alias(S.mul(fpw.copy(), u.copy()), "cp"),
                S.alias(_off_power(fpw.copy(), y.copy(), 1.0 - p, u.copy(), tmax), "n1"),
                S.alias(_off_power(fpw.copy(), None, 2.0 - p, u.copy(), tmax), "n2"),
                S.alias(S.flag(far), "noff"),
            ]
    weighted = S.select(cols, S.subquery(clamped, "lm"))
    vals = [None, *(S.col(v.alias) for v in design.values[1:])]
    aggs: list[Expr] = []
    m = len(design.values)
    if gram:
        for a in range(m):
            for b in range(a, m):
                prod = [S.col("q")] + [vals[i] for i in (a, b) if i]
                aggs.append(S.alias(S.psum(S.mul(*prod)), f"s_{a}_{b}"))
    if response:
        for a in range(m):
            prod = [S.col("r")] + ([vals[a]] if a else [])
            aggs.append(S.alias(S.psum(S.mul(*prod)), f"r_{a}"))
    aggs += [
        S.alias(S.psum(S.col("qq")), "pq"),
        S.alias(S.sum_(S.col("bad")), "bad"),
        S.alias(S.count_star(), "n"),
        S.alias(S.psum(S.col("fw")), "nw"),
    ]
    if constants:
        for name, src in (("h", "hh"), ("cy", "cy"), ("cw", "cw"), *((c, c) for c in offset_sums)):
            aggs.append(S.alias(S.psum(S.col(src)), name))
    groups = [S.col(f.alias) for f in design.factors]
    return S.select(
        [*(g.copy() for g in groups), *aggs], S.subquery(weighted, "lw"), group_by=groups
    )


def log_scan_t_max(p: float) -> float:
    """The largest |t| for which e^(k t) stays representable for every power k of m the
    log-link scan uses (2 - p, 1 - p, -p)."""
    return LOG_ETA_MAX / max(1.0, abs(2.0 - p), abs(1.0 - p), abs(p))


def _off_power(fpw: Expr, y: Expr | None, k: float, u: Expr, tmax: float) -> Expr:
    """f pw [y] e^(k u), u clamped like t (an exp that cannot overflow)."""
    w = S.mul(fpw, y) if y is not None else fpw
    if k == 0.0:
        return w
    return S.mul(w, S.exp_(S.mul(S.num(k), S.clamp(u, -tmax, tmax))))
