"""Numerical core: assemble X'WX from grouped sums, solve the IRLS update, derive inference.

numpy/scipy only: sufficient statistics in, numbers out. No I/O, no printing. X'WX is a
sparse matrix (its categorical blocks are diagonal within a factor and sparse between
factors); :mod:`indb.normal_eq` solves it through that structure.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import sparse, special
from scipy.sparse import linalg as splinalg

from indb.cells import ColumnGroup, cell_columns, column_groups, level_codes
from indb.design import Design
from indb.errors import SpecError
from indb.normal_eq import (
    ALIAS_TOL,
    MAX_REST_COLUMNS,
    InverseInfo,
    Solution,
    condition_number,
    solve,
)
from indb.plan.irls_scan import COVARIANCE_SUMS, MAX_CELL_JOIN

__all__ = [
    "ALIAS_TOL",
    "InverseInfo",
    "Solution",
    "Sums",
    "assemble",
    "back_transform",
    "check_size",
    "condition_number",
    "dispersion",
    "in_cell_order",
    "mapped_covariance",
    "original_scale",
    "solve",
    "standardize",
    "step_in_se",
    "wald",
    "zero_nulls",
]


@dataclass(frozen=True)
class Sums:
    """Totals of one IRLS scan, assembled into matrices (X'WX sparse, symmetric)."""

    xtwx: sparse.csr_array
    xtwz: np.ndarray
    deviance: float
    pearson: float
    bad: int
    n: int
    n_weighted: float
    extras: dict[str, float]
    cells: int
    cell_keys: list[tuple[str, ...]] | None = None
    #: the covariance matrices the scan carried (``plan.irls_scan.COVARIANCE_SUMS``):
    #: ``meat`` (the robust meat) and ``observed`` (the observed information), as X'WX
    matrices: dict[str, sparse.csr_array] = field(default_factory=dict)


def check_size(design: Design) -> None:
    """Refuse, before any IRLS scan, a design whose columns outside its largest categorical
    term exceed :data:`~indb.normal_eq.MAX_REST_COLUMNS`: those are solved as a dense
    matrix (the largest term costs only a vector; see :mod:`indb.normal_eq`)."""
    groups = [g for g in column_groups(design) if g.factors]
    largest = max(groups, key=lambda g: len(g.columns), default=None)
    rest = design.p - (len(largest.columns) if largest is not None else 0)
    if rest <= MAX_REST_COLUMNS:
        return
    others = sorted(
        (g for g in groups if g is not largest), key=lambda g: len(g.columns), reverse=True
    )
    shown = ", ".join(
        f"{_term_name(design, g)} ({len(g.columns):,})" for g in [largest, *others][:4] if g
    )
    raise SpecError(
        f"the design has {design.p:,} coefficients, {rest:,} of them outside its largest "
        f"categorical term; indb solves those as a dense matrix and takes at most "
        f"{MAX_REST_COLUMNS:,} (one categorical column may have up to max_levels levels, the "
        f"others together {MAX_REST_COLUMNS:,} coefficients). Largest terms: {shown}. Group "
        "rare levels of the other categorical columns in the query, or leave some out"
    )


def _term_name(design: Design, g: ColumnGroup) -> str:
    term = design.columns[g.columns[0]].term
    return repr(term.split("=")[0] if "=" in term else term)


def in_cell_order(
    design: Design, cells: dict[str, np.ndarray]
) -> tuple[dict[str, np.ndarray], list[np.ndarray]]:
    """The grouped rows sorted by cell, and each factor's level codes in that order.

    Engines return groups in any order (DuckDB's order varies with thread timing), and
    floating-point sums over them must not, so that the same data give the same bits."""
    if not design.factors:
        return cells, []
    codes = [level_codes(f.levels, np.asarray(cells[f.alias])) for f in design.factors]
    if len(cells["n"]) < 2:
        return cells, codes
    sizes = [int(c.max()) + 1 for c in codes]
    if math.prod(sizes) < 2**62:  # one mixed-radix key: one argsort instead of a lexsort
        key = np.zeros(len(codes[0]), dtype=np.int64)
        for c, size in zip(codes, sizes, strict=True):
            key = key * size + c
        if (np.diff(key) > 0).all():
            return cells, codes
        order = np.argsort(key, kind="stable")
    else:
        order = np.lexsort(codes[::-1])
    return {k: np.asarray(v)[order] for k, v in cells.items()}, [c[order] for c in codes]


def assemble(
    design: Design,
    cells: dict[str, np.ndarray],
    extra: tuple[str, ...] = (),
    codes: list[np.ndarray] | None = None,
    gram: bool = True,
) -> Sums:
    """Build X'WX (sparse) and X'Wz (standardized design) from per-cell sums of the IRLS
    scan: each cell adds its sums to the design columns it belongs to, one entry per pair
    of column groups (never a cells x p indicator matrix).

    ``codes``: the cells' level codes when ``cells`` are already in cell order (as
    :func:`in_cell_order` returns them). ``gram=False``: the scan summed no X'WX (a
    gradient-only scan, :func:`chord`); X'WX is left empty."""
    if codes is None:
        cells, codes = in_cell_order(design, cells)
    rows = len(cells["n"])
    p = design.p
    groups = column_groups(design)
    where = (
        cell_columns(design, codes)
        if design.factors
        else [np.full(rows, g.columns[0], dtype=np.int64) for g in groups]
    )
    xtwz = np.zeros(p)
    for ga, g in enumerate(groups):
        ia = where[ga]
        has_a = ia >= 0
        xtwz += np.bincount(
            ia[has_a], weights=zero_nulls(cells[f"t_{g.value}"])[has_a], minlength=p
        )
    matrices = {
        name: cell_matrix(design, cells, where, prefix)
        for name, (prefix, _) in COVARIANCE_SUMS.items()
        if f"{prefix}_0_0" in cells
    }
    return Sums(
        xtwx=cell_matrix(design, cells, where, "s") if gram else sparse.csr_array((p, p)),
        xtwz=xtwz,
        deviance=float(zero_nulls(cells["dev"]).sum()),
        pearson=float(zero_nulls(cells["pear"]).sum()),
        bad=int(zero_nulls(cells["bad"]).sum()),
        n=int(zero_nulls(cells["n"]).sum()),
        n_weighted=float(zero_nulls(cells["nw"]).sum()),
        extras={k: float(zero_nulls(cells[k]).sum()) for k in extra},
        cells=rows,
        # the next scan joins a table of the cells' effects when there are few enough
        # (plan.irls_scan.MAX_CELL_JOIN), one table per factor set otherwise
        cell_keys=(
            list(zip(*(cells[f.alias].tolist() for f in design.factors), strict=True))
            if design.factors and rows <= MAX_CELL_JOIN
            else None
        ),
        matrices=matrices,
    )


def chord(sums: Sums, hessian: sparse.csr_array, beta: np.ndarray) -> Sums:
    """A gradient-only scan at ``beta`` (its X'Wz holding the gradient X'W(z - eta)) as the
    sums of a step: X'WX is ``hessian`` and X'Wz is ``hessian`` b + the gradient, so that
    the solved update is the chord step b + hessian^-1 X'W(z - eta)."""
    return replace(sums, xtwx=hessian, xtwz=hessian @ beta + sums.xtwz)


def cell_matrix(
    design: Design, cells: dict[str, np.ndarray], where: list[np.ndarray], prefix: str
) -> sparse.csr_array:
    """A symmetric matrix in X'WX's form from the per-cell sums ``prefix_a_b`` (a <= b the
    values' indices), ``where`` each column group's column per cell."""
    p = design.p
    groups = column_groups(design)
    parts_i: list[np.ndarray] = []
    parts_j: list[np.ndarray] = []
    parts_v: list[np.ndarray] = []
    for ga, g in enumerate(groups):
        ia = where[ga]
        for gb in range(ga, len(groups)):
            h = groups[gb]
            ib = where[gb]
            lo, hi = min(g.value, h.value), max(g.value, h.value)
            s = zero_nulls(cells[f"{prefix}_{lo}_{hi}"])
            i, j, v = _block_entries(g, h, ia, ib, s, p)
            parts_i.append(i)
            parts_j.append(j)
            parts_v.append(v)
            if ga != gb:
                parts_i.append(j)
                parts_j.append(i)
                parts_v.append(v)
    return sparse.coo_array(
        (np.concatenate(parts_v), (np.concatenate(parts_i), np.concatenate(parts_j))),
        shape=(p, p),
    ).tocsr()  # sums the duplicates


def _block_entries(
    g: ColumnGroup, h: ColumnGroup, ia: np.ndarray, ib: np.ndarray, s: np.ndarray, p: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The entries (i, j, value) the cells give the block of X'WX between column groups
    ``g`` and ``h`` (``ia``, ``ib``: each cell's column in them, -1 for none).

    When one side is a single column (no factors) or both have the same factors, a cell's
    position follows from one side's column: those blocks are summed per column here, so
    they reach the sparse matrix as at most p entries. Blocks between different factors
    keep one entry per cell (the sparse matrix sums duplicates)."""
    both = (ia >= 0) & (ib >= 0)
    i, j, v = ia[both], ib[both], s[both]
    if g.factors and h.factors and g.factors != h.factors:
        return i, j, v
    key, other = (i, j) if g.factors else (j, i)
    sums = np.bincount(key, weights=v, minlength=p)
    hit = np.flatnonzero(np.bincount(key, minlength=p))
    partner = np.zeros(p, dtype=np.int64)
    partner[key] = other
    if key is i:
        return hit, partner[hit], sums[hit]
    return partner[hit], hit, sums[hit]


def zero_nulls(a: np.ndarray) -> np.ndarray:
    """A fetched column of sums as floats, with NULL (a SUM over no rows) as 0."""
    return np.nan_to_num(np.asarray(a, dtype=float), nan=0.0)


def back_transform(design: Design) -> sparse.csr_array:
    """Matrix T with beta_original = T @ beta_standardized (sparse: the identity, 1 / scale
    on the diagonal of numeric columns, and the centred columns' shifts in the intercept's
    row)."""
    p = design.p
    diag = np.ones(p)
    rows: list[int] = []
    cols: list[int] = []
    vals: list[float] = []
    icpt = 0 if design.intercept else None
    for j, c in enumerate(design.columns):
        if c.value == 0:
            continue
        v = design.values[c.value]
        diag[j] = 1.0 / v.scale
        if v.centered and icpt is not None:
            rows.append(icpt)
            cols.append(j)
            vals.append(-v.center / v.scale)
    t = sparse.coo_array((vals, (rows, cols)), shape=(p, p)) + sparse.diags_array(diag)
    return t.tocsr()


def standardize(design: Design, beta: np.ndarray) -> np.ndarray:
    """Coefficients on the original scale to the standardized design's (T^-1 beta)."""
    # T is upper triangular (the intercept's row is the first) with a non-zero diagonal
    t = back_transform(design)
    return splinalg.spsolve_triangular(t, np.asarray(beta, float), lower=False)


def original_scale(
    inv: InverseInfo, t: sparse.csr_array, dispersion: float, full: bool
) -> tuple[np.ndarray, np.ndarray | None]:
    """Variances of the original-scale coefficients T beta, diag(phi T V T'), and with
    ``full`` the whole covariance phi T V T' (p x p: callers keep p small)."""
    if full:
        v = inv.dense()
        cov = dispersion * (t @ (t @ v).T).T
        return np.diag(cov).copy(), cov
    var = np.zeros(t.shape[0])
    nnz = np.diff(t.indptr)
    single = np.flatnonzero(nnz <= 1)
    diag_v = inv.diagonal()
    var[single] = t.diagonal()[single] ** 2 * diag_v[single]
    for i in np.flatnonzero(nnz > 1):  # the intercept's row: it and the centred columns
        lo, hi = t.indptr[i], t.indptr[i + 1]
        idx, w = t.indices[lo:hi], t.data[lo:hi]
        var[i] = float(w @ inv.block(idx) @ w)
    return dispersion * var, None


def mapped_covariance(cov: np.ndarray, t: sparse.csr_array) -> tuple[np.ndarray, np.ndarray]:
    """Variances and covariance of T beta from the covariance ``cov`` of beta (p x p)."""
    out = np.asarray(t @ (t @ cov).T).T
    out = 0.5 * (out + out.T)
    return np.diag(out).copy(), out


def step_in_se(old: np.ndarray, new: np.ndarray, inv_info: InverseInfo, dispersion: float) -> float:
    """Largest coefficient change in units of its standard error (aliased columns skipped)."""
    var = inv_info.diagonal() * dispersion
    ok = var > 0
    if not ok.any():
        return 0.0
    return float(np.max(np.abs(new[ok] - old[ok]) / np.sqrt(var[ok])))


#: the contraction rate below which a linearly converging tail is summed (see tail_factor)
TAIL_RATE_MAX = 0.9
#: how parallel (|cosine|, in standard-error units) two successive steps must be
TAIL_ALIGNED = 0.99


def tail_factor(step: np.ndarray, previous: np.ndarray | None, inv_info: InverseInfo) -> float:
    """How much of ``step`` to take so that the steps still to come are taken too.

    Fisher scoring on a non-canonical link converges linearly: near the optimum each step
    is the previous one times the rate r of the iteration's dominant direction, so the
    steps left after ``step`` add up to step r / (1 - r) (Aitken's delta-squared
    extrapolation, in vector form). With r estimated from two successive steps that point
    along one line (|cosine| >= :data:`TAIL_ALIGNED` in standard-error units) and
    |r| <= :data:`TAIL_RATE_MAX`, the factor is 1 / (1 - r); otherwise, and where Newton's
    quadratic convergence leaves r near 0, it is 1 (the step itself).
    """
    if previous is None:
        return 1.0
    var = inv_info.diagonal()
    ok = var > 0
    if not ok.any():
        return 1.0
    scale = np.sqrt(var[ok])
    s, p = step[ok] / scale, previous[ok] / scale
    ps, pp, ss = float(p @ s), float(p @ p), float(s @ s)
    if not (pp > 0 and ss > 0) or abs(ps) < TAIL_ALIGNED * math.sqrt(pp * ss):
        return 1.0
    rate = ps / pp
    if not abs(rate) <= TAIL_RATE_MAX:
        return 1.0
    return 1.0 / (1.0 - rate)


def dispersion(pearson: float, residual_df: float, fixed: bool) -> float:
    """The dispersion phi: 1 where the family fixes it (``fixed``), otherwise Pearson's
    chi-squared over the residual degrees of freedom (NaN when none are left)."""
    if fixed:
        return 1.0
    return pearson / residual_df if residual_df > 0 else math.nan


def relative_change(new: float, old: float) -> float:
    """|new - old| / (|new| + 0.1): the usual deviance convergence measure."""
    return abs(new - old) / (abs(new) + 0.1)


@dataclass(frozen=True)
class Inference:
    estimate: np.ndarray
    std_error: np.ndarray
    wald: np.ndarray
    p_two_sided: np.ndarray
    lower_bound: np.ndarray
    upper_bound: np.ndarray
    covariance: np.ndarray | None


def wald(
    beta: np.ndarray,
    variance: np.ndarray,
    aliased: np.ndarray,
    df: float | None,
    confidence: float,
    cov: np.ndarray | None = None,
) -> Inference:
    """Wald statistics: z (df None) or t with ``df`` degrees of freedom, from the
    coefficients' variances (``cov``, when given, is passed on with NaN at aliased ones)."""
    # imported here: scipy.stats takes a third of a second to import, which every command
    # (indb --help too) paid when it was imported with this module
    from scipy import stats

    se = np.sqrt(np.clip(np.asarray(variance, float), 0.0, None))
    est = beta.astype(float).copy()
    est[aliased] = np.nan
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
    if cov is not None:
        cov = cov.copy()
        cov[aliased, :] = np.nan
        cov[:, aliased] = np.nan
    return Inference(est, se, stat, pv, est - q * se, est + q * se, cov)


def theta_score(
    theta: float, hist_y: np.ndarray, hist_c: np.ndarray, total_c: float, a: float, b: float
) -> tuple[float, float]:
    """The profile log-likelihood's derivative in theta at fixed means, and its second
    derivative (see :func:`theta_step` for the sums); minus the second is theta's observed
    information, whose inverse square root is theta's standard error."""
    score = float(hist_c @ (special.digamma(hist_y + theta) - special.digamma(theta)))
    score += total_c * (math.log(theta) + 1.0) - a
    hess = float(hist_c @ (special.polygamma(1, hist_y + theta) - special.polygamma(1, theta)))
    hess += total_c / theta - b
    return score, hess


def theta_step(
    theta: float, hist_y: np.ndarray, hist_c: np.ndarray, total_c: float, a: float, b: float
) -> float:
    """One safeguarded Newton step for the negative binomial theta at fixed means.

    Score: sum_y c_y [psi(y+theta) - psi(theta)] + C (ln theta + 1) - a; its derivative
    sum_y c_y [psi'(y+theta) - psi'(theta)] + C / theta - b. Steps are taken on log(theta)
    so theta stays positive.
    """
    score, hess = theta_score(theta, hist_y, hist_c, total_c, a, b)
    # d/d(log theta): g = theta * score; H = theta^2 * hess + theta * score
    g = theta * score
    h = theta * theta * hess + g
    if not (math.isfinite(g) and math.isfinite(h)) or h >= 0:
        # not concave here: move by a fixed factor, a bigger one far out in the Poisson
        # limit, where only the overdispersion check (theta past 1e8) ends the walk
        size = 2.0 if theta >= 1e4 else 0.5
        step = size if g > 0 else -size
    else:
        step = -g / h
    step = max(min(step, 2.0), -2.0)
    return theta * math.exp(step)
