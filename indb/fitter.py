"""The fitting procedure: pre-fit scans, the IRLS loop, theta estimation, final statistics.

This module wires the layers: it asks :mod:`indb.plan` for syntax trees, has the engine's
dialect render them, runs them through the engine adapter and hands the small results to
:mod:`indb.solver`. Each IRLS iteration is exactly one aggregate query.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import sys
import time
import uuid
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from indb import logsums, solver
from indb import plan as P
from indb import sqlexpr as S
from indb.design import (
    INTERCEPT,
    Design,
    DesignColumn,
    Factor,
    Inputs,
    Scaling,
    Value,
    build_design,
    factor_sets,
    plan_values,
    resolve_inputs,
)
from indb.engines.base_engine import Engine, qualify_source
from indb.errors import (
    AliasingWarning,
    ConvergenceWarning,
    EngineError,
    NonConvergenceError,
    NondeterministicSourceError,
    PrecisionWarning,
    ResidualDfWarning,
    SeparationWarning,
    SpecError,
    UnsupportedError,
)
from indb.families import NegativeBinomial, Poisson
from indb.links import IdentityLink, PowerLink
from indb.results import COVARIANCE_MAX_TERMS, Coefficient, FitResult, IterationRecord
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
    #: the internal rescaling of response and weights (the scans' numbers -> the source's)
    scaling: Scaling = dataclasses.field(default_factory=Scaling)
    #: warnings found before the fit (digits lost to magnitudes), given with the result
    notes: list[str] = dataclasses.field(default_factory=list)
    #: (rows, frequency-weighted rows) every IRLS scan of the fit's table must count
    expected: tuple[int, float] | None = None

    def drop_temp(self) -> None:
        for name in self.temp_tables:
            with contextlib.suppress(Exception):
                self.engine.execute(self.engine.dialect.drop_materialized(name))
        self.temp_tables.clear()

    def record(self, dev: float, change: float, halvings: int, seconds: float) -> None:
        rec = IterationRecord(
            iteration=len(self.log) + 1,
            deviance=self.scaling.unscale(dev),
            relative_change=change,
            step_halvings=halvings,
            seconds=seconds,
            phase=self.phase,
        )
        self.log.append(rec)
        if self.progress is not None:
            self.progress(rec)

    def check_rows(self, sums: solver.Sums) -> None:
        """Raise when a scan of the fit's table counts other rows than the profile did:
        the source returns different rows each time it is read."""
        if self.expected is None or self.phase == "sample":
            return
        rows, weighted = self.expected
        if sums.n == rows and abs(sums.n_weighted - weighted) <= 1e-9 * abs(weighted):
            return
        what = "rows" if sums.n != rows else "frequency-weighted rows"
        seen, before = (sums.n, rows) if sums.n != rows else (sums.n_weighted, weighted)
        raise NondeterministicSourceError(
            f"the source is not deterministic: IRLS scan {len(self.log) + 1} counted "
            f"{seen:,.6g} {what} where the profile scan counted {before:,.6g}. indb reads "
            "the source once per iteration, so it must return the same rows every time; "
            "a sample (USING SAMPLE, TABLESAMPLE), random(), a LIMIT without ORDER BY or a "
            "table written to during the fit breaks that. Store the rows first (CREATE "
            "TABLE ... AS SELECT ...) or make the sample repeatable (REPEATABLE (seed))"
        )


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
    ctx: P.PlanContext,
    row: dict,
    values: tuple[Value, ...],
    shifts: dict[str, tuple[float, float]],
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
        c, mean, sd, rms = _moments(row, v.alias, shifts)
        q = float(row[f"{v.alias}_ms"])
        if not (math.isfinite(q) and math.isfinite(sd) and math.isfinite(rms)):
            raise SpecError(
                f"predictor {v.label!r} spans more than the range of doubles (its squares "
                f"overflow although scaled by its spread in the first {P.HEAD_ROWS} rows); "
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
    column_sums = {v.label: _moments(row, v.alias, shifts)[1] * n for v in values[1:]}
    pw_min, pw_max = row["pw_min"], row["pw_max"]
    sc = ctx.scaling
    # the response sum on the source's scale (the data fingerprint), from the rescaled one
    sum_fpwy = float(row["sum_fpwy"]) / sc.factor + sc.shift * sum_fpw
    return _Summary(
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


#: significant digits (of 16) a column's magnitude may cost before a PrecisionWarning
PRECISION_DIGITS = 8.0


def _precision_notes(
    ctx: P.PlanContext, row: dict, shifts: dict[str, tuple[float, float]], summary: _Summary
) -> list[str]:
    """Warnings for digits lost to a large level against a small spread where the fit
    cannot centre it away: a response the family or link cannot shift (the residual
    y - mu of two near-equal numbers keeps about 16 - log10(level / spread) digits), and a
    predictor left uncentred because it multiplies a categorical column or the model has
    no intercept (its design column is then nearly proportional to the intercept or to a
    level's indicator: X'WX loses about 2 log10(level / spread) digits)."""
    notes: list[str] = []
    spec = ctx.spec
    _, mean, sd, _ = _moments(row, P.RESPONSE_KEY, shifts)
    lost = _digits(mean, sd)
    if not _centres_response(spec) and lost > PRECISION_DIGITS:
        gaussian_identity = spec.family.name == "gaussian" and isinstance(spec.link, IdentityLink)
        if gaussian_identity and not spec.intercept:
            why = "the model has no intercept to take a shift of it"
            fix = "fit an intercept, or subtract a constant from it in the source query"
        else:
            why = (
                f"family {spec.family.name!r} with link {spec.link.describe()!r} cannot be "
                "fitted to a shifted response"
            )
            fix = (
                "model its variation about a constant instead (gaussian with the identity "
                "link and an intercept is centred internally)"
            )
        notes.append(
            f"response column {ctx.inputs.response!r} varies by only {sd:.3g} around "
            f"{mean:.10g} and {why}, so about {lost:.0f} of 16 significant digits are lost in "
            f"its deviance, dispersion and standard errors; {fix}"
        )
    if not (spec.intercept or ctx.inputs.factors):
        return notes
    for v in summary.values[1:]:
        if v.centered:
            continue
        _, mean, sd, _ = _moments(row, v.alias, shifts)
        lost = 2.0 * _digits(mean, sd)
        if lost > PRECISION_DIGITS:
            notes.append(
                f"predictor {v.label!r} varies by only {sd:.3g} around {mean:.10g} and is "
                "not centred (it multiplies a categorical column, or the model has no "
                "intercept), so its design column is nearly proportional to the intercept "
                f"or to a level's indicator and about {lost:.0f} of 16 significant digits "
                "of its coefficients are lost; subtract a round number near its mean from "
                "it in the source query"
            )
    return notes


def _digits(mean: float, sd: float) -> float:
    """log10(|mean| / sd): the decimal digits a difference of two values near the mean
    loses (0 when the spread is as large as the level)."""
    if not (sd > 0 and math.isfinite(sd) and math.isfinite(mean)) or abs(mean) <= sd:
        return 0.0
    return math.log10(abs(mean) / sd)


def _moments(
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
            run.check_rows(got.sums)
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
        run.check_rows(out)
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
                _check_repeatable(run, scan, beta_prev, dev_old)
                raise SpecError(_halving_failure(spec, sums, run.scaling))
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


def _check_repeatable(
    run: _Run, scan: Callable[[np.ndarray], solver.Sums], beta: np.ndarray, deviance: float
) -> None:
    """Before blaming the model for a failed step-halving: scan the last accepted
    coefficients again. A deviance other than the one they gave (beyond the rounding of a
    parallel sum) means the source's values change between reads, with the same rows."""
    if not math.isfinite(deviance) or run.phase == "sample":
        return
    again = scan(beta).deviance
    if abs(again - deviance) <= 1e-9 * abs(deviance) + 1e-300:
        return
    raise NondeterministicSourceError(
        "the source is not deterministic: the same coefficients gave the deviance "
        f"{run.scaling.unscale(deviance):.10g} in one IRLS scan and "
        f"{run.scaling.unscale(again):.10g} in the next, so its values change between "
        "reads (random(), a sample such as USING SAMPLE or TABLESAMPLE, or a table written "
        "to during the fit). indb reads the source once per iteration; store the rows first "
        "(CREATE TABLE ... AS SELECT ...) or make the sample repeatable (REPEATABLE (seed))"
    )


def _halving_failure(spec: ModelSpec, sums: solver.Sums, scaling: Scaling) -> str:
    msg = (
        f"IRLS step-halving failed after {MAX_HALVINGS} halvings (deviance "
        f"{scaling.unscale(sums.deviance):g}, {sums.bad} rows with invalid means); the model "
        "may be unsuitable for the data (check the link and family)"
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
    head = run.one_row(P.head_query(ctx, values, knots))
    shifts = _shifts(head, values)
    ctx = dataclasses.replace(ctx, scaling=_response_scaling(spec, head))
    items = P.profile_items(ctx, values, knots, shifts)
    folded = _fold(ctx, run, items) if _should_fold(ctx, run) else None
    row = folded[0] if folded else _profile(ctx, run, items)
    n_total, n_kept, by_col = _check_nulls(ctx, row)
    summary = _summarize(ctx, row, values, shifts)
    run.scaling = _weight_scaling(ctx, summary)
    run.notes += _precision_notes(ctx, row, shifts, summary)
    ctx = dataclasses.replace(ctx, scaling=run.scaling)
    if folded:
        ctx = _folded_context(ctx, run, folded[1], n_kept)
    factors, combos = _factors(ctx, run)
    design = build_design(
        inputs, spec.intercept, summary.values, factors, combos, tuple(knots.items())
    )
    if design.p == 0:
        raise SpecError("the model has no coefficients to estimate")
    solver.check_size(design)
    return ctx, design, summary, n_total, n_kept, by_col


def _shifts(head: dict[str, object], values: tuple[Value, ...]) -> dict[str, tuple[float, float]]:
    """Per value (and the response, key ``y``) the point c and the power of two g the
    profile takes moments of (v - c) g about (:func:`plan.profile_items`): c the lowest
    value among the first kept rows (0 where there is none, or it is not finite), g about
    one over their range when that lies outside ``MAGNITUDE_BAND`` (else 1: the SQL of
    ordinary data stays as it was)."""
    out: dict[str, tuple[float, float]] = {}
    for alias in [*(v.alias for v in values[1:]), P.RESPONSE_KEY]:
        lo, hi = _finite_or_none(head.get(f"{alias}_lo")), _finite_or_none(head.get(f"{alias}_hi"))
        c = lo if lo is not None else 0.0
        width = (hi - c) if hi is not None else 0.0
        out[alias] = (c, 1.0 / _power_of_two(width))
    return out


#: magnitudes (powers of two) inside which nothing is rescaled: 2^-16 .. 2^16
MAGNITUDE_BAND = 16


def _power_of_two(magnitude: float) -> float:
    """The power of two nearest ``magnitude`` when it lies outside 2^+-MAGNITUDE_BAND, else 1
    (also for 0 and non-finite magnitudes: nothing to go by)."""
    if not (math.isfinite(magnitude) and magnitude > 0):
        return 1.0
    e = round(math.log2(magnitude))
    return math.ldexp(1.0, e) if abs(e) > MAGNITUDE_BAND else 1.0


def _finite_or_none(v: object) -> float | None:
    if v is None:
        return None
    x = float(v)
    return x if math.isfinite(x) else None


def _response_scaling(spec: ModelSpec, head: dict[str, object]) -> Scaling:
    """How to rescale the response (from its range among the first kept rows).

    Gaussian with the identity link and an intercept: centred on a value of a kept row,
    y - c (the intercept takes c back), so residuals, deviance and X'Wz keep their digits
    however far the response lies from 0; then, like every power-variance family
    (V(mu) = mu^p) with a log link and an intercept or a power link, divided by the power
    of two nearest its size when that lies outside 2^+-MAGNITUDE_BAND, so that squares,
    mu^p and the deviance neither overflow nor underflow and the convergence test sees
    the deviance at its usual size. Binomial and negative binomial responses are not
    rescaled: their variance functions are not powers of the mean.
    """
    fam, link = spec.family, spec.link
    p = fam.variance_power
    if p is None:
        return Scaling()
    if link.name == "log":
        exponent = None
    elif isinstance(link, IdentityLink):
        exponent = 1.0
    elif isinstance(link, PowerLink):
        exponent = link.exponent
    else:
        return Scaling()
    lo = _finite_or_none(head.get(f"{P.RESPONSE_KEY}_lo"))
    hi = _finite_or_none(head.get(f"{P.RESPONSE_KEY}_hi"))
    if lo is None or hi is None:
        return Scaling()  # no finite response among the first rows: the profile explains
    shift = lo if _centres_response(spec) else 0.0
    size = hi - lo if shift != 0.0 else max(abs(lo), abs(hi))
    factor = 1.0 / _power_of_two(size if math.isfinite(size) else max(abs(lo), abs(hi)))
    if factor == 1.0 or (exponent is None and not spec.intercept):
        # a log link moves ln(factor) into the intercept: without one, leave y alone
        return Scaling(shift=shift, variance_power=p)
    return Scaling(
        shift=shift,
        factor=factor,
        coef_factor=1.0 if exponent is None else factor**exponent,
        log_shift=math.log(factor) if exponent is None else 0.0,
        variance_power=p,
    )


def _centres_response(spec: ModelSpec) -> bool:
    """Whether the fit runs on y - c: a gaussian-variance family with the identity link and
    an intercept to take c back (not a positive-mean one such as tweedie with power 0,
    whose response must stay > 0)."""
    fam = spec.family
    return (
        fam.variance_power == 0.0
        and isinstance(spec.link, IdentityLink)
        and spec.intercept
        and not fam.positive_mean
    )


def _weight_scaling(ctx: P.PlanContext, summary: _Summary) -> Scaling:
    """The response scaling plus the weights' powers of two: frequency weights divided by
    the one nearest their mean, prior weights by the one nearest their frequency-weighted
    mean (each only outside 2^+-MAGNITUDE_BAND). Every IRLS sum is then about as large
    as with unit weights, so the convergence test (a relative deviance change with an
    absolute floor, and a step measured in standard errors) stops where it would with
    unit weights: constant weights of 1e-12 or 1e50 give the unit-weight estimates."""
    inputs = ctx.inputs
    ff = 1.0
    if inputs.frequency_weight is not None:
        ff = 1.0 / _power_of_two(summary.sum_f / max(summary.n, 1))
    wf = 1.0
    if (inputs.weight is not None or inputs.trials is not None) and summary.sum_f > 0:
        wf = 1.0 / _power_of_two(summary.sum_fpw / summary.sum_f)
    return dataclasses.replace(ctx.scaling, weight_factor=wf, freq_factor=ff)


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
    return P.PlanContext(
        new_spec,
        inputs,
        ctx.dialect,
        row_count=P.ROWCOUNT,
        folded=True,
        scaling=ctx.scaling.for_folded_rows(),
    )


def plan_spec(spec: ModelSpec, engine: Engine) -> list[tuple[str, str]]:
    """The SQL a fit would send, for a dry run: (purpose, SQL text) pairs.

    The pre-fit scans run (they only read); the first IRLS scan is returned, not run. Later
    scans differ only in the coefficient literals.
    """
    spec = dataclasses.replace(spec, source=qualify_source(engine, spec.source))
    sent: list[tuple[str, str]] = []
    recorder = _RecordingEngine(engine, sent)
    run = _Run(engine=recorder, progress=None, log=[])
    ctx, design, summary, *_ = _prepare(spec, recorder, run)
    start = _start_from(spec, design, run.scaling)
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
    # the name as the engine resolves it now: the stored spec and the scoring view then
    # read this table whatever schema or session reads them later
    spec = dataclasses.replace(spec, source=qualify_source(engine, spec.source))
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
    for msg in run.notes:
        warnings.warn(msg, PrecisionWarning, stacklevel=2)
        warn_msgs.append(msg)
    # every scan of the fit's table must see the rows the profile saw
    rows = run.compressed[1] if run.compressed is not None else n_kept
    run.expected = (rows, summary.sum_f * run.scaling.freq_factor)
    if spec.estimate_theta:
        theta, beta0 = _estimate_theta(ctx, design, run, summary)
        spec = dataclasses.replace(spec, family=NegativeBinomial(theta=theta))
        report_spec = dataclasses.replace(report_spec, family=spec.family)
        ctx = dataclasses.replace(ctx, spec=spec)
        start = beta0
    else:
        start = _start_from(spec, design, run.scaling)
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
            f"deviance ({run.scaling.unscale(state.sums.deviance):.6g}) any further while the "
            "next step still "
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
    se = np.sqrt(np.clip(sol.inv_info.diagonal() * phi, 0.0, None))
    beta = np.where(se < SAMPLE_MAX_SE, sol.beta, 0.0)
    scans = sum(1 + r.step_halvings for r in run.log[log_size:])
    run.sample = (state.sums.n, scans, time.perf_counter() - t0)
    return beta, (track.b0 if track is not None else None)


def _start_from(spec: ModelSpec, design: Design, scaling: Scaling) -> np.ndarray | None:
    """Warm-start coefficients given on the original scale (by term name), standardized
    and rescaled as the fit's response (:class:`indb.design.Scaling`)."""
    if not spec.start:
        return None
    # Terms the design no longer has (a level that vanished, a dropped column) are ignored:
    # start values only steer the first step, never the answer.
    given = dict(spec.start)
    orig = np.array([given.get(t, 0.0) for t in design.terms])
    return scaling.to_fit(solver.standardize(design, orig), design.intercept)


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
    sums = state.sums  # on the scale of the internally rescaled fit (run.scaling)
    sc = run.scaling
    rank = int((~sol.aliased).sum())
    df_resid = summary.n_df - rank
    if df_resid <= 0:
        msg = _residual_df_message(ctx, summary, rank, df_resid)
        warnings.warn(msg, ResidualDfWarning, stacklevel=3)
        warn_msgs.append(msg)
    # the dispersion of the rescaled fit (a fixed dispersion 1 becomes the rescaling's
    # power of two there), and the covariance of its coefficients, coef_factor times the
    # source's: both stay finite where the source's overflow (a response near 1e200)
    if fam.dispersion_fixed:
        phi_fit = sc.rescale(1.0)
    else:
        phi_fit = sums.pearson / df_resid if df_resid > 0 else math.nan
    dispersion = 1.0 if fam.dispersion_fixed else sc.unscale(phi_fit)
    beta_std = sc.to_original(np.where(sol.aliased, 0.0, state.beta), design.intercept)
    inf = _inference(
        design,
        sol,
        beta_std,
        sc.coef_factor,
        phi_fit,
        None if fam.dispersion_fixed else df_resid,
        spec.confidence,
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
        ff = sc.freq_factor
        exact = int(round(sums.extras["edge"] / ff))
        near = int(round(sums.extras["near"] / ff))
        # standard errors on the standardized design: ordinary fits have them well below 1
        # per unit; a coefficient drifting to infinity under separation has them in the
        # hundreds or thousands (common practice: flag huge standard errors, not estimates)
        std_se = np.sqrt(np.clip(sol.inv_info.diagonal() * phi_fit, 0.0, None))
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
    deviance = sc.unscale(sums.deviance)
    # beyond the doubles, or below the normal ones (a subnormal keeps few digits)
    lost = not math.isfinite(deviance) or (deviance < sys.float_info.min < sums.deviance)
    if math.isfinite(sums.deviance) and lost:
        big = not math.isfinite(deviance)
        msg = (
            f"response column {spec.response!r} is so {'large' if big else 'small'} that "
            f"the deviance ({sums.deviance:.6g} x 2^{-sc.log2_deviance_factor:g}), Pearson's "
            f"chi-squared and the dispersion {'exceed' if big else 'fall below'} the range "
            f"of doubles and are reported as {'infinite' if big else '0'}; the fit ran on "
            "the response divided by a power of two, so estimates, standard errors, tests "
            "and the log-likelihood are exact (rescale the response by a round number in "
            "the source query to see the deviance)"
        )
        warnings.warn(msg, PrecisionWarning, stacklevel=3)
        warn_msgs.append(msg)
    ll = _log_likelihood(ctx, design, run, beta_std, sums.deviance, summary, phi_fit)
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
        deviance=deviance,
        null_deviance=sc.unscale(null_dev),
        pearson_chi2=sc.unscale(sums.pearson),
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
        condition_number=solver.condition_number(sums.xtwx, sol),
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


def _inference(
    design: Design,
    sol: solver.Solution,
    beta_std: np.ndarray,
    coef_factor: float,
    phi_fit: float,
    df: float | None,
    confidence: float,
) -> solver.Inference:
    """Wald inference on the source's scale, computed in units where nothing overflows.

    The covariance of the rescaled fit's standardized coefficients is ``phi_fit`` times
    its inverse information; mapping it to the source's coefficients multiplies row and
    column j by u_j / ``coef_factor``, where u_j = 1 / scale_j can be 1e-160 for a value
    near 1e160 (its variance, ~1e-325, underflows where its standard error does not). So
    the statistics are taken on coefficients divided by u_j' (the power of two nearest
    u_j / ``coef_factor``), exactly, and estimates, standard errors and limits multiplied
    back; only the covariance matrix itself over- or underflows where it must."""
    t = solver.back_transform(design)
    est = t @ beta_std
    units = np.array([_nearest_power_of_two(abs(d) / coef_factor) for d in t.diagonal()])
    # t_u maps the rescaled fit's coefficients to est / units: t / coef_factor, row-scaled
    t_u = sparse.csr_array(sparse.diags_array(1.0 / (units * coef_factor)) @ t)
    # the whole covariance only while it is small; standard errors need its diagonal only
    var_u, cov_u = solver.original_scale(
        sol.inv_info, t_u, phi_fit, full=design.p <= COVARIANCE_MAX_TERMS
    )
    inf = solver.wald(est / units, var_u, sol.aliased, df, confidence, cov_u)
    if np.all(units == 1.0):
        return inf
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        return dataclasses.replace(
            inf,
            estimate=np.where(sol.aliased, np.nan, est),
            std_error=inf.std_error * units,
            ci_low=inf.ci_low * units,
            ci_high=inf.ci_high * units,
            covariance=None
            if inf.covariance is None
            else inf.covariance * units[:, None] * units[None, :],
        )


def _nearest_power_of_two(x: float) -> float:
    if not (math.isfinite(x) and x > 0):
        return 1.0
    return math.ldexp(1.0, round(math.log2(x)))


def _residual_df_message(ctx: P.PlanContext, summary: _Summary, rank: int, df: float) -> str:
    fam = ctx.spec.family
    msg = (
        f"the residual degrees of freedom are {df:g}: {summary.n_df:g} rows with a positive "
        f"weight minus {rank} estimated coefficients"
    )
    if ctx.inputs.frequency_weight is not None:
        msg += (
            f" (frequency weights count rows: theirs sum to {summary.sum_f:g} over "
            f"{summary.n} rows; weights that are not counts belong in weight=, CLI --weight, "
            "as prior weights)"
        )
    if fam.dispersion_fixed:
        return msg + "; nothing is left to judge the fit by (deviance-based tests are void)"
    return (
        msg + "; the dispersion cannot be estimated, so standard errors, t statistics, "
        "p-values and intervals are NaN"
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


#: families whose log-likelihood depends on the dispersion only through D / phi and
#: n ln(phi): rescaling D and phi by one factor d moves it by -n ln(d) / 2 exactly
_LOG_PHI_FAMILIES = ("gaussian", "inverse_gaussian")


def _log_likelihood(ctx, design, run, beta, deviance_fit, summary, phi_fit) -> float:
    """The log-likelihood at the fitted means, on the source's scale.

    ``beta`` are the standardized coefficients of the source's problem; ``deviance_fit``
    and ``phi_fit`` the deviance and dispersion of the internally rescaled fit
    (:class:`indb.design.Scaling`). Where the source's deviance exceeds the largest double
    (a gaussian response near 1e200) the families of ``_LOG_PHI_FAMILIES`` still give it
    exactly from the rescaled numbers."""
    fam = ctx.spec.family
    sc = run.scaling
    dev = sc.unscale(deviance_fit)
    phi = 1.0 if fam.dispersion_fixed else sc.unscale(phi_fit)
    if fam.name == "gaussian":
        phi = dev / summary.n_df  # maximum-likelihood dispersion
        phi_fit = deviance_fit / summary.n_df
    if not (math.isfinite(phi) and phi > 0 and math.isfinite(dev)):
        rescaled = math.isfinite(phi_fit) and phi_fit > 0 and math.isfinite(deviance_fit)
        if fam.name in _LOG_PHI_FAMILIES and summary.ll_sums and rescaled:
            ll = fam.log_likelihood(
                deviance_fit, phi_fit, summary.ll_sums, summary.n_df, summary.constant_weight
            )
            if ll is not None:
                return float(ll) + 0.5 * summary.n_df * sc.log2_deviance_factor * math.log(2.0)
        return math.nan
    if summary.ll_sums or not fam.saturated_sql(S.col("y"), S.col("pw"), None):
        # loglik = saturated loglik - D / (2 phi): from the profile sums, no extra scan
        ll = fam.log_likelihood(dev, phi, summary.ll_sums, summary.n_df, summary.constant_weight)
        if ll is not None:
            return float(ll)
    # a pass over the rows as the source has them (no internal rescaling)
    source_ctx = run.original_ctx if run.original_ctx is not None else ctx
    ctx = dataclasses.replace(
        source_ctx,
        spec=dataclasses.replace(source_ctx.spec, family=ctx.spec.family),
        scaling=Scaling(),
    )
    tree = P.loglik_query(ctx, design, beta, phi)
    if tree is None:
        return math.nan
    return float(run.one_row(tree)["ll"])
