"""Shared helpers for the unit tests: evaluate indb's per-row SQL forms on a real DuckDB.

The grid goes in as a ``VALUES`` list of double literals (``sqlexpr.num`` writes every double
so it round-trips exactly); the expressions are rendered by the engine's own dialect and the
results fetched as numpy arrays, in grid order. The queries read no table and write nothing,
so one in-memory DuckDB opened through the public :func:`indb.connect` serves every call
(opening one costs ~30 ms, which per call would be most of the unit tests' time).
"""

from __future__ import annotations

import atexit
import functools
from collections.abc import Callable, Mapping

import numpy as np
from sqlglot import exp

import indb
from indb import sqlexpr as S


@functools.cache
def _engine() -> indb.Engine:
    engine = indb.connect()
    atexit.register(engine.close)
    return engine


def evaluate(
    grid: Mapping[str, np.ndarray], exprs: Mapping[str, Callable[..., exp.Expression]]
) -> dict[str, np.ndarray]:
    """Evaluate SQL expressions row by row over ``grid`` on an in-memory DuckDB.

    Parameters
    ----------
    grid:
        Column name -> 1-d float array (all the same length, finite values only).
    exprs:
        Output name -> function that takes one ``sqlexpr.col`` per grid column (in the
        order of ``grid``) and returns the expression to evaluate.
    """
    names = list(grid)
    columns = [np.asarray(grid[n], dtype=float) for n in names]
    rows = [
        exp.Tuple(expressions=[S.num(float(i)), *(S.num(float(c[i])) for c in columns)])
        for i in range(len(columns[0]))
    ]
    source = exp.Values(
        expressions=rows,
        alias=exp.TableAlias(this=S.ident("t"), columns=[S.ident(n) for n in ["i", *names]]),
    )
    selected = [S.alias(make(*(S.col(n) for n in names)), out) for out, make in exprs.items()]
    tree = S.select(selected, source).order_by(S.col("i"), copy=False)
    engine = _engine()
    got = engine.fetch_columns(engine.dialect.render(tree))
    return {k: np.asarray(v, dtype=float) for k, v in got.items()}


def central_difference(f: Callable[[np.ndarray], np.ndarray], x: np.ndarray) -> np.ndarray:
    """df/dx by a central difference with the relative step h = eps^(1/3) |x| (eps^(1/3) at
    x = 0): truncation and rounding errors balance at about eps^(2/3) ~ 4e-11 relative where
    f neither saturates nor varies on a scale much shorter than |x| (common practice)."""
    x = np.asarray(x, dtype=float)
    h = np.cbrt(np.finfo(float).eps) * np.where(x == 0.0, 1.0, np.abs(x))
    return (f(x + h) - f(x - h)) / (2.0 * h)
