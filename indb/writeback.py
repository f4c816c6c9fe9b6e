"""Write-back SQL: scoring expressions, scoring views, the scoring macro and the registry DDL.

Pure functions from a fitted result (plain data) to syntax trees; the dialect renders them
and the registry module runs them in one transaction. Coefficients enter the SQL as exact
double literals; categorical levels become CASE branches on text literals escaped by the
renderer, so no level value can change the meaning of the generated SQL. The stored offset
is read in the dialect it was written in (:mod:`indb.portable`), and a row whose eta is not
a valid number gets NULL scores and a flag (:meth:`indb.links.Link.mean_sql`).
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlglot import exp

from indb import sqlexpr as S
from indb.colpairs import PairColumn, compatible_pairs
from indb.engines.backends import dialect_for
from indb.engines.base_dialect import Dialect
from indb.errors import SpecError
from indb.quadform import QuadraticForm, quadratic_form_sql
from indb.results import STORED_COVARIANCE_MAX_TERMS, FitResult
from indb.splines import spline_basis_sql
from indb.sqlexpr import Expr

SRC = "indb_src"
#: the standard-error quadratic form has p^2 terms; beyond this many coefficients it is
#: refused (and the registry stores no covariance, results.STORED_COVARIANCE_MAX_TERMS)
MAX_SE_TERMS = STORED_COVARIANCE_MAX_TERMS
#: alias prefix of the lookup tables the standard error's quadratic form joins
SE_LOOKUP = "indb__se"
NAME_RE = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,62}")


def check_name(value: str, what: str) -> str:
    """Validate a model, view or schema name (letters, digits, underscore; <= 63 chars)."""
    if not isinstance(value, str) or not NAME_RE.fullmatch(value):
        # fullmatch: re.match with '$' would also accept a trailing newline
        raise SpecError(
            f"{what} {value!r} is not allowed: use 1-63 letters, digits or underscores, "
            "starting with a letter"
        )
    return value


@dataclass(frozen=True)
class ScoreColumns:
    """Names of the columns a scoring view adds."""

    eta: str = "score_eta"
    mean: str = "score_mean"
    se: str = "score_se_eta"
    low: str = "score_mean_low"
    high: str = "score_mean_high"
    unseen: str = "score_unseen"


@dataclass(frozen=True)
class _Col:
    term: str
    factors: tuple[str, ...]
    levels: tuple[str, ...]
    numerics: tuple[str, ...]
    basis: int | None
    estimate: float
    aliased: bool = False


def _columns(res: FitResult) -> list[_Col]:
    cols = res.design.get("columns")
    if not cols or len(cols) != len(res.coefficients):
        raise SpecError("this result carries no design description; refit it with this version")
    out = []
    for c, coef in zip(cols, res.coefficients, strict=True):
        unused = coef.aliased or not math.isfinite(coef.estimate)
        out.append(
            _Col(
                c["term"],
                tuple(c["factors"]),
                tuple(c["levels"]),
                tuple(c["numerics"]),
                c["basis"],
                0.0 if unused else coef.estimate,
                unused,
            )
        )
    return out


def _text(column: str) -> Expr:
    return S.level_text(S.col(column))


def _value(c: _Col, knots: dict[str, list[float]]) -> Expr | None:
    return value_sql(c.numerics, c.basis, knots)


def value_sql(
    numerics: Sequence[str], basis: int | None, knots: dict[str, list[float]]
) -> Expr | None:
    """A design value on the source's scale: the product of ``numerics``, or spline basis
    function ``basis`` of the one numeric (None: the constant 1)."""
    if not numerics:
        return None
    if basis is not None:
        return spline_basis_sql(S.as_double(S.col(numerics[0])), knots[numerics[0]], basis)
    return S.mul(*(S.as_double(S.col(n)) for n in numerics))


def _indicator(c: _Col) -> Expr | None:
    if not c.factors:
        return None
    return S.and_(*(S.eq(_text(f), S.text(lv)) for f, lv in zip(c.factors, c.levels, strict=True)))


def _design_terms(res: FitResult) -> list[tuple[_Col, Expr | None, Expr | None]]:
    knots = res.design.get("knots", {})
    return [(c, _indicator(c), _value(c, knots)) for c in _columns(res)]


def written_in(res: FitResult, default: Dialect) -> Dialect:
    """The dialect the result's user expressions (offset, weights) were written in.

    Fits record it as ``spec["sql_dialect"]``; a result from before that (or built by
    hand) is taken to be written for ``default``, the engine that holds it.
    """
    name = res.spec.get("sql_dialect")
    return dialect_for(name) if name else default


def offset_sql(res: FitResult, dialect: Dialect) -> Expr | None:
    """The stored offset, read in the dialect it was written in, for ``dialect``
    (:func:`indb.portable.portable_expression`); None without an offset."""
    return stored_expression_sql(res, "offset", dialect)


def stored_expression_sql(res: FitResult, role: str, dialect: Dialect) -> Expr | None:
    """A stored user expression of the model (``offset``, ``weight``, ``frequency_weight``
    or ``trials``), read in the dialect it was written in, for ``dialect``; None when the
    model has none."""
    from indb.portable import portable_expression

    text = res.spec.get(role)
    if not text:
        return None
    source = written_in(res, dialect)
    types = res.design.get("column_types")
    return portable_expression(text, role, source, dialect, types)


def eta_sql(res: FitResult, dialect: Dialect, *, include_offset: bool = True) -> Expr:
    """The linear predictor on the original columns, coefficients as literals.

    Categorical parts are one CASE per factor set and multiplier, so a row evaluates one
    branch per factor; a level not seen in training falls to ``ELSE 0``, the reference level's
    contribution (flagged by :func:`unseen_sql`). A coefficient estimated at exactly 0 stays
    in (as ``0 * x``), so that a NULL or non-finite input makes eta NULL or NaN whenever
    it enters the standard error.
    """
    terms: list[Expr] = []
    offset = offset_sql(res, dialect) if include_offset else None
    if offset is not None:
        terms.append(S.as_double(offset))
    groups: dict[tuple[tuple[str, ...], tuple[str, ...], int | None], list[_Col]] = {}
    for c, ind, val in _design_terms(res):
        if c.aliased:
            continue
        if ind is None:
            terms.append(S.num(c.estimate) if val is None else S.mul(S.num(c.estimate), val))
        else:
            groups.setdefault((c.factors, c.numerics, c.basis), []).append(c)
    knots = res.design.get("knots", {})
    for (factors, _nums, _basis), cols in groups.items():
        if len(factors) == 1:
            node = exp.Case(
                this=_text(factors[0]),
                ifs=[exp.If(this=S.text(c.levels[0]), true=S.num(c.estimate)) for c in cols],
            )
            node.set("default", S.num(0.0))
        else:
            node = S.case([(_indicator(c), S.num(c.estimate)) for c in cols], S.num(0.0))
        val = _value(cols[0], knots)
        terms.append(node if val is None else S.mul(node, val))
    return S.add(*terms) if terms else S.num(0.0)


def unseen_sql(res: FitResult) -> Expr:
    """Number of categorical inputs whose value (or NULL) was not a training level
    (:func:`scoring_query` adds 1 for a row that gets no mean)."""
    flags: list[Expr] = []
    for f in res.design.get("factors", []):
        levels = [S.text(lv) for lv in f["levels"]]
        flags.append(
            S.case(
                [(exp.In(this=_text(f["column"]), expressions=levels), exp.Literal.number(0))],
                exp.Literal.number(1),
            )
        )
    return S.add(*flags) if flags else exp.Literal.number(0)


def pair_columns(res: FitResult, value_key: str = "raw") -> list[PairColumn]:
    """The result's design columns as :mod:`indb.colpairs` sees them. ``value_key`` "raw":
    columns multiplying the same source value share a key (numerics, basis); "design": the
    fit's value index, which also tells a centred value from the scaled one."""
    if value_key == "raw":
        return [PairColumn(c.factors, c.levels, (c.numerics, c.basis)) for c in _columns(res)]
    stored = res.design.get("columns") or []
    return [PairColumn(tuple(c["factors"]), tuple(c["levels"]), int(c["value"])) for c in stored]


def se_eta_form(res: FitResult) -> QuadraticForm:
    """x' V x, V the covariance, as a SQL quadratic form through the categorical blocks
    (:func:`indb.quadform.quadratic_form_sql`); the standard error of eta is its root.

    :func:`scoring_query` takes its square root only on rows whose eta is valid, where every
    x is a number; GREATEST(q, 0) takes away rounding below 0 there."""
    columns = _columns(res)
    p = len(columns)
    if res.penalty:
        raise SpecError(
            "intervals need the coefficients' standard errors, and a penalised fit (penalty "
            f"{res.penalty.get('penalty')!r}) reports none (docs/penalised-fits.md): score "
            "without intervals (leave out --intervals / intervals=True)"
        )
    if p > MAX_SE_TERMS or res.covariance is None:
        raise SpecError(
            f"intervals (score_se_eta and the confidence limits) are available for models of "
            f"at most {MAX_SE_TERMS} coefficients; this model has {p}: score without "
            "intervals (leave out --intervals / intervals=True) or merge levels"
        )
    cov = np.nan_to_num(np.asarray(res.covariance, dtype=float), nan=0.0)
    pcs = pair_columns(res)
    pairs = compatible_pairs(pcs)
    if pairs is None:  # not with p <= MAX_SE_TERMS: at most p (p + 1) / 2 pairs
        raise SpecError(
            "intervals: the standard error's quadratic form of this model needs more pairs of "
            "coefficients than indb writes into a view; score without intervals"
        )
    rows, cols = pairs
    knots = res.design.get("knots", {})
    multipliers = {pc.value: _value(c, knots) for pc, c in zip(pcs, columns, strict=True)}
    return quadratic_form_sql(pcs, rows, cols, cov[rows, cols], multipliers, SE_LOOKUP)


def scoring_query(
    res: FitResult,
    dialect: Dialect,
    source: Expr,
    *,
    intervals: bool = False,
    names: ScoreColumns | None = None,
    include_offset: bool = True,
    source_columns: Sequence[str] = (),
) -> exp.Select:
    """SELECT the source's columns plus eta, the predicted mean, the unseen-level flag and,
    with ``intervals``, the standard error of eta and a confidence interval for the mean."""
    names = names or ScoreColumns()
    clash = {names.eta, names.mean, names.unseen} & set(source_columns)
    if intervals:
        clash |= {names.se, names.low, names.high} & set(source_columns)
    if clash:
        raise SpecError(
            f"the scoring source already has column(s) {sorted(clash)}; rename them "
            "or choose other output names"
        )
    link = res.link_object
    eta = eta_sql(res, dialect, include_offset=include_offset)
    form: QuadraticForm | None = None
    # A row gets a mean only where eta is a finite number the inverse link takes; NULL,
    # NaN and +/-inf inputs (a NULL age, ln of a negative exposure) give NULL eta, mean,
    # standard error and bounds, and count 1 in the unseen column.
    valid = link.valid_eta_sql(eta.copy())
    cols: list[Expr] = [
        exp.Column(this=exp.Star(), table=S.ident(SRC)),
        S.alias(S.case([(S.is_finite(eta.copy()), eta.copy())]), names.eta),
        S.alias(link.mean_sql(eta.copy()), names.mean),
    ]
    if intervals:
        from scipy import stats

        q = (
            stats.norm.ppf(0.5 + res.confidence / 2)
            if res.test == "z"
            # the covariance and the t's degrees of freedom of the fit's covariance kind
            else stats.t.ppf(0.5 + res.confidence / 2, max(res.wald_df, 1e-12))
        )
        # NULL where the row has no mean, by adding a CASE that is 0 or NULL rather than by
        # putting the quadratic form inside a CASE branch: DuckDB shares the common parts
        # of an expression only outside conditional branches (3x faster at 10^6 rows)
        form = se_eta_form(res)
        se = S.add(S.sqrt(S.greatest(form.value, S.num(0.0))), S.case([(valid.copy(), S.num(0.0))]))
        down = link.mean_sql(S.sub(eta.copy(), S.mul(S.num(q), se.copy())))
        up = link.mean_sql(S.add(eta.copy(), S.mul(S.num(q), se.copy())))
        # ordered by the link's direction, not LEAST/GREATEST, which would skip a NULL bound
        lo, hi = (down, up) if link.increasing else (up, down)
        cols += [S.alias(se, names.se), S.alias(lo, names.low), S.alias(hi, names.high)]
    unscored = S.case([(valid, exp.Literal.number(0))], exp.Literal.number(1))
    cols.append(S.alias(S.add(unseen_sql(res), unscored), names.unseen))
    src = source.copy()
    src.set("alias", exp.TableAlias(this=S.ident(SRC)))
    query = S.select(cols, src)
    return form.joined(query) if form is not None else query


def model_inputs(res: FitResult, dialect: Dialect, include_offset: bool = True) -> list[str]:
    """Source columns a scoring expression reads (predictors, then offset columns)."""
    out: list[str] = []
    for c in _columns(res):
        for name in (*c.factors, *c.numerics):
            if name not in out:
                out.append(name)
    offset = res.spec.get("offset")
    if include_offset and offset:
        tree = S.parse_expression(offset, written_in(res, dialect).sqlglot_name)
        for name in S.referenced_columns(tree):
            if name not in out:
                out.append(name)
    return out


def mean_expression(res: FitResult, dialect: Dialect) -> Expr:
    """The predicted mean as one expression over the model's input columns (for macros):
    NULL where the inputs give no valid eta, as in the view."""
    link = res.link_object
    return link.mean_sql(eta_sql(res, dialect))


def unseen_expression(res: FitResult, dialect: Dialect) -> Expr:
    """The view's ``score_unseen`` as one expression over the model's input columns (for the
    companion macro): inputs not seen in training, plus 1 when the row gets no mean."""
    valid = res.link_object.valid_eta_sql(eta_sql(res, dialect))
    unscored = S.case([(valid, exp.Literal.number(0))], exp.Literal.number(1))
    return S.add(unseen_sql(res), unscored)


def unseen_macro_name(macro_name: str) -> str:
    """The companion of scoring macro ``NAME_score``: ``NAME_unseen``, which counts the
    inputs a call scored as the reference level (and 1 for a call that gets no mean)."""
    return macro_name.removesuffix("_score") + "_unseen"


# -- registry ---------------------------------------------------------------------------------

REGISTRY_TABLES: dict[str, list[tuple[str, str]]] = {
    "model": [
        ("model_name", "TEXT"),
        ("created_at", "TIMESTAMP"),
        ("live_version", "INT"),
        ("view_schema", "TEXT"),
        ("view_name", "TEXT"),
        ("macro_name", "TEXT"),
        ("score_source", "TEXT"),
        ("intervals", "BOOLEAN"),
        ("diagnostics", "BOOLEAN"),
    ],
    "model_version": [
        ("model_name", "TEXT"),
        ("version", "INT"),
        ("created_at", "TIMESTAMP"),
        ("status", "TEXT"),
        ("family", "TEXT"),
        ("link", "TEXT"),
        ("response", "TEXT"),
        ("source", "TEXT"),
        ("deviance", "DOUBLE"),
        ("null_deviance", "DOUBLE"),
        ("pearson_chi2", "DOUBLE"),
        ("dispersion", "DOUBLE"),
        ("log_likelihood", "DOUBLE"),
        ("aic", "DOUBLE"),
        ("bic", "DOUBLE"),
        ("residual_df", "DOUBLE"),
        ("n_used", "BIGINT"),
        ("n_excluded", "BIGINT"),
        ("iterations", "INT"),
        ("converged", "BOOLEAN"),
        ("seconds", "DOUBLE"),
        ("spec_hash", "TEXT"),
        ("spec_json", "TEXT"),
        ("fingerprint_json", "TEXT"),
        ("result_json", "TEXT"),
        ("package_version", "TEXT"),
        ("parent_version", "INT"),
        ("note", "TEXT"),
    ],
    "version_term": [
        ("model_name", "TEXT"),
        ("version", "INT"),
        ("position", "INT"),
        ("term", "TEXT"),
        ("estimate", "DOUBLE"),
        ("std_error", "DOUBLE"),
        ("wald", "DOUBLE"),
        ("p_two_sided", "DOUBLE"),
        ("aliased", "BOOLEAN"),
    ],
    "version_iteration": [
        ("model_name", "TEXT"),
        ("version", "INT"),
        ("iteration", "INT"),
        ("phase", "TEXT"),
        ("deviance", "DOUBLE"),
        ("relative_change", "DOUBLE"),
        ("step_halvings", "INT"),
        ("seconds", "DOUBLE"),
    ],
    "registry_event": [
        ("model_name", "TEXT"),
        ("version", "INT"),
        ("at", "TIMESTAMP"),
        ("action", "TEXT"),
        ("detail", "TEXT"),
    ],
    # a version judged on a SOURCE (indb.assessment_log): when, for what, on which rows,
    # compared with which version in the same scan, the headline figures and all of them
    "version_assessment": [
        ("model_name", "TEXT"),
        ("version", "INT"),
        ("assessed_at", "TIMESTAMP"),
        ("purpose", "TEXT"),
        ("source", "TEXT"),
        ("engine", "TEXT"),
        ("compared_model", "TEXT"),
        ("compared_version", "INT"),
        ("n_used", "BIGINT"),
        ("weight", "DOUBLE"),
        ("actual", "DOUBLE"),
        ("expected", "DOUBLE"),
        ("deviance", "DOUBLE"),
        ("deviance_explained", "DOUBLE"),
        ("gini", "DOUBLE"),
        ("gini_normalized", "DOUBLE"),
        ("figures_json", "TEXT"),
    ],
}
PRIMARY_KEYS = {
    "model": ("model_name",),
    "model_version": ("model_name", "version"),
    "version_term": ("model_name", "version", "position"),
    "version_iteration": ("model_name", "version", "iteration"),
    "version_assessment": ("model_name", "version", "assessed_at"),
}


def table_ref(schema: str, table: str) -> exp.Table:
    return exp.Table(this=S.ident(table), db=S.ident(schema))


#: Registry columns that indb 0.1 named otherwise: ``{table: {old name: new name}}``.
#: :meth:`indb.registry.Registry.ensure` renames them in a registry written by it.
RENAMED_REGISTRY_COLUMNS: dict[str, dict[str, str]] = {
    "model_version": {"df_resid": "residual_df"},
    "version_term": {"statistic": "wald", "p_value": "p_two_sided"},
}


#: Registry columns added since indb 0.2.0: ``{table: [(column, type), ...]}``;
#: :meth:`indb.registry.Registry.ensure` adds them to a registry written before.
ADDED_REGISTRY_COLUMNS: dict[str, list[tuple[str, str]]] = {
    "model": [("diagnostics", "BOOLEAN")],
}


def add_column(schema: str, table: str, column: str, kind: str) -> exp.Alter:
    """ALTER TABLE schema.table ADD COLUMN column kind."""
    return exp.Alter(
        this=table_ref(schema, table),
        kind="TABLE",
        actions=[exp.ColumnDef(this=S.ident(column), kind=exp.DataType.build(kind))],
    )


def rename_column(schema: str, table: str, old: str, new: str) -> exp.Alter:
    """ALTER TABLE schema.table RENAME COLUMN old TO new."""
    return exp.Alter(
        this=table_ref(schema, table),
        kind="TABLE",
        actions=[exp.RenameColumn(this=S.col(old), to=S.col(new))],
    )


def registry_ddl(schema: str, dialect: Dialect | None = None) -> list[exp.Expression]:
    """CREATE SCHEMA / CREATE TABLE IF NOT EXISTS statements for the registry.

    With a ``dialect`` that has no constraints, the primary keys are left out; its
    ``table_format`` (Spark: parquet) becomes the tables' storage clause.
    """
    out: list[exp.Expression] = [
        exp.Create(kind="SCHEMA", this=exp.Table(db=S.ident(schema)), exists=True)
    ]
    for table, cols in REGISTRY_TABLES.items():
        out.append(create_table(schema, table, cols, PRIMARY_KEYS.get(table), dialect))
    return out


def create_table(
    schema: str,
    table: str,
    cols: Sequence[tuple[str, str]],
    key: Sequence[str] | None,
    dialect: Dialect | None = None,
) -> exp.Create:
    """CREATE TABLE IF NOT EXISTS schema.table (columns[, PRIMARY KEY]) for ``dialect``."""
    defs: list[exp.Expression] = [
        exp.ColumnDef(this=S.ident(c), kind=exp.DataType.build(t)) for c, t in cols
    ]
    if key and (dialect is None or dialect.supports_primary_keys):
        defs.append(exp.PrimaryKey(expressions=[S.ident(c) for c in key]))
    create = exp.Create(
        kind="TABLE",
        exists=True,
        this=exp.Schema(this=table_ref(schema, table), expressions=defs),
    )
    if dialect is not None and dialect.table_format:
        fmt = exp.FileFormatProperty(this=exp.Var(this=dialect.table_format.upper()))
        create.set("properties", exp.Properties(expressions=[fmt]))
    return create


def literal(value: Any) -> Expr:
    """A typed literal for registry rows (None -> NULL; NaN/inf -> NULL)."""
    if value is None:
        return exp.Null()
    if isinstance(value, bool):
        return exp.true() if value else exp.false()
    if isinstance(value, int | np.integer):
        return S.integer(int(value))
    if isinstance(value, float | np.floating):
        return S.num(float(value)) if math.isfinite(value) else exp.Null()
    return S.text(str(value))


def insert_rows(
    schema: str,
    table: str,
    rows: Sequence[dict[str, Any]],
    columns: Sequence[tuple[str, str]] | None = None,
) -> exp.Insert:
    """INSERT INTO schema.table (cols) VALUES (...), (...).

    ``columns`` ((name, type) pairs) default to the registry table's of that name.
    """
    layout = REGISTRY_TABLES[table] if columns is None else columns
    cols = [c for c, _ in layout]
    types = dict(layout)
    tuples = []
    for r in rows:
        vals = []
        for c in cols:
            v = literal(r.get(c))
            if types[c] == "TIMESTAMP" and not isinstance(v, exp.Null):
                v = S.cast(v, "TIMESTAMP")
            vals.append(v)
        tuples.append(exp.Tuple(expressions=vals))
    return exp.Insert(
        this=exp.Schema(this=table_ref(schema, table), expressions=[S.ident(c) for c in cols]),
        expression=exp.Values(expressions=tuples),
    )


def where_model(name: str, version: int | None = None) -> Expr:
    cond = S.eq(S.col("model_name"), S.text(name))
    if version is not None:
        cond = S.and_(cond, S.eq(S.col("version"), S.integer(version)))
    return cond


def select_rows(
    schema: str, table: str, where: Expr | None = None, order: Sequence[str] = ()
) -> exp.Select:
    q = S.select([exp.Star()], table_ref(schema, table), where=where)
    if order:
        q = q.order_by(*(S.col(o) for o in order), copy=False)
    return q


def update_rows(schema: str, table: str, values: dict[str, Any], where: Expr) -> exp.Update:
    sets = [exp.EQ(this=S.col(k), expression=literal(v)) for k, v in values.items()]
    return exp.Update(this=table_ref(schema, table), expressions=sets, where=exp.Where(this=where))


def delete_rows(schema: str, table: str, where: Expr) -> exp.Delete:
    return exp.Delete(this=table_ref(schema, table), where=exp.Where(this=where))


def create_view(schema: str | None, name: str, query: exp.Select) -> exp.Create:
    target = exp.Table(this=S.ident(name), db=S.ident(schema) if schema else None)
    return exp.Create(kind="VIEW", this=target, expression=query, replace=True)


def drop_view(schema: str | None, name: str) -> exp.Drop:
    target = exp.Table(this=S.ident(name), db=S.ident(schema) if schema else None)
    return exp.Drop(kind="VIEW", tables=[target], exists=True)  # sqlglot 30: tables=, not this=
