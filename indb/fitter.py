"""The fitting procedure: pre-fit scans, the IRLS loop, theta estimation, final statistics.

This module wires the layers: it asks :mod:`indb.plan` for syntax trees, has the engine's
dialect render them, runs them through the engine adapter and hands the small results to
:mod:`indb.solver`. Each IRLS iteration is exactly one aggregate query.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import time
import uuid
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from indb import logsums, solver
from indb import plan as P
from indb import sqlexpr as S
from indb.design import (
    INTERCEPT,
    Design,
    DesignColumn,
    Factor,
    Inputs,
    Value,
    build_design,
    factor_sets,
    plan_values,
    resolve_inputs,
)
from indb.engine import Engine
from indb.errors import (
    AliasingWarning,
    ConvergenceWarning,
    EngineError,
    NonConvergenceError,
    SeparationWarning,
    SpecError,
    UnsupportedError,
)
from indb.families import NegativeBinomial, Poisson
from indb.results import Coefficient, FitResult, IterationRecord
from indb.spec import ModelSpec, Source
from indb.sqlexpr import Expr

MAX_HALVINGS = 30
# halvings (step 1/4) after which a rise too small for the convergence test ends IRLS
STALL_HALVINGS = 2
EDGE, NEAR_EDGE = P.EDGE, P.NEAR_EDGE
SEPARATION_STD_SE = 100.0

Progress = Callable[[IterationRecord], None] | None


@dataclass
class _Run:
    """Mutable bookkeeping for one fit."""

    engine: Engine
    progress: Progress
    log: list[IterationRecord]

    def query(self, tree) -> dict[str, np.ndarray]:
        return self.engine.fetch_columns(self.engine.dialect.render(tree))

    def one_row(self, tree) -> dict[str, object]:
        cols = self.query(tree)
        return {k: (v[0] if len(v) else None) for k, v in cols.items()}

    phase: str = "fit"
    temp_tables: list[str] = dataclasses.field(default_factory=list)
    compressed: tuple[int, int, float] | None = None
    original_ctx: P.PlanContext | None = None  # the uncompressed source, for the log-lik
    fit_ybar: float | None = None  # weighted mean response of the folded problem
    fold_seconds: float = 0.0
    #: the sample start: (rows in the sample, its IRLS scans, seconds), or why it was skipped
    sample: tuple[int, int, float] | str | None = None

    def drop_temp(self) -> None:
        for name in self.temp_tables:
            with contextlib.suppress(Exception):
                self.engine.execute(self.engine.dialect.drop_materialized(name))
        self.temp_tables.clear()

    def record(self, dev: float, change: float, halvings: int, seconds: float) -> None:
        rec = IterationRecord(
            iteration=len(self.log) + 1,
            deviance=dev,
            relative_change=change,
            step_halvings=halvings,
            seconds=seconds,
            phase=self.phase,
        )
        self.log.append(rec)
        if self.progress is not None:
            self.progress(rec)


@dataclass(frozen=True)
class _IrlsState:
    beta: np.ndarray
    sums: solver.Sums
    solution: solver.Solution
    converged: bool
    iterations: int
    #: stopped early: step-halving could not lower the deviance measurably (see _irls)
    stalled: bool = False


# -- pre-fit ---------------------------------------------------------------------------------


def _describe(spec: ModelSpec, engine: Engine) -> Inputs:
    d = engine.dialect
    probe = P.PlanContext(spec, _empty_inputs(spec), d)
    try:
        columns = engine.describe(d.render(P.describe_query(probe)))
    except EngineError as err:
        # a missing table, file or column is the user's input, not an engine fault
        raise SpecError(
            f"cannot read the source {spec.source.label()!r}: {err}; check the "
            "table name, file path or query"
        ) from err
    return resolve_inputs(spec, columns, d.type_kind, d.sqlglot_name)


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


def _check_nulls(ctx: P.PlanContext, row: dict) -> tuple[int, int, dict[str, int]]:
    """Row counts and NULL exclusions from the profile row; errors for unusable inputs."""
    n_total = _count(row["n_total"])
    n_kept = _count(row["n_kept"])
    by_col: dict[str, int] = {}
    for i, (label, _) in enumerate(ctx.null_items()):
        k = _count(row[f"null_{i}"])
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


def _what(label: str) -> str:
    return label if label.endswith("expression") else f"column {label!r}"


def _knots(ctx: P.PlanContext, run: _Run) -> dict[str, tuple[float, ...]]:
    if not ctx.inputs.spline_columns:
        return {}
    row = run.one_row(P.knots_query(ctx))
    out: dict[str, tuple[float, ...]] = {}
    for c, k in ctx.inputs.spline_columns:
        raw = [row[f"k_{c}_{i}"] for i in range(len(P.knot_quantiles(k)))]
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
class _Summary:
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


def _summarize(
    ctx: P.PlanContext, row: dict, values: tuple[Value, ...], shifts: dict[str, float]
) -> _Summary:
    n = int(row["n_kept"])
    for i, (stem, _) in enumerate(P.domain_checks(ctx)):
        bad = int(row[f"chk_{i}"] or 0)
        if bad:
            detail = ""
            if "response" in stem and "NaN" not in stem:
                detail = f" (min {_fmt(row['y_min'])}, max {_fmt(row['y_max'])})"
            raise SpecError(
                f"{stem} in {bad} of {n} rows{detail}; filter or fix those rows in the source query"
            )
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
        # moments about a value c of one kept row (profile_items): m = mean(v - c),
        # q = mean((v - c)^2); q is 0 exactly when every row has v = c
        c = shifts.get(v.alias, 0.0)
        m = float(row[f"{v.alias}_mean"])
        q = float(row[f"{v.alias}_ms"])
        mean = c + m
        var = q - m * m
        # cancellation (c far out in a tail): the spread about c still conditions well
        sd = math.sqrt(var) if var > 1e-12 * q else math.sqrt(max(q, 0.0))
        rms = math.sqrt(max(q + 2.0 * c * m + c * c, 0.0))
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
    column_sums = {
        v.label: (shifts.get(v.alias, 0.0) + float(row[f"{v.alias}_mean"])) * n for v in values[1:]
    }
    pw_min, pw_max = row["pw_min"], row["pw_max"]
    return _Summary(
        ll_sums={k[3:]: float(v) for k, v in row.items() if k.startswith("ll_") and v is not None},
        constant_weight=float(pw_min) if pw_min is not None and pw_min == pw_max else None,
        off_mean=float(row["off_mean"] or 0.0),
        column_sums=column_sums,
        sum_fpwy=float(row["sum_fpwy"]),
        n=n,
        sum_f=float(row["sum_f"]),
        sum_fpw=sum_fpw,
        ybar=ybar,
        n_df=float(row["sum_f_pos"]),
        n_zero_weight=int(row["n_zero_weight"]),
        values=tuple(out_values),
        level_counts=(),
    )


def _factors(
    ctx: P.PlanContext, run: _Run
) -> tuple[tuple[Factor, ...], dict[tuple[str, ...], set[tuple[str, ...]]]]:
    """Levels of every factor and observed combinations of interacting factors (one scan)."""
    names = list(ctx.inputs.factors)
    if not names:
        return (), {}
    sets = factor_sets(ctx.inputs.terms, names)
    cap = ctx.spec.max_levels
    cols = run.query(P.levels_query(ctx, sets, cap))
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


# -- IRLS ------------------------------------------------------------------------------------


def _fallback_beta(ctx: P.PlanContext, design: Design, ybar: float) -> np.ndarray:
    """Intercept-only coefficients g(ybar): where a failing first step halves toward."""
    beta = np.zeros(design.p)
    if design.intercept:
        link = ctx.spec.link
        mu = min(max(ybar, 1e-6), 1 - 1e-6) if ctx.spec.family.unit_mean else ybar
        with np.errstate(all="ignore"):
            g = float(link.link(np.array([mu]))[0])
        beta[0] = g if math.isfinite(g) else 0.0
    return beta


class _NullTrack:
    """IRLS of the intercept-only model with the offset, carried along in the main scans.

    One parameter: each scan returns sum(w) and sum(w z) at the current intercept ``b0``, so
    the next intercept is their ratio. Halves its step when its deviance rises.
    """

    def __init__(self, b0: float, tol: float) -> None:
        self.b0 = b0
        self.prev = b0
        self.tol = tol
        self.dev_old = math.inf
        self.deviance = math.nan
        self.done = False

    def finish(self, b0: float, deviance: float) -> None:
        """The model's closed-form answer (:func:`indb.logsums.null_model`)."""
        if math.isfinite(b0) and math.isfinite(deviance):
            self.b0, self.deviance, self.done = b0, deviance, True

    def update(self, extras: dict[str, float]) -> None:
        dev = extras["nulldev"]
        if math.isfinite(self.dev_old) and not (dev <= self.dev_old * (1 + 1e-9) + 1e-12):
            self.b0 = 0.5 * (self.b0 + self.prev)  # rose (or NaN): halve and rescan
            return
        w, wz = extras["nullw"], extras["nullwz"]
        new = wz / w if w > 0 else self.b0
        change = solver.relative_change(dev, self.dev_old) if math.isfinite(self.dev_old) else 1.0
        self.deviance = dev
        step = abs(new - self.b0) * math.sqrt(max(w, 0.0))
        if change < self.tol and step < max(math.sqrt(self.tol), 1e-7):
            self.done = True
            return
        self.dev_old, self.prev, self.b0 = dev, self.b0, new


def _irls(
    ctx: P.PlanContext,
    design: Design,
    run: _Run,
    ybar: float,
    *,
    start: np.ndarray | None = None,
    null_mu: Expr | None = None,
    null_track: _NullTrack | None = None,
    off_mean: float = 0.0,
) -> tuple[_IrlsState, float | None]:
    """Iterate scans until the deviance settles and the next step is negligible.

    Returns the state at the last scanned coefficients and the null deviance: from the
    first scan when ``null_mu`` (a per-row null mean) is given, or from ``null_track`` (the
    intercept-only model with the offset, iterated in the same scans) when it converged.
    """
    spec = ctx.spec
    cells: list[tuple[str, ...]] | None = None
    null_dev: float | None = None
    # the log-link scan (no join to factor effects; plan.log_scan_query) where it applies
    log_scan = P.log_scan_applies(ctx, design)
    log_cache: logsums.LogCache | None = None
    power = ctx.spec.family.variance_power
    off_center = off_mean if math.isfinite(off_mean) else 0.0

    def scan(beta: np.ndarray | None) -> solver.Sums:
        nonlocal cells, null_dev, log_scan, log_cache
        if beta is not None and log_scan:
            gram, response, constants = logsums.scan_parts(power, log_cache)
            tree = P.log_scan_query(
                ctx,
                design,
                beta,
                gram=gram,
                response=response,
                constants=constants,
                off_center=off_center,
            )
            got = logsums.assemble_log_scan(
                design, run.query(tree), beta, power, log_cache, off_center
            )
            wants_null = (null_mu is not None and null_dev is None) or (
                null_track is not None and not null_track.done
            )
            b0, dev0 = logsums.null_model(power, got.cache) if wants_null else (0.0, 0.0)
            if got.digits_lost <= logsums.MAX_DIGITS_LOST and math.isfinite(dev0):
                log_cache = got.cache
                if wants_null and null_track is not None:
                    null_track.finish(b0, dev0)
                elif wants_null:
                    null_dev = dev0
                return got.sums
            # the model fits so closely that the split deviance lost too many digits:
            # per-row deviances from here on (this scan is run again below)
            log_scan = False
        with_mu = null_mu is not None and null_dev is None
        track = null_track is not None and not null_track.done
        tree = P.gram_query(
            ctx,
            design,
            beta,
            ybar=ybar,
            null_mu=null_mu if with_mu else None,
            cells=cells,
            null_intercept=null_track.b0 if track else None,
        )
        extra = ("nullw", "nullwz", "nulldev") if track else ("nulldev",) if with_mu else ()
        if spec.family.unit_mean:
            extra += ("edge", "near")
        out = solver.assemble(design, run.query(tree), extra)
        cells = out.cell_keys
        if with_mu:
            null_dev = out.extras["nulldev"]
        if track:
            null_track.update(out.extras)
        return out

    # Converged when the deviance settles AND the next Newton step is statistically
    # invisible: with linear convergence (non-canonical links) a small deviance change alone
    # can leave coefficients ~1e-4 standard errors from the optimum.
    step_tol = max(math.sqrt(spec.tol), 1e-7)

    t0 = time.perf_counter()
    if start is None:
        sums = scan(None)
        if sums.bad:
            raise SpecError(
                f"cannot find valid starting values for family {spec.family.name!r} with link "
                f"{spec.link.describe()!r} ({sums.bad} rows give an invalid mean); "
                "try another link or starting values"
            )
        dev_old = math.inf
        beta_prev = _fallback_beta(ctx, design, ybar)
        run.record(sums.deviance, math.nan, 0, time.perf_counter() - t0)
        sol = solver.solve(sums.xtwx, sums.xtwz)
        beta = sol.beta
        budget = spec.max_iter - 1  # the start scan counts as an iteration
    else:
        beta = np.asarray(start, float)
        beta_prev = beta.copy()
        dev_old = math.inf
        sol = None
        budget = spec.max_iter
    converged = False
    stalled = False
    iterations = 0
    sums_prev: solver.Sums | None = None
    for _ in range(max(budget, 0)):
        iterations += 1
        halvings = 0
        t0 = time.perf_counter()
        while True:
            sums = scan(beta)
            valid = sums.bad == 0 and math.isfinite(sums.deviance)
            # A rise is relative to the deviance only: deviance terms are >= 0, so their
            # sum's rounding error is a small multiple of eps times the sum (1e-9 covers
            # parallel partial sums over ~10^7 rows). No absolute slack: at a boundary MLE
            # the deviance itself falls towards 0 (~5e-9 after 20 iterations on 4 rows),
            # where a fixed 1e-12 accepted steps that raised it, over and over.
            rises = math.isfinite(dev_old) and sums.deviance > dev_old * (1 + 1e-9)
            if valid and not rises:
                break
            if (
                valid
                and halvings >= STALL_HALVINGS
                and solver.relative_change(sums.deviance, dev_old) < spec.tol
            ):
                # Flat: a quarter of the Newton step still does not lower the deviance and
                # the rise is below what the convergence test can see. Along the step the
                # deviance is ~ D0 - a t + b t^2; had its minimum t* been >= 1/4, t = 1/2
                # or 1/4 would have lowered it, and with t* < 1/4 the full step's rise
                # b (1 - 2 t*) >= b / 2 bounds the best gain b t*^2 below tol / 8 in the
                # same measure. Nothing measurable is left: keep the last accepted step.
                stalled = True
                break
            if halvings >= MAX_HALVINGS:
                raise SpecError(_halving_failure(spec, sums))
            beta = 0.5 * (beta + beta_prev)
            halvings += 1
        if stalled:
            iterations -= 1
            assert sums_prev is not None and sol is not None
            sums, beta = sums_prev, beta_prev
            phi = 1.0
            if not spec.family.dispersion_fixed:
                rank = int((~sol.aliased).sum())
                phi = sums.pearson / max(sums.n_weighted - rank, 1.0)
            # the deviance has settled; converged if the remaining step is invisible too
            converged = solver.step_in_se(beta, sol.beta, sol.inv_info, phi) < step_tol
            break
        sums_prev = sums
        change = (
            solver.relative_change(sums.deviance, dev_old) if math.isfinite(dev_old) else math.inf
        )
        run.record(sums.deviance, change, halvings, time.perf_counter() - t0)
        sol = solver.solve(sums.xtwx, sums.xtwz)
        phi = 1.0
        if not spec.family.dispersion_fixed:
            rank = int((~sol.aliased).sum())
            phi = sums.pearson / max(sums.n_weighted - rank, 1.0)
        if change < spec.tol and solver.step_in_se(beta, sol.beta, sol.inv_info, phi) < step_tol:
            converged = True
            break
        dev_old = sums.deviance
        beta_prev = beta
        beta = sol.beta
    assert sol is not None
    if null_track is not None and null_track.done:
        null_dev = null_track.deviance
    return _IrlsState(
        beta=beta,
        sums=sums,
        solution=sol,
        converged=converged,
        iterations=iterations,
        stalled=stalled and not converged,
    ), null_dev


def _halving_failure(spec: ModelSpec, sums: solver.Sums) -> str:
    msg = (
        f"IRLS step-halving failed after {MAX_HALVINGS} halvings (deviance "
        f"{sums.deviance:g}, {sums.bad} rows with invalid means); the model may be "
        "unsuitable for the data (check the link and family)"
    )
    if spec.offset is not None:
        # an offset is added to every row's linear predictor unscaled: one on the wrong
        # scale (exposure instead of ln(exposure)) or spanning more than ~1400 on the log
        # scale (exp overflows past ~709) leaves no coefficients with representable means
        msg += (
            f", and the offset expression {spec.offset!r}: it enters the linear predictor "
            "as is, so with a log link values spanning more than ~700 overflow the fitted "
            "means; check that it is on the link scale (ln(exposure), not exposure) and "
            "rescale it"
        )
    return msg


def _null_deviance(
    ctx: P.PlanContext, design: Design, run: _Run, ybar: float
) -> tuple[Expr | None, bool]:
    """How to get the null deviance (intercept-only model, offset and weights honoured).

    Without an offset its mean is the weighted response mean, whose deviance the first scan
    adds up; with an offset the intercept-only model is refitted by IRLS. The null model has
    an intercept even when the fitted model has none (statsmodels' convention).
    """
    from indb import sqlexpr as S

    if ctx.spec.offset is not None:
        return None, True
    mu = min(max(ybar, 1e-300), 1 - 2.2e-16) if ctx.spec.family.unit_mean else ybar
    return S.num(mu), False


def _null_start(ctx: P.PlanContext, summary: _Summary) -> float:
    """Starting intercept of the null model with an offset: g(mean y) - mean offset."""
    fam, link = ctx.spec.family, ctx.spec.link
    mu = min(max(summary.ybar, 1e-6), 1 - 1e-6) if fam.unit_mean else summary.ybar
    with np.errstate(all="ignore"):
        g = float(link.link(np.array([mu]))[0])
    return (g if math.isfinite(g) else 0.0) - summary.off_mean


def _intercept_only(design: Design) -> Design:
    return Design(
        intercept=True,
        factors=(),
        values=(design.values[0],),
        columns=(DesignColumn(term=INTERCEPT, factors=(), levels=(), value=0, source_columns=()),),
    )


def _estimate_theta(
    ctx: P.PlanContext, design: Design, run: _Run, summary: _Summary
) -> tuple[float, np.ndarray]:
    """Alternate IRLS at fixed theta and Newton steps on theta at fixed means."""
    run.phase = "theta"
    poisson_ctx = dataclasses.replace(ctx, spec=dataclasses.replace(ctx.spec, family=Poisson()))
    state, _ = _irls(poisson_ctx, design, run, summary.ybar)
    beta = state.beta
    hist = run.query(P.response_histogram_query(ctx, design))
    hy, hc = np.asarray(hist["y"], float), np.asarray(hist["c"], float)
    total = float(hc.sum())
    row = run.one_row(P.theta_query(ctx, design, beta, 1.0))
    mom = float(row["mom"])
    theta = total / mom if mom > 0 else 1e3
    theta = min(max(theta, 1e-4), 1e6)
    for _ in range(50):
        theta_outer = theta
        for _ in range(25):
            row = run.one_row(P.theta_query(ctx, design, beta, theta))
            new = solver.theta_step(theta, hy, hc, total, float(row["a"]), float(row["b"]))
            done = abs(math.log(new / theta)) < 1e-10
            theta = new
            if done:
                break
        nb_ctx = dataclasses.replace(
            ctx, spec=dataclasses.replace(ctx.spec, family=NegativeBinomial(theta=theta))
        )
        state, _ = _irls(nb_ctx, design, run, summary.ybar, start=beta)
        beta = state.beta
        if abs(theta - theta_outer) / theta < 1e-9:
            break
        if theta > 1e8:
            warnings.warn(
                "negative binomial theta runs off to infinity: the data show no "
                "overdispersion; a Poisson model fits as well",
                ConvergenceWarning,
                stacklevel=3,
            )
            break
    return theta, beta


# -- the whole fit -----------------------------------------------------------------------------


def _prepare(spec: ModelSpec, engine: Engine, run: _Run):
    """Pre-fit scans (read only): columns, knots, the profile (on the compressed route, the
    fold and its profile in one scan), levels and combinations."""
    inputs = _describe(spec, engine)
    ctx = P.PlanContext(spec, inputs, engine.dialect)
    knots = _knots(ctx, run)
    values = plan_values(inputs, spec.intercept)
    shifts = _shifts(ctx, run, values, knots)
    items = P.profile_items(ctx, values, knots, shifts)
    folded = _fold(ctx, run, items) if _should_fold(ctx, run) else None
    row = folded[0] if folded else _profile(ctx, run, items)
    n_total, n_kept, by_col = _check_nulls(ctx, row)
    summary = _summarize(ctx, row, values, shifts)
    if folded:
        ctx = _folded_context(ctx, run, folded[1], n_kept)
    factors, combos = _factors(ctx, run)
    design = build_design(
        inputs, spec.intercept, summary.values, factors, combos, tuple(knots.items())
    )
    if design.p == 0:
        raise SpecError("the model has no coefficients to estimate")
    return ctx, design, summary, n_total, n_kept, by_col


def _shifts(
    ctx: P.PlanContext, run: _Run, values: tuple[Value, ...], knots: dict
) -> dict[str, float]:
    """Each value in one kept row (0 where there is none, or it is NULL or not finite):
    the points the profile takes moments about."""
    if len(values) < 2:
        return {}
    row = run.one_row(P.first_values_query(ctx, values, knots))
    out: dict[str, float] = {}
    for v in values[1:]:
        x = row.get(v.alias)
        out[v.alias] = float(x) if x is not None and math.isfinite(float(x)) else 0.0
    return out


def _profile(ctx: P.PlanContext, run: _Run, items: list[P.ProfileItem]) -> dict[str, object]:
    """The row route's profile: one scan grouped by the row flags; a second, ungrouped one
    only when a kept row fails a domain check (its counts and ranges explain the error)."""
    row = run.one_row(P.grouped_profile_query(ctx, items))
    bad = _count(row.pop(P.FOLD_BAD))
    row.pop(P.FOLD_NK_NULL)
    if bad:
        row.update(run.one_row(P.profile_query(ctx, P.detail_items(ctx, items, keys=()))))
    return row


AUTO_COMPRESS_MIN_ROWS = 50_000
COMPRESS_RATIO = 10  # compress when the sample shows >= 10 rows per distinct design row


def _should_fold(ctx: P.PlanContext, run: _Run) -> bool:
    """Whether to take the compressed route (``compress`` option; ``auto`` decides from the
    distinct design rows among the first kept rows). Never when the negative binomial theta
    is estimated (its deviance constants move with theta) or the engine cannot hold a
    temporary table (unless ``always``, which then raises)."""
    spec = ctx.spec
    if spec.compress == "never" or spec.estimate_theta:
        return False
    if not ctx.dialect.can_materialize:
        if spec.compress == "always":
            raise UnsupportedError(
                f"engine {ctx.dialect.name!r} cannot hold the folded table; use compress='auto'"
            )
        return False
    if spec.compress == "always":
        return True
    row = run.one_row(P.sample_distinct_query(ctx))
    d, s = _count(row["d"]), _count(row["s"])
    # the sample holds every kept row when it is smaller than SAMPLE_ROWS
    return s >= AUTO_COMPRESS_MIN_ROWS and d * COMPRESS_RATIO <= s


def _count(v: object) -> int:
    """A count from a fetched aggregate: a SUM over no rows is NULL (None, or NaN after a
    driver's float conversion)."""
    return 0 if v is None or (isinstance(v, float) and math.isnan(v)) else int(v)


def _fold(
    ctx: P.PlanContext, run: _Run, items: list[P.ProfileItem]
) -> tuple[dict[str, object], str]:
    """The compressed route's one scan of the source: group it by design-row keys (with the
    profile's partial aggregates), then profile the groups. Returns the profile row and the
    name of the temporary table of groups."""
    t0 = time.perf_counter()
    groups = f"indb_fold_{uuid.uuid4().hex[:12]}"
    stmts = ctx.dialect.materialize(groups, P.fold_query(ctx, items))
    run.temp_tables.append(groups)
    for stmt in stmts:
        run.engine.execute(stmt)
    row = run.one_row(P.folded_profile_query(ctx, items, ctx.dialect.table(groups)))
    bad = _count(row.pop(P.FOLD_BAD))
    row.pop(P.FOLD_NK_NULL)
    if bad:
        # a domain error to explain: one more, ungrouped scan counts it by check
        row.update(run.one_row(P.profile_query(ctx, P.detail_items(ctx, items))))
    run.fold_seconds = time.perf_counter() - t0
    return row, groups


def _folded_context(ctx: P.PlanContext, run: _Run, groups: str, n_kept: int) -> P.PlanContext:
    """The fit's context on the folded rows (:func:`plan.folded_rows_query`): summed
    weights, the weighted mean response and the constants that keep deviance and Pearson
    chi-squared exact; a log-link offset folded into response and weight. The
    log-likelihood still comes from the profile's sums over the original rows."""
    t0 = time.perf_counter()
    spec = ctx.spec
    name = f"indb_rows_{uuid.uuid4().hex[:12]}"
    stmts = ctx.dialect.materialize(name, P.folded_rows_query(ctx, ctx.dialect.table(groups)))
    run.temp_tables.append(name)
    for stmt in stmts:
        run.engine.execute(stmt)
    table = ctx.dialect.table(name)
    sums = run.one_row(
        S.select(
            [
                S.alias(S.count_star(), "n"),
                S.alias(S.sum_(S.mul(S.col(P.FOLD_F), S.col(P.FOLD_PW), S.col(P.FOLD_Y))), "sy"),
                S.alias(S.sum_(S.mul(S.col(P.FOLD_F), S.col(P.FOLD_PW))), "sw"),
            ],
            table,
        )
    )
    n_groups = int(sums["n"])
    sw = float(sums["sw"] or 0.0)
    run.fit_ybar = float(sums["sy"]) / sw if sw > 0 else None
    folded_offset = P.folds_offset(ctx)
    keys = P.key_columns(ctx)
    inputs = dataclasses.replace(
        ctx.inputs,
        response=P.FOLD_Y,
        response_kind="numeric",
        offset=None if folded_offset else ctx.inputs.offset,
        weight=S.col(P.FOLD_PW),
        frequency_weight=S.col(P.FOLD_F),
        trials=None,
        model_columns=(*keys, P.FOLD_Y, P.FOLD_PW, P.FOLD_F),
    )
    new_spec = dataclasses.replace(
        spec,
        source=Source("table", name),
        response=P.FOLD_Y,
        offset=None if folded_offset else spec.offset,
        weight=None,
        frequency_weight=None,
        trials=None,
    )
    run.original_ctx = ctx
    run.compressed = (n_kept, n_groups, run.fold_seconds + time.perf_counter() - t0)
    return P.PlanContext(new_spec, inputs, ctx.dialect, row_count=P.ROWCOUNT, folded=True)


def plan_spec(spec: ModelSpec, engine: Engine) -> list[tuple[str, str]]:
    """The SQL a fit would send, for a dry run: (purpose, SQL text) pairs.

    The pre-fit scans run (they only read); the first IRLS scan is returned, not run. Later
    scans differ only in the coefficient literals.
    """
    sent: list[tuple[str, str]] = []
    recorder = _RecordingEngine(engine, sent)
    run = _Run(engine=recorder, progress=None, log=[])
    ctx, design, summary, *_ = _prepare(spec, recorder, run)
    start = _start_from(spec, design, summary)
    tree = P.gram_query(ctx, design, start, ybar=summary.ybar)
    sent.append(("IRLS scan (one per iteration; coefficients change)", engine.dialect.render(tree)))
    return sent


class _RecordingEngine(Engine):
    """Passes calls to a real engine and records the SQL text with a purpose label."""

    def __init__(self, inner: Engine, sent: list[tuple[str, str]]) -> None:
        self.inner = inner
        self.dialect = inner.dialect
        self.sent = sent

    def execute(self, sql: str):
        self.sent.append(("pre-fit scan", sql))
        return self.inner.execute(sql)

    def fetch_columns(self, sql: str):
        self.sent.append(("pre-fit scan", sql))
        return self.inner.fetch_columns(sql)

    def describe(self, sql: str):
        self.sent.append(("describe source", sql))
        return self.inner.describe(sql)


def fit_spec(spec: ModelSpec, engine: Engine, progress: Progress = None) -> FitResult:
    """Fit ``spec`` on ``engine``; see :func:`indb.fit` for the user-facing description."""
    t_start = time.perf_counter()
    run = _Run(engine=engine, progress=progress, log=[])
    try:
        return _fit(spec, run, t_start)
    finally:
        run.drop_temp()


def _fit(spec: ModelSpec, run: _Run, t_start: float) -> FitResult:
    report_spec = spec
    ctx, design, summary, n_total, n_kept, by_col = _prepare(spec, run.engine, run)
    spec = ctx.spec
    report_summary = summary
    if run.fit_ybar is not None:  # folded rows: the response mean of the folded problem
        summary = dataclasses.replace(summary, ybar=run.fit_ybar)

    warn_msgs: list[str] = []
    if spec.estimate_theta:
        theta, beta0 = _estimate_theta(ctx, design, run, summary)
        spec = dataclasses.replace(spec, family=NegativeBinomial(theta=theta))
        report_spec = dataclasses.replace(report_spec, family=spec.family)
        ctx = dataclasses.replace(ctx, spec=spec)
        start = beta0
    else:
        start = _start_from(spec, design, summary)
    null_mu, refit_null = _null_deviance(ctx, design, run, summary.ybar)
    null_b0 = _null_start(ctx, summary) if refit_null else None
    if start is None:
        start, null_b0 = _sample_start(ctx, design, run, summary, n_kept, null_b0)
    run.phase = "fit"
    track = _NullTrack(null_b0, spec.tol) if null_b0 is not None else None
    state, null_dev = _irls(
        ctx,
        design,
        run,
        summary.ybar,
        start=start,
        null_mu=null_mu,
        null_track=track,
        off_mean=summary.off_mean,
    )
    if track is not None and null_dev is None:
        # the fitted model settled first: finish the intercept-only model on its own
        run.phase = "null"
        null_state, _ = _irls(
            ctx, _intercept_only(design), run, summary.ybar, start=np.array([track.b0])
        )
        null_dev = null_state.sums.deviance
    if state.stalled:
        # The deviance has settled but the Newton step still moves coefficients by many
        # standard errors: an estimate on its way to infinity (the MLE is on the boundary).
        # A boundary warning, not a plain non-convergence one; strict mode still refuses it.
        msg = (
            f"IRLS stopped after {sum(r.phase == 'fit' for r in run.log)} iterations: "
            "step-halving cannot lower the "
            f"deviance ({state.sums.deviance:.6g}) any further while the next step still "
            "moves coefficients by many standard errors; the fit sits on the boundary "
            "(fitted means at the edge of the family's range, e.g. Poisson means at 0, "
            "probabilities at 0 or 1), so some estimates drift to infinity and their "
            "standard errors are unreliable (merge levels or drop the predictor that "
            "separates the data)"
        )
        if spec.strict:
            raise NonConvergenceError(msg)
        warnings.warn(msg, SeparationWarning, stacklevel=2)
        warn_msgs.append(msg)
    elif not state.converged:
        msg = (
            f"IRLS did not converge in {spec.max_iter} iterations (last relative deviance "
            f"change {run.log[-1].relative_change:.3g}, tolerance {spec.tol:g})"
        )
        if spec.strict:
            raise NonConvergenceError(msg)
        warnings.warn(msg, ConvergenceWarning, stacklevel=2)
        warn_msgs.append(msg)
    return _result(
        ctx,
        design,
        run,
        state,
        report_summary,
        n_total,
        n_kept,
        by_col,
        float(null_dev) if null_dev is not None else math.nan,
        warn_msgs,
        t_start,
        report_spec,
    )


SAMPLE_START_ROWS = 100_000  # rows (about) the sample start fits on
SAMPLE_START_MIN_ROWS = 2_000_000  # sample_start="auto": only tables of this many kept rows
SAMPLE_TOL = 1e-3  # the sample's own convergence: its sampling error is far larger
SAMPLE_ROWS_PER_COEF = 20  # fewer sample rows per coefficient: no sample start
SAMPLE_MAX_SE = 1.0  # sample standard error (link scale) above which a start is set to 0


def _sample_start(
    ctx: P.PlanContext,
    design: Design,
    run: _Run,
    summary: _Summary,
    n_kept: int,
    null_b0: float | None,
) -> tuple[np.ndarray | None, float | None]:
    """Starting coefficients (and the null model's intercept) from IRLS on a sample.

    About ``SAMPLE_START_ROWS`` kept rows, picked by a hash of their model columns, are
    copied into a temporary table (one scan of the source) and fitted with the full table's
    design. Their estimates lie within a few standard errors of the full table's (sampling
    error shrinks like the square root of the sample's share), and Newton's method from
    there needs about three scans of the full table instead of five to eight from the
    family's standard start. Skipped (``None``, the standard start) when ``sample_start``
    or the route rule it out, on a table below ``SAMPLE_START_MIN_ROWS`` kept rows
    (``auto``), or when the sample fit fails; the estimates never depend on the start.
    """
    spec, d = ctx.spec, ctx.dialect
    if spec.sample_start == "never" or run.compressed is not None:
        return None, null_b0
    if not (d.can_materialize and d.can_sample):
        if spec.sample_start == "always":
            raise UnsupportedError(
                f"engine {d.name!r} cannot draw the sample start's rows; use "
                "sample_start='auto' or 'never'"
            )
        return None, null_b0
    if spec.sample_start == "auto" and n_kept < SAMPLE_START_MIN_ROWS:
        return None, null_b0
    t0 = time.perf_counter()
    log_size = len(run.log)
    name = f"indb_sample_{uuid.uuid4().hex[:12]}"
    fraction = min(1.0, SAMPLE_START_ROWS / max(n_kept, 1))
    sample_spec = dataclasses.replace(
        spec, source=Source("table", name), tol=max(spec.tol, SAMPLE_TOL), strict=False
    )
    sample_ctx = dataclasses.replace(ctx, spec=sample_spec)
    track = _NullTrack(null_b0, sample_spec.tol) if null_b0 is not None else None
    run.temp_tables.append(name)
    run.phase = "sample"
    try:
        for stmt in d.materialize(name, P.sample_rows_query(ctx, fraction)):
            run.engine.execute(stmt)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the sample's own warnings say nothing of the fit
            state, _ = _irls(
                sample_ctx, design, run, summary.ybar, null_track=track, off_mean=summary.off_mean
            )
    except (SpecError, EngineError) as err:
        # the full table decides what is wrong with the model; start it the standard way
        run.sample = f"sample start skipped ({type(err).__name__}); standard start"
        return None, null_b0
    finally:
        run.phase = "fit"
        with contextlib.suppress(Exception):
            run.engine.execute(d.drop_materialized(name))
            run.temp_tables.remove(name)
    sol = state.solution
    if state.sums.n < SAMPLE_ROWS_PER_COEF * design.p:
        run.sample = (
            f"sample start skipped ({state.sums.n:,} sample rows for {design.p} "
            "coefficients); standard start"
        )
        return None, null_b0
    if not state.converged or not np.all(np.isfinite(sol.beta)):
        run.sample = "sample start skipped (the sample fit did not converge); standard start"
        return None, null_b0
    # A coefficient the sample hardly determines (a level with few sample rows, or one
    # drifting to the boundary there: standard error above 1 on the link scale, per unit of
    # a 0/1 column or per standard deviation of a value) starts at 0, like an aliased one:
    # a boundary estimate such as -30 for an empty cell would start the full table far off.
    phi = 1.0
    if not ctx.spec.family.dispersion_fixed:
        phi = state.sums.pearson / max(state.sums.n_weighted - int((~sol.aliased).sum()), 1.0)
    se = np.sqrt(np.clip(np.diag(sol.inv_info) * phi, 0.0, None))
    beta = np.where(se < SAMPLE_MAX_SE, sol.beta, 0.0)
    scans = sum(1 + r.step_halvings for r in run.log[log_size:])
    run.sample = (state.sums.n, scans, time.perf_counter() - t0)
    return beta, (track.b0 if track is not None else None)


def _start_from(spec: ModelSpec, design: Design, summary: _Summary) -> np.ndarray | None:
    """Warm-start coefficients given on the original scale (by term name), standardized."""
    if not spec.start:
        return None
    # Terms the design no longer has (a level that vanished, a dropped column) are ignored:
    # start values only steer the first step, never the answer.
    given = dict(spec.start)
    orig = np.array([given.get(t, 0.0) for t in design.terms])
    t = solver.back_transform(design)
    return np.linalg.solve(t, orig)


def _result(
    ctx,
    design,
    run,
    state,
    summary,
    n_total,
    n_kept,
    by_col,
    null_dev,
    warn_msgs,
    t_start,
    report_spec,
) -> FitResult:
    spec = report_spec
    fam = spec.family
    sol = state.solution
    sums = state.sums
    rank = int((~sol.aliased).sum())
    df_resid = summary.n_df - rank
    if fam.dispersion_fixed:
        dispersion = 1.0
    else:
        dispersion = sums.pearson / df_resid if df_resid > 0 else math.nan
    t = solver.back_transform(design)
    beta_std = np.where(sol.aliased, 0.0, state.beta)
    est = t @ beta_std
    cov = dispersion * (t @ sol.inv_info @ t.T)
    inf = solver.wald(
        est, cov, sol.aliased, None if fam.dispersion_fixed else df_resid, spec.confidence
    )
    coefs = tuple(
        Coefficient(
            term=c.term,
            columns=tuple(c.source_columns),
            levels=tuple(_levels_for(design, c)),
            estimate=float(inf.estimate[j]),
            std_error=float(inf.std_error[j]),
            statistic=float(inf.statistic[j]),
            p_value=float(inf.p_value[j]),
            ci_low=float(inf.ci_low[j]),
            ci_high=float(inf.ci_high[j]),
            aliased=bool(sol.aliased[j]),
        )
        for j, c in enumerate(design.columns)
    )
    aliased_terms = tuple(c.term for c, a in zip(design.columns, sol.aliased, strict=True) if a)
    if aliased_terms:
        msg = (
            f"{len(aliased_terms)} design column(s) are linear combinations of earlier ones "
            f"and were set aside: {list(aliased_terms)[:10]}"
        )
        warnings.warn(msg, AliasingWarning, stacklevel=3)
        warn_msgs.append(msg)
    if fam.unit_mean:
        # counted by the last IRLS scan, at state.beta (plan.edge_counts)
        exact, near = int(round(sums.extras["edge"])), int(round(sums.extras["near"]))
        # standard errors on the standardized design: ordinary fits have them well below 1
        # per unit; a coefficient drifting to infinity under separation has them in the
        # hundreds or thousands (common practice: flag huge standard errors, not estimates)
        std_se = np.sqrt(np.clip(np.diag(sol.inv_info), 0.0, None))
        drifting = near > 0 and float(std_se.max(initial=0.0)) > SEPARATION_STD_SE
        if exact or drifting or (near and not state.converged):
            count = exact or near
            limit = EDGE if exact else NEAR_EDGE
            msg = (
                f"separation: {count} rows have fitted probabilities within {limit:.0e} of 0 "
                "or 1"
                + (" and some standard errors are huge" if drifting else "")
                + "; the data are (quasi-)separated or the fit sits on the boundary, so those "
                "estimates drift to infinity and their standard errors are unreliable (merge "
                "levels or drop the separating predictor)"
            )
            warnings.warn(msg, SeparationWarning, stacklevel=3)
            warn_msgs.append(msg)
    ll = _log_likelihood(ctx, design, run, state.beta, sums, summary, dispersion)
    # parameters counted by AIC/BIC: the coefficients, plus an estimated dispersion or theta
    k = rank + (0 if fam.dispersion_fixed else 1) + (1 if spec.estimate_theta else 0)
    aic = -2.0 * ll + 2.0 * k
    bic = -2.0 * ll + math.log(summary.n_df) * k if summary.n_df > 0 else math.nan
    return FitResult(
        family=fam.name,
        link=spec.link.describe(),
        response=spec.response,
        source=spec.source.label(),
        coefficients=coefs,
        covariance=inf.covariance,
        deviance=sums.deviance,
        null_deviance=null_dev,
        pearson_chi2=sums.pearson,
        dispersion=dispersion,
        dispersion_estimated=not fam.dispersion_fixed,
        log_likelihood=ll,
        aic=aic,
        bic=bic,
        df_model=rank - (1 if design.intercept else 0),
        df_resid=df_resid,
        n_used=n_kept,
        n_excluded=n_total - n_kept,
        n_weighted=summary.sum_f,
        iterations=sum(1 for r in run.log if r.phase == "fit"),
        converged=state.converged,
        iteration_log=tuple(run.log),
        test="z" if fam.dispersion_fixed else "t",
        path=_path_label(run, design, sums),
        seconds=time.perf_counter() - t_start,
        family_params=fam.params(),
        excluded_by_column=by_col,
        aliased_terms=aliased_terms,
        condition_number=solver.condition_number(sums.xtwx, sol.aliased),
        warnings=tuple(warn_msgs),
        confidence=spec.confidence,
        # the dialect and column types the user's expressions (offset, weights) were
        # written against: scoring SQL for another engine reads them in that dialect
        # (indb.portable)
        spec={**spec.to_dict(), "sql_dialect": ctx.dialect.name},
        design={
            **design.to_dict(),
            "column_types": _column_types((run.original_ctx or ctx).inputs),
        },
        fingerprint={
            "rows": n_total,
            "rows_used": n_kept,
            "sum_weights": summary.sum_fpw,
            "sum_weighted_response": summary.sum_fpwy,
            "column_sums": summary.column_sums,
            "level_counts": {
                f.column: dict(zip(f.levels, f.counts, strict=True)) for f in design.factors
            },
        },
    )


def _column_types(inputs: Inputs) -> dict[str, str]:
    """Type names of the source columns the model reads (its predictors and the columns of
    its expressions), as the engine describes them."""
    used = set(inputs.model_columns)
    return {name: kind for name, kind in inputs.columns if name in used}


def _levels_for(design: Design, c: DesignColumn) -> list[str | None]:
    by_col = {design.factors[i].column: lv for i, lv in zip(c.factors, c.levels, strict=True)}
    return [by_col.get(col) for col in c.source_columns]


def _path_label(run: _Run, design: Design, sums: solver.Sums) -> str:
    scan = f"grouped scan ({sums.cells} cells)" if design.factors else "single-group scan"
    if isinstance(run.sample, tuple):
        rows, scans, secs = run.sample
        scan += f", started from a {rows:,}-row sample fit ({scans} scans, {secs:.2f} s)"
    elif isinstance(run.sample, str):
        scan += f", {run.sample}"
    if run.compressed is None:
        return scan
    rows, groups, secs = run.compressed
    return (
        f"compressed: {rows:,} rows folded to {groups:,} distinct design rows "
        f"({rows / max(groups, 1):.0f}x, {secs:.2f} s), then {scan}"
    )


def _log_likelihood(ctx, design, run, beta, sums, summary, dispersion) -> float:
    fam = ctx.spec.family
    phi = dispersion
    if fam.name == "gaussian":
        phi = sums.deviance / summary.n_df  # maximum-likelihood dispersion
    if not (math.isfinite(phi) and phi > 0):
        return math.nan
    if summary.ll_sums or not fam.saturated_sql(S.col("y"), S.col("pw"), None):
        # loglik = saturated loglik - D / (2 phi): from the profile sums, no extra scan
        ll = fam.log_likelihood(
            sums.deviance, phi, summary.ll_sums, summary.n_df, summary.constant_weight
        )
        if ll is not None:
            return float(ll)
    if run.original_ctx is not None:
        # folded rows carry no per-row terms such as ln Gamma(y + 1): sum over the source
        ctx = dataclasses.replace(
            run.original_ctx,
            spec=dataclasses.replace(run.original_ctx.spec, family=ctx.spec.family),
        )
    tree = P.loglik_query(ctx, design, beta, phi)
    if tree is None:
        return math.nan
    return float(run.one_row(tree)["ll"])
