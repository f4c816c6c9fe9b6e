"""A quadratic form x'Ax over a row's design vector as SQL, through the categorical blocks.

x has at most one non-zero entry per column group (:mod:`indb.colpairs`): the level the row
takes of each factor, times the value the group multiplies. So x'Ax is a sum over pairs of
*values* (the constant 1, a numeric column, a spline basis function) of their product times
the entry of A where the row's levels meet:

* pairs of columns without factors give constants in the SQL;
* pairs whose columns indicate levels of the factors U (their union) give one number per
  combination of U's levels, looked up in a small VALUES table keyed by those levels and
  LEFT JOINed on the row's levels (a row whose level is NULL, unseen or the reference
  finds no row there, and its columns are 0, as in ``writeback.eta_sql``).

One table per distinct U, one column per pair of values: the SQL grows with the entries a
row can use (L + L r + r^2 for one factor of L levels next to r other columns), not with p^2,
and each row evaluates one hash lookup per table instead of p^2 products (or a CASE of L
branches: at 2,000 levels DuckDB takes some 7 s per 10^6 rows for one such CASE, the lookups
of a whole form 0.6 s). The same tables can carry a linear form x'b (:class:`Linear`) and
say whether each of the row's levels is a known one (``levels``).

The scoring view's standard errors (the covariance, original scale) and the diagnostics
view (eta and (X'WX)^-1, the fit's standardized design) are both written by
:func:`quadratic_form_sql`.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.colpairs import PairColumn
from indb.design import RESERVED_PREFIX
from indb.sqlexpr import Expr

#: the column of a lookup that marks a known level (``levels``)
_KNOWN = ("known",)


@dataclass(frozen=True)
class Linear:
    """x'b to write with the form: ``coefficients`` per column (0: left out), each times
    ``multipliers[column.value]`` (None: 1), which may differ from the form's own (the
    original values, where the form reads standardized ones)."""

    coefficients: np.ndarray
    multipliers: Mapping[Hashable, Expr | None]


@dataclass(frozen=True)
class QuadraticForm:
    """x'Ax as an expression over the source's columns and the ``lookups`` it reads: each a
    VALUES table and the condition to LEFT JOIN it on. ``linear`` is x'b when asked for;
    ``known`` is TRUE where every factor of ``levels`` takes one of its levels (NULL
    otherwise)."""

    value: Expr
    lookups: tuple[tuple[exp.Values, Expr], ...] = ()
    linear: Expr | None = None
    known: Expr | None = None

    def joined(self, query: exp.Select) -> exp.Select:
        """``query`` (FROM the source) with the lookups LEFT JOINed to it."""
        for values, on in self.lookups:
            query = query.join(values.copy(), on=on.copy(), join_type="left", copy=False)
        return query


class _Tables:
    """Numbers keyed by the levels of a set of factors: per set, per combination of its
    levels, per entry key (insertion order, so the SQL is the same for the same input)."""

    def __init__(self, factor_order: Sequence[str]) -> None:
        self.order = list(factor_order)
        self.tables: dict[tuple[str, ...], dict[tuple[str, ...], dict[tuple, float]]] = {}
        self.constants: dict[tuple, float] = {}

    def add(self, levels: Mapping[str, str], key: tuple, amount: float) -> None:
        if not levels:
            self.constants[key] = self.constants.get(key, 0.0) + amount
            return
        union = tuple(f for f in self.order if f in levels)
        cell = self.tables.setdefault(union, {}).setdefault(tuple(levels[f] for f in union), {})
        cell[key] = cell.get(key, 0.0) + amount

    def build(self, name: str) -> tuple[dict[tuple, list[Expr]], list[tuple[exp.Values, Expr]]]:
        """Per entry key the expressions that give it (constants, COALESCEd lookups), and
        the lookups with their join conditions."""
        found: dict[tuple, list[Expr]] = {k: [S.num(a)] for k, a in self.constants.items()}
        lookups: list[tuple[exp.Values, Expr]] = []
        for t, (union, cells) in enumerate(self.tables.items()):
            alias = f"{name}{t}"
            keys = list(dict.fromkeys(k for cell in cells.values() for k in cell))
            names = [f"{RESERVED_PREFIX}l{i}" for i in range(len(union))]
            entries = [f"{RESERVED_PREFIX}e{i}" for i in range(len(keys))]
            rows = [
                exp.Tuple(
                    expressions=[
                        *(S.text(lv) for lv in levels),
                        *(S.num(cell.get(k, 0.0)) for k in keys),
                    ]
                )
                for levels, cell in cells.items()
            ]
            table = exp.Values(
                expressions=rows,
                alias=exp.TableAlias(
                    this=S.ident(alias), columns=[S.ident(c) for c in names + entries]
                ),
            )
            on = S.and_(
                *(
                    S.eq(S.level_text(S.col(f)), S.col(n, alias))
                    for f, n in zip(union, names, strict=True)
                )
            )
            lookups.append((table, on))
            for k, e in zip(keys, entries, strict=True):
                column = S.col(e, alias)
                # a known-level marker stays NULL on a miss; an entry there is 0
                found.setdefault(k, []).append(
                    column if k == _KNOWN else exp.Coalesce(this=column, expressions=[S.num(0.0)])
                )
        return found, lookups


def quadratic_form_sql(
    columns: Sequence[PairColumn],
    rows: np.ndarray,
    cols: np.ndarray,
    values: np.ndarray,
    multipliers: Mapping[Hashable, Expr | None],
    name: str,
    *,
    linear: Linear | None = None,
    levels: Mapping[str, Sequence[str]] | None = None,
) -> QuadraticForm:
    """x'Ax with A given at index pairs (``rows[i]`` <= ``cols[i]``, ``values[i]``; pairs a
    row cannot use are never read), x_j the indicator of column j's levels times
    ``multipliers[columns[j].value]`` (None: 1); with ``linear`` also x'b, and with
    ``levels`` (factor -> its levels, the reference included) whether the row's are known.

    ``name`` prefixes the lookup tables' aliases (the columns get the reserved prefix, so
    they cannot shadow a source column the rest of the query names unqualified).
    """
    order = {v: i for i, v in enumerate(dict.fromkeys(c.value for c in columns))}
    tables = _Tables(list(dict.fromkeys(f for c in columns for f in c.factors)))
    for j, k, a in zip(rows.tolist(), cols.tolist(), values.tolist(), strict=True):
        if a == 0.0:
            continue
        cj, ck = columns[j], columns[k]
        at = dict(zip(cj.factors, cj.levels, strict=True))
        at.update(zip(ck.factors, ck.levels, strict=True))
        pair = tuple(sorted((cj.value, ck.value), key=order.__getitem__))
        tables.add(at, ("q", *pair), a if j == k else 2.0 * a)
    if linear is not None:
        for c, b in zip(columns, linear.coefficients.tolist(), strict=True):
            if b != 0.0:
                tables.add(dict(zip(c.factors, c.levels, strict=True)), ("b", c.value), b)
    for factor, known in (levels or {}).items():
        for level in known:
            tables.add({factor: level}, _KNOWN, 1.0)
    found, lookups = tables.build(name)

    def times(key: tuple, part: Expr, mult: Mapping[Hashable, Expr | None]) -> Expr:
        factors = [mult[v].copy() for v in key[1:] if mult[v] is not None]
        return S.mul(part, *factors)

    quad = [times(k, e, multipliers) for k, parts in found.items() if k[0] == "q" for e in parts]
    lin = None
    if linear is not None:
        lin = balanced_sum(
            [times(k, e, linear.multipliers) for k, ps in found.items() if k[0] == "b" for e in ps]
        )
    known_expr = None
    if levels:
        known_expr = S.and_(*(S.not_(S.is_null(e)) for e in found.get(_KNOWN, [])))
    return QuadraticForm(balanced_sum(quad), tuple(lookups), lin, known_expr)


def balanced_sum(terms: Sequence[Expr]) -> Expr:
    """The sum of ``terms`` as a balanced tree: thousands of terms (a form over 150
    numeric columns has 11,325) nest log2(n) deep, not n deep, in the SQL and in sqlglot's
    recursive renderer."""
    if not terms:
        return S.num(0.0)
    if len(terms) == 1:
        return terms[0]
    half = len(terms) // 2
    return S.add(balanced_sum(terms[:half]), balanced_sum(terms[half:]))
