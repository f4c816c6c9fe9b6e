"""Pre-fit scans (read only): the source's columns, knot positions, the profile and its
NULL and domain checks, the summary that standardizes values, and the levels of the
categorical columns."""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

from indb.design import Factor, Inputs, Value, factor_sets, resolve_inputs
from indb.engines.base_engine import Engine
from indb.errors import EngineError, SpecError
from indb.fitrun import FitRun, fetched_count
from indb.plan.context import PlanContext
from indb.plan.fold import FOLD_BAD, FOLD_NK_NULL, detail_items, grouped_profile_query
from indb.plan.profile import (
    HEAD_COUNT,
    HEAD_ROWS,
    ProfileItem,
    describe_query,
    distinct_head_query,
    domain_checks,
    knots_query,
    levels_query,
    profile_query,
)
from indb.spec import ModelSpec
from indb.splines import knot_quantiles
from indb.sqlexpr import referenced_columns


def describe(spec: ModelSpec, engine: Engine) -> Inputs:
    """The source's columns and types (described, not run), checked against the spec."""
    d = engine.dialect
    return resolve_inputs(spec, source_columns(spec, engine), d.type_kind, d.sqlglot_name)


def source_columns(spec: ModelSpec, engine: Engine) -> list[tuple[str, str]]:
    """(name, type name) of the source's columns, described without running it."""
    d = engine.dialect
    probe = PlanContext(spec, _empty_inputs(spec), d)
    try:
        return engine.describe(d.render(describe_query(probe)))
    except EngineError as err:
        # a missing table, file or column is the user's input, not an engine fault
        raise SpecError(
            f"cannot read the source {spec.source.label()!r}: {err}; check the "
            "table name, file path or query"
        ) from err


def _empty_inputs(spec: ModelSpec) -> Inputs:
    return Inputs(
        response=spec.response,
        response_kind="numeric",
        columns=(),
        factors=(),
        numerics=(),
        terms=(),
        offset=None,
        weight=None,
        frequency_weight=None,
        trials=None,
        model_columns=(),
    )


def check_nulls(ctx: PlanContext, row: dict) -> tuple[int, int, dict[str, int]]:
    """Row counts and NULL exclusions from the profile row; errors for unusable inputs."""
    n_total = fetched_count(row["n_total"])
    n_kept = fetched_count(row["n_kept"])
    by_col: dict[str, int] = {}
    for i, (label, _) in enumerate(ctx.null_items()):
        k = fetched_count(row[f"null_{i}"])
        if k:
            by_col[label] = k
    if n_total == 0:
        raise SpecError(f"the source {ctx.spec.source.label()!r} has no rows")
    for label, k in by_col.items():
        if k == n_total and label == ctx.inputs.response:
            raise SpecError(
                f"response column {label!r} is NULL in all {n_total} rows: there is nothing to "
                "fit; check the source query"
            )
        if k == n_total:
            raise SpecError(
                f"{_what(label)} is NULL in all {n_total} rows; leave it out "
                f"(exclude=[{label!r}], CLI --exclude) or fill it in the query"
            )
    if n_kept == 0:
        raise SpecError(
            f"no rows left: every one of the {n_total} rows has a NULL in some model "
            f"column (NULL counts: {by_col})"
        )
    if ctx.spec.on_null == "error" and n_kept < n_total:
        raise SpecError(
            f"{n_total - n_kept} rows have NULLs in model columns (counts by column: "
            f"{by_col}); clean them in the query or allow exclusion (on_null='exclude')"
        )
    return n_total, n_kept, by_col


def _fmt(v: object) -> str:
    return "NULL" if v is None else f"{float(v):.6g}"


def check_domain(ctx: PlanContext, row: dict[str, object], n: int, where: str = "") -> None:
    """Refuse kept rows whose values are out of the family's domain, from the ``chk_<i>``
    counts of :func:`~indb.plan.profile.domain_checks` in ``row`` (a fit's profile or an
    assessment's check scan; ``where`` names the source in the message)."""
    for i, (stem, _) in enumerate(domain_checks(ctx)):
        bad = fetched_count(row[f"chk_{i}"])
        if bad:
            detail = ""
            if "response" in stem and "NaN" not in stem:
                detail = f" (min {_fmt(row['y_min'])}, max {_fmt(row['y_max'])})"
            of = f" of {where}" if where else ""
            raise SpecError(
                f"{stem} in {bad:,} of {n:,} rows{of}{detail}; filter or fix those rows in "
                "the source query"
            )


def _what(label: str) -> str:
    return label if label.endswith("expression") else f"column {label!r}"


def knots(ctx: PlanContext, run: FitRun) -> dict[str, tuple[float, ...]]:
    """Quantile knots of each spline column over the kept rows (one scan)."""
    if not ctx.inputs.spline_columns:
        return {}
    row = run.one_row(knots_query(ctx))
    out: dict[str, tuple[float, ...]] = {}
    for c, k in ctx.inputs.spline_columns:
        raw = [row[f"k_{c}_{i}"] for i in range(len(knot_quantiles(k)))]
        # NULL (NaN once fetched): no finite value in any kept row
        if any(v is None or not math.isfinite(float(v)) for v in raw):
            raise SpecError(
                f"spline column {c!r} has no finite values in the rows used (all NaN, "
                "infinite or NULL); filter or fix those rows in the source query"
            )
        ks = tuple(float(v) for v in raw)
        if len(set(ks)) < len(ks):
            raise SpecError(
                f"spline column {c!r} has too few distinct values for {k} knots "
                f"(quantile knots {ks}); use fewer knots"
            )
        out[c] = ks
    return out


@dataclass(frozen=True)
class Summary:
    """What the profile tells the fit: row counts and weighted sums, the standardized values,
    the data-only log-likelihood sums and the fingerprint's column sums."""

    n: int
    sum_f: float
    sum_fpw: float
    ybar: float
    n_df: float
    n_zero_weight: int
    values: tuple[Value, ...]
    level_counts: tuple[int, ...]
    column_sums: dict[str, float]
    sum_fpwy: float
    off_mean: float = 0.0
    ll_sums: dict[str, float] = dataclasses.field(default_factory=dict)
    constant_weight: float | None = None


def summarize(
    ctx: PlanContext,
    row: dict,
    values: tuple[Value, ...],
    shifts: dict[str, tuple[float, float]],
) -> Summary:
    """The profile row checked (domain, weights, a response with both outcomes, constant
    predictors) and turned into a :class:`Summary`; values centred and scaled."""
    n = int(row["n_kept"])
    check_domain(ctx, row, n)
    sum_fpw = float(row["sum_fpw"] or 0.0)
    if not sum_fpw > 0:
        raise SpecError(
            "every row has zero weight (prior weight x frequency weight): nothing to fit"
        )
    ybar = float(row["sum_fpwy"]) / sum_fpw
    fam = ctx.spec.family
    if fam.positive_mean and not ybar > 0:
        raise SpecError(
            f"family {fam.name!r} needs a positive mean response; column "
            f"{ctx.inputs.response!r} is 0 in every row used"
        )
    if fam.unit_mean and not 0 < ybar < 1 and ctx.spec.intercept:
        raise SpecError(
            f"column {ctx.inputs.response!r} is {int(round(ybar))} in every row "
            "used: a binomial model needs both outcomes"
        )
    out_values = [values[0]]
    for v in values[1:]:
        c, mean, sd, rms = moments(row, v.alias, shifts)
        q = float(row[f"{v.alias}_ms"])
        if not (math.isfinite(q) and math.isfinite(sd) and math.isfinite(rms)):
            raise SpecError(
                f"predictor {v.label!r} spans more than the range of doubles (its squares "
                f"overflow although scaled by its spread in the first {HEAD_ROWS} rows); "
                "rescale it in the source query"
            )
        if v.centered:
            if q == 0.0:
                raise SpecError(
                    f"predictor {v.label!r} is constant ({mean:g}) over the {n} rows used, so it "
                    f"cannot be told apart from the intercept; leave it out (exclude=[...], "
                    f"CLI --exclude)"
                )
            out_values.append(dataclasses.replace(v, center=mean, scale=sd))
        else:
            if not rms > 0:
                raise SpecError(f"predictor {v.label!r} is 0 in every row used; leave it out")
            out_values.append(dataclasses.replace(v, scale=rms))
    column_sums = {v.label: moments(row, v.alias, shifts)[1] * n for v in values[1:]}
    pw_min, pw_max = row["pw_min"], row["pw_max"]
    sc = ctx.scaling
    # the response sum on the source's scale (the data fingerprint), from the rescaled one
    sum_fpwy = float(row["sum_fpwy"]) / sc.factor + sc.shift * sum_fpw
    return Summary(
        ll_sums={k[3:]: float(v) for k, v in row.items() if k.startswith("ll_") and v is not None},
        constant_weight=float(pw_min) if pw_min is not None and pw_min == pw_max else None,
        off_mean=float(row["off_mean"] or 0.0),
        column_sums=column_sums,
        sum_fpwy=sum_fpwy,
        n=n,
        sum_f=float(row["sum_f"]),
        sum_fpw=sum_fpw,
        ybar=ybar,
        n_df=float(row["sum_f_pos"]),
        n_zero_weight=int(row["n_zero_weight"]),
        values=tuple(out_values),
        level_counts=(),
    )


def factors(
    ctx: PlanContext, run: FitRun
) -> tuple[tuple[Factor, ...], dict[tuple[str, ...], set[tuple[str, ...]]]]:
    """Levels of every factor and observed combinations of interacting factors (one scan)."""
    names = list(ctx.inputs.factors)
    if not names:
        return (), {}
    sets = factor_sets(ctx.inputs.terms, names)
    cap = ctx.spec.max_levels
    cols = run.query(levels_query(ctx, sets, cap))
    nf = len(names)

    def rows_of(st: tuple[str, ...]) -> list[int]:
        g = sum(1 << (nf - 1 - j) for j, c in enumerate(names) if c not in st)
        return [r for r in range(len(cols["g"])) if int(cols["g"][r]) == g]

    ref = dict(ctx.spec.reference)
    out: list[Factor] = []
    for i, c in enumerate(names):
        rows = rows_of((c,))
        if len(rows) > cap:
            raise SpecError(
                f"categorical column {c!r} has more than {cap} levels (the limit); group rare "
                "levels in the query, treat it as numeric, or raise max_levels "
                "(CLI --max-levels)"
            )
        pairs = sorted((str(cols[f"f{i}"][r]), float(cols["n"][r])) for r in rows)
        levels = [lv for lv, _ in pairs]
        counts = [k for _, k in pairs]
        if c in ref:
            if ref[c] not in levels:
                raise SpecError(
                    f"reference level {ref[c]!r} of column {c!r} does not occur in "
                    f"the rows used; levels are {levels[:20]}"
                )
            reference = ref[c]
        else:
            top = max(counts)
            reference = next(lv for lv, k in zip(levels, counts, strict=True) if k == top)
        is_main = any(t.factors == (c,) and not t.numerics for t in ctx.inputs.terms)
        if len(levels) < 2 and is_main and ctx.spec.intercept:
            raise SpecError(
                f"categorical column {c!r} has a single level ({levels[0]!r}) in "
                "the rows used; leave it out (exclude=[...], CLI --exclude)"
            )
        out.append(
            Factor(
                column=c,
                alias=f"f{i}",
                levels=tuple(levels),
                reference=reference,
                counts=tuple(counts),
            )
        )
    combos: dict[tuple[str, ...], set[tuple[str, ...]]] = {}
    for st in sets:
        rows = rows_of(st)
        if len(rows) > cap:
            raise SpecError(
                f"the interaction of {list(st)} has more than {cap} observed level "
                "combinations (the limit); raise max_levels (CLI --max-levels)"
            )
        idx = [names.index(c) for c in st]
        combos[st] = {tuple(str(cols[f"f{i}"][r]) for i in idx) for r in rows}
    return tuple(out), combos


def moments(
    row: dict, alias: str, shifts: dict[str, tuple[float, float]]
) -> tuple[float, float, float, float]:
    """(c, mean, standard deviation, root mean square) of a value from the profile's
    moments about c, scaled by g (profile_items): m = mean((v - c) g), q = mean(((v - c)
    g)^2); q is 0 exactly when every row has v = c."""
    c, g = shifts.get(alias, (0.0, 1.0))
    m = float(row[f"{alias}_mean"])
    q = float(row[f"{alias}_ms"])
    var = q - m * m
    # cancellation (c far out in a tail): the spread about c still conditions well
    sd = (math.sqrt(var) if var > 1e-12 * q else math.sqrt(max(q, 0.0))) / g
    # rms^2 = mean(v^2) = (c + m/g)^2 + var/g^2, taken relative to the larger of |c| and
    # the spread so that values near the largest doubles do not overflow it
    mean = c + m / g
    big = max(abs(c), math.sqrt(max(q, 0.0)) / g)
    rms = big * math.hypot(mean / big, sd / big) if big > 0 else 0.0
    return c, mean, sd, rms


def profile(ctx: PlanContext, run: FitRun, items: list[ProfileItem]) -> dict[str, object]:
    """The row route's profile: one scan grouped by the row flags; a second, ungrouped one
    only when a kept row fails a domain check (its counts and ranges explain the error)."""
    row = run.one_row(grouped_profile_query(ctx, items))
    bad = fetched_count(row.pop(FOLD_BAD))
    row.pop(FOLD_NK_NULL)
    if bad:
        row.update(run.one_row(profile_query(ctx, detail_items(ctx, items, keys=()))))
    return row


#: Head rows from which a column of distinct whole numbers is taken for an identifier
#: (common practice: below that, distinct values prove little).
ID_LIKE_MIN_ROWS = 100
_INTEGER_TYPE = re.compile(r"u?(tiny|small|big|huge)?int(eger)?", re.IGNORECASE)


def identifier_notes(
    ctx: PlanContext, run: FitRun, head: dict[str, object], values: Sequence[Value]
) -> list[str]:
    """A note for a design taken by default (no ``predictors`` given) that uses an
    integer column as it is whose values are all distinct over the head rows: a key, not a
    predictor, most likely. Continuous columns are distinct on every row too, so only
    integer-typed ones are looked at, and only those whose range over the head rows leaves
    room for that many distinct values get the (one, small) COUNT(DISTINCT) scan."""
    rows = int(head.get(HEAD_COUNT) or 0)
    if ctx.spec.predictors is not None or rows < ID_LIKE_MIN_ROWS:
        return []
    types = {name: kind for name, kind in ctx.inputs.columns}
    candidates = []
    for v in values[1:]:
        if v.basis is not None or len(v.numerics) != 1:
            continue
        lo, hi = head.get(f"{v.alias}_lo"), head.get(f"{v.alias}_hi")
        integer = _INTEGER_TYPE.fullmatch(str(types.get(v.numerics[0], "")).strip())
        if integer and lo is not None and hi is not None and float(hi) - float(lo) + 1 >= rows:
            candidates.append(v.numerics[0])
    if not candidates:
        return []
    counts = run.one_row(distinct_head_query(ctx, candidates))
    ids = [c for i, c in enumerate(candidates) if fetched_count(counts[f"nd_{i}"]) == rows]
    if not ids:
        return []
    return [
        f"column(s) {ids} entered the model as numeric predictors by default, but their "
        f"values are distinct whole numbers in all of the first {rows:,} rows, as an "
        "identifier's are; if a column is a key, not a predictor, leave it out "
        "(--exclude COL, exclude=[...]) or name the predictors (--predictors)"
    ]


def scoring_inputs(spec: ModelSpec, engine: Engine) -> list[str]:
    """Source columns a scoring view of ``spec`` will read (predictors, then the offset's
    columns), from a describe of the source: what a deployment can check before a fit."""
    inputs = describe(spec, engine)
    out = list(dict.fromkeys([*inputs.factors, *inputs.numerics]))
    if inputs.offset is not None:
        out += [c for c in referenced_columns(inputs.offset) if c not in out]
    return out
