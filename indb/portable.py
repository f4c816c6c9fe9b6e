"""A user's SQL expression stored with a model, carried to the engine that scores with it.

An offset such as ``ln(exposure)`` is stored as the text the user wrote, in the dialect of
the engine the model was fitted on (``result.spec["sql_dialect"]``), together with the types
of the columns the model reads (``result.design["column_types"]``). Scoring SQL for any
engine parses the text in *that* dialect and rewrites it into nodes whose meaning does not
depend on the engine:

* ``/`` and the integer-division operators become double division (:class:`IeeeDiv` on
  operands cast to DOUBLE) or truncating division of integers (``exp.IntDiv``), as the
  source engine would have divided operands of those types;
* ``log(x)`` becomes a base-10 or natural log, as the source dialect reads it;
* ln, log, sqrt, exp, power and division become :mod:`indb.sqlexpr`'s ``Ieee*`` nodes, whose
  results are IEEE-754's NaN and infinities on every engine (DuckDB's own answers), where
  PostgreSQL would raise for the whole query and Spark return NULL. A row with, say, a
  negative exposure then gets a non-finite offset, and the scoring view a NULL mean and a
  flag (:meth:`indb.links.Link.mean_sql`). Where the source engine returns NULL (Spark's
  ``ln(0)``), the rewrite keeps the NULL explicitly.

When the target dialect differs from the source, only the constructs listed in
:func:`_convert` are carried over; anything else, and anything whose meaning hangs on a
column type that was not recorded, raises :class:`~indb.errors.UnsupportedError` naming the
expression: never SQL that means something else. On the engine it was written for, an
expression is kept as written apart from the ``Ieee*`` rewrites.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import sqlglot
from sqlglot import exp

from indb import sqlexpr as S
from indb.engines.base_dialect import Dialect
from indb.errors import SpecError, UnsupportedError
from indb.sqlexpr import Expr

INT = "integer"
REAL = "real"  # a double or an exact decimal: `/` divides it exactly everywhere


@dataclass(frozen=True)
class _Context:
    role: str
    text: str
    source: Dialect
    target: Dialect
    types: Mapping[str, str] | None
    texts: Mapping[int, str]  # each original node's text, for messages

    def shown(self, node: exp.Expression) -> str:
        """The node as the user wrote it (its children may be converted by now)."""
        return self.texts.get(id(node)) or node.sql(self.source.sqlglot_name)

    @property
    def strict(self) -> bool:
        """Whether the expression changes engines (then only known constructs pass)."""
        return self.source.name != self.target.name

    def refuse(self, what: str) -> UnsupportedError:
        return UnsupportedError(
            f"{self.role} expression {self.text!r} was written for {self.source.name} and "
            f"cannot be carried to {self.target.name} with its meaning: {what}. Print the "
            f"scoring SQL for {self.source.name}, or refit on {self.target.name}"
        )


def portable_expression(
    text: str,
    role: str,
    source: Dialect,
    target: Dialect,
    column_types: Mapping[str, str] | None = None,
) -> Expr:
    """The user's expression ``text`` (written for ``source``) as a tree that ``target``
    renders with the same meaning.

    Parameters
    ----------
    text:
        The expression as stored (e.g. ``ln(exposure)``).
    role:
        What it is (``offset``), for messages.
    source, target:
        The dialect it was written in, and the one the scoring SQL is for.
    column_types:
        Type names (as ``source``'s engine writes them) of the columns it reads, or None
        when they are not known; integer division needs them.

    Raises
    ------
    UnsupportedError
        When ``target`` differs from ``source`` and the expression holds a construct whose
        meaning indb cannot carry over.
    """
    try:
        tree = S.parse_expression(text, source.sqlglot_name)
    except ValueError as err:
        raise SpecError(f"cannot parse the stored {role} expression {text!r}: {err}") from None
    texts = {id(n): n.sql(source.sqlglot_name) for n in tree.walk()}
    ctx = _Context(role, text, source, target, column_types, texts)
    kinds: dict[int, str | None] = {}
    # children before parents, so each rule sees its operands already converted
    for node in reversed(list(tree.walk(bfs=False))):
        new, kind = _convert(node, ctx, kinds)
        if new is not node:
            if node is tree:
                tree = new
            else:
                node.replace(new)
        kinds[id(new)] = kind
    return tree


def column_kind(type_name: str | None, dialect: Dialect) -> str | None:
    """INT, REAL, "float4" (single precision) or None for a column's type name."""
    if not type_name:
        return None
    try:
        dt = exp.DataType.build(type_name, dialect=dialect.sqlglot_name)
    except (sqlglot.errors.SqlglotError, ValueError):
        return None
    if dt.is_type(*exp.DataType.INTEGER_TYPES):
        return INT
    if dt.is_type(exp.DataType.Type.FLOAT):
        return "float4"
    if dt.is_type(exp.DataType.Type.DOUBLE, exp.DataType.Type.DECIMAL):
        return REAL
    return None


# -- the rules ------------------------------------------------------------------------------

_KEPT = (
    exp.Paren,
    exp.Neg,
    exp.Abs,
    exp.Add,
    exp.Sub,
    exp.Mul,
    exp.Case,
    exp.If,
    exp.Coalesce,
    exp.Greatest,
    exp.Least,
    exp.Nullif,
)
# conditions: the same on DuckDB, PostgreSQL and Spark, NaN included (NaN = NaN is true and
# NaN is larger than every number on all three)
_CONDITIONS = (
    exp.EQ,
    exp.NEQ,
    exp.GT,
    exp.GTE,
    exp.LT,
    exp.LTE,
    exp.And,
    exp.Or,
    exp.Not,
    exp.Is,
    exp.In,
    exp.Null,
    exp.Boolean,
)


def _combine(*kinds: str | None) -> str | None:
    if any(k is None for k in kinds):
        return None
    return INT if all(k == INT for k in kinds) else REAL


def _values(node: exp.Expression) -> list[exp.Expression]:
    """The operands whose type is the node's type (not conditions, not NULL literals)."""
    if isinstance(node, exp.Case):
        vals = [i.args.get("true") for i in node.args.get("ifs", [])]
        vals.append(node.args.get("default"))
    elif isinstance(node, exp.If):
        vals = [node.args.get("true"), node.args.get("false")]
    elif isinstance(node, exp.Nullif):
        vals = [node.this]
    else:
        vals = [node.this, *node.expressions]
        if node.args.get("expression") is not None:
            vals.append(node.args["expression"])
    return [v for v in vals if v is not None and not isinstance(v, exp.Null)]


def _convert(
    node: exp.Expression, ctx: _Context, kinds: dict[int, str | None]
) -> tuple[exp.Expression, str | None]:
    def kind(e: exp.Expression | None) -> str | None:
        return None if e is None else kinds.get(id(e))

    if isinstance(node, exp.Column):
        return _column(node, ctx)
    if isinstance(node, exp.Identifier | exp.DataType | exp.DataTypeParam):
        return node, None  # parts of a column reference or a cast, judged there
    if isinstance(node, exp.Literal):
        if node.is_string:
            if ctx.strict and not isinstance(node.parent, exp.EQ | exp.NEQ | exp.In):
                raise ctx.refuse(f"the text {node.sql()} is used other than in = or IN")
            return node, None
        return node, INT if node.this.isdigit() else REAL
    if isinstance(node, exp.Div):
        return _slash(node, ctx, kind(node.this), kind(node.expression))
    if isinstance(node, exp.IntDiv):
        return _int_div(node, ctx, kind(node.this), kind(node.expression))
    if isinstance(node, exp.Mod):
        k = _combine(kind(node.this), kind(node.expression))
        if k != INT and ctx.strict:
            raise ctx.refuse(
                f"{ctx.shown(node)} takes a remainder of operands that are "
                "not both known integer columns or literals (engines differ for others)"
            )
        return node, k
    if isinstance(node, exp.Pow):
        return S.IeeePow(this=node.this, expression=node.expression), REAL
    if isinstance(node, exp.Ln):
        return _log(ctx, node.this, S.IeeeLn(this=node.this)), REAL
    if isinstance(node, exp.Log):
        return _log_of(node, ctx), REAL
    if isinstance(node, exp.Sqrt):
        return S.IeeeSqrt(this=node.this), REAL
    if isinstance(node, exp.Exp):
        return S.IeeeExp(this=node.this), REAL
    if isinstance(node, exp.Cast | exp.TryCast):
        to = node.to
        if to.is_type(exp.DataType.Type.DOUBLE):
            return S.as_double(node.this), REAL
        if ctx.strict:
            raise ctx.refuse(
                f"{ctx.shown(node)} casts to {to.sql(ctx.source.sqlglot_name)}"
                " (engines round and overflow differently); only CAST(... AS DOUBLE) is carried"
            )
        return node, INT if to.is_type(*exp.DataType.INTEGER_TYPES) else None
    if isinstance(node, exp.Greatest | exp.Least):
        node.set("ignore_nulls", True)  # NULLs are skipped on every engine indb renders for
    if isinstance(node, _KEPT):
        if isinstance(node, exp.Paren | exp.Neg | exp.Abs):
            return node, kind(node.this)
        return node, _combine(*(kind(v) for v in _values(node)))
    if isinstance(node, _CONDITIONS):
        return node, None
    if ctx.strict:
        raise ctx.refuse(
            f"{ctx.shown(node)!r} is not among the operators and functions "
            "indb knows to mean the same on every engine (+ - * / // % ^, ln, log, log10, "
            "sqrt, exp, abs, CAST(... AS DOUBLE), CASE, comparisons, COALESCE, GREATEST, "
            "LEAST, NULLIF)"
        )
    return node, None


def _column(node: exp.Column, ctx: _Context) -> tuple[exp.Column, str | None]:
    types = ctx.types or {}
    name = node.name
    type_name = types.get(name)
    if type_name is None and not node.this.quoted:
        # DuckDB and Spark resolve an unquoted name without regard to case; PostgreSQL folds
        # it to lower case: name the column as the source has it, quoted, wherever it goes
        found = next(((c, t) for c, t in types.items() if c.lower() == name.lower()), None)
        if found is not None:
            name, type_name = found
    k = column_kind(type_name, ctx.source)
    parent = node.parent
    cast_up = isinstance(parent, exp.Cast | exp.TryCast) and parent.to.is_type(
        exp.DataType.Type.DOUBLE
    )
    if k == "float4" and ctx.strict and not cast_up:
        # single-precision arithmetic is rounded differently by each engine (DuckDB keeps
        # FLOAT * INT in FLOAT; PostgreSQL computes real * integer in double)
        raise ctx.refuse(
            f"column {name!r} is single precision ({type_name}), which engines round "
            f"differently; refit with CAST({name} AS DOUBLE) in the expression"
        )
    if type_name is not None and ctx.strict:
        node = S.col(name)
    return node, REAL if k == "float4" else k


def _zero_null(ctx: _Context, b: Expr, div: Expr) -> Expr:
    """``div`` (a division by ``b``), NULL for b = 0 where the source engine returns NULL."""
    if ctx.source.zero_division == "null":
        return S.case([(S.ne(b.copy(), S.num(0.0)), div)])
    return div


def _true_division(a: Expr, b: Expr, ctx: _Context) -> Expr:
    return _zero_null(ctx, b, S.IeeeDiv(this=S.as_double(a), expression=S.as_double(b.copy())))


def _slash(node: exp.Div, ctx: _Context, ka: str | None, kb: str | None) -> tuple[Expr, str | None]:
    a, b = node.this, node.expression
    exact = ctx.source.integer_slash == "exact"
    if not ctx.strict:
        # the engine's own division of these operands (a FLOAT stays a FLOAT on DuckDB, two
        # integers truncate on PostgreSQL); only a zero divisor gives IEEE's answer
        kind = REAL if exact or REAL in (ka, kb) else _combine(ka, kb)
        return _zero_null(ctx, b, S.IeeeDiv(this=a, expression=b.copy())), kind
    if exact or REAL in (ka, kb):
        return _true_division(a, b, ctx), REAL
    if ka == kb == INT:  # PostgreSQL: integer / integer truncates toward zero
        return exp.IntDiv(this=a, expression=b), INT
    raise ctx.refuse(
        f"{ctx.shown(node)} divides integers with truncation on "
        f"{ctx.source.name} and exactly otherwise, and the operands' types are not "
        "known; write CAST(... AS DOUBLE) around one operand"
    )


def _int_div(
    node: exp.IntDiv, ctx: _Context, ka: str | None, kb: str | None
) -> tuple[Expr, str | None]:
    a, b = node.this, node.expression
    if ka == kb == INT:  # truncation toward zero on DuckDB (//), PostgreSQL (div) and Spark (DIV)
        return node, INT
    if REAL in (ka, kb) and ctx.source.int_div_fraction == "exact":
        return _true_division(a, b, ctx), REAL  # DuckDB: 7.5 // 2 = 3.75
    if ctx.strict:
        why = (
            "its operands' types are not known (it truncates integers and divides other "
            "numbers exactly on DuckDB)"
            if REAL not in (ka, kb)
            else f"{ctx.source.name} truncates the quotient of non-integers"
        )
        raise ctx.refuse(f"{ctx.shown(node)}: {why}")
    return node, None


def _log(ctx: _Context, x: Expr, log: Expr) -> Expr:
    """A log of ``x``, with the source's NULL for x <= 0 kept where it returns NULL."""
    if ctx.source.log_nonpositive == "null":
        return S.case([(S.gt(x.copy(), S.num(0.0)), log)])
    return log


def _log_of(node: exp.Log, ctx: _Context) -> Expr:
    """``log(x)`` (the source dialect's default base) or ``log(b, x)``."""
    if node.args.get("expression") is None:
        x = node.this
        parser = sqlglot.Dialect.get_or_raise(ctx.source.sqlglot_name).parser_class
        # sqlglot reads a one-argument LOG as the dialect reads it: base 10 on DuckDB and
        # PostgreSQL; Spark's (natural log) is parsed as Ln and never reaches here
        base10 = not getattr(parser, "LOG_DEFAULTS_TO_LN", False)
        return _log(ctx, x, S.IeeeLog10(this=x) if base10 else S.IeeeLn(this=x))
    base, x = node.this, node.expression
    if isinstance(base, exp.Literal) and not base.is_string and float(base.this) == 10.0:
        return _log(ctx, x, S.IeeeLog10(this=x))
    ratio = S.IeeeDiv(this=S.IeeeLn(this=x), expression=S.IeeeLn(this=base))
    if ctx.source.log_nonpositive == "null":
        return S.case([(S.and_(S.gt(x.copy(), S.num(0.0)), S.gt(base.copy(), S.num(0.0))), ratio)])
    return ratio
