"""Numerical core: assemble X'WX from grouped sums, solve the IRLS update, derive inference.

numpy/scipy only: sufficient statistics in, numbers out. No I/O, no printing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg, special, stats

from indb.design import Design

ALIAS_TOL = 1e-10  # squared sine below which a (standardized) column counts as aliased


@dataclass(frozen=True)
class Sums:
    """Totals of one IRLS scan, assembled into matrices."""

    xtwx: np.ndarray
    xtwz: np.ndarray
    deviance: float
    pearson: float
    bad: int
    n: int
    n_weighted: float
    extras: dict[str, float]
    cells: int
    cell_keys: list[tuple[str, ...]] | None = None


def in_cell_order(design: Design, cells: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The grouped rows sorted by cell: engines return groups in any order (DuckDB's order
    varies with thread timing), and floating-point sums over them must not, so that the same
    data give the same bits."""
    if not design.factors or len(cells["n"]) < 2:
        return cells
    keys = [
        [(v is None, "" if v is None else str(v)) for v in cells[f.alias]] for f in design.factors
    ]
    order = sorted(range(len(cells["n"])), key=lambda r: tuple(k[r] for k in keys))
    idx = np.asarray(order, dtype=np.intp)
    return {k: np.asarray(v)[idx] for k, v in cells.items()}


def assemble(design: Design, cells: dict[str, np.ndarray], extra: tuple[str, ...] = ()) -> Sums:
    """Build X'WX and X'Wz (standardized design) from per-cell sums of the IRLS scan."""
    cells = in_cell_order(design, cells)
    rows = len(cells["n"])
    p = design.p
    ind = np.ones((rows, p))
    for f_i, f in enumerate(design.factors):
        lv = cells[f.alias]
        for j, c in enumerate(design.columns):
            if f_i in c.factors:
                level = c.levels[c.factors.index(f_i)]
                ind[:, j] *= lv == level
    by_value: dict[int, list[int]] = {}
    for j, c in enumerate(design.columns):
        by_value.setdefault(c.value, []).append(j)
    xtwx = np.zeros((p, p))
    xtwz = np.zeros(p)
    keys = sorted(by_value)
    for ia, a in enumerate(keys):
        ca = by_value[a]
        xtwz[ca] = ind[:, ca].T @ zero_nulls(cells[f"t_{a}"])
        for b in keys[ia:]:
            cb = by_value[b]
            s = zero_nulls(cells[f"s_{min(a, b)}_{max(a, b)}"])
            block = (ind[:, ca] * s[:, None]).T @ ind[:, cb]
            xtwx[np.ix_(ca, cb)] = block
            xtwx[np.ix_(cb, ca)] = block.T
    return Sums(
        xtwx=xtwx,
        xtwz=xtwz,
        deviance=float(zero_nulls(cells["dev"]).sum()),
        pearson=float(zero_nulls(cells["pear"]).sum()),
        bad=int(zero_nulls(cells["bad"]).sum()),
        n=int(zero_nulls(cells["n"]).sum()),
        n_weighted=float(zero_nulls(cells["nw"]).sum()),
        extras={k: float(zero_nulls(cells[k]).sum()) for k in extra},
        cells=rows,
        cell_keys=(
            list(zip(*(cells[f.alias].tolist() for f in design.factors), strict=True))
            if design.factors
            else None
        ),
    )


def zero_nulls(a: np.ndarray) -> np.ndarray:
    """A fetched column of sums as floats, with NULL (a SUM over no rows) as 0."""
    return np.nan_to_num(np.asarray(a, dtype=float), nan=0.0)


@dataclass(frozen=True)
class Solution:
    """Solved update: coefficients (0 where aliased), aliased mask, inverse information."""

    beta: np.ndarray
    aliased: np.ndarray
    inv_info: np.ndarray  # (X'WX)^-1 on kept columns, zeros elsewhere


def solve(xtwx: np.ndarray, xtwz: np.ndarray, tol: float = ALIAS_TOL) -> Solution:
    """Solve X'WX beta = X'Wz, setting aside columns that are (near) linear combinations of
    earlier ones (sequential pivoting in design order, on the correlation-scaled matrix)."""
    p = len(xtwz)
    d = np.sqrt(np.clip(np.diag(xtwx), 0.0, None))
    aliased = np.zeros(p, dtype=bool)
    kept: list[int] = []
    lower = np.zeros((p, p))
    scale = np.where(d > 0, d, 1.0)
    corr = xtwx / np.outer(scale, scale)
    for j in range(p):
        if d[j] <= 0 or not np.isfinite(d[j]):
            aliased[j] = True
            continue
        if kept:
            k = len(kept)
            y = linalg.solve_triangular(lower[:k, :k], corr[kept, j], lower=True)
            r = corr[j, j] - float(y @ y)
        else:
            y = np.zeros(0)
            r = corr[j, j]
        if r <= tol:
            aliased[j] = True
            continue
        k = len(kept)
        lower[k, :k] = y
        lower[k, k] = math.sqrt(r)
        kept.append(j)
    beta = np.zeros(p)
    inv_info = np.zeros((p, p))
    if kept:
        ck = corr[np.ix_(kept, kept)]
        cf = linalg.cho_factor(ck, lower=True)
        rhs = xtwz[kept] / scale[kept]
        beta[kept] = linalg.cho_solve(cf, rhs) / scale[kept]
        inv = linalg.cho_solve(cf, np.eye(len(kept)))
        inv_info[np.ix_(kept, kept)] = inv / np.outer(scale[kept], scale[kept])
    return Solution(beta=beta, aliased=aliased, inv_info=inv_info)


def condition_number(xtwx: np.ndarray, aliased: np.ndarray) -> float:
    """Condition number of the correlation-scaled X'WX on the kept columns (reported once
    per fit: an eigen-decomposition per iteration cost seconds at p ~ 600)."""
    kept = ~aliased
    if not kept.any():
        return math.nan
    sub = xtwx[np.ix_(kept, kept)]
    d = np.sqrt(np.diag(sub))
    ev = np.linalg.eigvalsh(sub / np.outer(d, d))
    return float(ev[-1] / ev[0]) if ev[0] > 0 else math.inf


def back_transform(design: Design) -> np.ndarray:
    """Matrix T with beta_original = T @ beta_standardized."""
    p = design.p
    t = np.eye(p)
    icpt = 0 if design.intercept else None
    for j, c in enumerate(design.columns):
        if c.value == 0:
            continue
        v = design.values[c.value]
        t[j, j] = 1.0 / v.scale
        if v.centered and icpt is not None:
            t[icpt, j] = -v.center / v.scale
    return t


def step_in_se(old: np.ndarray, new: np.ndarray, inv_info: np.ndarray, dispersion: float) -> float:
    """Largest coefficient change in units of its standard error (aliased columns skipped)."""
    var = np.diag(inv_info) * dispersion
    ok = var > 0
    if not ok.any():
        return 0.0
    return float(np.max(np.abs(new[ok] - old[ok]) / np.sqrt(var[ok])))


def dispersion(pearson: float, df_resid: float, fixed: bool) -> float:
    """The dispersion phi: 1 where the family fixes it (``fixed``), otherwise Pearson's
    chi-squared over the residual degrees of freedom (NaN when none are left)."""
    if fixed:
        return 1.0
    return pearson / df_resid if df_resid > 0 else math.nan


def relative_change(new: float, old: float) -> float:
    """|new - old| / (|new| + 0.1): the usual deviance convergence measure."""
    return abs(new - old) / (abs(new) + 0.1)


@dataclass(frozen=True)
class Inference:
    estimate: np.ndarray
    std_error: np.ndarray
    statistic: np.ndarray
    p_value: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    covariance: np.ndarray


def wald(
    beta: np.ndarray, cov: np.ndarray, aliased: np.ndarray, df: float | None, confidence: float
) -> Inference:
    """Wald statistics: z (df None) or t with ``df`` degrees of freedom."""
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    est = beta.astype(float).copy()
    est[aliased] = np.nan
    se = se.copy()
    se[aliased] = np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = est / se
    if df is None:
        pv = 2.0 * stats.norm.sf(np.abs(stat))
        q = stats.norm.ppf(0.5 + confidence / 2.0)
    else:
        dfp = max(df, 1e-12)
        pv = 2.0 * stats.t.sf(np.abs(stat), dfp)
        q = stats.t.ppf(0.5 + confidence / 2.0, dfp)
    cov = cov.copy()
    cov[aliased, :] = np.nan
    cov[:, aliased] = np.nan
    return Inference(est, se, stat, pv, est - q * se, est + q * se, cov)


def theta_step(
    theta: float, hist_y: np.ndarray, hist_c: np.ndarray, total_c: float, a: float, b: float
) -> float:
    """One safeguarded Newton step for the negative binomial theta at fixed means.

    Score: sum_y c_y [psi(y+theta) - psi(theta)] + C (ln theta + 1) - a; its derivative
    sum_y c_y [psi'(y+theta) - psi'(theta)] + C / theta - b. Steps are taken on log(theta)
    so theta stays positive.
    """
    score = float(hist_c @ (special.digamma(hist_y + theta) - special.digamma(theta)))
    score += total_c * (math.log(theta) + 1.0) - a
    hess = float(hist_c @ (special.polygamma(1, hist_y + theta) - special.polygamma(1, theta)))
    hess += total_c / theta - b
    # d/d(log theta): g = theta * score; H = theta^2 * hess + theta * score
    g = theta * score
    h = theta * theta * hess + g
    if not (math.isfinite(g) and math.isfinite(h)) or h >= 0:
        step = 0.5 if g > 0 else -0.5  # not concave here: move by a fixed factor
    else:
        step = -g / h
    step = max(min(step, 2.0), -2.0)
    return theta * math.exp(step)
