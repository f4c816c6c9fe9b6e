"""Run an assessment: a stored model version judged on the rows of a SOURCE, in a few scans.

1. The check scan (:func:`indb.plan.assess_scan.check_items`): rows, NULLs per model input,
   the family's domain checks and the weights; every input mistake is refused here, before
   a deviance is computed (PostgreSQL would raise on the logarithm of a bad value).
2. The order scan (:func:`indb.plan.assess_order.order_query`): per ordered part (the
   score, the actual rate, ...) its tie groups in key order, their bands and the Gini's sum;
   only the key, the exposure and the actual go through the engine's sort.
3. The band scan (:func:`indb.plan.assess_scan.assess_query`): totals, bands (each row's
   key cut at the bands' highest keys, :func:`indb.bandcuts.band_cuts`), levels and
   calibration in one GROUP BY GROUPING SETS, with the constant-rate model's deviance at
   the constant the check scan found.
4. Only when that constant is not exact for the rows used: null scans
   (:func:`indb.plan.assess_scan.null_query`), one per IRLS step of the one-parameter model.

With a second model (``against``) both are scored in the same scans, on the rows where both
give a mean. The numbers are finished in numpy (:func:`indb.assessment.finish`); nothing per
row leaves the database and nothing is written.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

from sqlglot import exp

from indb import sqlexpr as S
from indb import writeback as W
from indb.assessment import AssessResult, Header, PartRows, finish, split_parts
from indb.bandcuts import band_cuts, order_rows, with_order
from indb.design import RESERVED_PREFIX, Inputs
from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine
from indb.errors import EngineError, NondeterministicSourceError, RegistryError, SpecError
from indb.fitrun import fetched_count
from indb.nullmodel import NullTrack, start_intercept
from indb.plan.assess_order import order_query, order_scans
from indb.plan.assess_scan import (
    LEVELS,
    SCORE,
    Against,
    AssessPlan,
    NullModel,
    assess_query,
    check_items,
    closed_form_power,
    null_query,
)
from indb.plan.context import SRC, PlanContext
from indb.plan.profile import profile_query
from indb.prefit import check_domain
from indb.registry import Registry
from indb.results import FitResult
from indb.spec import ModelSpec, Source

#: IRLS steps of the constant-rate model with an offset, when it has no closed form
#: scans of an assessment when the constant-rate model needs no scan of its own: the check,
#: the order and the band scan (one more order scan for each part of
#: :data:`indb.plan.assess_order.LARGE`: a binomial model's mean with an offset, and with a
#: second model its score and the ratio of the scores)
SCANS = 3
NULL_MAX_STEPS = 30
NULL_TOL = 1e-10
#: most bands of the score (and of a numeric --by column)
MAX_BANDS = 1_000
#: most levels a column may show
MAX_LEVELS = 10_000
_EXPRESSIONS = ("offset", "weight", "frequency_weight", "trials")
#: the expressions that define what is summed (weight, actual): two models compared on the
#: same rows must share them
_WEIGHTS = ("weight", "frequency_weight", "trials")


class StoredVersion(NamedTuple):
    """A version of a model as the registry holds it (the second model of a comparison)."""

    model: str
    version: int
    result: FitResult


def parse_against(text: str) -> tuple[str, int | None]:
    """``NAME`` or ``NAME:K`` (a model name holds no colon) as (name, version or None)."""
    name, sep, k = text.strip().partition(":")
    if not name or (sep and not (k.strip().isdigit() and int(k) >= 1)):
        raise SpecError(
            f"against must be a model name, or NAME:K with a version number K >= 1; got {text!r}"
        )
    return name, int(k) if sep else None


def chosen_version(reg: Registry, name: str, version: int | None) -> int:
    """``version``, or the live version of ``name`` (a RegistryError when it has none)."""
    if version is None:
        version = reg.model(name)["live_version"]
        if version is None:
            raise RegistryError(f"model {name!r} has no live version; give version=K")
    return int(version)


def load_against(reg: Registry, text: str) -> StoredVersion:
    """The second model of a comparison, ``NAME`` (its live version) or ``NAME:K``, from
    the registry."""
    name, version = parse_against(text)
    version = chosen_version(reg, name, version)
    return StoredVersion(name, version, reg.load(name, version))


def assess_version(
    engine: Engine,
    result: FitResult,
    *,
    model: str,
    version: int,
    on: str,
    by: Sequence[str] = (),
    bands: int = 10,
    against: StoredVersion | None = None,
) -> AssessResult:
    """Judge ``result`` (version ``version`` of ``model``) on the rows of ``on``; with
    ``against``, judge that version too in the same scans, on the rows where both models
    give a mean, and build the double-lift table.

    Raises
    ------
    SpecError
        A source without the response or a model input, NULL or out-of-domain values that
        leave nothing to judge, zero exposure, a bad ``by`` column or ``bands``, a second
        model of another family, response or weights.
    """
    t0 = time.perf_counter()
    check_bands(bands)
    if against is not None:
        refusal = comparison_refusal(
            (model, version, result.spec), (against.model, against.version, against.result.spec)
        )
        if refusal:
            raise SpecError(refusal)
    d = engine.dialect
    source = Source.parse(on)
    columns = describe_source(engine, source)
    result = _with_types(result, columns)
    inputs = model_inputs(result, model, source, columns, d)
    second = None
    if against is not None:
        against = against._replace(result=_with_types(against.result, columns))
        inputs2 = model_inputs(against.result, against.model, source, columns, d)
        inputs = dataclasses.replace(
            inputs,
            factors=_union(inputs.factors, inputs2.factors),
            numerics=_union(inputs.numerics, inputs2.numerics),
            model_columns=_union(inputs.model_columns, inputs2.model_columns),
        )
        second = Against(
            family=against.result.family_object,
            link=against.result.link_object,
            score_eta=W.eta_sql(against.result, d, include_offset=False),
            unseen=W.unseen_sql(against.result),
            offset=inputs2.offset,
        )
    spec = ModelSpec.build(
        on,
        result.response,
        result.family_object,
        result.link_object,
        **{role: result.spec.get(role) for role in _EXPRESSIONS},
    )
    ctx = PlanContext(spec, inputs, d)
    levels, banded = by_columns(result, by, columns, d, against)
    plan = AssessPlan(
        ctx,
        score_eta=W.eta_sql(result, d, include_offset=False),
        unseen=W.unseen_sql(result),
        levels=levels,
        banded=banded,
        bands=bands,
        max_levels=MAX_LEVELS,
        against=second,
    )
    check = _one_row(engine, profile_query(ctx, check_items(plan)))
    kept, nulls = checked_rows(plan, check)
    null = start_null_model(plan, check)
    order = order_rows(
        [
            (picked, engine.fetch_columns(d.render(order_query(plan, picked))))
            for picked in order_scans(plan)
        ]
    )
    cols = engine.fetch_columns(d.render(assess_query(plan, band_cuts(order), null)))
    parts = split_parts(plan.parts, with_order(plan, cols, order))
    score = next(p for p in parts if p.part.role == SCORE)
    rows = int(score.total("n"))
    check_scored(plan, parts, rows, kept)
    null_dev, extra, notes = null_deviance(engine, plan, null, score, exact=rows == kept)
    header = Header(
        model=model,
        version=version,
        source=source.label(),
        engine=d.name,
        family=result.family_object.describe(),
        link=result.link_object.describe(),
        offset=result.spec.get("offset"),
        rows_read=fetched_count(check["n_total"]),
        rows_kept=kept,
        nulls=nulls,
        training_levels={f["column"]: tuple(f["levels"]) for f in result.design["factors"]},
        against=_against_header(against),
    )
    return finish(
        header,
        parts,
        null_dev,
        scans=SCANS - 1 + len(order_scans(plan)) + extra,
        seconds=time.perf_counter() - t0,
        notes=notes,
    )


def _with_types(result: FitResult, columns: Sequence[tuple[str, str]]) -> FitResult:
    """A version stored before fits recorded the types its expressions read takes the
    SOURCE's (as the scoring SQL takes the scoring source's)."""
    if result.design.get("column_types"):
        return result
    return dataclasses.replace(result, design={**result.design, "column_types": dict(columns)})


def _union(a: Sequence[str], b: Sequence[str]) -> tuple[str, ...]:
    return tuple(dict.fromkeys([*a, *b]))


def _against_header(against: StoredVersion | None) -> dict[str, Any] | None:
    if against is None:
        return None
    r = against.result
    return {
        "model": against.model,
        "version": against.version,
        "family": r.family_object.describe(),
        "link": r.link_object.describe(),
        "offset": r.spec.get("offset"),
    }


def comparison_refusal(
    first: tuple[str, int | None, Mapping[str, Any]],
    second: tuple[str, int | None, Mapping[str, Any]],
) -> str | None:
    """Why two models cannot be judged side by side on the same rows (None: they can).

    Each is (model, version or None for a version not yet recorded, its spec as plain data:
    ``FitResult.spec`` or ``ModelSpec.to_dict()``). Their deviances and actuals are only
    comparable with the same family (a Tweedie's power included), response and weights.
    """

    def label(m: tuple[str, int | None, Mapping[str, Any]]) -> str:
        return f"model {m[0]!r}" + (f" version {m[1]}" if m[1] is not None else "")

    (a, b), (sa, sb) = (label(first), label(second)), (first[2], second[2])
    for key, what in (("family", "families"), ("response", "responses")):
        if sa.get(key) != sb.get(key):
            return (
                f"cannot compare {a} with {b}: their {what} differ ({sa.get(key)!r} and "
                f"{sb.get(key)!r}); compare models of the same family and response"
            )
    if sa.get("family") == "tweedie" and sa.get("family_params") != sb.get("family_params"):
        return (
            f"cannot compare {a} with {b}: their Tweedie powers differ "
            f"({sa.get('family_params')} and {sb.get('family_params')}), so their deviances "
            "are on different scales; compare models of the same power"
        )
    for key in _WEIGHTS:
        if sa.get(key) != sb.get(key):
            return (
                f"cannot compare {a} with {b}: their {key} expressions differ "
                f"({sa.get(key)!r} and {sb.get(key)!r}), so their actuals and deviances weigh "
                "rows differently; compare models with the same weights"
            )
    return None


def check_bands(bands: int) -> None:
    if not (isinstance(bands, int) and not isinstance(bands, bool) and 2 <= bands <= MAX_BANDS):
        raise SpecError(f"bands must be a whole number from 2 to {MAX_BANDS:,}; got {bands!r}")


# -- the source and the model's inputs ---------------------------------------------------------


def describe_source(engine: Engine, source: Source) -> list[tuple[str, str]]:
    """The SOURCE's columns and types (described, not run)."""
    d = engine.dialect
    rel = d.relation(source).copy()
    rel.set("alias", exp.TableAlias(this=S.ident(SRC)))
    try:
        return engine.describe(d.render(S.select([exp.Star()], rel)))
    except EngineError as err:
        raise SpecError(
            f"cannot read the source {source.label()!r}: {err}; check the table name, file "
            "path or query"
        ) from err


def _columns_hint(names: Sequence[str]) -> str:
    shown = ", ".join(names[:12]) + (", ..." if len(names) > 12 else "")
    return f"its columns are {shown}"


def model_inputs(
    result: FitResult,
    model: str,
    source: Source,
    columns: Sequence[tuple[str, str]],
    d: Dialect,
) -> Inputs:
    """The model's response, predictors and stored expressions checked against the SOURCE's
    columns (the expressions read in the dialect they were written in, as for scoring)."""
    types = dict(columns)
    names = list(types)
    reserved = [n for n in names if n.lower().startswith(RESERVED_PREFIX)]
    if reserved:
        raise SpecError(
            f"source column {reserved[0]!r} starts with {RESERVED_PREFIX!r}, which indb "
            "reserves for the columns it adds to its scans; rename it in a SELECT"
        )
    where = f"the source {source.label()!r}"

    def need(column: str, role: str) -> None:
        if column not in types:
            raise SpecError(
                f"{where} has no column {column!r} ({role} of model {model!r}); "
                f"{_columns_hint(names)}; select it in the source query"
            )

    response = result.response
    need(response, "the response")
    kind = d.type_kind(types[response])
    if kind == "boolean" and result.family == "binomial":
        response_kind = "boolean"
    elif kind == "numeric":
        response_kind = "numeric"
    else:
        raise SpecError(
            f"response column {response!r} of {where} has type {types[response]}; model "
            f"{model!r} needs it numeric{' or BOOLEAN' if result.family == 'binomial' else ''}"
        )
    factors = [f["column"] for f in result.design["factors"]]
    numerics: list[str] = []
    for c in result.design["columns"]:
        numerics += [n for n in c["numerics"] if n not in numerics]
    for c in factors:
        need(c, "a categorical predictor")
    for c in numerics:
        need(c, "a numeric predictor")
        if d.type_kind(types[c]) != "numeric":
            raise SpecError(
                f"predictor column {c!r} of {where} has type {types[c]}; model {model!r} "
                "reads it as a number: cast it in the source query"
            )
    exprs = {role: W.stored_expression_sql(result, role, d) for role in _EXPRESSIONS}
    used: list[str] = []
    for role, tree in exprs.items():
        for c in S.referenced_columns(tree) if tree is not None else []:
            need(c, f"read by its {role} expression {result.spec.get(role)!r}")
            used.append(c)
    model_columns = list(dict.fromkeys([response, *factors, *numerics, *used]))
    return Inputs(
        response=response,
        response_kind=response_kind,
        columns=tuple(columns),
        factors=tuple(factors),
        numerics=tuple(numerics),
        terms=(),
        model_columns=tuple(model_columns),
        **exprs,
    )


def by_columns(
    result: FitResult,
    by: Sequence[str],
    columns: Sequence[tuple[str, str]],
    d: Dialect,
    against: StoredVersion | None = None,
) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(columns reported by level, numeric columns cut into bands): the model's categorical
    predictors (and the second model's), then the ``by`` columns (a numeric one in bands of
    its values)."""
    types = dict(columns)
    factors = [f["column"] for f in result.design["factors"]]
    if against is not None:
        factors = list(_union(factors, [f["column"] for f in against.result.design["factors"]]))
    levels, banded = list(factors), []
    seen: set[str] = set()
    for c in by:
        if not isinstance(c, str) or c not in types:
            raise SpecError(f"by column {c!r} is not in the source; {_columns_hint(list(types))}")
        if c in seen:
            raise SpecError(f"by column {c!r} is given twice; give each column once")
        seen.add(c)
        if c in factors:
            continue  # reported by level already (as the model reads it)
        (banded if d.type_kind(types[c]) == "numeric" else levels).append(c)
    return tuple(levels), tuple(banded)


# -- checks ------------------------------------------------------------------------------------


def _one_row(engine: Engine, tree) -> dict[str, object]:
    cols = engine.fetch_columns(engine.dialect.render(tree))
    return {k: (v[0] if len(v) else None) for k, v in cols.items()}


def _num(v: object) -> float:
    return math.nan if v is None else float(v)


def checked_rows(plan: AssessPlan, row: dict[str, object]) -> tuple[int, dict[str, int]]:
    """(rows kept, NULL counts per model input) from the check scan; a SpecError where
    nothing can be judged or a value is out of the family's domain."""
    ctx = plan.ctx
    where = f"the source {ctx.spec.source.label()!r}"
    n_total, n_kept = fetched_count(row["n_total"]), fetched_count(row["n_kept"])
    nulls = {
        label: fetched_count(row[f"null_{i}"]) for i, (label, _) in enumerate(ctx.null_items())
    }
    if n_total == 0:
        raise SpecError(f"{where} has no rows: nothing to assess")
    if n_kept == 0:
        counts = {k: v for k, v in nulls.items() if v}
        raise SpecError(
            f"every one of the {n_total:,} rows of {where} has a NULL in a column the model "
            f"reads (NULL counts: {counts}); nothing to assess"
        )
    check_domain(ctx, row, n_kept, where)
    exposure = _num(row.get("sum_fe", row["sum_fpw"]))
    if not (_num(row["sum_fpw"]) > 0 and exposure > 0):
        what = "frequency weight x exp(offset)" if plan.log_exposure else "weight x trials"
        raise SpecError(
            f"the {n_kept:,} rows of {where} have zero exposure (sum of {what} is "
            f"{exposure:.6g}): nothing to assess; check the weight and offset columns"
        )
    return n_kept, nulls


def check_scored(plan: AssessPlan, parts: Sequence[PartRows], rows: int, kept: int) -> None:
    """The band scan's counts against the check scan's; too many levels."""
    where = f"the source {plan.ctx.spec.source.label()!r}"
    if rows > kept:
        raise NondeterministicSourceError(
            f"{where} is not deterministic: the band scan counted {rows:,} rows where "
            f"the check scan counted {kept:,}; store the rows first (CREATE TABLE ... AS)"
        )
    if rows == 0:
        raise SpecError(
            f"none of the {kept:,} rows of {where} gets a valid mean from the model (eta "
            "outside the link's range); check the offset and the predictors' scale"
        )
    for p in parts:
        if p.part.role == LEVELS and len(p) > plan.max_levels:
            raise SpecError(
                f"column {p.part.column!r} has more than {plan.max_levels:,} levels in "
                f"{where}; group them in the source query or give a numeric column"
            )


# -- the constant-rate model ---------------------------------------------------------------------


def start_null_model(plan: AssessPlan, row: dict[str, object]) -> NullModel:
    """The constant-rate model as the check scan gives it: the weighted mean response
    without an offset; with one, the closed form of a log link with V(mu) = mu^p, else the
    start of its IRLS (g(mean y) - mean offset)."""
    ybar = _num(row["sum_fpwy"]) / _num(row["sum_fpw"])
    if plan.ctx.spec.offset is None:
        return NullModel(mean=ybar)
    if closed_form_power(plan) is not None:
        s1, s2 = _num(row["null_s1"]), _num(row["null_s2"])
        if s1 > 0 and s2 > 0 and math.isfinite(s1) and math.isfinite(s2):
            return NullModel(intercept=math.log(s1) - math.log(s2))
    spec = plan.ctx.spec
    b0 = start_intercept(spec.family, spec.link, ybar, _num(row["off_mean"]))
    return NullModel(intercept=b0, step=True)


def null_deviance(
    engine: Engine, plan: AssessPlan, null: NullModel, score: PartRows, *, exact: bool
) -> tuple[float, int, list[str]]:
    """(the constant-rate model's deviance, extra scans run, notes).

    The band scan summed it at the check scan's constant; that is the answer when the
    constant has a closed form and every kept row got a mean (``exact``). Otherwise the
    weighted mean of the rows used (no offset) is scanned once more, or the one-parameter
    model with the offset is fitted by IRLS (:class:`indb.nullmodel.NullTrack`), a null scan
    per step.
    """
    if not null.step and exact:
        return score.total("nd"), 0, []
    if null.mean is not None:
        mean = score.total("ac") / score.total("wt")
        return _null_scan(engine, plan, NullModel(mean=mean))["nd"], 1, []
    track = NullTrack(float(null.intercept), NULL_TOL)
    scans = 0
    if null.step:
        track.update(
            {
                "nulldev": score.total("nd"),
                "nullw": score.total("nw0"),
                "nullwz": score.total("nwz0"),
            }
        )
    while not track.done and scans < NULL_MAX_STEPS:
        sums = _null_scan(engine, plan, NullModel(intercept=track.b0, step=True))
        scans += 1
        track.update({"nulldev": sums["nd"], "nullw": sums["nw0"], "nullwz": sums["nwz0"]})
    if track.done:
        return track.deviance, scans, []
    note = (
        f"the constant-rate model with the offset did not settle in {NULL_MAX_STEPS} IRLS "
        "steps, so deviance_explained is not given"
    )
    return math.nan, scans, [note]


def _null_scan(engine: Engine, plan: AssessPlan, null: NullModel) -> dict[str, float]:
    row = _one_row(engine, null_query(plan, null))
    return {k: _num(v) for k, v in row.items()}
