"""The covariance kinds of a fit (``covariance`` option): which sums the IRLS scans carry,
the cluster scan, and the sandwich at the final coefficients (:mod:`indb.sandwich`).

``model`` needs nothing beyond IRLS. ``robust`` needs the meat sum(f u^2 x x') and, for a
non-canonical link, the observed information, both at the final coefficients: they ride
in the last IRLS scans (``irls.CARRY_STEP``), and one scan at the final coefficients adds
them only when the last scan did not carry them. ``cluster`` needs the observed
information the same way and one scan of its own, grouped by cluster inside the engine
(:func:`indb.plan.cluster_scan.cluster_query`).
"""

from __future__ import annotations

import math
import time
import uuid

import numpy as np
from sqlglot import exp

from indb import sandwich, solver
from indb.design import Design
from indb.errors import SpecError
from indb.fitrun import FitRun
from indb.irls import IrlsState
from indb.plan.cluster_scan import pairs_query, scores_query, totals_query
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query
from indb.results import COVARIANCE_MAX_TERMS
from indb.spec import ModelSpec

#: the iteration log's phase of a scan that only serves the covariance
PHASE = "covariance"
_SUM_NAMES = {"meat": "robust meat", "observed": "observed information"}


def carried_sums(spec: ModelSpec) -> tuple[str, ...]:
    """The covariance sums (``plan.irls_scan.COVARIANCE_SUMS``) the last IRLS scan should
    carry for ``spec``'s kind: the meat for ``robust``, the observed information wherever
    a sandwich is taken with a non-canonical link."""
    if spec.covariance == "model":
        return ()
    meat = ("meat",) if spec.covariance == "robust" else ()
    observed = () if spec.family.is_canonical(spec.link) else ("observed",)
    return meat + observed


def check_size(spec: ModelSpec, design: Design) -> None:
    """Refuse, before any IRLS scan, a sandwich for a design too large to hold its whole
    covariance matrix (the many-levels route keeps only the inverse's factors)."""
    if spec.covariance == "model" or design.p <= COVARIANCE_MAX_TERMS:
        return
    raise SpecError(
        f"covariance {spec.covariance!r} needs the whole covariance matrix, which indb forms "
        f"for at most {COVARIANCE_MAX_TERMS:,} coefficients; this design has {design.p:,}: "
        "use covariance='model' (CLI --covariance model), or merge levels"
    )


def sandwich_at(
    ctx: PlanContext, design: Design, run: FitRun, state: IrlsState, rows: int
) -> sandwich.Sandwich | None:
    """The sandwich covariance of ``ctx.spec``'s kind at the final coefficients
    (``state.beta``), in the units of the fit's standardized coefficients and of its
    internal rescaling; None for the ``model`` kind. ``rows`` are the rows used (N)."""
    spec = ctx.spec
    if spec.covariance == "model":
        return None
    sums = _with_carried(ctx, design, run, state)
    # a scan of its own is at the final coefficients: the bread is taken from its X'WX too
    solution = state.solution if sums is state.sums else solver.solve(sums.xtwx, sums.xtwz)
    b, note = sandwich.bread(solution, sums.matrices.get("observed"))
    aliased = solution.aliased
    if spec.covariance == "robust":
        # the internal rescaling multiplies frequency weights by freq_factor: the meat
        # (one f per row) by it, the bread by its inverse twice; weights' and response's
        # factors cancel as they do in the model-based covariance
        factor = run.scaling.freq_factor
        cov = sandwich.covariance(b, sums.matrices["meat"].toarray(), aliased, factor)
        return sandwich.Sandwich(cov, None, note)
    meat, clusters = _cluster_meat(ctx, design, run, state)
    if clusters < 2:
        raise SpecError(
            f"cluster expression {spec.cluster!r} takes {clusters} value(s) over the {rows:,} "
            "rows used; cluster-robust errors need two clusters or more (more than a few "
            "dozen to be trusted): use a finer cluster, or covariance='robust'"
        )
    rank = int((~aliased).sum())
    factor = sandwich.cluster_factor(clusters, rows, rank)
    return sandwich.Sandwich(sandwich.covariance(b, meat, aliased, factor), clusters, note)


def _with_carried(ctx: PlanContext, design: Design, run: FitRun, state: IrlsState) -> solver.Sums:
    """The final scan's sums with the carried covariance sums: the last IRLS scan's, or,
    when it carried none, one IRLS scan at the final coefficients that does."""
    wanted = carried_sums(ctx.spec)
    if all(name in state.sums.matrices for name in wanted):
        return state.sums
    t0 = time.perf_counter()
    tree = gram_query(
        ctx, design, state.beta, ybar=math.nan, cells=state.sums.cell_keys, covariance=wanted
    )
    sums = solver.assemble(design, run.query(tree))
    run.check_rows(sums)
    _record(run, sums.deviance, time.perf_counter() - t0)
    return sums


def _cluster_meat(
    ctx: PlanContext, design: Design, run: FitRun, state: IrlsState
) -> tuple[np.ndarray, int]:
    """The cluster scan: the clusters' scores per cell summed in one read of the source,
    their outer products summed in the engine (:mod:`indb.plan.cluster_scan`).

    Without factors that is one query. With factors the scores per cluster and cell are
    joined with themselves on the cluster, so they are stored first (a temporary table,
    dropped at once): the source is read once on every engine (Spark would read it again
    for each side of the join)."""
    t0 = time.perf_counter()
    name, stored, meat = cluster_plan(ctx, design, state.beta, state.sums.cell_keys)
    if name is not None:
        run.temp_tables.append(name)
    for stmt in stored:
        run.engine.execute(stmt)
    rows = run.query(meat)
    if name is not None:
        run.engine.execute(ctx.dialect.drop_materialized(name))
        run.temp_tables.remove(name)
    _record(run, math.nan, time.perf_counter() - t0)
    return sandwich.cluster_meat(design, rows)


def cluster_plan(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray,
    cells: list[tuple[str, ...]] | None = None,
) -> tuple[str | None, list[str], exp.Select]:
    """The cluster scan at ``beta``: the temporary table it stores the scores per cluster
    and cell in (None without factors), the statements that store them, and the query that
    returns the meat's sums."""
    scores = scores_query(ctx, design, beta, cells)
    if not design.factors:
        return None, [], totals_query(design, scores)
    name = f"indb_scores_{uuid.uuid4().hex[:12]}"
    stored = ctx.dialect.materialize(name, scores)
    return name, stored, pairs_query(design, ctx.dialect.table(name))


def dry_run_sql(ctx: PlanContext, design: Design, beta: np.ndarray) -> list[tuple[str, str]]:
    """What the covariance adds to a fit's SQL, for a dry run: the last IRLS scans with the
    sums they carry, and the cluster scan."""
    out: list[tuple[str, str]] = []
    carried = carried_sums(ctx.spec)
    if carried:
        tree = gram_query(ctx, design, beta, ybar=math.nan, covariance=carried)
        what = " and the ".join(_SUM_NAMES[name] for name in carried)
        label = f"the last IRLS scans, with the {what} (no scan added)"
        out.append((label, ctx.dialect.render(tree)))
    if ctx.spec.covariance == "cluster":
        _, stored, meat = cluster_plan(ctx, design, beta)
        label = "cluster scan (once, at the final coefficients)"
        out += [(f"{label}: the clusters' scores per cell, stored", sql) for sql in stored]
        out.append((label, ctx.dialect.render(meat)))
    return out


def _record(run: FitRun, deviance: float, seconds: float) -> None:
    phase, run.phase = run.phase, PHASE
    try:
        run.record(deviance, math.nan, 0, seconds)
    finally:
        run.phase = phase
