"""The log-link scan: the IRLS scan of a log-link, V(mu) = mu^p model with the factor effects
multiplied in after the scan (:mod:`indb.logsums`) instead of joined per row."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.design import Design
from indb.plan.batch_scan import MODELS, models_table, plain_columns
from indb.plan.context import ROWS, PlanContext
from indb.plan.irls_scan import MODEL_ID, rows_select
from indb.sqlexpr import Expr

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
    batch: Mapping[int, np.ndarray] | None = None,
    gradient_only: bool = False,
) -> exp.Select:
    """The IRLS scan of a log-link, V(mu) = mu^p model without a join to factor effects.

    With ``batch`` (model id -> coefficients; ``beta`` is then not read) the scan answers
    for every model at once, as :func:`indb.plan.batch_scan.batch_query` does: the rows
    cross-joined with the table of model ids and their coefficients of the columns without
    factors, the sums grouped by model id first (the factor effects, multiplied in after
    the scan, are each model's own).

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
    terms would give them. With ``gradient_only`` the ``s_a_b`` are summed for a = 0 only
    (p + 1 sums instead of (p + 1)(p + 2) / 2): with ``r_a`` they give the gradient and the
    deviance, and the step takes X'WX from elsewhere (:func:`indb.logsums.assemble_log_scan`).
    """
    fam = ctx.spec.family
    p = float(fam.variance_power)
    keep = [S.col(f.alias) for f in design.factors] + [S.col(v.alias) for v in design.values[1:]]
    base = [S.col(n) for n in ("y", "pw", "fw", "off")]
    t = S.col("t")
    if batch is None:
        terms: list[Expr] = [S.col("off")]
        for j, c in enumerate(design.columns):
            if c.factors or float(beta[j]) == 0.0:
                continue
            b = S.num(float(beta[j]))
            terms.append(b if c.value == 0 else S.mul(b, S.col(design.values[c.value].alias)))
        staged = S.select(
            [*keep, *base, S.alias(S.add(*terms), "t")], S.subquery(rows_select(ctx, design), ROWS)
        )
    else:
        terms = [S.col("off", ROWS)]
        for j in plain_columns(design):
            b = S.col(f"b{j}", MODELS)
            v = design.columns[j].value
            terms.append(b if v == 0 else S.mul(b, S.col(design.values[v].alias, ROWS)))
        staged = S.select(
            [
                *(S.col(k.name, ROWS) for k in [*keep, *base]),
                S.col(MODEL_ID, MODELS),
                S.alias(S.add(*terms), "t"),
            ],
            S.subquery(rows_select(ctx, design), ROWS),
        ).join(models_table(design, batch), join_type="cross", copy=False)
        keep = [S.col(MODEL_ID), *keep]
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
        for a in range(1 if gradient_only else m):
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
    groups = [S.col(MODEL_ID)] if batch is not None else []
    groups += [S.col(f.alias) for f in design.factors]
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
