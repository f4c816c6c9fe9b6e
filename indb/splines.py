"""Restricted cubic splines: the knot positions and the basis functions as syntax trees.

Shared by the fit's queries (:mod:`indb.plan`) and the scoring SQL (:mod:`indb.writeback`),
so a model is scored with exactly the basis it was fitted on.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from indb import sqlexpr as S
from indb.sqlexpr import Expr

# Harrell's default knot quantiles for restricted cubic splines (common practice).
KNOT_QUANTILES = {
    3: (0.10, 0.50, 0.90),
    4: (0.05, 0.35, 0.65, 0.95),
    5: (0.05, 0.275, 0.50, 0.725, 0.95),
    6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
    7: (0.025, 0.1833, 0.3417, 0.50, 0.6583, 0.8167, 0.975),
}


def knot_quantiles(k: int) -> tuple[float, ...]:
    if k in KNOT_QUANTILES:
        return KNOT_QUANTILES[k]
    return tuple(float(q) for q in np.linspace(0.05, 0.95, k))


def spline_basis_sql(x: Expr, knots: Sequence[float], j: int) -> Expr:
    """Restricted cubic spline basis function j (1 <= j <= k-2), linear beyond the outer knots.

    Truncated-power form (Stone & Koo 1985; Harrell, *Regression Modeling Strategies*, 2.4.5),
    divided by (t_k - t_1)^2 so the basis has the scale of x.
    """
    t = list(knots)
    k = len(t)
    tj, tk1, tk = t[j - 1], t[k - 2], t[k - 1]

    def cube_plus(c: float) -> Expr:
        d = S.greatest(S.sub(x, S.num(c)), S.num(0.0))
        return S.mul(d, d, d)

    a = cube_plus(tj)
    b = S.mul(cube_plus(tk1), S.num((tk - tj) / (tk - tk1)))
    c = S.mul(cube_plus(tk), S.num((tk1 - tj) / (tk - tk1)))
    return S.div(S.add(S.sub(a, b), c), S.num((tk - t[0]) ** 2))


def spline_basis(x: np.ndarray, knots: Sequence[float], j: int) -> np.ndarray:
    """The numpy form of :func:`spline_basis_sql`: basis function j at the values ``x``
    (the same truncated-power form and divisor, for drawing a fitted spline's curve)."""
    t = [float(v) for v in knots]
    k = len(t)
    tj, tk1, tk = t[j - 1], t[k - 2], t[k - 1]
    x = np.asarray(x, dtype=float)

    def cube_plus(c: float) -> np.ndarray:
        return np.maximum(x - c, 0.0) ** 3

    a = cube_plus(tj)
    b = cube_plus(tk1) * ((tk - tj) / (tk - tk1))
    c = cube_plus(tk) * ((tk1 - tj) / (tk - tk1))
    return (a - b + c) / (tk - t[0]) ** 2
