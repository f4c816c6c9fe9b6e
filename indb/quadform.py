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
and each row evaluates one hash lookup per table instead of p^2 products. The scoring view's
standard errors (the covariance, original scale) and the diagnostics view's leverage ((X'WX)^-1,
the fit's standardized design) are both written by :func:`quadratic_form_sql`.
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


@dataclass(frozen=True)
class QuadraticForm:
    """x'Ax as an expression over the source's columns and the ``lookups`` it reads: each a
    VALUES table and the condition to LEFT JOIN it on."""

    value: Expr
    lookups: tuple[tuple[exp.Values, Expr], ...] = ()

    def joined(self, query: exp.Select) -> exp.Select:
        """``query`` (FROM the source) with the lookups LEFT JOINed to it."""
        for values, on in self.lookups:
            query = query.join(values.copy(), on=on.copy(), join_type="left", copy=False)
        return query


def quadratic_form_sql(
    columns: Sequence[PairColumn],
    rows: np.ndarray,
    cols: np.ndarray,
    values: np.ndarray,
    multipliers: Mapping[Hashable, Expr | None],
    name: str,
) -> QuadraticForm:
    """x'Ax with A given at index pairs (``rows[i]`` <= ``cols[i]``, ``values[i]``; pairs a
    row cannot use are never read), x_j the indicator of column j's levels times
    ``multipliers[columns[j].value]`` (None: 1).

    ``name`` prefixes the lookup tables' aliases (the columns get the reserved prefix, so
    they cannot shadow a source column the rest of the query names unqualified).
    """
    order = {v: i for i, v in enumerate(dict.fromkeys(c.value for c in columns))}
    factor_order = list(dict.fromkeys(f for c in columns for f in c.factors))
    constants: dict[tuple, float] = {}
    tables: dict[tuple[str, ...], dict[tuple[str, ...], dict[tuple, float]]] = {}
    for j, k, a in zip(rows.tolist(), cols.tolist(), values.tolist(), strict=True):
        if a == 0.0:
            continue
        cj, ck = columns[j], columns[k]
        pair = tuple(sorted((cj.value, ck.value), key=order.__getitem__))
        amount = a if j == k else 2.0 * a
        levels = dict(zip(cj.factors, cj.levels, strict=True))
        levels.update(zip(ck.factors, ck.levels, strict=True))
        if not levels:
            constants[pair] = constants.get(pair, 0.0) + amount
            continue
        union = tuple(f for f in factor_order if f in levels)
        cell = tables.setdefault(union, {}).setdefault(tuple(levels[f] for f in union), {})
        cell[pair] = cell.get(pair, 0.0) + amount

    def product(pair: tuple) -> list[Expr]:
        return [multipliers[v].copy() for v in pair if multipliers[v] is not None]

    terms: list[Expr] = [
        S.mul(S.num(a), *product(pair)) for pair, a in constants.items() if a != 0.0
    ]
    lookups: list[tuple[exp.Values, Expr]] = []
    for t, (union, cells) in enumerate(tables.items()):
        alias = f"{name}{t}"
        pairs = sorted(
            {p for cell in cells.values() for p in cell}, key=lambda p: [order[v] for v in p]
        )
        keys = [f"{RESERVED_PREFIX}l{i}" for i in range(len(union))]
        entries = [f"{RESERVED_PREFIX}e{i}" for i in range(len(pairs))]
        table_rows = [
            exp.Tuple(
                expressions=[*(S.text(lv) for lv in key), *(S.num(cell.get(p, 0.0)) for p in pairs)]
            )
            for key, cell in cells.items()
        ]
        table = exp.Values(
            expressions=table_rows,
            alias=exp.TableAlias(this=S.ident(alias), columns=[S.ident(c) for c in keys + entries]),
        )
        on = S.and_(
            *(
                S.eq(S.level_text(S.col(f)), S.col(k, alias))
                for f, k in zip(union, keys, strict=True)
            )
        )
        lookups.append((table, on))
        for p, e in zip(pairs, entries, strict=True):
            entry = exp.Coalesce(this=S.col(e, alias), expressions=[S.num(0.0)])
            terms.append(S.mul(entry, *product(p)))
    return QuadraticForm(balanced_sum(terms), tuple(lookups))


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
