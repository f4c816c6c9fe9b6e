"""Small builders for SQL syntax trees (sqlglot expressions).

Every identifier and literal that reaches generated SQL goes through :func:`ident`,
:func:`col`, :func:`text` or :func:`num`; nothing is pasted into SQL as a string.
Custom nodes (:class:`LogGamma`, :class:`IsFinite`, :class:`PreciseSum`) stand for
functions whose spelling differs by engine; the dialect layer translates them.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

from sqlglot import exp

Expr = exp.Expression

# -- custom nodes the dialect layer must translate ------------------------------------------


# sqlglot >= 30 splits the node base (Expression) from the role mixins (Func, AggFunc);
# older releases derive Func from Expression. Pick bases that work with both.
_FUNC = (exp.Func,) if issubclass(exp.Func, exp.Expression) else (exp.Expression, exp.Func)
_AGG = (exp.AggFunc,) if issubclass(exp.AggFunc, exp.Expression) else (exp.Expression, exp.AggFunc)


class LogGamma(*_FUNC):
    """ln(Gamma(x)) for x > 0."""

    arg_types = {"this": True}


class IsFinite(*_FUNC):
    """TRUE when a double is neither NaN nor +/-Inf."""

    arg_types = {"this": True}


class PreciseSum(*_AGG):
    """A sum aggregate; engines with a compensated (Kahan/Neumaier) sum use it."""

    arg_types = {"this": True}


class LevelText(*_FUNC):
    """A categorical value as its level name: the engine's text of the value, with an
    integral double written as DuckDB and Spark write it ('2.0')."""

    arg_types = {"this": True}


class RowPick(*_FUNC):
    """TRUE on about ``fraction`` of the rows, picked by a hash of the ``expressions`` (a
    row's values): the same rows on every run, whatever the scan order or thread count."""

    arg_types = {"expressions": True, "fraction": True}

    @property
    def share(self) -> float:
        return float(self.args["fraction"].name)


class IeeeLn(*_FUNC):
    """Natural log with IEEE-754 results: ln(0) = -inf, ln(x < 0) = NaN, never an error or
    NULL (PostgreSQL raises and Spark returns NULL there). User expressions carried between
    engines use these ``Ieee*`` nodes (:mod:`indb.portable`); indb's own SQL does not."""

    arg_types = {"this": True}


class IeeeLog10(*_FUNC):
    """Base-10 log with IEEE-754 results (as :class:`IeeeLn`)."""

    arg_types = {"this": True}


class IeeeSqrt(*_FUNC):
    """Square root with IEEE-754 results: sqrt(x < 0) = NaN, never an error."""

    arg_types = {"this": True}


class IeeeExp(*_FUNC):
    """e^x with IEEE-754 results: +inf on overflow, 0 on underflow, never an error."""

    arg_types = {"this": True}


class IeeePow(*_FUNC):
    """x^y with C's ``pow`` results: NaN for a negative base and a non-integer exponent,
    +/-inf for a zero base and a negative exponent, never an error."""

    arg_types = {"this": True, "expression": True}


class IeeeDiv(*_FUNC):
    """``this / expression`` as the engine divides these operands, except that a zero
    divisor gives IEEE-754's +/-inf or NaN (DuckDB's answer) instead of an error or NULL.
    The operands' types decide the kind of division: cast them to DOUBLE for true division."""

    arg_types = {"this": True, "expression": True}


CUSTOM_NODES: tuple[type[exp.Expression], ...] = (
    LogGamma,
    IsFinite,
    PreciseSum,
    LevelText,
    RowPick,
    IeeeLn,
    IeeeLog10,
    IeeeSqrt,
    IeeeExp,
    IeeePow,
    IeeeDiv,
)
IEEE_NODES: tuple[type[exp.Expression], ...] = (
    IeeeLn,
    IeeeLog10,
    IeeeSqrt,
    IeeeExp,
    IeeePow,
    IeeeDiv,
)


# -- leaves ----------------------------------------------------------------------------------


def ident(name: str) -> exp.Identifier:
    """A quoted identifier (any characters allowed; quoting is done by the renderer)."""
    return exp.to_identifier(name, quoted=True)


def col(name: str, table: str | None = None) -> exp.Column:
    """A quoted column reference, optionally qualified by a quoted table alias."""
    return exp.Column(this=ident(name), table=ident(table) if table else None)


def num(value: float) -> Expr:
    """A double-precision literal that round-trips exactly.

    Rendered in scientific notation (``1.5e0``) because DuckDB and Spark read plain
    decimals such as ``1.5`` as DECIMAL, which would change the arithmetic.
    """
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"cannot write non-finite number {value!r} into SQL")
    r = repr(abs(value))
    if "e" not in r:
        r += "e0"
    lit = exp.Literal.number(r)
    return exp.Neg(this=lit) if value < 0 or (value == 0 and math.copysign(1, value) < 0) else lit


def integer(value: int) -> Expr:
    """An integer literal."""
    return (
        exp.Literal.number(int(value)) if value >= 0 else exp.Neg(this=exp.Literal.number(-value))
    )


def text(value: str) -> exp.Literal:
    """A string literal; escaping is done by each dialect's renderer."""
    return exp.Literal.string(value)


def null() -> exp.Null:
    return exp.Null()


def true() -> exp.Boolean:
    return exp.true()


# -- operators -------------------------------------------------------------------------------


def paren(e: Expr) -> Expr:
    """Wrap ``e`` in parentheses unless it is atomic. In sqlglot >= 30 the connectives
    (AND, OR) are also ``Func`` subclasses, so operators are excluded explicitly."""
    atomic = isinstance(e, exp.Paren | exp.Column | exp.Literal) or (
        isinstance(e, exp.Func) and not isinstance(e, exp.Binary | exp.Unary | exp.Connector)
    )
    return e if atomic else exp.Paren(this=e)


def add(*terms: Expr) -> Expr:
    """Sum of terms (``0`` for none)."""
    terms = tuple(terms)
    if not terms:
        return num(0.0)
    out = terms[0]
    for t in terms[1:]:
        out = exp.Add(this=paren(out), expression=paren(t))
    return out


def sub(a: Expr, b: Expr) -> Expr:
    return exp.Sub(this=paren(a), expression=paren(b))


def mul(*factors: Expr) -> Expr:
    """Product of factors (``1`` for none)."""
    factors = tuple(factors)
    if not factors:
        return num(1.0)
    out = factors[0]
    for f in factors[1:]:
        out = exp.Mul(this=paren(out), expression=paren(f))
    return out


def div(a: Expr, b: Expr) -> Expr:
    return exp.Div(this=paren(a), expression=paren(b))


def neg(a: Expr) -> Expr:
    return exp.Neg(this=paren(a))


def ln(a: Expr) -> Expr:
    return exp.Ln(this=a)


def exp_(a: Expr) -> Expr:
    return exp.Exp(this=a)


def sqrt(a: Expr) -> Expr:
    return exp.Sqrt(this=a)


def power(a: Expr, b: Expr) -> Expr:
    return exp.Pow(this=a, expression=b)


def abs_(a: Expr) -> Expr:
    return exp.Abs(this=a)


def floor_(a: Expr) -> Expr:
    return exp.Floor(this=a)


def mod_(a: Expr, b: Expr) -> Expr:
    """a % b: the remainder takes the sign of ``a`` on DuckDB, PostgreSQL and Spark alike."""
    return exp.Mod(this=paren(a), expression=paren(b))


def fn(name: str, *args: Expr) -> Expr:
    """A plain function call by (engine-neutral) name, e.g. ``tan``, ``atan``."""
    return exp.Anonymous(this=name.upper(), expressions=list(args))


def greatest(*args: Expr) -> Expr:
    """GREATEST as every engine indb renders for evaluates it: NULL arguments are skipped
    (GREATEST(NULL, 0) = 0 on DuckDB, PostgreSQL and Spark) and NaN is larger than every
    number (GREATEST(NaN, 0) = NaN). So it invents a value for a NULL argument: pass only
    arguments that cannot be NULL, or guard the row first (as :meth:`indb.links.Link.mean_sql`
    does for scoring)."""
    # ignore_nulls=True states those engines' semantics; with False sqlglot wraps every call
    # in a NULL-propagating CASE, which bloats the SQL and slows DuckDB's planner badly.
    return exp.Greatest(this=args[0], expressions=list(args[1:]), ignore_nulls=True)


def least(*args: Expr) -> Expr:
    """LEAST, with :func:`greatest`'s caveats (NULL skipped; NaN larger than every number,
    so LEAST(NaN, 700) = 700)."""
    return exp.Least(this=args[0], expressions=list(args[1:]), ignore_nulls=True)


def clamp(a: Expr, lo: float | None, hi: float | None) -> Expr:
    """Clamp into [lo, hi] with GREATEST/LEAST (either bound may be omitted).

    Only for operands that are numbers: NULL becomes ``lo`` (or ``hi``) and NaN becomes
    ``hi`` (see :func:`greatest`). The fit's rows are such numbers (the profile rejects NaN
    and +/-inf in every model column and offset, and excludes or refuses NULLs, before any
    IRLS scan); scoring rows are not, and are guarded by :meth:`indb.links.Link.mean_sql`.
    """
    out = a
    if lo is not None:
        out = greatest(out, num(lo))
    if hi is not None:
        out = least(out, num(hi))
    return out


def case(whens: Sequence[tuple[Expr, Expr]], default: Expr | None = None) -> Expr:
    node = exp.Case(ifs=[exp.If(this=c, true=v) for c, v in whens])
    if default is not None:
        node.set("default", default)
    return node


def gt(a: Expr, b: Expr) -> Expr:
    return exp.GT(this=paren(a), expression=paren(b))


def ge(a: Expr, b: Expr) -> Expr:
    return exp.GTE(this=paren(a), expression=paren(b))


def lt(a: Expr, b: Expr) -> Expr:
    return exp.LT(this=paren(a), expression=paren(b))


def le(a: Expr, b: Expr) -> Expr:
    return exp.LTE(this=paren(a), expression=paren(b))


def eq(a: Expr, b: Expr) -> Expr:
    return exp.EQ(this=paren(a), expression=paren(b))


def ne(a: Expr, b: Expr) -> Expr:
    return exp.NEQ(this=paren(a), expression=paren(b))


def and_(*conds: Expr) -> Expr:
    conds = tuple(c for c in conds if c is not None)
    if not conds:
        return exp.true()
    out = conds[0]
    for c in conds[1:]:
        out = exp.And(this=paren(out), expression=paren(c))
    return out


def or_(*conds: Expr) -> Expr:
    conds = tuple(c for c in conds if c is not None)
    if not conds:
        return exp.false()
    out = conds[0]
    for c in conds[1:]:
        out = exp.Or(this=paren(out), expression=paren(c))
    return out


def not_(c: Expr) -> Expr:
    return exp.Not(this=paren(c))


def is_null(a: Expr) -> Expr:
    return exp.Is(this=paren(a), expression=exp.Null())


def cast(a: Expr, to: str) -> Expr:
    return exp.Cast(this=a, to=exp.DataType.build(to))


def as_double(a: Expr) -> Expr:
    return cast(a, "DOUBLE")


def level_text(a: Expr) -> Expr:
    return LevelText(this=a)


def as_text(a: Expr) -> Expr:
    return cast(a, "VARCHAR")


def flag(cond: Expr) -> Expr:
    """1 where ``cond`` holds, else 0 (an integer indicator)."""
    return case([(cond, exp.Literal.number(1))], exp.Literal.number(0))


def alias(e: Expr, name: str) -> exp.Alias:
    return exp.Alias(this=e, alias=ident(name))


def sum_(e: Expr) -> Expr:
    return exp.Sum(this=e)


def psum(e: Expr) -> Expr:
    """Sum that the dialect may render as a compensated sum."""
    return PreciseSum(this=e)


def partition_sum(e: Expr, partition: str, order: str | None = None) -> exp.Window:
    """SUM(e) OVER (PARTITION BY partition): the partition's total, or with ``order`` the
    running total up to and including each row (ROWS frame, NULL keys last)."""
    if order is None:
        return exp.Window(this=sum_(e), partition_by=[col(partition)], over="OVER")
    return exp.Window(
        this=sum_(e),
        partition_by=[col(partition)],
        order=exp.Order(expressions=[exp.Ordered(this=col(order), nulls_first=False)]),
        spec=exp.WindowSpec(
            kind="ROWS", start="UNBOUNDED", start_side="PRECEDING", end="CURRENT ROW"
        ),
        over="OVER",
    )


def count_star() -> Expr:
    return exp.Count(this=exp.Star())


def min_(e: Expr) -> Expr:
    return exp.Min(this=e)


def max_(e: Expr) -> Expr:
    return exp.Max(this=e)


def avg(e: Expr) -> Expr:
    return exp.Avg(this=e)


def stddev_pop(e: Expr) -> Expr:
    return exp.StddevPop(this=e)


def log_gamma(e: Expr) -> Expr:
    return LogGamma(this=e)


def row_pick(values: Sequence[Expr], fraction: float) -> Expr:
    """A deterministic row sample: TRUE on about ``fraction`` of the rows (see :class:`RowPick`)."""
    if not 0.0 < fraction <= 1.0:
        raise ValueError(f"a sample fraction lies in (0, 1]; got {fraction!r}")
    return RowPick(
        expressions=[v.copy() for v in values], fraction=exp.Literal.number(repr(float(fraction)))
    )


def is_finite(e: Expr) -> Expr:
    return IsFinite(this=e)


def select(
    columns: Iterable[Expr],
    source: Expr,
    *,
    where: Expr | None = None,
    group_by: Sequence[Expr] = (),
) -> exp.Select:
    """SELECT columns FROM source [WHERE ...] [GROUP BY ...]."""
    q = exp.Select(expressions=list(columns)).from_(source, copy=False)
    if where is not None:
        q = q.where(where, copy=False)
    if group_by:
        q = q.group_by(*group_by, copy=False)
    return q


def subquery(q: exp.Query, name: str) -> exp.Subquery:
    return exp.Subquery(this=q, alias=exp.TableAlias(this=ident(name)))


def parse_expression(sql: str, dialect: str) -> Expr:
    """Parse one scalar SQL expression written by the user (raises ``ValueError`` on bad SQL)."""
    import sqlglot
    from sqlglot.errors import SqlglotError, TokenError

    try:
        trees = [t for t in sqlglot.parse(sql, read=dialect) if t is not None]
    except TokenError as err:  # sqlglot's message cuts the text short: say what to look for
        raise ValueError(f"{str(err).splitlines()[0]} (is a quote left unclosed?)") from None
    except SqlglotError as err:  # ParseError and any other sqlglot failure
        raise ValueError(str(err).splitlines()[0]) from None
    if not trees:
        raise ValueError("empty expression")
    if len(trees) > 1:
        raise ValueError("it is not a single expression (it holds more than one statement)")
    tree = trees[0]
    banned = (exp.Block, exp.Command, exp.DDL, exp.DML, exp.Query)
    statement = "it is not a per-row expression (statements and subqueries are not allowed)"
    if isinstance(tree, banned) or any(isinstance(n, banned) for n in tree.walk()):
        raise ValueError(statement)
    # every name must be visible to the column check: no aliases, stars, COLUMNS(...),
    # positional references or bind parameters
    hidden = {"Alias", "Star", "Placeholder", "Parameter", "Columns", "PositionalColumn"}
    for n in tree.walk():
        if type(n).__name__ in hidden or (
            isinstance(n, exp.Anonymous) and str(n.this).upper() == "COLUMNS"
        ):
            raise ValueError(
                "only column names, literals, operators and functions are allowed "
                f"(found {n.sql(dialect)!r})"
            )
    # A scalar expression is a sqlglot Condition (columns, literals, operators, functions,
    # CASE, casts). Other statements parse as other node types (INSTALL x, ATTACH '..',
    # PRAGMA, USE, SET, ...): refused here as the user's input, not left for the engine.
    if not isinstance(tree, exp.Condition):
        raise ValueError(statement)
    return tree


def referenced_columns(e: Expr) -> list[str]:
    """Names of the columns an expression reads, in order of first appearance."""
    seen: list[str] = []
    for c in e.find_all(exp.Column):
        if c.name not in seen:
            seen.append(c.name)
    return seen


def as_operand(e: exp.Expression) -> exp.Expression:
    """``e`` in parentheses unless it is a column, literal or plain function call.

    A custom node stood as one operand (``NOT <node>``, ``a - <node>``); its translation may
    be an operator tree. (``sqlexpr.paren`` is not enough: sqlglot's And/Or derive from Func.)
    """
    atom = isinstance(e, exp.Paren | exp.Column | exp.Literal | exp.Cast) or (
        isinstance(e, exp.Func) and not isinstance(e, exp.Binary | exp.Unary)
    )
    return e if atom else exp.Paren(this=e)


# -- log-gamma as a portable expression (engines without lgamma) ------------------------------

# Stirling's series (Abramowitz & Stegun 6.1.40):
#   ln Gamma(z) = (z - 1/2) ln z - z + ln(2 pi)/2 + sum_k B_2k / (2k (2k-1) z^(2k-1)).
# With z >= 6 the first omitted term (k = 11) is below 1e-15.
_STIRLING = (
    1.0 / 12.0,
    -1.0 / 360.0,
    1.0 / 1260.0,
    -1.0 / 1680.0,
    1.0 / 1188.0,
    -691.0 / 360360.0,
    1.0 / 156.0,
    -3617.0 / 122400.0,
    43867.0 / 244188.0,
    -174611.0 / 125400.0,
)
_HALF_LN_2PI = 0.5 * math.log(2.0 * math.pi)
LOG_GAMMA_SHIFT = 6.0
_SERIES_CAP = 1e8


def log_gamma_series(x: Expr) -> Expr:
    """ln(Gamma(x)) for x > 0 from +, *, /, ln only (for engines without ``lgamma``).

    Arguments below 6 are shifted by the recurrence ln Gamma(x) = ln Gamma(x + 6) -
    ln(x (x+1) ... (x+5)); Stirling's series with ten terms is then used at z >= 6 (first
    omitted term < 1e-15). Large arguments are not shifted, so the product never overflows;
    the result overflows (an error in PostgreSQL) only where ln Gamma itself exceeds 1.8e308.
    Checked against ``scipy.special.gammaln`` in ``tests/engines``.
    """
    small = lt(x, num(LOG_GAMMA_SHIFT))
    z = case([(small, add(x, num(LOG_GAMMA_SHIFT)))], x)
    # The series is a correction of order 1/(12 z): beyond z = 1e8 it is below 1e-18 of the
    # result, so it is evaluated at min(z, 1e8), where z^2 cannot overflow (PostgreSQL raises
    # on float overflow and underflow instead of returning inf or 0).
    zs = least(z.copy(), num(_SERIES_CAP))
    zs2 = mul(zs, zs.copy())
    series: Expr = num(_STIRLING[-1])
    for c in reversed(_STIRLING[:-1]):
        series = add(num(c), div(series, zs2.copy()))
    core = add(
        sub(mul(sub(z, num(0.5)), ln(z.copy())), z.copy()),
        num(_HALF_LN_2PI),
        div(series, zs.copy()),
    )
    prod = mul(x, *(add(x, num(float(k))) for k in range(1, int(LOG_GAMMA_SHIFT))))
    # x, z and the tests appear several times: copy() gives every occurrence its own node
    return sub(core, case([(small, ln(prod))], num(0.0))).copy()


# -- IEEE-754 results for engines that raise or return NULL instead ---------------------------

#: exp(x) is finite exactly for x <= EXP_FINITE_MAX and nonzero exactly for x >= EXP_NONZERO_MIN
#: (the largest and smallest doubles with that property under a correctly rounded exp, as
#: glibc's; found by bisection with Python's math.exp)
EXP_FINITE_MAX = 709.782712893384
EXP_NONZERO_MIN = -745.1332191019411


def double_const(name: str) -> Expr:
    """``CAST('NaN' AS DOUBLE)``, ``'Infinity'`` or ``'-Infinity'``: the spelling DuckDB,
    PostgreSQL and Spark all read as the special double."""
    return cast(text(name), "DOUBLE")


def is_nan(x: Expr) -> Expr:
    """x = NaN, TRUE for NaN on engines where NaN equals itself (DuckDB, PostgreSQL, Spark)."""
    return eq(x, double_const("NaN"))


def ieee_log_guarded(x: Expr, log: Expr) -> Expr:
    """``log`` (a log of ``x``) where x > 0; -inf at 0; NaN below 0; NULL and NaN pass through.

    NaN > 0 holds on PostgreSQL and Spark (NaN sorts above every number), so NaN reaches the
    engine's log, which returns NaN; ``ELSE x`` keeps NULL (and NaN, on an engine where every
    comparison with NaN is false)."""
    return case(
        [
            (gt(x, num(0.0)), log),
            (eq(x.copy(), num(0.0)), double_const("-Infinity")),
            (lt(x.copy(), num(0.0)), double_const("NaN")),
        ],
        x.copy(),
    )


def ieee_sqrt_guarded(x: Expr) -> Expr:
    """sqrt(x), NaN below 0 (sqrt(-0.0) = -0.0 as in IEEE-754: -0.0 < 0 is false)."""
    return case([(lt(x, num(0.0)), double_const("NaN"))], sqrt(x.copy()))


def _positive_sign(z: Expr) -> Expr:
    """TRUE when the zero ``z`` is +0.0, FALSE for -0.0, from its text ('-0', '-0.0'): the
    one test of a zero's sign that DuckDB, PostgreSQL and Spark all keep (Spark's ATAN2
    adds 0.0 to its arguments, which turns -0.0 into +0.0)."""
    return not_(exp.Like(this=as_text(z), expression=text("-%")))


def _nonzero_number(e: Expr) -> bool:
    """Whether ``e`` is a numeric literal other than 0 (possibly negated or cast)."""
    while isinstance(e, exp.Cast | exp.Neg | exp.Paren):
        e = e.this
    return isinstance(e, exp.Literal) and not e.is_string and float(e.this) != 0.0


def ieee_div_guarded(a: Expr, b: Expr) -> Expr:
    """a / b, with IEEE-754's result for a zero divisor: NaN for 0/0 and NaN/0, otherwise
    infinity with the sign of a times the sign of the zero."""
    if _nonzero_number(b):  # ln(age / 40): nothing to guard
        return div(a, b)
    by_zero = case(
        [
            (is_null(a), null()),
            (or_(is_nan(a.copy()), eq(a.copy(), num(0.0))), double_const("NaN")),
            (
                eq(gt(a.copy(), num(0.0)), _positive_sign(b.copy())),
                double_const("Infinity"),
            ),
        ],
        double_const("-Infinity"),
    )
    return case([(ne(b, num(0.0)), div(a.copy(), b.copy())), (eq(b.copy(), num(0.0)), by_zero)])


def ieee_exp_guarded(x: Expr) -> Expr:
    """exp(x), +inf where it overflows and 0 where it underflows (NaN stays NaN)."""
    return case(
        [
            (is_nan(x), x.copy()),
            (gt(x.copy(), num(EXP_FINITE_MAX)), double_const("Infinity")),
            (lt(x.copy(), num(EXP_NONZERO_MIN)), num(0.0)),
        ],
        exp_(x.copy()),
    )


def ieee_pow_unit_base(a: Expr, b: Expr, pow_: Expr) -> Expr:
    """``pow_`` (a power of a to b) with C's 1 ^ y = 1 for every y, NaN included, and
    (-1) ^ +/-inf = 1, where Java's Math.pow (Spark) answers NaN."""
    unit = or_(
        and_(eq(a, num(1.0)), not_(is_null(b.copy()))),  # NULL stays NULL
        and_(eq(a.copy(), num(-1.0)), eq(abs_(b), double_const("Infinity"))),
    )
    return case([(unit, num(1.0))], pow_)


def ieee_pow_guarded(a: Expr, b: Expr) -> Expr:
    """power(a, b) with C's results where PostgreSQL raises: NaN for a finite a < 0 and a
    non-integer b (for a = -inf: +inf if b > 0, else 0); for a zero a and b < 0, +inf, or
    -inf when a is -0.0 and b an odd integer. Overflow still raises on PostgreSQL."""
    whole = eq(b.copy(), exp.Floor(this=b.copy()))
    odd = and_(
        whole,
        eq(
            sub(b.copy(), mul(num(2.0), exp.Floor(this=div(b.copy(), num(2.0))))),
            num(1.0),
        ),
    )
    zero_base = case(
        [(and_(odd, not_(_positive_sign(a.copy()))), double_const("-Infinity"))],
        double_const("Infinity"),
    )
    minus_inf = case([(gt(b.copy(), num(0.0)), double_const("Infinity"))], num(0.0))
    return case(
        [
            (and_(eq(a.copy(), num(0.0)), lt(b.copy(), num(0.0))), zero_base),
            (
                and_(eq(a.copy(), double_const("-Infinity")), not_(whole.copy())),
                minus_inf,
            ),
            (and_(lt(a.copy(), num(0.0)), not_(whole.copy())), double_const("NaN")),
        ],
        power(a, b),
    )
