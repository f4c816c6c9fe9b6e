"""Penalised IRLS steps: the elastic net on the weighted least-squares subproblem.

numpy/scipy only. The objective on the source's scale (Zou & Hastie 2005) is

    (1 / (2 W)) sum_i w_i d(y_i, mu_i) + lambda sum_j f_j [a |b_j| + (1 - a) / 2 b_j^2]

with w_i = frequency weight x prior weight, W = sum_i w_i, ``a`` the L1 share and f_j the
per-column strength (0 for the intercept). Each IRLS scan gives X'WX and X'Wz at the current
coefficients; half the deviance is, to second order, (1/2) b'X'WXb - b'X'Wz + const, so the
penalised Newton step minimises that quadratic plus the penalty, by coordinate descent
(Friedman, Hastie & Tibshirani 2010) or, for ridge (a = 0), one linear solve. The scans do
not change: a penalty costs numpy time only.

The fit runs on internal coordinates (design columns centred and scaled, the response and
weights rescaled by powers of two: :class:`indb.design.Scaling`). Multiplying the objective
by W' d' (W' the internal weight total, d' the internal deviance over the source's divided
by the weight factors) puts it in units of half the internal deviance; an internal
coefficient b'_j is b_j / u_j on the penalised scale, so the penalty's weights are
W' d' lambda a f_j u_j (L1) and W' d' lambda (1 - a) f_j u_j^2 (L2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from indb.design import Design, Scaling
from indb.errors import SpecError
from indb.normal_eq import Solution, solve

#: the L1 share used for lambda_max when the penalty is pure ridge: no finite lambda sets a
#: ridge coefficient to 0, so the path starts where a = 0.001 would (common practice)
RIDGE_PATH_SHARE = 1e-3
#: coordinate descent stops when no coordinate moves the quadratic by more than this
#: fraction of its scale (sum of the diagonal)
CD_TOL = 1e-22
CD_MAX_SWEEPS = 100_000


@dataclass(frozen=True)
class Penalty:
    """An elastic-net penalty in a fit's internal coordinates.

    Parameters
    ----------
    strength:
        lambda on the source's scale (``inf``: every penalised coefficient held at 0).
    l1_share:
        a in [0, 1].
    unit:
        Per internal coefficient, f_j u_j: its strength times the factor taking it to the
        penalised scale (0: not penalised, the intercept always).
    total:
        W' d': the internal weight total times the deviance factor (see the module text).
    """

    strength: float
    l1_share: float
    unit: np.ndarray
    total: float

    def at(self, strength: float) -> Penalty:
        return Penalty(strength, self.l1_share, self.unit, self.total)

    @property
    def penalised(self) -> np.ndarray:
        return self.unit > 0

    def weights(self) -> tuple[np.ndarray, np.ndarray]:
        """(L1, L2) weights per internal coefficient, in units of half the deviance."""
        if math.isinf(self.strength):
            return np.where(self.penalised, math.inf, 0.0), np.zeros_like(self.unit)
        lam = self.total * self.strength
        a = self.l1_share
        return lam * a * self.unit, lam * (1.0 - a) * self.unit**2

    def cost(self, beta: np.ndarray) -> float:
        """The penalty in deviance units (twice half-deviance units) at internal ``beta``."""
        if math.isinf(self.strength):
            # penalised coefficients are held at 0: anywhere else is infinitely worse (a
            # start from an unpenalised fit must not be halved back towards)
            held = np.nan_to_num(beta)[self.penalised]
            return 0.0 if not held.any() else math.inf
        l1, l2 = self.weights()
        b = np.nan_to_num(beta)
        return float(2.0 * (l1 @ np.abs(b)) + l2 @ (b * b))

    def step(self, xtwx: sparse.sparray, xtwz: np.ndarray, beta: np.ndarray) -> Solution:
        """The penalised Newton step from one scan's sums, started at ``beta``; the aliased
        mask and inverse information are the unpenalised ones (a step's size is measured in
        their standard errors), with penalised columns never aliased."""
        plain = solve(xtwx, xtwz)
        l1, l2 = self.weights()
        if self.l1_share == 0.0 and not math.isinf(self.strength):
            new = solve(sparse.csr_array(xtwx) + sparse.diags_array(l2), xtwz).beta
        else:
            start = np.where(np.isfinite(beta), beta, 0.0)
            new = coordinate_descent(xtwx, xtwz, l1, l2, start)
        aliased = plain.aliased & ~self.penalised
        return Solution(beta=np.where(aliased, 0.0, new), aliased=aliased, inv_info=plain.inv_info)

    def gain(
        self, xtwx: sparse.sparray, xtwz: np.ndarray, beta: np.ndarray, new: np.ndarray
    ) -> float:
        """What the step from ``beta`` to ``new`` lowers the penalised objective by, in
        deviance units, as the scan's quadratic model predicts it (the penalised analogue of
        the Newton decrement; 0 for no step)."""
        a = sparse.csr_array(xtwx)

        def model(b: np.ndarray) -> float:
            b = np.nan_to_num(b)
            return float(b @ (a @ b) - 2.0 * (xtwz @ b)) + self.cost(b)

        return model(beta) - model(new)

    def lambda_max(self, xtwx: sparse.sparray, xtwz: np.ndarray, beta: np.ndarray) -> float:
        """The smallest lambda that keeps every penalised coefficient at 0, from the gradient
        X'Wz - X'WX b at a fit with them held at 0 (the KKT condition |g_j| <= W' d' lambda a
        f_j u_j)."""
        grad = np.asarray(xtwz - sparse.csr_array(xtwx) @ np.nan_to_num(beta))
        on = self.penalised
        if not on.any():
            raise SpecError("path needs a penalised coefficient; every penalty_for factor is 0")
        share = max(self.l1_share, RIDGE_PATH_SHARE)
        return float(np.max(np.abs(grad[on]) / (self.total * share * self.unit[on])))


def coordinate_descent(
    xtwx: sparse.sparray | np.ndarray,
    xtwz: np.ndarray,
    l1: np.ndarray,
    l2: np.ndarray,
    start: np.ndarray,
) -> np.ndarray:
    """Minimise (1/2) b'Ab - c'b + sum l1_j |b_j| + (1/2) sum l2_j b_j^2 by cyclic coordinate
    descent with active-set cycling (Friedman, Hastie & Tibshirani 2010, section 2.6).

    The gradient c - Ab is kept up to date column by column; a column with a zero diagonal
    (no rows) stays at 0."""
    a = sparse.csc_array(xtwx)
    p = len(xtwz)
    dense = p <= 4000
    full = a.toarray() if dense else None
    diag = a.diagonal()
    b = np.asarray(start, float).copy()
    b[diag <= 0] = 0.0
    grad = np.asarray(xtwz - a @ b, float)
    denom = diag + l2
    tol = CD_TOL * max(float(np.abs(diag).sum()), 1e-300)

    def column(j: int) -> np.ndarray:
        if full is not None:
            return full[:, j]
        lo, hi = a.indptr[j], a.indptr[j + 1]
        out = np.zeros(p)
        out[a.indices[lo:hi]] = a.data[lo:hi]
        return out

    def sweep(cols: np.ndarray) -> float:
        worst = 0.0
        for j in cols:
            if denom[j] <= 0:
                continue
            rho = grad[j] + diag[j] * b[j]
            # soft-thresholding; an infinite l1 (a coefficient held at 0) gives 0
            new = math.copysign(max(abs(rho) - l1[j], 0.0), rho) / denom[j]
            delta = new - b[j]
            if delta != 0.0:
                grad[:] -= column(j) * delta
                b[j] = new
                worst = max(worst, denom[j] * delta * delta)
        return worst

    every = np.arange(p)
    for _ in range(CD_MAX_SWEEPS):
        if sweep(every) <= tol:
            return b
        active = np.flatnonzero(b != 0.0)
        for _ in range(CD_MAX_SWEEPS):
            if sweep(active) <= tol:
                break
    return b


def column_units(
    design: Design,
    scaling: Scaling,
    factors: dict[str, float],
    spread: np.ndarray | None = None,
) -> np.ndarray:
    """f_j u_j per internal coefficient: the column's strength (the product of the
    ``factors`` of its source columns, or of its term's, default 1; 0 for the intercept)
    times the factor taking an internal coefficient to the penalised scale: 1 / (coef_factor
    x the column's internal scale), or, with ``spread`` (each internal column's weighted
    standard deviation), spread / coef_factor."""
    known = {c for col in design.columns for c in col.source_columns} | {
        col.term for col in design.columns
    }
    for name in factors:
        if name not in known:
            cols = sorted({c for col in design.columns for c in col.source_columns})
            raise SpecError(
                f"penalty_for names {name!r}, which is not a column of the model; the model's "
                f"columns are {cols} (CLI --penalty-for COL=FACTOR)"
            )
    out = np.zeros(design.p)
    for j, col in enumerate(design.columns):
        if j == 0 and design.intercept:
            continue
        if col.term in factors:
            strength = factors[col.term]
        else:
            strength = math.prod(factors.get(c, 1.0) for c in col.source_columns)
        if spread is not None:
            u = spread[j] / scaling.coef_factor
        else:
            scale = design.values[col.value].scale if col.value != 0 else 1.0
            u = 1.0 / (scaling.coef_factor * scale)
        out[j] = strength * u
    return out


def weighted_spread(xtwx: sparse.sparray, total: float) -> np.ndarray:
    """Each internal column's weighted standard deviation from X'WX of a scan whose working
    weights are the prior x frequency weights (its first row: the intercept's sums)."""
    a = sparse.csr_array(xtwx)
    mean = a[[0], :].toarray().ravel() / total
    var = a.diagonal() / total - mean * mean
    return np.sqrt(np.clip(var, 0.0, None))
