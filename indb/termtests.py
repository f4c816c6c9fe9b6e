"""Whole-term figures from the coefficients' covariance, with no scan: a Wald test of each
model term (all its columns at once) and the generalized variance-inflation factor of Fox
and Monette (1992, *JASA* 87, 178-183).

A term is the set of coefficients that come from the same source columns: a numeric
column, all non-reference levels of a categorical, an interaction's block, a spline's
basis columns. numpy/scipy only.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from indb.results import Coefficient, Collinearity, TermTest


def term_blocks(coefs: Sequence[Coefficient]) -> dict[str, list[int]]:
    """Positions of the estimated (not aliased) coefficients of each term, in design order;
    the intercept is no term. Keyed by the term's name: its columns joined by ``&``."""
    blocks: dict[str, list[int]] = {}
    for j, c in enumerate(coefs):
        if not c.columns:
            continue
        name = " & ".join(c.columns)
        blocks.setdefault(name, [])
        if not c.aliased:
            blocks[name].append(j)
    return blocks


def _correlation(coefs: Sequence[Coefficient], cov: np.ndarray | None) -> tuple:
    """(z, R): estimates over standard errors and the correlation matrix of the estimates.
    Both are free of the units (a covariance of 1e-300 scale stays exact here)."""
    b = np.array([c.estimate for c in coefs], dtype=float)
    se = np.array([c.std_error for c in coefs], dtype=float)
    if cov is None:
        return b / se, None
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        corr = cov / se[:, None] / se[None, :]
    return b / se, corr


def term_tests(coefs: Sequence[Coefficient], cov: np.ndarray | None) -> tuple[TermTest, ...]:
    """The Wald chi-square of each term: b' V^-1 b over its block, on as many df as it has
    estimated coefficients, with its chi-square tail probability (the covariance is the
    fit's, so an estimated dispersion is in it). NaN without a covariance."""
    from scipy import stats

    z, corr = _correlation(coefs, cov)
    out = []
    for name, idx in term_blocks(coefs).items():
        df = len(idx)
        chi2 = math.nan
        if df and corr is not None:
            block = corr[np.ix_(idx, idx)]
            zb = z[idx]
            if np.all(np.isfinite(block)) and np.all(np.isfinite(zb)):
                try:
                    chi2 = float(zb @ np.linalg.solve(block, zb))
                except np.linalg.LinAlgError:
                    chi2 = math.nan
        p = float(stats.chi2.sf(chi2, df)) if df and math.isfinite(chi2) else math.nan
        out.append(TermTest(term=name, df=df, wald_chi2=chi2, p_value=p))
    return tuple(out)


def collinearity(coefs: Sequence[Coefficient], cov: np.ndarray | None) -> tuple[Collinearity, ...]:
    """The generalized VIF of each term: det(R_JJ) det(R_KK) / det(R), R the correlation
    matrix of the estimated coefficients other than the intercept, J the term's block and
    K the rest, computed as det(R_JJ) det((R^-1)_JJ) (one inverse for all terms);
    reported with GVIF^(1/(2 df)), comparable across terms of different df. For a
    one-column term it is the classical VIF."""
    _, corr = _correlation(coefs, cov)
    blocks = term_blocks(coefs)
    keep = [j for idx in blocks.values() for j in idx]
    at = {j: k for k, j in enumerate(keep)}
    inverse = None
    if corr is not None and keep:
        full = corr[np.ix_(keep, keep)]
        if np.all(np.isfinite(full)):
            try:
                inverse = np.linalg.inv(full)
            except np.linalg.LinAlgError:
                inverse = None
    out = []
    for name, idx in blocks.items():
        df = len(idx)
        gvif = math.nan
        if inverse is not None and df:
            where = [at[j] for j in idx]
            s1, l1 = np.linalg.slogdet(full[np.ix_(where, where)])
            s2, l2 = np.linalg.slogdet(inverse[np.ix_(where, where)])
            if s1 > 0 and s2 > 0:
                gvif = math.exp(l1 + l2)
        scaled = gvif ** (1.0 / (2 * df)) if df and math.isfinite(gvif) else math.nan
        out.append(Collinearity(term=name, df=df, gvif=gvif, gvif_scaled=scaled))
    return tuple(out)
