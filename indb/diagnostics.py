"""The diagnostics view ``NAME_diagnostics``: residuals, leverage and Cook's distance per row
of the training source, as SQL over it.

The definitions are those of statsmodels' GLM results and its influence object, with pw the
prior weight (``weight`` times the binomial ``trials``), V the variance function, g the link,
phi the dispersion and k the number of estimated coefficients:

* ``fitted`` = mu; ``resid_response`` = y - mu (for grouped binomial data y and mu are
  proportions, as ``fitted`` is; statsmodels multiplies this one by the trials);
* ``resid_pearson`` = (y - mu) sqrt(pw / V(mu)), not divided by the dispersion;
* ``resid_deviance`` = sign(y - mu) sqrt(pw d(y, mu)), d the unit deviance;
* ``resid_working`` = (y - mu) g'(mu), the working residual z - eta of IRLS;
* ``leverage`` h = w x'(X'WX)^-1 x with w = pw / (g'(mu)^2 V(mu)): the diagonal of the hat
  matrix with the expected information, as IRLS weights the rows (statsmodels'
  ``get_influence(observed=False)``; the same as its default for a canonical link);
* ``cooks_distance`` = r^2 h / (k (1 - h)^2) with r = resid_pearson / sqrt(phi (1 - h)) the
  studentized Pearson residual.

A frequency weight says a row stands for that many identical rows; every column is the value
for one of them (the residuals never carry it; leverage and Cook's distance are those of one
copy, as statsmodels gives them on the rows written out that many times).

(X'WX)^-1 comes from the result (:attr:`indb.results.FitResult.inverse_entries`, at the column
pairs one row can use together), and x'(X'WX)^-1 x is written through the categorical blocks
(:mod:`indb.quadform`) on the fit's standardized design, so a model of thousands of levels
needs neither dummies nor p^2 SQL terms. Rows the fit did not use (a NULL in a model column,
a level it never saw) get NULL in every added column.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from sqlglot import exp

from indb import colpairs
from indb import sqlexpr as S
from indb import writeback as W
from indb.design import RESERVED_PREFIX
from indb.engines.base_dialect import Dialect
from indb.errors import SpecError
from indb.quadform import Linear, QuadraticForm, quadratic_form_sql
from indb.results import FitResult
from indb.sqlexpr import Expr

#: the columns the view adds to the source's, in order
COLUMNS = (
    "fitted",
    "resid_response",
    "resid_pearson",
    "resid_deviance",
    "resid_working",
    "leverage",
    "cooks_distance",
)
SUFFIX = "_diagnostics"
#: alias prefix of the leverage form's lookup tables
LOOKUP = RESERVED_PREFIX + "h"


def view_name(model: str) -> str:
    """``NAME_diagnostics``, refused where it would pass the 63 characters every engine
    keeps of a name (PostgreSQL cuts longer ones, and two models could meet)."""
    name = model + SUFFIX
    if len(name) > 63:
        raise SpecError(
            f"the diagnostics view of model {model!r} would be named {name!r}, longer than 63 "
            f"characters; use a model name of at most {63 - len(SUFFIX)} characters"
        )
    return name


def unsupported(res: FitResult) -> str | None:
    """Why the diagnostics view cannot be written for ``res`` (None: it can)."""
    stored = res.design.get("columns") or []
    described = bool(stored) and all("value" in c for c in stored)
    if described and res.inverse_entries is not None:
        return None
    if described and colpairs.compatible_pairs(W.pair_columns(res, "design")) is None:
        return (
            f"its leverage needs (X'WX)^-1 at more than {colpairs.MAX_PAIRS:,} pairs of design "
            "columns (factors of many levels crossed with each other or with many other "
            "columns); merge levels or leave a factor out"
        )
    return (
        "the result carries no (X'WX)^-1 for its leverage (a version saved while the model "
        "had no diagnostics view or by an earlier indb, or a result read back from the JSON "
        "output)"
    )


def check_supported(res: FitResult, model: str) -> None:
    """Refuse, naming why, a result the diagnostics view cannot be written for."""
    why = unsupported(res)
    if why is not None:
        raise SpecError(
            f"the diagnostics view of model {model!r} cannot be written: {why}; deploy it "
            "without diagnostics (leave out --diagnostics / diagnostics=True), or refit"
        )


def _stage(columns: list[Expr], source: Expr, alias: str) -> exp.Select:
    return S.select([exp.Star(), *columns], S.subquery(source, alias))


def _internal(name: str) -> str:
    return RESERVED_PREFIX + name


def _c(name: str) -> exp.Column:
    return S.col(_internal(name))


def diagnostics_query(
    res: FitResult,
    dialect: Dialect,
    source: Expr,
    source_columns: Sequence[str],
    *,
    model: str = "",
) -> exp.Select:
    """SELECT the training source's columns plus :data:`COLUMNS` (see the module notes).

    ``source`` is the training source's relation and ``source_columns`` its columns, in
    order (the view lists them by name, leaving out the internal columns of its stages);
    ``model`` names the model in messages.

    Raises
    ------
    SpecError
        When the result cannot give the view (:func:`unsupported`) or the source has a
        column of one of :data:`COLUMNS`' names.
    """
    check_supported(res, model)
    clash = sorted(set(COLUMNS) & set(source_columns))
    if clash:
        raise SpecError(
            f"the training source already has column(s) {clash}, which the diagnostics view "
            "adds; rename them in the source (a view over it) to deploy with diagnostics"
        )
    fam, link = res.family_object, res.link_object
    form = _row_form(res)
    eta = form.linear if form.linear is not None else S.num(0.0)
    offset = W.offset_sql(res, dialect)
    if offset is not None:
        eta = S.add(S.as_double(offset), eta)
    src = source.copy()
    src.set("alias", exp.TableAlias(this=S.ident(W.SRC)))
    first = S.select(
        [
            exp.Column(this=exp.Star(), table=S.ident(W.SRC)),
            S.alias(eta, _internal("eta")),
            S.alias(form.value, _internal("q")),
            S.alias(_response(res, dialect), _internal("y")),
            S.alias(_prior_weight(res, dialect), _internal("pw")),
            S.alias(S.flag(_kept(res, dialect, form.known)), _internal("kept")),
        ],
        src,
    )
    first = form.joined(first)
    eta, mu = _c("eta"), _c("mu")
    # a mean only on rows the fit used whose eta the link takes (Link.mean_sql)
    used = S.eq(_c("kept"), exp.Literal.number(1))
    mean = _stage([S.alias(S.case([(used, link.mean_sql(eta))]), _internal("mu"))], first, "d1")
    parts = _stage(
        [
            S.alias(fam.variance_sql(mu.copy()), _internal("var")),
            S.alias(link.mu_eta_sql(eta.copy(), mu.copy()), _internal("dmu")),
        ],
        mean,
        "d2",
    )
    y, pw, var, dmu = _c("y"), _c("pw"), _nonzero(_c("var")), _nonzero(_c("dmu"))
    resid = S.sub(y, mu.copy())
    weights = _stage(
        [
            S.alias(resid, _internal("r")),
            S.alias(S.div(S.mul(pw.copy(), dmu.copy(), dmu.copy()), var.copy()), _internal("w")),
            S.alias(S.div(pw.copy(), var.copy()), _internal("pv")),
            S.alias(fam.unit_deviance_sql(y.copy(), mu.copy()), _internal("d")),
        ],
        parts,
        "d3",
    )
    r, h = _c("r"), S.mul(_c("w"), _c("q"))
    pearson2 = S.mul(_c("pv"), r.copy(), r.copy())
    out = [S.col(c) for c in source_columns] + [
        S.alias(mu.copy(), "fitted"),
        S.alias(r.copy(), "resid_response"),
        S.alias(S.mul(r.copy(), S.sqrt(S.greatest(_c("pv"), S.num(0.0)))), "resid_pearson"),
        S.alias(_signed_root(r.copy(), S.mul(pw.copy(), _c("d"))), "resid_deviance"),
        S.alias(S.div(r.copy(), _nonzero(_c("dmu"))), "resid_working"),
        S.alias(h, "leverage"),
        S.alias(_cooks(res, pearson2, h.copy()), "cooks_distance"),
    ]
    return S.select(out, S.subquery(weights, "d4"))


def _row_form(res: FitResult) -> QuadraticForm:
    """x'(X'WX)^-1 x on the fit's standardized design, through the categorical blocks, with
    x'beta on the original one (eta less the offset: one lookup per factor set instead of a
    CASE of one branch per level) and whether every level of the row is a known one."""
    entries = res.inverse_entries
    if entries is None:  # diagnostics_query checked it
        raise SpecError("this result carries no (X'WX)^-1 for the leverage")
    knots = res.design.get("knots", {})
    standardized: dict[int, Expr | None] = {0: None}
    original: dict[int, Expr | None] = {0: None}
    for i, v in enumerate(res.design.get("values", []), start=1):
        raw = W.value_sql(v["numerics"], v["basis"], knots)
        original[i] = raw
        if v["center"]:  # 0 for a value the fit did not centre
            raw = S.sub(raw.copy(), S.num(v["center"]))
        standardized[i] = S.div(raw, S.num(v["scale"])) if v["scale"] != 1.0 else raw
    beta = np.array([0.0 if c.aliased else c.estimate for c in res.coefficients])
    return quadratic_form_sql(
        W.pair_columns(res, "design"),
        entries.rows,
        entries.cols,
        entries.values,
        standardized,
        LOOKUP,
        linear=Linear(np.nan_to_num(beta), original),
        levels={f["column"]: f["levels"] for f in res.design.get("factors", [])},
    )


def _response(res: FitResult, dialect: Dialect) -> Expr:
    """y as the fit saw it: 1/0 for a BOOLEAN response, a proportion with trials."""
    name = res.response
    types = res.design.get("column_types") or {}
    written = W.written_in(res, dialect)
    y = S.col(name)
    if written.type_kind(types.get(name, "")) == "boolean":
        y = S.case([(y, S.num(1.0))], S.num(0.0))
    else:
        y = S.as_double(y)
    trials = W.stored_expression_sql(res, "trials", dialect)
    if trials is None:
        return y
    t = S.as_double(trials)
    return S.case([(S.gt(t, S.num(0.0)), S.div(y, t.copy()))], S.num(0.0))


def _prior_weight(res: FitResult, dialect: Dialect) -> Expr:
    parts = [
        S.as_double(e)
        for e in (W.stored_expression_sql(res, k, dialect) for k in ("trials", "weight"))
        if e is not None
    ]
    return S.mul(*parts) if parts else S.num(1.0)


def _kept(res: FitResult, dialect: Dialect, known: Expr | None) -> Expr:
    """The rows the fit used: no NULL in a model column or expression, no unseen level
    (``known``: every factor's level has a row in its lookup)."""
    conds = [
        S.not_(S.is_null(S.col(c)))
        for c in dict.fromkeys([res.response, *W.model_inputs(res, dialect)])
    ]
    for key in ("offset", "weight", "frequency_weight", "trials"):
        e = W.stored_expression_sql(res, key, dialect)
        if e is not None:
            conds.append(S.not_(S.is_null(e)))
    if known is not None:
        conds.append(known)
    return S.and_(*conds)


def _nonzero(e: Expr) -> Expr:
    """NULL for 0: a division by it is NULL on every engine (PostgreSQL raises instead)."""
    return exp.Nullif(this=e, expression=S.num(0.0))


def _signed_root(sign_of: Expr, square: Expr) -> Expr:
    """sign(``sign_of``) sqrt(``square``), NULL where ``sign_of`` is: no ELSE branch, since
    GREATEST(NULL, 0) would make a row the fit did not use a 0."""
    root = S.sqrt(S.greatest(square, S.num(0.0)))
    return S.case(
        [(S.lt(sign_of, S.num(0.0)), S.neg(root)), (S.ge(sign_of.copy(), S.num(0.0)), root.copy())]
    )


def _cooks(res: FitResult, pearson2: Expr, h: Expr) -> Expr:
    """r_p^2 / phi * h / (k (1 - h)^2); NULL where the dispersion is not a positive number."""
    k = sum(1 for c in res.coefficients if not c.aliased)
    phi = res.dispersion
    if not (math.isfinite(phi) and phi > 0 and k > 0):
        return exp.Null()
    one_minus = S.sub(S.num(1.0), h)
    denominator = _nonzero(S.mul(S.num(phi * k), one_minus, one_minus.copy()))
    return S.div(S.mul(pearson2, h.copy()), denominator)
