"""The scans that judge a stored model on rows of a SOURCE (``indb assess``).

Every query reads the same per-row stages (:func:`scored_rows`): the model's mean ``mu``
(offset included) and score (the mean without the offset) from the scoring view's own
expressions, and per row the weight f pw, the actual f pw y, the expected f pw mu, the
deviance f pw d(y, mu) and the exposure (f exp(offset) for a log link with an offset, else
f pw). Four queries:

* the check scan: :func:`indb.plan.profile.profile_query` over :func:`check_items` (rows,
  NULLs per model input, the family's domain checks, weights, and the sums that give the
  constant-rate model in closed form);
* the order scan (:func:`indb.plan.assess_order.order_query`): for each ordered
  :class:`Part` (the score, the actual rate: the best possible ordering, the predicted mean
  of a binomial model with an offset, each numeric column cut into bands) its tie groups,
  a running sum of exposure along its key, hence each group's band (equal exposure, a tie
  group never split) and the sum that gives the Gini; per band its lowest and highest key;
* the band scan (:func:`assess_query`): one GROUP BY GROUPING SETS over the scored rows,
  one grouping set per part: each ordered part's band (its key cut at the bands' highest
  keys, :func:`band_of`) and each categorical column's level, with every sum. One row per
  band and per level comes back;
* the null scan (:func:`null_query`): the constant-rate model's deviance, and one IRLS step
  of it where it has no closed form, over the same rows.

A second model (``--against``, :class:`Against`) is scored in the same scans: its mean and
score sit beside the first model's in :func:`scored_rows`, its expected and deviance are
summed by every grouping set of the band scan, and two more ordered parts order the rows
by its score (its Gini and bands) and by the log-ratio of the two scores (the double-lift
table).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlglot import exp

from indb import sqlexpr as S
from indb.families import Family
from indb.links import Link
from indb.plan.context import PlanContext
from indb.plan.irls_scan import null_mean_sql, null_step_terms
from indb.plan.profile import ProfileItem, domain_checks
from indb.sqlexpr import Expr

#: roles of the grouping sets (:class:`Part`)
SCORE, BEST, MEAN, LEVELS, BANDS = "score", "best", "mean", "levels", "bands"
#: the second model's roles: its score's tie groups, and the log-ratio of the two scores'
AGAINST, RATIO = "against", "ratio"

#: the aggregates every grouping set sums (alias -> stage column), and the null model's
NUMBERS = ("n", "nw", "wt", "ex", "ac", "ep", "dv", "nu")
#: with a second model, also its expected, deviance and rows with an unseen level
AGAINST_NUMBERS = ("ep2", "dv2", "nu2")
NULL_SUMS = ("nd", "nw0", "nwz0")


@dataclass(frozen=True)
class Part:
    """One grouping set of the assessment scan.

    ``role`` is ``score`` (tie groups of the score), ``best`` (of the actual rate, whose
    Lorenz curve bounds the score's), ``mean`` (of the predicted mean: a binomial model's
    calibration when an offset makes it differ from the score), ``against`` (of the second
    model's score), ``ratio`` (of ln(its score) - ln(the first model's score): the
    double-lift table), ``bands`` (a numeric column cut into bands of its values) or
    ``levels`` (a column's levels). The ordered roles are
    cut into ``bands`` bands of equal exposure (of equal weight f pw when ``by_weight``).
    """

    role: str
    column: str | None = None
    bands: int = 1
    by_weight: bool = False

    @property
    def ordered(self) -> bool:
        return self.role != LEVELS


def part_mask(index: int, count: int) -> int:
    """The GROUPING bitmask of part ``index`` among ``count``: a bit per key, the first key
    the most significant, set where the set does not group by the key."""
    return (1 << count) - 1 - (1 << (count - 1 - index))


@dataclass(frozen=True)
class NullModel:
    """The constant-rate model on the same rows (what ``deviance_explained`` compares with):
    a constant ``mean`` (a model without an offset), or eta = offset + ``intercept``, with
    the sums of one IRLS step of it when ``step`` is set."""

    mean: float | None = None
    intercept: float | None = None
    step: bool = False


@dataclass(frozen=True)
class Against:
    """A second model judged in the same scans: its family and link (the family's name and
    the response are the first model's), its linear predictor without the offset, its
    unseen-level count and its offset (a double, or None), as the scoring view has them."""

    family: Family
    link: Link
    score_eta: Expr
    unseen: Expr
    offset: Expr | None = None


@dataclass(frozen=True)
class AssessPlan:
    """What the assessment scans need: the SOURCE with the model's inputs (``ctx``, whose
    spec holds the stored family, link and expressions), the model's linear predictor
    without the offset and its unseen-level count (the scoring view's expressions), the
    columns reported by level and in bands, and the number of bands."""

    ctx: PlanContext
    score_eta: Expr
    unseen: Expr
    levels: tuple[str, ...] = ()
    banded: tuple[str, ...] = ()
    bands: int = 10
    #: level rows fetched per column at most (one more tells that there are too many)
    max_levels: int = 10_000
    #: a second model scored in the same scans (``--against``)
    against: Against | None = None

    @property
    def log_exposure(self) -> bool:
        """Exposure is f exp(offset): a log-link model with an offset."""
        return self.ctx.spec.offset is not None and self.ctx.spec.link.name == "log"

    @property
    def calibration(self) -> str | None:
        """The part a binomial model's calibration table comes from: the score's tie groups
        (equal-weight bands, since exposure is f pw there) or, with an offset, the mean's."""
        if self.ctx.spec.family.name != "binomial":
            return None
        return MEAN if self.ctx.spec.offset is not None else SCORE

    @property
    def parts(self) -> tuple[Part, ...]:
        out = [Part(SCORE, bands=self.bands), Part(BEST)]
        if self.calibration == MEAN:
            out.append(Part(MEAN, bands=self.bands, by_weight=True))
        if self.against is not None:
            out += [Part(AGAINST, bands=self.bands), Part(RATIO, bands=self.bands)]
        out += [Part(BANDS, c, bands=self.bands) for c in self.banded]
        out += [Part(LEVELS, c) for c in self.levels]
        return tuple(out)


# -- the check scan ----------------------------------------------------------------------------


def closed_form_power(plan: AssessPlan) -> float | None:
    """p of V(mu) = mu^p when the constant-rate model with the offset has a closed form
    (a log link): e^b = sum(f pw y e^((1-p) off)) / sum(f pw e^((2-p) off)). None otherwise."""
    spec = plan.ctx.spec
    if spec.offset is None or spec.link.name != "log":
        return None
    return spec.family.variance_power


def _exp(x: Expr) -> Expr:
    # IEEE-754's +inf where exp overflows (PostgreSQL raises): a caller sees a sum that is
    # not finite and takes another route, instead of the scan failing
    return S.IeeeExp(this=x)


def check_items(plan: AssessPlan) -> list[ProfileItem]:
    """The check scan's aggregates (for :func:`indb.plan.profile.profile_query`): rows, rows
    kept (no NULL in a model input), NULLs per input, weight sums, the response's range and
    the domain checks over kept rows, and the sums of the constant-rate model."""
    ctx = plan.ctx
    one = exp.Literal.number(1)
    fw = ctx.raw_freq() or S.num(1.0)
    pw, y = ctx.prior_weight(), ctx.observed_response()
    items = [ProfileItem("n_total", "count", one, kept=False), ProfileItem("n_kept", "count", one)]
    items += [
        ProfileItem(f"null_{i}", "nulls", e, kept=False)
        for i, (_, e) in enumerate(ctx.null_items())
    ]
    items += [
        ProfileItem("sum_f", "psum", fw),
        ProfileItem("sum_fpw", "psum", S.mul(fw.copy(), pw)),
        ProfileItem("sum_fpwy", "psum", S.mul(fw.copy(), pw.copy(), y)),
        ProfileItem("y_min", "min", y.copy(), detail=True),
        ProfileItem("y_max", "max", y.copy(), detail=True),
    ]
    items += [
        ProfileItem(f"chk_{i}", "sum", S.flag(cond), detail=True)
        for i, (_, cond) in enumerate(domain_checks(ctx))
    ]
    off = ctx.raw_offset()
    if off is not None:
        items.append(ProfileItem("off_mean", "mean", off))
    if plan.log_exposure and off is not None:
        items.append(ProfileItem("sum_fe", "psum", S.mul(fw.copy(), _exp(off.copy()))))
    p = closed_form_power(plan)
    if p is not None and off is not None:
        k1, k2 = 1.0 - p, 2.0 - p
        e1 = _exp(S.mul(S.num(k1), off.copy())) if k1 != 0.0 else S.num(1.0)
        e2 = _exp(S.mul(S.num(k2), off.copy())) if k2 != 0.0 else S.num(1.0)
        items += [
            ProfileItem("null_s1", "psum", S.mul(fw.copy(), pw.copy(), y.copy(), e1)),
            ProfileItem("null_s2", "psum", S.mul(fw.copy(), pw.copy(), e2)),
        ]
    return items


# -- the scored rows ---------------------------------------------------------------------------


def _key(i: int) -> str:
    return f"k{i}"


def col_refs(*names: str) -> list[Expr]:
    """Column references by name."""
    return [S.col(n) for n in names]


def scored_rows(plan: AssessPlan, null: NullModel | None = None) -> exp.Select:
    """The SOURCE's rows that have no NULL in a model input and get a valid mean (from both
    models, with ``plan.against``), each with the keys of the parts and its weight, actual,
    expected, deviance, exposure, unseen flag (the second model's expected, deviance and
    unseen flag, and the log-ratio of the scores) and the null model's terms."""
    ctx = plan.ctx
    fam, link = ctx.spec.family, ctx.spec.link
    two = plan.against
    parts = plan.parts
    has_off = ctx.spec.offset is not None
    off2 = two is not None and two.offset is not None
    # stage a: the inputs, the level and band keys, eta without the offset
    keys = []
    for i, part in enumerate(parts):
        if part.role == LEVELS:
            keys.append(S.alias(S.level_text(S.col(part.column)), _key(i)))
        elif part.role == BANDS:
            keys.append(S.alias(S.as_double(S.col(part.column)), _key(i)))
    key_names = [k.alias for k in keys]
    cols: list[Expr] = [
        *keys,
        S.alias(ctx.observed_response(), "y"),
        S.alias(ctx.prior_weight(), "pw"),
        S.alias(ctx.raw_freq() or S.num(1.0), "fw"),
        S.alias(plan.score_eta.copy(), "seta"),
        S.alias(plan.unseen.copy(), "nu"),
    ]
    if has_off:
        cols.append(S.alias(ctx.raw_offset(), "off"))
    if two is not None:
        cols += [S.alias(two.score_eta.copy(), "seta2"), S.alias(two.unseen.copy(), "nu2")]
        if off2:
            cols.append(S.alias(S.as_double(two.offset.copy()), "off2"))
    inputs = S.select(cols, ctx.source(), where=ctx.kept())
    carry = [*key_names, "y", "pw", "fw", "nu", *(["off"] if has_off else [])]
    if two is not None:
        carry.append("nu2")
    # stage b: the mean (offset included) and the score (without it), NULL where eta is
    # not valid (Link.mean_sql, as in the scoring view)
    eta = S.add(S.col("off"), S.col("seta")) if has_off else S.col("seta")
    means: list[Expr] = [
        *col_refs(*carry),
        S.alias(link.mean_sql(eta), "mu"),
        S.alias(link.mean_sql(S.col("seta")), "sc"),
    ]
    if two is not None:
        eta2 = S.add(S.col("off2"), S.col("seta2")) if off2 else S.col("seta2")
        means += [
            S.alias(two.link.mean_sql(eta2), "mu2"),
            S.alias(two.link.mean_sql(S.col("seta2")), "sc2"),
        ]
    # stage c: rows with a valid mean inside the family's range; their sums
    mu, fw, pw, y = S.col("mu"), S.col("fw"), S.col("pw"), S.col("y")
    valid = [S.not_(S.is_null(mu)), S.not_(S.is_null(S.col("sc")))]
    in_range = fam.mu_ok(mu.copy(), link)
    if in_range is not None:
        valid.append(in_range)
    expo = (
        S.mul(fw.copy(), _exp(S.col("off"))) if plan.log_exposure else S.mul(fw.copy(), pw.copy())
    )
    summed = ["mu", "sc"]
    sums: list[Expr] = [
        S.alias(S.mul(fw.copy(), pw.copy()), "wt"),
        S.alias(S.mul(fw.copy(), pw.copy(), y.copy()), "ac"),
        S.alias(S.mul(fw.copy(), pw.copy(), mu.copy()), "ep"),
        S.alias(_deviance(fam, fw, pw, y, mu), "dv"),
        S.alias(expo, "ex"),
    ]
    if two is not None:
        mu2 = S.col("mu2")
        valid += [S.not_(S.is_null(mu2.copy())), S.not_(S.is_null(S.col("sc2")))]
        in_range2 = two.family.mu_ok(mu2.copy(), two.link)
        if in_range2 is not None:
            valid.append(in_range2)
        summed += ["mu2", "sc2"]
        sums += [
            S.alias(S.mul(fw.copy(), pw.copy(), mu2.copy()), "ep2"),
            S.alias(_deviance(two.family, fw, pw, y, mu2), "dv2"),
        ]
    stage_b = S.select(means, S.subquery(inputs, "a"))
    stage_c = S.select(
        [*col_refs(*carry, *summed), *sums], S.subquery(stage_b, "b"), where=S.and_(*valid)
    )
    # stage d: the actual rate (the best ordering's key), the log-ratio of the two scores
    # (the double-lift table's key: no overflow where a ratio would) and the null model's mean
    ac, ex = S.col("ac"), S.col("ex")
    rate = S.case(
        [
            (S.gt(ex, S.num(0.0)), S.div(ac, ex.copy())),
            # exposure 0 with claims: the steepest part of any curve, last in the order
            (S.gt(ac.copy(), S.num(0.0)), S.double_const("Infinity")),
        ],
        S.num(0.0),
    )
    kept = [*carry, *summed, "wt", "ac", "ep", "dv", "ex", *(["ep2", "dv2"] if two else [])]
    rows: list[Expr] = [*col_refs(*kept), S.alias(rate, "rt")]
    if two is not None:
        rows.append(S.alias(_log_ratio(), "lr"))
        kept.append("lr")
    if null is not None:
        rows.append(S.alias(_null_mean(plan, null), "n_mu"))
    staged = S.select(rows, S.subquery(stage_c, "c"))
    if null is None or not null.step:
        return staged
    # stage e: dmu/deta and the variance at the null model's mean (one IRLS step of it)
    e0 = S.add(S.col("off") if has_off else S.num(0.0), S.num(null.intercept))
    n_mu = S.col("n_mu")
    return S.select(
        [
            *col_refs(*kept, "rt", "n_mu"),
            S.alias(link.mu_eta_sql(e0, n_mu), "n_dmu"),
            S.alias(fam.variance_sql(n_mu.copy()), "n_var"),
        ],
        S.subquery(staged, "d"),
    )


def _deviance(fam: Family, fw: Expr, pw: Expr, y: Expr, mu: Expr) -> Expr:
    """f pw d(y, mu) with the family's unit deviance (the mean clamped into its range)."""
    return S.mul(fw.copy(), pw.copy(), fam.unit_deviance_sql(y.copy(), fam.clamp_mu_sql(mu)))


def _log_ratio() -> Expr:
    """ln(sc2) - ln(sc) where both scores are positive, else NULL (a gaussian score of 0 or
    less has no ratio: such rows stay out of the double-lift table, and are counted)."""
    sc, sc2 = S.col("sc"), S.col("sc2")
    both = S.and_(S.gt(sc, S.num(0.0)), S.gt(sc2, S.num(0.0)))
    return S.case([(both, S.sub(S.ln(sc2.copy()), S.ln(sc.copy())))])


def _null_mean(plan: AssessPlan, null: NullModel) -> Expr:
    fam, link = plan.ctx.spec.family, plan.ctx.spec.link
    if null.mean is not None:
        return fam.clamp_mu_sql(S.num(null.mean))
    off = S.col("off") if plan.ctx.spec.offset is not None else S.num(0.0)
    return null_mean_sql(fam, link, off, float(null.intercept))


def _null_terms(plan: AssessPlan, null: NullModel) -> list[tuple[str, Expr]]:
    """(alias, per-row term) of the null model's sums over the scored rows."""
    fam = plan.ctx.spec.family
    y, pw, fw, n_mu = S.col("y"), S.col("pw"), S.col("fw"), S.col("n_mu")
    if not null.step:
        return [("nd", S.mul(fw, pw, fam.unit_deviance_sql(y, n_mu)))]
    w, wz, dev = null_step_terms(
        fam, float(null.intercept), y, pw, fw, n_mu, S.col("n_dmu"), S.col("n_var")
    )
    return [("nd", dev), ("nw0", w), ("nwz0", wz)]


def null_query(plan: AssessPlan, null: NullModel) -> exp.Select:
    """The null scan: the constant-rate model's deviance (``nd``) over the scored rows, the
    sums of one IRLS step of it (``nw0``, ``nwz0``) with ``null.step``, and the rows (``n``)."""
    rows = scored_rows(plan, null)
    cols = [S.alias(S.psum(term), alias) for alias, term in _null_terms(plan, null)]
    cols.append(S.alias(S.count_star(), "n"))
    return S.select(cols, S.subquery(rows, "s"))


# -- the band scan ----------------------------------------------------------------------------

#: the key each ordered role reads from the scored rows (the others read their ``k<i>``)
_SRC_KEY = {SCORE: "sc", BEST: "rt", MEAN: "mu", AGAINST: "sc2", RATIO: "lr"}


def part_key(plan: AssessPlan, index: int) -> Expr:
    """The key of part ``index`` in :func:`scored_rows`: the score, the rate, the mean, the
    second model's score, the log-ratio, or the column's value (``k<index>``)."""
    return S.col(_SRC_KEY.get(plan.parts[index].role, _key(index)))


#: per ordered part (its index in ``plan.parts``): its bands in order, each (band, highest key)
Cuts = dict[int, list[tuple[int, float]]]


def _key_literal(value: float) -> Expr:
    if value == float("inf"):
        return S.double_const("Infinity")
    if value == float("-inf"):
        return S.double_const("-Infinity")
    return S.num(value)


def band_of(key: Expr, cuts: list[tuple[int, float]]) -> Expr:
    """The band of ``key``: the first band whose highest key is >= it (the last band takes
    the rest); NULL for a NULL key or a part without bands. The highest keys are values the
    order scan read from the same expressions, so each tie group lands in its own band."""
    if not cuts:
        return S.cast(exp.Null(), "INTEGER")
    whens = [(S.is_null(key.copy()), S.cast(exp.Null(), "INTEGER"))]
    whens += [(S.le(key.copy(), _key_literal(hi)), S.integer(b)) for b, hi in cuts[:-1]]
    return S.case(whens, S.integer(cuts[-1][0]))


def _grouping_key(plan: AssessPlan, cuts: Cuts, index: int) -> Expr:
    """Part ``index``'s key in the band scan: its band (ordered) or its level."""
    if plan.parts[index].ordered:
        return band_of(part_key(plan, index), cuts.get(index, []))
    return S.col(_key(index))


def assess_query(plan: AssessPlan, cuts: Cuts, null: NullModel | None = None) -> exp.Select:
    """The band scan: per part, one row per band (ordered parts, cut at ``cuts`` from the
    order scan, :mod:`indb.plan.assess_order`) or per level.

    Columns: ``g`` (the part's GROUPING bitmask, :func:`part_mask`), ``band``, ``lv`` (the
    level), ``n`` (rows), ``nw`` (frequency-weighted rows), ``wt`` (sum f pw), ``ex``
    (exposure), ``ac`` (actual), ``ep`` (expected), ``dv`` (deviance), ``nu`` (rows with an
    unseen level) and, with ``null``, the null model's sums (with ``plan.against``, also its
    ``ep2``, ``dv2``, ``nu2``). At most ``max_levels + 1`` rows per part come back.
    """
    parts = plan.parts
    count = len(parts)
    rows = scored_rows(plan, null)
    keyed = [S.alias(_grouping_key(plan, cuts, i), _key(i)) for i, p in enumerate(parts)]
    numbers: list[tuple[str, Expr]] = [
        ("n", S.count_star()),
        ("nw", S.psum(S.col("fw"))),
        *((a, S.psum(S.col(a))) for a in ("wt", "ex", "ac", "ep", "dv")),
        ("nu", _unseen_rows("nu")),
    ]
    read = ["fw", "wt", "ex", "ac", "ep", "dv", "nu"]
    if plan.against is not None:
        numbers += [("ep2", S.psum(S.col("ep2"))), ("dv2", S.psum(S.col("dv2")))]
        numbers.append(("nu2", _unseen_rows("nu2")))
        read += ["ep2", "dv2", "nu2"]
    if null is not None:
        numbers += [(a, S.psum(term)) for a, term in _null_terms(plan, null)]
    inner = S.select(
        [*keyed, *(S.col(n) for n in read)] + _null_inputs(plan, null),
        S.subquery(rows, "s"),
    )
    keys = [S.col(_key(i)) for i in range(count)]
    grouped = exp.Select(
        expressions=[
            S.alias(exp.Anonymous(this="GROUPING", expressions=[k.copy() for k in keys]), "g"),
            *(k.copy() for k in keys),
            *(S.alias(agg, a) for a, agg in numbers),
        ]
    ).from_(S.subquery(inner, "r"), copy=False)
    sets = exp.GroupingSets(expressions=[exp.Tuple(expressions=[k.copy()]) for k in keys])
    grouped.set("group", exp.Group(grouping_sets=[sets]))
    names = [a for a, _ in numbers]
    ordered = [i for i, p in enumerate(parts) if p.ordered]
    leveled = [i for i, p in enumerate(parts) if not p.ordered]
    no_band = S.cast(exp.Null(), "INTEGER")
    band = _by_part(parts, ordered, [S.col(_key(i)) for i in ordered], no_band)
    lv = _by_part(parts, leveled, [S.col(_key(i)) for i in leveled], S.as_text(exp.Null()))
    flat = S.select(
        [S.col("g"), S.alias(band, "band"), S.alias(lv, "lv"), *col_refs(*names)],
        S.subquery(grouped, "gr"),
    )
    order = exp.Order(expressions=[exp.Ordered(this=S.col("band")), exp.Ordered(this=S.col("lv"))])
    rank = exp.Window(this=exp.RowNumber(), partition_by=[S.col("g")], order=order, over="OVER")
    ranked = S.select([exp.Star(), S.alias(rank, "rk")], S.subquery(flat, "fl"))
    return S.select(
        col_refs("g", "band", "lv", *names),
        S.subquery(ranked, "rb"),
        where=S.le(S.col("rk"), exp.Literal.number(plan.max_levels + 1)),
    )


def by_mask(masks: list[int], values: list[Expr], else_: Expr) -> Expr:
    """CASE g WHEN masks[j] THEN values[j] ... ELSE else_ END (g: a GROUPING bitmask)."""
    whens = [(S.eq(S.col("g"), S.integer(m)), v) for m, v in zip(masks, values, strict=True)]
    return S.case(whens, else_) if whens else else_


def _by_part(parts: tuple[Part, ...], pick: list[int], values: list[Expr], else_: Expr) -> Expr:
    """:func:`by_mask` over the masks of parts ``pick`` (indices in ``parts``)."""
    return by_mask([part_mask(i, len(parts)) for i in pick], values, else_)


def _unseen_rows(column: str) -> Expr:
    """Rows with an unseen level (a positive count in ``column``)."""
    return S.sum_(S.flag(S.gt(S.col(column), exp.Literal.number(0))))


def _null_inputs(plan: AssessPlan, null: NullModel | None) -> list[Expr]:
    """The scored rows' columns the null model's terms read."""
    if null is None:
        return []
    names = ["y", "pw", "n_mu", *(["n_dmu", "n_var"] if null.step else [])]
    return col_refs(*names)
