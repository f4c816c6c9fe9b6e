"""What every query builder needs: :class:`PlanContext` (the spec, its checked inputs and
the dialect) and the names of the internal columns that several queries share."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from sqlglot import exp

from indb import sqlexpr as S
from indb.design import RESERVED_PREFIX, Inputs, Scaling, Value
from indb.engines.base_dialect import Dialect
from indb.spec import ModelSpec
from indb.splines import spline_basis_sql
from indb.sqlexpr import Expr

SRC = "indb_src"
ROWS = "r"


@dataclass(frozen=True)
class PlanContext:
    """What every query builder needs: the spec, its checked inputs and the dialect."""

    spec: ModelSpec
    inputs: Inputs
    dialect: Dialect
    #: on a compressed table: the column holding how many source rows each row stands for
    row_count: str | None = None
    #: rows are folded design rows carrying deviance and Pearson constants (folded_rows_query)
    folded: bool = False
    #: the internal rescaling of response, offset and weights (identity: none)
    scaling: Scaling = Scaling()
    #: per-row columns a covariance scan adds to the rows (``irls_scan.rows_select``):
    #: ``clu`` the cluster, ``r2`` a folded row's sums for the robust meat
    row_extras: tuple[str, ...] = ()
    #: a further condition on the kept rows (cross-validation: a fold's training or held-out
    #: rows, indb.crossval); every scan built from :meth:`kept` reads only those rows
    row_filter: Expr | None = None

    def count_rows(self) -> Expr:
        """COUNT(*) of source rows (SUM of the row-count column on a compressed table)."""
        return S.sum_(S.col(self.row_count)) if self.row_count else S.count_star()

    # -- the source ------------------------------------------------------------------------
    def source(self) -> Expr:
        rel = self.dialect.relation(self.spec.source).copy()
        rel.set("alias", exp.TableAlias(this=S.ident(SRC)))
        return rel

    # -- raw per-row inputs ----------------------------------------------------------------
    def raw_response(self) -> Expr:
        y = S.col(self.inputs.response)
        if self.inputs.response_kind == "boolean":
            return S.case([(y, S.num(1.0))], S.num(0.0))
        return S.as_double(y)

    def raw_trials(self) -> Expr | None:
        return S.as_double(self.inputs.trials.copy()) if self.inputs.trials is not None else None

    def raw_weight(self) -> Expr | None:
        w = self.inputs.weight
        return S.as_double(w.copy()) if w is not None else None

    def raw_freq(self) -> Expr | None:
        f = self.inputs.frequency_weight
        return S.as_double(f.copy()) if f is not None else None

    def raw_offset(self) -> Expr | None:
        o = self.inputs.offset
        return S.as_double(o.copy()) if o is not None else None

    def kept_conditions(self) -> list[Expr]:
        """One NOT NULL condition per model column and model expression."""
        conds = [S.not_(S.is_null(S.col(c))) for c in self.inputs.model_columns]
        for e in (
            self.inputs.offset,
            self.inputs.weight,
            self.inputs.frequency_weight,
            self.inputs.trials,
            self.inputs.cluster,
        ):
            if e is not None:
                conds.append(S.not_(S.is_null(e.copy())))
        if self.row_filter is not None:
            conds.append(self.row_filter.copy())
        return conds

    def kept(self) -> Expr:
        """Rows with no NULL in any model column or model expression."""
        return S.and_(*self.kept_conditions())

    def kept_parts(self, keys: Sequence[str]) -> tuple[Expr, Expr]:
        """:meth:`kept` split in two: the conditions on ``keys`` alone, and the rest."""
        on_keys: list[Expr] = []
        rest: list[Expr] = []
        for c in self.kept_conditions():
            (on_keys if set(S.referenced_columns(c)) <= set(keys) else rest).append(c)
        return S.and_(*on_keys), S.and_(*rest)

    def null_items(self) -> list[tuple[str, Expr]]:
        """(label, expression) for every input whose NULLs exclude a row."""
        items: list[tuple[str, Expr]] = [(c, S.col(c)) for c in self.inputs.model_columns]
        for label, e in (
            ("offset", self.inputs.offset),
            ("weight", self.inputs.weight),
            ("frequency_weight", self.inputs.frequency_weight),
            ("trials", self.inputs.trials),
            ("cluster", self.inputs.cluster),
        ):
            if e is not None:
                items.append((f"{label} expression", e.copy()))
        return items

    # -- derived per-row quantities --------------------------------------------------------
    def observed_response(self) -> Expr:
        """y as observed: the response, as a proportion for grouped binomial data."""
        y = self.raw_response()
        t = self.raw_trials()
        if t is None:
            return y
        return S.case([(S.gt(t, S.num(0.0)), S.div(y, t))], S.num(0.0))

    def response(self) -> Expr:
        """y as the scans fit it: :meth:`observed_response` shifted and scaled by
        :attr:`scaling` (y' = (y - shift) * factor)."""
        y = self.observed_response()
        sc = self.scaling
        if sc.shift != 0.0:
            y = S.sub(y, S.num(sc.shift))
        return S.mul(y, S.num(sc.factor)) if sc.factor != 1.0 else y

    def prior_weight(self) -> Expr:
        parts = [e for e in (self.raw_trials(), self.raw_weight()) if e is not None]
        if self.scaling.weight_factor != 1.0:
            parts.append(S.num(self.scaling.weight_factor))
        return S.mul(*parts) if parts else S.num(1.0)

    def freq_weight(self) -> Expr | None:
        """The frequency weight as the scans use it (times :attr:`scaling`'s factor)."""
        f = self.raw_freq()
        if f is None or self.scaling.freq_factor == 1.0:
            return f
        return S.mul(f, S.num(self.scaling.freq_factor))

    def offset(self) -> Expr | None:
        """The offset as the scans use it: on a power link's rescaled eta scale."""
        o = self.raw_offset()
        if o is None or self.scaling.coef_factor == 1.0:
            return o
        return S.mul(o, S.num(self.scaling.coef_factor))

    def value_sql(
        self, v: Value, knots: dict[str, tuple[float, ...]] | None = None, standardized: bool = True
    ) -> Expr:
        """The per-row value v (a product of numeric columns or a spline basis function)."""
        if v.basis is None:
            raw = S.mul(*(S.as_double(S.col(c)) for c in v.numerics))
        else:
            raw = spline_basis_sql(
                S.as_double(S.col(v.numerics[0])), (knots or {})[v.numerics[0]], v.basis
            )
        if not standardized:
            return raw
        if v.centered:
            raw = S.sub(raw, S.num(v.center))
        return S.div(raw, S.num(v.scale)) if v.scale != 1.0 else raw


# Names of columns that sit next to the source's own columns (SELECT *, or the key columns)
# carry the reserved prefix, which resolve_inputs refuses in source columns: no collision.
KEPT = RESERVED_PREFIX + "kept"
ROWCOUNT = RESERVED_PREFIX + "rows"


def reserved(name: str) -> str:
    """An internal column name (reserved prefix: no source column can take it)."""
    return RESERVED_PREFIX + name


FOLD_Y, FOLD_PW, FOLD_F = (RESERVED_PREFIX + n for n in ("y", "pw", "f"))
FOLD_DCONST, FOLD_Q = RESERVED_PREFIX + "dconst", RESERVED_PREFIX + "q"
#: a folded row's sums for the robust meat, sum(f pw^2 (y - mu)^2) =
#: R2A (R2Y - mu)^2 + R2Q: R2A = sum(f pw^2), R2Y their mean response, R2Q the spread about it
FOLD_R2A, FOLD_R2Y, FOLD_R2Q = (RESERVED_PREFIX + n for n in ("r2a", "r2y", "r2q"))
