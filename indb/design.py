"""The resolved design: which columns are factors, which numeric values enter, which
design columns (coefficients) exist and how values are standardized.

Built in two steps: :func:`resolve_inputs` checks names and types against the source's
columns (before any scan), and :func:`build_design` expands terms into design columns once
the summary scan has produced levels, scales and the observed factor combinations.
Plain data only; the SQL for these objects is built by :mod:`indb.plan`.
"""

from __future__ import annotations

import dataclasses
import difflib
import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from indb import sqlexpr as S
from indb.errors import SpecError
from indb.spec import ModelSpec
from indb.sqlexpr import Expr

INTERCEPT = "intercept"
TERM_JOIN = " & "


@dataclass(frozen=True)
class TermSpec:
    """A model term before expansion: a product of factors and numeric columns; ``basis``
    names a spline basis function ``k`` of the single numeric column (None: plain products)."""

    factors: tuple[str, ...]
    numerics: tuple[str, ...]
    basis: int | None = None
    order: tuple[str, ...] = ()  # columns in the order the user listed them

    @property
    def value_key(self) -> tuple[tuple[str, ...], int | None]:
        return (self.numerics, self.basis)


@dataclass(frozen=True)
class Inputs:
    """Names and parsed user expressions, checked against the source's columns."""

    response: str
    response_kind: str  # numeric | boolean
    columns: tuple[tuple[str, str], ...]  # (name, type name) of the source
    factors: tuple[str, ...]
    numerics: tuple[str, ...]
    terms: tuple[TermSpec, ...]
    offset: Expr | None
    weight: Expr | None
    frequency_weight: Expr | None
    trials: Expr | None
    model_columns: tuple[str, ...]  # every source column the model reads
    spline_columns: tuple[tuple[str, int], ...] = ()
    #: the rows' cluster (covariance 'cluster'): a NULL sets the row aside, as a NULL offset
    cluster: Expr | None = None
    #: the rows' fold key (cross-validation, indb.crossval): read by the CV scans only, so a
    #: NULL is refused there rather than setting the row aside
    fold_by: Expr | None = None


@dataclass(frozen=True)
class Value:
    """A numeric multiplier of design columns, standardized as (v - center) / scale."""

    alias: str
    label: str
    numerics: tuple[str, ...]
    basis: int | None
    centered: bool
    center: float = 0.0
    scale: float = 1.0


@dataclass(frozen=True)
class Scaling:
    """How a fit rescales its data internally, and how to map its numbers back.

    The IRLS scans run on y' = (y - ``shift``) * ``factor`` with prior weights
    pw' = pw * ``weight_factor`` and frequency weights f' = f * ``freq_factor``; every
    factor is a power of two, so the rescaling itself rounds nothing. For a power-variance
    family (V(mu) = mu^p) the unit deviance is homogeneous, d(s y, s mu) = s^(2-p) d(y, mu),
    so deviance, Pearson's chi-squared and the dispersion of the rescaled fit are the
    original ones times a power of two, d = 2^``log2_deviance_factor`` (:meth:`rescale`,
    :meth:`unscale`), and the information matrix of the rescaled coefficients is the
    original one times coef_factor^2 / d (fixed-dispersion families included: their
    dispersion 1 becomes d).

    The coefficients map as beta' = ``coef_factor`` * beta (a power link eta = mu^lambda:
    ``coef_factor`` = factor^lambda, and the offset is multiplied by it too), except the
    intercept, which also absorbs the shift (identity link: -factor * shift) and, for a log
    link, ln(factor) (``log_shift``). Without an intercept neither can be absorbed, so the
    fitter then leaves the response alone (see :func:`indb.magnitudes.response_scaling`).
    """

    shift: float = 0.0
    factor: float = 1.0
    coef_factor: float = 1.0
    log_shift: float = 0.0
    weight_factor: float = 1.0
    freq_factor: float = 1.0
    variance_power: float = 0.0

    @property
    def response_changed(self) -> bool:
        return self.shift != 0.0 or self.factor != 1.0

    @property
    def identity(self) -> bool:
        return not self.response_changed and self.weight_factor == self.freq_factor == 1.0

    @property
    def log2_deviance_factor(self) -> float:
        """log2(deviance_factor), exact (an integer for integer p) where the factor itself
        would over- or underflow (a response near 1e200 squared)."""
        resp = (2.0 - self.variance_power) * math.log2(self.factor) if self.factor != 1.0 else 0.0
        return resp + math.log2(self.weight_factor) + math.log2(self.freq_factor)

    def rescale(self, x: float) -> float:
        """The inverse of :meth:`unscale`: a source-scale deviance on the fit's scale."""
        e = self.log2_deviance_factor
        if e == 0.0:
            return x
        k = round(e)
        with np.errstate(over="ignore", under="ignore"):
            return float(np.ldexp(x, k) * 2.0 ** (e - k))

    def unscale(self, x: float) -> float:
        """A deviance, Pearson sum or dispersion of the rescaled fit on the source's scale
        (infinite only when the true value exceeds the largest double)."""
        e = self.log2_deviance_factor
        if e == 0.0:
            return x
        k = round(e)
        with np.errstate(over="ignore", under="ignore"):
            return float(np.ldexp(x, -k) * 2.0 ** (k - e))

    def for_folded_rows(self) -> Scaling:
        """The part still to apply on folded rows: their response is rescaled already."""
        return dataclasses.replace(self, shift=0.0, factor=1.0)

    def to_fit(self, beta: np.ndarray, intercept: bool) -> np.ndarray:
        """Standardized coefficients of the original problem -> of the rescaled one."""
        out = np.asarray(beta, float) * self.coef_factor
        if intercept and out.size:
            out[0] += self.log_shift - self.factor * self.shift
        return out

    def to_original(self, beta: np.ndarray, intercept: bool) -> np.ndarray:
        """Standardized coefficients of the rescaled problem -> of the original one."""
        out = np.asarray(beta, float).copy()
        if intercept and out.size:
            # the shift is added after the division: (b0' / factor) + shift keeps the
            # digits of the small b0' that centring the response was for
            out[0] -= self.log_shift
            out[0] = out[0] / self.coef_factor + self.shift
            out[1:] = out[1:] / self.coef_factor
            return out
        return out / self.coef_factor


@dataclass(frozen=True)
class Factor:
    """A categorical column: its levels (as text, ascending) and the reference level."""

    column: str
    alias: str
    levels: tuple[str, ...]
    reference: str
    counts: tuple[int, ...]


@dataclass(frozen=True)
class DesignColumn:
    """One coefficient: indicator of ``levels`` on ``factors`` times value ``value``.

    ``value`` indexes :attr:`Design.values` (0 is the constant 1).
    """

    term: str
    factors: tuple[int, ...]
    levels: tuple[str, ...]
    value: int
    source_columns: tuple[str, ...]


@dataclass(frozen=True)
class Design:
    """Everything needed to build iteration SQL and to map coefficients back."""

    intercept: bool
    factors: tuple[Factor, ...]
    values: tuple[Value, ...]  # values[0] is the constant 1
    columns: tuple[DesignColumn, ...]
    knots: tuple[tuple[str, tuple[float, ...]], ...] = field(default=())

    @property
    def p(self) -> int:
        return len(self.columns)

    @property
    def terms(self) -> list[str]:
        return [c.term for c in self.columns]

    def knots_for(self, column: str) -> tuple[float, ...]:
        for c, k in self.knots:
            if c == column:
                return k
        raise KeyError(column)

    def to_dict(self) -> dict:
        return {
            "intercept": self.intercept,
            "factors": [
                {
                    "column": f.column,
                    "levels": list(f.levels),
                    "reference": f.reference,
                    "counts": list(f.counts),
                }
                for f in self.factors
            ],
            "values": [
                {
                    "label": v.label,
                    "numerics": list(v.numerics),
                    "basis": v.basis,
                    "centered": v.centered,
                    "center": v.center,
                    "scale": v.scale,
                }
                for v in self.values[1:]
            ],
            "knots": {c: list(k) for c, k in self.knots},
            "columns": [
                {
                    "term": c.term,
                    "factors": [self.factors[i].column for i in c.factors],
                    "levels": list(c.levels),
                    "numerics": list(self.values[c.value].numerics),
                    "basis": self.values[c.value].basis,
                    "value": c.value,
                }
                for c in self.columns
            ],
        }


# -- step 1: names and types ------------------------------------------------------------------


#: Prefix of the columns indb adds next to the source's own (the kept-row flag of the profile
#: scan, the sums of the compressed table); a source column with it would be shadowed.
RESERVED_PREFIX = "indb__"


def resolve_inputs(
    spec: ModelSpec, columns: Sequence[tuple[str, str]], type_kind, dialect_name: str
) -> Inputs:
    """Check the spec's names against the source columns and decide predictor kinds.

    ``type_kind`` maps an engine type name to 'numeric', 'boolean', 'text' or 'other'.
    """
    names = [c for c, _ in columns]
    types = dict(columns)
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise SpecError(f"the source has duplicate column names {dup}; alias them in the query")
    # case-insensitive: DuckDB and Spark resolve identifiers regardless of case
    reserved = [n for n in names if n.lower().startswith(RESERVED_PREFIX)]
    if reserved:
        raise SpecError(
            f"source column {reserved[0]!r} starts with {RESERVED_PREFIX!r}, which indb "
            "reserves for the columns it adds to its scans; rename it in a SELECT (e.g. "
            f'SELECT *, "{reserved[0]}" AS new_name, leaving it out of the star with '
            f"EXCLUDE or by listing the columns)"
        )

    def need(col: str, role: str) -> None:
        require_column(col, role, names)

    need(spec.response, "response")
    rkind = type_kind(types[spec.response])
    if rkind == "boolean":
        if spec.family.name != "binomial":
            raise SpecError(
                f"response column {spec.response!r} is BOOLEAN; only family 'binomial' takes it"
            )
        response_kind = "boolean"
    elif rkind == "numeric":
        response_kind = "numeric"
    else:
        raise SpecError(
            f"response column {spec.response!r} has type {types[spec.response]}; it must be "
            "numeric (or BOOLEAN for binomial): cast it in the source query"
        )

    used_by_exprs: list[str] = [spec.response]

    def parse(expr_text: str | None, role: str, used: list[str] = used_by_exprs) -> Expr | None:
        if expr_text is None:
            return None
        try:
            tree = S.parse_expression(expr_text, dialect_name)
        except ValueError as err:
            raise SpecError(f"cannot parse {role} expression {expr_text!r}: {err}") from None
        from sqlglot import exp

        if tree.find(exp.Query) is not None or tree.find(exp.AggFunc) is not None:
            raise SpecError(
                f"{role} expression {expr_text!r} must be a plain per-row expression "
                "(no subqueries or aggregates)"
            )
        if isinstance(tree, exp.Query | exp.Command | exp.DDL | exp.DML):
            raise SpecError(f"{role} expression {expr_text!r} is not an expression")
        refs = S.referenced_columns(tree)
        for r in refs:
            need(r, f"{role} expression {expr_text!r} uses")
            used.append(r)
        return tree

    offset = parse(spec.offset, "offset")
    weight = parse(spec.weight, "weight")
    freq = parse(spec.frequency_weight, "frequency_weight")
    trials = parse(spec.trials, "trials")
    # the cluster's columns stay out of the default predictors (an identifier would become
    # one), but one may be a predictor too when named (clusters of a categorical term)
    cluster_columns: list[str] = []
    cluster = parse(spec.cluster, "cluster", cluster_columns)
    # the fold key's columns stay out of the default predictors too (a row id), and out of
    # the model's columns: their NULLs are refused by the CV, not excluded (indb.crossval)
    fold_columns: list[str] = []
    fold_by = parse(spec.fold_by, "fold_by", fold_columns)

    for c in spec.exclude:
        need(c, "exclude option's")
    for c in spec.categorical:
        need(c, "categorical option's")
    for c, _ in spec.reference:
        need(c, "reference option's")
    for group in spec.interactions:
        for c in group:
            need(c, "interaction")
    for c, _ in spec.splines:
        need(c, "spline")

    excluded = set(spec.exclude) | set(used_by_exprs)
    if spec.predictors is not None:
        for c in spec.predictors:
            need(c, "predictor")
            if c in used_by_exprs:
                raise SpecError(
                    f"column {c!r} is used by the response/offset/weight/trials; "
                    "it cannot also be a predictor"
                )
        main = [c for c in names if c in set(spec.predictors) and c not in excluded]
    else:
        main = [
            c
            for c in names
            if c not in excluded and c not in cluster_columns and c not in fold_columns
        ]

    kind: dict[str, str] = {}
    involved = set(main) | {c for g in spec.interactions for c in g} | {c for c, _ in spec.splines}
    for c in names:
        if c not in involved:
            continue
        if c in used_by_exprs:
            raise SpecError(
                f"column {c!r} is used by the response/offset/weight/trials; "
                "it cannot also be a predictor"
            )
        k = type_kind(types[c])
        if c in spec.categorical:
            if k == "other":
                raise SpecError(f"column {c!r} has type {types[c]}, which cannot be categorical")
            kind[c] = "categorical"
        elif k == "numeric":
            kind[c] = "numeric"
        elif k in ("text", "boolean"):
            kind[c] = "categorical"
        else:
            raise SpecError(
                f"column {c!r} has type {types[c]}, which is neither numeric nor categorical; "
                f"leave it out with exclude=[{c!r}] (CLI --exclude) or cast it in the query"
            )
    for c, _ in spec.splines:
        if kind[c] != "numeric":
            raise SpecError(f"spline column {c!r} must be numeric; it is {types[c]}")
    for c, _ in spec.reference:
        if kind.get(c) != "categorical":
            raise SpecError(
                f"reference level given for {c!r}, which is not a categorical predictor"
            )

    terms: list[TermSpec] = []
    spline_cols = {c for c, _ in spec.splines}
    for c in main:
        if kind[c] == "categorical":
            terms.append(TermSpec(factors=(c,), numerics=(), order=(c,)))
        elif c not in spline_cols:
            terms.append(TermSpec(factors=(), numerics=(c,), order=(c,)))
    for group in spec.interactions:
        fac = tuple(c for c in group if kind[c] == "categorical")
        nums = tuple(c for c in group if kind[c] == "numeric")
        terms.append(TermSpec(factors=fac, numerics=nums, order=tuple(group)))
    for c, k in spec.splines:
        terms.append(TermSpec(factors=(), numerics=(c,), order=(c,)))
        for b in range(1, k - 1):
            terms.append(TermSpec(factors=(), numerics=(c,), basis=b, order=(c,)))
    seen: set[tuple] = set()
    for t in terms:
        key = (frozenset(t.factors), tuple(sorted(t.numerics)), t.basis)
        if key in seen:
            raise SpecError(f"term {TERM_JOIN.join(t.order)!r} is listed twice")
        seen.add(key)
    if not terms and not spec.intercept:
        raise SpecError("the model has no terms: no predictors and no intercept")

    factors = tuple(c for c in names if kind.get(c) == "categorical")
    numerics = tuple(c for c in names if kind.get(c) == "numeric")
    model_cols = [spec.response, *(c for c in names if c in kind)]
    for c in [*used_by_exprs, *cluster_columns]:
        if c not in model_cols:
            model_cols.append(c)
    return Inputs(
        response=spec.response,
        response_kind=response_kind,
        columns=tuple(columns),
        factors=factors,
        numerics=numerics,
        terms=tuple(terms),
        offset=offset,
        weight=weight,
        frequency_weight=freq,
        trials=trials,
        model_columns=tuple(model_cols),
        spline_columns=tuple(spec.splines),
        cluster=cluster,
        fold_by=fold_by,
    )


def require_column(name: str, role: str, names: Sequence[str], fix: str = "") -> None:
    """Raise :class:`SpecError` when ``name`` is not among the source's column ``names``:
    "``role`` column 'x' is not in the source (did you mean 'y'?); columns are ...", then
    ``fix`` (how to put it right) when given."""
    if name not in names:
        raise SpecError(
            f"{role} column {name!r} is not in the source{_did_you_mean(name, names)}; "
            f"columns are {_short(names)}" + (f"; {fix}" if fix else "")
        )


def _short(names: Sequence[str], limit: int = 12) -> str:
    shown = ", ".join(repr(n) for n in names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


# -- step 2: values and columns ------------------------------------------------------------


def plan_values(inputs: Inputs, intercept: bool) -> tuple[Value, ...]:
    """The distinct numeric values the terms need (index 0 is the constant 1).

    A value is centered only when it enters as a plain numeric term next to an intercept;
    values that multiply factor indicators are only scaled, so every standardized design
    column maps back to the original scale by a linear map.
    """
    out: list[Value] = [Value(alias="v0", label="1", numerics=(), basis=None, centered=False)]
    keys: dict[tuple, int] = {}
    for t in inputs.terms:
        if not t.numerics:
            continue
        centered = intercept and not t.factors
        key = (t.numerics, t.basis, centered)
        if key in keys:
            continue
        keys[key] = len(out)
        label = (
            TERM_JOIN.join(t.numerics) if t.basis is None else f"{t.numerics[0]} spline {t.basis}"
        )
        out.append(
            Value(
                alias=f"v{len(out)}",
                label=label,
                numerics=t.numerics,
                basis=t.basis,
                centered=centered,
            )
        )
    return tuple(out)


def value_index(values: Sequence[Value], term: TermSpec, intercept: bool) -> int:
    if not term.numerics:
        return 0
    centered = intercept and not term.factors
    for i, v in enumerate(values):
        if v.numerics == term.numerics and v.basis == term.basis and v.centered == centered:
            return i
    raise KeyError(term)


def build_design(
    inputs: Inputs,
    intercept: bool,
    values: Sequence[Value],
    factors: Sequence[Factor],
    combos: dict[tuple[str, ...], set[tuple[str, ...]]],
    knots: Sequence[tuple[str, tuple[float, ...]]] = (),
) -> Design:
    """Expand terms into design columns.

    ``combos`` maps a tuple of factor columns (sorted by factor order) to the level
    combinations observed in the data; single-factor terms use every non-reference level.
    Without an intercept the first categorical main effect keeps all its levels.
    """
    fidx = {f.column: i for i, f in enumerate(factors)}
    cols: list[DesignColumn] = []
    if intercept:
        cols.append(DesignColumn(term=INTERCEPT, factors=(), levels=(), value=0, source_columns=()))
    full_levels_used = intercept  # with an intercept no factor keeps its reference level
    for t in inputs.terms:
        vi = value_index(values, t, intercept)
        if not t.factors:
            cols.append(
                DesignColumn(
                    term=values[vi].label,
                    factors=(),
                    levels=(),
                    value=vi,
                    source_columns=t.numerics,
                )
            )
            continue
        fi = tuple(sorted(fidx[c] for c in t.factors))
        if len(fi) == 1:
            f = factors[fi[0]]
            keep_ref = not full_levels_used and not t.numerics
            if keep_ref:
                full_levels_used = True
            level_sets: list[tuple[str, ...]] = [
                (lv,) for lv in f.levels if keep_ref or lv != f.reference
            ]
        else:
            key = tuple(factors[i].column for i in fi)
            seen = combos.get(key, set())
            level_sets = sorted(
                lv for lv in seen if all(lv[j] != factors[i].reference for j, i in enumerate(fi))
            )
        for lv in level_sets:
            by_col = {factors[i].column: lv[j] for j, i in enumerate(fi)}
            parts = [f"{c}={by_col[c]}" if c in by_col else c for c in t.order]
            cols.append(
                DesignColumn(
                    term=TERM_JOIN.join(parts),
                    factors=fi,
                    levels=lv,
                    value=vi,
                    source_columns=t.order,
                )
            )
    names = [c.term for c in cols]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise SpecError(
            f"two design columns would share the name(s) {dup}; rename a column or "
            "level so term names are unique"
        )
    return Design(
        intercept=intercept,
        factors=tuple(factors),
        values=tuple(values),
        columns=tuple(cols),
        knots=tuple(knots),
    )


def factor_sets(design_terms: Sequence[TermSpec], factors: Sequence[str]) -> list[tuple[str, ...]]:
    """Distinct multi-factor sets used by interaction terms (ordered by factor order)."""
    order = {c: i for i, c in enumerate(factors)}
    out: list[tuple[str, ...]] = []
    for t in design_terms:
        if len(t.factors) >= 2:
            key = tuple(sorted(t.factors, key=order.__getitem__))
            if key not in out:
                out.append(key)
    return out


def all_level_tuples(factors: Sequence[Factor]) -> list[tuple[str, ...]]:
    return list(itertools.product(*(f.levels for f in factors)))


def _did_you_mean(name: str, names: Sequence[str]) -> str:
    """`` (did you mean 'x'?)`` for the closest column name, if one is close."""
    lower = {n.lower(): n for n in names}
    close = difflib.get_close_matches(name.lower(), list(lower), n=1, cutoff=0.75)
    return f" (did you mean {lower[close[0]]!r}?)" if close else ""
