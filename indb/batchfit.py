"""Fitting several models on the fit's rows and design in shared scans, and the drop-one
likelihood-ratio tests built on it.

:func:`fit_batch` runs IRLS for a set of models at once: each iteration is one
:func:`indb.plan.batch_scan.batch_query`, a single read of the table whose sums are grouped
by model id; the rows of each model are assembled and solved on their own, over the columns
that model estimates (the others stay at 0). Each model follows the rules of
:class:`indb.irls.IrlsSolver`: the step is halved while a mean is invalid or the deviance
rises, and a rise too small to see after :data:`~indb.irls.STALL_HALVINGS` halvings keeps
the last accepted step. A model has converged when the scan's quadratic model puts its
deviance within ``tol`` (relative) of the minimum (the next step's Newton decrement), or by
IrlsSolver's rule (deviance change below ``tol``, next step below sqrt(tol) standard
errors); it then leaves the batch, so later scans carry only the models still moving.

:func:`drop_one` fits, for each model term, the model without it, warm-started from the full
fit's coefficients with the term's at 0 and the others moved by the full fit's quadratic
model (:func:`reduced_start`), and adds to each :class:`~indb.results.TermTest`
the deviance change, its degrees of freedom (the difference in estimated coefficients) and
the likelihood-ratio test of :func:`indb.comparison.deviance_test`. Marginality: a term
whose columns all belong to a larger term (a main effect inside an interaction) is not
tested, as is common practice (dropping it alone would give a model that depends on the
coding of the interaction); its entry says why.
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from indb import logsums, solver
from indb.comparison import deviance_test
from indb.design import TERM_JOIN, Design
from indb.errors import ConvergenceWarning, SpecError
from indb.fitrun import FitRun
from indb.irls import MAX_HALVINGS, STALL_HALVINGS, IrlsState, working_dispersion
from indb.plan.batch_scan import batch_query
from indb.plan.context import PlanContext
from indb.plan.irls_scan import MODEL_ID
from indb.plan.log_scan import log_scan_applies, log_scan_query
from indb.results import FitResult
from indb.spec import ModelSpec


@dataclass
class BatchModel:
    """One model of a batch: the columns it estimates and its IRLS state."""

    keep: np.ndarray  # bool per design column
    beta: np.ndarray  # standardized coefficients of the whole design, 0 outside ``keep``
    beta_prev: np.ndarray
    dev_old: float = math.inf
    halvings: int = 0
    iterations: int = 0
    done: bool = False
    converged: bool = False
    deviance: float = math.nan
    rank: int = 0
    note: str | None = None
    last: tuple[float, int] | None = None  # the last accepted scan: deviance and rank


@dataclass(frozen=True)
class BatchOutcome:
    """Where one model of a batch stopped (deviance on the fit's internal scale)."""

    deviance: float
    rank: int
    converged: bool
    iterations: int
    note: str | None = None


def _solve_kept(sums: solver.Sums, keep: np.ndarray) -> tuple[np.ndarray, solver.Solution]:
    """The Newton update over the ``keep`` columns only (the others held at 0)."""
    idx = np.flatnonzero(keep)
    sol = solver.solve(sums.xtwx[idx][:, idx], sums.xtwz[idx])
    beta = np.zeros(len(keep))
    beta[idx] = sol.beta
    return beta, sol


class BatchSolver:
    """IRLS for several models on one context and design, one scan per iteration for all
    (see the module docstring for the rules each model follows)."""

    def __init__(
        self,
        ctx: PlanContext,
        design: Design,
        run: FitRun,
        cells: list[tuple[str, ...]] | None = None,
        log_cache: logsums.LogCache | None = None,
    ) -> None:
        self.ctx, self.design, self.run = ctx, design, run
        #: the observed factor cells (from the full fit's scans, then from each batch scan)
        self.cells = cells
        #: the log-link scan's constant sums from the full fit: with them the batch scans
        #: are log-link scans (no join, no per-row deviance) while that scan applies
        self.log_cache = log_cache if log_scan_applies(ctx, design) else None
        self.spec: ModelSpec = ctx.spec
        self.step_tol = max(math.sqrt(self.spec.tol), 1e-7)

    def fit(
        self,
        starts: Mapping[int, tuple[np.ndarray, np.ndarray]],
        fallbacks: Mapping[int, np.ndarray] | None = None,
    ) -> dict[int, BatchOutcome]:
        """Fit each model ``id -> (keep, start)`` (``start``: standardized coefficients of
        the whole design; those outside ``keep`` are set to 0). ``fallbacks``: where a
        model's step is halved towards when its start gives invalid means (default: the
        start itself, so such a model stops with a note)."""
        fallbacks = fallbacks or {}
        models = {}
        for mid, (keep, start) in starts.items():
            beta = np.where(keep, start, 0.0)
            back = fallbacks.get(mid)
            prev = beta.copy() if back is None else np.where(keep, back, 0.0)
            models[mid] = BatchModel(keep=keep, beta=beta, beta_prev=prev)
        while True:
            active = {mid: m for mid, m in models.items() if not m.done}
            if not active:
                break
            t0 = time.perf_counter()
            betas = {mid: m.beta for mid, m in active.items()}
            per_model = self.scan(betas)
            changes = [self.advance(active[mid], sums) for mid, sums in per_model.items()]
            finite = [c for c in changes if math.isfinite(c)]
            self.run.record(
                math.nan, max(finite) if finite else math.nan, 0, time.perf_counter() - t0
            )
        return {
            mid: BatchOutcome(m.deviance, m.rank, m.converged, m.iterations, m.note)
            for mid, m in models.items()
        }

    def scan(self, betas: Mapping[int, np.ndarray]) -> dict[int, solver.Sums]:
        """One batch scan: each model's sums at its coefficients (the log-link scan while it
        applies and keeps its digits, :mod:`indb.logsums`; else the IRLS sums)."""
        if self.log_cache is not None:
            got = self.log_scan(betas)
            if got is not None:
                return got
            self.log_cache = None  # a model fits too closely: per-row deviances from here on
        got = self.run.query(batch_query(self.ctx, self.design, betas, self.cells))
        out = {}
        for mid, cells in split_by_model(got, betas).items():
            sums = solver.assemble(self.design, cells)
            self.run.check_rows(sums)
            self.cells = sums.cell_keys
            out[mid] = sums
        return out

    def log_scan(self, betas: Mapping[int, np.ndarray]) -> dict[int, solver.Sums] | None:
        """The batch as a log-link scan; None when a model's split deviance lost more than
        ``logsums.MAX_DIGITS_LOST`` digits."""
        cache = self.log_cache
        power = float(self.spec.family.variance_power)
        gram, response, _ = logsums.scan_parts(power, cache)
        tree = log_scan_query(
            self.ctx,
            self.design,
            np.zeros(self.design.p),
            gram=gram,
            response=response,
            constants=False,
            off_center=cache.off_center,
            batch=betas,
        )
        got = self.run.query(tree)
        out = {}
        for mid, cells in split_by_model(got, betas).items():
            parts = logsums.assemble_log_scan(
                self.design, cells, betas[mid], power, cache, cache.off_center
            )
            if parts.digits_lost > logsums.MAX_DIGITS_LOST:
                return None
            self.run.check_rows(parts.sums)
            out[mid] = parts.sums
        return out

    def settled(
        self,
        m: BatchModel,
        sums: solver.Sums,
        sol: solver.Solution,
        change: float,
        current: float,
    ) -> bool:
        """A model has converged when its deviance is within ``tol`` (relative) of its
        minimum as the scan's quadratic model predicts it (the next step's Newton
        decrement; the deviance is all a drop-one model reports, and this bounds its error
        as IrlsSolver's test bounds the change, one scan earlier), or by IrlsSolver's rule
        (the change below ``tol`` and the next step below sqrt(tol) standard errors)."""
        idx = np.flatnonzero(m.keep)
        gain = _gain(sums, m.keep, m.beta[idx], sol.beta)
        if math.isfinite(gain) and abs(gain) / (abs(current) + 0.1) < self.spec.tol:
            return True
        if change >= self.spec.tol:
            return False
        phi = working_dispersion(self.spec.family, sums, sol)
        return solver.step_in_se(m.beta[idx], sol.beta, sol.inv_info, phi) < self.step_tol

    def advance(self, m: BatchModel, sums: solver.Sums) -> float:
        """Take one model's scan: accept it and solve the next step, or halve the step;
        marks the model done when it has converged or cannot go on. Returns the relative
        deviance change (NaN for a halving)."""
        current = sums.deviance
        valid = sums.bad == 0 and math.isfinite(current)
        rises = math.isfinite(m.dev_old) and current > m.dev_old * (1 + 1e-9)
        if not valid and not math.isfinite(m.dev_old) and np.array_equal(m.beta, m.beta_prev):
            # no accepted scan to halve towards: the warm start itself gives invalid means
            m.done = True
            m.note = f"its start gives {sums.bad} rows an invalid mean"
            return math.nan
        if not valid or rises:
            if (
                valid
                and m.halvings >= STALL_HALVINGS
                and solver.relative_change(current, m.dev_old) < self.spec.tol
                and m.last is not None
            ):
                # flat (see IrlsSolver.scan_accepted): keep the last accepted step
                m.deviance, m.rank = m.last
                m.done = m.converged = True
            elif m.halvings >= MAX_HALVINGS:
                m.done = True
                m.note = f"step-halving failed after {MAX_HALVINGS} halvings"
            else:
                m.beta = 0.5 * (m.beta + m.beta_prev)
                m.halvings += 1
            return math.nan
        m.halvings = 0
        m.iterations += 1
        change = (
            solver.relative_change(current, m.dev_old) if math.isfinite(m.dev_old) else math.inf
        )
        if not m.keep.any():
            m.deviance, m.rank, m.done, m.converged = current, 0, True, True
            return change
        beta, sol = _solve_kept(sums, m.keep)
        rank = int((~sol.aliased).sum())
        m.last = (current, rank)
        if self.settled(m, sums, sol, change, current):
            m.deviance, m.rank, m.done, m.converged = current, rank, True, True
            return change
        if m.iterations >= self.spec.max_iter:
            m.deviance, m.rank, m.done = current, rank, True
            m.note = f"did not converge in {self.spec.max_iter} iterations"
            return change
        m.dev_old = current
        m.beta_prev = m.beta
        m.beta = beta
        return change


def split_by_model(got: dict[str, np.ndarray], betas: Mapping[int, np.ndarray]) -> dict:
    """A batch scan's rows by model id: model id -> that model's grouped rows."""
    ids = np.asarray(got[MODEL_ID]).astype(np.int64)
    return {
        mid: {k: np.asarray(v)[ids == mid] for k, v in got.items() if k != MODEL_ID}
        for mid in betas
    }


def _gain(sums: solver.Sums, keep: np.ndarray, old: np.ndarray, new: np.ndarray) -> float:
    """What the Newton step from ``old`` to ``new`` (kept columns) lowers the deviance by,
    as the scan's quadratic model predicts it: d' X'WX d (the Newton decrement, in
    deviance units)."""
    idx = np.flatnonzero(keep)
    d = np.nan_to_num(new - old)
    return float(d @ (sums.xtwx[idx][:, idx] @ d))


def fit_batch(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    starts: Mapping[int, tuple[np.ndarray, np.ndarray]],
    fallbacks: Mapping[int, np.ndarray] | None = None,
    cells: list[tuple[str, ...]] | None = None,
    log_cache: logsums.LogCache | None = None,
) -> dict[int, BatchOutcome]:
    """Fit the models ``id -> (keep, start)`` in shared scans (:class:`BatchSolver`);
    ``cells``: the observed factor cells, when an earlier scan found them; ``log_cache``:
    the full fit's log-link scan constants, when that scan applies."""
    return BatchSolver(ctx, design, run, cells, log_cache).fit(starts, fallbacks)


def reduced_start(xtwx, beta: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Where the full fit's quadratic model puts the model without the columns outside
    ``keep``: those at 0 and the kept ones moved by A_KK^-1 A_KD b_D (A the full fit's
    last X'WX, no scan). The deviance is nearly quadratic near the full fit, so this
    starts each reduced model close to its optimum and saves it iterations; columns
    aliased in A_KK stay where they were."""
    k, d = np.flatnonzero(keep), np.flatnonzero(~keep)
    out = np.where(keep, beta, 0.0)
    if not len(k) or not len(d):
        return out
    shift = solver.solve(xtwx[k][:, k], xtwx[k][:, d] @ beta[d])
    if np.all(np.isfinite(shift.beta)):
        out[k] += shift.beta
    return out


# -- drop-one tests -------------------------------------------------------------------------


def term_columns(design: Design) -> dict[str, list[int]]:
    """Every design column of each model term (aliased ones too), keyed as
    :func:`indb.termtests.term_blocks` keys the terms; the intercept is no term."""
    out: dict[str, list[int]] = {}
    for j, c in enumerate(design.columns):
        if c.source_columns:
            out.setdefault(TERM_JOIN.join(c.source_columns), []).append(j)
    return out


def containing_term(design: Design, term: str) -> str | None:
    """A larger term whose columns include all of ``term``'s (None: the term is in none)."""
    sources = {
        TERM_JOIN.join(c.source_columns): set(c.source_columns)
        for c in design.columns
        if c.source_columns
    }
    mine = sources[term]
    return next((name for name, cols in sources.items() if mine < cols), None)


def check_drop_one(spec: ModelSpec, design: Design) -> None:
    """drop_one needs a model term to drop (refused before the first IRLS scan)."""
    if spec.drop_one and not term_columns(design):
        raise SpecError(
            "drop_one=True tests each model term by fitting the model without it, and this "
            "model has only an intercept; add predictors or leave out drop_one (CLI: "
            "--drop-one)"
        )


def drop_one(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    state: IrlsState,
    res: FitResult,
) -> FitResult:
    """``res`` with each term test extended by the drop-one likelihood-ratio test; the
    reduced models are fitted in shared scans from the full fit's coefficients (``state``:
    standardized, internal scale) with each term's set to 0 and the others moved as the
    full fit's last scan's X'WX predicts
    (:func:`reduced_start`); a start that gives invalid means halves back towards the full
    fit's coefficients."""
    run.phase = "drop_one"
    blocks = term_columns(design)
    tested = {t: idx for t, idx in blocks.items() if containing_term(design, t) is None}
    starts, fallbacks = {}, {}
    beta, sums = np.asarray(state.beta, float), state.sums
    for mid, idx in enumerate(tested.values()):
        keep = np.ones(design.p, dtype=bool)
        keep[idx] = False
        starts[mid] = (keep, reduced_start(sums.xtwx, beta, keep))
        fallbacks[mid] = beta
    outcomes = fit_batch(ctx, design, run, starts, fallbacks, sums.cell_keys, state.log_cache)
    by_term = dict(zip(tested, (outcomes[mid] for mid in range(len(tested))), strict=True))
    full_rank = sum(1 for c in res.coefficients if not c.aliased)
    tests = []
    notes = []
    for t in res.term_tests:
        out = by_term.get(t.term)
        if out is None:
            inside = containing_term(design, t.term)
            tests.append(
                dataclasses.replace(
                    t,
                    drop_note=f"not tested: contained in {inside!r} (marginality)",
                )
            )
            continue
        change = run.scaling.unscale(out.deviance) - res.deviance
        df = full_rank - out.rank
        kind, stat, p = deviance_test(
            change, df, res.dispersion_estimated, res.dispersion, res.residual_df
        )
        note = out.note
        if df <= 0 and note is None:
            note = "the term's columns are combinations of the other terms' (no df to test)"
        if out.note is not None:
            notes.append(f"drop-one model without {t.term!r}: {out.note}")
        tests.append(
            dataclasses.replace(
                t,
                drop_deviance=change,
                drop_df=df,
                lr_test=kind,
                lr_statistic=stat,
                lr_p_value=p,
                drop_note=note,
            )
        )
    for msg in notes:
        warnings.warn(msg, ConvergenceWarning, stacklevel=3)
    run.phase = "fit"
    return dataclasses.replace(
        res,
        term_tests=tuple(tests),
        iteration_log=tuple(run.log),
        warnings=(*res.warnings, *notes),
    )


def batch_sql(design: Design, ctx: PlanContext, beta: np.ndarray | None):
    """The drop-one models' first batch scan at ``beta`` (None: zeros), for a dry run."""
    start = np.zeros(design.p) if beta is None else np.asarray(beta, float)
    betas = {}
    for mid, (term, idx) in enumerate(term_columns(design).items()):
        if containing_term(design, term) is None:
            betas[mid] = start.copy()
            betas[mid][idx] = 0.0
    return batch_query(ctx, design, betas)
