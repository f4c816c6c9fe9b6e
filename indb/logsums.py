"""Solver side of the log-link scan (:func:`indb.plan.log_scan.log_scan_query`): numpy only.

With a log link, V(mu) = mu^p and factor terms that shift eta by a constant g_c per cell,
mu = e^(g_c) m with m = e^t for the rest of eta, t = off + x'b. Every per-row weight of an
IRLS step is then a power of m times the same power of e^(g_c) for the whole cell, so the
scan sums powers of m per cell and the cell factors are multiplied in here:

* X'WX: w = pw mu^(2-p), so its per-cell sums are e^((2-p) g_c) G_c with
  G_c[a, b] = sum(f pw m^(2-p) v_a v_b);
* X'Wz: z = (eta - off) + (y - mu) / mu gives, per cell,
  e^((2-p) g_c) [G_c b + g_c G_c[0] - G_c[0]] + e^((1-p) g_c) R_c with
  R_c[a] = sum(f pw y m^(1-p) v_a);
* the deviance from d(y, mu) = h(y) + a(mu) y + b(mu) (the split :mod:`indb.families`
  states for each family), and Pearson's chi-squared from sum(f pw y^2 m^(-p)), R_c[0]
  and G_c[0, 0].

For Poisson (p = 1) R_c and for gamma (p = 2) G_c do not depend on the coefficients: the
first scan's values are kept (:class:`LogCache`) and later scans leave those sums out.
Splitting the deviance into sums cancels digits when the model fits very closely; the
IRLS loop (:mod:`indb.irls`) checks :attr:`LogSums.digits_lost` and returns to per-row
deviances past a limit.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from indb.cells import cell_columns, column_groups
from indb.design import Design
from indb.solver import Sums, assemble, chord, in_cell_order, zero_nulls

#: digits the split deviance or Pearson sum may lose before the fitter stops using it
#: (relative error about 10^(digits - 16); 10^-10 still leaves the convergence test, at a
#: relative 1e-8 by default, two digits to spare)
MAX_DIGITS_LOST = 6.0


#: plan.log_scan.log_scan_query's constant sums (offsets enter as u = off - the offset's mean)
CONSTANTS = ("h", "cy", "cw", "co", "cp", "n1", "n2", "noff")


@dataclass(frozen=True)
class LogCache:
    """What the first log-link scan found that later scans need not sum again."""

    keys: tuple[np.ndarray, ...]  # the cells' level codes per factor, in cell order
    gram: dict[str, np.ndarray]  # s_a_b per cell (kept for gamma: constant there)
    resp: dict[str, np.ndarray]  # r_a per cell (kept for Poisson: constant there)
    consts: dict[str, float]  # CONSTANTS (see plan.log_scan.log_scan_query)
    off_center: float  # the c of u = off - c in those sums


@dataclass(frozen=True)
class LogSums:
    """A log-link scan turned into the sums of an IRLS step, and its cache."""

    sums: Sums
    cache: LogCache
    #: decimal digits the split deviance or Pearson sum lost to cancellation
    digits_lost: float


def scan_parts(p: float, cache: LogCache | None) -> tuple[bool, bool, bool]:
    """Which sums the next scan needs: (gram, response, constants)."""
    if cache is None:
        return True, True, True
    return p != 2.0, p != 1.0, False


def assemble_log_scan(
    design: Design,
    cells: dict[str, np.ndarray],
    beta: np.ndarray,
    p: float,
    cache: LogCache | None,
    off_center: float = 0.0,
    hessian: sparse.csr_array | None = None,
) -> LogSums:
    """X'WX, X'Wz, deviance and Pearson chi-squared at ``beta`` from one log-link scan
    (``off_center``: the c the first scan's constants took the offset about).

    With ``hessian`` the scan summed only the first row of each cell's G_c (its
    ``gradient_only`` form): X'WX is then ``hessian`` and X'Wz is ``hessian`` b + X'W(z -
    eta), so that the solved update is b + hessian^-1 times the gradient (a chord step)."""
    cells, codes = in_cell_order(design, cells)
    keys = tuple(codes)
    m = len(design.values)
    pairs = [(a, b) for a in range(m) for b in range(a, m)]
    pairs_read = [(0, b) for b in range(m)] if hessian is not None else pairs
    if cache is None:
        cache = LogCache(
            keys=keys,
            gram={f"s_{a}_{b}": zero_nulls(cells[f"s_{a}_{b}"]) for a, b in pairs_read},
            resp={f"r_{a}": zero_nulls(cells[f"r_{a}"]) for a in range(m)},
            consts=_constants(cells),
            off_center=off_center,
        )
    elif len(keys) != len(cache.keys) or not all(
        np.array_equal(a, b) for a, b in zip(keys, cache.keys, strict=True)
    ):
        raise ValueError("the cells of this scan differ from the first scan's")
    if "s_0_0" in cells:
        gram = {f"s_{a}_{b}": zero_nulls(cells[f"s_{a}_{b}"]) for a, b in pairs_read}
    else:
        gram = cache.gram
    resp = cache.resp if "r_0" not in cells else {k: zero_nulls(cells[k]) for k in cache.resp}
    nc = len(cells["n"])
    G = np.zeros((nc, m, m))
    for a, b in pairs_read:
        G[:, a, b] = G[:, b, a] = gram[f"s_{a}_{b}"]
    R = np.column_stack([resp[f"r_{a}"] for a in range(m)]) if m else np.zeros((nc, 0))

    gam, bnum = _split_beta(design, codes, nc, beta)
    with np.errstate(over="ignore", invalid="ignore"):
        e2, e1, e0 = (np.exp(k * gam) for k in (2.0 - p, 1.0 - p, -p))
        g0 = G[:, 0, :]
        if hessian is None:
            t = e2[:, None] * (np.einsum("cab,b->ca", G, bnum) + (gam[:, None] - 1.0) * g0)
            t += e1[:, None] * R
        else:  # the gradient X'W(z - eta): W (z - eta) = pw (y mu^(1-p) - mu^(2-p))
            t = e1[:, None] * R - e2[:, None] * g0
        pear_terms = np.array(
            [
                (e0 * zero_nulls(cells["pq"])).sum(),
                -2.0 * (e1 * R[:, 0]).sum(),
                (e2 * G[:, 0, 0]).sum(),
            ]
        )
        # t = u + (b_0 + c) + sum_a b_a v_a: the intercept's share taken about c too
        bshift = bnum.copy()
        if m:
            bshift[0] += cache.off_center
        dev_terms = _deviance_terms(p, cache.consts, gam, bshift, e1, e2, G, R)
    scaled: dict[str, np.ndarray] = {f.alias: cells[f.alias] for f in design.factors}
    if hessian is None:  # else the scan summed no X'WX to scale
        for a, b in pairs:
            scaled[f"s_{a}_{b}"] = e2 * G[:, a, b]
    for a in range(m):
        scaled[f"t_{a}"] = t[:, a]
    zero = np.zeros(nc)
    scaled.update(dev=zero, pear=zero, bad=zero_nulls(cells["bad"]), n=cells["n"], nw=cells["nw"])
    sums = assemble(design, scaled, codes=codes, gram=hessian is None)
    if hessian is not None:
        sums = chord(sums, hessian, beta)
    deviance, pearson = float(dev_terms.sum()), float(pear_terms.sum())
    finite = (
        all(math.isfinite(x) for x in (deviance, pearson))
        and np.isfinite(sums.xtwx.data).all()
        and np.isfinite(sums.xtwz).all()
    )
    sums = dataclasses.replace(
        sums, deviance=deviance, pearson=pearson, bad=sums.bad + (0 if finite else 1)
    )
    return LogSums(
        sums=sums,
        cache=cache,
        digits_lost=max(_lost(dev_terms, deviance), _lost(pear_terms, pearson)) if finite else 0.0,
    )


def _constants(cells: dict[str, np.ndarray]) -> dict[str, float]:
    """The first scan's constant sums; without an offset the scan leaves out those that
    only an offset makes differ: co = cp = noff = 0, n1 = cy, n2 = cw."""
    out = {k: float(zero_nulls(cells[k]).sum()) for k in CONSTANTS if k in cells}
    if "n1" not in out:
        out.update(co=0.0, cp=0.0, noff=0.0, n1=out["cy"], n2=out["cw"])
    return out


def _split_beta(
    design: Design, codes: list[np.ndarray], nc: int, beta: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per cell the summed factor coefficients g_c, and the coefficient of each value
    (``codes``: the cells' level codes per factor)."""
    gam = np.zeros(nc)
    bnum = np.zeros(len(design.values))
    groups = column_groups(design)
    where = cell_columns(design, codes) if design.factors else []
    for g_i, g in enumerate(groups):
        if not g.factors:
            for j in g.columns:
                bnum[g.value] += float(beta[j])
            continue
        col = where[g_i]
        hit = col >= 0
        gam[hit] += beta[col[hit]]
    return gam, bnum


def _deviance_terms(
    p: float,
    consts: dict[str, float],
    gam: np.ndarray,
    bshift: np.ndarray,
    e1: np.ndarray,
    e2: np.ndarray,
    G: np.ndarray,
    R: np.ndarray,
) -> np.ndarray:
    """The deviance as sum(f pw h(y)) + sum(f pw y a(mu)) + sum(f pw b(mu)), as the list of
    terms that add up to it (their sizes against the total say how many digits it lost).

    a and b for V(mu) = mu^p (McCullagh & Nelder, table 2.1): p = 1: a = -2 ln mu,
    b = 2 mu; p = 2: a = 2 / mu, b = 2 ln mu; otherwise a = -2 mu^(1-p) / (1-p),
    b = 2 mu^(2-p) / (2-p). ln mu = g_c + t, and the sums of t are linear in the
    coefficients: sum(f pw y t) = sum(f pw y u) + b' sum_c R_c (p = 1, where
    R_c = sum(f pw y v)) and sum(f pw t) = sum(f pw u) + b' sum_c G_c[0] (p = 2), with the
    intercept's coefficient shifted by the offset's centre (``bshift``).
    """
    h = consts["h"]
    if p == 1.0:
        return np.array(
            [
                h,
                -2.0 * float((gam * R[:, 0]).sum()),
                -2.0 * consts["co"],
                *(-2.0 * bshift * R.sum(axis=0)),
                2.0 * float((e2 * G[:, 0, 0]).sum()),
            ]
        )
    if p == 2.0:
        return np.array(
            [
                h,
                2.0 * float((e1 * R[:, 0]).sum()),
                2.0 * float((gam * G[:, 0, 0]).sum()),
                2.0 * consts["cp"],
                *(2.0 * bshift * G[:, 0, :].sum(axis=0)),
            ]
        )
    return np.array(
        [
            h,
            -2.0 * float((e1 * R[:, 0]).sum()) / (1.0 - p),
            2.0 * float((e2 * G[:, 0, 0]).sum()) / (2.0 - p),
        ]
    )


def _lost(terms: np.ndarray, total: float) -> float:
    """Decimal digits lost when ``terms`` add up to ``total``."""
    size = float(np.abs(terms).sum())
    if size == 0.0:
        return 0.0
    if total == 0.0:
        return 16.0
    return max(0.0, math.log10(size / abs(total)))


def null_model(p: float, cache: LogCache) -> tuple[float, float]:
    """The intercept-only model with the offset, in closed form: its intercept b0 and
    deviance (NaN when an offset lies too far from the others for the sums).

    With u = off - c the score equation sum(f pw (y - mu) mu^(1-p)) = 0, mu = e^(b + u)
    for b = b0 + c, gives e^b = sum(f pw y e^((1-p) u)) / sum(f pw e^((2-p) u)) (the
    weighted mean response when there is no offset); the deviance follows from the split
    above."""
    consts = cache.consts
    n1, n2 = consts["n1"], consts["n2"]
    if consts["noff"] > 0 or not (n1 > 0 and n2 > 0):
        return math.nan, math.nan
    b = math.log(n1 / n2)
    h, y, w = consts["h"], consts["cy"], consts["cw"]
    if p == 1.0:
        dev = h - 2.0 * (b * y + consts["co"]) + 2.0 * math.exp(b) * n2
    elif p == 2.0:
        dev = h + 2.0 * math.exp(-b) * n1 + 2.0 * (b * w + consts["cp"])
    else:
        dev = h - 2.0 * math.exp((1.0 - p) * b) * n1 / (1.0 - p)
        dev += 2.0 * math.exp((2.0 - p) * b) * n2 / (2.0 - p)
    return b - cache.off_center, dev
