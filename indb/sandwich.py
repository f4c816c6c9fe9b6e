"""Sandwich covariances of the coefficients: robust (HC0) and cluster-robust.

numpy/scipy only: the scans' sums in, a covariance out. With B the bread and M the meat,
the covariance of the estimates is B M B (times a factor). B is the inverse of minus the
log-likelihood's Hessian at the estimates, the *observed* information, which equals X'WX
for a canonical link; otherwise it is X'W_oX with the weights of
:func:`indb.plan.irls_scan.covariance_terms`. M sums outer products of scores:

* ``robust``: each row's, sum(f u^2 x x') (White 1980, "HC0": no small-sample factor);
* ``cluster``: each cluster's summed score, sum_g S_g S_g', times
  G / (G - 1) * (N - 1) / (N - K).

Both follow statsmodels' GLM (0.15) with ``cov_type="HC0"`` and ``cov_type="cluster"``
(its default ``use_correction=True``): its bread is the inverse of the observed Hessian
(``GLM.hessian``), its rows' scores carry frequency weights once (HC0 divides
``score_obs`` by the square root of ``freq_weights``: f copies of a row add f u^2 x x';
the cluster sums take them as they are), N counts the rows given, not their frequency
weights, and K the coefficients. The dispersion cancels: scores and Hessian are both
divided by the same estimate of it, so an estimated dispersion changes nothing here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from indb.cells import cell_columns, column_groups, level_codes
from indb.design import Design
from indb.normal_eq import Solution
from indb.solver import zero_nulls


@dataclass(frozen=True)
class Sandwich:
    """A sandwich covariance of the fit's (standardized) coefficients.

    ``covariance`` is p x p, zero at aliased columns; ``clusters`` the number of clusters
    (cluster kind); ``bread_note`` says why the bread fell back to X'WX, if it did."""

    covariance: np.ndarray
    clusters: int | None = None
    bread_note: str | None = None


def bread(sol: Solution, observed: sparse.sparray | None) -> tuple[np.ndarray, str | None]:
    """The inverse of the observed information on the kept columns (zero elsewhere), or of
    X'WX when ``observed`` is None (a canonical link) or singular there."""
    expected = sol.inv_info.dense()
    if observed is None:
        return expected, None
    kept = np.flatnonzero(~sol.aliased)
    h = sparse.csr_array(observed)[kept][:, kept].toarray()
    # scaled to a unit diagonal first, as the solve scales X'WX: the inverse then loses
    # digits to the correlations only, not to the columns' sizes
    d = np.sqrt(np.abs(np.diag(h)))
    d = np.where(d > 0, d, 1.0)
    try:
        inv = np.linalg.inv(h / np.outer(d, d)) / np.outer(d, d)
    except np.linalg.LinAlgError:
        inv = None
    if inv is None or not np.all(np.isfinite(inv)):
        return expected, (
            "the observed information is singular at the estimates, so the sandwich's "
            "bread is the inverse of X'WX (the expected information) instead"
        )
    out = np.zeros((sol.inv_info.p, sol.inv_info.p))
    out[np.ix_(kept, kept)] = inv
    return out, None


def covariance(b: np.ndarray, meat: np.ndarray, aliased: np.ndarray, factor: float) -> np.ndarray:
    """factor * B M B, with the meat's aliased rows and columns left out."""
    m = np.array(meat, dtype=float)
    m[aliased, :] = 0.0
    m[:, aliased] = 0.0
    cov = factor * (b @ m @ b)
    return 0.5 * (cov + cov.T)  # symmetric to the last bit


def cluster_factor(clusters: int, rows: int, rank: int) -> float:
    """G / (G - 1) * (N - 1) / (N - K): statsmodels' ``cov_cluster`` correction (N the rows,
    K the estimated coefficients; common practice, the CR1 of the literature)."""
    return clusters / (clusters - 1.0) * ((rows - 1.0) / (rows - rank))


def cluster_meat(design: Design, rows: dict[str, np.ndarray]) -> tuple[np.ndarray, int]:
    """The meat sum_g S_g S_g' (p x p) and the number of clusters from the rows of
    :func:`indb.plan.cluster_scan.cluster_query`.

    Each row is a pair of cells (c, c') with c_a_b = sum over clusters of T_gc[a] T_gc'[b]
    for value indices a <= b. The meat's block between column groups g and h (values
    v_g, v_h) gets c_{v_g}_{v_h} at (column of c in g, column of c' in h) where v_g <= v_h;
    the pairs with v_g > v_h are the transposes of those with v_g < v_h (the pair (c', c)
    carries them), so the meat is B + B' + C, B the blocks with v_g < v_h and C those with
    v_g = v_h.
    """
    p = design.p
    n = len(rows["clusters"])
    clusters = int(np.nanmax(np.asarray(rows["clusters"], dtype=float))) if n else 0
    groups = column_groups(design)
    if design.factors:
        left = cell_columns(
            design,
            [
                level_codes(f.levels, np.asarray(rows[f"l{i}"]))
                for i, f in enumerate(design.factors)
            ],
        )
        right = cell_columns(
            design,
            [
                level_codes(f.levels, np.asarray(rows[f"r{i}"]))
                for i, f in enumerate(design.factors)
            ],
        )
    else:
        left = right = [np.full(n, g.columns[0], dtype=np.int64) for g in groups]
    below = np.zeros(p * p)  # B, flattened
    level = np.zeros(p * p)  # C
    for ga, g in enumerate(groups):
        for gb, h in enumerate(groups):
            if g.value > h.value:
                continue
            i, j = left[ga], right[gb]
            hit = (i >= 0) & (j >= 0)
            s = zero_nulls(rows[f"c_{g.value}_{h.value}"])[hit]
            target = level if g.value == h.value else below
            target += np.bincount(i[hit] * p + j[hit], weights=s, minlength=p * p)
    b = below.reshape(p, p)
    return b + b.T + level.reshape(p, p), clusters
