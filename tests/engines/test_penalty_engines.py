"""Penalised fits and the lambda path on each engine (DuckDB, PostgreSQL, Spark local).

Data: scikit-learn's shipped diabetes data (Efron et al. 2004, ``load_diabetes``) as a rating
table (tests/test_penalty.py). Oracle: the KKT conditions of the elastic-net objective,
computed with numpy from the data (a definition; tests/test_penalty.py ``kkt_residual``), and
the DuckDB fit of the same spec.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from engine_support import Loader
from numpy.testing import assert_allclose

import indb

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_penalty import _claims_frame, _design, kkt_residual  # noqa: E402


def test_poisson_elastic_net_and_path_on_each_engine(loader: Loader) -> None:
    frame = _claims_frame()
    table = loader.load("pen_claims", frame)
    lam, a = 0.05, 0.6
    kw = {
        "offset": "ln(expo)",
        "frequency_weight": "fw",
        "predictors": ["x0", "x2", "x3", "x8", "region"],
        "l1_share": a,
    }
    got = indb.fit(table, "claims", "poisson", db=loader.engine, penalty=lam, tol=1e-14, **kw)
    xd = _design(got, frame)
    f = np.r_[0.0, np.ones(xd.shape[1] - 1)]
    res = kkt_residual(
        xd,
        frame["claims"].to_numpy(float),
        got.estimates,
        lam,
        a,
        f,
        family="poisson",
        w=frame["fw"].to_numpy(),
        offset=np.log(frame["expo"].to_numpy()),
    )
    assert res < 1e-7, loader.name
    assert np.isnan(got.std_errors).all()
    path = indb.fit(table, "claims", "poisson", db=loader.engine, path=5, **kw)
    assert path.penalty_path[0]["nonzero"] == 0 and len(path.penalty_path) == 5
    if loader.name != "duckdb":  # the same spec on DuckDB
        con = indb.connect(None)
        try:
            con.con.register("f", frame)
            con.con.execute("CREATE TABLE pen_claims AS FROM f")
            ref = indb.fit("pen_claims", "claims", "poisson", db=con, path=5, **kw)
        finally:
            con.close()
        for mine, theirs in zip(path.penalty_path, ref.penalty_path, strict=True):
            assert_allclose(mine["penalty"], theirs["penalty"], rtol=1e-8)
            assert_allclose(
                list(mine["coefficients"].values()),
                list(theirs["coefficients"].values()),
                rtol=1e-6,
                atol=1e-8,
            )
