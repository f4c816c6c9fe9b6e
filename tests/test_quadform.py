"""The quadratic form x'Ax through the categorical blocks (``indb.colpairs``,
``indb.quadform``), which the scoring view's standard errors and the diagnostics view's
leverage share.

Oracles: the pairs a row can use, enumerated by brute force over every combination of levels
(reference and unseen ones included); the SQL form evaluated by DuckDB against x'Ax with numpy
on the design written out as a dense matrix, for a random symmetric A.
"""

from __future__ import annotations

import itertools

import duckdb
import numpy as np
import pytest
from numpy.testing import assert_allclose
from sqlglot import exp

from indb import colpairs
from indb import sqlexpr as S
from indb.colpairs import PairColumn, compatible_pairs
from indb.engines.duckdb import DuckDBDialect
from indb.quadform import Linear, quadratic_form_sql

# A: levels a0 (reference) a1 a2 with a quote; B: b0 (reference) b1; x numeric
A_LEVELS = ["a0", "a1", "it's a2"]
B_LEVELS = ["b0", "b1"]
COLUMNS = [
    PairColumn((), (), "one"),  # intercept
    PairColumn(("A",), ("a1",), "one"),
    PairColumn(("A",), ("it's a2",), "one"),
    PairColumn(("B",), ("b1",), "one"),
    PairColumn((), (), "x"),
    PairColumn(("A", "B"), ("a1", "b1"), "one"),
    PairColumn(("A", "B"), ("it's a2", "b1"), "one"),
    PairColumn(("A",), ("a1",), "x"),
    PairColumn(("A",), ("it's a2",), "x"),
]


def design_row(a: str | None, b: str | None, x: float) -> np.ndarray:
    """The row's design vector written out: a column is on where its levels are the row's."""
    row = {"A": a, "B": b}
    out = np.zeros(len(COLUMNS))
    for j, c in enumerate(COLUMNS):
        on = all(row[f] == lv for f, lv in zip(c.factors, c.levels, strict=True))
        out[j] = (x if c.value == "x" else 1.0) if on else 0.0
    return out


def test_pairs_are_those_some_row_uses() -> None:
    used: set[tuple[int, int]] = set()
    for a, b in itertools.product([*A_LEVELS, "unseen", None], [*B_LEVELS, None]):
        on = np.flatnonzero(design_row(a, b, 1.0))
        used |= {(int(j), int(k)) for j in on for k in on if j <= k}
    rows, cols = compatible_pairs(COLUMNS)
    assert set(zip(rows.tolist(), cols.tolist(), strict=True)) == used
    assert len(rows) == len(used)  # no pair twice
    assert np.all(rows <= cols)


def test_more_pairs_than_the_limit_gives_none(monkeypatch: pytest.MonkeyPatch) -> None:
    n = len(compatible_pairs(COLUMNS)[0])
    monkeypatch.setattr(colpairs, "MAX_PAIRS", n - 1)
    assert compatible_pairs(COLUMNS) is None
    monkeypatch.setattr(colpairs, "MAX_PAIRS", n)
    assert compatible_pairs(COLUMNS) is not None


def test_sql_form_is_x_a_x() -> None:
    rng = np.random.default_rng(15)
    m = rng.normal(size=(len(COLUMNS), len(COLUMNS)))
    a = m @ m.T  # symmetric, full: entries a row never uses are never read
    rows, cols = compatible_pairs(COLUMNS)
    b = rng.normal(size=len(COLUMNS))
    b[3] = 0.0  # a zero coefficient's lookup entry is left out: a miss reads 0
    form = quadratic_form_sql(
        COLUMNS,
        rows,
        cols,
        a[rows, cols],
        {"one": None, "x": S.col("x")},
        "q",
        linear=Linear(b, {"one": None, "x": S.mul(S.col("x"), S.num(1.0))}),
        levels={"A": A_LEVELS, "B": B_LEVELS},
    )
    data = [
        (a_, b_, float(x))
        for (a_, b_), x in zip(
            itertools.product([*A_LEVELS, "unseen", None], [*B_LEVELS, None]),
            rng.normal(size=15) * 10,
            strict=True,
        )
    ]
    con = duckdb.connect()
    con.execute('CREATE TABLE t ("A" VARCHAR, "B" VARCHAR, x DOUBLE, id INTEGER)')
    con.executemany("INSERT INTO t VALUES (?, ?, ?, ?)", [(*r, i) for i, r in enumerate(data)])
    d = DuckDBDialect()
    src = exp.Table(this=S.ident("t"))
    select = [S.col("id"), S.alias(form.value, "q"), S.alias(form.linear, "xb")]
    query = form.joined(S.select([*select, S.alias(form.known, "known")], src))
    got = {r[0]: r[1:] for r in con.execute(d.render(query)).fetchall()}
    want = [design_row(*r) @ a @ design_row(*r) for r in data]
    assert_allclose([got[i][0] for i in range(len(data))], want, rtol=1e-12)
    assert_allclose([got[i][1] for i in range(len(data))], [design_row(*r) @ b for r in data])
    # known: both levels are levels of their factor, the references included
    known = [r[0] in A_LEVELS and r[1] in B_LEVELS for r in data]
    assert [bool(got[i][2]) for i in range(len(data))] == known
    # one lookup per set of factors two columns meet on: {A}, {B}, {A, B}
    assert len(form.lookups) == 3
