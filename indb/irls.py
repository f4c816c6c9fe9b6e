"""The IRLS loop: one aggregate scan per iteration, step-halving, the convergence test."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from indb import logsums, solver
from indb.design import Design, Scaling
from indb.errors import NondeterministicSourceError, SpecError
from indb.families import Family
from indb.fitrun import FitRun
from indb.nullmodel import NullTrack
from indb.penalty import Penalty
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query
from indb.plan.log_scan import log_scan_applies, log_scan_query
from indb.spec import ModelSpec
from indb.sqlexpr import Expr

MAX_HALVINGS = 30
# halvings (step 1/4) after which a rise too small for the convergence test ends IRLS
STALL_HALVINGS = 2
# A scan carries the covariance sums (the robust meat, the observed information) when the
# step that leads to it is below this many standard errors. IRLS stops at a scan whose next
# step is below sqrt(tol) ~ 1e-4 standard errors; converging quadratically, the step into
# that scan is about the square root of that times the problem's constant, well below 0.1,
# so the last scan carries them and no scan is added. Where it does not (a fit that jumps
# to its optimum from further away), one scan at the final coefficients adds them.
CARRY_STEP = 0.1
# A path's lambda before its last may stop at a scan whose penalised update moves at most
# sqrt(PATH_SHARE * step_tol) standard errors (1e-3 at the default tol), taken with no scan:
# under a canonical link that update is a Newton step of the penalised objective, whose own
# error is about c times its square, c the problem's constant (about 1e-3 per standard
# error at 10^6-10^7 rows, measured), so below step_tol whenever c < 1 / PATH_SHARE. Those
# lambdas report no standard errors, and each only seeds the next. Other links converge
# linearly and keep ``step_tol``.
PATH_SHARE = 1e-2


@dataclass(frozen=True)
class IrlsState:
    """Where IRLS stopped: the coefficients, the last scan's sums and their update."""

    beta: np.ndarray
    sums: solver.Sums
    solution: solver.Solution
    converged: bool
    iterations: int
    #: stopped early: step-halving could not lower the deviance measurably (see irls)
    stalled: bool = False
    #: the log-link scan's constant sums (:class:`indb.logsums.LogCache`) while that scan
    #: applies, for later scans at other coefficients (the drop-one batch); else None
    log_cache: logsums.LogCache | None = None
    #: where ``sums`` were taken when the stop added the solved step to them (None: ``beta``)
    scanned: np.ndarray | None = None


def _fallback_beta(ctx: PlanContext, design: Design, ybar: float) -> np.ndarray:
    """Intercept-only coefficients g(ybar): where a failing first step halves toward."""
    beta = np.zeros(design.p)
    if design.intercept:
        link = ctx.spec.link
        mu = min(max(ybar, 1e-6), 1 - 1e-6) if ctx.spec.family.unit_mean else ybar
        with np.errstate(all="ignore"):
            g = float(link.link(np.array([mu]))[0])
        beta[0] = g if math.isfinite(g) else 0.0
    return beta


def irls(
    ctx: PlanContext,
    design: Design,
    run: FitRun,
    ybar: float,
    *,
    start: np.ndarray | None = None,
    null_mu: Expr | None = None,
    null_track: NullTrack | None = None,
    off_mean: float = 0.0,
    covariance: tuple[str, ...] = (),
    penalty: Penalty | None = None,
    start_hessian: sparse.csr_array | None = None,
) -> tuple[IrlsState, float | None]:
    """Iterate scans until the deviance settles and the next step is negligible.

    Returns the state at the last scanned coefficients and the null deviance: from the
    first scan when ``null_mu`` (a per-row null mean) is given, or from ``null_track`` (the
    intercept-only model with the offset, iterated in the same scans) when it converged.
    ``covariance`` names the covariance sums (``plan.irls_scan.COVARIANCE_SUMS``) the last
    scans carry (see :data:`CARRY_STEP`); the state's sums have them when the last did.
    With ``penalty`` each update is the penalised Newton step (:mod:`indb.penalty`) and the
    deviance the loop watches is the penalised objective. ``start_hessian`` (an estimate of
    X'WX near ``start``, such as a sample's scaled to the table) lets the first scan sum
    only the gradient (see :attr:`IrlsSolver.chord`).
    """
    loop = IrlsSolver(
        ctx,
        design,
        run,
        ybar,
        null_mu=null_mu,
        null_track=null_track,
        off_mean=off_mean,
        covariance=covariance,
        penalty=penalty,
    )
    loop.chord = start_hessian
    return loop.fit(start)


class IrlsSolver:
    """IRLS on one context and design, the loop's state kept as fields.

    :meth:`fit` runs the steps in this order:

    1. :meth:`start`: one scan at the family's starting means and the first solve, or the
       coefficients given;
    2. per iteration, :meth:`step`: :meth:`scan_accepted` scans at ``beta``, halving the
       step toward ``beta_prev`` while a mean is invalid or the deviance rises (or marks a
       stall, :meth:`finish_stalled`; when halving fails, :meth:`check_repeatable` first
       rules out a source whose values change between reads); the update is solved; the
       loop ends when the deviance has settled and :meth:`step_size` of the next step is
       negligible.

    :meth:`scan` is one query: the log-link scan where it applies (:meth:`log_scan_sums`),
    else the IRLS scan (:meth:`gram_scan_sums`); the null model rides along in either, and
    the covariance sums in the IRLS scan once the steps are small (:data:`CARRY_STEP`). Each
    scan's row counts are checked against the profile's
    (:meth:`indb.fitrun.FitRun.check_rows`).
    """

    #: the coefficients the next scan reads, and the last accepted ones (halving goes there)
    beta: np.ndarray
    beta_prev: np.ndarray
    #: X'WX for the next scan to take instead of summing it: that scan then sums only the
    #: gradient and the deviance (``chord_scan``; not a log-link scan with power 2, whose
    #: X'WX is summed once anyway), and its update is a chord step. Used once, for the
    #: first scan after a sample start; never for a scan the loop could stop at.
    chord: sparse.csr_array | None = None

    def __init__(
        self,
        ctx: PlanContext,
        design: Design,
        run: FitRun,
        ybar: float,
        *,
        null_mu: Expr | None = None,
        null_track: NullTrack | None = None,
        off_mean: float = 0.0,
        covariance: tuple[str, ...] = (),
        penalty: Penalty | None = None,
    ) -> None:
        self.ctx, self.design, self.run, self.ybar = ctx, design, run, ybar
        self.covariance = covariance
        # whether the next scan carries the covariance sums, and the step (in standard
        # errors) that leads to it
        self.carry = False
        self.next_step = math.inf
        #: the step solved from the scan before the last (None after a halving), whose
        #: ratio to the last gives a linearly converging fit's rate
        self.prev_step: np.ndarray | None = None
        self.penalty = penalty
        #: a penalised loop may also stop on the next step's predicted gain (settled)
        self.predicted_settle = False
        self.spec = ctx.spec
        self.null_mu = null_mu
        self.null_track = null_track
        # what one scan hands the next
        self.cells: list[tuple[str, ...]] | None = None
        self.null_dev: float | None = None
        # the log-link scan (no join to factor effects; plan.log_scan.log_scan_query) where
        # it applies
        self.log_scan = log_scan_applies(ctx, design)
        self.log_cache: logsums.LogCache | None = None
        self.power = ctx.spec.family.variance_power
        self.off_center = off_mean if math.isfinite(off_mean) else 0.0
        # Converged when the deviance settles AND the next Newton step is statistically
        # invisible: with linear convergence (non-canonical links) a small deviance change alone
        # can leave coefficients ~1e-4 standard errors from the optimum.
        self.step_tol = max(math.sqrt(self.spec.tol), 1e-7)
        # the loop
        self.dev_old = math.inf
        self.sums: solver.Sums | None = None
        self.sums_prev: solver.Sums | None = None
        self.sol: solver.Solution | None = None
        self.budget = self.spec.max_iter
        self.iterations = 0
        self.converged = False
        self.stalled = False
        self.scanned: np.ndarray | None = None
        #: whether the last scan took its X'WX from ``chord``, and whether ``sums_prev`` did
        self.chord_scan = self.prev_chord = False

    # -- the loop ------------------------------------------------------------------------------

    def fit(
        self, start: np.ndarray | None = None, warm: IrlsState | None = None
    ) -> tuple[IrlsState, float | None]:
        """Run IRLS from ``start`` (None: the family's starting means) or from the sums of
        ``warm``; see :func:`irls`."""
        # a rate is read from this run's own steps only (a theta loop or a path runs again)
        self.prev_step = self.scanned = None
        if warm is not None:
            self.start_warm(warm)
        else:
            self.start(start)
        for _ in range(max(self.budget, 0)):
            if self.step():
                break
        assert self.sol is not None
        null_dev = self.null_dev
        if self.null_track is not None and self.null_track.done:
            null_dev = self.null_track.deviance
        return IrlsState(
            beta=self.beta,
            sums=self.sums,
            solution=self.sol,
            converged=self.converged,
            iterations=self.iterations,
            stalled=self.stalled and not self.converged,
            log_cache=self.log_cache if self.log_scan else None,
            scanned=self.scanned,
        ), null_dev

    def start(self, start: np.ndarray | None) -> None:
        """The first coefficients: solved from a scan at the starting means, or given."""
        spec = self.spec
        t0 = time.perf_counter()
        if start is None:
            sums = self.scan(None)
            if sums.bad:
                raise SpecError(
                    f"cannot find valid starting values for family {spec.family.name!r} with "
                    f"link {spec.link.describe()!r} ({sums.bad} rows give an invalid mean); "
                    "try another link or starting values"
                )
            self.sums = sums
            self.beta_prev = _fallback_beta(self.ctx, self.design, self.ybar)
            self.run.record(sums.deviance, math.nan, 0, time.perf_counter() - t0)
            self.sol = self.solve(sums, self.beta_prev)
            self.beta = self.sol.beta
            self.budget = spec.max_iter - 1  # the start scan counts as an iteration
        else:
            self.beta = np.asarray(start, float)
            # Where a first scan with an invalid mean halves toward: the intercept-only
            # coefficients, as from the standard start. A sample's estimate can give a mean
            # outside the family's range on a row the sample did not hold (an inverse link).
            self.beta_prev = _fallback_beta(self.ctx, self.design, self.ybar)
            self.budget = spec.max_iter

    def with_penalty(self, penalty: Penalty, predicted_settle: bool = False) -> IrlsSolver:
        """This loop ready for another penalty (a path's next lambda), keeping what the
        scans cache (the log-link scan's constants, the cells); ``predicted_settle``: see
        :meth:`settled`."""
        self.penalty = penalty
        self.predicted_settle = predicted_settle
        self.iterations = 0
        self.converged = self.stalled = False
        self.null_mu = self.null_track = None
        return self

    def start_warm(self, warm: IrlsState) -> None:
        """Start from a converged state's scan: its sums give the first (penalised) update
        with no scan of its own (a path's next lambda)."""
        # The warm scan is the last accepted one: a first step that stalls goes back to it.
        # Its sums hold at the scan's own coefficients, not at ones a stop moved on by the
        # solved step (at a penalised optimum that moves the deviance to first order).
        at = warm.beta if warm.scanned is None else warm.scanned
        self.sums = self.sums_prev = warm.sums
        self.beta_prev = at
        self.sol = self.solve(warm.sums, at)
        self.beta = self.sol.beta
        self.dev_old = self.objective(warm.sums, at)
        self.budget = self.spec.max_iter

    def solve(self, sums: solver.Sums, beta: np.ndarray) -> solver.Solution:
        """The update from one scan's sums: the Newton step, or the penalised one from
        ``beta`` (where the scan was taken)."""
        if self.penalty is None:
            return solver.solve(sums.xtwx, sums.xtwz)
        return self.penalty.step(sums.xtwx, sums.xtwz, beta)

    def settled(self, change: float, current: float) -> bool:
        """The objective has settled: its change since the last scan is below ``tol``, or,
        with ``predicted_settle`` (a path's lambdas before its last), the next step's gain
        as the scan's quadratic model predicts it, relative, below ``tol``. The last change
        measures the previous step, one scan late: this saves about a scan per lambda; the
        step must still be below ``step_tol`` standard errors. The gain is second order in
        the gradient's residual, so such a stop is a little less exact than one more scan:
        the path's last lambda (the reported fit) and single fits do not use it."""
        if change < self.spec.tol:
            return True
        if not self.predicted_settle or self.penalty is None or self.sums is None:
            return False
        gain = self.penalty.gain(self.sums.xtwx, self.sums.xtwz, self.beta, self.sol.beta)
        return math.isfinite(gain) and abs(gain) / (abs(current) + 0.1) < self.spec.tol

    def step_bound(self) -> float:
        """The largest solved step (standard errors) a stop takes with no scan: ``step_tol``;
        more for a path's lambda before its last under a canonical link (``PATH_SHARE``)."""
        if self.predicted_settle and self.spec.family.is_canonical(self.spec.link):
            return math.sqrt(PATH_SHARE * self.step_tol)
        return self.step_tol

    def objective(self, sums: solver.Sums, beta: np.ndarray) -> float:
        """What the loop lowers: the deviance, plus the penalty in deviance units."""
        if self.penalty is None:
            return sums.deviance
        return sums.deviance + self.penalty.cost(beta)

    def step(self) -> bool:
        """One iteration: an accepted scan, its update, the convergence test. True: stop."""
        self.iterations += 1
        t0 = time.perf_counter()
        self.carry = bool(self.covariance) and self.next_step < CARRY_STEP
        halvings = self.scan_accepted()
        chorded, self.chord = self.chord_scan, None
        if chorded:
            self.run.chord_start = True
        if self.stalled:
            self.finish_stalled()
            return True
        sums = self.sums
        assert sums is not None
        self.sums_prev, self.prev_chord = sums, chorded
        current = self.objective(sums, self.beta)
        change = (
            solver.relative_change(current, self.dev_old)
            if math.isfinite(self.dev_old)
            else math.inf
        )
        self.run.record(sums.deviance, change, halvings, time.perf_counter() - t0)
        self.sol = self.solve(sums, self.beta)
        # a chord scan's X'WX is not the information at its coefficients: never the last
        settled = self.settled(change, current) and not chorded
        if settled or self.covariance:
            self.next_step = self.step_size()
        step = self.sol.beta - self.beta
        if settled and self.next_step < self.step_bound():
            # The update solved from this scan is already paid for: taking it brings the
            # estimates to the numerical limit at no scan. Newton converges quadratically;
            # Fisher scoring (a non-canonical link) linearly, so the steps it would still
            # take are added from the rate of the last two (solver.tail_factor). Deviance,
            # dispersion and X'WX stay the scan's; a step this small (< step_tol standard
            # errors) moves the deviance by ~its square, far below the reported digits.
            self.converged = True
            self.scanned = self.beta
            prev = self.prev_step if halvings == 0 and self.penalty is None else None
            self.beta = self.beta + solver.tail_factor(step, prev, self.sol.inv_info) * step
            return True
        self.prev_step = step if halvings == 0 and not chorded else None
        self.dev_old = current
        self.beta_prev = self.beta
        self.beta = self.sol.beta
        return False

    def scan_accepted(self) -> int:
        """Scan at ``beta``, halving the step toward ``beta_prev`` and scanning again while
        a mean is invalid or the deviance rises; sets ``stalled`` when the rise is too small
        to see. Returns the halvings."""
        spec = self.spec
        halvings = 0
        while True:
            sums = self.sums = self.scan(self.beta)
            current = self.objective(sums, self.beta)
            valid = sums.bad == 0 and math.isfinite(sums.deviance)
            # A rise is relative to the deviance only: deviance terms are >= 0, so their
            # sum's rounding error is a small multiple of eps times the sum (1e-9 covers
            # parallel partial sums over ~10^7 rows). No absolute slack: at a boundary MLE
            # the deviance itself falls towards 0 (~5e-9 after 20 iterations on 4 rows),
            # where a fixed 1e-12 accepted steps that raised it, over and over.
            rises = math.isfinite(self.dev_old) and current > self.dev_old * (1 + 1e-9)
            if valid and not rises:
                return halvings
            if (
                valid
                and halvings >= STALL_HALVINGS
                and solver.relative_change(current, self.dev_old) < spec.tol
            ):
                # Flat: a quarter of the Newton step still does not lower the deviance and
                # the rise is below what the convergence test can see. Along the step the
                # deviance is ~ D0 - a t + b t^2; had its minimum t* been >= 1/4, t = 1/2
                # or 1/4 would have lowered it, and with t* < 1/4 the full step's rise
                # b (1 - 2 t*) >= b / 2 bounds the best gain b t*^2 below tol / 8 in the
                # same measure. Nothing measurable is left: keep the last accepted step.
                self.stalled = True
                return halvings
            if halvings >= MAX_HALVINGS:
                self.check_repeatable()
                raise SpecError(_halving_failure(spec, sums, self.run.scaling))
            self.beta = 0.5 * (self.beta + self.beta_prev)
            halvings += 1

    def check_repeatable(self) -> None:
        """Before blaming the model for a failed step-halving: scan the last accepted
        coefficients again. A deviance other than the one they gave (beyond the rounding of
        a parallel sum) means the source's values change between reads, with the same rows."""
        run, deviance = self.run, self.dev_old
        if not math.isfinite(deviance) or run.phase == "sample":
            return
        again = self.objective(self.scan(self.beta_prev), self.beta_prev)
        if abs(again - deviance) <= 1e-9 * abs(deviance) + 1e-300:
            return
        raise NondeterministicSourceError(
            "the source is not deterministic: the same coefficients gave the deviance "
            f"{run.scaling.unscale(deviance):.10g} in one IRLS scan and "
            f"{run.scaling.unscale(again):.10g} in the next, so its values change between "
            "reads (random(), a sample such as USING SAMPLE or TABLESAMPLE, or a table written "
            "to during the fit). indb reads the source once per iteration; store the rows "
            "first (CREATE TABLE ... AS SELECT ...) or make the sample repeatable "
            "(REPEATABLE (seed))"
        )

    def finish_stalled(self) -> None:
        """Go back to the last accepted step (its scan and its solved update)."""
        self.iterations -= 1
        assert self.sums_prev is not None and self.sol is not None
        self.sums, self.beta = self.sums_prev, self.beta_prev
        if self.prev_chord:  # that scan's X'WX was borrowed: take the information here
            t0 = time.perf_counter()
            self.sums = self.scan(self.beta)
            self.sol = self.solve(self.sums, self.beta)
            self.run.record(self.sums.deviance, 0.0, 0, time.perf_counter() - t0)
        # the deviance has settled; converged if the remaining step is invisible too
        self.converged = self.step_size() < self.step_tol

    def step_size(self) -> float:
        """The solved update's step from ``beta``, in standard errors (largest over the
        coefficients), with the dispersion of the scan it was solved from."""
        sums, sol = self.sums, self.sol
        assert sums is not None and sol is not None
        phi = working_dispersion(self.spec.family, sums, sol)
        return solver.step_in_se(self.beta, sol.beta, sol.inv_info, phi)

    # -- one scan ------------------------------------------------------------------------------

    def scan(self, beta: np.ndarray | None) -> solver.Sums:
        """The sums of one scan at ``beta`` (None: at the family's starting means)."""
        self.chord_scan = False
        if beta is not None and self.log_scan and not self.carry:
            sums = self.log_scan_sums(beta)
            if sums is not None:
                return sums
            # the model fits so closely that the split deviance lost too many digits:
            # per-row deviances from here on (this scan is run again below)
            self.log_scan = False
        return self.gram_scan_sums(beta)

    def wants_null(self) -> bool:
        """Whether this scan should also answer for the null model."""
        track = self.null_track
        return (self.null_mu is not None and self.null_dev is None) or (
            track is not None and not track.done
        )

    def log_scan_sums(self, beta: np.ndarray) -> solver.Sums | None:
        """The log-link scan at ``beta`` (:mod:`indb.logsums`), with the null model in closed
        form; None when its split deviance lost more than ``MAX_DIGITS_LOST`` digits."""
        ctx, design, power = self.ctx, self.design, self.power
        gram, response, constants = logsums.scan_parts(power, self.log_cache)
        hessian = self.chord if gram and power != 2.0 else None
        tree = log_scan_query(
            ctx,
            design,
            beta,
            gram=gram,
            response=response,
            constants=constants,
            off_center=self.off_center,
            gradient_only=hessian is not None,
        )
        got = logsums.assemble_log_scan(
            design, self.run.query(tree), beta, power, self.log_cache, self.off_center, hessian
        )
        self.run.check_rows(got.sums)
        wants_null = self.wants_null()
        b0, dev0 = logsums.null_model(power, got.cache) if wants_null else (0.0, 0.0)
        if got.digits_lost <= logsums.MAX_DIGITS_LOST and math.isfinite(dev0):
            self.log_cache = got.cache
            self.chord_scan = hessian is not None
            if wants_null and self.null_track is not None:
                self.null_track.finish(b0, dev0)
            elif wants_null:
                self.null_dev = dev0
            return got.sums
        return None

    def gram_scan_sums(self, beta: np.ndarray | None) -> solver.Sums:
        """The IRLS scan at ``beta`` (:func:`indb.plan.irls_scan.gram_query`), carrying the
        null model: its deviance at ``null_mu``, or one step of ``null_track``."""
        null_mu, null_track = self.null_mu, self.null_track
        with_mu = null_mu is not None and self.null_dev is None
        track = null_track is not None and not null_track.done
        hessian = self.chord if beta is not None else None
        tree = gram_query(
            self.ctx,
            self.design,
            beta,
            ybar=self.ybar,
            null_mu=null_mu if with_mu else None,
            cells=self.cells,
            null_intercept=null_track.b0 if track else None,
            covariance=self.covariance if self.carry and beta is not None else (),
            gradient_only=hessian is not None,
        )
        extra = ("nullw", "nullwz", "nulldev") if track else ("nulldev",) if with_mu else ()
        if self.spec.family.unit_mean:
            extra += ("edge", "near")
        out = solver.assemble(self.design, self.run.query(tree), extra, gram=hessian is None)
        self.run.check_rows(out)
        if hessian is not None:
            out = solver.chord(out, hessian, beta)
            self.chord_scan = True
        self.cells = out.cell_keys
        if with_mu:
            self.null_dev = out.extras["nulldev"]
        if track:
            null_track.update(out.extras)
        return out


def working_dispersion(family: Family, sums: solver.Sums, sol: solver.Solution) -> float:
    """The dispersion that measures a step in standard errors while IRLS runs: Pearson's
    chi-squared of the scan over its rows less the coefficients, at least one (a sample or
    an early scan may have no rows to spare)."""
    rank = int((~sol.aliased).sum())
    return solver.dispersion(
        sums.pearson, max(sums.n_weighted - rank, 1.0), family.dispersion_fixed
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
