"""The cluster-robust meat in one scan: each cluster's score summed inside the engine, then
the outer products of those sums summed there too; nothing per cluster leaves the database.

The meat is M = sum over clusters g of S_g S_g', where S_g = sum over g's rows of f u x
(u the score factor, :func:`indb.plan.irls_scan.covariance_terms`). Dummy columns are
never multiplied out: a cluster's score is kept per factor cell, T_gc (one sum per value
v_a), and S_g S_g' = sum over pairs of g's cells (c, c') of T_gc T_gc'. So the scan is

1. ``per``: the rows grouped by cluster and cell, ``u_a`` = sum(f u v_a);
2. without factors, one row: ``c_a_b`` = sum(u_a u_b) over the clusters and their count;
   with factors, ``per`` joined with itself on the cluster, grouped by the pair of cells
   (``l*``, ``r*``), ``c_a_b`` = sum(left u_a * right u_b) for a <= b (the pair (c', c)
   holds the transposes), and the count of clusters beside every row.

The engine holds one row per cluster and cell while it aggregates (DuckDB and PostgreSQL
keep a CTE that is read twice as one result; Spark reuses the exchange), and returns one
row per pair of cells that meet in some cluster.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.design import Design
from indb.plan.context import PlanContext
from indb.plan.irls_scan import (
    _eta_from_beta,
    _mean_stage,
    _work_stage,
    covariance_terms,
)

#: the number of clusters in the cluster scan's result
CLUSTERS = "clusters"


def scores_query(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray,
    cells: list[tuple[str, ...]] | None = None,
) -> exp.Select:
    """Each cluster's score per factor cell at the standardized coefficients ``beta``:
    the kept rows grouped by cluster (``clu``) and cell, ``u_a`` = sum(f u v_a)."""
    ctx = dataclasses.replace(ctx, row_extras=(*ctx.row_extras, "clu"))
    mean = _mean_stage(ctx, design, _eta_from_beta(ctx, design, beta, cells))
    fu = covariance_terms(ctx)["fu"]
    work = _work_stage(ctx, design, mean, [("clu", S.col("clu")), ("fu", fu)])
    values = [None, *(v.alias for v in design.values[1:])]
    sums = [
        S.alias(S.psum(S.mul(S.col("fu"), *([S.col(v)] if v else []))), f"u_{a}")
        for a, v in enumerate(values)
    ]
    keys = [S.col("clu"), *(S.col(f.alias) for f in design.factors)]
    return S.select([*keys, *sums], S.subquery(work, "w"), group_by=[k.copy() for k in keys])


def _pairs(design: Design) -> list[tuple[int, int]]:
    m = len(design.values)
    return [(a, b) for a in range(m) for b in range(a, m)]


def totals_query(design: Design, scores: exp.Select) -> exp.Select:
    """The meat of a design without factors, from :func:`scores_query` (one row per
    cluster, read once): the count of clusters and ``c_a_b`` = sum(u_a u_b)."""
    products = [
        S.alias(S.psum(S.mul(S.col(f"u_{a}"), S.col(f"u_{b}"))), f"c_{a}_{b}")
        for a, b in _pairs(design)
    ]
    return S.select([S.alias(S.count_star(), CLUSTERS), *products], S.subquery(scores, "per"))


def pairs_query(design: Design, table: exp.Expression) -> exp.Select:
    """The meat of a design with factors, from the stored rows of :func:`scores_query` in
    ``table``: joined with themselves on the cluster and summed by the pair of cells
    (``l*``, ``r*``), ``c_a_b`` = sum(left u_a * right u_b) for a <= b, and the count of
    clusters beside every pair."""
    left, right = "a", "b"
    factors = [f.alias for f in design.factors]

    def rel(alias: str | None) -> exp.Expression:
        t = table.copy()
        t.set("alias", exp.TableAlias(this=S.ident(alias)) if alias else None)
        return t

    cells = [S.alias(S.col(f, left), f"l{i}") for i, f in enumerate(factors)]
    cells += [S.alias(S.col(f, right), f"r{i}") for i, f in enumerate(factors)]
    products = [
        S.alias(S.psum(S.mul(S.col(f"u_{a}", left), S.col(f"u_{b}", right))), f"c_{a}_{b}")
        for a, b in _pairs(design)
    ]
    distinct = S.select([S.col("clu")], rel(None), group_by=[S.col("clu")])
    count = S.select([S.alias(S.count_star(), CLUSTERS)], S.subquery(distinct, "d"))
    query = S.select(
        [*cells, *products, S.alias(S.max_(S.col(CLUSTERS, "g")), CLUSTERS)],
        rel(left),
        group_by=[*(S.col(f, left) for f in factors), *(S.col(f, right) for f in factors)],
    )
    query = query.join(
        rel(right),
        on=S.eq(S.col("clu", left), S.col("clu", right)),
        join_type="inner",
        copy=False,
    )
    return query.join(S.subquery(count, "g"), join_type="cross", copy=False)
