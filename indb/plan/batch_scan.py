"""The model-batch scan: one read of the table answers an IRLS iteration of several models
that share the fit's rows and design (the drop-one models of :mod:`indb.batchfit`; any set
of coefficient vectors on the same design, e.g. a cross-validation's fold models).

The kept rows are cross-joined with a small VALUES table of model ids that also carries
each model's coefficients of the design columns without factors; the factor parts of eta
come from one VALUES table per factor set keyed by model id and levels (left-joined, so a
missing entry is a 0 coefficient). From eta on, the stages are the IRLS scan's
(:mod:`indb.plan.irls_scan`) with the model id passed through, and the sums are grouped by
model id, then by the factor cells. A model whose design leaves a column out simply has a
0 coefficient there: its sums still cover every column, and the solver reads only its own.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.design import Design
from indb.plan.context import ROWS, PlanContext
from indb.plan.irls_scan import (
    MAX_CELL_JOIN,
    MODEL_ID,
    _cell_table,
    _extra_row_cols,
    _mean_stage,
    _passthrough,
    _values_table,
    _work_stage,
    group_keys,
    rows_select,
    scan_sums,
)
from indb.sqlexpr import Expr

#: alias of the table of model ids (and their coefficients of columns without factors)
MODELS = "bm"


def batch_context(ctx: PlanContext) -> PlanContext:
    """``ctx`` with the model id passed through every stage and grouped by."""
    if MODEL_ID in ctx.row_extras:
        return ctx
    return dataclasses.replace(ctx, row_extras=(*ctx.row_extras, MODEL_ID))


def plain_columns(design: Design) -> list[int]:
    return [j for j, c in enumerate(design.columns) if not c.factors]


def models_table(design: Design, betas: Mapping[int, np.ndarray]) -> exp.Values:
    """One row per model: its id and its coefficients of the columns without factors."""
    plain = plain_columns(design)
    rows = [
        exp.Tuple(
            expressions=[
                exp.Literal.number(mid),
                *(S.num(float(betas[mid][j])) for j in plain),
            ]
        )
        for mid in sorted(betas)
    ]
    return _values_table(MODELS, [MODEL_ID, *(f"b{j}" for j in plain)], rows)


def _factor_tables(
    design: Design, betas: Mapping[int, np.ndarray]
) -> tuple[list[tuple[exp.Values, Expr]], list[Expr]]:
    """Per factor set, a table keyed by model id and levels holding the coefficients by the
    value they multiply (rows whose coefficients are all 0 are left out), its join
    condition, and the terms of eta it gives."""
    sets: dict[tuple[int, ...], list[int]] = {}
    for j, c in enumerate(design.columns):
        if c.factors:
            sets.setdefault(c.factors, []).append(j)
    joins: list[tuple[exp.Values, Expr]] = []
    terms: list[Expr] = []
    for g, (fset, idx) in enumerate(sets.items()):
        vals = sorted({design.columns[j].value for j in idx})
        rows = []
        for mid in sorted(betas):
            table: dict[tuple[str, ...], dict[int, float]] = {}
            for j in idx:
                b = float(betas[mid][j])
                if b != 0.0:
                    c = design.columns[j]
                    table.setdefault(c.levels, {})[c.value] = b
            rows += [
                exp.Tuple(
                    expressions=[
                        exp.Literal.number(mid),
                        *(S.text(lv) for lv in lvls),
                        *(S.num(coefs.get(v, 0.0)) for v in vals),
                    ]
                )
                for lvls, coefs in sorted(table.items())
            ]
        if not rows:  # every model holds this factor set at 0
            continue
        name = f"k{g}"
        colnames = [MODEL_ID, *(f"l{i}" for i in range(len(fset))), *(f"c{v}" for v in vals)]
        on = S.and_(
            S.eq(S.col(MODEL_ID, MODELS), S.col(MODEL_ID, name)),
            *(
                S.eq(S.col(design.factors[fi].alias, ROWS), S.col(f"l{i}", name))
                for i, fi in enumerate(fset)
            ),
        )
        joins.append((_values_table(name, colnames, rows), on))
        for v in vals:
            coef = exp.Coalesce(this=S.col(f"c{v}", name), expressions=[S.num(0.0)])
            terms.append(coef if v == 0 else S.mul(coef, S.col(design.values[v].alias, ROWS)))
    return joins, terms


def _cells_table(
    design: Design, betas: Mapping[int, np.ndarray], cells: Sequence[tuple[str, ...]]
) -> tuple[list[tuple[exp.Values, Expr]], list[Expr]]:
    """One table keyed by model id and the whole observed cell (one level of every factor)
    holding each model's summed factor coefficients by value: one join per row and model
    where :func:`_factor_tables` takes one per factor set."""
    rows: list[exp.Tuple] = []
    vals: list[int] = sorted({c.value for c in design.columns if c.factors})
    for mid in sorted(betas):
        got_vals, table_rows = _cell_table(design, betas[mid], cells)
        pos = {v: i for i, v in enumerate(got_vals)}
        rows += [
            exp.Tuple(
                expressions=[
                    exp.Literal.number(mid),
                    *(S.text(lv) for lv in lv_t),
                    *(S.num(co[pos[v]] if v in pos else 0.0) for v in vals),
                ]
            )
            for lv_t, co in table_rows
        ]
    if not rows:
        return [], []
    name = "k"
    colnames = [MODEL_ID, *(f"l{i}" for i in range(len(design.factors))), *(f"c{v}" for v in vals)]
    on = S.and_(
        S.eq(S.col(MODEL_ID, MODELS), S.col(MODEL_ID, name)),
        *(S.eq(S.col(f.alias, ROWS), S.col(f"l{i}", name)) for i, f in enumerate(design.factors)),
    )
    terms = []
    for v in vals:
        coef = exp.Coalesce(this=S.col(f"c{v}", name), expressions=[S.num(0.0)])
        terms.append(coef if v == 0 else S.mul(coef, S.col(design.values[v].alias, ROWS)))
    return [(_values_table(name, colnames, rows), on)], terms


def _batch_eta(
    ctx: PlanContext,
    design: Design,
    betas: Mapping[int, np.ndarray],
    cells: Sequence[tuple[str, ...]] | None,
) -> exp.Select:
    """Stage e of a batch: each kept row once per model, with that model's eta."""
    terms: list[Expr] = [S.col("off", ROWS)]
    for j in plain_columns(design):
        b = S.col(f"b{j}", MODELS)
        v = design.columns[j].value
        terms.append(b if v == 0 else S.mul(b, S.col(design.values[v].alias, ROWS)))
    few = cells is not None and 0 < len(cells) * len(betas) <= MAX_CELL_JOIN
    if design.factors and few:
        joins, factor_terms = _cells_table(design, betas, cells)
    else:
        joins, factor_terms = _factor_tables(design, betas)
    q = S.select(
        [
            *(S.col(c.name, ROWS) for c in _passthrough(design, _extra_row_cols(ctx))),
            S.col(MODEL_ID, MODELS),
            S.alias(S.add(*terms, *factor_terms), "eta"),
        ],
        S.subquery(rows_select(ctx, design), ROWS),
    )
    q = q.join(models_table(design, betas), join_type="cross", copy=False)
    for values, on in joins:
        q = q.join(values, on=on, join_type="left", copy=False)
    return q


def batch_query(
    ctx: PlanContext,
    design: Design,
    betas: Mapping[int, np.ndarray],
    cells: Sequence[tuple[str, ...]] | None = None,
) -> exp.Select:
    """One IRLS scan for every model of ``betas`` (model id -> standardized coefficients on
    ``design``): the sums of :func:`indb.plan.irls_scan.gram_query`, grouped by ``mid``
    (the model id) and then by the factor cells. With the observed ``cells`` known (from an
    earlier scan) and few enough, the factor parts of eta come from one table keyed by
    model id and cell."""
    eta = _batch_eta(ctx, design, betas, cells)
    bctx = batch_context(ctx)
    work = _work_stage(bctx, design, _mean_stage(bctx, design, eta))
    keys = group_keys(bctx, design)
    return S.select([*keys, *scan_sums(design)], S.subquery(work, "w"), group_by=keys)
