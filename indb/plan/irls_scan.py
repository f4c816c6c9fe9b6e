"""The IRLS scan and the per-row stages it shares with the log-likelihood and theta queries.

The iteration query computes, in one aggregate scan and
grouped by the factor cells, every sum the solver needs:

* ``s_a_b`` = sum(f w v_a v_b) for value pairs a <= b (v_0 = 1),
* ``t_a``   = sum(f w z v_a),
* ``dev``, ``pear`` (deviance and Pearson chi-squared contributions), ``bad`` (rows whose
  eta left the valid domain), ``n`` (rows) and ``nw`` (frequency-weighted rows),
* when asked (:data:`COVARIANCE_SUMS`), the matrices of a sandwich covariance in the same
  form as X'WX: ``r_a_b`` = sum(f u^2 v_a v_b), the meat (u the row's score factor,
  :func:`covariance_terms`), and ``o_a_b`` = sum(f w_o v_a v_b), the observed information,

where f is the frequency weight, w the working weight and z the working response. Dummy
columns are never multiplied out per row: factor blocks of X'WX come from the GROUP BY.
Stable aliases keep the generated text reproducible for snapshot tests.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.cells import cell_columns, column_groups, level_codes
from indb.design import Design
from indb.families import Family
from indb.links import Link
from indb.plan.context import (
    FOLD_DCONST,
    FOLD_Q,
    FOLD_R2A,
    FOLD_R2Q,
    FOLD_R2Y,
    ROWS,
    PlanContext,
)
from indb.sqlexpr import Expr

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
    if "clu" in ctx.row_extras:
        assert ctx.inputs.cluster is not None
        cols.append(S.alias(ctx.inputs.cluster.copy(), "clu"))
    if "r2" in ctx.row_extras:
        # sums of f pw^2 (...): rescaled with the frequency weight and the square of the
        # prior weight's factor
        f2 = ctx.scaling.weight_factor**2 * ctx.scaling.freq_factor
        a, q = S.col(FOLD_R2A), S.col(FOLD_R2Q)
        if f2 != 1.0:
            a, q = S.mul(a, S.num(f2)), S.mul(q, S.num(f2))
        cols += [S.alias(a, "r2a"), S.alias(S.col(FOLD_R2Y), "r2y"), S.alias(q, "r2q")]
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
    out += ["dconst", "q"] if ctx.folded else []
    out += ["clu"] if "clu" in ctx.row_extras else []
    out += [MODEL_ID] if MODEL_ID in ctx.row_extras else []
    return out + (["r2a", "r2y", "r2q"] if "r2" in ctx.row_extras else [])


#: The column naming the model a row of a model batch belongs to (:mod:`indb.plan.batch_scan`):
#: with it among a context's ``row_extras`` every stage passes it on and the sums are grouped
#: by it before the cells.
MODEL_ID = "mid"


def group_keys(ctx: PlanContext, design: Design) -> list[Expr]:
    """What the IRLS sums are grouped by: the model of a batch (when there is one), then the
    factor cells."""
    keys = [S.col(MODEL_ID)] if MODEL_ID in ctx.row_extras else []
    return keys + [S.col(f.alias) for f in design.factors]


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
    mu0 = null_mean_sql(fam, link, S.col("off"), b0)
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


def null_mean_sql(fam: Family, link: Link, off: Expr, b0: float) -> Expr:
    """The intercept-only model's mean at intercept ``b0``: g^-1(off + b0), clamped into the
    family's range as the fitted model's mean is."""
    return fam.clamp_mu_sql(link.inverse_sql(S.add(off, S.num(b0))))


def null_step_terms(
    fam: Family, b0: float, y: Expr, pw: Expr, fw: Expr, n_mu: Expr, n_dmu: Expr, n_var: Expr
) -> tuple[Expr, Expr, Expr]:
    """Per-row terms of one IRLS step of the intercept-only model with the offset at
    intercept ``b0``: f w0, f w0 z0 and f pw d(y, mu0), from the model's mean ``n_mu``,
    dmu/deta ``n_dmu`` and variance ``n_var`` (columns of a stage); the next intercept is
    sum(f w0 z0) / sum(f w0) (:class:`indb.nullmodel.NullTrack`)."""
    w0 = S.div(S.mul(pw, n_dmu, n_dmu), n_var)
    step = S.case([(S.ne(n_dmu, S.num(0.0)), S.div(S.sub(y, n_mu), n_dmu))], S.num(0.0))
    z0 = S.add(S.num(b0), step)
    return S.mul(fw, w0), S.mul(fw, w0.copy(), z0), S.mul(fw, pw, fam.unit_deviance_sql(y, n_mu))


def _null_extras(ctx: PlanContext, b0: float) -> list[tuple[str, Expr]]:
    """Per-row sums of the intercept-only IRLS step and its deviance."""
    y, pw, fw = S.col("y"), S.col("pw"), S.col("fw")
    n_mu, n_dmu, n_var = S.col("n_mu"), S.col("n_dmu"), S.col("n_var")
    w, wz, dev = null_step_terms(ctx.spec.family, b0, y, pw, fw, n_mu, n_dmu, n_var)
    return [("fnullw", w), ("fnullwz", wz), ("fnulldev", _folded_dev(ctx, dev))]


NULL_COLUMNS = ("n_mu", "n_dmu", "n_var")


def _work_stage(
    ctx: PlanContext,
    design: Design,
    mean_stage: exp.Select,
    extra: Sequence[tuple[str, Expr]] = (),
    keep: Sequence[str] = (),
    slopes: bool = False,
    gradient_only: bool = False,
) -> exp.Select:
    """Stage w: working weight and response, deviance and Pearson contributions; ``extra``
    are computed here from the columns y, mu, pw, fw, dmu, var (and, with ``slopes``, dmu2
    = d^2 mu / deta^2 and dvar = dV/dmu). With ``gradient_only``, ``fwwz`` is f w (z - eta)
    (the gradient's share) instead of f w z."""
    fam, link = ctx.spec.family, ctx.spec.link
    y, mu, pw, fw = S.col("y"), S.col("mu"), S.col("pw"), S.col("fw")
    dmu = link.mu_eta_sql(S.col("seta"), mu)
    slope_cols = (
        [
            S.alias(link.mu_eta_deriv_sql(S.col("seta"), mu.copy()), "dmu2"),
            S.alias(fam.variance_deriv_sql(mu.copy()), "dvar"),
        ]
        if slopes
        else []
    )
    inner = S.select(
        [
            *_passthrough(design, [*_extra_row_cols(ctx), "eta", "bad", "mu", *keep]),
            S.alias(dmu, "dmu"),
            S.alias(fam.variance_sql(mu), "var"),
            *slope_cols,
        ],
        S.subquery(mean_stage, "m"),
    )
    dmu_c, var = S.col("dmu"), S.col("var")
    w = S.div(S.mul(pw, dmu_c, dmu_c), var)
    step = S.case([(S.ne(dmu_c, S.num(0.0)), S.div(S.sub(y, mu), dmu_c))], S.num(0.0))
    z = step if gradient_only else S.add(S.sub(S.col("eta"), S.col("off")), step)
    resid = S.sub(y, mu)
    cols = [
        *group_keys(ctx, design),
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


#: The covariance matrices an IRLS scan can carry, by name: the prefix of their sums and
#: the per-row term (:func:`covariance_terms`) they sum against the values.
COVARIANCE_SUMS = {"meat": ("r", "fuu"), "observed": ("o", "fwo")}


def covariance_terms(ctx: PlanContext) -> dict[str, Expr]:
    """Per-row terms of the covariance scans, over the work stage's columns.

    A row's score (the log-likelihood's gradient, times the dispersion) is u x with
    u = pw (y - mu) (dmu/deta) / V(mu), the score factor; ``fu`` = f u. ``fuu`` = f u^2 is
    its share of the robust meat; on folded rows, whose y and pw are sums over the rows
    they stand for, it is (dmu/deta / V)^2 sum(f pw^2 (y - mu)^2) from the fold's
    ``r2*`` columns. ``fwo`` = f w (1 + (y - mu) c), c = V'(mu) / V(mu) - mu'' / mu'^2
    (mu' and mu'' the derivatives in eta), is the row's share of the observed information
    (minus the log-likelihood's Hessian); c is 0 for a canonical link. Folded rows give
    ``fu`` and ``fwo`` as they are: both are linear in y and pw.
    """
    y, mu, pw, fw = S.col("y"), S.col("mu"), S.col("pw"), S.col("fw")
    dmu, var = S.col("dmu"), S.col("var")
    resid = S.sub(y, mu)
    fu = S.div(S.mul(fw, pw, resid, dmu), var)
    if ctx.folded and "r2" in ctx.row_extras:
        gap = S.sub(S.col("r2y"), mu.copy())
        spread = S.add(S.mul(S.col("r2a"), gap, gap.copy()), S.col("r2q"))
        ratio = S.div(dmu.copy(), var.copy())
        fuu = S.mul(ratio, ratio.copy(), spread)
    else:
        u = S.div(S.mul(pw.copy(), resid.copy(), dmu.copy()), var.copy())
        fuu = S.mul(fw.copy(), u, u.copy())
    w = S.div(S.mul(pw.copy(), dmu.copy(), dmu.copy()), var.copy())
    slope = S.case(
        [
            (
                S.ne(dmu.copy(), S.num(0.0)),
                S.sub(
                    S.div(S.col("dvar"), var.copy()),
                    S.div(S.col("dmu2"), S.mul(dmu.copy(), dmu.copy())),
                ),
            )
        ],
        S.num(0.0),
    )
    fwo = S.mul(fw.copy(), w, S.add(S.num(1.0), S.mul(resid.copy(), slope)))
    return {"fu": fu, "fuu": fuu, "fwo": fwo}


def value_products(design: Design, column: str, prefix: str) -> list[Expr]:
    """sum(column v_a v_b) for value pairs a <= b (v_0 = 1), aliased ``prefix_a_b``: a
    matrix in the form of X'WX (:func:`indb.solver.assemble`)."""
    vals = [None, *(S.col(v.alias) for v in design.values[1:])]
    m = len(vals)
    out: list[Expr] = []
    for a in range(m):
        for b in range(a, m):
            prod = [S.col(column)] + [vals[i] for i in (a, b) if i]
            out.append(S.alias(S.psum(S.mul(*prod)), f"{prefix}_{a}_{b}"))
    return out


def gram_query(
    ctx: PlanContext,
    design: Design,
    beta: np.ndarray | None,
    *,
    ybar: float,
    null_mu: Expr | None = None,
    cells: Sequence[tuple[str, ...]] | None = None,
    null_intercept: float | None = None,
    theta: float | None = None,
    covariance: Sequence[str] = (),
    gradient_only: bool = False,
) -> exp.Select:
    """The IRLS scan: all sums for X'WX, X'Wz, deviance and Pearson, grouped by factor cells.

    ``beta`` are the standardized coefficients (None: the family's starting means).
    ``null_mu`` adds ``nulldev``, the deviance at a per-row null-model mean;
    ``null_intercept`` adds ``nullw``, ``nullwz`` and ``nulldev``: one IRLS step of the
    intercept-only model with the offset, at that intercept. ``theta`` adds ``thetaa`` and
    ``thetab``, the sums of :func:`theta_terms` for a Newton step on the negative binomial
    theta at this scan's means (so the step costs no scan of its own). ``covariance`` names
    the matrices of :data:`COVARIANCE_SUMS` to add (the robust meat, the observed information).
    ``gradient_only`` leaves X'WX out and sums the gradient X'W(z - eta) as the ``t_a``
    (:func:`indb.solver.chord` makes a step of it with X'WX from elsewhere).
    """
    if "meat" in covariance and ctx.folded:
        ctx = dataclasses.replace(ctx, row_extras=(*ctx.row_extras, "r2"))
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
    if theta is not None:
        extra += theta_terms(theta)
    terms = covariance_terms(ctx)
    matrices = [COVARIANCE_SUMS[name] for name in covariance]
    work = _work_stage(
        ctx,
        design,
        mean,
        [*extra, *((column, terms[column]) for _, column in matrices)],
        keep,
        slopes="observed" in covariance,
        gradient_only=gradient_only,
    )
    sums = scan_sums(design, [n for n, _ in extra], matrices, gram=not gradient_only)
    return S.select(
        [*group_keys(ctx, design), *sums],
        S.subquery(work, "w"),
        group_by=group_keys(ctx, design),
    )


def scan_sums(
    design: Design,
    extra: Sequence[str] = (),
    matrices: Sequence[tuple[str, str]] = (),
    gram: bool = True,
) -> list[Expr]:
    """The aggregates of an IRLS scan over its work stage (:func:`gram_query`): the X'WX
    (unless not ``gram``) and X'Wz products, deviance, Pearson, bad rows, row counts, the
    sums of the ``extra`` per-row terms (``fname`` summed as ``name``) and of the
    covariance ``matrices``."""
    vals = [None, *(S.col(v.alias) for v in design.values[1:])]
    aggs: list[Expr] = value_products(design, "fww", "s") if gram else []
    m = len(design.values)
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
    for name in extra:
        aggs.append(S.alias(S.psum(S.col(name)), name.replace("f", "", 1)))
    for prefix, column in matrices:
        aggs += value_products(design, column, prefix)
    return aggs


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


def theta_terms(theta: float) -> list[tuple[str, Expr]]:
    """Per-row terms of the sums ``a`` = sum(c [ln(theta+mu) + (y+theta)/(theta+mu)]) and
    ``b`` = sum(c [1/(theta+mu) + (mu-y)/(theta+mu)^2]), c = f * pw: with the response
    histogram, the score of theta and its derivative at fixed means
    (:func:`indb.solver.theta_score`)."""
    y, mu = S.col("y"), S.col("mu")
    c = S.mul(S.col("fw"), S.col("pw"))
    th = S.num(theta)
    tm = S.add(th, mu)
    a = S.mul(c, S.add(S.ln(tm), S.div(S.add(y, th.copy()), tm.copy())))
    b = S.mul(
        c.copy(),
        S.add(
            S.div(S.num(1.0), tm.copy()), S.div(S.sub(mu.copy(), y.copy()), S.mul(tm, tm.copy()))
        ),
    )
    return [("fthetaa", a), ("fthetab", b)]


def theta_query(ctx: PlanContext, design: Design, beta: np.ndarray, theta: float) -> exp.Select:
    """Sums for a Newton step on the negative binomial theta at fixed means.

    ``a`` = sum(c [ln(theta+mu) + (y+theta)/(theta+mu)]), ``b`` = sum(c [1/(theta+mu) +
    (mu-y)/(theta+mu)^2]), ``mom`` = sum(c (y/mu - 1)^2) and ``inv`` = sum(c / mu), with
    c = f * pw: E[(y/mu - 1)^2] = 1/mu + 1/theta gives theta's moment estimate.
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
    inv = S.div(c.copy(), mu.copy())
    return S.select(
        [
            S.alias(S.psum(a), "a"),
            S.alias(S.psum(b), "b"),
            S.alias(S.psum(mom), "mom"),
            S.alias(S.psum(inv), "inv"),
        ],
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
