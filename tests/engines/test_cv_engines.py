"""k-fold cross-validation of a lambda path on each engine (DuckDB, PostgreSQL, Spark local).

Data: scikit-learn's shipped diabetes data (Efron et al. 2004, ``load_diabetes``) with a row
id from -100 up (tests/test_cv.py). Oracle: the same spec on DuckDB, whose per-fold numbers
tests/test_cv.py checks against scikit-learn refits; here the fold rule
``((id % K) + K) % K`` must pick the same rows on every engine, so the fold tables agree.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from engine_support import Loader
from numpy.testing import assert_allclose

import indb

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_cv import _frame  # noqa: E402


def test_cv_fold_table_is_the_same_on_each_engine(loader: Loader) -> None:
    _, _, frame = _frame()
    table = loader.load("cv_rows", frame)
    kw = {"path": 4, "path_ratio": 0.01, "l1_share": 0.5, "folds": 3, "fold_by": "id"}
    kw.update(exclude=["id"], tol=1e-12, max_iter=100)
    got = indb.fit(table, "y", db=loader.engine, **kw)
    con = indb.connect(None)
    try:
        con.con.register("f", frame)
        con.con.execute("CREATE TABLE cv_rows AS FROM f")
        ref = indb.fit("cv_rows", "y", db=con, **kw)
    finally:
        con.close()
    mine = np.array([r["per_fold"] for r in got.cv])
    theirs = np.array([r["per_fold"] for r in ref.cv])
    assert_allclose(mine, theirs, rtol=1e-7, err_msg=loader.name)
    assert got.chosen_penalty is not None
    assert_allclose(got.chosen_penalty, ref.chosen_penalty, rtol=1e-9)
    assert_allclose(got.estimates, ref.estimates, rtol=1e-6, atol=1e-8)
